"""prepare(): from the caller's DataFrame to scaled rows and window starts per split.

Steps, in order: check the frame and resolve columns; bring each sequence's
rows together; read and check time; resolve the season; fill or refuse missing
values; drop what cannot be used (counted); assign train/val/test; find the
window starts; encode class labels; fit the scaler on training rows; scale.
The caller's frame is only read. Work and memory are O(rows): windows are
never copied out (see _windows.py).
"""
from __future__ import annotations

import warnings
from typing import List, Optional

import numpy as np
import pandas as pd

from ._checks import (check_finite, check_frame, check_order, fill_missing, fmt_time, numeric_values,
                      plain_label, read_times, require_column, resolve_columns, resolve_season)
from ._config import Config
from ._errors import DataError, SmallPartWarning
from ._split import PART_NAMES, assign_parts, check_scorable, check_windows, target_mask, window_starts
from ._transform import DIFFS, forward
from ._windows import Prepared, fit_scaler


MIN_SCORED_WINDOWS = 30  # fewer val/test windows than this get a warning (common practice, no source)


def prepare(df: pd.DataFrame, config: Optional[Config] = None) -> Prepared:
    """Check a frame and turn it into scaled rows plus train/val/test window starts.

    Args:
        df: one long series (rows in time order) or many sequences (``group_column``).
            It is never modified.
        config: a Config; None uses the defaults. ``target`` None takes the first
            usable column (regression: first numeric column; classification: first
            non-float column), ``features`` None every other numeric column (the
            time, group and split columns are never inputs), ``season`` "auto"
            reads the time step (hourly 24, daily 7, weekly 52, monthly 12,
            quarterly 4, minutely 60, otherwise None).
    Returns:
        Prepared (see DEVELOPERS.md): inputs (R, I), targets, starts per split, scaler.
    Raises:
        DataError: for any data that cannot be used, naming the column, the row and the fix.

    Example:
        >>> p = prepare(df, Config(target="load_kw", window=48))
        >>> x, y, _ = p.windows("train")   # (N, 48, I), (N, 1)
    """
    config = Config() if config is None else config
    if not isinstance(config, Config):
        raise TypeError(f"`config` must be an rnnkit.Config, got {type(config).__name__}")
    check_frame(df)
    for field in ("time_column", "group_column", "split_column"):
        if getattr(config, field) is not None:
            require_column(df, getattr(config, field), field)
    special = [c for c in (config.time_column, config.group_column, config.split_column) if c]
    targets, feats = resolve_columns(df, config, special)
    regression = config.task == "regression"
    input_names = targets + feats if regression and config.target_as_input else list(feats)
    if not input_names:
        raise DataError(f"no input columns: `features` is empty and the target {targets} is "
                        f"{'a label' if not regression else 'not an input (`target_as_input`=false)'}; "
                        f"add numeric feature columns to `features` (columns: {list(df.columns)})")
    full = config.window == "full"

    # 1. bring each sequence's rows together, in order of first appearance
    take, gcode, gids = _group_order(df, config.group_column)
    n0 = len(df)
    rows = np.arange(n0, dtype=np.int64) if take is None else take
    boundary = None if gcode is None else _boundary(gcode)
    row_label = lambda i: plain_label(df.index[rows[i]])  # noqa: E731
    group_of = None if gcode is None else (lambda i: gids[gcode[i]])

    # 2. time: sorted, no duplicates, regular when the season must be read from it
    labels, ticks = read_times(df, config.time_column, take)
    check_order(ticks, labels, boundary, row_label, group_of, config.time_column or "index")
    season, season_how = resolve_season(config.season, labels, ticks, boundary, row_label)
    time_label = (lambda i: f" (time {fmt_time(labels[i])})") if labels is not None else (lambda i: "")

    # 3. values; missing values refused or filled on copies
    seq_starts = np.zeros(1, np.int64) if boundary is None else np.flatnonzero(boundary).astype(np.int64)
    coord = None if ticks is None else ticks.astype(np.float64)
    values, keep = {}, None
    for name in dict.fromkeys(input_names + (targets if regression else [])):
        v = numeric_values(df, name, take)
        if check_finite(v, name, config.missing, row_label, time_label):
            v = fill_missing(v, config.missing, seq_starts, coord)
            keep = ~np.isnan(v) if keep is None else keep & ~np.isnan(v)
        values[name] = v
    codes = uniques = None
    if not regression:
        codes, uniques = _label_codes(df, targets[0], take, config.missing, seq_starts, row_label, time_label)
        if (codes < 0).any():
            keep = codes >= 0 if keep is None else keep & (codes >= 0)
    split_codes = None if config.split_column is None else _split_codes(df, config.split_column, take, row_label)
    levels = np.stack([values[t] for t in targets], axis=1) if regression else None  # (R, O) original units
    if regression and config.transform != "none":
        for t in targets:
            values[t] = forward(values[t], t, config.transform, seq_starts, row_label, time_label)

    # 4. drop what cannot be used: leading gaps that no fill reaches, short sequences
    dropped: List[tuple] = []
    if keep is not None and not keep.all():
        dropped.append(("leading missing values that could not be filled", int((~keep).sum())))
    if regression and config.transform in DIFFS:
        first = np.zeros(len(rows), dtype=bool)
        for t in targets:
            first |= np.isnan(values[t]) & (True if keep is None else keep)
        if first.any():
            dropped.append((f"first row of a sequence: `transform`={config.transform!r} has no "
                            "difference there", int(first.sum())))
            keep = ~first if keep is None else keep & ~first
    span = 1 if full else config.window + config.horizon
    if gcode is not None and not full:
        keep = _short_sequences(gcode, gids, span, config, keep, dropped)
    if keep is not None and not keep.all():
        if not keep.any():
            raise DataError(f"no row is left after dropping {dropped}; fill the missing values or "
                            "lower `window`/`horizon`")
        rows, values = rows[keep], {k: v[keep] for k, v in values.items()}
        gcode = None if gcode is None else gcode[keep]
        labels = None if labels is None else labels[keep]
        ticks = None if ticks is None else ticks[keep]
        codes = None if codes is None else codes[keep]
        split_codes = None if split_codes is None else split_codes[keep]
        levels = None if levels is None else levels[keep]
        boundary = None if gcode is None else _boundary(gcode)
        row_label = lambda i: plain_label(df.index[rows[i]])  # noqa: E731
    n = len(rows)

    # 5. parts and window starts
    multi = regression and config.mode == "many-to-one" and not full and config.horizon > 1
    reach = 0 if full else (config.horizon if config.mode == "many-to-many" else
                            config.window - 1 + (1 if multi else config.horizon))
    part, notes, gap_rows = assign_parts(config, n, gcode, gids, boundary, ticks, split_codes, span,
                                         labels=codes, targets=span - reach)
    for p, k in gap_rows.items():
        dropped.append((f"`gap` rows before {PART_NAMES[p]}", k))
    if full:
        lo = np.flatnonzero(boundary).astype(np.int64)
        ln = np.diff(np.append(lo, n)).astype(np.int64)
        starts = {name: lo[part[lo] == p] for p, name in enumerate(PART_NAMES)}
        lengths = {name: ln[part[lo] == p] for p, name in enumerate(PART_NAMES)}
        window = int(ln.max())
    else:
        starts = window_starts(part, boundary, span, reach=reach)
        lengths = {name: None for name in PART_NAMES}
        window = config.window
    horizon = 0 if full else config.horizon
    check_windows(starts, config, n, span, split_codes)
    check_scorable(starts, lengths, span, boundary, n, config)
    for name in ("val", "test"):
        k = len(starts[name])
        if 0 < k < MIN_SCORED_WINDOWS:
            unit = "sequences" if full else "windows"
            msg = (f"the {name} part has only {k} {unit} (fewer than {MIN_SCORED_WINDOWS}): its scores "
                   f"are noisy; give {name} more rows or compare runs over several seeds")
            notes += (msg,)
            warnings.warn(msg, SmallPartWarning, stacklevel=2)

    # 6. class labels: the classes seen in training targets, sorted
    classes = None
    if not regression:
        off = (0, 0) if full else ((window - 1 if config.mode == "many-to-one" else 0) + horizon,
                                   window - 1 + horizon)
        t_rows = {p: target_mask(starts[p], lengths[p], off, n) for p in PART_NAMES}
        targets_arr, classes, label_notes = _encode(codes, uniques, t_rows, targets[0], row_label,
                                                    time_label, boundary, full)
        notes += label_notes

    # 7. scaler fit on training rows only, then scale every row
    train = part == 0
    if regression:
        for i, t in enumerate(targets):  # scores are in the original units, whatever `transform`
            _check_magnitude(levels[:, i], t)
    scaled = input_names + ([t for t in targets if t not in input_names] if regression else [])
    scaler = fit_scaler(config.scale, scaled, [values[c][train] for c in scaled], input_names,
                        targets if regression else [])
    dtype = np.dtype(config.dtype)
    inputs = _scaled(values, input_names, scaler, dtype)  # (R, I)
    if regression:
        targets_arr = _scaled(values, targets, scaler, dtype)  # (R, O)
    index = labels if labels is not None else df.index.to_numpy()[rows]
    groups = None if gcode is None else np.asarray(gids)[gcode]

    counts = {"rows_in_frame": n0, "rows_used": n}
    for p, name in enumerate(PART_NAMES):
        counts["rows_" + name] = int((part == p).sum())
        if gcode is not None:
            counts["sequences_" + name] = int(len(np.unique(gcode[part == p])))
    if gcode is not None:
        counts["sequences"] = int(len(np.unique(gcode)))
    if config.season == "auto":
        notes += (f"`season`='auto' resolved to {season} ({season_how})",)
    if config.target is None:
        notes += (f"`target` chosen automatically: {targets[0]!r} (the first usable column); set "
                  "`target` to choose",)
    if config.features is None and feats:
        notes += (f"input columns chosen automatically (every other numeric column): {list(feats)}; "
                  "set `features` to choose (a year or counter column is rarely a useful input)",)
    if config.transform != "none":
        notes += (f"the network learns the target as `transform`={config.transform!r}; every forecast "
                  "and score is back in the original units",)
    resolved = config.replace(target=targets[0] if len(targets) == 1 else tuple(targets),
                              features=tuple(feats), season=season)
    for a in (inputs, targets_arr, index, rows) + (() if levels is None else (levels,)):
        a.flags.writeable = False
    return Prepared(resolved, inputs, targets_arr, index, groups, window, horizon, starts, lengths,
                    list(input_names), list(targets), classes, scaler, season,
                    pd.DataFrame(dropped, columns=["reason", "rows"]).astype({"rows": np.int64}),
                    rows, counts, tuple(notes), levels)


def _group_order(df, group_column):
    """Row order that puts each sequence's rows together (stable), group codes, group ids."""
    if group_column is None:
        return None, None, None
    g = df[group_column]
    codes, uniques = pd.factorize(g, sort=False)  # NaN -> -1; uniques in order of first appearance
    if (codes < 0).any():
        i = int(np.argmax(codes < 0))
        raise DataError(f"group column {group_column!r} has {int((codes < 0).sum())} missing id(s), first at row "
                        f"{df.index[i]!r}; give every row a sequence id (or drop those rows)")
    codes = codes.astype(np.int64)
    take = None
    if len(codes) > 1 and (np.diff(codes) < 0).any():
        take = np.argsort(codes, kind="stable").astype(np.int64)
        codes = codes[take]
    return take, codes, np.asarray(uniques, dtype=object)


def _boundary(gcode: np.ndarray) -> np.ndarray:
    b = np.empty(len(gcode), dtype=bool)  # (R,) True at the first row of a sequence
    b[0] = True
    np.not_equal(gcode[1:], gcode[:-1], out=b[1:])
    return b


def _label_codes(df, name, take, policy, seq_starts, row_label, time_label):
    """Integer codes of the label column (order of appearance) and the labels; -1 = still missing."""
    codes, uniques = pd.factorize(df[name], sort=False)
    codes = codes.astype(np.int64) if take is None else codes.astype(np.int64)[take]
    miss = codes < 0
    if miss.any():
        i = int(np.argmax(miss))
        if policy == "error":
            raise DataError(f"label column {name!r} has {int(miss.sum())} missing label(s), first at row "
                            f"{row_label(i)!r}{time_label(i)}; fill them or set `missing`='ffill'")
        # labels are carried forward under both fill policies: a label cannot be interpolated
        f = fill_missing(np.where(miss, np.nan, codes.astype(np.float64)), "ffill", seq_starts, None)
        codes = np.where(np.isnan(f), -1, f).astype(np.int64)
    return codes, np.asarray(uniques, dtype=object)


def _split_codes(df, name, take, row_label):
    """(R,) int8 part code per row from the split column; other values are refused."""
    s = df[name]
    c = s.map({"train": 0, "val": 1, "test": 2}).to_numpy(dtype=np.float64, na_value=np.nan)
    bad = np.isnan(c)
    if bad.any():
        i = int(np.argmax(bad))
        raise DataError(f"split column {name!r} holds {s.iloc[i]!r} at row {s.index[i]!r} "
                        f"({int(bad.sum())} such rows); its values must be 'train', 'val' or 'test'")
    c = c.astype(np.int8)
    return c if take is None else c[take]


def _short_sequences(gcode, gids, span, config, keep, dropped):
    """Refuse (or drop, when `short_sequences`='drop') sequences with fewer than `span` rows."""
    live = gcode if keep is None else gcode[keep]
    length = np.bincount(live, minlength=len(gids))  # (G,)
    short = np.flatnonzero((length < span) & (length > 0))
    if len(short) == 0:
        return keep
    if config.short_sequences == "error":
        shown = ", ".join(f"{gids[g]!r} ({length[g]} rows)" for g in short[:5])
        raise DataError(f"{len(short)} of {int((length > 0).sum())} sequences in {config.group_column!r} are "
                        f"shorter than window + horizon = {span} rows: {shown}{' ...' if len(short) > 5 else ''}; "
                        "lower `window`/`horizon`, or set `short_sequences`='drop' to leave them out")
    bad = np.zeros(len(gids), dtype=bool)
    bad[short] = True
    drop = bad[gcode] if keep is None else bad[gcode] & keep
    dropped.append((f"{len(short)} sequences shorter than window + horizon ({span} rows)", int(drop.sum())))
    return ~bad[gcode] if keep is None else keep & ~bad[gcode]


def _encode(codes, uniques, t_rows, name, row_label, time_label, boundary, full):
    """Class codes 0..K-1 (classes sorted) from the training targets; refuse unseen or single classes."""
    seen = np.unique(codes[t_rows["train"]])
    seen = seen[seen >= 0]
    labels = list(uniques[seen])
    try:
        order = sorted(range(len(labels)), key=lambda k: labels[k])
    except TypeError:  # mixed label types: sort by their text
        order = sorted(range(len(labels)), key=lambda k: str(labels[k]))
    if len(seen) < 2:
        raise DataError(f"label column {name!r} has a single class ({labels[0]!r}) in the training targets; "
                        "classification needs at least two: check `target`, or give the training part "
                        "examples of other classes" if labels else
                        f"label column {name!r} has no label in the training targets")
    remap = np.full(len(uniques), -1, dtype=np.int64)
    remap[seen[order]] = np.arange(len(seen))
    out = remap[np.maximum(codes, 0)].astype(np.int32)
    out[codes < 0] = -1
    for p in ("val", "test"):
        unseen = t_rows[p] & (out < 0)
        if unseen.any():
            i = int(np.argmax(unseen))
            raise DataError(f"label {uniques[codes[i]]!r} of column {name!r} is in the {p} targets (first at row "
                            f"{row_label(i)!r}{time_label(i)}) but never in the training targets; the network "
                            "cannot learn it: put such examples in training, drop them, or change `split`")
    classes = label_array([labels[k] for k in order])
    notes = ()
    if full:
        change = np.zeros(len(codes), dtype=bool)
        change[1:] = (codes[1:] != codes[:-1]) & ~boundary[1:]
        n_vary = len(np.unique(np.cumsum(boundary)[change]))
        if n_vary:
            notes = (f"labels vary within {n_vary} sequence(s); each sequence takes its last row's label",)
    return out, classes, notes


def label_array(labels: list) -> np.ndarray:
    """(K,) array of class labels that keeps each label's own type.

    numpy would turn [1, "down"] into the text ["1", "down"], and a predicted 1 would
    then not equal the label 1 of the frame; labels of mixed types stay Python objects.
    """
    mixed = len({type(v) for v in labels}) > 1
    return np.asarray(labels, dtype=object) if mixed else np.asarray(labels)


# Squares of numbers below this underflow float64 (to 0 or to subnormals that lose digits), and
# above its inverse overflow: errors of such targets would score RMSE 0 / R2 1, or inf.
_SQUARE_SAFE = float(np.sqrt(np.finfo(np.float64).tiny))  # about 1.5e-154


def _check_magnitude(v: np.ndarray, name: str) -> None:
    """Refuse a target whose squared errors cannot be computed in float64."""
    a = np.abs(v[np.isfinite(v)])
    top = float(a.max()) if a.size else 0.0
    if 0 < top < _SQUARE_SAFE or top > 1 / _SQUARE_SAFE:
        k = -int(np.floor(np.log10(top)))
        raise DataError(f"target column {name!r} holds values of order {top:.1e}: their squared errors "
                        f"{'underflow' if top < 1 else 'overflow'} in float64, so RMSE and R2 would mean "
                        f"nothing; rescale the column first, e.g. df[{name!r}] * 1e{k}")


def _scaled(values, names, scaler, dtype) -> np.ndarray:
    """(R, len(names)) array in ``dtype``, filled column by column (no (R, C) float64 temporary)."""
    out = np.empty((len(values[names[0]]), len(names)), dtype=dtype)
    limit = np.finfo(dtype).max
    for j, c in enumerate(names):
        col = scaler.transform(values[c], [c])
        big = np.abs(col) > limit
        if big.any():  # only unscaled data gets here: scaled values are small
            i = int(np.argmax(big))
            raise DataError(f"column {c!r} holds values too large for {np.dtype(dtype).name} "
                            f"(first at used row {i}, ={float(col[i]):.3g}); use `scale`='standard' "
                            "or 'minmax', or `dtype`='float64'")
        out[:, j] = col
    return out
