"""Predictions as a DataFrame on the original time index, for the training frame or any new one.

A new frame is prepared with what the fit learned (``DataSpec``: the fitted
scaler, the class mapping, the input names) and never refits any of it;
every window the frame holds is predicted. The checks and readings are the
ones ``prepare`` uses (``_checks.py``), so a frame fit would refuse is refused
here with the same message.

Many-to-many: a target time is covered by up to T windows. The frame keeps,
for each target time, the prediction of the window that ENDS there (the one
that saw the most history); the first T-1 target times of a run, which no
window ends at, take the earliest window that covers them (again the most
history available). Metrics (``FitResult.metrics``) score every
(window, step) term instead, as the loss does.
"""
from __future__ import annotations

from typing import NamedTuple, Optional

import numpy as np
import pandas as pd

from ._checks import (_is_number_column, _not_numeric, check_finite, check_frame, check_order,
                      fill_missing, numeric_values, plain_label, read_times, require_column)
from ._config import Config
from ._prepare import _boundary, _group_order
from ._errors import DataError
from ._split import window_starts
from ._transform import DIFFS, forward
from ._windows import Prepared, Scaler

NEW = "new"  # the `split` value of rows predicted on a frame other than the training one


class DataSpec(NamedTuple):
    """What a fit learned about its data: enough to prepare any frame with the same columns."""

    config: Config  # resolved: target, features and season filled in
    input_names: tuple  # (I,) input columns, in order
    target_names: tuple  # (O,) target column(s); the label column for classification
    classes: Optional[np.ndarray]  # (K,) labels, code k -> classes[k]; None for regression
    scaler: Scaler  # fitted on the training rows
    window: int  # T trained on (the longest sequence for window="full")
    horizon: int
    index_name: Optional[str]  # name of the time index in prediction frames


def spec_of(prepared: Prepared, index_name=None) -> DataSpec:
    """The DataSpec of a Prepared (``index_name``: the caller's index name)."""
    cfg = prepared.config
    name = cfg.time_column if cfg.time_column is not None else index_name
    return DataSpec(cfg, tuple(prepared.input_names), tuple(prepared.target_names),
                    prepared.classes, prepared.scaler, int(prepared.window), int(prepared.horizon),
                    None if name is None else str(name))


def frame_actuals(df: pd.DataFrame, prepared: Prepared) -> np.ndarray:
    """The true targets of every used row, from the caller's frame.

    Regression: (R, O) float64 in original units, exactly the frame's values
    (a value filled by the `missing` policy shows the filled value).
    Classification: (R,) the frame's labels (object).
    """
    rows = prepared.rows
    if prepared.classes is not None:
        return df[prepared.target_names[0]].to_numpy(dtype=object)[rows]
    raw = np.stack([df[t].to_numpy(dtype=np.float64, na_value=np.nan)[rows]
                    for t in prepared.target_names], axis=1)  # (R, O)
    return np.where(np.isnan(raw), prepared.levels, raw)


def prepare_like(df: pd.DataFrame, spec: DataSpec, need_windows: bool = True):
    """Prepare a frame with a fit's scaler and class mapping: every window, one split.

    Args:
      df: a frame with the columns the fit used (the target may be missing: its
        actual values are then NaN). Never modified.
      spec: the fit's DataSpec.
      need_windows: False lets a frame shorter than window + horizon through (a forecast
        needs only the last window of known rows).

    Returns:
      (prepared, actual): a Prepared whose "train" starts hold EVERY window of
      the frame (val and test empty), and the true targets as ``frame_actuals``.
    """
    cfg = spec.config
    check_frame(df)
    for fld in ("time_column", "group_column"):
        if getattr(cfg, fld) is not None:
            require_column(df, getattr(cfg, fld), fld)
    regression = spec.classes is None
    for name in spec.input_names:
        require_column(df, name, "features" if name not in spec.target_names else "target")
    # the same numeric check as prepare(), so text is refused by name, never half-parsed
    for name in dict.fromkeys(list(spec.input_names) + (list(spec.target_names) if regression else [])):
        if name in df.columns and not _is_number_column(df[name]):
            raise DataError(f"column {name!r} is not numeric ({_not_numeric(df[name])}); the fit read "
                            "numbers there: convert it (pd.to_numeric) before predict()")
    full = cfg.window == "full"

    take, gcode, gids = _group_order(df, cfg.group_column)
    rows = np.arange(len(df), dtype=np.int64) if take is None else take
    boundary = None if gcode is None else _boundary(gcode)
    row_label = lambda i: plain_label(df.index[rows[i]])  # noqa: E731
    labels, ticks = read_times(df, cfg.time_column, take)
    check_order(ticks, labels, boundary, row_label,
                None if gcode is None else (lambda i: gids[gcode[i]]), cfg.time_column or "index")
    time_label = (lambda i: f" (time {labels[i]})") if labels is not None else (lambda i: "")
    seq_starts = np.zeros(1, np.int64) if boundary is None else np.flatnonzero(boundary).astype(np.int64)
    coord = None if ticks is None else ticks.astype(np.float64)

    def read(name, strict):
        v = numeric_values(df, name, take)
        if strict or cfg.missing != "error":
            if check_finite(v, name, cfg.missing, row_label, time_label):
                v = fill_missing(v, cfg.missing, seq_starts, coord)
        else:  # a target that is no input: NaN is an unknown value, kept as NaN
            check_finite(v, name, "ffill", row_label, time_label)
        return v

    values = {c: read(c, True) for c in spec.input_names}
    keep = np.all([~np.isnan(values[c]) for c in spec.input_names], axis=0)  # (R,)
    if regression:
        # Targets that are not inputs may be unknown (NaN): they are what is predicted.
        actual = np.stack([values[t] if t in values else
                           (read(t, False) if t in df.columns else np.full(len(rows), np.nan))
                           for t in spec.target_names], axis=1)  # (R, O)
    else:
        t = spec.target_names[0]
        actual = (df[t].to_numpy(dtype=object)[rows] if t in df.columns
                  else np.full(len(rows), np.nan, dtype=object))
    if regression and cfg.transform != "none":
        # the target learnt as the fit learnt it; its first row per sequence has no difference
        z = {t: forward(actual[:, j], t, cfg.transform, seq_starts, row_label, time_label)
             for j, t in enumerate(spec.target_names)}
        for t in spec.target_names:
            if t in values:
                values[t] = z[t]
        if cfg.transform in DIFFS:
            first = np.zeros(len(rows), dtype=bool)
            first[seq_starts] = True
            keep &= ~first
    else:
        z = None
    if not keep.all():
        rows, actual = rows[keep], actual[keep]
        z = None if z is None else {t: v[keep] for t, v in z.items()}
        values = {k: v[keep] for k, v in values.items()}
        gcode = None if gcode is None else gcode[keep]
        labels = None if labels is None else labels[keep]
        boundary = None if gcode is None else _boundary(gcode)
    n = len(rows)
    if n == 0:
        raise DataError("no row of the frame has every input column filled; fill the missing values")

    if full:
        lo = np.flatnonzero(boundary).astype(np.int64)
        lengths = np.diff(np.append(lo, n)).astype(np.int64)
        starts, window = lo, int(lengths.max())
    else:
        span = int(cfg.window) + spec.horizon
        starts = window_starts(np.zeros(n, np.int8), boundary, span)["train"]
        lengths, window = None, int(cfg.window)
        if len(starts) == 0 and need_windows:
            raise DataError(f"the frame has no complete window: a window needs window + horizon = {span} "
                            f"consecutive rows of one sequence, and the frame has {n} usable rows"
                            + ("" if gcode is None else " split over sequences")
                            + "; pass a longer frame")
    if regression:
        targets = np.stack([spec.scaler.transform(actual[:, j] if z is None else z[t], [t])
                            if t in spec.scaler.columns
                            else np.full(n, np.nan) for j, t in enumerate(spec.target_names)],
                           axis=1).astype(cfg.dtype)  # (R, O)
    else:
        code_of = {c: k for k, c in enumerate(spec.classes.tolist())}
        targets = np.array([code_of.get(_plain(v), -1) for v in actual], dtype=np.int32)  # (R,)
    inputs = np.empty((n, len(spec.input_names)), dtype=cfg.dtype)  # (R, I)
    for j, c in enumerate(spec.input_names):
        inputs[:, j] = spec.scaler.transform(values[c], [c])
    index = labels if labels is not None else df.index.to_numpy()[rows]
    groups = None if gcode is None else np.asarray(gids)[gcode]
    empty = np.zeros(0, np.int64)
    prepared = Prepared(cfg, inputs, targets, index, groups, window, 0 if full else spec.horizon,
                        {"train": starts, "val": empty, "test": empty},
                        {"train": lengths, "val": None if lengths is None else empty,
                         "test": None if lengths is None else empty},
                        list(spec.input_names), list(spec.target_names), spec.classes, spec.scaler,
                        cfg.season, pd.DataFrame({"reason": [], "rows": []}), rows,
                        {"rows_in_frame": len(df), "rows_used": n, "rows_train": n, "rows_val": 0,
                         "rows_test": 0}, (), actual if regression else None)
    return prepared, actual


def _plain(v):
    """A label as a plain Python value (numpy scalars compare and hash like their Python twins)."""
    return v.item() if isinstance(v, np.generic) else v


def per_row(rows: np.ndarray, values: np.ndarray, first: bool = False):
    """One value per target row; many-to-many keeps the step with the most history.

    Args:
      rows: (N,) or (N, T) target row of every prediction.
      values: (N, ...) or (N, T, ...) the predictions.
      first: keep the FIRST position of a row instead (leads: lead 1 saw the most history).

    Returns:
      (rows (M,), values (M, ...)), rows unique.
    """
    if rows.ndim == 1:
        return rows, values
    if first:
        rows, values = rows[:, ::-1], values[:, ::-1]
    N, T = rows.shape
    pos = np.broadcast_to(np.arange(T), (N, T)).ravel()  # step of each prediction in its window
    r = rows.ravel()
    v = values.reshape((N * T,) + values.shape[2:])
    order = np.lexsort((pos, r))  # by row, then by step
    last = np.append(r[order][1:] != r[order][:-1], True)  # the largest step of each row
    keep = order[last]
    return r[keep], v[keep]


def _index(prepared, spec, at=None):
    values = prepared.index if at is None else prepared.index[at]
    return pd.Index(values, name=spec.index_name)


def zoned_labels(df: pd.DataFrame, rows: np.ndarray, time_column: Optional[str]) -> Optional[pd.Index]:
    """The caller's own times of the used rows when they carry a time zone, else None.

    prepare() keeps zone-aware times as naive UTC for its arithmetic; predictions go
    back on the caller's labels, zone included, so that they line up with the frame.
    """
    src = pd.Index(df[time_column]) if time_column is not None else df.index
    if isinstance(src, pd.DatetimeIndex) and src.tz is not None:
        return src.take(rows)
    return None


def prediction_frame(prepared: Prepared, spec: DataSpec, actual: np.ndarray, parts: dict,
                     labels: Optional[pd.Index] = None) -> pd.DataFrame:
    """The prediction DataFrame (see ``FitResult.predict``).

    Args:
      prepared: the Prepared the windows come from.
      spec: the fit's DataSpec (names of targets, classes, index).
      actual: (R, O) regression values or (R,) labels, from ``frame_actuals``/``prepare_like``.
      parts: split label -> (target rows (N,) or (N, T), predictions): regression
        (N, [T,] O) in original units; classification (N, [T,] K) probabilities.
      labels: (R,) the index to use instead of ``prepared.index`` (``zoned_labels``).

    Returns:
      DataFrame, one row per used row of the frame (one per sequence for window="full").
    """
    if prepared.full:
        return _sequence_frame(prepared, spec, actual, parts)
    R = len(prepared.index)
    regression = spec.classes is None
    width = len(spec.target_names) if regression else len(spec.classes)
    pred = np.full((R, width), np.nan)
    split = np.full(R, None, dtype=object)
    for label, (rows, values) in parts.items():
        r, v = per_row(np.asarray(rows), np.asarray(values, np.float64), first=prepared.leads > 1)
        pred[r] = v
        split[r] = label
    cols = _regression_columns(actual, pred, spec.target_names) if regression else \
        _class_columns(actual, pred, spec.classes)
    cols["split"] = split
    if prepared.groups is not None:
        # the sequence ids go first, under their own name unless an output column has it
        name = spec.config.group_column
        cols = {("sequence" if name in cols else name): prepared.groups, **cols}
    index = _index(prepared, spec) if labels is None else labels.rename(spec.index_name)
    return pd.DataFrame(cols, index=index)


def _regression_columns(actual, pred, names):
    """actual/predicted (one target) or <target>_actual/<target>_predicted columns."""
    one = len(names) == 1
    cols = {("actual" if one else f"{t}_actual"): actual[:, j] for j, t in enumerate(names)}
    cols.update({("predicted" if one else f"{t}_predicted"): pred[:, j] for j, t in enumerate(names)})
    return cols


def _class_columns(actual, proba, classes):
    """actual, predicted (labels; None where no prediction) and p_<class> columns."""
    has = np.isfinite(proba).all(axis=1)  # (R,)
    predicted = np.full(len(proba), None, dtype=object)
    predicted[has] = classes[np.argmax(np.where(has[:, None], proba, 0.0), axis=1)[has]]
    cols = {"actual": actual, "predicted": predicted}
    for k, name in enumerate(prob_columns(classes.tolist())):
        cols[name] = proba[:, k]
    return cols


def prob_columns(classes: list) -> list:
    """"p_<class>" for each class; labels that print alike (1 and "1") get their repr
    instead (p_1 and p_'1'), so that no two classes share a column."""
    names = [f"p_{c}" for c in classes]
    if len(set(names)) == len(names):
        return names
    names = [f"p_{c!r}" if names.count(n) > 1 else n for c, n in zip(classes, names)]
    if len(set(names)) < len(names):  # still alike: number them
        names = [f"{n}#{k}" for k, n in enumerate(names)]
    return names


def _sequence_frame(prepared, spec, actual, parts):
    """window="full": one row per sequence, indexed by the sequence id."""
    width = len(spec.target_names) if spec.classes is None else len(spec.classes)
    rows = [np.zeros(0, np.int64)] + [np.asarray(r) for r, _ in parts.values()]
    values = [np.zeros((0, width))] + [np.asarray(v, np.float64) for _, v in parts.values()]
    rows, values = np.concatenate(rows), np.concatenate(values)  # (M,), (M, O or K)
    split = np.concatenate([np.full(len(r), label, dtype=object) for label, (r, _) in parts.items()]
                           + [np.zeros(0, object)])
    ids = prepared.groups[rows] if len(rows) else np.zeros(0, object)
    if spec.classes is None:
        cols = _regression_columns(actual[rows], values, spec.target_names)
    else:
        cols = _class_columns(actual[rows], values, spec.classes)
    cols["split"] = split
    return pd.DataFrame(cols, index=pd.Index(ids, name=spec.config.group_column))
