"""Peak resident memory of prepare() plus training on a 10-million-row series, window 128.

    python benchmarks/bench_train_memory.py               # 10 million rows, 200 capped steps
    python benchmarks/bench_train_memory.py --steps 0     # one whole epoch (minutes)
    python benchmarks/bench_train_memory.py --smoke       # 200 000 rows, 5 steps

Extends ``bench_memory.py`` (prepare only) with training: the same kind of
frame (three float32 columns, minutely index) is prepared and trained on with
``_train.train`` for one epoch, in a fresh process whose peak resident set
(``resource.getrusage(...).ru_maxrss``) is the number reported. Target: under
2 GB.

Capped steps. One epoch over ~7 million training windows is ~110 000
optimizer steps; by default the epoch is cut to ``--steps`` minibatches (and
the validation pass to as many batches' worth of windows) by lowering the
number of real windows handed to the compiled epoch program. Everything else
is the real epoch: the whole series and every window start on the device, and
the shuffle over ALL training windows. What a step allocates does not grow
with the number of steps (the loop carries only parameters and optimizer
state), so the peak of a capped epoch is the peak of a whole one.
"""
from __future__ import annotations

import argparse
import resource
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _util  # noqa: E402

HERE = Path(__file__).resolve()
LIMIT_MB = 2048


def _rss_mb() -> float:
    kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kilobytes on Linux
    return kb / 1024.0 if sys.platform != "darwin" else kb / 2**20


def _rss_now_mb() -> float:
    """The resident set right now (Linux /proc), or NaN elsewhere."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return float("nan")


def _capped(program, windows: int):
    """The epoch program, told that only the first ``windows`` entries of each split are real."""
    import jax.numpy as jnp

    def run(state, series, train, val, act):
        cap = jnp.asarray(windows, train.n.dtype)
        return program(state, series, train._replace(n=jnp.minimum(train.n, cap)),
                       val._replace(n=jnp.minimum(val.n, cap)), act)
    return run


def child(rows: int, window: int, steps: int) -> dict:
    import numpy as np
    import pandas as pd

    from rnnkit import Config, prepare
    from rnnkit.training import _epoch
    from rnnkit.training._train import train

    rss_imports = _rss_mb()
    rng = np.random.default_rng(0)
    # minutely steps: 10 million hours would run past the last date pandas can hold
    df = pd.DataFrame({"load": rng.standard_normal(rows).astype(np.float32),
                       "temp": rng.standard_normal(rows).astype(np.float32),
                       "wind": rng.standard_normal(rows).astype(np.float32)},
                      index=pd.date_range("2000-01-01", periods=rows, freq="min"))
    cfg = Config(target="load", window=window, horizon=1, dtype="float32", epochs=1)
    rss_frame = _rss_mb()
    t0 = time.perf_counter()
    p = prepare(df, cfg)
    prepare_seconds = time.perf_counter() - t0
    rss_prepare = _rss_mb()
    rss_before_train = _rss_now_mb()  # the peak above may be a transient inside prepare

    batch = cfg.batch_size
    original = _epoch.epoch_program
    if steps > 0:
        _epoch.epoch_program = lambda **kw: _capped(original(**kw), steps * batch)
    try:
        t0 = time.perf_counter()
        out = train(p, p.config, progress=False)
        train_seconds = time.perf_counter() - t0
    finally:
        _epoch.epoch_program = original
    n_train = len(p.starts["train"])
    return {"rows": rows, "window": window, "inputs": p.n_inputs, "hidden": cfg.hidden,
            "batch_size": batch, "train_windows": n_train,
            "steps": steps if steps > 0 else -(-n_train // batch), "capped": steps > 0,
            "train_loss": float(out.history["train_loss"].iloc[0]), "status": out.status,
            "frame_mb": round(df.memory_usage(index=True).sum() / 2**20, 1),
            "materialised_copy_mb": round(n_train * window * p.n_inputs * 4 / 2**20, 1),
            "rss_after_imports_mb": round(rss_imports, 1), "rss_after_frame_mb": round(rss_frame, 1),
            "rss_after_prepare_mb": round(rss_prepare, 1),
            "rss_now_before_train_mb": round(rss_before_train, 1), "rss_peak_mb": round(_rss_mb(), 1),
            "prepare_seconds": round(prepare_seconds, 2), "train_seconds": round(train_seconds, 2)}


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=None, help="rows of the series (default 10 000 000)")
    ap.add_argument("--window", type=int, default=128)
    ap.add_argument("--steps", type=int, default=None,
                    help="optimizer steps of the capped epoch (default 200); 0: the whole epoch")
    ap.add_argument("--smoke", action="store_true", help="200 000 rows, 5 steps: checks that it runs")
    ap.add_argument("--quick", action="store_true", help="accepted for run.py; same as the default")
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    rows = args.rows or (200_000 if args.smoke else 10_000_000)
    steps = args.steps if args.steps is not None else (5 if args.smoke else 200)
    if args.child:
        result = child(rows, args.window, steps)
    else:
        got = _util.run_child([str(HERE), "--child", "--rows", str(rows), "--window", str(args.window),
                               "--steps", str(steps)], timeout=3600)
        peak = got["rss_peak_mb"]
        result = {"benchmark": "memory", **got,
                  "targets": [_util.target("memory.prepare_and_train_peak_rss", peak,
                                           f"< {LIMIT_MB} MB", peak < LIMIT_MB, " MB")]}
        print(f"{rows} rows, window {args.window}: peak resident {peak:.0f} MB (after imports "
              f"{got['rss_after_imports_mb']:.0f}, frame {got['rss_after_frame_mb']:.0f}, prepare "
              f"{got['rss_after_prepare_mb']:.0f}; resident before training "
              f"{got['rss_now_before_train_mb']:.0f}); {got['steps']} steps"
              f"{' (capped)' if got['capped'] else ''} in {got['train_seconds']:.1f} s; a materialised "
              f"window copy would be {got['materialised_copy_mb']:.0f} MB")
    _util.emit(result)
    return result


if __name__ == "__main__":
    main()
