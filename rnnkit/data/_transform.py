"""Target transforms for trend and changing level: log, first differences, both.

The network learns the transformed target (Box & Jenkins 1970 difference a
trending series; a log turns growth by a factor into growth by an amount);
every forecast, metric and figure is mapped back to the original units with
`inverse`. Only the target column(s) are transformed, also where they serve
as inputs; features keep their values. Differences are taken within a
sequence; the first row of each sequence has none and is dropped (counted).

    none      z_t = y_t
    log       z_t = log y_t                       y = exp(z)
    diff      z_t = y_t - y_{t-1}                 y_{t+k} = y_t + z_{t+1} + ... + z_{t+k}
    log-diff  z_t = log y_t - log y_{t-1}         y_{t+k} = y_t * exp(z_{t+1} + ... + z_{t+k})

Back from logs the forecast is the exponential of a mean log value: a median
rather than a mean of the original values when the errors are symmetric.
"""
from __future__ import annotations

from typing import Optional

import numpy as np

from ._config import TRANSFORMS
from ._errors import DataError

LOGS = ("log", "log-diff")
DIFFS = ("diff", "log-diff")


def forward(v: np.ndarray, name: str, transform: str, seq_starts: np.ndarray,
            row_label=lambda i: i, time_label=lambda i: "") -> np.ndarray:
    """The transformed column: (R,) float64; NaN where a difference has no earlier row.

    Args:
        v: (R,) float64 values of one target column in original units (NaN: missing).
        name: the column's name (for the error message).
        transform: one of TRANSFORMS.
        seq_starts: (G,) first row of every sequence.
    Raises:
        DataError: a log of a value <= 0, naming the column and the first such row.
    """
    if transform not in TRANSFORMS:
        raise ValueError(f"`transform` (={transform!r}) must be one of {TRANSFORMS}")
    v = np.asarray(v, dtype=np.float64)
    if transform in LOGS:
        bad = v <= 0  # NaN compares False: a missing value is not a bad one
        if bad.any():
            i = int(np.argmax(bad))
            raise DataError(f"`transform`={transform!r} takes the log of column {name!r}, which holds "
                            f"{v[i]:g} at row {row_label(i)!r}{time_label(i)} ({int(bad.sum())} value(s) "
                            "<= 0 in all); use `transform`='none' or 'diff', or shift the column above 0")
        v = np.log(v)
    if transform in DIFFS:
        d = np.full_like(v, np.nan)
        d[1:] = v[1:] - v[:-1]
        d[np.asarray(seq_starts, np.int64)] = np.nan
        v = d
    return v


def inverse(z, transform: str, base=None, lead_axis: Optional[int] = None) -> np.ndarray:
    """Transformed values (unscaled) back to original units.

    Args:
        z: predictions of the transformed target, any shape (..., O).
        transform: one of TRANSFORMS.
        base: for differences, the last known level in original units, broadcastable
            to ``z`` (with the lead axis of length 1 when ``lead_axis`` is given).
        lead_axis: the axis holding consecutive leads 1..L from one base: their
            differences add up along it. None: every value is one step from its base.
    Returns:
        float64 array shaped like ``z``.
    """
    z = np.asarray(z, dtype=np.float64)
    if transform == "none":
        return z
    if transform == "log":
        return np.exp(z)
    if base is None:
        raise ValueError(f"`transform`={transform!r} needs the last known level (`base`)")
    step = np.cumsum(z, axis=lead_axis) if lead_axis is not None else z
    base = np.asarray(base, dtype=np.float64)
    return base + step if transform == "diff" else base * np.exp(step)
