"""Backtest cost: compiles and wall time of 1 and 5 folds, and of a hand loop of fit() per fold.

    python benchmarks/bench_backtest.py [--rounds 2]

Each measurement runs in a fresh process (nothing compiled yet), on aeon's Airline
series (144 months; window 12, hidden 8, 30 epochs, folds of 12 months). The sides
take turns round by round, so a busy machine's load falls on all of them alike;
the best round of each is reported. Targets: 5 folds compile no more programs than
1 fold, and the shared-plan backtest is faster than the hand loop (which compiles
a program per fold: every fold has its own number of training windows).
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys

CHILD = r"""
import json, sys, time
import pandas as pd, rnnkit
from aeon.datasets import load_airline
from rnnkit.fitting._backtest import fold_frame, plan_folds
y = load_airline()
df = pd.DataFrame({"passengers": y}, index=pd.period_range("1949-01", periods=144, freq="M").to_timestamp())
cfg = rnnkit.Config(target="passengers", window=12, hidden=8, epochs=30, patience=None)
side, k = sys.argv[1], int(sys.argv[2])
t = time.perf_counter()
if side == "backtest":
    bt = rnnkit.backtest(df, cfg, folds=k, test_size=12, progress=False)
else:
    folds, fcfg, col, _ = plan_folds(df, cfg, k, test_size=12)
    for f in folds:
        rnnkit.fit(fold_frame(df, f, col), fcfg, progress=False)
print(json.dumps({"seconds": time.perf_counter() - t, "compiles": rnnkit.compile_count()}))
"""


def once(side: str, k: int) -> dict:
    out = subprocess.run([sys.executable, "-c", CHILD, side, str(k)], capture_output=True, text=True,
                         check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=2)
    args = ap.parse_args()
    sides = [("backtest", 1), ("backtest", 5), ("hand loop", 5)]
    best = {s: None for s in sides}
    for _ in range(args.rounds):
        for s in sides:
            r = once("backtest" if s[0] == "backtest" else "loop", s[1])
            if best[s] is None or r["seconds"] < best[s]["seconds"]:
                best[s] = r
    for (side, k), r in best.items():
        print(f"{side:>9}, {k} fold(s): {r['compiles']} programs compiled, {r['seconds']:.1f} s (best round)")
    one, five, loop = best[sides[0]], best[sides[1]], best[sides[2]]
    ok = five["compiles"] <= one["compiles"]
    print(f"TARGET backtest.compiles_5_vs_1: {five['compiles']} vs {one['compiles']} (target 5 folds <= 1 fold) "
          f"{'PASS' if ok else 'MISS'}")
    ratio = loop["seconds"] / five["seconds"]
    print(f"TARGET backtest.speedup_vs_hand_loop: {ratio:.2f}x (target > 1x) {'PASS' if ratio > 1 else 'MISS'}")


if __name__ == "__main__":
    main()
