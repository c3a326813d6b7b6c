"""Figures that compare runs or models: the sweep heatmap and the metrics bars."""
from __future__ import annotations

import numbers
from typing import Optional

import numpy as np
import pandas as pd
from matplotlib import colormaps
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle

from . import _base as base


def _label(v) -> object:
    """A hashable cell label: numpy scalars as Python values, NaN/None as None."""
    if v is None or (isinstance(v, float) and np.isnan(v)):
        return None
    return v.item() if isinstance(v, np.generic) else v


def _order(v):
    """Numbers by value, then text, then the missing value."""
    if v is None:
        return (2, 0.0, "")
    if isinstance(v, numbers.Real) and not isinstance(v, bool):
        return (0, float(v), "")
    return (1, 0.0, str(v))


def _readable_on(rgba) -> str:
    """Black or white text, whichever stands out on this cell colour."""
    r, g, b = rgba[:3]
    return "black" if 0.299 * r + 0.587 * g + 0.114 * b > 0.5 else "white"


def sweep_surface(table: pd.DataFrame, x: str, y: str, *, metric: str = "val_rmse",
                  higher_is_better: Optional[bool] = None, ax=None) -> Figure:
    """Mean of a metric over a grid of two sweep settings, as an annotated heatmap.

    Every cell is the mean over all runs with that (y, x) pair, i.e. over
    seeds and every other setting, of the runs that did not diverge
    (``status`` starting with "diverged", or a non-finite metric). A cell
    whose runs all diverged is hatched; a pair never run stays blank. The
    best cell is outlined. Lower is better, except for metrics named
    accuracy, balanced_accuracy or r2 (with or without a split prefix).

    Args:
        table: DataFrame, one row per run, with columns ``x``, ``y``,
            ``metric`` and optionally ``seed`` and ``status``.
        x: column of the setting on the horizontal axis (e.g. "window").
        y: column of the setting on the vertical axis (e.g. "hidden").
        metric: numeric column to average (e.g. "val_rmse").
        higher_is_better: override the direction of "best".
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on; its image array is (len(y values), len(x values)),
        values in ascending order from the lower-left corner, masked where no
        run finished.
    """
    for name, value in (("x", x), ("y", y), ("metric", metric)):
        if not isinstance(value, str):
            raise TypeError(f"`{name}` (={value!r}) must be a column name")
    if x == y:
        raise ValueError(f"`x` and `y` are both {x!r}; choose two different settings")
    frame = base.as_frame(table, "table", (x, y, metric), f"one row per run with columns {x}, {y}, {metric}")
    if not pd.api.types.is_numeric_dtype(frame[metric]) or pd.api.types.is_bool_dtype(frame[metric]):
        raise ValueError(f"`table` column {metric!r} must hold numbers; it is {frame[metric].dtype}")
    if higher_is_better is None:
        higher_is_better = base.higher_is_better(metric)

    values = frame[metric].to_numpy(dtype=np.float64)  # (R,)
    failed = ~np.isfinite(values)
    if "status" in frame.columns:
        failed |= frame["status"].astype(str).str.startswith("diverged").to_numpy()
    xl = [_label(v) for v in frame[x]]
    yl = [_label(v) for v in frame[y]]
    xs = sorted(set(xl), key=_order)
    ys = sorted(set(yl), key=_order)
    col = np.array([xs.index(v) for v in xl])  # (R,)
    row = np.array([ys.index(v) for v in yl])  # (R,)
    total = np.zeros((len(ys), len(xs)))
    count = np.zeros((len(ys), len(xs)))
    runs = np.zeros((len(ys), len(xs)))
    np.add.at(runs, (row, col), 1.0)
    np.add.at(total, (row[~failed], col[~failed]), values[~failed])
    np.add.at(count, (row[~failed], col[~failed]), 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        grid = np.where(count > 0, total / np.maximum(count, 1.0), np.nan)  # (Y, X)
    shown = np.ma.masked_invalid(grid)

    fig, ax = base.figure_and_axes(ax, (1.2 + 1.0 * max(4, len(xs)), 1.2 + 0.6 * max(4, len(ys))))
    cmap = colormaps[base.SEQUENTIAL if higher_is_better else base.SEQUENTIAL + "_r"]
    finite = grid[np.isfinite(grid)]
    lo, hi = (finite.min(), finite.max()) if finite.size else (0.0, 1.0)
    image = ax.imshow(shown, cmap=cmap, origin="lower", aspect="auto",
                      vmin=lo, vmax=hi if hi > lo else lo + 1e-12)
    fig.colorbar(image, ax=ax, label=metric, fraction=0.05, pad=0.02)
    for i in range(len(ys)):
        for j in range(len(xs)):
            if np.isfinite(grid[i, j]):
                colour = _readable_on(cmap(image.norm(grid[i, j])))
                ax.text(j, i, f"{grid[i, j]:.3g}", ha="center", va="center", fontsize="small",
                        color=colour)
            elif runs[i, j] > 0:
                ax.add_patch(Rectangle((j - 0.5, i - 0.5), 1.0, 1.0, fill=False, hatch="///",
                                       edgecolor=base.ALERT, linewidth=0.0))
                ax.text(j, i, "diverged", ha="center", va="center", fontsize="x-small",
                        color=base.ALERT)
    if finite.size:
        best = np.nanargmax(grid) if higher_is_better else np.nanargmin(grid)
        bi, bj = np.unravel_index(best, grid.shape)
        ax.add_patch(Rectangle((bj - 0.5, bi - 0.5), 1.0, 1.0, fill=False,
                               edgecolor=base.ACCENT, linewidth=3.0, label="best"))
    ax.set_xticks(range(len(xs)), ["none" if v is None else str(v) for v in xs])
    ax.set_yticks(range(len(ys)), ["none" if v is None else str(v) for v in ys])
    ax.set_xlabel(x)
    ax.set_ylabel(y)
    direction = "higher" if higher_is_better else "lower"
    ax.set_title(f"{metric}: mean over {len(frame)} runs ({direction} is better)", loc="left")
    return fig


def metrics_bar(metrics: pd.DataFrame, *, column: str, highlight: str = "rnn", ax=None) -> Figure:
    """One horizontal bar per model for one metric column, the network's bar highlighted.

    Args:
        metrics: DataFrame indexed by model name (e.g. "rnn", "persistence",
            "seasonal_naive", "linear_ar"), one column per "<split>_<metric>".
        column: the column to draw, e.g. "test_rmse".
        highlight: the model name to colour as ours.
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on; bars in row order from the top, one per model
        with a finite value (the others are marked "n/a").
    """
    if not isinstance(column, str):
        raise TypeError(f"`column` (={column!r}) must be a column name such as 'test_rmse'")
    frame = base.as_frame(metrics, "metrics", (column,), f"one row per model with a {column!r} column")
    try:
        values = frame[column].to_numpy(dtype=np.float64)  # (M,)
    except (TypeError, ValueError):
        raise ValueError(f"`metrics` column {column!r} must hold numbers") from None
    names = [str(i) for i in frame.index]
    ok = np.isfinite(values)
    better_high = base.higher_is_better(column)

    fig, ax = base.figure_and_axes(ax, (6.0, 0.9 + 0.45 * len(names)))
    pos = np.arange(len(names), dtype=np.float64)
    colours = [base.ACCENT if n == highlight else base.MUTED for n in names]
    ax.barh(pos[ok], values[ok], color=[c for c, k in zip(colours, ok) if k], height=0.65)
    best = (np.nanargmax if better_high else np.nanargmin)(values) if ok.any() else -1
    for i, (n, v) in enumerate(zip(names, values)):
        text = "n/a" if not ok[i] else f"{v:.4g}" + ("  best" if i == best else "")
        ax.annotate(text, (v if ok[i] else 0.0, pos[i]), xytext=(4, 0), textcoords="offset points",
                    va="center", fontsize="small", fontweight="bold" if i == best else "normal")
    ax.set_yticks(pos, names)
    ax.invert_yaxis()  # first model on top
    ax.margins(x=0.18)
    base.tidy(ax)
    ax.grid(False, axis="y")
    ax.set_xlabel(column)
    ax.set_title(f"{column} by model ({'higher' if better_high else 'lower'} is better)", loc="left")
    return fig
