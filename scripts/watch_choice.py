"""Which validation score should choose the kept epoch? A small measurement on open data.

For GunPoint and ItalyPowerDemand (UCR archive, shipped in aeon; the archive's
train/test split, validation carved out of train by class), fit the same
networks over several seeds with ``watch="loss"`` and ``watch="metric"``
(validation accuracy, ties by loss) and print the test accuracy of the kept
epoch. Usage: python scripts/watch_choice.py [--seeds 5] [--epochs 60]
"""
import argparse
import time

import numpy as np
import pandas as pd
from aeon.datasets import load_classification

import rnnkit


def frame(name):
    parts = []
    for part in ("train", "test"):
        x, y = load_classification(name, split=part)
        n, c, steps = x.shape
        d = pd.DataFrame(x.transpose(0, 2, 1).reshape(-1, c), columns=[f"c{i}" for i in range(c)])
        d["case"] = np.repeat([f"{part}{i:04d}" for i in range(n)], steps)
        d["label"] = np.repeat(y, steps)
        d["part"] = part
        parts.append(d)
    return pd.concat(parts, ignore_index=True)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--seeds", type=int, default=5)
    ap.add_argument("--epochs", type=int, default=60)
    args = ap.parse_args()
    rows = []
    for name in ("GunPoint", "ItalyPowerDemand"):
        df = frame(name)
        base = rnnkit.Config(target="label", task="classification", window="full", group_column="case",
                             split_column="part", season=None, hidden=8, epochs=args.epochs,
                             patience=10, batch_size=16, lr=0.01, target_as_input=False)
        for seed in range(args.seeds):
            for watch in ("loss", "metric"):
                t0 = time.perf_counter()
                r = rnnkit.fit(df, base.replace(seed=seed, watch=watch), progress=False)
                rows.append({"data": name, "seed": seed, "watch": watch, "kept_epoch": r.best_epoch,
                             "epochs_run": len(r.history),
                             "val_accuracy": r.metrics.loc["rnn", "val_accuracy"],
                             "test_accuracy": r.metrics.loc["rnn", "test_accuracy"],
                             "seconds": time.perf_counter() - t0})
                print(rows[-1], flush=True)
    t = pd.DataFrame(rows)
    print(t.groupby(["data", "watch"])[["kept_epoch", "val_accuracy", "test_accuracy"]]
          .agg(["mean", "std"]).round(3).to_string())
    wide = t.pivot_table(index=["data", "seed"], columns="watch", values="test_accuracy")
    print("metric - loss, test accuracy per (data, seed):")
    print((wide["metric"] - wide["loss"]).round(3).to_string())


if __name__ == "__main__":
    main()
