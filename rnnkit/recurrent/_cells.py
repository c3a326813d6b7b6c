"""Activations, parameter initialisation and the cell registry.

An activation is a pair: its value phi(a) and its derivative written in terms of
the *output* h = phi(a). Writing phi' through h lets the backward pass keep only
the hidden states (no pre-activations).

A cell is a small record of pure functions (``Cell``): its parameter names, an
init, and ``step(params, state, x, phi) -> (state, gates)``, ONE step on an
unbatched (H,) or row-batched (B, H) state; ``lax.scan`` makes the sequence
(``_scan.scan_cell``). ``state`` is a tuple: (h,) for Elman and GRU, (h, c) for
LSTM; ``gates`` is a tuple of the gate values of the step (empty for Elman).
Three cells: Elman, GRU (as torch.nn.GRU) and LSTM with a forget gate (as
torch.nn.LSTM). The layout of their parameters is in ``init_params``.
"""
from __future__ import annotations

from typing import Callable, Dict, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from ._names import ACTIVATIONS, CELLS as CELL_NAMES, INITS


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


def _orthogonal(key, n: int, dtype):
    """``jax.nn.initializers.orthogonal()(key, (n, n), dtype)`` to rounding, without LAPACK.

    The same standard-normal draw Z (n, n) as jax's initializer, and the same
    matrix: the Q of Z = QR with R's diagonal made positive (Mezzadri 2007,
    which makes Q Haar-distributed). Here Q comes from Householder reflections
    (Golub & Van Loan, Matrix Computations, sec. 5.2) in plain array
    operations instead of LAPACK's QR: a program that calls LAPACK needs
    SciPy's LAPACK table set up in every new process (importing scipy.linalg,
    about 0.2 s of a 1.5 s first fit), this one needs nothing.
    """
    z = jax.random.normal(key, (n, n), dtype)  # jax.random.orthogonal's draw for a square shape
    rows = jnp.arange(n)

    def reflect(k, carry):
        r, q = carry  # r: Z with the first k columns reduced; q: the reflections so far
        x = jnp.where(rows >= k, r[:, k], jnp.zeros((), dtype))  # (n,) the column below row k
        norm = jnp.sqrt(jnp.sum(x * x))
        alpha = jnp.where(x[k] >= 0, -norm, norm)  # the sign that avoids cancellation
        v = x - alpha * (rows == k).astype(dtype)
        vv = jnp.sum(v * v)
        v = jnp.where(vv > 0, v / jnp.sqrt(jnp.maximum(vv, jnp.finfo(dtype).tiny)), jnp.zeros_like(v))
        r = r - 2 * jnp.outer(v, v @ r)  # H_k r
        q = q - 2 * jnp.outer(q @ v, v)  # q H_k
        return r, q

    r, q = jax.lax.fori_loop(0, n, reflect, (z, jnp.eye(n, dtype=dtype)))
    sign = jnp.where(jnp.diagonal(r) < 0, -jnp.ones((), dtype), jnp.ones((), dtype))
    return q * sign[None, :]


def _recurrent(key, n_hidden, scheme, dtype):
    if scheme == "glorot":
        return _glorot(key, (n_hidden, n_hidden), dtype)
    if scheme == "orthogonal":
        # Saxe, McClelland & Ganguli (2014): every singular value is 1.
        return _orthogonal(key, n_hidden, dtype)
    # "identity": Le, Jaitly & Hinton (2015), meant for relu states.
    return jnp.eye(n_hidden, dtype=dtype)


def _check_init(n_in, n_hidden, n_out, scheme, recurrent_scale, dtype):
    """Checked sizes and dtype of an init call; ValueError/TypeError naming the argument."""
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
    return n_in, n_hidden, n_out, dtype


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
    n_in, n_hidden, n_out, dtype = _check_init(n_in, n_hidden, n_out, scheme, recurrent_scale, dtype)
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


def _row(v, like):
    """A bias (K,) shaped to add to ``like`` (..., K) under rank-promotion "raise"."""
    return v.reshape((1,) * (like.ndim - 1) + v.shape)


def elman_step(params: dict, state: tuple, x, phi: Callable):
    """One Elman step, h_t = phi(x_t U + h_{t-1} V + b), on (H,) or (B, H) states.

    Args:
      params: dict U (I, H), V (H, H), b (H,).
      state: (h_{t-1},), h (..., H).
      x: x_t (..., I).
      phi: the activation's value function.

    Returns:
      ((h_t,), ()): the new state, and no gates.
    """
    (h,) = state
    a = x @ params["U"] + h @ params["V"]
    return (phi(a + _row(params["b"], a)),), ()


def gru_step(params: dict, state: tuple, x, phi: Callable):
    """One GRU step as torch.nn.GRU computes it (Cho et al. 2014, reset after the product).

        r = sigma(x U_r + h V_r + b_r)          z = sigma(x U_z + h V_z + b_z)
        n = phi(x U_n + b_n + r * (h V_n + bn))  h' = (1 - z) * n + z * h

    Args:
      params: dict U (I, 3H), V (H, 3H), b (3H,), bn (H,); gate blocks r, z, n.
      state: (h_{t-1},), h (..., H).
      x: x_t (..., I).
      phi: the candidate's nonlinearity (tanh in torch).

    Returns:
      ((h_t,), (r, z, n)), each (..., H).
    """
    (h,) = state
    H = h.shape[-1]
    gx = x @ params["U"]
    gx = gx + _row(params["b"], gx)  # (..., 3H)
    gh = h @ params["V"]  # (..., 3H)
    r = jax.nn.sigmoid(gx[..., :H] + gh[..., :H])
    z = jax.nn.sigmoid(gx[..., H:2 * H] + gh[..., H:2 * H])
    n = phi(gx[..., 2 * H:] + r * (gh[..., 2 * H:] + _row(params["bn"], h)))
    return ((1 - z) * n + z * h,), (r, z, n)


def lstm_step(params: dict, state: tuple, x, phi: Callable):
    """One LSTM step with a forget gate and no peepholes, as torch.nn.LSTM computes it.

    Hochreiter & Schmidhuber (1997), forget gate of Gers, Schmidhuber & Cummins (2000):

        [i, f, g, o] = [sigma, sigma, phi, sigma](x U + h V + b)
        c' = f * c + i * g        h' = o * phi(c')

    Args:
      params: dict U (I, 4H), V (H, 4H), b (4H,); gate blocks i, f, g, o.
      state: (h_{t-1}, c_{t-1}), each (..., H).
      x: x_t (..., I).
      phi: the candidate and cell-output nonlinearity (tanh in torch).

    Returns:
      ((h_t, c_t), (i, f, g, o)), each (..., H).
    """
    h, c = state
    H = h.shape[-1]
    a = x @ params["U"] + h @ params["V"]
    a = a + _row(params["b"], a)  # (..., 4H)
    i = jax.nn.sigmoid(a[..., :H])
    f = jax.nn.sigmoid(a[..., H:2 * H])
    g = phi(a[..., 2 * H:3 * H])
    o = jax.nn.sigmoid(a[..., 3 * H:])
    c = f * c + i * g
    return (o * phi(c), c), (i, f, g, o)


def init_gated_traceable(cell: str, key, n_in: int, n_hidden: int, n_out: int, scheme: str,
                         recurrent_scale, dtype) -> dict:
    """Initial parameters of a GRU or LSTM; the recurrent scale may be data (inside jax.jit).

    Every gate block of U is Glorot-uniform on its own (I, H) shape and every
    (H, H) block of V is drawn by ``scheme`` on its own (so "orthogonal" makes
    each block orthogonal, "identity" each block I). Biases are zero except the
    LSTM forget gate's, which starts at 1 (Jozefowicz, Zaremba & Sutskever 2015).

    Args: as ``init_elman_traceable``, with ``cell`` "gru" or "lstm" (static).

    Returns:
      the parameter dict of ``init_params`` for this cell.
    """
    k = len(GATE_BLOCKS[cell])
    H = n_hidden
    k_u, k_v, k_w = jax.random.split(key, 3)
    ku, kv = jax.random.split(k_u, k), jax.random.split(k_v, k)
    U = jnp.concatenate([_glorot(ku[j], (n_in, H), dtype) for j in range(k)], axis=1)  # (I, kH)
    V = jnp.concatenate([_recurrent(kv[j], H, scheme, dtype) for j in range(k)], axis=1)  # (H, kH)
    b = jnp.zeros((k * H,), dtype)
    if cell == "lstm":
        b = b.at[H:2 * H].set(1)  # forget gate
    params = {"U": U, "V": jax.lax.optimization_barrier(V) * jnp.asarray(recurrent_scale, dtype),
              "b": b}
    if cell == "gru":
        params["bn"] = jnp.zeros((H,), dtype)  # recurrent bias of the candidate, inside r * (.)
    params["W"] = _glorot(k_w, (H, n_out), dtype)  # (H, O)
    params["c"] = jnp.zeros((n_out,), dtype)  # (O,)
    return params


def init_traceable(cell: str, key, n_in: int, n_hidden: int, n_out: int, scheme: str,
                   recurrent_scale, dtype) -> dict:
    """The initial parameters of any cell, traceable (the compiled initial-state program)."""
    if cell == "elman":
        return init_elman_traceable(key, n_in, n_hidden, n_out, scheme, recurrent_scale, dtype)
    return init_gated_traceable(cell, key, n_in, n_hidden, n_out, scheme, recurrent_scale, dtype)


# The (H, H) blocks of V (and the blocks of U and b), in their order along the last axis.
GATE_BLOCKS = {
    "elman": ("state",),
    "gru": ("reset", "update", "candidate"),
    "lstm": ("input", "forget", "candidate", "output"),
}
# The logistic gates of each cell (the candidate is phi, not a gate).
LOGISTIC_GATES = {"elman": (), "gru": ("reset", "update"), "lstm": ("input", "forget", "output")}


class Cell(NamedTuple):
    """A recurrent cell: parameter names, state size, its step."""

    name: str
    param_names: tuple  # in the order of init_params' dict
    n_state: int  # arrays in the state tuple: 1 (h) or 2 (h, c)
    step: Callable  # (params, state tuple, x, phi) -> (state tuple, gates tuple)


CELL_TABLE: Dict[str, Cell] = {
    "elman": Cell("elman", ("U", "V", "b", "W", "c"), 1, elman_step),
    "gru": Cell("gru", ("U", "V", "b", "bn", "W", "c"), 1, gru_step),
    "lstm": Cell("lstm", ("U", "V", "b", "W", "c"), 2, lstm_step),
}


def get_cell(name) -> Cell:
    """The Cell called ``name``; ValueError naming the choices otherwise."""
    if not isinstance(name, str) or name not in CELL_TABLE:
        raise ValueError(f"`cell` (={name!r}) is unknown; use one of "
                         + ", ".join(repr(c) for c in CELL_NAMES))
    return CELL_TABLE[name]


def cell_of(params) -> str:
    """The cell a parameter dict belongs to, read from the width of V: H, 3H or 4H."""
    V = params["V"]
    H, width = np.shape(V)
    found = {H: "elman", 3 * H: "gru", 4 * H: "lstm"}.get(width)
    if found is None or (found == "gru") != ("bn" in params):
        raise ValueError(f"`params['V']` has shape {np.shape(V)}{' and a bn' if 'bn' in params else ''}; "
                         "no cell has that layout: Elman V (H, H), GRU V (H, 3H) with bn (H,), "
                         "LSTM V (H, 4H) (make them with rnnkit.init_params)")
    return found


def _is_key(key) -> bool:
    """A typed key (jax.random.key) or a raw uint32 key of shape (2,) (jax.random.PRNGKey)."""
    if isinstance(key, jax.Array) and jnp.issubdtype(key.dtype, jax.dtypes.prng_key):
        return True
    dtype, shape = getattr(key, "dtype", None), getattr(key, "shape", None)
    return dtype == jnp.uint32 and tuple(shape) == (2,)


def init_params(key, n_in: int, n_hidden: int, n_out: int, *, scheme: str = "glorot",
                recurrent_scale: float = 1.0, dtype=jnp.float32, cell: str = "elman") -> dict:
    """Initial parameters for a network of the given sizes.

    Parameter layout (row-vector convention, o_t = h_t W + c for every cell):

      elman  U (I, H), V (H, H), b (H,), W (H, O), c (O,); biases zero.
      gru    U (I, 3H), V (H, 3H), b (3H,), bn (H,), W (H, O), c (O,). Gate blocks
             along the last axis in torch's order r (reset), z (update), n
             (candidate): block k is [:, k*H:(k+1)*H]. b holds the input-side
             biases (torch's b_ih, with b_hr and b_hz folded in); bn is the
             recurrent bias of the candidate (torch's b_hn), which the reset
             gate multiplies together with h V_n. Biases start at zero.
      lstm   U (I, 4H), V (H, 4H), b (4H,), W (H, O), c (O,). Gate blocks in
             torch's order i (input), f (forget), g (candidate), o (output);
             b = torch's b_ih + b_hh. The forget block of b starts at 1
             (Jozefowicz, Zaremba & Sutskever 2015), the rest at zero.

    U's blocks are Glorot-uniform each; V's (H, H) blocks are drawn by
    ``scheme`` each, then multiplied by ``recurrent_scale``.

    Args:
      key: a jax.random key (``jax.random.key(0)`` or ``jax.random.PRNGKey(0)``).
      n_in, n_hidden, n_out: input features I, hidden units H, outputs O.
      scheme: "glorot" (Glorot & Bengio 2010), "orthogonal" (V orthogonal,
        Saxe et al. 2014) or "identity" (V = I, for relu; Le, Jaitly & Hinton 2015).
      recurrent_scale: multiplies the initial V.
      dtype: float dtype of the parameters.
      cell: "elman" (default), "gru" or "lstm".

    Returns:
      the dict above.

    Example:
      >>> p = init_params(jax.random.key(0), 3, 16, 1, scheme="orthogonal")
      >>> p["V"].shape
      (16, 16)
      >>> init_params(jax.random.key(0), 3, 16, 1, cell="lstm")["V"].shape
      (16, 64)
    """
    get_cell(cell)
    if not _is_key(key):
        raise TypeError(f"`key` (={key!r}) must be a jax.random key; make one with "
                        "jax.random.key(seed)")
    if cell == "elman":
        return init_elman(key, n_in, n_hidden, n_out, scheme=scheme,
                          recurrent_scale=recurrent_scale, dtype=dtype)
    n_in, n_hidden, n_out, dtype = _check_init(n_in, n_hidden, n_out, scheme, recurrent_scale, dtype)
    return init_gated_traceable(cell, key, n_in, n_hidden, n_out, scheme, recurrent_scale, dtype)
