"""Latency of FitResult.forecast: 24 steps with prediction intervals on the demo data.

    python benchmarks/bench_forecast.py            # fit once, then time forecasts (cold and warm)
    python benchmarks/bench_forecast.py --smoke    # tiny data; only checks that everything runs

Two forecasts of 24 hours on ``cold_storage_load`` (hourly), each after one fit
in a fresh process (the fit is not timed):

- target only: ``Config(target="load_kw", features=(), horizon=12)``, forecast(24)
  from the training frame: two blocks of 12 leads, the second reading the first;
- with input columns: ``Config(target="load_kw", missing="interpolate", horizon=24)``
  fitted without the last 24 rows, then forecast(df=<whole frame with those 24
  targets emptied>): the frame is prepared with the fitted scaler and the future
  temperatures and door counts are read from it.

Cold: the first forecast in the process (its one rollout program compiles).
Warm: median of ``--repeats`` more. Target: warm < 0.5 s for both. The number
of programs compiled by the warm forecasts is reported (it must be 0: one
compiled program computes a whole forecast).
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
WARM_LIMIT = 0.5


def _programs():
    from rnnkit.training import _rollout

    return len(_rollout._CACHE)


def _time(fn, repeats):
    t0 = time.perf_counter()
    out = fn()
    cold = time.perf_counter() - t0
    warm = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        warm.append(time.perf_counter() - t0)
    return out, cold, warm


def child(smoke: bool, repeats: int) -> dict:
    import numpy as np
    import rnnkit

    df = rnnkit.datasets.cold_storage_load(years=0.05) if smoke else rnnkit.datasets.cold_storage_load()
    small = dict(epochs=2, hidden=4) if smoke else {}
    result = {"rows": len(df)}

    fit = rnnkit.fit(df, rnnkit.Config(target="load_kw", features=(), missing="interpolate", horizon=12,
                                       **small), progress=False)
    before = _programs()
    out, cold, warm = _time(lambda: fit.forecast(24), repeats)
    result["target_only"] = {"cold_seconds": round(cold, 4), "warm_seconds": [round(w, 4) for w in warm],
                             "programs": _programs() - before, "rows_out": len(out),
                             "bounds": [c for c in out.columns if c.startswith(("lower", "upper"))]}

    known = df.iloc[:-24]
    fit = rnnkit.fit(known, rnnkit.Config(target="load_kw", missing="interpolate", horizon=24, **small),
                     progress=False)
    frame = df.copy()
    frame.iloc[-24:, frame.columns.get_loc("load_kw")] = np.nan
    before = _programs()
    out, cold, warm = _time(lambda: fit.forecast(df=frame), repeats)
    result["future_inputs"] = {"cold_seconds": round(cold, 4), "warm_seconds": [round(w, 4) for w in warm],
                               "programs": _programs() - before, "rows_out": len(out)}
    return result


def measure(smoke: bool, repeats: int) -> dict:
    args = [str(HERE), "--child", "--repeats", str(repeats)] + (["--smoke"] if smoke else [])
    got = _util.run_child(args, timeout=1800)
    targets = []
    for key, name in (("target_only", "forecast.warm_24_steps"),
                      ("future_inputs", "forecast.warm_24_steps_future_inputs")):
        warm = statistics.median(got[key]["warm_seconds"])
        got[key]["warm_median_seconds"] = warm
        targets.append(_util.target(name, warm, f"< {WARM_LIMIT:g} s", warm < WARM_LIMIT, " s"))
    return {"benchmark": "forecast", "smoke": smoke, "targets": targets, **got}


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--smoke", action="store_true", help="tiny data: checks that it runs")
    ap.add_argument("--quick", action="store_true", help="3 warm forecasts instead of 10")
    ap.add_argument("--repeats", type=int, default=None, help="warm forecasts (default 10)")
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    repeats = args.repeats or (3 if (args.quick or args.smoke) else 10)
    if args.child:
        result = child(args.smoke, repeats)
    else:
        result = measure(args.smoke, repeats)
        for key in ("target_only", "future_inputs"):
            r = result[key]
            print(f"{key}: 24 steps on {result['rows']} rows: cold {r['cold_seconds']:.3f} s, warm median "
                  f"{r['warm_median_seconds']:.4f} s; programs compiled {r['programs']}")
    _util.emit(result)
    return result


if __name__ == "__main__":
    main()
