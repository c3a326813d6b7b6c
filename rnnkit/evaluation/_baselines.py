"""Baselines on a Prepared: fitted on the parts before the scored one, scored on the network's targets.

Validation scores come from baselines fitted on the training part; test
scores from baselines fitted on training + validation, which is all the
data before the test part (the network sees validation only to choose its
epoch). So a fixed train/test split, such as an archive's, scores the
nearest-neighbour baseline on the whole given training set.

``baseline_predictions(prepared, split)`` returns, per baseline name, the
predictions for exactly the targets of that split (``Prepared.target_rows``):

- regression, in ORIGINAL units, shaped like the targets ((N, O), (N, L, O)
  with several leads, or (N, T, O)): ``persistence``, ``seasonal_naive``
  (only when the season is known) and ``linear_ar``;
- classification, as probabilities ((N, C) or (N, T, C)): ``majority`` and
  ``last_label``, or for whole sequences (window="full") ``majority`` and
  ``nearest_neighbour``. (With whole sequences the label belongs to the
  sequence, so a "last label" would read the answer.)

Choices, in one place:
- A naive forecast whose source row lies before its sequence's start (only
  many-to-many steps can reach it) uses the training mean of the target;
  seasonal naive first falls back to persistence. last_label falls back to
  the training class frequencies.
- linear_ar (many-to-many) predicts step t from the window's inputs at steps
  0..t, like the network, with one ridge model per step.
- Several leads (Ben Taieb et al. 2012, the direct strategy): persistence
  repeats the last input row's value at every lead; seasonal naive takes the
  value one season before each lead's time; linear_ar is one ridge model per
  lead on the same window. The naive forecasts read the original values;
  linear_ar learns the target as the network does (scaled, transformed) and
  is mapped back the same way.
- With window="full", linear_ar sees each sequence right-aligned (zeros in
  front), so its last input step is always the step before the target;
  nearest_neighbour compares sequences zero-padded at the end to the longest.
"""
from __future__ import annotations

import contextlib
from typing import NamedTuple, Optional

import numpy as np
import pandas as pd

from . import _baseline_core as core
from ._metrics import classification_metrics, mase_scale, regression_metrics

SPLITS = ("train", "val", "test")


def _one_blas_thread():
    """A context running BLAS on one thread (threadpoolctl, when installed; else no change).

    The linear AR's normal equations are small products ((N, p) x (p, p), p = T*I),
    about 5 ms on one core. On a busy 2-core machine OpenBLAS's own threads made
    the same product take 0.7 s (measured: the threads wait for each other).
    threadpoolctl comes with scikit-learn; without it BLAS keeps its own setting.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


class _Gather:
    """Windows gathered from rows by index, a block at a time: ``g[idx] -> (len(idx), T, C)``.

    ``right`` aligns each sequence of ``lengths`` to the end of T steps,
    zero-filling in front; ``offset`` shifts the rows read (targets: horizon).
    """

    def __init__(self, values, starts, T, offset=0, lengths=None, right=False):
        self.values, self.starts, self.T = values, np.asarray(starts, np.int64), int(T)
        self.offset, self.lengths, self.right = int(offset), lengths, right
        self.shape = (len(self.starts), self.T) + tuple(values.shape[1:])

    def __getitem__(self, idx):
        idx = np.asarray(idx, dtype=np.int64)
        steps = np.arange(self.T, dtype=np.int64)
        first = self.starts[idx] + self.offset  # (n,)
        if not self.right:
            return self.values[first[:, None] + steps[None, :]]  # (n, T, C)
        shift = self.T - self.lengths[idx]  # (n,) zero steps in front
        rows = first[:, None] + steps[None, :] - shift[:, None]  # (n, T)
        valid = steps[None, :] >= shift[:, None]
        out = self.values[np.where(valid, rows, 0)]
        out[~valid] = 0
        return out


class Fitted(NamedTuple):
    """What the baselines learned from the parts they were fitted on (`parts`)."""

    mean: Optional[np.ndarray]  # (O,) training target mean, original units (regression) or None
    freq: Optional[np.ndarray]  # (C,) training class frequencies (classification) or None
    linear: Optional[core.LinearAR]  # regression only
    segments: np.ndarray  # (R,) sequence number of every row
    parts: tuple = ("train",)  # the parts fitted on


def parts_before(split: str) -> tuple:
    """The parts a baseline scored on `split` is fitted on: every part before it."""
    return ("train", "val") if split == "test" else ("train",)


def _starts(prepared, parts) -> np.ndarray:
    return np.concatenate([prepared.starts[q] for q in parts])


def _lengths(prepared, parts):
    if prepared.lengths[parts[0]] is None:
        return None
    return np.concatenate([prepared.lengths[q] for q in parts])


def training_rows(prepared, parts=("train",)) -> np.ndarray:
    """(K,) sorted row numbers of the training part (or `parts`): every row their windows cover."""
    s = _starts(prepared, parts)
    if prepared.full:
        end = s + _lengths(prepared, parts)
    else:
        end = s + prepared.window + prepared.horizon  # inputs and every target
    cover = np.zeros(len(prepared.targets) + 1, dtype=np.int64)
    np.add.at(cover, s, 1)
    np.add.at(cover, end, -1)
    return np.flatnonzero(np.cumsum(cover[:-1]) > 0)


def prepared_mase_scale(prepared) -> np.ndarray:
    """(O,) MASE scale in original units: seasonal-naive in-sample MAE of the training part.

    Differences are taken only between rows of one sequence (Hyndman &
    Koehler 2006; m = the resolved season or 1). When no training sequence
    is longer than the season, the non-seasonal scale (m = 1) is used.
    """
    if prepared.classes is not None:
        raise ValueError("MASE is a regression measure; this Prepared is for classification")
    rows = training_rows(prepared)
    seg = core.segments(prepared.groups, len(prepared.targets))[rows]
    run = np.concatenate([[0], np.cumsum((np.diff(rows) != 1) | (np.diff(seg) != 0))])
    y = prepared.levels[rows]  # (K, O) original units
    m = prepared.season or 1
    if m > 1 and np.bincount(run).max() <= m:
        m = 1
    return np.atleast_1d(mase_scale(y, m, groups=run))


def _inputs(prepared, split) -> _Gather:
    p = prepared
    return _Gather(p.inputs, p.starts[split], p.window, 0, p.lengths[split], right=p.full)


def _linear_targets(prepared, parts):
    p = prepared
    if p.leads > 1:  # (N, L*O), lead-major
        return np.concatenate([p.lead_targets()[p.starts[q] + p.window - 1] for q in parts])
    if p.full or p.config.mode == "many-to-one":
        return np.concatenate([p.targets[p.target_rows(q)] for q in parts])  # (N, O)
    return _Gather(p.targets, _starts(p, parts), p.window, offset=p.horizon)  # (N, T, O)


def fit_baselines(prepared, *, lam: float = core.RIDGE, parts=("train",)) -> Fitted:
    """Fit every baseline of this task on the windows of `parts` of `prepared`.

    Args:
        prepared: a Prepared.
        lam: ridge of the linear AR.
        parts: ("train",) for validation scores; ("train", "val") for test scores
            (``parts_before(split)``).
    """
    p = prepared
    parts = tuple(parts)
    if not parts or any(q not in SPLITS for q in parts):
        raise ValueError(f"`parts` (={parts!r}) must name parts among {SPLITS}")
    parts = tuple(q for q in parts if len(p.starts[q]) > 0) or ("train",)
    seg = core.segments(p.groups, len(p.targets))
    if p.classes is None:
        mean = p.levels[training_rows(p, parts)].mean(axis=0, dtype=np.float64)  # (O,)
        inputs = _Gather(p.inputs, _starts(p, parts), p.window, 0, _lengths(p, parts), right=p.full)
        with _one_blas_thread():
            linear = core.fit_linear_ar(inputs, _linear_targets(p, parts), lam=lam)
        return Fitted(mean, None, linear, seg, parts)
    codes = np.concatenate([p.targets[p.target_rows(q)] for q in parts])
    freq = core.class_frequencies(codes, len(p.classes))
    return Fitted(None, freq, None, seg, parts)


def baseline_predictions(prepared, split: str, fitted: Optional[Fitted] = None) -> dict:
    """Predictions of every baseline for the targets of one split.

    Args:
        prepared: a Prepared.
        split: "train", "val" or "test".
        fitted: from `fit_baselines(prepared, parts=...)`; when None, fitted here
            on the parts before `split` (``parts_before``: test on train + val).
    Returns:
        dict name -> array: regression (N, O) or (N, T, O) in original units;
        classification (N, C) or (N, T, C) probabilities.
    """
    if split not in SPLITS:
        raise ValueError(f"`split` (={split!r}) must be one of {SPLITS}")
    p = prepared
    f = fit_baselines(p, parts=parts_before(split)) if fitted is None else fitted
    rows = p.target_rows(split)  # (N,), (N, L) or (N, T)
    h = p.horizon
    if p.classes is None:
        if p.leads > 1:  # lead k: naive forecasts from the last input row, k rows before
            by_lead = lambda fn, *a: np.stack(  # noqa: E731
                [fn(p.levels, rows[:, k], k + 1, *a) for k in range(p.leads)], axis=1)
        else:
            by_lead = lambda fn, *a: fn(p.levels, rows, h, *a)  # noqa: E731
        out = {"persistence": by_lead(core.persistence, f.segments, f.mean)}
        if p.season is not None:
            out["seasonal_naive"] = by_lead(core.seasonal_naive, p.season, f.segments, f.mean)
        z = core.predict_linear_ar(f.linear, _inputs(p, split))
        if p.leads > 1:
            z = z.reshape(len(z), p.leads, -1)  # (N, L, O)
        out["linear_ar"] = p.original(z, rows)
        return out
    n_classes = len(p.classes)
    out = {"majority": np.broadcast_to(f.freq, rows.shape + (n_classes,)).copy()}
    if p.full:
        seen = [p.windows(q)[:2] for q in f.parts]  # zero-padded at the end to the longest
        x_train = np.concatenate([x for x, _ in seen])
        y_train = np.concatenate([y for _, y in seen])
        x, _, _ = p.windows(split)
        out["nearest_neighbour"] = core.nearest_neighbour(x_train, y_train, x, n_classes)
    else:
        out["last_label"] = core.last_label(p.targets, rows, h, n_classes, f.segments, f.freq)
    return out


def truth(prepared, split: str) -> np.ndarray:
    """The targets of one split: regression in original units, classification as codes."""
    rows = prepared.target_rows(split)
    return prepared.targets[rows] if prepared.classes is not None else prepared.levels[rows]


def score_baselines(prepared, splits=("val", "test"), fitted: Optional[Fitted] = None) -> pd.DataFrame:
    """Metrics of every baseline: index model name, columns "<split>_<metric>".

    Regression: mae, rmse, mase, r2 (MASE scaled by `prepared_mase_scale`);
    classification: accuracy, balanced_accuracy, log_loss. Each split is scored
    by baselines fitted on the parts before it (``parts_before``) unless
    `fitted` is given.
    """
    scale = prepared_mase_scale(prepared) if prepared.classes is None else None
    table: dict = {}
    for split in splits:
        if len(prepared.starts[split]) == 0:
            continue
        y = truth(prepared, split)
        for name, pred in baseline_predictions(prepared, split, fitted).items():
            if scale is not None:
                m = regression_metrics(y, pred, scale=scale, model=name, split=split)
            else:
                m = classification_metrics(y, pred, model=name, split=split)
            table.setdefault(name, {}).update({f"{split}_{k}": v for k, v in m.items()})
    return pd.DataFrame.from_dict(table, orient="index").rename_axis("model")
