"""Honest baselines on plain arrays: what a recurrent network has to beat.

Each baseline is fitted on the training windows only and predicts the same
targets the network predicts. The functions here take plain arrays so that
they can be checked alone; ``_baselines.py`` applies them to a Prepared.

Row conventions (shared with Prepared): ``series`` holds every row once, in
time order, sequences concatenated; a target at row r with horizon h was
forecast at row ``r - max(h, 1)`` (the last input row when h >= 1; with h = 0
the last row whose target is already known). A baseline never reads a row of
another sequence: ``segments`` numbers the contiguous sequences.

Regression: ``persistence``, ``seasonal_naive``, ``fit_linear_ar`` /
``predict_linear_ar``. Classification: ``majority``, ``last_label``,
``nearest_neighbour``.
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np

from ._metrics import sequence_ids as segments  # (n,) int64 sequence number per row

SMOOTHING = 0.01  # one-hot labels become (1 - eps) * onehot + eps / C: log loss stays finite
RIDGE = 1e-6  # linear AR ridge, times trace(X^T X) / p (scale-free)
BUDGET = 5e10  # multiply-adds allowed for the linear AR normal equations (~1 s here)
CHUNK = 1 << 21  # elements of one gathered block of windows


# ---------------------------------------------------------------- regression: naive


def _lookback(series, rows, lag, seg, fallback, name):
    """``series[rows - lag]`` where that row is in the same sequence, else `fallback`.

    Returns (values (*rows.shape, ...), ok (*rows.shape,) bool).
    """
    series = np.asarray(series)
    rows = np.asarray(rows, dtype=np.int64)
    seg = segments(None, len(series)) if seg is None else np.asarray(seg)
    src = rows - lag
    ok = src >= 0
    ok[ok] = seg[src[ok]] == seg[rows[ok]]
    out = series[np.where(ok, src, rows)].astype(np.float64)  # placeholder rows replaced below
    if not ok.all():
        if fallback is None:
            bad = rows[~ok]
            raise ValueError(
                f"{name}: target row(s) {bad[:5].tolist()} have no row {lag} step(s) earlier in "
                "their sequence; pass `fallback` (for example the training mean)")
        out[~ok] = np.asarray(fallback, dtype=np.float64)
    return out, ok


def persistence(series, rows, horizon: int, seg=None, fallback=None) -> np.ndarray:
    """Last observed value: ``series[r - max(horizon, 1)]`` for each target row r.

    Args:
        series: (R,) or (R, O) target values (any units; output in the same units).
        rows: (N,) or (N, T) int target rows.
        horizon: h >= 0.
        seg: optional (R,) sequence number per row (see `segments`).
        fallback: value (scalar or (O,)) where the row lies before its sequence's
            start (only possible for many-to-many steps); None: raise.
    Returns:
        (*rows.shape,) or (*rows.shape, O) float64.
    """
    return _lookback(series, rows, max(int(horizon), 1), seg, fallback, "persistence")[0]


def seasonal_lag(horizon: int, season: int) -> int:
    """Rows back for ``y_{t+h|t} = y_{t+h-m(k+1)}``, ``k = floor((h-1)/m)`` (h >= 1; h = 0 as 1).

    Hyndman & Athanasopoulos, Forecasting: Principles and Practice, "simple
    forecasting methods": the same season of the last observed year.
    """
    h = max(int(horizon), 1)
    return season * ((h - 1) // season + 1)


def seasonal_naive(series, rows, horizon: int, season: int, seg=None, fallback=None) -> np.ndarray:
    """Value one season back from the target (`seasonal_lag`); persistence where
    that row lies before the sequence's start, then `fallback`.

    Args and Returns as `persistence`; season: m >= 1.
    """
    if isinstance(season, bool) or not isinstance(season, (int, np.integer)) or season < 1:
        raise ValueError(f"`season` (={season!r}) must be a whole number >= 1")
    out, ok = _lookback(series, rows, seasonal_lag(horizon, season), seg, 0.0, "seasonal_naive")
    if not ok.all():
        near = persistence(series, np.asarray(rows)[~ok], horizon, seg, fallback)
        out[~ok] = near
    return out


# ---------------------------------------------------------------- regression: linear AR


class LinearAR(NamedTuple):
    """Ridge regression of the target on the flattened window, one per output step."""

    coef: np.ndarray  # (S, T*I, O); step k uses the first (t_k+1)*I rows, the rest are 0
    intercept: np.ndarray  # (S, O)
    steps: np.ndarray  # (S,) int: input step t_k that output step k ends at
    windows_used: int  # training windows in the normal equations (after thinning)
    per_step: bool  # True: many-to-many, predictions (N, T, O); False: (N, O)


def _blocks(n, p):
    size = max(1, CHUNK // max(p, 1))
    return [(a, min(a + size, n)) for a in range(0, n, size)]


def fit_linear_ar(x, y, *, lam: float = RIDGE, budget: float = BUDGET) -> LinearAR:
    """Closed-form ridge least squares on flattened windows, plus an intercept.

    Many-to-one (y (N, O)): one model on all T*I window inputs. Many-to-many
    (y (N, T, O)): one model per step t on the inputs of steps 0..t only
    (causal, like the network). All S models come from one pass: the Gram
    matrix of the full window holds every step's Gram matrix as its leading
    block. The intercept is not penalised (columns are centred); the penalty
    is ``lam * trace(G_t) / p_t`` so that ``lam`` is free of units, and
    ``lam=0`` gives ordinary least squares (minimum-norm when singular).
    X^T X is summed over blocks of windows, so memory is O(p^2), never
    O(N p); when N p^2 exceeds `budget`, every k-th training window is used.

    Args:
        x: (N, T, I) windows, or any object with ``.shape`` whose ``x[idx]``
            (idx an int array) returns those windows.
        y: (N, O) or (N, T, O) targets, same indexing.
        lam: ridge strength >= 0.
    Returns:
        LinearAR.
    """
    if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not lam >= 0:
        raise ValueError(f"`lam` (={lam!r}) must be a number >= 0 (0: plain least squares)")
    n, T, n_in = x.shape
    p = T * n_in
    y_shape = tuple(y.shape)
    many = len(y_shape) == 3
    if y_shape[0] != n or (many and y_shape[1] != T) or len(y_shape) not in (2, 3):
        raise ValueError(f"`y` has shape {y_shape}; with windows {x.shape} it must be "
                         f"({n}, O) or ({n}, {T}, O)")
    if n < 2:
        raise ValueError(f"linear AR needs at least 2 training windows; got {n}")
    n_out = y_shape[-1]
    steps = np.arange(T) if many else np.array([T - 1])
    stride = max(1, int(np.ceil(n * p * p / budget)))
    idx = np.arange(0, n, stride)
    x0 = np.asarray(x[idx[:256]], dtype=np.float64).reshape(-1, p)  # shift: keeps sums well scaled
    y0 = np.asarray(y[idx[:256]], dtype=np.float64).reshape(min(len(idx), 256), -1)
    cx, cy = x0.mean(0), y0.mean(0)  # (p,), (S*O,)
    sx, sy = np.zeros(p), np.zeros(len(cy))
    gram, cross = np.zeros((p, p)), np.zeros((p, len(cy)))
    for a, b in _blocks(len(idx), p):
        xb = np.asarray(x[idx[a:b]], dtype=np.float64).reshape(b - a, p) - cx  # (B, p)
        yb = np.asarray(y[idx[a:b]], dtype=np.float64).reshape(b - a, -1) - cy  # (B, S*O)
        _finite_rows(xb, yb)
        sx += xb.sum(0)
        sy += yb.sum(0)
        gram += xb.T @ xb
        cross += xb.T @ yb
    m = len(idx)
    gram -= np.outer(sx, sx) / m  # centred: sum (x - xbar)(x - xbar)^T
    cross -= np.outer(sx, sy) / m
    xbar, ybar = cx + sx / m, (cy + sy / m).reshape(len(steps), n_out)  # (p,), (S, O)
    coef = np.zeros((len(steps), p, n_out))
    intercept = np.zeros((len(steps), n_out))
    for k, t in enumerate(steps):
        q = (int(t) + 1) * n_in
        g = gram[:q, :q]
        pen = lam * np.trace(g) / q
        rhs = cross[:q, k * n_out:(k + 1) * n_out]  # (q, O)
        beta = np.linalg.lstsq(g + pen * np.eye(q), rhs, rcond=None)[0]  # (q, O)
        coef[k, :q] = beta
        intercept[k] = ybar[k] - xbar[:q] @ beta
    return LinearAR(coef, intercept, steps, m, many)


def _finite_rows(xb, yb):
    if not (np.isfinite(xb).all() and np.isfinite(yb).all()):
        raise ValueError("linear AR: the training windows hold NaN/inf; fill or drop them first "
                         "(`missing`='ffill' or 'interpolate')")


def predict_linear_ar(model: LinearAR, x) -> np.ndarray:
    """Predictions of `fit_linear_ar`: (N, O) for one step, (N, T, O) for many.

    Args:
        x: (N, T, I) windows (same indexing rules as `fit_linear_ar`).
    """
    n, T, n_in = x.shape
    p = T * n_in
    if model.coef.shape[1] != p:
        raise ValueError(f"windows {x.shape} do not fit a linear AR fitted on {model.coef.shape[1]} inputs")
    out = np.empty((n, len(model.steps), model.coef.shape[2]))  # (N, S, O)
    for a, b in _blocks(n, p):
        xb = np.asarray(x[np.arange(a, b)], dtype=np.float64).reshape(b - a, p)
        for k, t in enumerate(model.steps):
            q = (int(t) + 1) * n_in
            out[a:b, k] = xb[:, :q] @ model.coef[k, :q] + model.intercept[k]
    return out if model.per_step else out[:, 0]


# ---------------------------------------------------------------- classification


def smooth_one_hot(codes, n_classes: int, eps: float = SMOOTHING) -> np.ndarray:
    """(*codes.shape, C): ``(1 - eps)`` on the label plus ``eps / C`` everywhere."""
    codes = np.asarray(codes, dtype=np.int64)
    out = np.full(codes.shape + (n_classes,), eps / n_classes)
    np.put_along_axis(out, codes[..., None], 1 - eps + eps / n_classes, axis=-1)
    return out


def class_frequencies(train_codes, n_classes: int, mask=None) -> np.ndarray:
    """(C,) share of each class among the training labels (counted steps only)."""
    c = np.asarray(train_codes, dtype=np.int64)
    c = c[np.asarray(mask, dtype=bool)] if mask is not None else c.ravel()
    if c.size == 0:
        raise ValueError("no training labels to count")
    return np.bincount(c, minlength=n_classes)[:n_classes] / c.size


def majority(train_codes, n_classes: int, shape, mask=None) -> np.ndarray:
    """Training class frequencies for every target (argmax: the most frequent class).

    Args:
        train_codes: training labels, any shape; mask: which of them count.
        shape: the targets' shape, (N,) or (N, T).
    Returns:
        (*shape, C) float64.
    """
    freq = class_frequencies(train_codes, n_classes, mask)
    return np.broadcast_to(freq, tuple(shape) + (n_classes,)).copy()


def last_label(codes, rows, horizon: int, n_classes: int, seg=None, fallback=None,
               eps: float = SMOOTHING) -> np.ndarray:
    """Label seen at the last known row ``r - max(horizon, 1)``, smoothed one-hot.

    Where that row lies before the sequence's start, `fallback` ((C,)
    probabilities, e.g. the training class frequencies) is used.

    Returns:
        (*rows.shape, C) float64.
    """
    codes = np.asarray(codes, dtype=np.int64)
    rows = np.asarray(rows, dtype=np.int64)
    lag = max(int(horizon), 1)
    seen, ok = _lookback(codes, rows, lag, seg, -1, "last_label")
    ok &= seen >= 0  # a label outside the known classes (code -1) counts as unknown
    out = smooth_one_hot(np.where(ok, seen, 0).astype(np.int64), n_classes, eps)
    if not ok.all():
        if fallback is None:
            raise ValueError(f"last_label: target row(s) {rows[~ok][:5].tolist()} have no earlier "
                             "row in their sequence; pass `fallback` probabilities")
        out[~ok] = np.asarray(fallback, dtype=np.float64)
    return out


def nearest_neighbour(train_x, train_codes, x, n_classes: int, eps: float = SMOOTHING) -> np.ndarray:
    """1-NN by Euclidean distance on whole flattened sequences, smoothed one-hot.

    Sequences of unequal length must arrive zero-padded at the end to one
    length T (Prepared.windows does this). Ties go to the earlier training
    sequence.

    Args:
        train_x: (N_train, T, I); train_codes: (N_train,) int; x: (N, T, I).
    Returns:
        (N, C) float64.
    """
    a = np.asarray(train_x, dtype=np.float64).reshape(len(train_x), -1)  # (M, T*I)
    b = np.asarray(x, dtype=np.float64).reshape(len(x), -1)  # (N, T*I)
    if a.shape[1] != b.shape[1]:
        raise ValueError(f"sequences of {b.shape[1]} values cannot be compared with training "
                         f"sequences of {a.shape[1]}; pad both to one length")
    labels = np.asarray(train_codes, dtype=np.int64)
    a2 = np.einsum("ij,ij->i", a, a)  # (M,)
    nearest = np.empty(len(b), dtype=np.int64)
    for lo, hi in _blocks(len(b), len(a)):
        d = a2[None, :] - 2.0 * (b[lo:hi] @ a.T)  # (B, M): |a|^2 - 2ab (|b|^2 is constant per row)
        nearest[lo:hi] = np.argmin(d, axis=1)
    return smooth_one_hot(labels[nearest], n_classes, eps)
