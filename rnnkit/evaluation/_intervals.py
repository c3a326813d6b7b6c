"""Split conformal prediction intervals, one per lead, and how to score them.

Split conformal prediction (Vovk, Gammerman & Shafer 2005; Lei et al. 2018,
sec. 2.2): fit on one part, take the absolute residuals |y - yhat| of n points
the fit never saw (here the validation windows), and for a level 1 - alpha use
the k-th smallest, k = ceil((n + 1)(1 - alpha)), as the half width of
``yhat +- q``. For exchangeable points the interval covers a new value with
probability at least 1 - alpha. A time series is not exchangeable: the
guarantee becomes a hope that the test period (and the future) looks like the
validation period, which is why the test part reports the empirical coverage.
Each lead and target column gets its own q (errors grow with the lead). When
n is too small for a level (k > n) the largest residual is used and the fit
notes it: that interval is narrower than the method would have it.

Scores on held-out targets: empirical coverage, mean width, and the interval
score of Gneiting & Raftery (2007, eq. 43), lower is better:
``(u - l) + (2 / alpha) (l - y) 1{y < l} + (2 / alpha) (y - u) 1{y > u}``.
"""
from __future__ import annotations

import math
from typing import Dict, Sequence, Tuple

import numpy as np

INTERVAL_METRICS = ("coverage", "width", "interval_score")


def level_name(level: float) -> str:
    """0.8 -> "80", 0.975 -> "97_5": the level in percent, for column names."""
    return f"{float(level) * 100:.10g}".replace(".", "_")


def by_lead(a: np.ndarray, leads: int) -> np.ndarray:
    """Predictions or targets as (N, L, O): (N, O) gets a lead axis; (N, T, O) pools the T steps."""
    a = np.asarray(a, dtype=np.float64)
    if leads > 1:
        return a
    return a.reshape(-1, 1, a.shape[-1])


def half_widths(residuals: np.ndarray, levels: Sequence[float]) -> Tuple[np.ndarray, np.ndarray]:
    """Conformal half widths from calibration residuals.

    Args:
        residuals: (N, L, O) absolute errors on the calibration windows (N >= 1).
        levels: coverage levels in (0, 1).
    Returns:
        q (len(levels), L, O) float64, and capped (len(levels),) bool: True where
        ceil((N + 1) level) > N, so the largest residual stood in.
    """
    r = np.sort(np.abs(np.asarray(residuals, dtype=np.float64)), axis=0)  # (N, L, O)
    n = r.shape[0]
    if n == 0:
        raise ValueError("conformal intervals need at least one calibration residual")
    q, capped = [], []
    for level in levels:
        k = math.ceil((n + 1) * float(level))
        capped.append(k > n)
        q.append(r[min(k, n) - 1])
    return np.stack(q), np.asarray(capped, dtype=bool)


def interval_score(y, lower, upper, alpha: float) -> float:
    """Mean interval score (Gneiting & Raftery 2007) of central (1 - alpha) intervals."""
    y, lo, hi = (np.asarray(v, dtype=np.float64) for v in (y, lower, upper))
    s = (hi - lo) + (2.0 / alpha) * np.maximum(lo - y, 0.0) + (2.0 / alpha) * np.maximum(y - hi, 0.0)
    return float(np.mean(s))


def interval_scores(y, pred, q, levels, axis=None) -> Dict[str, np.ndarray]:
    """Coverage, mean width and interval score per level.

    Args:
        y, pred: (N, L, O) targets and point predictions.
        q: (len(levels), L, O) half widths.
        axis: None for one number per level; (0, 2) for one per lead.
    Returns:
        {"coverage_<level>": ..., "width_<level>": ..., "interval_score_<level>": ...}.
    """
    y, pred = np.asarray(y, np.float64), np.asarray(pred, np.float64)
    out = {}
    for j, level in enumerate(levels):
        lo, hi = pred - q[j], pred + q[j]
        alpha = 1.0 - float(level)
        inside = (lo <= y) & (y <= hi)
        score = (hi - lo) + (2.0 / alpha) * (np.maximum(lo - y, 0.0) + np.maximum(y - hi, 0.0))
        name = level_name(level)
        out[f"coverage_{name}"] = np.mean(inside, axis=axis)
        out[f"width_{name}"] = np.mean(hi - lo, axis=axis)
        out[f"interval_score_{name}"] = np.mean(score, axis=axis)
    return out
