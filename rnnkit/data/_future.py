"""Time labels after the end of the data: the step read from the labels, then continued.

Dates: pandas names the step (``pd.infer_freq``: hourly "h", daily "D",
month starts "MS", month ends "ME", quarters "QS-..."/"QE-...", years
"YS-..."/"YE-...", ...) and its offset gives the next labels, so months and
years move by the calendar, not by a fixed number of days. Labels whose step
pandas cannot name but that are equally spaced continue by that spacing.
Periods move by their own frequency; integers by their last constant step, and
so do whole numbers kept as floats (years 1700.0, 1701.0, ... as some open data sets
store them), which stay floats.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from ._errors import DataError

TAIL = 64  # labels the step is read from (the most recent ones)


def time_step(labels) -> object:
    """The step of regular labels: a pandas offset (dates), or a number (integers, periods: 1;
    a float for whole numbers kept as floats)."""
    idx = pd.Index(labels)
    tail = idx[-TAIL:]
    if isinstance(idx, pd.PeriodIndex):
        return 1
    if isinstance(idx, pd.DatetimeIndex):
        if len(tail) >= 3:
            freq = pd.infer_freq(tail)
            if freq is not None:
                return pd.tseries.frequencies.to_offset(freq)
        d = np.diff(tail.asi8)
        if len(d) and (d == d[0]).all() and d[0] > 0:
            return pd.Timedelta(int(d[0]), "ns")
        raise DataError(f"the times end with irregular steps ({list(tail[-4:].astype(str))}); a forecast "
                        "needs a regular time step to label its future rows: make the last rows regular, "
                        "or give the future rows (with their times) in the frame")
    if pd.api.types.is_integer_dtype(idx.dtype) and len(idx) >= 2:
        d = np.diff(np.asarray(tail, dtype=np.int64))
        if (d == d[0]).all() and d[0] > 0:
            return int(d[0])
        raise DataError(f"the index ends with unequal steps ({list(np.asarray(tail[-4:]))}); a forecast "
                        "labels its rows by continuing a constant step: make the index regular")
    if pd.api.types.is_float_dtype(idx.dtype) and len(idx) >= 2:
        v = np.asarray(tail, dtype=np.float64)
        if np.isfinite(v).all() and (v == np.round(v)).all():  # whole numbers kept as floats (years)
            d = np.diff(v)
            if (d == d[0]).all() and d[0] > 0:
                return float(d[0])
            raise DataError(f"the index ends with unequal steps ({list(v[-4:])}); a forecast labels its "
                            "rows by continuing a constant step: make the index regular")
    raise DataError(f"cannot continue an index of {idx.dtype} ({list(idx[-3:])}) into the future: give a "
                    "time index or `time_column` of dates, periods or whole numbers (whole numbers kept "
                    "as floats, such as years 1700.0, 1701.0, count too)")


def future_labels(labels, steps: int) -> pd.Index:
    """The ``steps`` labels after the last one, (steps,) Index of the same kind."""
    idx = pd.Index(labels)
    step = time_step(idx)
    last = idx[-1]
    if isinstance(idx, pd.DatetimeIndex):
        if isinstance(step, pd.Timedelta):
            return pd.DatetimeIndex([last + step * k for k in range(1, steps + 1)], name=idx.name)
        return pd.date_range(last, periods=steps + 1, freq=step, name=idx.name)[1:]
    if isinstance(idx, pd.PeriodIndex):
        return pd.period_range(last + 1, periods=steps, freq=idx.freq, name=idx.name)
    if isinstance(step, float):  # whole numbers kept as floats: continued as floats
        return pd.Index(float(last) + step * np.arange(1, steps + 1, dtype=np.float64), name=idx.name)
    return pd.Index(int(last) + step * np.arange(1, steps + 1, dtype=np.int64), name=idx.name)
