"""Figures of the network's inside: gradients through time, the recurrent
matrix's singular values, and the hidden state over time."""
from __future__ import annotations

from typing import Optional

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure

from . import _base as base


def gradient_flow(norms, *, sigma_max: Optional[float] = None, ax=None) -> Figure:
    """Mean gradient norm ||dL/dh_k|| at every step k, on a log axis.

    With ``sigma_max`` the bound ||dL/dh_T|| * sigma_max**(T-k) is drawn dashed:
    the gradient reaching step k from the last step shrinks (or may grow) at
    most geometrically with the number of steps back (Pascanu, Mikolov &
    Bengio 2013, section 2.1). For the strict bound pass the largest
    singular value of V times the bound on |phi'| (1 for tanh, relu and
    linear, 1/4 for sigmoid). With a loss at every step (many-to-many) the
    gradient at k also gets its own loss term, so the measured line may lie
    above the bound there.

    Args:
        norms: (T,) non-negative numbers, k = 1..T; the last entry is the last step.
            NaN (a step no window reaches) and 0 are left out of the log plot.
        sigma_max: optional positive number, the factor per step of the bound.
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on.
    """
    norms = base.as_array(norms, "norms", 1, "(T,): one mean gradient norm per step", finite=False)
    if np.isinf(norms).any() or (norms < 0).any():
        raise ValueError(f"`norms` has negative or infinite values (min {np.nanmin(norms):.3g}, "
                         f"max {np.nanmax(norms):.3g}); norms are finite and >= 0 (NaN: step not reached)")
    if sigma_max is not None:
        sigma_max = base.positive_number(sigma_max, "sigma_max")
    T = len(norms)
    k = np.arange(1, T + 1, dtype=np.float64)  # (T,)
    shown = np.where(norms > 0, norms, np.nan)  # a zero cannot sit on a log axis

    fig, ax = base.figure_and_axes(ax)
    ax.plot(k, shown, color=base.INK, marker="o" if T <= 60 else None, markersize=3,
            label="mean ||dL/dh_k||")
    if sigma_max is not None and norms[-1] > 0:  # NaN compares False: no anchor, no bound
        # In logs, so that a long sequence does not overflow the float range.
        log_bound = np.log(norms[-1]) + (T - k) * np.log(sigma_max)  # (T,)
        with np.errstate(over="ignore"):
            bound = np.exp(np.clip(log_bound, -700.0, 700.0))
        ax.plot(k, bound, color=base.ALERT, linestyle="--", linewidth=1.3,
                label=f"bound ||dL/dh_T|| * {sigma_max:.3g}^(T-k)")
        # Keep the measured line readable when the bound runs off far away.
        seen = norms[norms > 0]
        ax.set_ylim(max(min(seen.min(), bound.min()), seen.min() * 1e-6) / 2.0,
                    min(max(seen.max(), bound.max()), seen.max() * 1e6) * 2.0)
    if (norms > 0).any():  # else nothing could sit on a log axis
        base.log_scale(ax.yaxis)
    base.integer_ticks(ax.xaxis)
    base.tidy(ax)
    ax.set_xlabel(f"step k (T = {T} is the last)")
    ax.set_ylabel("gradient norm")
    ax.legend(frameon=False, fontsize="small")
    ax.set_title("gradient through time", loc="left")
    return fig


def spectrum(singular_values, *, ax=None) -> Figure:
    """Singular values of the recurrent matrix V, as bars, with the line at 1.

    Values above 1 can let the state and gradients grow from step to step;
    far below 1 they fade (Pascanu, Mikolov & Bengio 2013).

    Args:
        singular_values: (H,) non-negative numbers (any order; drawn as given).
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on; bar i has height singular_values[i].
    """
    s = base.as_array(singular_values, "singular_values", 1, "(H,): the singular values of V")
    if (s < 0).any():
        raise ValueError(f"`singular_values` has negative values (min {s.min():.3g}); "
                         "singular values are >= 0")
    fig, ax = base.figure_and_axes(ax)
    colours = [base.ALERT if v > 1.0 else base.INK for v in s]
    ax.bar(np.arange(1, len(s) + 1), s, color=colours, width=0.8)
    ax.axhline(1.0, color=base.MUTED, linestyle="--", linewidth=1.2)
    ax.annotate("1", (1.0, 1.0), xycoords=("axes fraction", "data"), xytext=(3, 0),
                textcoords="offset points", va="center", color=base.MUTED)
    base.tidy(ax)
    ax.set_xlabel("index i")
    ax.set_ylabel("singular value")
    ax.set_title(f"singular values of V (largest {s.max():.3g}, {int((s > 1).sum())} above 1)",
                 loc="left")
    return fig


def hidden_heatmap(states, *, times=None, ax=None) -> Figure:
    """Hidden state over time as an image: one row per unit, one column per step.

    The colour scale is symmetric around 0 (blue negative, white 0, red positive).

    Args:
        states: (T, H) hidden states of one sequence.
        times: optional T labels of the steps (timestamps or numbers) for the axis.
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on; its image array is states.T, (H, T).
    """
    states = base.as_array(states, "states", 2, "(T, H): one row per step, one column per unit")
    T, H = states.shape
    fig, ax = base.figure_and_axes(ax)
    span = float(np.abs(states).max()) or 1.0
    image = ax.imshow(states.T, aspect="auto", cmap=base.DIVERGING, vmin=-span, vmax=span,
                      interpolation="nearest", origin="upper")  # (H, T)
    fig.colorbar(image, ax=ax, label="h", fraction=0.05, pad=0.02)
    ax.set_ylabel("unit")
    if times is not None:
        labels = base.time_labels(times, T, "times")
        ticks = np.unique(np.linspace(0, T - 1, min(T, 6)).round().astype(int))
        ax.set_xticks(ticks, [labels[i] for i in ticks], rotation=20, ha="right", fontsize="small")
    else:
        ax.set_xlabel("step")
    ax.set_title(f"hidden state ({H} units x {T} steps)", loc="left")
    return fig


def principal_path(states: np.ndarray):
    """Centred states projected on their first two principal axes.

    Returns (coords (N, min(2, H)), explained variance ratio (min(2, H),)).
    Signs are fixed so that each axis' largest loading is positive.
    """
    centred = states - states.mean(axis=0)  # (N, H)
    _, s, vt = np.linalg.svd(centred, full_matrices=False)
    m = min(2, states.shape[1])
    vt = vt[:m]  # (m, H)
    signs = np.sign(vt[np.arange(m), np.abs(vt).argmax(axis=1)])
    vt = vt * np.where(signs == 0, 1.0, signs)[:, None]
    total = float((s ** 2).sum())
    ratio = (s[:m] ** 2) / total if total > 0 else np.zeros(m)
    return centred @ vt.T, ratio


def hidden_path(states, *, times=None, ax=None) -> Figure:
    """The hidden state's path through its first two principal components.

    Principal components come from the SVD of the centred states; the axis
    labels give each component's share of the variance. The path is coloured
    from early (light) to late (dark). With one hidden unit the path is the
    unit's value against the step.

    Args:
        states: (N, H) hidden states, N >= 2 steps in time order.
        times: optional N labels of the steps, shown at the start and end points.
        ax: draw into this Axes instead of a new Figure.

    Returns:
        The Figure drawn on; its scatter's offsets are the (N, 2) path.
    """
    states = base.as_array(states, "states", 2, "(N, H): one row per step, one column per unit")
    N, H = states.shape
    if N < 2:
        raise ValueError(f"`states` has shape {states.shape}; a path needs at least 2 steps (N >= 2)")
    labels = base.time_labels(times, N, "times") if times is not None else None
    step = np.arange(N, dtype=np.float64)
    fig, ax = base.figure_and_axes(ax)
    if H == 1:
        xy = np.column_stack([step, states[:, 0]])  # (N, 2)
        ax.set_xlabel("step")
        ax.set_ylabel("h (the only unit)")
    else:
        xy, ratio = principal_path(states)
        ax.set_xlabel(f"PC 1 ({ratio[0]:.1%} of variance)")
        ax.set_ylabel(f"PC 2 ({ratio[1]:.1%} of variance)")
    segments = np.stack([xy[:-1], xy[1:]], axis=1)  # (N-1, 2, 2)
    crowded = N > 300  # thinner marks, or a long path is a solid blot
    lines = LineCollection(segments, cmap="Greys", linewidths=0.5 if crowded else 1.2,
                           alpha=0.35 if crowded else 0.7)
    lines.set_array(step[1:])
    lines.set_clim(-0.3 * N, N)  # keep the earliest segments visible, not white
    ax.add_collection(lines)
    dots = ax.scatter(xy[:, 0], xy[:, 1], c=step, cmap="viridis", s=5 if crowded else 14, zorder=3)
    fig.colorbar(dots, ax=ax, label="step", fraction=0.05, pad=0.02)
    for i, name in ((0, "start"), (N - 1, "end")):
        text = name + (f" {labels[i]}" if labels else "")
        ax.annotate(text, xy[i], xytext=(5, 5), textcoords="offset points", fontsize="small")
    ax.autoscale_view()
    base.tidy(ax)
    ax.set_title(f"hidden-state path ({N} steps, {H} unit{'s' if H > 1 else ''})", loc="left")
    return fig


def gate_activity(names, near_zero, near_one, *, forget_along=None, ax=None) -> Figure:
    """How often each logistic gate of a GRU or LSTM sits shut (< 0.05) or open (> 0.95).

    A gate that is nearly always shut or open acts as a constant switch; one
    that rarely is keeps mixing. With ``forget_along`` (an LSTM's mean forget
    gate at every step of the window) a second panel shows it: near 1 the cell
    keeps what it holds, near 0 it forgets at each step.

    Args:
        names: the gate names (G,), e.g. ("input", "forget", "output").
        near_zero, near_one: (G,) shares in [0, 1].
        forget_along: optional (T,) mean forget-gate values in [0, 1].
        ax: draw the bars into this Axes (the forget panel is then left out).

    Returns:
        The Figure drawn on.
    """
    names = [str(n) for n in names]
    if not names:
        raise ValueError("`names` is empty: an Elman cell has no gates to show")
    shut = base.as_array(near_zero, "near_zero", 1, "(G,): one share per gate")
    open_ = base.as_array(near_one, "near_one", 1, "(G,): one share per gate")
    if len(shut) != len(names) or len(open_) != len(names):
        raise ValueError(f"`near_zero` ({len(shut)}) and `near_one` ({len(open_)}) need one share "
                         f"per gate name ({len(names)})")
    along = None
    if forget_along is not None and ax is None:
        along = base.as_array(forget_along, "forget_along", 1, "(T,): mean forget gate per step",
                              finite=False)
    if ax is None and along is not None:
        fig = Figure(figsize=base.DEFAULT_SIZE)
        ax, ax2 = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1.2, 1.0]})
    else:
        fig, ax = base.figure_and_axes(ax)
        ax2 = None
    y = np.arange(len(names), dtype=np.float64)
    ax.barh(y - 0.18, shut, height=0.36, color=base.MUTED, label="near 0 (shut)")
    ax.barh(y + 0.18, open_, height=0.36, color=base.ACCENT, label="near 1 (open)")
    ax.set_yticks(y, names)
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of gate values")
    base.tidy(ax)
    ax.legend(frameon=False, fontsize="small")
    ax.set_title("gate activity", loc="left")
    if ax2 is not None:
        k = np.arange(1, len(along) + 1)
        ax2.plot(k, along, color=base.INK, marker="o" if len(along) <= 60 else None, markersize=3)
        ax2.set_ylim(0, 1)
        base.integer_ticks(ax2.xaxis)
        base.tidy(ax2)
        ax2.set_xlabel("step k")
        ax2.set_ylabel("mean forget gate")
        ax2.set_title("what the cell keeps", loc="left")
    return fig
