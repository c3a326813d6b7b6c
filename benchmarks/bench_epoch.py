"""One training epoch, old code against new, side by side in one process (run alone, not by run.py).

    python benchmarks/bench_epoch.py                 # three shapes, 15 rounds each
    python benchmarks/bench_epoch.py --quick         # the default fit's shape only, 8 rounds
    python benchmarks/bench_epoch.py --base <ref>    # compare with another commit

The "old" side is rnnkit as it was at ``--base`` (a git commit of this repository,
by default the last one before the epoch was made faster), unpacked with
``git archive`` into a temporary folder and imported as the package
``rnnkit_base``; the "new" side is this checkout. Each side prepares the same
frame with its own ``prepare`` and runs its own compiled epoch program
(``training/_epoch.epoch_program``, called as ``training/_train.train`` calls it:
shuffle, every minibatch's gather + loss + BPTT + optax step, the validation
pass). The sides take turns, one epoch each per round (the order alternating),
so both see the same load; each reports its median over the rounds, and the
ratio old / new of those medians is the speed-up.

Shapes (B, T, I, H):
  default   the default fit: ``cold_storage_load(years=2.0)``, target load_kw,
            missing="interpolate"; (64, 24, 3, 32), 192 minibatches, about 2,600
            validation windows
  medium    (64, 100, 3, 128) on an invented frame of sines, 16 minibatches
  large     (128, 200, 8, 256) on an invented frame of sines, 4 minibatches

Before timing, both sides run one epoch from the same initial state and the
script prints the largest relative difference of the parameters and of the
losses (float rounding: about 1e-6 in float32).

Prints one row per shape, the TARGET line of the default shape and a RESULT line (JSON).
"""
from __future__ import annotations

import argparse
import importlib
import io
import statistics
import subprocess
import sys
import tarfile
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import _util  # noqa: E402

# The last commit before the epoch was made faster (issue 18): the recurrence with a
# matrix product for x_t U, the (T, B, H) cotangent of a many-to-one loss, db by reduction.
BASE = "3e86d3c0c6a8765e06c54199e4d72d4ac58e2928"
SHAPES = {"default": None, "medium": (64, 100, 3, 128, 16), "large": (128, 200, 8, 256, 4)}
TARGET_SPEEDUP = 1.15  # old / new at the default fit's shape


def base_package(ref: str, folder: Path):
    """rnnkit as of git commit ``ref``, imported as ``rnnkit_base`` from ``folder``."""
    tar = subprocess.run(["git", "archive", ref, "rnnkit"], cwd=_util.ROOT, capture_output=True,
                         check=True).stdout
    with tarfile.open(fileobj=io.BytesIO(tar)) as t:
        t.extractall(folder, filter="data")
    (folder / "rnnkit").rename(folder / "rnnkit_base")
    sys.path.insert(0, str(folder))
    return importlib.import_module("rnnkit_base")


def frame(shape):
    """The frame and the Config fields of one shape."""
    import pandas as pd

    import rnnkit

    if shape is None:
        return rnnkit.datasets.cold_storage_load(years=2.0), dict(target="load_kw", missing="interpolate")
    B, T, I, H, n_batches = shape
    rows = int(n_batches * B / 0.7) + T + 4  # 70% of the windows train
    rng = np.random.default_rng(0)
    t = np.arange(rows)
    cols = {f"x{i}": np.sin(t * (0.05 + 0.01 * i)) + 0.1 * rng.standard_normal(rows) for i in range(I)}
    df = pd.DataFrame(cols, index=pd.date_range("2024-01-01", periods=rows, freq="h"))
    return df, dict(target="x0", window=T, hidden=H, batch_size=B, season=None)


def epoch_runner(pkg, df, fields):
    """A function running one epoch of ``pkg``'s program from a fixed initial state, blocking."""
    import jax

    train = importlib.import_module(pkg.__name__ + ".training._train")
    prepared = pkg.prepare(df, pkg.Config(**fields))
    dims = train._check_shapes(None, prepared)
    # as train() sets it up for an unpadded run (the old code has no mask-free program)
    extra = {"uniform": train._mask_free(prepared, prepared.config, None)} if hasattr(train, "_mask_free") else {}
    state, run = train._setup(prepared, prepared.config, dims, **extra)

    def one():
        return jax.block_until_ready(run.program(state, run.series, run.train, run.val, run.act))
    return one, prepared


def largest_difference(a, b) -> float:
    """Largest relative difference between the parameters and losses of two epoch results."""
    import jax

    (pa, _, _), sa = jax.device_get(a)
    (pb, _, _), sb = jax.device_get(b)
    worst = 0.0
    for k in pa:
        x, y = np.asarray(pa[k], np.float64), np.asarray(pb[k], np.float64)
        worst = max(worst, float(np.max(np.abs(x - y)) / max(np.max(np.abs(x)), 1e-12)))
    for name in ("train_loss", "val_loss", "grad_norm"):
        x, y = float(getattr(sa, name)), float(getattr(sb, name))
        worst = max(worst, abs(x - y) / max(abs(x), 1e-12))
    return worst


def measure(old, new, rounds: int):
    """Seconds per epoch of old and new, interleaved (order alternating by round)."""
    for f in (old, new, old, new):
        f()
    times = {"old": [], "new": []}
    for r in range(rounds):
        order = (("old", old), ("new", new)) if r % 2 == 0 else (("new", new), ("old", old))
        for name, f in order:
            t = time.perf_counter()
            f()
            times[name].append(time.perf_counter() - t)
    return times


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--base", default=BASE, help="git commit of the old side (default: %(default)s)")
    ap.add_argument("--rounds", type=int, default=None, help="rounds per shape (default 15; --quick 8)")
    ap.add_argument("--quick", action="store_true", help="the default fit's shape only")
    ap.add_argument("--shapes", nargs="+", choices=list(SHAPES), default=None, help="shapes to run")
    args = ap.parse_args(argv)
    rounds = args.rounds or (8 if args.quick else 15)
    names = args.shapes or (["default"] if args.quick else list(SHAPES))
    shapes = {k: SHAPES[k] for k in names}

    import rnnkit

    details = {"base": args.base, "load_before": _util.load_average(), "shapes": {}}
    with tempfile.TemporaryDirectory() as tmp:
        base = base_package(args.base, Path(tmp))
        print(f"old: rnnkit at {args.base[:10]} ({base.__file__})\nnew: {rnnkit.__file__}")
        print(f"{'shape':8s} {'(B, T, I, H)':>18s} {'old ms':>8s} {'new ms':>8s} {'old/new':>8s} "
              f"{'max rel diff':>13s}")
        for name, shape in shapes.items():
            df, fields = frame(shape)
            old, _ = epoch_runner(base, df, fields)
            new, prepared = epoch_runner(rnnkit, df, fields)
            diff = largest_difference(old(), new())
            times = measure(old, new, rounds)
            o, n = statistics.median(times["old"]), statistics.median(times["new"])
            bthi = (prepared.config.batch_size, prepared.window, prepared.n_inputs, prepared.config.hidden)
            print(f"{name:8s} {str(bthi):>18s} {o * 1e3:8.1f} {n * 1e3:8.1f} {o / n:8.3f} {diff:13.2e}",
                  flush=True)
            details["shapes"][name] = {"bthi": bthi, "old_ms": o * 1e3, "new_ms": n * 1e3, "ratio": o / n,
                                       "old_min_ms": min(times["old"]) * 1e3,
                                       "new_min_ms": min(times["new"]) * 1e3,
                                       "max_relative_difference": diff, "rounds": rounds}
    details["load_after"] = _util.load_average()
    targets = []
    if "default" in details["shapes"]:
        ratio = details["shapes"]["default"]["ratio"]
        targets.append(_util.target("epoch.default_fit_speedup", ratio, f">= {TARGET_SPEEDUP}x",
                                    ratio >= TARGET_SPEEDUP, "x"))
    _util.emit({"targets": targets, "details": details})
    return 0


if __name__ == "__main__":
    sys.exit(main())
