"""Scores of a forecast or a classifier: pure numpy, no silent dropping.

Regression arrays may be ``(N,)``, ``(N, O)`` or ``(N, T, O)``: when there are
two or more axes the last one is the output; all others are examples. MAE and
RMSE average over every element. R2 and MASE are computed per output column
and then averaged with equal weight, so that an output measured in kW and one
measured in degrees count alike (scikit-learn's ``r2_score`` with
``multioutput="uniform_average"`` on the ``(-1, O)`` columns). With one
output this is the plain ``1 - SS_res / SS_tot`` over all elements.

Classification takes integer codes ``0..C-1`` and probabilities with the
classes on the last axis; every label position counts once.

A NaN or infinity in a prediction is an error that names the model and the
split when they are given: a baseline or a network that emits NaN must be
seen, not averaged away.
"""
from __future__ import annotations

from typing import Optional

import numpy as np
import pandas as pd

# ---------------------------------------------------------------- checks


def _where(model: Optional[str], split: Optional[str]) -> str:
    parts = [f"model {model!r}" if model is not None else "",
             f"split {split!r}" if split is not None else ""]
    text = " on ".join(p for p in parts if p)
    return f" ({text})" if text else ""


def _pair(y_true, y_pred, model=None, split=None):
    """Both arrays as float64 of one shape; refuse NaN/inf predictions."""
    yt = np.asarray(y_true, dtype=np.float64)
    yp = np.asarray(y_pred, dtype=np.float64)
    if yt.shape != yp.shape:
        raise ValueError(f"`y_pred` has shape {yp.shape} but `y_true` has shape {yt.shape}"
                         f"{_where(model, split)}; give one prediction per target")
    if yt.size == 0:
        raise ValueError(f"no targets to score{_where(model, split)}: the arrays are empty")
    _finite(yp, "y_pred", model, split)
    _finite(yt, "y_true", model, split)
    return yt, yp


def _finite(a: np.ndarray, name: str, model=None, split=None) -> None:
    bad = ~np.isfinite(a)
    if bad.any():
        rows = np.unique(np.nonzero(bad.reshape(a.shape[0], -1) if a.ndim else bad[None])[0])
        raise ValueError(
            f"`{name}` holds {int(bad.sum())} NaN/inf value(s){_where(model, split)}, first in "
            f"row(s) {rows[:5].tolist()}; a model that outputs NaN has diverged or was fed NaN: "
            "fix it instead of scoring it")


def _columns(a: np.ndarray) -> np.ndarray:
    """(N,) -> (N, 1); (..., O) -> (-1, O): rows are examples, columns are outputs."""
    return a.reshape(-1, 1) if a.ndim <= 1 else a.reshape(-1, a.shape[-1])


# ---------------------------------------------------------------- regression


def mae(y_true, y_pred, *, model=None, split=None) -> float:
    """Mean absolute error over every element.

    Args:
        y_true, y_pred: arrays of one shape, (N,), (N, O) or (N, T, O).
        model, split: optional names used in error messages.
    Returns:
        float.
    """
    yt, yp = _pair(y_true, y_pred, model, split)
    return float(np.mean(np.abs(yt - yp)))


def rmse(y_true, y_pred, *, model=None, split=None) -> float:
    """Root of the mean squared error over every element (same shapes as `mae`)."""
    yt, yp = _pair(y_true, y_pred, model, split)
    return float(np.sqrt(np.mean((yt - yp) ** 2)))


def r2(y_true, y_pred, *, model=None, split=None) -> float:
    """Coefficient of determination, averaged with equal weight over output columns.

    Per column o (after reshaping to (-1, O)): ``1 - SS_res_o / SS_tot_o`` with
    the column's own mean. A constant column scores 1.0 when predicted exactly
    and 0.0 otherwise (scikit-learn's ``force_finite`` rule).

    Args:
        y_true, y_pred: arrays of one shape, (N,), (N, O) or (N, T, O).
    Returns:
        float.
    """
    yt, yp = _pair(y_true, y_pred, model, split)
    yt, yp = _columns(yt), _columns(yp)  # (M, O)
    ss_res = np.sum((yt - yp) ** 2, axis=0)  # (O,)
    ss_tot = np.sum((yt - yt.mean(axis=0)) ** 2, axis=0)  # (O,)
    safe = ss_tot > 0
    per = np.where(ss_res == 0, 1.0, 0.0)
    per[safe] = 1.0 - ss_res[safe] / ss_tot[safe]
    return float(np.mean(per))


def mase_scale(train_series, season: Optional[int] = None, groups=None):
    """In-sample MAE of the seasonal naive forecast on the training part.

    Hyndman & Koehler (2006): ``q = mean_t |y_t - y_{t-m}|`` over the training
    rows, m = `season` or 1. A difference is taken only between two rows of the
    same contiguous sequence (same `groups` id, no change of id in between).

    Args:
        train_series: (R,) or (R, O) training target values, rows in time order.
        season: m >= 1, or None for 1.
        groups: optional (R,) sequence id per row.
    Returns:
        float for (R,) input, (O,) array for (R, O). 0 for a constant series
        (then `mase` returns NaN: the measure is undefined).
    """
    m = 1 if season is None else season
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or m < 1:
        raise ValueError(f"`season` (={season!r}) must be a whole number >= 1 or None")
    y = np.asarray(train_series, dtype=np.float64)
    if y.ndim not in (1, 2):
        raise ValueError(f"`train_series` must be (R,) or (R, O); got shape {y.shape}")
    _finite(y, "train_series")
    seg = sequence_ids(groups, len(y))
    ok = seg[m:] == seg[:-m] if len(y) > m else np.zeros(0, dtype=bool)  # (R - m,)
    if not ok.any():
        raise ValueError(
            f"`train_series` has no two rows {m} step(s) apart within one sequence "
            f"(rows={len(y)}, season={m}); MASE needs them: lower `season` or give a longer "
            "training part")
    diffs = np.abs(y[m:] - y[:-m])[ok]  # (K,) or (K, O)
    q = diffs.mean(axis=0)
    return float(q) if y.ndim == 1 else q


def sequence_ids(groups, n: int) -> np.ndarray:
    """(n,) int: a new number wherever the group id changes."""
    if groups is None:
        return np.zeros(n, dtype=np.int64)
    g = np.asarray(groups)
    if g.shape != (n,):
        raise ValueError(f"`groups` has shape {g.shape}; it needs one id per row, ({n},)")
    change = np.concatenate([[False], g[1:] != g[:-1]])
    return np.cumsum(change)


def mase(y_true, y_pred, scale, *, model=None, split=None) -> float:
    """Mean absolute scaled error: MAE of each output over its `scale`, then averaged.

    Args:
        y_true, y_pred: arrays of one shape, (N,), (N, O) or (N, T, O).
        scale: float, or (O,) from `mase_scale` of the training part.
    Returns:
        float; NaN where a scale is 0 (a constant training series).
    """
    yt, yp = _pair(y_true, y_pred, model, split)
    err = np.mean(np.abs(_columns(yt) - _columns(yp)), axis=0)  # (O,)
    q = np.broadcast_to(np.asarray(scale, dtype=np.float64), err.shape) \
        if np.ndim(scale) == 0 else np.asarray(scale, dtype=np.float64)
    if q.shape != err.shape:
        raise ValueError(f"`scale` has shape {q.shape} but there are {err.shape[0]} output(s); "
                         "give one scale per output (from `mase_scale` of the training targets)")
    if not np.all(np.isfinite(q)) or np.any(q < 0):
        raise ValueError(f"`scale` (={q.tolist()}) must be finite and >= 0")
    per = np.full(err.shape, np.nan)
    np.divide(err, q, out=per, where=q > 0)
    return float(np.mean(per))


def regression_metrics(y_true, y_pred, *, scale, mask=None, model=None, split=None) -> dict:
    """MAE, RMSE, MASE and R2 of one prediction.

    Args:
        y_true, y_pred: (N, O) or (N, T, O) (or (N,)).
        scale: MASE scale, float or (O,).
        mask: optional (N, T) bool of the steps that count (many-to-many padding).
    Returns:
        {"mae", "rmse", "mase", "r2"} -> float.
    """
    yt, yp = np.asarray(y_true), np.asarray(y_pred)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != yt.shape[:mask.ndim] or yt.shape != yp.shape:
            raise ValueError(f"`mask` shape {mask.shape} does not fit targets {yt.shape} "
                             f"and predictions {yp.shape}{_where(model, split)}")
        yt, yp = yt[mask], yp[mask]  # (K, O)
    kw = dict(model=model, split=split)
    return {"mae": mae(yt, yp, **kw), "rmse": rmse(yt, yp, **kw),
            "mase": mase(yt, yp, scale, **kw), "r2": r2(yt, yp, **kw)}


# ---------------------------------------------------------------- classification


def _codes(y, name, n_classes=None, model=None, split=None) -> np.ndarray:
    y = np.asarray(y)
    if y.size and not np.issubdtype(y.dtype, np.integer):
        if not np.issubdtype(y.dtype, np.floating) or np.any(y != np.round(y)):
            raise TypeError(f"`{name}` must hold integer class codes 0..C-1; got dtype {y.dtype}")
        y = y.astype(np.int64)
    if y.size and (y.min() < 0 or (n_classes is not None and y.max() >= n_classes)):
        raise ValueError(f"`{name}` holds codes {y.min()}..{y.max()}{_where(model, split)} "
                         f"outside 0..{(n_classes or 1) - 1}; encode labels as 0..C-1")
    return y.astype(np.int64, copy=False)


def accuracy(y_true, y_pred, *, model=None, split=None) -> float:
    """Fraction of labels predicted exactly (codes of one shape, (N,) or (N, T))."""
    yt, yp = _codes(y_true, "y_true"), _codes(y_pred, "y_pred")
    if yt.shape != yp.shape or yt.size == 0:
        raise ValueError(f"`y_pred` shape {yp.shape} must equal `y_true` shape {yt.shape} "
                         f"and be non-empty{_where(model, split)}")
    return float(np.mean(yt == yp))


def balanced_accuracy(y_true, y_pred, *, model=None, split=None) -> float:
    """Mean recall over the classes present in `y_true` (a predicted class
    that never occurs in `y_true` has no recall and is left out, as
    scikit-learn's ``balanced_accuracy_score`` does)."""
    yt, yp = _codes(y_true, "y_true").ravel(), _codes(y_pred, "y_pred").ravel()
    if yt.shape != yp.shape or yt.size == 0:
        raise ValueError(f"`y_pred` shape {yp.shape} must equal `y_true` shape {yt.shape} "
                         f"and be non-empty{_where(model, split)}")
    n = int(max(yt.max(), yp.max())) + 1
    support = np.bincount(yt, minlength=n)  # (C,)
    hits = np.bincount(yt[yt == yp], minlength=n)  # (C,)
    present = support > 0
    return float(np.mean(hits[present] / support[present]))


def log_loss(y_true_codes, proba, n_classes: int, *, model=None, split=None) -> float:
    """Mean negative log probability of the true class.

    Probabilities are clipped to ``[eps, 1 - eps]`` with eps the machine epsilon
    of `proba`'s dtype (float64 for non-float input), as scikit-learn's
    ``log_loss`` does, so a wrong certain prediction costs a large finite amount.
    Classes are ``0..n_classes-1`` whether or not they occur in `y_true_codes`.

    Args:
        y_true_codes: (N,) or (N, T) int codes.
        proba: (N, C) or (N, T, C), rows summing to 1.
        n_classes: C.
    Returns:
        float.
    """
    p = np.asarray(proba)
    if not np.issubdtype(p.dtype, np.floating):
        p = p.astype(np.float64)
    eps = float(np.finfo(p.dtype).eps)
    yt = _codes(y_true_codes, "y_true", n_classes, model, split)
    if p.shape != yt.shape + (n_classes,) or yt.size == 0:
        raise ValueError(f"`proba` has shape {p.shape}{_where(model, split)}; with targets "
                         f"{yt.shape} and n_classes={n_classes} it must be {yt.shape + (n_classes,)}")
    _finite(p, "proba", model, split)
    if p.min() < 0 or p.max() > 1:
        raise ValueError(f"`proba` holds values outside [0, 1] ({p.min()}..{p.max()})"
                         f"{_where(model, split)}; pass probabilities, not scores")
    sums = p.sum(axis=-1, dtype=np.float64)
    if not np.allclose(sums, 1.0, rtol=np.sqrt(eps), atol=0):
        raise ValueError(f"`proba` rows must sum to 1{_where(model, split)}; found sums from "
                         f"{sums.min():.6g} to {sums.max():.6g}: apply softmax first")
    flat = p.reshape(-1, n_classes)  # (M, C)
    picked = flat[np.arange(flat.shape[0]), yt.ravel()].astype(np.float64)  # (M,)
    return float(-np.mean(np.log(np.clip(picked, eps, 1 - eps))))


def confusion(y_true, y_pred, classes) -> pd.DataFrame:
    """Counts of (true, predicted) label pairs.

    Args:
        y_true, y_pred: int codes of one shape.
        classes: (C,) original labels; code k is ``classes[k]``.
    Returns:
        DataFrame (C, C): index "true", columns "predicted", labelled by `classes`.
    """
    classes = np.asarray(classes)
    c = len(classes)
    yt = _codes(y_true, "y_true", c).ravel()
    yp = _codes(y_pred, "y_pred", c).ravel()
    if yt.shape != yp.shape:
        raise ValueError(f"`y_pred` has {yp.size} labels but `y_true` has {yt.size}")
    counts = np.bincount(yt * c + yp, minlength=c * c).reshape(c, c)  # (C, C)
    return pd.DataFrame(counts, index=pd.Index(classes, name="true"),
                        columns=pd.Index(classes, name="predicted"))


def classification_metrics(y_true, proba, *, mask=None, model=None, split=None) -> dict:
    """Accuracy, balanced accuracy and log loss; the label is the argmax of `proba`.

    Args:
        y_true: (N,) or (N, T) int codes.
        proba: (N, C) or (N, T, C) probabilities.
        mask: optional (N, T) bool of the steps that count.
    Returns:
        {"accuracy", "balanced_accuracy", "log_loss"} -> float.
    """
    yt, p = np.asarray(y_true), np.asarray(proba)
    if p.ndim != yt.ndim + 1:
        raise ValueError(f"`proba` shape {p.shape} must be the targets' shape {yt.shape} "
                         f"plus a class axis{_where(model, split)}")
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != yt.shape:
            raise ValueError(f"`mask` shape {mask.shape} must equal targets {yt.shape}")
        yt, p = yt[mask], p[mask]  # (K,), (K, C)
    kw = dict(model=model, split=split)
    _finite(np.asarray(p, dtype=np.float64), "proba", model, split)
    pred = np.argmax(p, axis=-1)
    return {"accuracy": accuracy(yt, pred, **kw),
            "balanced_accuracy": balanced_accuracy(yt, pred, **kw),
            "log_loss": log_loss(yt, p, p.shape[-1], **kw)}
