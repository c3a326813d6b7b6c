"""Split rows into train / val / test parts and find the windows inside each part.

Every row gets a part code (0 train, 1 val, 2 test, -1 unused). A training
window, its inputs and its targets, lies wholly inside one run of training
rows of one sequence. A validation or test window has every target inside
one run of its part, but may take its inputs from the rows before that run
(training rows, `gap` rows, other parts) of the same sequence, as a forecast
made at that time would: so every val/test row can be a target, and a short
series keeps its parts whole. Nothing is fitted on those rows. No window
crosses a sequence. All of this is vectorised: the work is O(rows), not
O(rows x window).
"""
from __future__ import annotations

from typing import Optional, Sequence, Tuple

import numpy as np

from ._errors import DataError

UNUSED = -1
PART_NAMES = ("train", "val", "test")


def counts_by_fraction(n: int, split: Sequence[float], minimum: int = 0) -> Tuple[int, int, int]:
    """Sizes of the three parts of ``n`` items: rounded cumulative fractions.

    A part with a fraction > 0 gets at least ``minimum`` items when it can.
    """
    a = int(round(n * split[0]))
    b = int(round(n * (split[0] + split[1]))) if split[2] > 0 else n
    sizes = [a, b - a, n - b]
    if minimum:
        for p in (2, 1, 0):  # borrow from the largest part for a part that came out too small
            while split[p] > 0 and sizes[p] < minimum:
                donor = int(np.argmax(sizes))
                if sizes[donor] <= minimum:
                    break
                sizes[donor] -= 1
                sizes[p] += 1
    return sizes[0], sizes[1], sizes[2]


def chronological_parts(n: int, split: Sequence[float]) -> np.ndarray:
    """(n,) int8 part codes: the first rows train, then val, then test."""
    a, b, _ = counts_by_fraction(n, split)
    part = np.full(n, 2, dtype=np.int8)
    part[:a] = 0
    part[a:a + b] = 1
    return part


def group_parts(n_groups: int, split: Sequence[float], order: np.ndarray,
                needed: int) -> np.ndarray:
    """(G,) int8 part per group: groups taken in ``order`` fill train, then val, then test.

    Args:
        order: (G,) int64, a permutation of the groups (by first time, or shuffled).
        needed: how many parts must get a group (2, or 3 when test > 0).
    """
    if n_groups < needed:
        raise DataError(
            f"`group_column` gives {n_groups} sequence(s), but the split {list(split)} needs at least "
            f"{needed} (one whole sequence per part); add sequences, set `split` with test 0, "
            "or give `split_column`")
    sizes = counts_by_fraction(n_groups, split, minimum=1)
    part = np.empty(n_groups, dtype=np.int8)
    part[order] = np.repeat(np.arange(3, dtype=np.int8), sizes)
    return part


def run_bounds(part: np.ndarray, boundary: Optional[np.ndarray]) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Maximal runs of rows with the same part inside one sequence.

    Args:
        part: (R,) int8 part codes.
        boundary: (R,) bool, True where a new sequence starts, or None.
    Returns:
        lo, hi: (K,) int64 run [lo, hi); run_part: (K,) int8 (UNUSED runs included).
    """
    r = len(part)
    change = np.empty(r, dtype=bool)
    change[0] = True
    np.not_equal(part[1:], part[:-1], out=change[1:])
    if boundary is not None:
        change |= boundary
    lo = np.flatnonzero(change).astype(np.int64)
    hi = np.append(lo[1:], r).astype(np.int64)
    return lo, hi, part[lo]


def drop_gap(part: np.ndarray, boundary: Optional[np.ndarray], gap: int) -> Tuple[np.ndarray, dict]:
    """Mark the first ``gap`` rows of every val and test run unused; count them per part."""
    dropped = {}
    if gap <= 0:
        return part, dropped
    part = part.copy()
    lo, hi, rp = run_bounds(part, boundary)
    for p in (1, 2):
        sel = rp == p
        n = np.minimum(hi[sel] - lo[sel], gap)
        if n.sum():
            rows = _ranges(lo[sel], n)
            part[rows] = UNUSED
            dropped[p] = int(n.sum())
    return part, dropped


def window_starts(part: np.ndarray, boundary: Optional[np.ndarray], span: int,
                  reach: Optional[int] = None) -> dict:
    """First row of every window, per split name: (N,) int64.

    Args:
        part, boundary: as in `run_bounds`.
        span: rows from a window's first input to its last target (window + horizon).
        reach: rows from a window's first input to its FIRST target. None: every
            window lies inside one run (inputs and targets). Else val and test
            windows only need their targets inside one run of their part; their
            inputs may come from any earlier rows of the same sequence.
    """
    lo, hi, rp = run_bounds(part, boundary)
    out = {}
    seq_lo = None
    if reach is not None:
        first = np.zeros(len(part), dtype=bool) if boundary is None else np.asarray(boundary, bool).copy()
        first[0] = True
        seq_lo = np.maximum.accumulate(np.where(first, np.arange(len(part)), 0))  # (R,) first row of its sequence
    for p, name in enumerate(PART_NAMES):
        sel = rp == p
        if reach is None or p == 0:
            n = np.maximum(hi[sel] - lo[sel] - span + 1, 0)
            out[name] = _ranges(lo[sel], n)
        else:  # targets in [lo, hi); the first input may lie up to `reach` rows before lo
            begin = np.maximum(lo[sel] - reach, seq_lo[lo[sel]]) if len(lo[sel]) else lo[sel]
            n = np.maximum(hi[sel] - span + 1 - begin, 0)
            out[name] = _ranges(begin, n)
    return out


def _ranges(lo: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Concatenate ``arange(lo[k], lo[k] + n[k])`` over k without a Python loop."""
    total = int(n.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    offsets = np.cumsum(n) - n  # (K,) where each run begins in the output
    return (np.repeat(lo - offsets, n) + np.arange(total, dtype=np.int64)).astype(np.int64)


def min_rows(span: int, split: Sequence[float], gap: int, targets: Optional[int] = None,
             train: Optional[int] = None) -> int:
    """Fewest rows for which every part with a fraction > 0 holds one window.

    Training needs ``train`` rows (default ``span``: one window); val and test
    need ``targets`` rows (the rows one window's targets cover; default
    ``span``) plus ``gap``.
    """
    t = span if targets is None else targets
    need = [span if train is None else train, t + gap, t + gap if split[2] > 0 else 0]
    n = max(int(np.ceil(need[p] / split[p])) if split[p] > 0 else 0 for p in range(3))
    n = max(n - 3, 1)
    while True:
        sizes = counts_by_fraction(n, split)
        if all(sizes[p] >= need[p] for p in range(3) if split[p] > 0):
            return n
        n += 1


def stratified_pick(labels: np.ndarray, k: int, seed: int) -> np.ndarray:
    """Positions of `k` items drawn per class in proportion, after a seeded shuffle.

    The usual stratified hold-out (as scikit-learn's StratifiedShuffleSplit):
    each class gives round(k * n_c / n) items, the remainders going to the
    largest fractions; a class keeps at least one item out of the pick.
    Args:
        labels: (N,) int class code per item. k: items to pick. seed: the shuffle's seed.
    Returns:
        (k',) int64 sorted positions, k' <= k (less only when classes are too small).
    """
    rng = np.random.default_rng(seed)
    classes, counts = np.unique(labels, return_counts=True)
    exact = k * counts / counts.sum()
    quota = np.floor(exact).astype(np.int64)
    rest = exact - quota
    order = np.lexsort((rng.random(len(classes)), -rest))  # largest remainder first, ties at random
    quota[order[:k - int(quota.sum())]] += 1
    quota = np.minimum(quota, counts - 1)  # every class stays in the part it is taken from
    picked = [rng.permutation(np.flatnonzero(labels == c))[:q] for c, q in zip(classes, quota)]
    return np.sort(np.concatenate(picked)).astype(np.int64)


def assign_parts(config, n, gcode, gids, boundary, ticks, split_codes, span, labels=None,
                 targets=None):
    """Part code of every row: chronological rows, whole sequences, or the split column.

    Args:
        n: rows R. gcode: (R,) int64 sequence code or None. boundary: (R,) bool or None.
        ticks: (R,) time or None. split_codes: (R,) int8 from the split column or None.
        span: rows one window needs (window + horizon; 1 for window="full").
        targets: rows the targets of one window cover (val and test windows reach back
            for their inputs, so they need only these); None: span.
        labels: (R,) int class codes (classification) or None: validation carved from a
            labelled training part takes whole sequences per class in proportion.
    Returns:
        part (R,) int8, notes (tuple of sentences), gap rows dropped per part {1: k, 2: k}.
    """
    f, notes = config.split, ()
    single = gcode is not None and split_codes is None and span > 1 and not boundary[1:].any()
    if single:  # one sequence is one series: split its rows in time, as without a group column
        notes += ("one sequence only: its rows are split in time as a single series",)
    if gcode is None or single:
        if split_codes is None:
            sizes = counts_by_fraction(n, f)
            t = span if targets is None else targets
            # regression: the stated minimum gives two training windows (the linear AR baseline
            # needs them); a training part of exactly one window is refused by check_scorable
            two = config.task == "regression" and span > 1
            need = (span, t + config.gap, t + config.gap)
            if any(f[p] > 0 and sizes[p] < need[p] for p in range(3)):
                what = (f"two windows, window + horizon + 1 = {span + 1} rows" if two
                        else f"window + horizon = {span} rows")
                raise DataError(
                    f"too few rows: {n} rows split {list(f)} give {list(sizes)} rows to train/val/test, but "
                    f"training needs {what} and val and test {t} target row(s) each plus `gap` = "
                    f"{config.gap}; the minimum is {min_rows(span, f, config.gap, t, span + two)} rows: "
                    "add rows or lower `window`/`horizon`/`gap`")
            part = chronological_parts(n, f)
        else:
            part = split_codes.copy()
            if not (part == 1).any():
                tr = np.flatnonzero(part == 0)
                k = int(round(len(tr) * f[1] / (f[0] + f[1])))
                if k:
                    part[tr[len(tr) - k:]] = 1
                notes += (f"no 'val' rows in {config.split_column!r}: the last {k} training rows became val "
                          f"(val fraction {f[1]:g} of train + val)",)
        part, gap_rows = drop_gap(part, None, config.gap)
        return part, notes, gap_rows

    first = np.flatnonzero(boundary).astype(np.int64)  # (G,) first row of each sequence
    size = np.diff(np.append(first, n))  # (G,)
    if split_codes is None:
        if ticks is not None:
            order, how = np.argsort(ticks[first], kind="stable"), "by their first time"
        else:
            order = np.random.default_rng(config.seed).permutation(len(first))
            how = f"in a shuffled order (seed {config.seed}; the frame has no time)"
        gp = group_parts(len(first), f, order, 3 if f[2] > 0 else 2)
        notes += (f"sequences go whole to train/val/test {how}",)
    else:
        mixed = np.zeros(n, dtype=bool)
        mixed[1:] = (split_codes[1:] != split_codes[:-1]) & ~boundary[1:]
        if mixed.any():
            i = int(np.argmax(mixed))
            raise DataError(f"sequence {gids[gcode[i]]!r} has rows labelled {PART_NAMES[split_codes[i - 1]]!r} "
                            f"and {PART_NAMES[split_codes[i]]!r} in {config.split_column!r}; a sequence belongs "
                            "to one part: label all of its rows alike")
        gp = split_codes[first].copy()
        if not (gp == 1).any():
            tr = np.flatnonzero(gp == 0)
            k = max(1, int(round(len(tr) * f[1] / (f[0] + f[1]))))
            if len(tr) - k < 1:
                raise DataError(f"{config.split_column!r} has no 'val' sequences and only {len(tr)} 'train' "
                                "sequence(s) to take them from; label some sequences 'val'")
            if labels is not None and config.task == "classification":
                # whole sequences, stratified by class (the label of each sequence's last row)
                last = np.append(first[1:], n) - 1
                pick = tr[stratified_pick(labels[last[tr]], k, config.seed)]
                gp[pick] = 1
                notes += (f"no 'val' sequences in {config.split_column!r}: {len(pick)} training sequences, "
                          f"drawn per class in proportion (seed {config.seed}), became val "
                          f"(val fraction {f[1]:g} of train + val)",)
            else:
                if ticks is not None:
                    tr = tr[np.argsort(ticks[first[tr]], kind="stable")]
                gp[tr[len(tr) - k:]] = 1
                notes += (f"no 'val' sequences in {config.split_column!r}: the last {k} training sequences "
                          f"became val (val fraction {f[1]:g} of train + val)",)
    if config.gap:
        notes += ("`gap` is not applied between whole sequences (they share no rows)",)
    return np.repeat(gp.astype(np.int8), size), notes, {}


def check_windows(starts: dict, config, n: int, span: int, split_codes) -> None:
    """Train and val need a window; test too when it is asked for."""
    wanted = ["train", "val"]
    if (split_codes is None and config.split[2] > 0) or (split_codes is not None and (split_codes == 2).any()):
        wanted.append("test")
    for name in wanted:
        if len(starts[name]) == 0:
            raise DataError(f"the {name} part has no complete window: a window needs window + horizon = {span} "
                            f"consecutive rows of one sequence, its targets all in the {name} part (a training "
                            f"window's inputs too; val and test lose `gap` = {config.gap} rows first); lower "
                            f"`window`/`horizon`/`gap` or give {name} more rows")


def check_scorable(starts: dict, lengths: dict, span: int, boundary, n: int, config) -> None:
    """Refuse, before training, a regression frame whose training part the baselines cannot use.

    The linear-AR baseline needs two training windows, and the MASE scale two
    consecutive training rows of one sequence (Hyndman & Koehler 2006).
    """
    if config.task != "regression":
        return
    s = starts["train"]
    if len(s) < 2:
        raise DataError(f"the train part has {len(s)} window(s); the linear AR baseline the network is "
                        "compared with needs at least 2: lower `window`/`horizon` or give train more rows")
    end = s + (lengths["train"] if lengths["train"] is not None else span)
    cover = np.zeros(n + 1, dtype=np.int64)
    np.add.at(cover, s, 1)
    np.add.at(cover, end, -1)
    covered = np.cumsum(cover[:-1]) > 0  # (n,) rows some training window reads
    pairs = covered[1:] & covered[:-1]
    if boundary is not None:
        pairs &= ~np.asarray(boundary, bool)[1:]  # the second row starts a new sequence
    if not pairs.any():
        raise DataError("no training sequence has two consecutive rows (each sequence is one row long); "
                        "MASE and the naive baselines need a previous value in the same sequence: give "
                        "each sequence at least 2 rows, or set `group_column` to a column that gathers "
                        "several rows per sequence")


def target_mask(starts: np.ndarray, lengths: Optional[np.ndarray], off: Tuple[int, int], n: int) -> np.ndarray:
    """(n,) bool: rows that are the target of some window.

    Args:
        starts: (N,) first rows. lengths: (N,) for whole sequences (target = last row), else None.
        off: first and last target row relative to a window's start (inclusive).
    """
    mask = np.zeros(n, dtype=bool)
    if lengths is not None:
        mask[starts + lengths - 1] = True
        return mask
    edges = np.bincount(starts + off[0], minlength=n + 1) - np.bincount(starts + off[1] + 1, minlength=n + 2)[:n + 1]
    return np.cumsum(edges)[:n] > 0
