"""What prepare() returns: the Scaler and the Prepared windows (views, never copies).

A Prepared holds every used row once (``inputs (R, I)``, ``targets``) and, per
split, the first row of each window (``starts``). A window covers rows
``s .. s+T-1``; its target lies ``horizon`` rows after each input step
(many-to-many) or after the last one (many-to-one). Regression many-to-one
forecasts every lead 1..horizon at once (``leads``: the multi-output direct
strategy, Ben Taieb et al. 2012): its targets are rows ``s+T .. s+T-1+H``.
Validation and test windows may start before their part (see _split.py).
With ``window="full"``
each sequence is one example: ``lengths`` gives its real length and the target
is the sequence's last row. The training loop gathers windows by index inside
jit; ``windows(split)`` is for people and tests.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Dict, Optional, Sequence

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view

from ._config import Config
from ._transform import DIFFS, inverse

SPLITS = ("train", "val", "test")


@dataclass(frozen=True, eq=False)
class Scaler:
    """Per-column affine scaling fit on the training rows only: ``z = (x - mean) / scale``.

    ``standard``: mean and population std (ddof=0; std 0 -> 1), as scikit-learn's
    StandardScaler. ``minmax``: mean holds the minimum and scale the range
    (range 0 -> 1), so training rows land in [0, 1] as MinMaxScaler. ``none``:
    mean 0, scale 1. Classification labels are never scaled (``target_names``
    is then empty and the target transforms are the identity).
    """

    method: str
    columns: tuple  # (C,) names: input columns, then target columns not among them
    mean: np.ndarray  # (C,) float64
    scale: np.ndarray  # (C,) float64, never 0
    input_names: tuple  # (I,)
    target_names: tuple  # (O,) or () for classification

    def _pos(self, names: Sequence[str]) -> np.ndarray:
        missing = [n for n in names if n not in self.columns]
        if missing:
            raise ValueError(f"the scaler knows no column(s) {missing}; it knows {list(self.columns)}")
        return np.array([self.columns.index(n) for n in names], dtype=np.int64)

    def transform(self, values, names: Sequence[str]) -> np.ndarray:
        """Scale ``values (..., len(names))`` given in original units."""
        p = self._pos(names)
        v = np.asarray(values, dtype=np.float64)
        return (v - self.mean[p]) / self.scale[p]

    def inverse(self, values, names: Sequence[str]) -> np.ndarray:
        """Back to original units: ``values (..., len(names))`` scaled -> original."""
        p = self._pos(names)
        v = np.asarray(values, dtype=np.float64)
        return v * self.scale[p] + self.mean[p]

    def transform_inputs(self, x) -> np.ndarray:
        return self.transform(x, self.input_names)  # (..., I)

    def inverse_inputs(self, x) -> np.ndarray:
        return self.inverse(x, self.input_names)  # (..., I)

    def transform_targets(self, y) -> np.ndarray:
        """Scale targets ``(..., O)``; identity for classification codes."""
        if not self.target_names:
            return np.asarray(y)
        return self.transform(y, self.target_names)

    def inverse_targets(self, y) -> np.ndarray:
        """Targets or predictions ``(..., O)`` back to original units; identity for codes."""
        if not self.target_names:
            return np.asarray(y)
        return self.inverse(y, self.target_names)

    @property
    def input_mean(self) -> np.ndarray:
        return self.mean[self._pos(self.input_names)]  # (I,)

    @property
    def input_scale(self) -> np.ndarray:
        return self.scale[self._pos(self.input_names)]  # (I,)

    @property
    def target_mean(self) -> np.ndarray:
        return self.mean[self._pos(self.target_names)]  # (O,)

    @property
    def target_scale(self) -> np.ndarray:
        return self.scale[self._pos(self.target_names)]  # (O,)


def fit_scaler(method: str, columns: Sequence[str], train_values: Sequence[np.ndarray],
               input_names: Sequence[str], target_names: Sequence[str]) -> Scaler:
    """Fit one Scaler from the training rows of each column.

    Args:
        method: "standard", "minmax" or "none".
        columns: (C,) names.
        train_values: C arrays, each (R_train,) float64, the training rows of that column.
    """
    mean = np.zeros(len(columns), dtype=np.float64)
    scale = np.ones(len(columns), dtype=np.float64)
    for j, v in enumerate(train_values):
        if method == "standard":
            mean[j] = np.mean(v, dtype=np.float64)
            sd = float(np.std(v, dtype=np.float64))
            scale[j] = sd if sd > 0 else 1.0  # a constant column is centred, not blown up
        elif method == "minmax":
            lo, hi = float(np.min(v)), float(np.max(v))
            mean[j] = lo
            scale[j] = hi - lo if hi > lo else 1.0
    return Scaler(method, tuple(columns), mean, scale, tuple(input_names), tuple(target_names))


@dataclass(frozen=True, eq=False)
class Prepared:
    """Scaled rows, window starts per split, and what is needed to map back.

    See DEVELOPERS.md ("Prepared") for the contract the training loop uses.
    """

    config: Config  # target / features / season resolved
    inputs: np.ndarray  # (R, I) float (config dtype), scaled
    targets: np.ndarray  # regression (R, O) float scaled; classification (R,) int32 codes
    index: np.ndarray  # (R,) time (time column or index) or index label of each row
    groups: Optional[np.ndarray]  # (R,) group id per row, or None
    window: int  # T (longest sequence for window="full")
    horizon: int  # 0 for window="full" (the target is the sequence's last row)
    starts: Dict[str, np.ndarray]  # split -> (N,) int64 first input row of each window
    lengths: Dict[str, Optional[np.ndarray]]  # split -> (N,) int64 for window="full", else None
    input_names: list
    target_names: list
    classes: Optional[np.ndarray]  # (K,) original labels, code k -> classes[k]
    scaler: Scaler
    season: Optional[int]
    dropped: pd.DataFrame  # columns reason, rows
    rows: np.ndarray  # (R,) int64 position of each row in the caller's frame
    counts: dict  # rows_in_frame, rows_used, rows per split
    notes: tuple = ()  # sentences for summary(): choices made on the user's behalf
    levels: Optional[np.ndarray] = None  # regression (R, O) float64 target in original units (untransformed)

    @property
    def leads(self) -> int:
        """L: leads forecast at once (regression many-to-one: horizon; else 1)."""
        c = self.config
        if self.full or c.task != "regression" or c.mode != "many-to-one" or self.horizon < 1:
            return 1
        return int(self.horizon)

    @property
    def net_outputs(self) -> int:
        """Output units of the network: leads x target columns, or classes K."""
        return self.n_outputs * self.leads

    @property
    def reach(self) -> int:
        """Rows from a window's first input to its first target."""
        if self.full:
            return 0
        if self.config.mode == "many-to-many":
            return self.horizon
        return self.window - 1 + (1 if self.leads > 1 else self.horizon)

    def lead_targets(self) -> np.ndarray:
        """Training targets by the row of the window's last input: (R, L*O), lead-major.

        Row r holds the scaled targets of rows r+1 .. r+L (zeros past the end, never
        read); with one lead, the targets themselves (the trainer adds the horizon).
        """
        if self.leads == 1:
            return self.targets
        R, O = self.targets.shape
        out = np.zeros((R, self.leads * O), dtype=self.targets.dtype)
        for k in range(1, self.leads + 1):
            out[:R - k, (k - 1) * O:k * O] = self.targets[k:]
        return out

    def original(self, out, rows) -> np.ndarray:
        """Scaled network (or linear AR) outputs back to original units.

        Args:
            out: shaped like the targets of ``rows``: (N, O), (N, L, O) or (N, T, O).
            rows: their target rows (``target_rows``).
        """
        z = self.scaler.inverse_targets(out)
        t = self.config.transform
        if t not in DIFFS:
            return inverse(z, t)
        rows = np.asarray(rows, dtype=np.int64)
        if self.leads > 1:
            return inverse(z, t, self.levels[rows[:, :1] - 1], lead_axis=1)
        return inverse(z, t, self.levels[rows - 1])

    @property
    def n_inputs(self) -> int:
        return int(self.inputs.shape[1])

    @property
    def n_outputs(self) -> int:
        """O: target columns (regression) or classes K (classification)."""
        if self.classes is not None:
            return int(len(self.classes))
        return int(self.targets.shape[1])

    @property
    def full(self) -> bool:
        return self.lengths["train"] is not None

    def _split(self, split: str) -> np.ndarray:
        if split not in SPLITS:
            raise ValueError(f"`split` (={split!r}) must be one of {SPLITS}")
        return self.starts[split]

    def target_rows(self, split: str) -> np.ndarray:
        """Row numbers of every target: (N,) many-to-one, (N, T) many-to-many."""
        s = self._split(split)
        if self.full:
            return s + self.lengths[split] - 1  # (N,)
        if self.config.mode == "many-to-one":
            if self.leads > 1:  # leads 1..L
                return s[:, None] + self.window + np.arange(self.leads, dtype=np.int64)[None, :]  # (N, L)
            return s + (self.window - 1 + self.horizon)  # (N,)
        return s[:, None] + np.arange(self.window, dtype=np.int64)[None, :] + self.horizon  # (N, T)

    def target_times(self, split: str) -> np.ndarray:
        """The time (or index label) of every target, same shape as target_rows."""
        return self.index[self.target_rows(split)]

    def target_groups(self, split: str) -> Optional[np.ndarray]:
        """The group id of every target, or None without groups."""
        return None if self.groups is None else self.groups[self.target_rows(split)]

    def decode(self, codes) -> np.ndarray:
        """Class codes (any shape) -> original labels; needs classification."""
        if self.classes is None:
            raise ValueError("decode() needs task='classification'; regression targets have no labels")
        return self.classes[np.asarray(codes, dtype=np.int64)]

    def windows(self, split: str):
        """The windows of one split as numpy arrays.

        Returns:
            x: (N, T, I) inputs, a strided view of ``inputs`` when the split's
               starts are consecutive (one series), else gathered; zero-padded
               for window="full".
            y: regression (N, O), (N, L, O) with several leads, or (N, T, O);
               classification (N,) or (N, T).
            mask: (N, T) bool for window="full" (False = padding), else None.
        """
        s = self._split(split)
        T, h = self.window, self.horizon
        if self.full:
            ln = self.lengths[split]
            steps = np.arange(T, dtype=np.int64)
            mask = steps[None, :] < ln[:, None]  # (N, T)
            idx = np.minimum(s[:, None] + steps[None, :], len(self.inputs) - 1)  # (N, T)
            x = np.where(mask[:, :, None], self.inputs[idx], np.zeros((), self.inputs.dtype))
            return x, self.targets[s + ln - 1], mask
        x_all = sliding_window_view(self.inputs, T, axis=0).transpose(0, 2, 1)  # (R-T+1, T, I) view
        x = _take(x_all, s)
        if self.config.mode == "many-to-one":
            return x, self.targets[self.target_rows(split)], None
        y_all = sliding_window_view(self.targets, T, axis=0)  # (R-T+1, [O,] T) view
        if y_all.ndim == 3:
            y_all = y_all.transpose(0, 2, 1)  # (R-T+1, T, O)
        return x, _take(y_all, s + h), None

    def summary(self) -> pd.DataFrame:
        """Counts: rows in the frame, rows used, rows and windows per split, rows dropped and why."""
        c = self.counts
        items = [("rows in frame", c["rows_in_frame"], ""),
                 ("rows used", c["rows_used"], f"{len(self.input_names)} inputs, target {self.target_names}")]
        if self.groups is not None:
            items.append(("sequences", c["sequences"], f"group column {self.config.group_column!r}"))
        for sp in SPLITS:
            detail = f"window {self.window}, horizon {self.horizon}"
            if self.leads > 1:
                detail += f" (leads 1..{self.leads})"
            if sp != "train" and not self.full:
                detail += "; inputs may come from rows before the part, targets lie inside it"
            if self.groups is not None:
                detail += f", {c['sequences_' + sp]} sequences"
            items.append((f"{sp} rows", c["rows_" + sp], ""))
            items.append((f"{sp} windows", len(self.starts[sp]), detail))
        for reason, n in zip(self.dropped["reason"], self.dropped["rows"]):
            items.append(("dropped rows", int(n), reason))
        for note in self.notes:
            items.append(("note", 0, note))
        return pd.DataFrame(items, columns=["item", "count", "detail"])


def _take(view: np.ndarray, s: np.ndarray) -> np.ndarray:
    """``view[s]``, as a slice (still a view) when ``s`` is a consecutive run."""
    if len(s) == 0:
        return view[:0]
    if s[-1] - s[0] + 1 == len(s) and (len(s) < 2 or bool(np.all(np.diff(s) == 1))):
        return view[int(s[0]):int(s[-1]) + 1]
    return view[s]
