"""Activations, parameter initialisation and the cell registry.

An activation is a pair: its value phi(a) and its derivative written in terms of
the *output* h = phi(a). Writing phi' through h lets the backward pass keep only
the hidden states (no pre-activations).

A cell is a small record of pure functions: ``init(key, n_in, n_hidden, n_out,
...) -> params`` and ``step(params, h, x_proj, phi) -> h``. Only the Elman cell
exists now; a gated cell (GRU, LSTM) would be one more entry in ``CELLS`` with
its own parameter names.
"""
from __future__ import annotations

from typing import Callable, Dict, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from ._names import ACTIVATIONS, INITS


class Activation(NamedTuple):
    """An elementwise nonlinearity and its derivative."""

    name: str
    value: Callable  # phi(a), elementwise
    grad_from_output: Callable  # phi'(a) written with h = phi(a), elementwise


def _relu_grad(h):
    # phi'(0) = 0, the same convention as jax.nn.relu and torch.relu.
    return (h > 0).astype(h.dtype)


_ACT_TABLE: Dict[str, Activation] = {
    "tanh": Activation("tanh", jnp.tanh, lambda h: 1 - h * h),
    "sigmoid": Activation("sigmoid", jax.nn.sigmoid, lambda h: h * (1 - h)),
    "relu": Activation("relu", jax.nn.relu, _relu_grad),
    "linear": Activation("linear", lambda a: a, jnp.ones_like),
}

# In the order of ACTIVATIONS: position k is the activation with index k when the
# activation is passed as data (a traced integer) rather than as a name.
ACTIVATION_LIST = tuple(_ACT_TABLE[name] for name in ACTIVATIONS)


def get_activation(name: str) -> Activation:
    """The Activation called ``name``; ValueError naming the choices otherwise."""
    if name not in _ACT_TABLE:
        raise ValueError(f"`activation` (={name!r}) is unknown; use one of "
                         + ", ".join(repr(a) for a in ACTIVATIONS)
                         + " or its index 0..3 as an integer")
    return _ACT_TABLE[name]


# --------------------------------------------------------------------------- init

def _glorot(key, shape, dtype):
    # Glorot & Bengio (2010): uniform on +-sqrt(6 / (fan_in + fan_out)).
    return jax.nn.initializers.glorot_uniform()(key, shape, dtype)


def _recurrent(key, n_hidden, scheme, dtype):
    if scheme == "glorot":
        return _glorot(key, (n_hidden, n_hidden), dtype)
    if scheme == "orthogonal":
        # Saxe, McClelland & Ganguli (2014): every singular value is 1.
        return jax.nn.initializers.orthogonal()(key, (n_hidden, n_hidden), dtype)
    # "identity": Le, Jaitly & Hinton (2015), meant for relu states.
    return jnp.eye(n_hidden, dtype=dtype)


def init_elman(key, n_in: int, n_hidden: int, n_out: int, *, scheme: str = "glorot",
               recurrent_scale: float = 1.0, dtype=jnp.float32) -> dict:
    """Initial parameters of an Elman network.

    Args:
      key: a jax.random key.
      n_in, n_hidden, n_out: I, H, O.
      scheme: "glorot" (every matrix Glorot-uniform), "orthogonal" (V orthogonal),
        or "identity" (V = I); U and W are Glorot-uniform in every scheme.
      recurrent_scale: multiplies V (> 1 pushes towards exploding gradients).
      dtype: float dtype of every parameter.

    Returns:
      dict U (I, H), V (H, H), b (H,), W (H, O), c (O,); biases are zero.
    """
    sizes = []
    for name, v in (("n_in", n_in), ("n_hidden", n_hidden), ("n_out", n_out)):
        if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer)) or v < 1:
            raise ValueError(f"`{name}` (={v!r}) must be a whole number >= 1")
        sizes.append(int(v))
    n_in, n_hidden, n_out = sizes
    if scheme not in INITS:
        raise ValueError(f"`scheme` (={scheme!r}) is unknown; use one of "
                         + ", ".join(repr(s) for s in INITS))
    if isinstance(recurrent_scale, bool) or not isinstance(recurrent_scale, (int, float, np.number)) \
            or not recurrent_scale > 0:
        raise ValueError(f"`recurrent_scale` (={recurrent_scale!r}) must be a number > 0")
    dtype = jnp.dtype(dtype)
    if not jnp.issubdtype(dtype, jnp.floating):
        raise TypeError(f"`dtype` (={dtype}) must be a float dtype such as float32 or float64")
    k_u, k_v, k_w = jax.random.split(key, 3)
    return {
        "U": _glorot(k_u, (n_in, n_hidden), dtype),  # (I, H)
        "V": _recurrent(k_v, n_hidden, scheme, dtype) * jnp.asarray(recurrent_scale, dtype),  # (H, H)
        "b": jnp.zeros((n_hidden,), dtype),  # (H,)
        "W": _glorot(k_w, (n_hidden, n_out), dtype),  # (H, O)
        "c": jnp.zeros((n_out,), dtype),  # (O,)
    }


def init_elman_traceable(key, n_in: int, n_hidden: int, n_out: int, scheme: str, recurrent_scale,
                         dtype) -> dict:
    """``init_elman`` with the recurrent scale as data, for use inside ``jax.jit``.

    The same draws as ``init_elman`` (same keys, same functions), so the same
    values. Only the scheme's own draw is compiled: a switch over all three
    made the program's compile 1.6 s instead of about 1 s here.

    Args:
      key: a jax.random key.
      n_in, n_hidden, n_out: I, H, O (static, already checked).
      scheme: one of INITS (static, already checked).
      recurrent_scale: () float in ``dtype``.
      dtype: float dtype of every parameter.

    Returns:
      dict U (I, H), V (H, H), b (H,), W (H, O), c (O,).
    """
    k_u, k_v, k_w = jax.random.split(key, 3)
    return {
        "U": _glorot(k_u, (n_in, n_hidden), dtype),  # (I, H)
        # The barrier keeps XLA from folding the scale into the draw's own arithmetic,
        # which changed the last bit of a glorot V (init_elman multiplies after the draw).
        "V": jax.lax.optimization_barrier(_recurrent(k_v, n_hidden, scheme, dtype))
        * recurrent_scale,  # (H, H)
        "b": jnp.zeros((n_hidden,), dtype),  # (H,)
        "W": _glorot(k_w, (n_hidden, n_out), dtype),  # (H, O)
        "c": jnp.zeros((n_out,), dtype),  # (O,)
    }


def elman_step(params: dict, h, x_proj, phi: Callable):
    """One unbatched (or row-batched) Elman step: h_t = phi(x_t U + b + h_{t-1} V).

    Args:
      params: dict with V (H, H).
      h: previous state (..., H).
      x_proj: x_t U + b, already projected (..., H).
      phi: the activation's value function.

    Returns:
      the new state (..., H).
    """
    return phi(x_proj + h @ params["V"])


class Cell(NamedTuple):
    """A recurrent cell: parameter names, an init and one step."""

    name: str
    param_names: tuple
    init: Callable
    step: Callable


CELLS: Dict[str, Cell] = {
    "elman": Cell("elman", ("U", "V", "b", "W", "c"), init_elman, elman_step),
}


def _is_key(key) -> bool:
    """A typed key (jax.random.key) or a raw uint32 key of shape (2,) (jax.random.PRNGKey)."""
    if isinstance(key, jax.Array) and jnp.issubdtype(key.dtype, jax.dtypes.prng_key):
        return True
    dtype, shape = getattr(key, "dtype", None), getattr(key, "shape", None)
    return dtype == jnp.uint32 and tuple(shape) == (2,)


def init_params(key, n_in: int, n_hidden: int, n_out: int, *, scheme: str = "glorot",
                recurrent_scale: float = 1.0, dtype=jnp.float32, cell: str = "elman") -> dict:
    """Initial parameters for a network of the given sizes.

    Args:
      key: a jax.random key (``jax.random.key(0)`` or ``jax.random.PRNGKey(0)``).
      n_in, n_hidden, n_out: input features I, hidden units H, outputs O.
      scheme: "glorot" (Glorot & Bengio 2010), "orthogonal" (V orthogonal,
        Saxe et al. 2014) or "identity" (V = I, for relu; Le, Jaitly & Hinton 2015).
      recurrent_scale: multiplies the initial V.
      dtype: float dtype of the parameters.
      cell: the cell type; only "elman" exists.

    Returns:
      dict U (I, H), V (H, H), b (H,), W (H, O), c (O,).

    Example:
      >>> p = init_params(jax.random.key(0), 3, 16, 1, scheme="orthogonal")
      >>> p["V"].shape
      (16, 16)
    """
    if cell not in CELLS:
        raise ValueError(f"`cell` (={cell!r}) is unknown; use one of {sorted(CELLS)}")
    if not _is_key(key):
        raise TypeError(f"`key` (={key!r}) must be a jax.random key; make one with "
                        "jax.random.key(seed)")
    return CELLS[cell].init(key, n_in, n_hidden, n_out, scheme=scheme,
                            recurrent_scale=recurrent_scale, dtype=dtype)
