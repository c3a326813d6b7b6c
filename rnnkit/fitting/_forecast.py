"""FitResult.forecast: point forecasts and conformal bounds for the rows after the data.

Steps: (1) pick the data: the training frame, or a new frame prepared with the
fit's scaler (its trailing rows with an empty target are the future rows, whose
other input columns must be filled); (2) per sequence, the last T known input
rows plus the future input rows form one buffer; (3) one compiled program
forecasts every block of L leads for every sequence (training/_rollout.py);
(4) the forecasts go back to original units (scaler, then transform from the
last known value); (5) bounds: forecast +- the conformal half width of the
lead. Beyond the L calibrated leads (recursive blocks) the last lead's half
width grows with sqrt(lead / L), as a random walk's spread would (an
assumption, not calibrated: the frame's "calibrated" column says which rows are).
"""
from __future__ import annotations

from typing import Optional

import numpy as np
import pandas as pd

from ..data._checks import numeric_values
from ..data._errors import DataError
from ..data._future import future_labels
from ..data._predict import prepare_like, zoned_labels
from ..data._prepare import _group_order
from ..data._transform import inverse
from ..evaluation._intervals import level_name
from ..training._rollout import rollout
from ..training._train import activation_index


def column_names(targets, levels) -> list:
    """forecast, lower_<level>, upper_<level> (one target) or <target>_forecast, ..."""
    out = []
    for t in targets:
        pre = "" if len(targets) == 1 else f"{t}_"
        out.append(pre + "forecast")
        for lv in levels:
            out += [f"{pre}lower_{level_name(lv)}", f"{pre}upper_{level_name(lv)}"]
    return out


def _check(result, steps):
    cfg = result.config
    if cfg.task != "regression" or cfg.mode != "many-to-one" or cfg.window == "full":
        raise ValueError(f"forecast() needs a regression fit with `mode`='many-to-one' and a whole-number "
                         f"window; this fit has task={cfg.task!r}, mode={cfg.mode!r}, window={cfg.window!r} "
                         "(use predict() for it)")
    if result.spec.horizon < 1:
        raise ValueError("forecast() needs `horizon` >= 1; this fit predicts the current row (horizon 0)")
    if steps is not None and (isinstance(steps, bool) or not isinstance(steps, (int, np.integer))
                              or not 1 <= int(steps) <= 100_000):
        raise ValueError(f"`steps` (={steps!r}) must be a whole number from 1 to 100000, or None "
                         f"(the horizon, {result.spec.horizon})")


def _sequences(groups, n):
    """(first, last) row of every sequence of a Prepared, in its order."""
    if groups is None:
        return [(0, n - 1)]
    change = np.flatnonzero(groups[1:] != groups[:-1]) + 1
    lo = np.concatenate([[0], change])
    hi = np.concatenate([change, [n]]) - 1
    return list(zip(lo.tolist(), hi.tolist()))


def _split_future(df, spec):
    """(known frame, future frame, group column values of the future rows) from a new frame.

    Future rows: the rows at the end of each sequence whose target(s) are all empty.
    """
    cfg = spec.config
    targets = list(spec.target_names)
    missing = [t for t in targets if t not in df.columns]
    if missing:
        raise DataError(f"the frame has no target column {missing}; forecast() reads the known "
                        "values of the target from it")
    empty = df[targets].isna().all(axis=1).to_numpy()  # (n,)
    take, gcode, _ = _group_order(df, cfg.group_column)
    order = np.arange(len(df)) if take is None else take
    code = np.zeros(len(df), np.int64) if gcode is None else gcode
    # a row is future when it and every later row of its sequence have an empty target
    rev = pd.Series(empty[order][::-1].astype(np.int64))
    future = rev.groupby(code[::-1]).cumprod().to_numpy()[::-1].astype(bool)  # sequence order
    tail = np.zeros(len(df), bool)
    tail[order] = future
    return df.iloc[np.flatnonzero(~tail)], df.iloc[np.flatnonzero(tail)]


def forecast(result, steps: Optional[int] = None, df: Optional[pd.DataFrame] = None) -> pd.DataFrame:
    """See ``FitResult.forecast``."""
    _check(result, steps)
    spec, cfg = result.spec, result.config
    T, L = int(spec.window), int(spec.horizon)
    targets = list(spec.target_names)
    O = len(targets)
    fed = O if cfg.target_as_input else 0  # the target's own input columns come first
    extra_inputs = [c for c in spec.input_names if c not in targets]

    # 1. the data: known rows (prepared as the fit prepared its data) and future rows
    future = None
    if df is None:
        if result.prepared is None:
            raise ValueError("this fit was loaded without its data; pass the recent rows: "
                             "result.forecast(df=frame)")
        p = result.prepared
        labels = result._labels if result._labels is not None else pd.Index(p.index, name=spec.index_name)
    else:
        known, future = _split_future(df, spec)
        if len(known) == 0:
            raise DataError("every row of the frame has an empty target; forecast() needs the known past")
        p, _ = prepare_like(known, spec, need_windows=False)
        z = zoned_labels(known, p.rows, cfg.time_column)
        labels = z if z is not None else pd.Index(p.index, name=spec.index_name)
    if not isinstance(labels, pd.Index):
        labels = pd.Index(labels)

    # 2. future input rows: needed when the network reads inputs other than the target
    spans = _sequences(p.groups, len(p.inputs))
    gids = [None if p.groups is None else p.groups[lo] for lo, _ in spans]
    fut = {g: None for g in gids}
    if future is not None and len(future):
        fut = _future_rows(future, spec, gids, extra_inputs)
    if extra_inputs:
        counts = {g: (0 if f is None else len(f[0])) for g, f in fut.items()}
        if not any(counts.values()) or (df is None):
            raise DataError(f"the network reads {extra_inputs} besides the target; give their future values: "
                            "append rows after the last one with those columns filled and the target empty, "
                            "then call forecast(df=frame)")
        have = min(counts.values())
        if len(set(counts.values())) > 1:
            raise DataError(f"the sequences have different numbers of future rows ({counts}); give each the "
                            "same number of rows with future inputs")
        if steps is None:
            steps = have
        if int(steps) > have:
            raise DataError(f"`steps`={steps} needs future values of {extra_inputs} for {steps} rows, but the "
                            f"frame has {have} future row(s); add rows or lower `steps`")
    steps = int(L if steps is None else steps)
    blocks = -(-steps // L)

    # 3. one buffer per sequence: last T known rows, then blocks*L future rows
    I = p.inputs.shape[1]
    buf = np.zeros((len(spans), T + blocks * L, I), dtype=np.dtype(cfg.dtype))
    base = np.zeros((len(spans), 1, O))
    for j, (lo, hi) in enumerate(spans):
        if hi - lo + 1 < T:
            who = "" if gids[j] is None else f" of sequence {gids[j]!r}"
            raise DataError(f"the last known rows{who} are {hi - lo + 1}, fewer than the window {T}; give "
                            "at least a window of history")
        buf[j, :T] = p.inputs[hi - T + 1:hi + 1]
        base[j, 0] = p.levels[hi]
        f = fut[gids[j]]
        if f is not None and extra_inputs:
            buf[j, T:T + steps, fed:] = f[1][:steps]
    out = rollout(result.params, buf, activation_index(cfg.activation), steps=T, leads=L,
                  blocks=blocks, fed=fed, cell=cfg.cell)[:, :steps]  # (G, steps, O) scaled, transformed

    # 4. back to original units; 5. conformal bounds
    point = inverse(spec.scaler.inverse_targets(out), cfg.transform, base, lead_axis=1)  # (G, steps, O)
    lead = np.arange(1, steps + 1)
    levels = list(cfg.coverage) if result.interval_widths is not None else []
    if levels:
        q = result.interval_widths  # (C, L, O)
        grow = np.sqrt(np.maximum(lead / L, 1.0))  # (steps,)
        width = q[:, np.minimum(lead, L) - 1, :] * grow[None, :, None]  # (C, steps, O)
    frames = []
    for j, (lo, hi) in enumerate(spans):
        f = fut[gids[j]]
        if f is not None and len(f[0]) >= steps:
            index = pd.Index(f[0][:steps], name=spec.index_name)
        else:
            index = future_labels(labels[lo:hi + 1], steps)
            index.name = spec.index_name
        cols = {}
        if gids[j] is not None:
            cols[cfg.group_column] = np.full(steps, gids[j], dtype=object)
        cols["lead"] = lead
        names = iter(column_names(targets, levels))
        for o in range(O):
            cols[next(names)] = point[j, :, o]
            for c in range(len(levels)):
                cols[next(names)] = point[j, :, o] - width[c, :, o]
                cols[next(names)] = point[j, :, o] + width[c, :, o]
        if levels:
            cols["calibrated"] = lead <= L
        frames.append(pd.DataFrame(cols, index=index))
    return pd.concat(frames) if len(frames) > 1 else frames[0]


def _future_rows(future, spec, gids, extra_inputs):
    """{sequence id: (time labels (F,), scaled feature values (F, I - fed))} of the future rows."""
    cfg = spec.config
    take, gcode, g_ids = _group_order(future, cfg.group_column)
    order = np.arange(len(future)) if take is None else take
    if cfg.time_column is not None:
        times = pd.Index(future[cfg.time_column]).take(order)
    else:
        times = future.index.take(order)
    cols = []
    for c in extra_inputs:
        if c not in future.columns:
            raise DataError(f"the future rows lack input column {c!r}; fill it for every future row")
        v = numeric_values(future, c, take)
        bad = np.isnan(v)
        if bad.any():
            i = int(order[np.argmax(bad)])
            raise DataError(f"input column {c!r} is empty in future row {future.index[i]!r} ({int(bad.sum())} "
                            "such rows): the forecast needs every input of every future row; fill them or "
                            "lower `steps`")
        cols.append(spec.scaler.transform(v, [c]))
    values = np.stack(cols, axis=1) if cols else np.zeros((len(future), 0))
    out = {}
    codes = np.zeros(len(future), np.int64) if gcode is None else gcode
    for k in np.unique(codes):
        sel = codes == k
        gid = None if gcode is None else g_ids[k]
        if gid not in gids:
            raise DataError(f"future rows name sequence {gid!r}, which has no known rows in the frame")
        out[gid] = (times[sel], values[sel])
    return {g: out.get(g) for g in gids}
