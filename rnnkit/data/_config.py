"""The experiment configuration: one frozen dataclass, its JSON form and checks.

Every field has a default and a one-line comment. A Config is checked when it
is built, so a bad value fails at the line that made it, with the field named.
The same rules are written once more as a JSON Schema (``config.schema.json``,
draft 2020-12) for files; ``tests/test_config.py`` keeps the two in step.
"""
from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field, fields
from typing import Any, Optional, Tuple, Union

import numpy as np

from ..recurrent._names import ACTIVATIONS, CELLS, INITS, MODES, TASKS

SCALES = ("standard", "minmax", "none")
MISSING = ("error", "ffill", "interpolate")
SHORT = ("error", "drop")
OPTIMIZERS = ("sgd", "momentum", "rmsprop", "adam", "adamw")
DTYPES = ("float32", "float64")
WATCHES = ("loss", "metric")
# Upper bounds of the whole-number fields: far above any sensible run, low enough that a
# typo (1e30 steps) fails here instead of looping, overflowing or allocating until killed.
MAX_STEPS = 100_000  # window, horizon, season (steps)
MAX_GAP = 100_000_000  # gap (rows)
MAX_EPOCHS = 100_000  # epochs, patience
TRANSFORMS = ("none", "log", "diff", "log-diff")


@dataclass(frozen=True)
class Config:
    """Everything that defines one experiment: data, model and training.

    Example:
        >>> cfg = Config(target="load_kw", window=48, hidden=32)
        >>> cfg.replace(activation="relu").activation
        'relu'
    """

    # --- data ---
    target: Optional[Union[str, Tuple[str, ...]]] = None  # column(s) to predict; None: first usable column
    features: Optional[Tuple[str, ...]] = None  # input columns; None: every other numeric column
    target_as_input: bool = True  # regression: feed past target values as inputs too
    time_column: Optional[str] = None  # column holding time; None: the frame's index
    group_column: Optional[str] = None  # sequence id; windows never cross a sequence
    split_column: Optional[str] = None  # column of "train"/"val"/"test" fixing the split
    task: str = "regression"  # "regression" (squared error) or "classification" (softmax)
    mode: str = "many-to-one"  # "many-to-one": last step only; "many-to-many": every step
    window: Union[int, str] = 24  # input steps per example, or "full" for whole sequences
    horizon: int = 1  # regression many-to-one: forecast leads 1..horizon at once; else the one lead of the target
    split: Tuple[float, float, float] = (0.7, 0.15, 0.15)  # train/val/test fractions, in time order
    gap: int = 0  # rows after the end of a part that are never targets of the next (still inputs)
    scale: str = "standard"  # "standard", "minmax" or "none"; fit on the training part only
    missing: str = "error"  # NaN policy: "error", "ffill" or "interpolate"
    season: Optional[Union[int, str]] = "auto"  # season length in steps; "auto" from the time step; None: no season
    short_sequences: str = "error"  # a sequence shorter than window+horizon: "error", or "drop" it (counted)
    transform: str = "none"  # target learnt as "none", "log", "diff" or "log-diff"; results in original units
    coverage: Tuple[float, ...] = (0.8, 0.95)  # levels of the split conformal prediction intervals
    # --- model ---
    hidden: int = 32  # hidden units H
    activation: str = "tanh"  # state nonlinearity: tanh, sigmoid, relu, linear
    init: str = "orthogonal"  # "glorot", "orthogonal" (Saxe et al. 2014), "identity" (Le et al. 2015)
    recurrent_scale: float = 1.0  # multiplies the initial recurrent matrix V
    cell: str = "elman"  # "elman", "gru" (as torch.nn.GRU) or "lstm" (forget gate, as torch.nn.LSTM)
    # --- training ---
    optimizer: str = "adam"  # sgd, momentum, rmsprop, adam, adamw (all from optax)
    lr: float = 5e-3  # learning rate
    weight_decay: float = 0.0  # decoupled weight decay (adamw only)
    epochs: int = 30  # passes over the training windows
    batch_size: int = 64  # windows per minibatch
    clip: Optional[float] = 1.0  # global gradient-norm clip; None: no clipping
    patience: Optional[int] = 5  # epochs without validation gain before stopping; None: never
    watch: str = "loss"  # early stopping and kept epoch watch val "loss" or "metric" (accuracy; ties by loss)
    seed: int = 0  # seeds initialisation and shuffling
    dtype: str = "float32"  # "float32" or "float64"

    def __post_init__(self):
        # numpy scalars and arrays (from np.arange, a sweep table) become plain Python values,
        # so that np.int64(5) is the whole number 5 and the config stays JSON-ready.
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, (np.generic, np.ndarray)):
                object.__setattr__(self, f.name, v.tolist())
        # Normalise list-likes to tuples so that the config stays hashable.
        for name in ("target", "features"):
            v = getattr(self, name)
            if isinstance(v, (list, tuple)):
                object.__setattr__(self, name, tuple(v))
        if isinstance(self.split, (list, tuple)):
            object.__setattr__(self, "split", tuple(float(s) for s in self.split))
        if isinstance(self.coverage, list):
            object.__setattr__(self, "coverage", tuple(self.coverage))
        _check(self)

    # --- conversions ---
    def to_dict(self) -> dict:
        """Plain JSON-ready dict (tuples become lists)."""
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            out[f.name] = list(v) if isinstance(v, tuple) else v
        return out

    @classmethod
    def from_dict(cls, d: dict) -> "Config":
        """Build from a dict; unknown keys are refused with their names."""
        if not isinstance(d, dict):
            raise TypeError(f"Config.from_dict needs a dict, got {type(d).__name__}")
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - known)
        if unknown:
            raise ValueError(
                f"unknown config field(s) {unknown}; known fields are {sorted(known)}")
        return cls(**d)

    def replace(self, **changes) -> "Config":
        """A copy with some fields changed (checked again)."""
        return dataclasses.replace(self, **changes)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2)

    @property
    def targets(self) -> Tuple[str, ...]:
        """The target as a tuple of names (empty when not chosen yet)."""
        if self.target is None:
            return ()
        return (self.target,) if isinstance(self.target, str) else tuple(self.target)


def _bad(name, value, allowed):
    return ValueError(f"`{name}` (={value!r}) is not allowed; use {allowed}")


def _is_int(v):
    return isinstance(v, int) and not isinstance(v, bool)


def _check(c: Config) -> None:
    """Check every field; raise ValueError/TypeError naming the field and the fix."""
    for name, choices in (("task", TASKS), ("mode", MODES), ("scale", SCALES),
                          ("missing", MISSING), ("short_sequences", SHORT), ("activation", ACTIVATIONS),
                          ("init", INITS), ("optimizer", OPTIMIZERS), ("dtype", DTYPES),
                          ("watch", WATCHES), ("cell", CELLS)):
        v = getattr(c, name)
        if v not in choices:
            raise _bad(name, v, "one of " + ", ".join(repr(x) for x in choices))

    if c.target is not None:
        names = c.targets
        if (not isinstance(c.target, (str, tuple)) or not names
                or not all(isinstance(t, str) and t for t in names)):
            raise TypeError(f"`target` (={c.target!r}) must be a column name or a list of names")
        if len(set(names)) != len(names):
            raise ValueError(f"`target` (={list(names)!r}) names a column twice")
        if c.task == "classification" and len(names) != 1:
            raise ValueError(f"`target` (={list(names)!r}): classification takes exactly one label column")
    if c.features is not None:
        if not isinstance(c.features, tuple) or not all(isinstance(t, str) and t for t in c.features):
            raise TypeError(f"`features` (={c.features!r}) must be a list of column names")
        if len(set(c.features)) != len(c.features):
            raise ValueError(f"`features` (={list(c.features)!r}) names a column twice")
        clash = sorted(set(c.features) & set(c.targets))
        if clash:
            raise ValueError(f"`features` and `target` both name {clash}; a column is one or the other "
                             "(past target values are inputs already when `target_as_input` is true)")
    for name in ("time_column", "group_column", "split_column"):
        v = getattr(c, name)
        if v is not None and not (isinstance(v, str) and v):
            raise TypeError(f"`{name}` (={v!r}) must be a column name or None")
    roles = [(n, getattr(c, n)) for n in ("time_column", "group_column", "split_column")
             if getattr(c, n) is not None]
    for i, (name, col) in enumerate(roles):
        other = [n for n, v in roles[:i] if v == col]
        if other or col in c.targets or col in (c.features or ()):
            clash = other[0] if other else ("target" if col in c.targets else "features")
            raise ValueError(f"`{name}` (={col!r}) is also `{clash}`; a column has one role: "
                             "time, sequence id, split label, target or feature")
    if not isinstance(c.target_as_input, bool):
        raise TypeError(f"`target_as_input` (={c.target_as_input!r}) must be true or false")

    if c.window == "full":
        if c.mode != "many-to-one":
            raise ValueError("`window`='full' (whole sequences) needs `mode`='many-to-one'; "
                             f"got `mode`={c.mode!r}")
        if c.group_column is None:
            raise ValueError("`window`='full' classifies whole sequences and needs `group_column` "
                             "(the column that names each sequence)")
    elif not _is_int(c.window) or not 1 <= c.window <= MAX_STEPS:
        raise ValueError(f"`window` (={c.window!r}) must be a whole number from 1 to {MAX_STEPS} or 'full'")
    if not _is_int(c.horizon) or not 0 <= c.horizon <= MAX_STEPS:
        raise ValueError(f"`horizon` (={c.horizon!r}) must be a whole number from 0 to {MAX_STEPS}")
    if c.task == "regression" and c.target_as_input and c.window == "full":
        raise ValueError("`window`='full' predicts the target at each sequence's last row; with "
                         "`target_as_input`=true the network would see that value as its last input; "
                         "set `target_as_input`=false")
    if c.task == "regression" and c.target_as_input and c.horizon == 0:
        raise ValueError("`horizon`=0 with `target_as_input`=true would show the network the value "
                         "it must predict; set `horizon` >= 1 or `target_as_input`=false")

    if (not isinstance(c.split, tuple) or len(c.split) != 3
            or not all(isinstance(s, (int, float)) and math.isfinite(s) and s >= 0 for s in c.split)):
        raise ValueError(f"`split` (={c.split!r}) must be three fractions >= 0 (train, val, test)")
    if abs(sum(c.split) - 1.0) > 1e-6:
        raise ValueError(f"`split` (={list(c.split)!r}) sums to {sum(c.split):.6g}; the fractions "
                         "must sum to 1, for example (0.7, 0.15, 0.15)")
    if c.split[0] <= 0 or c.split[1] <= 0:
        raise ValueError(f"`split` (={list(c.split)!r}) needs a training and a validation part > 0")
    if not _is_int(c.gap) or not 0 <= c.gap <= MAX_GAP:
        raise ValueError(f"`gap` (={c.gap!r}) must be a whole number of rows from 0 to {MAX_GAP}")
    if c.season is not None and c.season != "auto" and (not _is_int(c.season)
                                                        or not 1 <= c.season <= MAX_STEPS):
        raise ValueError(f"`season` (={c.season!r}) must be a whole number of steps from 1 to "
                         f"{MAX_STEPS}, 'auto' or None")
    _check_forecasting(c)

    if not _is_int(c.hidden) or not 1 <= c.hidden <= 4096:
        raise ValueError(f"`hidden` (={c.hidden!r}) must be a whole number from 1 to 4096")
    _positive_float(c, "recurrent_scale", c.recurrent_scale, upper=100.0)
    _positive_float(c, "lr", c.lr, upper=10.0)
    if isinstance(c.weight_decay, bool) or not isinstance(c.weight_decay, (int, float)) \
            or not 0 <= c.weight_decay < 1:
        raise ValueError(f"`weight_decay` (={c.weight_decay!r}) must be in [0, 1)")
    if not _is_int(c.epochs) or not 1 <= c.epochs <= MAX_EPOCHS:
        raise ValueError(f"`epochs` (={c.epochs!r}) must be a whole number from 1 to {MAX_EPOCHS}")
    if not _is_int(c.batch_size) or not 1 <= c.batch_size <= 65_536:
        raise ValueError(f"`batch_size` (={c.batch_size!r}) must be a whole number from 1 to 65536")
    if c.clip is not None:
        _positive_float(c, "clip", c.clip, upper=1e6)
    if c.patience is not None and (not _is_int(c.patience) or not 1 <= c.patience <= MAX_EPOCHS):
        raise ValueError(f"`patience` (={c.patience!r}) must be a whole number from 1 to {MAX_EPOCHS} "
                         "or None")
    if not _is_int(c.seed) or not 0 <= c.seed < 2**31:
        raise ValueError(f"`seed` (={c.seed!r}) must be a whole number from 0 to 2**31-1")


def _check_forecasting(c: Config) -> None:
    """`transform` and `coverage`."""
    if c.transform not in TRANSFORMS:
        raise _bad("transform", c.transform, "one of " + ", ".join(repr(x) for x in TRANSFORMS))
    if c.transform != "none" and c.task != "regression":
        raise ValueError(f"`transform` (={c.transform!r}) changes a numeric target; classification "
                         "labels take `transform`='none'")
    if c.transform in ("diff", "log-diff"):
        if c.horizon < 1:
            raise ValueError(f"`transform`={c.transform!r} adds predicted differences to the last known "
                             "value, which `horizon`=0 does not have; set `horizon` >= 1")
        if c.mode == "many-to-many" and c.horizon != 1:
            raise ValueError(f"`transform`={c.transform!r} with `mode`='many-to-many' needs `horizon`=1 "
                             f"(got {c.horizon}): each step's level is the previous level plus one "
                             "predicted difference")
    if (not isinstance(c.coverage, tuple) or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and 0 < v < 1
            for v in c.coverage)):
        raise ValueError(f"`coverage` (={c.coverage!r}) must be a list of levels between 0 and 1, "
                         "for example [0.8, 0.95] (an empty list: no intervals)")
    if len(set(round(float(v), 6) for v in c.coverage)) != len(c.coverage):
        raise ValueError(f"`coverage` (={list(c.coverage)!r}) names a level twice")


def _positive_float(c, name, v, upper):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not 0 < v <= upper:
        raise ValueError(f"`{name}` (={v!r}) must be a number > 0 and <= {upper:g}")


def _field_comments() -> dict:
    """Field name -> its one-line comment, read from this file's class body (tokenize)."""
    import io
    import tokenize
    from pathlib import Path

    try:
        source = Path(__file__).read_text(encoding="utf-8")
    except OSError:
        return {}
    names = {f.name for f in fields(Config)}
    out, in_class, line_start = {}, False, None
    for tok in tokenize.generate_tokens(io.StringIO(source).readline):
        if tok.type == tokenize.NAME and tok.string == "class" and tok.start[1] == 0:
            in_class = False
        if tok.type == tokenize.NAME and tok.string == "Config" and tok.line.startswith("class Config"):
            in_class = True
        if not in_class:
            continue
        if tok.type == tokenize.NAME and tok.start[1] == 4 and tok.string in names:
            line_start = (tok.start[0], tok.string)
        elif tok.type == tokenize.COMMENT and line_start and tok.start[0] == line_start[0]:
            out[line_start[1]] = tok.string.lstrip("#").strip()
    return out


def _fields_doc() -> str:
    """The "Fields" section of Config's docstring: every field, its default and its comment."""
    comments = _field_comments()
    lines = ["", "    Fields (name = default: meaning):"]
    for f in fields(Config):
        lines.append(f"        {f.name} = {f.default!r}: {comments.get(f.name, '')}".rstrip(": "))
    return "\n".join(lines) + "\n"


Config.__doc__ = (Config.__doc__ or "").rstrip() + "\n" + _fields_doc()


def config_fields() -> Tuple[str, ...]:
    """Names of all Config fields, in order."""
    return tuple(f.name for f in fields(Config))
