"""The training loop: a Prepared and a Config in, trained parameters and a history out.

Training state is (params, opt_leaves, key). Each epoch is one compiled program
(``_epoch.epoch_program``); this module only packs the data for it, keeps the
best parameters, decides when to stop and reports progress. Between epochs the
host reads five numbers and nothing else.

Compile economy. The program is cached by (task, mode, optimizer name,
clipping on/off, dtype, batch size, program window, mask-free or not: see
``_mask_free``) and by array shapes
(rows, inputs, outputs, hidden size, numbers of windows). Activation, learning
rate, weight decay, clipping norm, seed, init scheme and recurrent scale are
data. A sweep that also varies the window passes ``shapes`` (see
``shape_plan``) so that every run is padded to one common set of shapes.
"""
from __future__ import annotations

import contextlib
import math
import threading
import time
from typing import Callable, Dict, NamedTuple, Optional, Sequence

import jax
import numpy as np
import pandas as pd

from . import _epoch
from ..data._config import ACTIVATIONS, INITS, Config
from ._optim import hyperparams, program_key

SHAPE_KEYS = ("window", "n_train", "n_val", "rows")
# An unpadded run whose batch x hidden is at most this trains with the mask-free epoch
# program (``_epoch.epoch_program(uniform=True)``). Measured (benchmarks/bench_epoch.py):
# 5% faster per epoch at (B, T, I, H) = (64, 24, 3, 32), 2% at (64, 100, 3, 128), but 15%
# slower at (128, 200, 8, 256), where XLA runs the masked loops' fusions on two threads.
MASK_FREE_MAX = 2 ** 14
HISTORY_COLUMNS = ("epoch", "train_loss", "val_loss", "grad_norm", "lr", "seconds")


class TrainOutcome(NamedTuple):
    """What ``train`` returns."""

    params: dict  # numpy arrays in the config dtype, the layout of init_params(cell=config.cell)
    history: pd.DataFrame  # one row per epoch run, columns HISTORY_COLUMNS
    status: str  # "ok" | "diverged at epoch N" | "stopped early at epoch N" | "stopped by user at epoch N"
    best_epoch: int  # epoch (1-based) whose parameters are returned; 0 = the initial ones
    compiles: int  # programs compiled (traced) during this call
    seconds: float  # wall time of the call
    watched: str = "val_loss"  # what chose best_epoch and early stopping: "val_loss" or "val_accuracy"


def compile_count() -> int:
    """Training and evaluation programs compiled in this process so far (all threads)."""
    return _epoch.compile_count()


def precision(dtype: str):
    """Context in which arrays of ``dtype`` really are that dtype.

    float64 needs jax's x64 mode; ``jax.enable_x64(True)`` turns it on for this
    thread only, so a float64 config trains in float64 even when x64 is not
    enabled globally. float32 leaves the setting alone (all our code is
    dtype-explicit).
    """
    return jax.enable_x64(True) if np.dtype(dtype) == np.float64 else contextlib.nullcontext()


def shape_plan(prepareds: Sequence) -> Dict[str, int]:
    """Common padding targets for several Prepared objects (one compiled program for all).

    Args:
      prepareds: Prepared objects that share task, mode, inputs and outputs but may
        differ in window (hence in numbers of windows and, rarely, rows).

    Returns:
      dict window (longest T), n_train, n_val (most windows), rows (most rows R):
      pass it as ``train(..., shapes=...)`` / ``evaluate(..., shapes=...)``.

    Example:
      >>> shapes = shape_plan([prepare(df, cfg.replace(window=w)) for w in (12, 24, 48)])
    """
    prepareds = list(prepareds)
    if not prepareds:
        raise ValueError("`prepareds` is empty; give at least one Prepared (from rnnkit.prepare)")
    return {"window": max(int(p.window) for p in prepareds),
            "n_train": max(len(p.starts["train"]) for p in prepareds),
            "n_val": max(len(p.starts["val"]) for p in prepareds),
            "rows": max(int(p.inputs.shape[0]) for p in prepareds)}


def _check_shapes(shapes, prepared) -> Dict[str, int]:
    """The padding targets, each at least the Prepared's own size."""
    own = shape_plan([prepared])
    if shapes is None:
        return own
    if not isinstance(shapes, dict):
        raise TypeError(f"`shapes` (={shapes!r}) must be a dict like shape_plan() returns, or None")
    unknown = sorted(set(shapes) - set(SHAPE_KEYS))
    if unknown:
        raise ValueError(f"`shapes` has unknown key(s) {unknown}; known keys are {list(SHAPE_KEYS)}")
    out = dict(own)
    for k, v in shapes.items():
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < own[k]:
            raise ValueError(f"`shapes[{k!r}]` (={v!r}) must be a whole number >= {own[k]}, this "
                             f"Prepared's own {k}; compute shapes with shape_plan() over every "
                             "Prepared of the sweep")
        out[k] = int(v)
    return out


def _round_up(n: int, m: int) -> int:
    return max(-(-n // m), 1) * m


def _series(prepared, dtype, shapes) -> _epoch.Series:
    """The whole series on the device, rows padded with zeros up to shapes['rows']."""
    extra = shapes["rows"] - prepared.inputs.shape[0]
    x = np.asarray(prepared.inputs, dtype=dtype)  # (R, I)
    # Several leads: row r holds the targets of rows r+1..r+L, read at the last input row.
    y = np.asarray(prepared.lead_targets())
    y = y.astype(np.int32) if prepared.classes is not None else y.astype(dtype)  # (R,) or (R, L*O)
    if extra:
        x = np.concatenate([x, np.zeros((extra,) + x.shape[1:], x.dtype)])
        y = np.concatenate([y, np.zeros((extra,) + y.shape[1:], y.dtype)])
    return _epoch.Series(*jax.device_put((x, y, np.asarray(shapes["window"] - prepared.window, np.int32),
                                          np.asarray(0 if prepared.leads > 1 else prepared.horizon,
                                                     np.int32))))


def _split(prepared, split: str, entries: int) -> _epoch.Split:
    """Starts and lengths of one split (numpy), padded with filler entries to ``entries``."""
    starts = np.asarray(prepared.starts[split], dtype=np.int64)
    n = len(starts)
    lengths = prepared.lengths.get(split) if prepared.lengths else None
    lengths = np.full(n, prepared.window) if lengths is None else np.asarray(lengths)
    s = np.zeros(entries, np.int32)
    s[:n] = starts
    ln = np.ones(entries, np.int32)
    ln[:n] = lengths
    return _epoch.Split(s, ln, np.asarray(n, np.int32))


def activation_index(activation) -> np.ndarray:
    """The int32 index of an activation name (or index) in ACTIVATIONS, as data."""
    if isinstance(activation, str):
        if activation not in ACTIVATIONS:
            raise ValueError(f"`activation` (={activation!r}) is unknown; use one of {ACTIVATIONS}")
        return np.asarray(ACTIVATIONS.index(activation), np.int32)
    if isinstance(activation, (int, np.integer)) and not isinstance(activation, bool) \
            and 0 <= int(activation) < len(ACTIVATIONS):
        return np.asarray(int(activation), np.int32)
    raise ValueError(f"`activation` (={activation!r}) must be a name in {ACTIVATIONS} or its index 0..3")


def initial_state(prepared, config: Config):
    """The training state ``train`` starts from: (params, opt_leaves, shuffling key), with
    ``opt_leaves`` the tuple ``jax.tree.leaves`` of optax's state for the optimizer.

    ``prepared`` needs ``n_inputs`` and ``net_outputs`` (outputs x leads; anything with
    only ``n_outputs`` is taken as one lead).

    One cached compiled program (``_epoch.init_program``) makes all of it; the
    seed, recurrent scale and optimizer hyperparameters are data.
    """
    dtype = np.dtype(config.dtype)
    name, clipping = program_key(config.optimizer, config.clip)
    if config.init not in INITS:
        raise ValueError(f"`config.init` (={config.init!r}) is unknown; use one of {INITS}")
    program = _epoch.init_program(optimizer=name, clipping=clipping, dtype=dtype, scheme=config.init,
                                  n_in=prepared.n_inputs, hidden=config.hidden,
                                  n_out=getattr(prepared, "net_outputs", prepared.n_outputs),
                                  cell=config.cell)
    hyper = hyperparams(config.optimizer, config.lr, config.clip, config.weight_decay, dtype)
    return program(np.asarray(config.seed, np.int32), np.asarray(config.recurrent_scale, dtype), hyper)


def initial_params(prepared, config: Config) -> dict:
    """The parameters ``train`` starts from (same key, same values), as jax arrays.

    The seed's key is split in two: the first half initialises, the second shuffles.
    """
    with precision(config.dtype):
        return initial_state(prepared, config)[0]


def _check_call(prepared, config, stop, on_epoch):
    if not isinstance(config, Config):
        raise TypeError(f"`config` must be an rnnkit.Config, got {type(config).__name__}")
    for name in ("task", "mode", "window"):
        mine, theirs = getattr(config, name), getattr(prepared.config, name)
        if mine != theirs:
            raise ValueError(f"`config.{name}` (={mine!r}) differs from the Prepared's (={theirs!r}); "
                             f"prepare the data with this config, or use {name}={theirs!r}")
    if len(prepared.starts["train"]) == 0:
        raise ValueError("the Prepared has no training windows; lower `window` or give more rows "
                         "to the training part of `split`")
    if stop is not None and not callable(getattr(stop, "is_set", None)):
        raise TypeError(f"`stop` (={stop!r}) must be a threading.Event (anything with .is_set()) or None")
    if on_epoch is not None and not callable(on_epoch):
        raise TypeError(f"`on_epoch` (={on_epoch!r}) must be a function of one dict, or None")


def train(prepared, config: Config, *, shapes: Optional[dict] = None, progress: bool = True,
          stop: Optional[threading.Event] = None,
          on_epoch: Optional[Callable[[dict], None]] = None) -> TrainOutcome:
    """Train a recurrent network (``config.cell``) on the training windows of ``prepared``.

    Each epoch: a fresh seeded shuffle of the training windows, minibatches of
    ``config.batch_size`` (the last one filled with zero-weight entries), one
    optax step each (``chain(clip_by_global_norm(clip), optimizer)``), then the
    validation loss of the new parameters. Early stopping watches that loss
    (the training loss when there are no validation windows) with
    ``config.patience``; with ``config.watch`` "metric", classification watches
    the validation accuracy instead (ties broken by the validation loss). The parameters returned are always those of the best
    epoch so far (lowest watched loss), also when all epochs ran.

    A non-finite training loss, gradient norm or validation loss ends
    training, without an exception, with status "diverged at epoch N"; the
    params are then the best finite ones before it (the initial ones if epoch 1
    diverged, best_epoch 0).
    Same config and seed on the same machine: bitwise the same outcome.

    Args:
      prepared: a Prepared from ``rnnkit.prepare`` (its task, mode and window
        must equal the config's).
      config: the model and training fields used here: hidden, activation, init,
        recurrent_scale, optimizer, lr, weight_decay, epochs, batch_size, clip,
        patience, seed, dtype, cell.
      shapes: padding targets from ``shape_plan`` (keys window, n_train, n_val,
        rows; any subset): runs of a sweep padded to the same shapes share one
        compiled program. Window padding is at the front with masked steps, so
        the result equals the unpadded run up to float rounding.
      progress: show a tqdm bar over epochs.
      stop: a threading.Event, checked after every epoch (so at least one epoch
        runs); when set, training ends with status "stopped by user at epoch N".
      on_epoch: called after every epoch with that epoch's history row as a dict.

    Returns:
      TrainOutcome(params, history, status, best_epoch, compiles, seconds).
      history columns: epoch (1-based); train_loss (mean of the minibatch losses
      over the epoch, weighted by loss terms, with the parameters as they were
      at each step); val_loss (after the epoch; NaN without validation windows);
      grad_norm (global gradient norm BEFORE clipping, mean over the epoch's
      steps); lr; seconds (wall time of the epoch, compile included).
    """
    _check_call(prepared, config, stop, on_epoch)
    t0 = time.perf_counter()
    compiles0 = _epoch.thread_compile_count()
    dims = _check_shapes(shapes, prepared)
    has_val = len(prepared.starts["val"]) > 0
    with precision(config.dtype):
        # 1. data on the device, initial state, the (cached) epoch program
        state, run = _setup(prepared, config, dims, uniform=_mask_free(prepared, config, shapes))
        # classification may watch validation accuracy (ties broken by the loss)
        watch_accuracy = config.watch == "metric" and config.task == "classification" and has_val
        y_val = prepared.targets[prepared.target_rows("val")] if watch_accuracy else None
        best = ((math.inf, math.inf) if watch_accuracy else math.inf, 0, state[0])  # (watched, epoch, params)
        rows, status = [], "ok"
        if progress:
            from tqdm.auto import tqdm  # on first use: it loads asyncio, which `import rnnkit` need not

            bar = tqdm(total=config.epochs, desc="training", unit="epoch", leave=False)
        else:
            bar = _NoBar()
        try:
            for epoch in range(1, config.epochs + 1):
                # 2. one epoch = one call of the compiled program, one host sync
                t_epoch = time.perf_counter()
                state, stats = run.program(state, run.series, run.train, run.val, run.act)
                stats = jax.device_get(stats)
                row = {"epoch": epoch, "train_loss": float(stats.train_loss),
                       "val_loss": float(stats.val_loss), "grad_norm": float(stats.grad_norm),
                       "lr": float(config.lr), "seconds": time.perf_counter() - t_epoch}
                rows.append(row)
                bar.update(1)
                bar.set_postfix(train=f"{row['train_loss']:.4g}", val=f"{row['val_loss']:.4g}")
                if on_epoch is not None:
                    on_epoch(dict(row))
                # 3. keep the best parameters; decide whether to go on
                score = None
                if watch_accuracy and bool(stats.finite):
                    score = (-_accuracy(state[0], prepared, shapes, y_val), row["val_loss"])
                best, status = _judge(row, bool(stats.finite), has_val, best, state[0],
                                      config.patience, stop, score)
                if status != "ok":
                    break
        finally:
            bar.close()
        params = {k: np.asarray(v) for k, v in jax.device_get(best[2]).items()}
    history = pd.DataFrame(rows, columns=list(HISTORY_COLUMNS))
    history["epoch"] = history["epoch"].astype(np.int64)
    return TrainOutcome(params, history, status, int(best[1]),
                        _epoch.thread_compile_count() - compiles0, time.perf_counter() - t0,
                        "val_accuracy" if watch_accuracy else ("val_loss" if has_val else "train_loss"))


class _NoBar:
    """What ``train`` asks of a progress bar, doing nothing (progress=False imports no tqdm)."""

    def update(self, n: int = 1) -> None:
        pass

    def set_postfix(self, **values) -> None:
        pass

    def close(self) -> None:
        pass


def _accuracy(params, prepared, shapes, y_val) -> float:
    """Share of validation targets (codes >= 0) whose largest logit is the true class."""
    logits = evaluate(params, prepared, "val", shapes=shapes)  # (N, C) or (N, T, C)
    ok = y_val >= 0
    return float((np.argmax(logits, axis=-1) == y_val)[ok].mean()) if ok.any() else math.nan


class _Run(NamedTuple):
    """Everything an epoch needs besides the training state."""

    program: Callable  # the cached jitted epoch function
    series: _epoch.Series
    train: _epoch.Split
    val: _epoch.Split
    act: jax.Array  # () int32 activation index


def _mask_free(prepared, config: Config, shapes) -> bool:
    """Whether ``train`` runs the mask-free epoch program: an unpadded run (no ``shapes``)
    whose training and validation windows all have full length, batch x hidden at most
    MASK_FREE_MAX."""
    if shapes is not None or config.batch_size * config.hidden > MASK_FREE_MAX:
        return False
    lengths = prepared.lengths or {}
    return all(lengths.get(s) is None or bool(np.all(np.asarray(lengths[s]) == prepared.window))
               for s in ("train", "val"))


def _setup(prepared, config: Config, dims: Dict[str, int], uniform: bool = False):
    """The initial state (params, opt_leaves, key) and the _Run for this call.

    ``uniform``: the run is not padded (no ``shapes``) and every window has full length,
    so the epoch program may run the recurrence without holding the state. Runs given
    ``shapes`` (sweeps, backtests) keep the masked program, which all of them share.
    """
    dtype = np.dtype(config.dtype)
    batch = config.batch_size
    val_batch = min(_epoch.eval_batch(dims["window"], config.hidden), _round_up(dims["n_val"], 16))
    train_split = _split(prepared, "train", _round_up(dims["n_train"], batch))
    val_split = _split(prepared, "val", _round_up(dims["n_val"], val_batch))
    state = initial_state(prepared, config)
    name, clipping = program_key(config.optimizer, config.clip)
    program = _epoch.epoch_program(task=config.task, mode=config.mode, optimizer=name,
                                   clipping=clipping, dtype=dtype, batch=batch,
                                   val_batch=val_batch, steps=dims["window"], cell=config.cell,
                                   uniform=uniform)
    return state, _Run(program, _series(prepared, dtype, dims),
                       *jax.device_put((train_split, val_split, activation_index(config.activation))))


def _judge(row: dict, finite: bool, has_val: bool, best: tuple, params, patience, stop, score=None):
    """After an epoch: the updated best (loss, epoch, params) and the status ("ok" = go on).

    Divergence is checked first (its parameters must never become the best),
    then improvement, then patience, then the user's stop.
    """
    epoch = row["epoch"]
    # score: (-accuracy, loss) when accuracy is watched (compared as a pair); else the loss
    watched = score if score is not None else (row["val_loss"] if has_val else row["train_loss"])
    numbers = (row["train_loss"], row["grad_norm"], *(watched if score is not None else (watched,)))
    if not (finite and all(math.isfinite(v) for v in numbers)):
        return best, f"diverged at epoch {epoch}"
    if watched < best[0]:
        best = (watched, epoch, params)
    elif patience is not None and epoch - best[1] >= patience:
        return best, f"stopped early at epoch {epoch}"
    if stop is not None and stop.is_set():
        return best, f"stopped by user at epoch {epoch}"
    return best, "ok"


def evaluate(params: dict, prepared, split: str, activation=None, *, shapes: Optional[dict] = None,
             batch_size: Optional[int] = None, cell: Optional[str] = None) -> np.ndarray:
    """Network outputs for every window of a split, in scaled units, batch by batch.

    Windows are gathered by index inside one compiled batch program, so memory
    grows with the series plus one batch, never with series x window. The
    program depends only on mode, window (after padding), rows, sizes and
    dtype, not on the split or its number of windows.

    Args:
      params: the cell's dict (``init_params``), numpy or jax arrays
        (their dtype is the compute dtype).
      prepared: the Prepared the windows come from.
      split: "train", "val" or "test".
      activation: name or index; None takes ``prepared.config.activation``.
      shapes: optional padding targets (``shape_plan``), to share the program
        of differently-windowed runs; the results do not change.
      batch_size: windows per batch; None picks one from window and hidden size.
      cell: "elman", "gru" or "lstm"; None takes ``prepared.config.cell``.

    Returns:
      numpy array in the params' dtype: many-to-one (N, O) (with L leads (N, L*O),
      lead-major: ``reshape(N, L, O)``), many-to-many (N, T, O),
      in window order (``prepared.starts[split]``), T the Prepared's own window.
      Regression: scaled predictions (``prepared.scaler.inverse_targets`` maps
      them back); classification: logits (argmax for the class code).
    """
    if split not in ("train", "val", "test"):
        raise ValueError(f"`split` (={split!r}) must be 'train', 'val' or 'test'")
    act = activation_index(prepared.config.activation if activation is None else activation)
    dtype = np.dtype(np.asarray(params["U"]).dtype)
    dims = _check_shapes(shapes, prepared)
    hidden = int(np.shape(params["V"])[0])
    if batch_size is None:
        batch_size = _epoch.eval_batch(dims["window"], hidden)
    elif isinstance(batch_size, bool) or not isinstance(batch_size, (int, np.integer)) or batch_size < 1:
        raise ValueError(f"`batch_size` (={batch_size!r}) must be a whole number >= 1 or None")
    mode = prepared.config.mode
    n = len(prepared.starts[split])
    with precision(dtype.name):
        series = _series(prepared, dtype, dims)
        whole = _split(prepared, split, _round_up(n, batch_size))
        p = jax.device_put({k: np.asarray(v, dtype) for k, v in params.items()})
        program = _epoch.outputs_program(mode=mode, steps=dims["window"],
                                         cell=prepared.config.cell if cell is None else cell)
        parts = []
        for at in range(0, n, batch_size):
            valid = at + np.arange(batch_size) < n  # (batch,)
            o = program(p, series, whole.starts[at:at + batch_size],
                        whole.lengths[at:at + batch_size], valid, act)
            parts.append(np.asarray(o)[:min(batch_size, n - at)])
    out_shape = (0, prepared.net_outputs) if mode == "many-to-one" else \
        (0, dims["window"], prepared.net_outputs)
    out = np.concatenate(parts) if parts else np.zeros(out_shape, dtype)
    if mode == "many-to-many":
        out = out[:, dims["window"] - prepared.window:]  # drop the front padding
    return out
