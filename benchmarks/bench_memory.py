"""Peak memory of prepare() on a long series: it must grow with rows, not rows x window.

    python benchmarks/bench_memory.py                 # 10 million rows, window 128
    python benchmarks/bench_memory.py --rows 1000000  # smaller

Reports (one JSON line): the peak of memory traced by tracemalloc while prepare()
runs (numpy and pandas report their buffers to it), the process's peak resident
set (resource.getrusage, which includes the frame itself), and the size that a
materialised (N, window, I) copy would have had. Target: peak resident under 2 GB.
"""
from __future__ import annotations

import argparse
import json
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd


def _rss_mb() -> float:
    kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kilobytes on Linux
    return kb / 1024.0 if sys.platform != "darwin" else kb / 2**20


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--window", type=int, default=128)
    args = ap.parse_args(argv)

    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout
    from rnnkit import Config, prepare

    rng = np.random.default_rng(0)
    n = args.rows
    # minutely steps: 10 million hours would run past the last date pandas can hold
    df = pd.DataFrame({"load": rng.standard_normal(n).astype(np.float32),
                       "temp": rng.standard_normal(n).astype(np.float32),
                       "wind": rng.standard_normal(n).astype(np.float32)},
                      index=pd.date_range("2000-01-01", periods=n, freq="min"))
    cfg = Config(target="load", window=args.window, horizon=1, dtype="float32")
    rss_before = _rss_mb()

    tracemalloc.start()
    t0 = time.perf_counter()
    p = prepare(df, cfg)
    seconds = time.perf_counter() - t0
    _, traced_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()

    x, _, _ = p.windows("train")
    n_windows = sum(len(s) for s in p.starts.values())
    out = {"rows": n, "window": args.window, "inputs": p.n_inputs, "windows": n_windows,
           "seconds": round(seconds, 2),
           "traced_peak_mb": round(traced_peak / 2**20, 1),
           "rss_before_mb": round(rss_before, 1),
           "rss_peak_mb": round(_rss_mb(), 1),
           "frame_mb": round(df.memory_usage(index=True).sum() / 2**20, 1),
           "materialised_copy_mb": round(n_windows * args.window * p.n_inputs * 4 / 2**20, 1),
           "train_x_is_view": bool(np.shares_memory(x, p.inputs)),
           "target_mb": 2048}
    out["under_target"] = out["rss_peak_mb"] < out["target_mb"]
    print(json.dumps(out))
    return out


if __name__ == "__main__":
    main()
