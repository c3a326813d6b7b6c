"""The forecast past the end of the data: recent history, the forecast and its bands."""
from __future__ import annotations

import re
from typing import Optional

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from . import _base as base

_BOUND = re.compile(r"^(?:(?P<target>.+)_)?(?P<side>lower|upper)_(?P<level>\d+(?:_\d+)?)$")


def _bands(frame: pd.DataFrame, target: Optional[str]):
    """{level text: (lower column, upper column)} for one target, widest level first."""
    found = {}
    for c in frame.columns:
        m = _BOUND.match(str(c))
        if m and (m.group("target") or None) == target:
            found.setdefault(m.group("level"), {})[m.group("side")] = c
    pairs = {lv: (d["lower"], d["upper"]) for lv, d in found.items() if len(d) == 2}
    return dict(sorted(pairs.items(), key=lambda kv: -float(kv[0].replace("_", "."))))


def fan_chart(history, future: pd.DataFrame, *, recent: Optional[int] = 120, title: Optional[str] = None,
              ax=None) -> Figure:
    """Recent history, then the forecast with its prediction bands (one shade per level).

    Args:
        history: Series of the known values on their time index (the last rows of
            the data), or a DataFrame with an "actual" column (``predict()``'s frame).
        future: the frame ``FitResult.forecast()`` returns: indexed by the future
            times, a "forecast" column and "lower_<level>"/"upper_<level>" pairs
            (several targets: "<target>_forecast", ...; the first is drawn).
        recent: how many of the last history rows to show (None: all).
        title: the title (default "forecast of <name>").
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on.
    """
    if isinstance(history, pd.DataFrame):
        if "actual" not in history.columns:
            raise ValueError("`history` as a DataFrame needs an 'actual' column (the frame predict() "
                             "returns); or pass a Series of the known values")
        history = history["actual"]
    if not isinstance(history, pd.Series):
        raise TypeError(f"`history` must be a pandas Series on a time index, got {type(history).__name__}")
    if not isinstance(future, pd.DataFrame) or len(future) == 0:
        raise ValueError("`future` must be the non-empty DataFrame FitResult.forecast() returns")
    point = [c for c in future.columns if str(c) == "forecast" or str(c).endswith("_forecast")]
    if not point:
        raise ValueError(f"`future` has no 'forecast' column (columns: {list(future.columns)})")
    col = point[0]
    target = None if col == "forecast" else str(col)[:-len("_forecast")]
    if recent is not None:
        if isinstance(recent, bool) or not isinstance(recent, (int, np.integer)) or recent < 1:
            raise ValueError(f"`recent` (={recent!r}) must be a whole number >= 1 or None")
        history = history.iloc[-int(recent):]
    x_past = base.time_values(history.index, "history.index")
    x_next = base.time_values(future.index, "future.index")
    if base.is_datetime(x_past) != base.is_datetime(x_next):
        raise ValueError("`history` and `future` must share one kind of time index (both dates or both numbers)")
    fig, ax = base.figure_and_axes(ax)
    past = history.to_numpy(dtype=np.float64)
    ax.plot(x_past, past, color=base.INK, linewidth=1.3, label="known")
    y = future[col].to_numpy(dtype=np.float64)
    bands = _bands(future, target)
    shades = np.linspace(0.18, 0.38, max(len(bands), 1))
    for (level, (lo, hi)), alpha in zip(bands.items(), shades):
        ax.fill_between(x_next, future[lo].to_numpy(np.float64), future[hi].to_numpy(np.float64),
                        color=base.ACCENT, alpha=float(alpha), linewidth=0,
                        label=f"{level.replace('_', '.')} % interval")
    # join the forecast to the last known value so the eye follows one line
    if len(past):
        ax.plot(np.concatenate([x_past[-1:], x_next]), np.concatenate([past[-1:], y]),
                color=base.ACCENT, linewidth=1.6, label="forecast")
    else:
        ax.plot(x_next, y, color=base.ACCENT, linewidth=1.6, label="forecast")
    if len(x_past):
        ax.axvline(x_past[-1], color=base.MUTED, linewidth=0.8, linestyle=":")
    base.format_time_axis(ax, np.concatenate([x_past, x_next]) if len(x_past) else x_next)
    base.tidy(ax)
    ax.legend(frameon=False, fontsize="small", ncols=2)
    name = target or (str(history.name) if history.name not in (None, "actual") else None)
    ax.set_ylabel(name or "value")
    ax.set_title(title or ("forecast" + (f" of {name}" if name else "")), loc="left")
    return fig
