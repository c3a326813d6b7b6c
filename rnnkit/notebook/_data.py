"""Which data each panel figure shows: picked out of a FitResult or SweepResult.

No numbers are made here: predictions, baselines, diagnostics and loss
surfaces come from the library's own functions; these helpers choose the
rows (the test range, one sequence of it), the column to rank by and the
words of the status line.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..evaluation._baselines import baseline_predictions
from ..data._predict import per_row
from ..inspection._diagnose import loss_slice, loss_surface

SURFACE_STEPS = 15  # grid points per axis of the 2-D loss surface (odd: the trained point is on it)
SLICE_STEPS = 41


def shown_split(result) -> str:
    """The held-out part the forecast page shows: test, or val when test has no window."""
    starts = result.prepared.starts
    return "test" if len(starts["test"]) else "val"


def _shown_rows(result, split):
    """(rows (N,), positions (N,)) of the split's targets: one sequence when there are several.

    rows index the Prepared's rows (and ``predict()``'s frame); positions index
    the targets of the split after ``per_row`` (many-to-many keeps the step with most history).
    """
    p = result.prepared
    target = np.asarray(p.target_rows(split))  # (N,) or (N, T)
    rows, pos = per_row(target, np.arange(target.size).reshape(target.shape), first=p.leads > 1)
    if p.groups is not None and not p.full and len(rows):
        last = p.groups[rows[-1]]  # one sequence: times of different sequences would interleave
        keep = p.groups[rows] == last
        rows, pos = rows[keep], pos[keep]
    return rows, pos


def forecast_frame(result) -> pd.DataFrame:
    """``result.predict()`` on the shown held-out range (one sequence of it), original units."""
    split = shown_split(result)
    pred = result.predict()
    if result.prepared.full:  # one row per sequence, indexed by its id
        return pred[pred["split"] == split]
    rows, _ = _shown_rows(result, split)
    return pred.iloc[rows]


def best_baseline(result) -> str:
    """Name of the baseline with the best held-out score (lowest RMSE / highest accuracy)."""
    m = result.metrics.drop(index="rnn", errors="ignore")
    col = score_column(result.metrics, result.config.task)
    scores = m[col].dropna()
    if scores.empty:
        return str(m.index[0])
    return str(scores.idxmax() if col.endswith("accuracy") else scores.idxmin())


def baseline_series(result, index):
    """(name, values (N,)) of the best baseline on the rows ``forecast_frame`` shows (first target)."""
    split = shown_split(result)
    name = best_baseline(result)
    values = np.asarray(baseline_predictions(result.prepared, split)[name], np.float64)
    _, pos = _shown_rows(result, split)
    flat = values.reshape((-1,) + values.shape[-1:])  # (N or N*T, O)
    out = flat[pos, 0]
    if len(out) != len(index):
        raise ValueError(f"baseline {name!r} has {len(out)} values for {len(index)} shown rows")
    return name, out


def gradient_factor(activation: str) -> float:
    """The bound on |phi'|: 1/4 for sigmoid, 1 for tanh, relu and linear (common practice, no source)."""
    return 0.25 if activation == "sigmoid" else 1.0


def gradient_norms(diagnostics) -> np.ndarray:
    """(T,) gradient norms with steps no window reaches (NaN) shown as 0, i.e. left out of the log plot."""
    return np.nan_to_num(np.asarray(diagnostics.gradient_through_time, np.float64), nan=0.0)


def loss_planes(result):
    """((alphas, betas, values), (alphas, values)): the 2-D surface and the 1-D slice along V."""
    split = "val" if len(result.prepared.starts["val"]) else "train"
    return (loss_surface(result, split=split, steps=SURFACE_STEPS),
            loss_slice(result, param="V", split=split, steps=SLICE_STEPS))


def window_times(result, i: int, steps: int):
    """Time labels of the steps of window ``i`` of the diagnostics' split (None for whole sequences)."""
    p = result.prepared
    if p.full:
        return None
    start = int(p.starts[result.diagnostics.split][i])
    return p.index[start:start + steps]


def score_column(metrics: pd.DataFrame, task: str) -> str:
    """The column the Scores page ranks by: test RMSE / accuracy, else the validation one."""
    name = "rmse" if task == "regression" else "accuracy"
    for split in ("test", "val"):
        col = f"{split}_{name}"
        if col in metrics.columns and metrics[col].notna().any():
            return col
    return metrics.columns[0]


def headline(result) -> str:
    """One sentence: the network's held-out score against the best baseline's."""
    col = score_column(result.metrics, result.config.task)
    rnn = result.metrics[col].get("rnn", np.nan)
    name = best_baseline(result)
    other = result.metrics.loc[name, col]
    return f"{col}: network {rnn:.4g}, best baseline ({name}) {other:.4g}."


def sweep_headline(result) -> str:
    """One sentence: the best setting and its score over seeds."""
    top = result.summary().iloc[0]
    setting = ", ".join(f"{f} {top[f]}" for f in result.varied)
    return (f"Best: {setting} with {result.metric} {top[result.metric]:.4g} "
            f"(seed spread {top['seed_spread']:.3g}).")
