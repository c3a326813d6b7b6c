"""Figures of a training run and of its results: loss curves, forecasts,
class probabilities, and the model-against-baselines bar chart."""
from __future__ import annotations

import re
from typing import Optional

import numpy as np
import pandas as pd
from matplotlib import dates as mdates
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from . import _base as base


def training_curves(history: pd.DataFrame, *, status: Optional[str] = None, ax=None) -> Figure:
    """Training and validation loss per epoch, with the best epoch and any divergence.

    The loss axis is logarithmic when every finite loss is positive. Non-finite
    losses (a run that blew up) leave a gap. When ``history`` has a
    ``grad_norm`` column it is drawn, dotted, against a second axis on the right.

    Args:
        history: DataFrame (E rows) with columns ``epoch``, ``train_loss``,
            ``val_loss`` and optionally ``grad_norm``.
        status: the run's status, e.g. "ok", "stopped early at epoch 12",
            "diverged at epoch 7"; a divergence is marked by a vertical line.
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on.
    """
    hist = base.as_frame(history, "history", ("epoch", "train_loss", "val_loss"),
                         "one row per epoch with columns epoch, train_loss, val_loss")
    if status is not None and not isinstance(status, str):
        raise TypeError(f"`status` (={status!r}) must be a string such as 'diverged at epoch 7' or None")
    cols = {}
    for col in ("epoch", "train_loss", "val_loss", "grad_norm"):
        if col in hist.columns:
            try:
                cols[col] = hist[col].to_numpy(dtype=np.float64)
            except (TypeError, ValueError):
                raise ValueError(f"`history` column {col!r} must hold numbers") from None
    epoch = cols["epoch"]  # (E,)
    train, val = (np.where(np.isfinite(cols[c]), cols[c], np.nan) for c in ("train_loss", "val_loss"))

    fig, ax = base.figure_and_axes(ax)
    marker = "o" if len(epoch) <= 40 else None
    ax.plot(epoch, train, color=base.INK, marker=marker, markersize=3, label="training loss")
    ax.plot(epoch, val, color=base.ACCENT, marker=marker, markersize=3, label="validation loss")
    finite = np.concatenate([train[np.isfinite(train)], val[np.isfinite(val)]])
    if finite.size and (finite > 0).all():
        base.log_scale(ax.yaxis)
    if np.isfinite(val).any():
        best = int(np.nanargmin(val))
        ax.plot([epoch[best]], [val[best]], linestyle="none", marker="*", markersize=13,
                color=base.GOOD, label=f"best epoch {epoch[best]:g}", zorder=3)
    diverged = re.search(r"diverged at epoch\s+(\d+)", status or "")
    if diverged:
        at = int(diverged.group(1))
        ax.axvline(at, color=base.ALERT, linestyle="--", linewidth=1.5, label=f"diverged at epoch {at}")

    handles, labels = ax.get_legend_handles_labels()
    if "grad_norm" in cols and np.isfinite(cols["grad_norm"]).any():
        norm = np.where(np.isfinite(cols["grad_norm"]), cols["grad_norm"], np.nan)
        right = ax.twinx()
        right.plot(epoch, norm, color=base.MUTED, linestyle=":", linewidth=1.2, label="gradient norm")
        if (norm[np.isfinite(norm)] > 0).all():
            base.log_scale(right.yaxis)
        right.set_ylabel("gradient norm", color=base.MUTED)
        right.spines["top"].set_visible(False)
        h2, l2 = right.get_legend_handles_labels()
        handles, labels = handles + h2, labels + l2
    base.tidy(ax)
    ax.legend(handles, labels, frameon=False, fontsize="small")
    base.integer_ticks(ax.xaxis)
    ax.set_xlabel("epoch")
    ax.set_ylabel("loss")
    ax.set_title("training" + (f": {status}" if status else ""), loc="left")
    return fig


def _regression_columns(pred: pd.DataFrame):
    """(actual column, predicted column, target names) of a prediction frame:
    "actual"/"predicted" for one target, "<name>_actual"/"<name>_predicted" for
    several (as ``FitResult.predict`` writes them)."""
    cols = list(pred.columns)
    if "actual" in cols and "predicted" in cols:
        return "actual", "predicted", []
    names = [str(c)[: -len("_actual")] for c in cols
             if str(c).endswith("_actual") and str(c)[: -len("_actual")] + "_predicted" in cols]
    if names:
        return names[0] + "_actual", names[0] + "_predicted", names
    raise ValueError(f"`pred` has columns {cols}; expected 'actual' and 'predicted' (one target), "
                     "or '<name>_actual' and '<name>_predicted' per target")


def _runs(mask: np.ndarray):
    """(first, last) row of every run of consecutive True in mask."""
    edges = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    return zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1)


def _shade_splits(ax, x, split) -> None:
    """Light bands behind the validation and test rows (one per run of rows,
    as sequences may be spread over the parts), the first of each labelled."""
    split = np.asarray(split, dtype=object)
    for part, alpha in (("val", 0.08), ("test", 0.16)):
        for n, (first, last) in enumerate(_runs(split == part)):
            ax.axvspan(x[first], x[last], color=base.MUTED, alpha=alpha, linewidth=0)
            if n == 0:
                ax.annotate(part, (x[first], 1.0), xycoords=("data", "axes fraction"),
                            xytext=(3, -10), textcoords="offset points", fontsize="small",
                            color=base.MUTED)


def forecast(pred: pd.DataFrame, *, baseline=None, baseline_name: Optional[str] = None,
             ax=None) -> Figure:
    """Actual against predicted values over time, optionally with a baseline.

    Args:
        pred: DataFrame (N rows) indexed by time with numeric columns ``actual``
            and ``predicted``, or for several targets ``<name>_actual`` /
            ``<name>_predicted`` pairs: the first target is drawn and the title
            says so. An optional ``split`` column ("train"/"val"/"test")
            shades the held-out rows. Rows without a prediction may be NaN.
            This is the frame ``FitResult.predict()`` returns.
        baseline: optional Series on the same index (or an array of N values),
            e.g. the persistence forecast.
        baseline_name: legend label of the baseline (default: its name or "baseline").
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on.
    """
    if not isinstance(pred, pd.DataFrame):
        raise TypeError(f"`pred` must be a pandas DataFrame with columns 'actual' and 'predicted'; "
                        f"got a {type(pred).__name__}")
    if any(str(c).startswith("p_") for c in pred.columns):
        raise ValueError("`pred` holds class probabilities (p_<class> columns); "
                         "draw it with plots.class_forecast")
    actual_col, pred_col, names = _regression_columns(pred)
    if len(pred) == 0:
        raise ValueError("`pred` has no rows; expected one row per time step")
    try:
        actual = pred[actual_col].to_numpy(dtype=np.float64)  # (N,)
        predicted = pred[pred_col].to_numpy(dtype=np.float64)  # (N,)
    except (TypeError, ValueError):
        raise ValueError("`pred` 'actual'/'predicted' must be numbers; for class labels "
                         "use plots.class_forecast") from None
    if baseline is not None:
        if isinstance(baseline, pd.Series):
            if not baseline.index.isin(pred.index).any():
                raise ValueError("`baseline` shares no index label with `pred`; give it on the "
                                 "same time index")
            label = baseline_name or (str(baseline.name) if baseline.name is not None else "baseline")
            base_values = baseline.reindex(pred.index).to_numpy(dtype=np.float64)
        else:
            base_values = base.as_array(baseline, "baseline", 1, f"(N,) = ({len(pred)},)",
                                        finite=False)
            if len(base_values) != len(pred):
                raise ValueError(f"`baseline` has {len(base_values)} values; expected one per row "
                                 f"of `pred` ({len(pred)}), or a Series on its index")
            label = baseline_name or "baseline"

    x = base.time_values(pred.index, "pred.index")
    fig, ax = base.figure_and_axes(ax)
    if "split" in pred.columns:
        _shade_splits(ax, x, pred["split"].to_numpy())
    thin = 0.9 if len(x) > 2000 else 1.4
    ax.plot(x, actual, color=base.INK, linewidth=thin, label="actual")
    ax.plot(x, predicted, color=base.ACCENT, linewidth=thin, label="predicted")
    if baseline is not None:
        ax.plot(x, base_values, color=base.MUTED, linewidth=thin, linestyle="--", label=label)
    base.format_time_axis(ax, x)
    base.tidy(ax)
    ax.legend(frameon=False, fontsize="small", ncols=3)
    target = names[0] if names else None
    ax.set_ylabel(target or "value")
    title = "forecast" + (f" of {target}" if target else "")
    if len(names) > 1:
        title += f" (first of {len(names)} targets)"
    ax.set_title(title, loc="left")
    return fig


def _strip_edges(x: np.ndarray) -> np.ndarray:
    """Cell edges (N+1,) around points x (N,): midpoints, ends half a step out."""
    if len(x) == 1:
        return np.array([x[0] - 0.5, x[0] + 0.5])
    mid = (x[1:] + x[:-1]) / 2.0
    return np.concatenate([[x[0] - (mid[0] - x[0])], mid, [x[-1] + (x[-1] - mid[-1])]])


def class_forecast(pred: pd.DataFrame, *, ax=None) -> Figure:
    """Predicted class probabilities, stacked, with strips of the actual and predicted class.

    Args:
        pred: DataFrame (N rows) indexed by time (or step) with columns
            ``actual`` and ``predicted`` (class labels) and one ``p_<class>``
            column of probabilities per class (K >= 2, values in [0, 1];
            NaN where there is no prediction).
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on. The stack has one area per class in column
        order; the two strips above it are coloured by class code (the
        position of ``p_<class>``), blank where the label is missing or unknown.
    """
    frame = base.as_frame(pred, "pred", ("actual", "predicted"),
                          "columns actual, predicted and one p_<class> per class")
    prob_cols = [c for c in frame.columns if str(c).startswith("p_")]
    if len(prob_cols) < 2:
        raise ValueError(f"`pred` has {len(prob_cols)} p_<class> column(s) {prob_cols}; expected one "
                         "probability column per class, at least 2")
    try:
        probs = frame[prob_cols].to_numpy(dtype=np.float64)  # (N, K)
    except (TypeError, ValueError):
        raise ValueError(f"`pred` probability columns {prob_cols} must hold numbers") from None
    seen = probs[np.isfinite(probs)]
    if seen.size and (seen.min() < -1e-9 or seen.max() > 1 + 1e-9):
        raise ValueError(f"`pred` probabilities range over [{seen.min():.3g}, {seen.max():.3g}]; "
                         "expected values in [0, 1] (apply softmax to the outputs first)")
    classes = [str(c)[2:] for c in prob_cols]
    colours = [base.CLASS_COLOURS[k % len(base.CLASS_COLOURS)] for k in range(len(classes))]

    # Work in plain numbers (dates as matplotlib day numbers) so the strips'
    # cell edges can be computed; the date formatter restores the labels.
    x = base.time_values(frame.index, "pred.index")
    dated = base.is_datetime(x)
    xnum = mdates.date2num(x) if dated else x
    fig, ax = base.figure_and_axes(ax)
    # Steps, not ramps: each probability fills its own target's cell (a time or a sequence),
    # the same cells as the strips above.
    edges = _strip_edges(xnum)  # (N + 1,)
    cells = np.vstack([probs, probs[-1:]])  # (N + 1, K): the last value closes the last cell
    ax.stackplot(edges, cells.T, colors=colours, labels=classes, alpha=0.85, linewidth=0,
                 step="post")
    code_of = {c: k for k, c in enumerate(classes)}
    cmap = ListedColormap(colours)
    strips = {"actual": (1.04, 1.12), "predicted": (1.14, 1.22)}
    for col, (lo, hi) in strips.items():
        labels = frame[col].to_numpy(dtype=object)
        codes = np.array([code_of.get(str(v), -1) if not pd.isna(v) else -1 for v in labels])
        image = np.ma.masked_less(codes.astype(np.float64), 0)[None, :]  # (1, N)
        ax.pcolormesh(edges, [lo, hi], image, cmap=cmap, vmin=-0.5, vmax=len(classes) - 0.5)
    if dated:
        locator = mdates.AutoDateLocator()
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_xlim(edges[0], edges[-1])
    ax.set_ylim(0.0, 1.23)
    ax.set_yticks([0.0, 0.5, 1.0, 1.08, 1.18], ["0", "0.5", "1", "actual", "predicted"])
    ax.set_ylabel("probability")
    ax.legend(handles=[Patch(color=c, label=k) for c, k in zip(colours, classes)],
              frameon=False, fontsize="small", loc="upper left", bbox_to_anchor=(1.0, 1.0))
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.set_title("class probabilities", loc="left")
    return fig
