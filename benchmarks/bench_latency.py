"""Latency of one fit of the default config on the demo data, cold and warm, with a breakdown.

    python benchmarks/bench_latency.py            # cold fit in a fresh process, then 3 warm fits
    python benchmarks/bench_latency.py --smoke    # tiny data; only checks that everything runs

The fit is the one a new user runs first:

    rnnkit.fit(rnnkit.datasets.cold_storage_load(),
               rnnkit.Config(target="load_kw", missing="interpolate"), progress=False)

Cold: the first fit in a fresh Python process. The clock starts after the
imports and after the demo frame is generated, so it holds everything fit()
does, compiles included. Warm: the same fit again in that process (median of
``--repeats``). Targets: warm under 2 s, cold under 5 s.

Breakdown: fit() is a composition of a few module-level functions of
``rnnkit.fitting._fit`` (prepare, train, network_predictions, fit_baselines,
baseline_predictions, score, frame_actuals). This script wraps each with a
timer for the duration of the measurement, and a jax.monitoring listener
attributes compile time (trace + lowering + XLA compile) to the phase it
happened in. Training epochs come from the fit's own history. Diagnostics are
measured on first use, not by fit(); their first use is timed apart.
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _util  # noqa: E402

HERE = Path(__file__).resolve()
WARM_LIMIT = 2.0
COLD_LIMIT = 5.0
# Names fit() looks up in rnnkit.fitting._fit at call time; each becomes a timed phase.
PHASES = ("prepare", "train", "frame_actuals", "network_predictions", "fit_baselines",
          "baseline_predictions", "score")


class PhaseClock:
    """Wall and compile seconds per phase of fit(), by wrapping rnnkit.fitting._fit's functions."""

    def __init__(self, module, clock: _util.CompileClock):
        self.module, self.clock = module, clock
        self.wall, self.compile = {}, {}
        self._saved = {}

    def _wrap(self, name, fn):
        def timed(*args, **kwargs):
            c0, t0 = self.clock.seconds, time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.wall[name] = self.wall.get(name, 0.0) + time.perf_counter() - t0
                self.compile[name] = self.compile.get(name, 0.0) + self.clock.seconds - c0
        return timed

    def __enter__(self):
        for name in PHASES:
            fn = getattr(self.module, name, None)
            if callable(fn):
                self._saved[name] = fn
                setattr(self.module, name, self._wrap(name, fn))
        return self

    def __exit__(self, *exc):
        for name, fn in self._saved.items():
            setattr(self.module, name, fn)

    def reset(self):
        self.wall, self.compile = {}, {}

    def table(self) -> dict:
        """Seconds per phase; score's own share without the baselines it calls."""
        wall = dict(self.wall)
        comp = dict(self.compile)
        for inner in ("fit_baselines", "baseline_predictions", "network_predictions"):
            # score() calls the baselines; fit() calls network_predictions itself
            if inner != "network_predictions" and "score" in wall:
                wall["score"] -= wall.get(inner, 0.0)
                comp["score"] -= comp.get(inner, 0.0)
        wall = {("metrics" if k == "score" else k): round(v, 3) for k, v in wall.items()}
        comp = {("metrics" if k == "score" else k): round(v, 3) for k, v in comp.items()}
        return {"wall": wall, "compile": comp}


def _one_fit(rnnkit, df, config, phases):
    phases.reset()
    c0, cc0 = phases.clock.seconds, phases.clock.cpu_seconds
    cpu0, t0 = time.process_time(), time.perf_counter()
    res = rnnkit.fit(df, config, progress=False)
    seconds = time.perf_counter() - t0
    cpu = time.process_time() - cpu0  # all threads; beside wall time it shows how shared the CPU was
    epochs = res.history["seconds"].to_numpy()
    steps = -(-len(res.prepared.starts["train"]) // res.config.batch_size)  # minibatches per epoch
    breakdown = phases.table()
    breakdown["wall"]["training_epochs"] = round(float(epochs.sum()), 3)
    breakdown["wall"]["train_other"] = round(breakdown["wall"].get("train", 0.0) - float(epochs.sum()), 3)
    return res, {"seconds": round(seconds, 3), "cpu_seconds": round(cpu, 3),
                 "compile_seconds": round(phases.clock.seconds - c0, 3),
                 "compile_cpu_seconds": round(phases.clock.cpu_seconds - cc0, 3),
                 "epochs": int(len(epochs)), "status": res.status, "training_programs": res.compiles,
                 "steps_per_epoch": steps, "val_windows": int(len(res.prepared.starts["val"])),
                 "first_epoch_seconds": round(float(epochs[0]), 3),
                 "later_epoch_median_seconds": round(float(statistics.median(epochs[1:])), 4)
                 if len(epochs) > 1 else None,
                 "breakdown": breakdown}


def child(smoke: bool, repeats: int) -> dict:
    """Cold fit, then warm fits, in this (fresh) process."""
    t_import = time.perf_counter()
    import rnnkit
    from rnnkit.fitting import _fit
    import_seconds = time.perf_counter() - t_import

    t_data = time.perf_counter()
    df = rnnkit.datasets.cold_storage_load(years=0.05) if smoke else rnnkit.datasets.cold_storage_load()
    data_seconds = time.perf_counter() - t_data
    config = rnnkit.Config(target="load_kw", missing="interpolate")
    if smoke:
        config = config.replace(epochs=2, hidden=4)
    with _util.CompileClock() as clock, PhaseClock(_fit, clock) as phases:
        res, cold = _one_fit(rnnkit, df, config, phases)
        cold["compile_detail"] = clock.summary()
        warm = [_one_fit(rnnkit, df, config, phases)[1] for _ in range(repeats)]
        c0, t0 = clock.seconds, time.perf_counter()
        _ = res.diagnostics
        diag = {"seconds": round(time.perf_counter() - t0, 3),
                "compile_seconds": round(clock.seconds - c0, 3)}
    return {"rows": len(df), "config": config.to_dict(), "import_seconds": round(import_seconds, 3),
            "data_seconds": round(data_seconds, 3), "cold": cold, "warm": warm,
            "diagnostics_first_use": diag, "load_average": _util.load_average()}


def measure(smoke: bool, repeats: int) -> dict:
    args = [str(HERE), "--child", "--repeats", str(repeats)] + (["--smoke"] if smoke else [])
    got = _util.run_child(args, timeout=1800)
    warm = statistics.median(w["seconds"] for w in got["warm"])
    cold = got["cold"]["seconds"]
    targets = [_util.target("latency.warm_fit", warm, f"< {WARM_LIMIT:g} s", warm < WARM_LIMIT, " s"),
               _util.target("latency.cold_fit", cold, f"< {COLD_LIMIT:g} s", cold < COLD_LIMIT, " s")]
    return {"benchmark": "latency", "smoke": smoke, "targets": targets, "warm_median_seconds": warm,
            **got}


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--smoke", action="store_true", help="tiny data: checks that it runs")
    ap.add_argument("--quick", action="store_true", help="one warm fit instead of three")
    ap.add_argument("--repeats", type=int, default=None, help="warm fits (default 3; 1 with --quick)")
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    repeats = args.repeats or (1 if (args.quick or args.smoke) else 3)
    if args.child:
        result = child(args.smoke, repeats)
    else:
        result = measure(args.smoke, repeats)
        c = result["cold"]
        print(f"fit on {result['rows']} rows: cold {c['seconds']:.2f} s wall, {c['cpu_seconds']:.2f} s CPU "
              f"(compile {c['compile_seconds']:.2f} s wall, {c['compile_cpu_seconds']:.2f} s CPU; "
              f"{c['epochs']} epochs), warm "
              f"{result['warm_median_seconds']:.2f} s; imports {result['import_seconds']:.1f} s "
              "(not counted)")
        print("cold breakdown (s):", c["breakdown"]["wall"])
        print("cold compile by phase (s):", c["breakdown"]["compile"])
        print("warm breakdown (s):", result["warm"][0]["breakdown"]["wall"])
    _util.emit(result)
    return result


if __name__ == "__main__":
    main()
