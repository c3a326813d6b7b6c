"""The recurrent network as pure JAX functions: states, outputs, loss, class predictions.

    Elman:  a_t = x_t U + h_{t-1} V + b,   h_t = phi(a_t),   o_t = h_t W + c

``cell="gru"`` or ``"lstm"`` swaps the state update for a gated cell
(``_cells.gru_step``, ``_cells.lstm_step``; layouts in ``init_params``); the
output layer o_t = h_t W + c is the same for every cell.

Batch-major at the surface (xs (B, T, I) or (T, I)), time-major inside the
scan. ``activation`` is either a name (static: one program per name) or an
integer scalar array, the index into ``ACTIVATIONS`` (data: ONE program serves
every activation; ``lax.switch`` picks a whole scan, so the scan body itself
has no branch).

Mask: a False step is padding; the state is held across it (h_t = h_{t-1})
and it adds no loss term. Many-to-one uses the output at the last step.

``loss`` differentiates through ``_scan.states_fast`` (custom VJP, fast BPTT;
``_scan.last_state_fast`` for a many-to-one loss) for Elman and through
``_gated.states_fast`` for the gated cells;
``_hidden_states_autodiff`` keeps the plain autodiff scan for tests and benchmarks.
"""
from __future__ import annotations

from typing import NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

from . import _scan
from . import _gated
from ._names import ACTIVATIONS, MODES, TASKS
from ._cells import GATE_BLOCKS, get_activation, get_cell

_PARAM_SHAPES = {"U": "(I, H)", "V": "(H, H)", "b": "(H,)", "W": "(H, O)", "c": "(O,)"}
_LAYOUT = {  # what each cell's dict holds, for error messages
    "elman": "U (I, H), V (H, H), b (H,), W (H, O), c (O,)",
    "gru": "U (I, 3H), V (H, 3H), b (3H,), bn (H,), W (H, O), c (O,)",
    "lstm": "U (I, 4H), V (H, 4H), b (4H,), W (H, O), c (O,)",
}


class _Inputs(NamedTuple):
    """Checked, time-major, batched inputs of one call."""

    params: dict  # the cell's dict (init_params), all of `dtype`
    xs: jax.Array  # (T, B, I)
    mask: Optional[jax.Array]  # (T, B, 1) bool, or None
    h0: jax.Array  # (B, H)
    batched: bool  # False when the caller gave xs (T, I)


def _is_traced(x) -> bool:
    return isinstance(x, jax.core.Tracer)


def _as_array(name, x):
    """x as a jax array; TypeError naming `name` for anything but numbers and bools."""
    if isinstance(x, jax.Array):
        return x
    a = np.asarray(x)
    if a.dtype.kind not in "biuf":
        raise TypeError(f"`{name}` has dtype {a.dtype}; expected numbers (a float or int array)")
    return jnp.asarray(a)


def _float_dtype(arrays):
    """float64 when any input is float64, else float32 (never the default dtype)."""
    return jnp.float64 if any(jnp.asarray(a).dtype == jnp.float64 for a in arrays) else jnp.float32


def _check_params(params, cell="elman"):
    names = get_cell(cell).param_names
    if not isinstance(params, dict):
        raise TypeError(f"`params` must be a dict with keys {', '.join(names)}; "
                        f"got {type(params).__name__}")
    missing = [k for k in names if k not in params]
    if missing:
        raise ValueError(f"`params` lacks {missing}; cell={cell!r} needs {_LAYOUT[cell]} "
                         "(make them with rnnkit.init_params(..., cell=...))")
    extra = sorted(set(params) - set(names))
    if extra:
        raise ValueError(f"`params` holds {extra}, which cell={cell!r} does not use; it needs "
                         f"{_LAYOUT[cell]}: pass the cell the params were made for as `cell=`")
    p = {k: _as_array(f"params['{k}']", params[k]) for k in names}
    k = len(GATE_BLOCKS[cell])
    if p["U"].ndim != 2 or p["U"].shape[1] % k:
        want = "(I, H)" if k == 1 else f"(I, {k}H)"
        raise ValueError(f"`params['U']` has shape {p['U'].shape}; expected {want} for cell={cell!r}")
    n_in, n_hid = p["U"].shape[0], p["U"].shape[1] // k
    if p["W"].ndim != 2:
        raise ValueError(f"`params['W']` has shape {p['W'].shape}; expected (H, O) with H = {n_hid}")
    n_out = p["W"].shape[1]
    expected = {"V": (n_hid, k * n_hid), "b": (k * n_hid,), "W": (n_hid, n_out), "c": (n_out,)}
    if cell == "gru":
        expected["bn"] = (n_hid,)
    for name, shape in expected.items():
        if p[name].shape != shape:
            raise ValueError(f"`params['{name}']` has shape {p[name].shape}; expected {shape} "
                             f"for cell={cell!r}, I = {n_in}, H = {n_hid}, O = {n_out} "
                             f"(the layout: {_LAYOUT[cell]})")
    for name, v in p.items():
        if not jnp.issubdtype(v.dtype, jnp.floating):
            raise TypeError(f"`params['{name}']` has dtype {v.dtype}; expected a float dtype")
    return p


def _prepare(params, xs, mask, h0, cell="elman") -> _Inputs:
    """Check every array argument and bring it to the time-major batched form."""
    p = _check_params(params, cell)
    n_in, n_hid = p["U"].shape[0], p["V"].shape[0]
    xs = _as_array("xs", xs)
    if xs.ndim not in (2, 3):
        raise ValueError(f"`xs` has shape {xs.shape}; expected (T, I) or (B, T, I) with I = {n_in}")
    if xs.shape[-1] != n_in:
        raise ValueError(f"`xs` has shape {xs.shape} with {xs.shape[-1]} features, but params['U'] "
                         f"has shape {p['U'].shape} for I = {n_in}; give xs (..., T, {n_in}) "
                         "or make params for this many inputs")
    if xs.shape[-2] < 1:
        raise ValueError(f"`xs` has shape {xs.shape}: no time steps; expected T >= 1")
    batched = xs.ndim == 3
    dtype = _float_dtype(list(p.values()) + [xs])
    p = {k: v.astype(dtype) for k, v in p.items()}
    xb = (xs if batched else xs[None]).astype(dtype)  # (B, T, I)
    B, T, _ = xb.shape
    if mask is not None:
        mask = _as_array("mask", mask)
        want = (B, T) if batched else (T,)
        if mask.shape != want:
            raise ValueError(f"`mask` has shape {mask.shape}; expected {want} like xs {xs.shape} "
                             "without the feature axis")
        if mask.dtype != jnp.bool_:
            if not jnp.issubdtype(mask.dtype, jnp.integer):
                raise TypeError(f"`mask` has dtype {mask.dtype}; expected bool (True = a real step)")
            mask = mask != 0
        mb = mask if batched else mask[None]  # (B, T)
        mask = jnp.swapaxes(mb, 0, 1)[:, :, None]  # (T, B, 1)
    if h0 is None:
        h0 = jnp.zeros((B, n_hid), dtype)
    else:
        h0 = _as_array("h0", h0)
        if h0.shape == (n_hid,):
            h0 = jnp.broadcast_to(h0[None], (B, n_hid))
        elif h0.shape != (B, n_hid) or not batched:
            raise ValueError(f"`h0` has shape {h0.shape}; expected ({n_hid},) or, with batched xs, "
                             f"({B}, {n_hid})")
        h0 = h0.astype(dtype)
    return _Inputs(p, jnp.swapaxes(xb, 0, 1), mask, h0, batched)


def _resolve_activation(activation):
    """A name (static) or an int32 scalar array (data)."""
    if isinstance(activation, str):
        get_activation(activation)
        return activation
    if isinstance(activation, (int, np.integer)) and not isinstance(activation, bool):
        if not 0 <= int(activation) < len(ACTIVATIONS):
            raise ValueError(f"`activation` index (={int(activation)}) is out of range; use 0..3 "
                             f"for {ACTIVATIONS}")
        return ACTIVATIONS[int(activation)]
    if isinstance(activation, (jax.Array, np.ndarray)) and activation.ndim == 0 \
            and jnp.issubdtype(activation.dtype, jnp.integer):
        if not _is_traced(activation):
            return _resolve_activation(int(activation))
        return activation.astype(jnp.int32)
    raise TypeError(f"`activation` (={activation!r}) must be a name in {ACTIVATIONS} "
                    "or an integer scalar (its index)")


def _states(inp: _Inputs, act, fast: bool, cell: str = "elman"):
    """Hidden states (T, B, H); a traced activation index switches around the whole scan."""
    p = inp.params
    if cell == "elman":
        fn = _scan.states_fast if fast else _scan.states_autodiff
        args = (inp.xs, p["U"], p["V"], p["b"], inp.h0, inp.mask)
    else:
        gated = _gated.states_fast if fast else _gated.states_autodiff
        fn = lambda name, *a: gated(cell, name, *a)  # noqa: E731
        args = (inp.xs, p, inp.h0, inp.mask)
    if isinstance(act, str):
        return fn(act, *args)
    branches = [lambda a, name=name: fn(name, *a) for name in ACTIVATIONS]
    return lax.switch(act, branches, args)


def _last_state(inp: _Inputs, act):
    """The Elman state after the last step (B, H), through ``_scan.last_state_fast``."""
    p = inp.params
    args = (inp.xs, p["U"], p["V"], p["b"], inp.h0, inp.mask)
    if isinstance(act, str):
        return _scan.last_state_fast(act, *args)
    branches = [lambda a, name=name: _scan.last_state_fast(name, *a) for name in ACTIVATIONS]
    return lax.switch(act, branches, args)


def _project_out(h, p):
    """o = h W + c over the leading axes of h (..., H) -> (..., O)."""
    o = _scan.times(h, p["W"]) if h.ndim == 3 else h @ p["W"]
    return o + p["c"].reshape((1,) * (h.ndim - 1) + p["c"].shape)


def _to_surface(a, batched):
    """Time-major (T, B, ...) back to (B, T, ...) or (T, ...)."""
    return jnp.swapaxes(a, 0, 1) if batched else a[:, 0]


def hidden_states(params, xs, *, activation="tanh", h0=None, mask=None, cell="elman"):
    """The state h_t after every step.

    Args:
      params: dict U (I, H), V (H, H), b (H,), W (H, O), c (O,) for Elman; the
        gated cells' layouts are in ``init_params``.
      xs: inputs (B, T, I) or (T, I).
      activation: a name in ACTIVATIONS, or its index as an integer (scalar array);
        for gated cells the candidate (and LSTM cell-output) nonlinearity.
      h0: initial state (H,) or (B, H); zeros when None (an LSTM's c starts at zero).
      mask: (B, T) or (T,) bool; a False step holds the state (h and c).
      cell: "elman" (default), "gru" or "lstm".

    Returns:
      (B, T, H) or (T, H).
    """
    act = _resolve_activation(activation)
    inp = _prepare(params, xs, mask, h0, cell)
    return _to_surface(_states(inp, act, True, cell), inp.batched)


def _hidden_states_autodiff(params, xs, *, activation="tanh", h0=None, mask=None, cell="elman"):
    """``hidden_states`` whose gradient is plain autodiff of the scan (tests, benchmarks)."""
    act = _resolve_activation(activation)
    inp = _prepare(params, xs, mask, h0, cell)
    return _to_surface(_states(inp, act, False, cell), inp.batched)


def outputs(params, xs, *, activation="tanh", h0=None, mask=None, cell="elman"):
    """The output o_t = h_t W + c after every step (raw: logits for classification).

    Args: as ``hidden_states``.

    Returns:
      (B, T, O) or (T, O).
    """
    act = _resolve_activation(activation)
    inp = _prepare(params, xs, mask, h0, cell)
    hs = _states(inp, act, True, cell)  # (T, B, H)
    return _to_surface(_project_out(hs, inp.params), inp.batched)



def _check_choice(name, value, choices):
    if not isinstance(value, str) or value not in choices:
        raise ValueError(f"`{name}` (={value!r}) is unknown; use one of "
                         + ", ".join(repr(c) for c in choices))


def _prepare_targets(ys, inp: _Inputs, task, mode):
    """Check ys against task and mode; return them batched (time-major for many-to-many)."""
    T, B, _ = inp.xs.shape
    n_out = inp.params["W"].shape[1]
    ys = _as_array("ys", ys)
    lead = {"many-to-one": (B,), "many-to-many": (B, T)}[mode]
    lead = lead if inp.batched else lead[1:]
    want = lead + (n_out,) if task == "regression" else lead
    if ys.shape != want:
        what = "(B, O)" if mode == "many-to-one" else "(B, T, O)"
        if task == "classification":
            what = "(B,) integer labels" if mode == "many-to-one" else "(B, T) integer labels"
        raise ValueError(f"`ys` has shape {ys.shape}; task={task!r}, mode={mode!r} with xs "
                         f"{(B, T) if inp.batched else (T,)} + features and O = {n_out} expects "
                         f"{want}, i.e. {what}" + ("" if inp.batched else " without the batch axis"))
    if task == "regression":
        if not (jnp.issubdtype(ys.dtype, jnp.floating) or jnp.issubdtype(ys.dtype, jnp.integer)):
            raise TypeError(f"`ys` has dtype {ys.dtype}; regression targets must be numbers")
        ys = ys.astype(inp.params["W"].dtype)
    elif not jnp.issubdtype(ys.dtype, jnp.integer):
        raise TypeError(f"`ys` has dtype {ys.dtype}; classification needs integer labels 0..{n_out - 1} "
                        "(convert with .astype(int))")
    if not inp.batched:
        ys = ys[None]
    if mode == "many-to-many":
        ys = jnp.swapaxes(ys, 0, 1)  # (T, B, ...)
    return ys


def _check_labels(ys, w, n_out):
    """Labels of counted terms must lie in 0..O-1 (checked only on concrete values)."""
    if _is_traced(ys) or (w is not None and _is_traced(w)):
        return
    y = np.asarray(ys)
    if w is not None:
        y = y[np.asarray(w)]
    if y.size and (y.min() < 0 or y.max() >= n_out):
        bad = y[(y < 0) | (y >= n_out)]
        raise ValueError(f"`ys` holds label(s) {sorted(set(bad.tolist()))[:5]} outside 0..{n_out - 1}; "
                         f"params['W'] has O = {n_out} outputs, one per class; encode the labels as "
                         f"0..{n_out - 1} or make params with more outputs")


def _mean_over(terms, w):
    """Mean of `terms` over counted entries (w True); 0 when nothing counts."""
    if w is None:
        return jnp.mean(terms)
    total = jnp.sum(jnp.where(w, terms, jnp.zeros_like(terms)))
    return total / jnp.maximum(jnp.sum(w), 1).astype(terms.dtype)


def _loss_impl(params, xs, ys, activation, task, mode, mask, h0, fast, cell="elman", hold=True):
    _check_choice("task", task, TASKS)
    _check_choice("mode", mode, MODES)
    act = _resolve_activation(activation)
    inp = _prepare(params, xs, mask, h0, cell)
    y = _prepare_targets(ys, inp, task, mode)
    counted = inp  # its mask says which terms count
    if not hold:
        inp = inp._replace(mask=None)  # the recurrence runs every step of every row
    n_out = inp.params["W"].shape[1]
    if mode == "many-to-many":
        hs = _states(inp, act, fast, cell)  # (T, B, H)
        o = _project_out(hs, inp.params)  # (T, B, O)
        w = None if counted.mask is None else counted.mask[:, :, 0]  # (T, B)
    else:
        # The last step; padding held the state. Elman's fast path may carry only that state.
        B, H = inp.h0.shape
        by_last = fast and cell == "elman" and B * H <= _scan.LAST_STATE_MAX
        last = _last_state(inp, act) if by_last else _states(inp, act, fast, cell)[-1]
        o = _project_out(last, inp.params)  # (B, O)
        # A sequence counts when any of its steps is real (all-padding rows fill batches).
        w = None if counted.mask is None else jnp.any(counted.mask[:, :, 0], axis=0)  # (B,)
    if task == "classification":
        _check_labels(y, w, n_out)
    if w is not None:
        # Padded targets may hold NaN or -1; zero them so that no NaN reaches a gradient.
        wy = w if task == "classification" else w[..., None]
        y = jnp.where(wy, y, jnp.zeros_like(y))
    if task == "regression":
        terms = jnp.mean(jnp.square(o - y), axis=-1)  # (T, B) or (B,)
    else:
        logz = jax.nn.logsumexp(o, axis=-1)
        picked = jnp.take_along_axis(o, y[..., None].astype(jnp.int32), axis=-1)[..., 0]
        terms = logz - picked  # softmax cross-entropy
    return _mean_over(terms, w)


def loss(params, xs, ys, *, activation="tanh", task="regression", mode="many-to-many",
         mask=None, h0=None, cell="elman"):
    """Mean loss of the network on (xs, ys); its gradient is the fast BPTT.

    Regression: mean squared error over counted terms and output units (no 1/2).
    Classification: mean softmax cross-entropy over counted terms.

    Args:
      params: dict U (I, H), V (H, H), b (H,), W (H, O), c (O,).
      xs: (B, T, I) or (T, I).
      ys: regression many-to-one (B, O), many-to-many (B, T, O);
          classification many-to-one (B,), many-to-many (B, T) integer labels 0..O-1
          (drop the B axis for unbatched xs).
      activation: name in ACTIVATIONS or its index as an integer scalar array.
      task: "regression" or "classification".
      mode: "many-to-one" (the last step) or "many-to-many" (every step).
      mask: (B, T) or (T,) bool; False steps hold the state and add no loss term.
      h0: initial state (H,) or (B, H); zeros when None.
      cell: "elman" (default), "gru" or "lstm" (layouts in ``init_params``).

    Returns:
      a scalar.

    Example:
      >>> g = jax.grad(loss)(params, xs, ys, activation="tanh", mode="many-to-one")
    """
    return _loss_impl(params, xs, ys, activation, task, mode, mask, h0, True, cell)


def loss_counted(params, xs, ys, *, activation="tanh", task="regression", mode="many-to-many",
                 mask=None, h0=None, cell="elman"):
    """``loss`` whose mask only says which terms count: every step updates the state.

    For batches whose only False mask entries are whole filler rows (every window of
    full length, no front padding): there it equals ``loss`` to rounding, since a
    filler's terms count zero whatever its states, and the recurrence runs without
    the mask's per-step select (the trainer's mask-free program, ``_epoch``).
    Args and Returns: as ``loss``.
    """
    return _loss_impl(params, xs, ys, activation, task, mode, mask, h0, True, cell, hold=False)


def _loss_autodiff(params, xs, ys, *, activation="tanh", task="regression", mode="many-to-many",
                   mask=None, h0=None, cell="elman"):
    """``loss`` whose gradient is plain autodiff of the scan (tests, benchmarks)."""
    return _loss_impl(params, xs, ys, activation, task, mode, mask, h0, False, cell)


def predict_classes(params, xs, *, activation, mode, mask=None, h0=None, cell="elman"):
    """The most likely class (argmax of the outputs).

    Args: as ``loss``, without ys.

    Returns:
      int32 many-to-one (B,) (or () unbatched); many-to-many (B, T) (or (T,)).
    """
    _check_choice("mode", mode, MODES)
    o = outputs(params, xs, activation=activation, mask=mask, h0=h0, cell=cell)  # (B, T, O) or (T, O)
    o = o[..., -1, :] if mode == "many-to-one" else o
    return jnp.argmax(o, axis=-1).astype(jnp.int32)
