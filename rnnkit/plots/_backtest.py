"""The backtest figure: one group of bars per fold, one bar per model."""
from __future__ import annotations

from typing import Mapping, Optional

import numpy as np
import pandas as pd
from matplotlib import colormaps
from matplotlib.figure import Figure

from . import _base as base


def backtest_folds(per_fold: pd.DataFrame, *, column: str, highlight: str = "rnn",
                   verdicts: Optional[Mapping[str, str]] = None, ax=None) -> Figure:
    """The score of every model in every fold, as grouped bars, with the models' mean as lines.

    Args:
        per_fold: DataFrame, one row per fold (index: fold number), one numeric column
            per model (e.g. "rnn", "persistence", "seasonal_naive").
        column: the score's name, for the axis and title (e.g. "test_rmse").
        highlight: the model drawn in the accent colour.
        verdicts: optional baseline -> sentence, listed under the title.
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on; one bar per (fold, model) with a finite score, bars of one
        model sharing a colour; non-finite scores are marked "n/a".
    """
    if not isinstance(column, str):
        raise TypeError(f"`column` (={column!r}) must be the score's name, e.g. 'test_rmse'")
    if not isinstance(per_fold, pd.DataFrame) or per_fold.shape[0] < 1 or per_fold.shape[1] < 1:
        raise ValueError("`per_fold` must be a DataFrame with one row per fold and one column per model "
                         f"(got {type(per_fold).__name__} of shape {getattr(per_fold, 'shape', None)})")
    try:
        values = per_fold.to_numpy(dtype=np.float64)  # (F, M)
    except (TypeError, ValueError):
        raise ValueError("`per_fold` must hold numbers (one score per fold and model)") from None
    models = [str(m) for m in per_fold.columns]
    folds = [str(f) for f in per_fold.index]
    n_f, n_m = values.shape
    lines = list((verdicts or {}).values())
    fig, ax = base.figure_and_axes(ax, (max(6.0, 1.1 * n_f * max(n_m, 2) * 0.45 + 2.0),
                                        3.6 + 0.25 * len(lines)))
    width = 0.8 / n_m
    palette = colormaps["tab10"]
    others = [palette(i) for i in (0, 2, 4, 9, 6, 8, 5, 7)]  # no orange: that is the network's
    k = 0
    for j, m in enumerate(models):
        if m == highlight:
            colour = base.ACCENT
        else:
            colour = others[k % len(others)]
            k += 1
        x = np.arange(n_f) + (j - (n_m - 1) / 2) * width
        ok = np.isfinite(values[:, j])
        ax.bar(x[ok], values[ok, j], width=width * 0.92, color=colour, label=m)
        for xi in x[~ok]:
            ax.annotate("n/a", (xi, 0.0), ha="center", va="bottom", fontsize="x-small")
        if ok.any():
            ax.axhline(float(np.mean(values[ok, j])), color=colour, linewidth=1.0, linestyle="--")
    ax.set_xticks(np.arange(n_f), folds)
    ax.set_xlabel("fold")
    ax.set_ylabel(column)
    base.tidy(ax)
    ax.grid(False, axis="x")
    ax.legend(fontsize="small", ncols=min(n_m, 4), loc="upper left", bbox_to_anchor=(0.0, -0.15))
    better = "higher" if base.higher_is_better(column) else "lower"
    title = f"{column} per fold ({better} is better; dashed: mean over folds)"
    if lines:
        title += "\n" + "\n".join(lines)
    ax.set_title(title, loc="left", fontsize="small")
    return fig
