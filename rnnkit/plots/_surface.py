"""Figures of the loss around the trained weights: a 2-D surface and a 1-D slice.

The directions (filter-normalised, Li et al. 2018) and the loss values are
computed in ``_diagnose.py``; these functions only draw them.
"""
from __future__ import annotations

from typing import Optional

import numpy as np
from matplotlib.colors import LogNorm
from matplotlib.figure import Figure

from . import _base as base


def _axis(values, name: str) -> np.ndarray:
    arr = base.as_array(values, name, 1, f"({name[0].upper()},): at least 2 increasing steps",
                        min_len=2)
    if not (np.diff(arr) > 0).all():
        raise ValueError(f"`{name}` must be strictly increasing (for example "
                         f"np.linspace(-1, 1, 21)); got {arr[:5]}...")
    return arr


def _finite_part(values: np.ndarray, name: str) -> np.ndarray:
    seen = values[np.isfinite(values)]
    if seen.size == 0:
        raise ValueError(f"`{name}` has no finite value; every loss evaluation failed")
    return seen


def _wide_positive(seen: np.ndarray, ratio: float) -> bool:
    """Whether values are all positive and span more than ``ratio``: a log scale reads better."""
    return bool((seen > 0).all() and seen.max() / seen.min() > ratio)


def loss_surface(alphas, betas, values, *, clip: Optional[float] = None, ax=None) -> Figure:
    """Filled contours of the loss on a plane through the trained weights.

    The plane is theta + alpha * d1 + beta * d2; the trained point (0, 0) is
    marked with a star. Values that are NaN or inf (the loss blew up) are
    left blank. When the finite values are positive and span more than a
    factor of 20, the levels are spaced evenly in log scale. With `clip`, the
    colour scale ends at that quantile of the finite values (higher ones share
    the top colour), so the basin around the trained weights gets the colours
    instead of the walls; the log scale is then used whenever the values are
    positive. The marker's legend sits outside the plot, under it.

    Args:
        alphas: (A,) increasing steps along the first direction.
        betas: (B,) increasing steps along the second direction.
        values: (B, A) loss at (alphas[j], betas[i]) in row i, column j.
        clip: None, or a quantile in (0, 1] of the finite values where the colour scale ends.
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on.
    """
    a = _axis(alphas, "alphas")
    b = _axis(betas, "betas")
    v = base.as_array(values, "values", 2, f"(len(betas), len(alphas)) = ({len(b)}, {len(a)})",
                      finite=False)
    if v.shape != (len(b), len(a)):
        hint = " (transpose it: rows follow betas)" if v.shape == (len(a), len(b)) else ""
        raise ValueError(f"`values` has shape {v.shape}; expected (len(betas), len(alphas)) = "
                         f"({len(b)}, {len(a)}){hint}")
    seen = _finite_part(v, "values")
    if clip is not None and not (isinstance(clip, (int, float)) and 0.0 < clip <= 1.0):
        raise ValueError(f"`clip` (={clip!r}) must be a quantile in (0, 1], e.g. 0.8, or None")
    lo, top = float(seen.min()), float(seen.max())
    hi = top if clip is None else float(np.quantile(seen, clip))
    if hi <= lo:
        hi = top
    norm = None
    if clip is not None and (seen > 0).all() and hi > lo:
        levels = np.geomspace(lo, hi, 16)
        norm = LogNorm(vmin=lo, vmax=hi)
    elif _wide_positive(seen, 20.0):
        levels = np.geomspace(lo, hi, 16)
        norm = LogNorm(vmin=lo, vmax=hi)
    elif hi > lo:
        levels = np.linspace(lo, hi, 16)
    else:  # a flat surface still gets one band
        levels = np.array([lo - 0.5 * (abs(lo) or 1.0), hi + 0.5 * (abs(hi) or 1.0)])
    masked = np.ma.masked_invalid(v)  # (B, A)

    fig, ax = base.figure_and_axes(ax, (5.6, 4.6))
    extend = "max" if hi < top else "neither"  # values past the clip take the top colour
    filled = ax.contourf(a, b, masked, levels=levels, cmap=base.SEQUENTIAL + "_r", norm=norm,
                         extend=extend)
    if len(levels) > 2:
        ax.contour(a, b, masked, levels=levels, colors="white", linewidths=0.5, alpha=0.7)
    bar = fig.colorbar(filled, ax=ax, label="loss", fraction=0.05, pad=0.02)
    if norm is not None:  # label a few levels in plain numbers, not powers of ten
        bar.set_ticks(levels[::3], labels=[f"{v:.3g}" for v in levels[::3]])
        bar.ax.minorticks_off()
    ax.plot([0.0], [0.0], linestyle="none", marker="*", markersize=15, color=base.ACCENT,
            markeredgecolor="white", label="trained weights")
    ax.legend(frameon=False, fontsize="small", loc="upper left", bbox_to_anchor=(0.0, -0.16))
    ax.set_xlabel("alpha (direction 1)")
    ax.set_ylabel("beta (direction 2)")
    ax.set_title(f"loss surface (min {lo:.3g}, max {top:.3g})", loc="left")
    return fig


def loss_slice(alphas, values, *, label: str = "V", ax=None) -> Figure:
    """The loss along one direction through the trained weights (alpha = 0).

    Args:
        alphas: (A,) increasing steps along the direction.
        values: (A,) loss at each step (NaN/inf where it blew up: left as a gap).
        label: what the direction moves, for the axis label (e.g. "V" or "all weights").
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on; its first line has xdata alphas and ydata values.
    """
    a = _axis(alphas, "alphas")
    v = base.as_array(values, "values", 1, f"(A,) = ({len(a)},), one loss per alpha", finite=False)
    if len(v) != len(a):
        raise ValueError(f"`values` has {len(v)} entries; expected one per alpha ({len(a)})")
    if not isinstance(label, str) or not label:
        raise TypeError(f"`label` (={label!r}) must be a non-empty string such as 'V'")
    seen = _finite_part(v, "values")
    shown = np.where(np.isfinite(v), v, np.nan)

    fig, ax = base.figure_and_axes(ax)
    ax.plot(a, shown, color=base.INK, linewidth=1.6, marker="o" if len(a) <= 40 else None,
            markersize=3, label="loss")
    if _wide_positive(seen, 100.0):
        base.log_scale(ax.yaxis)
    ax.axvline(0.0, color=base.MUTED, linestyle=":", linewidth=1.0)
    ok = np.isfinite(v)
    if a[ok].min() <= 0.0 <= a[ok].max():
        at_zero = float(np.interp(0.0, a[ok], v[ok]))
        ax.plot([0.0], [at_zero], linestyle="none", marker="*", markersize=13, color=base.ACCENT,
                label=f"trained weights ({at_zero:.3g})", zorder=3)
    base.tidy(ax)
    ax.legend(frameon=False, fontsize="small")
    ax.set_xlabel(f"step along the {label} direction (alpha)")
    ax.set_ylabel("loss")
    ax.set_title(f"loss along {label}", loc="left")
    return fig
