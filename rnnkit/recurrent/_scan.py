"""The recurrence itself: a forward lax.scan and its fast backward pass (custom VJP).

Everything here is time-major and batched: xs (T, B, I), states (T, B, H),
mask (T, B, 1) bool or None. The public, batch-major, checked functions live in
``_model.py``.

Why a custom VJP. Autodiff of ``lax.scan`` computes, inside the reverse loop,
every per-step contribution to dV, dU and db and adds them up step by step:
T small (B, H) x (H, H) products plus their accumulation. The backward pass
here carries only the gradient flowing into the previous state,
dh_{t-1} = dA_t V^T (plus the held part on padded steps), stores every dA_t,
and after the loop takes

    dV = sum_t h_{t-1}^T dA_t,   dU = sum_t x_t^T dA_t,   db = sum_t dA_t

as single large products contracting the (T, B) axes, which the CPU runs at
matrix-multiply speed. The equations are those of Goodfellow, Bengio &
Courville (2016), sec. 10.2.2, in the row-vector convention.
"""
from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
from jax import lax

from ._cells import get_activation, get_cell


def _rows(a):
    """(T, B, K) -> (T*B, K), free for a contiguous array."""
    return a.reshape(-1, a.shape[-1])


def _tb_product(a, b):
    """sum over t, b of a[t, b]^T b[t, b]: (T, B, P), (T, B, Q) -> (P, Q), ONE product.

    Contracting dim 0 of the 2-D (T*B, K) views: measured about 3x faster on the
    CPU than lax.dot_general contracting the (0, 1) axes of the 3-D arrays.
    """
    return lax.dot_general(_rows(a), _rows(b), (((0,), (0,)), ((), ())))


def times(a, w):
    """a (T, B, K) times w (K, N) -> (T, B, N), done as one 2-D product."""
    return (_rows(a) @ w).reshape(a.shape[:-1] + (w.shape[-1],))


# The input product x_t U as a sum of I broadcast multiplies (fused with the activation,
# no matrix-product call) when I and H are at most these. Measured in the epoch program
# (benchmarks/bench_epoch.py): (B, T, I, H) = (64, 24, 3, 32) 9% faster; (64, 100, 3, 128)
# no different; (128, 200, 8, 256) 4% slower, hence the limits.
ELEMENTWISE_INPUTS = 4
ELEMENTWISE_HIDDEN = 64


def input_product(x, U):
    """x (B, I) times U (I, H) -> (B, H); for few inputs and units as I fused multiplies.

    Equal to ``x @ U`` up to float rounding (the order of the I-term sum may differ).
    """
    n_in, n_hid = U.shape
    if n_in > ELEMENTWISE_INPUTS or n_hid > ELEMENTWISE_HIDDEN:
        return x @ U
    total = x[:, 0:1] * U[0][None, :]
    for i in range(1, n_in):
        total = total + x[:, i:i + 1] * U[i][None, :]
    return total  # (B, H)


def _step_fn(act: str, U, V, b, masked: bool):
    """One forward step h_{t-1} -> h_t (a padded step holds h when ``masked``)."""
    phi = get_activation(act).value
    if not masked:
        def step(h, x):
            return phi(input_product(x, U) + h @ V + b[None, :])  # (B, H)
        return step

    def step_masked(h, x, m):
        return jnp.where(m, phi(input_product(x, U) + h @ V + b[None, :]), h)  # padded rows hold
    return step_masked


def scan_states(act: str, xs, U, V, b, h0, mask):
    """Run the recurrence h_t = phi(x_t U + h_{t-1} V + b) over time.

    The input product x_t U is taken inside the body, step by step: a (T, B, H)
    projection buffer made before the loop cost more (a fresh allocation and one
    more pass over T*B*H floats) than the small extra product per step. Measured
    at (B, T, I, H) = (128, 200, 8, 256): forward 24 ms instead of 62 ms; whole
    training step 118-132 ms instead of 144-211 ms (best of 15-20, busy machine).

    Args:
      act: activation name (static).
      xs: (T, B, I).  U: (I, H).  V: (H, H).  b: (H,).  h0: (B, H).
      mask: (T, B, 1) bool or None; a False step holds the state.

    Returns:
      hs (T, B, H): the state after every step.
    """
    if mask is None:
        # Branch-free body; the carry is one array.
        f = _step_fn(act, U, V, b, False)

        def step(h, x):
            h = f(h, x)
            return h, h
        _, hs = lax.scan(step, h0, xs)
    else:
        f = _step_fn(act, U, V, b, True)

        def step(h, inp):
            h = f(h, *inp)
            return h, h
        _, hs = lax.scan(step, h0, (xs, mask))
    return hs


def last_state(act: str, xs, U, V, b, h0, mask):
    """The state after the last step only, (B, H): the same loop keeping no (T, B, H) array."""
    if mask is None:
        f = _step_fn(act, U, V, b, False)
        h, _ = lax.scan(lambda h, x: (f(h, x), None), h0, xs)
    else:
        f = _step_fn(act, U, V, b, True)
        h, _ = lax.scan(lambda h, inp: (f(h, *inp), None), h0, (xs, mask))
    return h


def states_autodiff(act, xs, U, V, b, h0, mask):
    """Hidden states whose gradient is JAX autodiff of the scan (the plain version)."""
    return scan_states(act, xs, U, V, b, h0, mask)


@partial(jax.custom_vjp, nondiff_argnums=(0,))
def states_fast(act, xs, U, V, b, h0, mask):
    """Hidden states (T, B, H) with the fast hand-written backward pass.

    Same value as ``states_autodiff``; same gradient to rounding.
    """
    return states_autodiff(act, xs, U, V, b, h0, mask)


def _fast_fwd(act, xs, U, V, b, h0, mask):
    hs = states_autodiff(act, xs, U, V, b, h0, mask)  # (T, B, H)
    return hs, (xs, U, V, h0, hs, mask)


# dL/db = sum of dA over all T*B rows: as the product ones (1, T*B) x dA (T*B, H) when
# T*B*H is at most this, else a reduction. Measured in the epoch program at (64, 24, 3, 32):
# the reduction took about 3% of the epoch more than the product; at (128, 200, 8, 256) the
# two were within noise (benchmarks/bench_epoch.py).
BIAS_BY_PRODUCT = 2 ** 18


def _bias_grad(da_next, da0):
    """sum over t, b of dA: da_next (T, B, H) (rows dA_1 .. dA_{T-1}, then zeros), da0 (B, H)."""
    if da_next.size <= BIAS_BY_PRODUCT:
        ones = jnp.ones((1, da_next.shape[0] * da_next.shape[1]), da_next.dtype)
        return (ones @ _rows(da_next))[0] + jnp.sum(da0, axis=0)  # (H,)
    return jnp.sum(da_next, axis=(0, 1)) + jnp.sum(da0, axis=0)  # (H,)


def _reverse(act, res, g, dh_last):
    """The backward pass of the recurrence: (dxs, dU, dV, db, dh0).

    g = dL/dh_t from the outputs at every step, (T, B, H), or None when only the last
    state reaches the loss; then dh_last (B, H) is dL/dh_{T-1} and the loop reads no
    (T, B, H) cotangent (a many-to-one loss's is zero but for its last row).
    """
    xs, U, V, h0, hs, mask = res
    # 1. The reverse loop. phi'(a_t) is taken from h_t inside the body, where XLA fuses it
    #    with the multiply: measured faster than a separate (T, B, H) pass before the loop.
    #    The loop emits dA one step late: row t of `da_next` is dA_{t+1} (zero at t = T-1)
    #    and dA_0 comes out in the final carry. Then h_t^T dA_{t+1} pairs the stored states
    #    row for row with `da_next`, and dV needs no shifted copy of the states: building
    #    [h0, h_0 .. h_{T-2}] (a concatenate before the product) cost about 15 ms of a
    #    40 ms backward pass at (B, T, H) = (128, 200, 256).
    dphi = get_activation(act).grad_from_output
    Vt = V.T
    zeros = jnp.zeros_like(h0)
    dh_init = zeros if dh_last is None else dh_last
    # Inputs of the loop: (g_t, h_t, m_t), any of g and m absent.
    inputs = tuple(a for a in (g, hs, mask) if a is not None)
    with_g, with_mask = g is not None, mask is not None

    def step(carry, inp):
        dh, da_later = carry  # dL/dh_t through the recurrence; dA_{t+1}
        g_t = inp[0] if with_g else None
        h_t = inp[1] if with_g else inp[0]
        gh = dh if g_t is None else g_t + dh  # (B, H) dL/dh_t
        if not with_mask:
            da = gh * dphi(h_t)  # (B, H) dL/da_t
            return (da @ Vt, da), da_later  # dA_t V^T = dL/dh_{t-1} through the recurrence
        m_t = inp[-1]
        zero = jnp.zeros_like(gh)
        da = jnp.where(m_t, gh * dphi(h_t), zero)  # a padded step has no pre-activation
        # ... and passes dL/dh_t unchanged to h_{t-1}, since h_t = h_{t-1} there
        return (da @ Vt + jnp.where(m_t, zero, gh), da), da_later

    (dh0, da0), da_next = lax.scan(step, (dh_init, zeros), inputs, reverse=True)
    # 2. The parameter gradients as single products over all T*B rows, plus the t = 0 term.
    dV = _tb_product(hs, da_next) + h0.T @ da0  # (H, H): sum_t h_{t-1}^T dA_t
    xs_next = jnp.concatenate([xs[1:], jnp.zeros_like(xs[:1])], axis=0)  # x_{t+1}; small, I << H
    dU = _tb_product(xs_next, da_next) + xs[0].T @ da0  # (I, H)
    db = _bias_grad(da_next, da0)  # (H,)
    dxs = jnp.concatenate([(da0 @ U.T)[None], times(da_next[:-1], U.T)], axis=0)  # (T, B, I); dropped by XLA when unused
    return dxs, dU, dV, db, dh0


def _fast_bwd(act, res, g):
    """Reverse pass. g = dL/dh_t from the outputs, (T, B, H)."""
    return _reverse(act, res, g, None) + (None,)


states_fast.defvjp(_fast_fwd, _fast_bwd)


# A many-to-one loss takes ``last_state_fast`` when B * H is at most this, else
# ``states_fast(...)[-1]``. Measured in the epoch program (benchmarks/bench_epoch.py):
# (B, T, I, H) = (64, 24, 3, 32) and (64, 100, 3, 128) faster with it, (128, 200, 8, 256)
# 7% slower (as when it was first tried: XLA splits the reverse loop's elementwise
# fusion over threads by the bytes it touches, and without the (T, B, H) cotangent
# that fusion touches fewer).
LAST_STATE_MAX = 2 ** 14


@partial(jax.custom_vjp, nondiff_argnums=(0,))
def last_state_fast(act, xs, U, V, b, h0, mask):
    """The last state (B, H) (a many-to-one loss's), with the fast backward pass.

    Same value as ``states_fast(...)[-1]`` and the same gradient to rounding, but the
    backward pass starts from dL/dh_{T-1} (B, H) instead of reading a (T, B, H)
    cotangent that is zero but for its last row, and the forward pass without
    gradient (validation) keeps no (T, B, H) array. Measured in the epoch program
    (benchmarks/bench_epoch.py), with the rest unchanged: 7-9% faster at
    (B, T, I, H) = (64, 24, 3, 32) and (64, 100, 3, 128); slower at large B * H
    (``LAST_STATE_MAX``).
    """
    return last_state(act, xs, U, V, b, h0, mask)


def _last_fwd(act, xs, U, V, b, h0, mask):
    hs = scan_states(act, xs, U, V, b, h0, mask)  # (T, B, H)
    return hs[-1], (xs, U, V, h0, hs, mask)


def _last_bwd(act, res, g):
    """Reverse pass. g = dL/dh_{T-1}, (B, H)."""
    return _reverse(act, res, None, g) + (None,)


last_state_fast.defvjp(_last_fwd, _last_bwd)


def scan_cell(cell: str, act: str, xs, params, h0, mask, eps=None, with_gates: bool = False):
    """Any cell over time by ``lax.scan`` of its step (the plain path: autodiff differentiates it).

    A False mask step holds the whole state (h, and c for LSTM). ``eps`` adds a
    perturbation to h after every step (the gradient-through-time diagnostic
    differentiates with respect to it; zero changes nothing).

    Args:
      cell: a name in CELLS (static).  act: activation name (static).
      xs: (T, B, I).  params: the cell's dict.  h0: (B, H); an LSTM's c starts at zero.
      mask: (T, B, 1) bool or None.  eps: (T, B, H) or None.
      with_gates: also return the gate values of every step.

    Returns:
      hs (T, B, H); with_gates: (hs, gates), gates a tuple of (T, B, H) arrays in
      the order of the cell's gate blocks (empty for Elman).
    """
    c = get_cell(cell)
    phi = get_activation(act).value
    state0 = (h0,) if c.n_state == 1 else (h0, jnp.zeros_like(h0))

    def step(state, inp):
        x, m, e = inp
        new, gates = c.step(params, state, x, phi)
        if m is not None:
            new = tuple(jnp.where(m, a, b) for a, b in zip(new, state))  # padding holds the state
        if e is not None:
            new = (new[0] + e,) + new[1:]
        return new, ((new[0], gates) if with_gates else new[0])

    _, out = lax.scan(step, state0, (xs, mask, eps))
    return out
