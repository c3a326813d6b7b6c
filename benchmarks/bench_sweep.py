"""Sweep economy: compiled programs, compile time, and the speed-up of two worker processes.

    python benchmarks/bench_sweep.py            # full: about 1-3 minutes per sweep, two sweeps
    python benchmarks/bench_sweep.py --quick    # shorter runs
    python benchmarks/bench_sweep.py --smoke    # tiny; only checks that everything runs

The sweep: 3 hidden sizes x 3 windows x 3 activations (27 runs, one seed) on a
slice of the demo data ``rnnkit.datasets.cold_storage_load``, every run with a
fixed number of epochs (patience off, so each run does the same work whatever
its scores). It runs twice, side by side, each time in a fresh process with a
fresh run store: once with ``workers=1`` (in the sweep's own process, the
default) and once with ``workers=2`` (two spawned worker processes, each bound
to one core, so one XLA thread each, sharing a compilation cache). The serial sweep also measures the compile economy: the
training programs compiled (the table's "compiles" column, and
``rnnkit.training._epoch.compile_count()`` for all programs) and jax's compile time
(trace + lowering + XLA compile, from jax.monitoring).

Targets: at most 3 training programs; compile time under 20% of the sweep's
wall time; 2 workers at least 1.7x faster than 1.

Grid order: largest hidden size first, so the costliest runs start first and
the two workers finish close together (longest job first).
"""
from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _util  # noqa: E402

HERE = Path(__file__).resolve()

# name -> (years of hourly demo rows, epochs per run, grid)
SIZES = {
    "full": (3.0, 25, {"hidden": [32, 16, 8], "window": [48, 24, 12],
                       "activation": ["tanh", "sigmoid", "relu"]}),
    "quick": (1.5, 12, {"hidden": [32, 16, 8], "window": [48, 24, 12],
                        "activation": ["tanh", "sigmoid", "relu"]}),
    "smoke": (0.05, 1, {"hidden": [4], "window": [6, 4], "activation": ["tanh"]}),
}
MAX_TRAINING_PROGRAMS = 3  # one per hidden size
MAX_COMPILE_SHARE = 0.20
MIN_SPEEDUP = 1.7


def _children_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def child(workers: int, size: str, store: str) -> dict:
    """Run the sweep once in this process (imports excluded from the clock); its measurements."""
    t_import = time.perf_counter()
    import rnnkit
    from rnnkit.training import _epoch

    sweep = getattr(rnnkit, "sweep", None)
    if sweep is None:  # not yet re-exported
        from rnnkit.sweeps._sweep import sweep
    import_seconds = time.perf_counter() - t_import

    years, epochs, space = SIZES[size]
    df = rnnkit.datasets.cold_storage_load(years=years)
    config = rnnkit.Config(target="load_kw", missing="interpolate", epochs=epochs, patience=None)
    programs0 = _epoch.compile_count()
    kids0 = _children_cpu()
    with _util.CompileClock() as clock:
        cpu0, t0 = time.process_time(), time.perf_counter()
        res = sweep(df, config, space, seeds=1, workers=workers, store=store, progress=False)
        wall = time.perf_counter() - t0
        cpu = time.process_time() - cpu0
    kids = _children_cpu() - kids0  # worker processes, counted once the pool has joined them
    table = res.table
    return {"workers": workers, "size": size, "rows": len(df), "epochs": epochs,
            "runs": len(table), "wall_seconds": round(wall, 3), "cpu_seconds": round(cpu, 3),
            "worker_cpu_seconds": round(kids, 3),
            "import_seconds": round(import_seconds, 3),
            "run_seconds_sum": round(float(table["seconds"].sum()), 3),
            "training_programs": int(table["compiles"].sum()),
            "compiles_by_hidden": {str(k): int(v) for k, v in
                                   table.groupby("hidden")["compiles"].sum().items()},
            "programs_traced_here": _epoch.compile_count() - programs0,
            "statuses": {str(k): int(v) for k, v in table["status"].value_counts().items()},
            "compile": clock.summary(),
            "load_average": _util.load_average()}


def measure(size: str) -> dict:
    """Both sweeps, each in a fresh process with a fresh store; the targets."""
    timeout = 3600
    out = {}
    with tempfile.TemporaryDirectory(prefix="rnnkit-bench-sweep-") as tmp:
        for workers in (1, 2):
            store = str(Path(tmp) / f"runs-{workers}.db")
            out[workers] = _util.run_child([str(HERE), "--child", "--workers", str(workers),
                                            "--size", size, "--store", store], timeout)
    serial, parallel = out[1], out[2]
    share = serial["compile"]["seconds"] / serial["wall_seconds"]
    # the same share in CPU seconds: what the wall share would be on an idle machine
    share_cpu = serial["compile"]["cpu_seconds"] / max(serial["cpu_seconds"], 1e-9)
    speedup = serial["wall_seconds"] / parallel["wall_seconds"]
    targets = [
        _util.target("sweep.training_programs", serial["training_programs"],
                     f"<= {MAX_TRAINING_PROGRAMS}", serial["training_programs"] <= MAX_TRAINING_PROGRAMS),
        _util.target("sweep.compile_share", 100 * share, f"< {100 * MAX_COMPILE_SHARE:.0f}%",
                     share < MAX_COMPILE_SHARE, "%"),
        _util.target("sweep.speedup_2_workers", speedup, f">= {MIN_SPEEDUP}x", speedup >= MIN_SPEEDUP, "x"),
    ]
    years, epochs, space = SIZES[size]
    return {"benchmark": "sweep", "size": size, "targets": targets,
            "setup": {"rows": serial["rows"], "years": years, "epochs_per_run": epochs,
                      "patience": None, "space": space, "runs": serial["runs"]},
            "serial": serial, "parallel": parallel,
            "speedup": round(speedup, 3), "compile_share": round(share, 4),
            "compile_share_cpu": round(share_cpu, 4)}


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    group = ap.add_mutually_exclusive_group()
    group.add_argument("--quick", action="store_true", help="shorter runs")
    group.add_argument("--smoke", action="store_true", help="tiny sweep: checks that it runs")
    ap.add_argument("--size", choices=sorted(SIZES), help=argparse.SUPPRESS)
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--workers", type=int, default=1, help=argparse.SUPPRESS)
    ap.add_argument("--store", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    size = args.size or ("smoke" if args.smoke else "quick" if args.quick else "full")
    if args.child:
        result = child(args.workers, size, args.store)
    else:
        result = measure(size)
        s, p = result["serial"], result["parallel"]
        print(f"sweep of {s['runs']} runs on {s['rows']} rows, {s['epochs']} epochs each: "
              f"1 worker {s['wall_seconds']:.1f} s, 2 workers {p['wall_seconds']:.1f} s; "
              f"compile {s['compile']['seconds']:.1f} s wall, {s['compile']['cpu_seconds']:.1f} s CPU of the "
              f"serial sweep's {s['cpu_seconds']:.1f} s CPU ({s['compile']['by_phase']}); programs "
              f"traced {s['programs_traced_here']}")
    _util.emit(result)
    return result


if __name__ == "__main__":
    main()
