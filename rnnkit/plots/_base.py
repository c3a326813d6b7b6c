"""What every figure builder shares: the palette, a fresh Figure or the caller's
Axes, input checks that name the argument, and time axes.

Figures are built with ``matplotlib.figure.Figure`` directly, never through
pyplot: pyplot keeps global state (the current figure) that is not safe to
touch from the panel's background thread, and a Figure made this way is not
registered anywhere, so it is freed when the caller drops it.
"""
from __future__ import annotations

import numbers
from typing import Optional, Tuple

import numpy as np
import pandas as pd
from matplotlib import dates as mdates
from matplotlib import ticker
from matplotlib.axes import Axes
from matplotlib.figure import Figure

# Our palette: dark ink for observed data, a warm accent for the network,
# a cool grey for yardsticks, red for trouble, green for the best point.
INK = "#1d2b36"
ACCENT = "#d9661f"
MUTED = "#7d8f9e"
ALERT = "#b8323a"
GOOD = "#2f8f6b"
GRID = "#e3e7ea"
# Classes: distinct hues that stay apart in grey print.
CLASS_COLOURS = ("#3b7dba", "#e0a526", "#4d9b6a", "#b8323a", "#8a5fb0",
                 "#c96f9c", "#6b7b3a", "#2fa6a6")
DIVERGING = "RdBu_r"  # negative blue, positive red, white at 0
SEQUENTIAL = "YlGnBu"

DEFAULT_SIZE = (7.0, 3.6)  # inches; fits a notebook cell and a report page


def figure_and_axes(ax: Optional[Axes], size: Tuple[float, float] = DEFAULT_SIZE
                    ) -> Tuple[Figure, Axes]:
    """The caller's Axes and its figure, or a new Figure with one Axes."""
    if ax is None:
        fig = Figure(figsize=size, layout="constrained")
        return fig, fig.add_subplot()
    if not isinstance(ax, Axes):
        raise TypeError(f"`ax` (a {type(ax).__name__}) must be a matplotlib Axes or None")
    return ax.get_figure(root=True), ax


def tidy(ax: Axes) -> None:
    """Our look: no top/right frame, a faint grid under the data."""
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.grid(True, color=GRID, linewidth=0.8)
    ax.set_axisbelow(True)


class _PlainLogFormatter(ticker.LogFormatter):
    """matplotlib's choice of which log ticks to label, written as 0.6 not 6e-01."""

    def _num_to_string(self, x, vmin, vmax):
        return f"{x:.3g}"


def log_scale(axis) -> None:
    """Log scale on one axis (``ax.yaxis``) with plain number labels ("0.6", not
    "6 x 10^-1"), labelling minor ticks too when the range is short."""
    axis.axes.set_yscale("log") if axis is axis.axes.yaxis else axis.axes.set_xscale("log")
    axis.set_major_formatter(_PlainLogFormatter())
    axis.set_minor_formatter(_PlainLogFormatter(labelOnlyBase=False, minor_thresholds=(2, 0.5)))


def integer_ticks(axis) -> None:
    """Whole-number ticks only (epochs, steps)."""
    axis.set_major_locator(ticker.MaxNLocator(integer=True))


def as_array(value, name: str, ndim: int, shape_text: str, *, min_len: int = 1,
             finite: bool = True) -> np.ndarray:
    """``value`` as a float64 array of ``ndim`` dimensions, or a ValueError that
    names ``name``, the shape given and the shape expected (``shape_text``)."""
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise TypeError(f"`{name}` must be an array of numbers {shape_text}; "
                        f"got a {type(value).__name__}") from None
    if arr.ndim != ndim:
        raise ValueError(f"`{name}` has shape {arr.shape}; expected {shape_text}")
    if min(arr.shape, default=0) < min_len:
        raise ValueError(f"`{name}` has shape {arr.shape}; expected {shape_text} "
                         f"with at least {min_len} along each axis")
    if finite and not np.isfinite(arr).all():
        bad = int((~np.isfinite(arr)).sum())
        raise ValueError(f"`{name}` has {bad} NaN/inf value(s); expected finite numbers "
                         f"{shape_text}")
    return arr


def as_frame(value, name: str, columns, what: str) -> pd.DataFrame:
    """Check that ``value`` is a non-empty DataFrame holding ``columns``."""
    if not isinstance(value, pd.DataFrame):
        raise TypeError(f"`{name}` must be a pandas DataFrame ({what}); "
                        f"got a {type(value).__name__}")
    missing = [c for c in columns if c not in value.columns]
    if missing:
        raise ValueError(f"`{name}` lacks column(s) {missing}; it has {list(value.columns)} "
                         f"and must hold {what}")
    if len(value) == 0:
        raise ValueError(f"`{name}` has no rows; expected {what}")
    return value


def positive_number(value, name: str) -> float:
    if (isinstance(value, bool) or not isinstance(value, numbers.Real)
            or not np.isfinite(value) or value <= 0):
        raise ValueError(f"`{name}` (={value!r}) must be a finite number > 0")
    return float(value)


def time_values(index, name: str) -> np.ndarray:
    """Values to put on a time axis: datetimes as datetime64 (matplotlib plots
    them natively), numbers as float; anything else by position."""
    index = pd.Index(index)
    if isinstance(index, pd.DatetimeIndex):
        if index.tz is not None:
            index = index.tz_convert(None)  # matplotlib would need a tz per axis
        return index.to_numpy(dtype="datetime64[ns]")
    if pd.api.types.is_numeric_dtype(index) and not pd.api.types.is_bool_dtype(index):
        return index.to_numpy(dtype=np.float64)
    return np.arange(len(index), dtype=np.float64)


def is_datetime(x: np.ndarray) -> bool:
    return np.issubdtype(x.dtype, np.datetime64)


def format_time_axis(ax: Axes, x: np.ndarray) -> None:
    """Short date labels on a datetime axis (the automatic ones overlap)."""
    if is_datetime(x):
        locator = mdates.AutoDateLocator()
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))


def time_labels(times, n: int, name: str):
    """``times`` checked to have ``n`` entries, as short strings for tick labels."""
    times = pd.Index(times) if not isinstance(times, pd.Index) else times
    if len(times) != n:
        raise ValueError(f"`{name}` has {len(times)} entries; expected one per step ({n})")
    if isinstance(times, pd.DatetimeIndex):
        return [t.strftime("%Y-%m-%d %H:%M") if (t.hour or t.minute) else t.strftime("%Y-%m-%d")
                for t in times]
    return [str(t) for t in times]


def higher_is_better(metric: str) -> bool:
    """Accuracy, balanced accuracy and R2 grow with quality; errors and losses shrink.

    Metric names may carry a split prefix ("val_accuracy")."""
    base = metric.split("_", 1)[1] if metric.split("_", 1)[0] in ("train", "val", "test") else metric
    return base in ("accuracy", "balanced_accuracy", "r2")
