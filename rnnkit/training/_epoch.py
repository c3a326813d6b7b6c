"""The compiled programs of training: one epoch, and the outputs of a batch of windows.

Windows are never materialised. The whole scaled series lives on the device
once, as ``Series.inputs (R, I)`` and ``Series.targets``; a batch is gathered
by index inside the program (``inputs[starts[:, None] + arange(T)]``), so the
memory grows with the series, not with series x window.

One epoch is ONE program: a shuffle, a ``lax.while_loop`` over the minibatches
(each one gather + loss + fast BPTT + optax update), then a batched pass for the
validation loss. A while loop rather than a scan: its trip count is data, so
batches made only of fillers (added when a sweep pads the number of windows)
cost nothing, and the loop ends at the first non-finite step.

Everything that may differ between runs of a sweep without changing the
program is data: the activation (its index), the learning rate
and other hyperparameters (in the optimizer state), the seed (in the key), the
real window length (front padding), the horizon and the numbers of windows.
Programs are cached at module level by what does change them, and every trace
bumps a counter (``compile_count``).
"""
from __future__ import annotations

import threading
from functools import partial
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax
from jax.flatten_util import ravel_pytree

from ..recurrent._cells import init_traceable
from ..recurrent._model import loss as model_loss
from ..recurrent._model import loss_counted as model_loss_counted
from ..recurrent._model import outputs as model_outputs
from ._optim import hyperparams, make_optimizer
from ._stored import StoredProgram

# Elements of one (batch, window, hidden) state array in an evaluation batch. Measured
# here: forward passes slow down 2-5x once that array outgrows the CPU caches (a few MiB);
# 2**19 floats (2 MiB in float32) keeps the products large and the states cached.
_EVAL_ELEMENTS = 2 ** 19

# XLA compile options of every program here. LLVM's level 1 instead of the default 3:
# measured here, the epoch program compiled in 4.4 s instead of 5.6 s (the initial-state
# program 1.0 s instead of 1.6 s) and ran as fast. Neither level uses fast-math: the
# initial state is the same bit for bit, training the same to rounding (a sum may be
# vectorised differently; bit for bit at the default config). tests/test_init_program.py.
_COMPILER_OPTIONS = {"xla_backend_optimization_level": 1}

_LOCK = threading.Lock()
_TOTAL = [0]  # programs traced in this process
_LOCAL = threading.local()  # .count: programs traced by this thread
_CACHE = {}  # static key -> jitted function


class Series(NamedTuple):
    """The whole scaled series on the device, plus the window geometry (all data)."""

    inputs: jax.Array  # (R, I) float
    targets: jax.Array  # regression (R, O) float; classification (R,) int32
    pad: jax.Array  # () int32: front padding steps, program window minus real window
    horizon: jax.Array  # () int32: rows between the last input and its target


class Split(NamedTuple):
    """The windows of one split; the first ``n`` entries are real, the rest padding."""

    starts: jax.Array  # (N,) int32 first input row of each window
    lengths: jax.Array  # (N,) int32 real steps of each window (T unless window="full")
    n: jax.Array  # () int32 number of real windows


def _count_trace():
    # Runs once per trace, i.e. once per compiled program.
    with _LOCK:
        _TOTAL[0] += 1
    _LOCAL.count = getattr(_LOCAL, "count", 0) + 1


def compile_count() -> int:
    """Training and evaluation programs compiled (traced) in this process so far."""
    return _TOTAL[0]


def thread_compile_count() -> int:
    """Programs compiled by the calling thread so far (traces run in the caller's thread)."""
    return getattr(_LOCAL, "count", 0)


def eval_batch(steps: int, hidden: int) -> int:
    """Windows per evaluation batch: a power of two keeping (batch, T, H) near 2**19 elements."""
    b = max(_EVAL_ELEMENTS // max(steps * hidden, 1), 16)
    return int(min(2 ** int(np.log2(b)), 2048))


def gather(series: Series, starts, lengths, valid, *, steps: int, mode: str):
    """Gather a batch of windows from the series, with its mask.

    A window of real length L placed in a program window of ``steps`` steps
    starts with ``series.pad`` padded steps (front padding, from bucketing the
    window) and ends with ``steps - pad - L`` padded steps (end padding, for
    whole sequences shorter than the longest). Padded steps hold the state, so
    neither changes the result.

    Args:
      series: the whole series.
      starts, lengths: (B,) int32 first row and real length of each window.
      valid: (B,) bool; False marks a zero-weight filler entry (all steps padding).
      steps: program window length (static).
      mode: "many-to-one" or "many-to-many" (static).

    Returns:
      x (B, steps, I), y ((B, O) or (B,) many-to-one; (B, steps, O) or (B, steps)
      many-to-many), mask (B, steps) bool.
    """
    last_row = series.inputs.shape[0] - 1
    rel = jnp.arange(steps, dtype=jnp.int32)[None, :] - series.pad  # (1, steps) step in the window
    rows = starts[:, None] + rel  # (B, steps)
    mask = (rel >= 0) & (rel < lengths[:, None]) & valid[:, None]  # (B, steps)
    x = jnp.take(series.inputs, jnp.clip(rows, 0, last_row), axis=0)  # (B, steps, I)
    x = jnp.where(mask[:, :, None], x, jnp.zeros_like(x))
    if mode == "many-to-one":
        target_rows = starts + lengths - 1 + series.horizon  # (B,)
    else:
        target_rows = rows + series.horizon  # (B, steps)
    y = jnp.take(series.targets, jnp.clip(target_rows, 0, last_row), axis=0)
    return x, y, mask


def _terms(mask, valid, mode, dtype):
    """Number of loss terms the model counts in a batch (its mean is over these)."""
    n = jnp.sum(valid) if mode == "many-to-one" else jnp.sum(mask)
    return n.astype(dtype)


def _split_loss(params, series, split, act, *, task, mode, steps, batch, cell, uniform=False):
    """Mean loss over the real windows of a split, in batches; NaN when it has none.

    ``uniform``: every real window has the program's full length (see ``epoch_program``).
    """
    dtype = params["W"].dtype
    loss_fn = model_loss_counted if uniform else model_loss
    n_batches = (split.n + batch - 1) // batch

    def body(carry):
        i, total, count = carry
        at = i * batch
        valid = at + jnp.arange(batch, dtype=jnp.int32) < split.n  # (batch,)
        starts = lax.dynamic_slice(split.starts, (at,), (batch,))
        lengths = lax.dynamic_slice(split.lengths, (at,), (batch,))
        x, y, mask = gather(series, starts, lengths, valid, steps=steps, mode=mode)
        value = loss_fn(params, x, y, activation=act, task=task, mode=mode, mask=mask, cell=cell)
        c = _terms(mask, valid, mode, dtype)
        return i + 1, total + value * c, count + c

    zero = jnp.zeros((), dtype)
    _, total, count = lax.while_loop(lambda c: c[0] < n_batches, body,
                                     (jnp.zeros((), jnp.int32), zero, zero))
    return jnp.where(count > 0, total / jnp.maximum(count, 1), jnp.full((), jnp.nan, dtype))


def _shuffle(key, n_entries: int, n):
    """A random order of the first ``n`` entries, followed by the fillers in place.

    Entry i draws its random number from ``fold_in(key, i)``, which does not
    depend on how many entries there are, so padding the number of windows
    leaves the order of the real ones unchanged (whatever the global
    ``jax_threefry_partitionable`` setting).
    """
    pos = jnp.arange(n_entries, dtype=jnp.int32)
    draw = lambda i: jax.random.bits(jax.random.fold_in(key, i), (), jnp.uint32)
    bits = jax.vmap(draw)(pos) >> 1  # (n_entries,) below 2**31
    return stable_order(bits, n)  # (n_entries,)


def stable_order(bits, n):
    """``argsort(where(pos < n, bits, 0xFFFFFFFF), stable=True)`` for bits below 2**31.

    XLA's CPU sort of one uint32 array is fast, a sort carrying the positions along
    is not (measured at 12,288 entries: 0.4 against 2.1 ms; this whole function 1.0
    against 2.5 ms for the argsort it replaces). So: sort the values alone,
    and each real entry's place is the number of smaller values (a binary search);
    fillers keep their places at the end. Equal values (about 3% of epochs at 12,000
    windows) would collide: then the stable argsort itself runs.
    """
    pos = jnp.arange(bits.shape[0], dtype=jnp.int32)
    bits = jnp.where(pos < n, bits, jnp.full_like(bits, 0xFFFFFFFF))  # fillers sort last
    ordered = lax.sort(bits)  # (N,)
    tie = jnp.any((ordered[1:] == ordered[:-1]) & (pos[1:] < n))
    place = jnp.where(pos < n, jnp.searchsorted(ordered, bits, side="left").astype(jnp.int32), pos)
    by_place = jnp.zeros_like(pos).at[place].set(pos, unique_indices=True)
    return lax.cond(tie, lambda: jnp.argsort(bits, stable=True).astype(jnp.int32), lambda: by_place)


class EpochStats(NamedTuple):
    train_loss: jax.Array  # () mean of the minibatch losses over the epoch's loss terms
    grad_norm: jax.Array  # () mean over the epoch's steps of the global norm before clipping
    val_loss: jax.Array  # () validation loss after the epoch; NaN without validation windows
    steps: jax.Array  # () int32 optimizer steps taken
    finite: jax.Array  # () bool: every loss and gradient norm was finite


def _build_epoch(task, mode, optimizer, clipping, dtype, batch, val_batch, steps, cell, uniform):
    import optax  # loaded by the first training, not by `import rnnkit` (about 0.1 s)

    # A placeholder value for each hyperparameter: updates read the real ones from the state.
    opt = make_optimizer(optimizer, clipping, dtype)(
        **hyperparams(optimizer, 1.0, 1.0 if clipping else None, 0.0, dtype))

    def epoch(state, series: Series, train: Split, val: Split, act):
        _count_trace()
        params, opt_leaves, key = state
        opt_state = jax.tree.unflatten(jax.tree.structure(jax.eval_shape(opt.init, params)), opt_leaves)
        key, sub = jax.random.split(key)
        order = _shuffle(sub, train.starts.shape[0], train.n)
        n_batches = (train.n + batch - 1) // batch

        # Uniform windows: the mask only marks the fillers of the last minibatch, whose terms
        # count zero, so the recurrence needs no per-step select (measured 3% of the epoch
        # at the default fit's shape, benchmarks/bench_epoch.py).
        fn = model_loss_counted if uniform else model_loss

        def loss_fn(p, x, y, mask):
            return fn(p, x, y, activation=act, task=task, mode=mode, mask=mask, cell=cell)

        # The optimizer works on ONE vector of all parameters (and its state likewise): the
        # same elementwise arithmetic as leaf by leaf, in a few operations per step instead
        # of a few per leaf (the global norm sums in another order: equal to rounding).
        flat, unravel = ravel_pytree(params)
        like = lambda t: jax.tree.structure(t) == jax.tree.structure(params)  # noqa: E731
        flat_opt = jax.tree.map(lambda t: ravel_pytree(t)[0] if like(t) else t, opt_state,
                                is_leaf=like)

        def body(carry):
            i, flat, opt_state, total, count, norms, finite = carry
            at = i * batch
            valid = at + jnp.arange(batch, dtype=jnp.int32) < train.n  # (batch,)
            idx = lax.dynamic_slice(order, (at,), (batch,))  # (batch,)
            x, y, mask = gather(series, train.starts[idx], train.lengths[idx], valid,
                                steps=steps, mode=mode)
            value, grads = jax.value_and_grad(loss_fn)(unravel(flat), x, y, mask)
            grads = ravel_pytree(grads)[0]
            norm = optax.tree.norm(grads)  # before clipping
            updates, opt_state = opt.update(grads, opt_state, flat)
            flat = optax.apply_updates(flat, updates)
            c = _terms(mask, valid, mode, dtype)
            finite = finite & jnp.isfinite(value) & jnp.isfinite(norm)
            return i + 1, flat, opt_state, total + value * c, count + c, norms + norm, finite

        zero = jnp.zeros((), dtype)
        init = (jnp.zeros((), jnp.int32), flat, flat_opt, zero, zero, zero, jnp.ones((), bool))
        # Stop at the first non-finite step: the rest of the epoch cannot recover.
        i, flat, flat_opt, total, count, norms, finite = lax.while_loop(
            lambda c: (c[0] < n_batches) & c[-1], body, init)
        params = unravel(flat)
        opt_state = jax.tree.map(lambda t, f: unravel(f) if like(t) else f, opt_state, flat_opt,
                                 is_leaf=like)
        val_loss = _split_loss(params, series, val, act, task=task, mode=mode,
                               steps=steps, batch=val_batch, cell=cell, uniform=uniform)
        stats = EpochStats(total / jnp.maximum(count, 1), norms / jnp.maximum(i, 1).astype(dtype),
                           val_loss, i, finite)
        return (params, tuple(jax.tree.leaves(opt_state)), key), stats

    return jax.jit(epoch, compiler_options=_COMPILER_OPTIONS)


def epoch_program(*, task, mode, optimizer, clipping, dtype, batch, val_batch, steps, cell="elman",
                  uniform=False):
    """The cached jitted epoch function for these static choices.

    ``f(state, series, train, val, act) -> (state, EpochStats)`` with state
    (params, opt_leaves, key), ``opt_leaves`` the tuple ``jax.tree.leaves`` of the
    optimizer's state (see ``init_program``), and ``act`` the int32 activation index. Array
    shapes (rows, features, outputs, hidden, numbers of windows) are the only
    other things that trigger a new compile. ``cell`` is static: one program per cell.
    ``uniform`` (static): every real window of both splits has ``steps`` steps (no
    front or end padding), so the recurrence runs without holding the state; the
    caller promises it (``_train`` passes True only for an unpadded run).
    """
    key = ("epoch", task, mode, optimizer, bool(clipping), np.dtype(dtype).name,
           int(batch), int(val_batch), int(steps), str(cell), bool(uniform))
    with _LOCK:
        if key not in _CACHE:
            _CACHE[key] = StoredProgram(
                partial(_build_epoch, task, mode, optimizer, bool(clipping), np.dtype(dtype), int(batch),
                        int(val_batch), int(steps), str(cell), bool(uniform)), key)
        return _CACHE[key]


def _build_init(optimizer, clipping, dtype, scheme, n_in, hidden, n_out, cell):
    factory = make_optimizer(optimizer, clipping, dtype)

    def init(seed, scale, hyper):
        # The seed's key is split in two: the first half initialises, the second shuffles.
        k_init, k_shuffle = jax.random.split(jax.random.key(seed))
        params = init_traceable(cell, k_init, n_in, hidden, n_out, scheme, scale, dtype)
        return params, tuple(jax.tree.leaves(factory(**hyper).init(params))), k_shuffle

    return jax.jit(init, compiler_options=_COMPILER_OPTIONS)


def init_program(*, optimizer, clipping, dtype, scheme, n_in, hidden, n_out, cell="elman"):
    """The cached jitted ``f(seed, scale, hyper) -> (params, opt_leaves, key)``.

    ``opt_leaves`` is the tuple of leaves of optax's state, not the state itself:
    the trees at a program's edge are pickled with a program kept whole, and
    optax's classes in them would make loading it import optax (0.07 s of a
    fresh process's first fit); the epoch program rebuilds the state inside.

    The initial training state as ONE compiled program: done op by op, its
    ~30 small eager operations each compiled once per process (about 1.5 s).
    Seed (() int32), recurrent scale and the optimizer's hyperparameters
    (``_optim.hyperparams``) are data; the init scheme is static (each scheme
    compiles only its own draw); ``key`` is the shuffling key. Not counted by
    ``compile_count`` (it is no training or evaluation program).
    """
    key = ("init", optimizer, bool(clipping), np.dtype(dtype).name, str(scheme), int(n_in),
           int(hidden), int(n_out), str(cell))
    with _LOCK:
        if key not in _CACHE:
            _CACHE[key] = StoredProgram(partial(_build_init, optimizer, bool(clipping), np.dtype(dtype),
                                                str(scheme), int(n_in), int(hidden), int(n_out),
                                                str(cell)), key)
        return _CACHE[key]


def _build_outputs(mode, steps, cell):
    def run(params, series: Series, starts, lengths, valid, act):
        _count_trace()
        x, _, mask = gather(series, starts, lengths, valid, steps=steps, mode=mode)
        o = model_outputs(params, x, activation=act, mask=mask, cell=cell)  # (B, steps, O)
        # Many-to-one: the last step; padded steps after the real end held the state.
        return o[:, -1] if mode == "many-to-one" else o

    return jax.jit(run, compiler_options=_COMPILER_OPTIONS)


def outputs_program(*, mode, steps, cell="elman"):
    """The cached jitted ``f(params, series, starts, lengths, valid, act) -> outputs``.

    Returns (B, O) for many-to-one, (B, steps, O) for many-to-many (raw outputs:
    logits for classification), for one batch of B windows.
    """
    key = ("outputs", mode, int(steps), str(cell))
    with _LOCK:
        if key not in _CACHE:
            _CACHE[key] = StoredProgram(partial(_build_outputs, mode, int(steps), str(cell)), key)
        return _CACHE[key]
