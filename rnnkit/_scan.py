"""The recurrence itself: the forward loop and its fast backward pass (custom VJP).

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

The value of the states (and plain autodiff) comes from ``lax.scan``
(``scan_states``). Under differentiation the custom VJP runs its forward and
reverse loops as ``lax.fori_loop`` over one (T+1, B, H) buffer each, read and
written in place by index, so the bulk products pair h_{t-1} with dA_t row for
row without a shifted copy (``states_buffer``, ``_fast_bwd``).
"""
from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
from jax import lax

from ._cells import get_activation


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
    phi = get_activation(act).value
    if mask is None:
        # Branch-free body; the carry is one array.
        def step(h, x):
            h = phi(x @ U + h @ V + b[None, :])  # (B, H)
            return h, h
        _, hs = lax.scan(step, h0, xs)
    else:
        def step(h, inp):
            x, m = inp
            h = jnp.where(m, phi(x @ U + h @ V + b[None, :]), h)  # (B, H); padded rows hold
            return h, h
        _, hs = lax.scan(step, h0, (xs, mask))
    return hs


def states_autodiff(act, xs, U, V, b, h0, mask):
    """Hidden states whose gradient is JAX autodiff of the scan (the plain version)."""
    return scan_states(act, xs, U, V, b, h0, mask)


@partial(jax.custom_vjp, nondiff_argnums=(0,))
def states_fast(act, xs, U, V, b, h0, mask):
    """Hidden states (T, B, H) with the fast hand-written backward pass.

    Same value as ``states_autodiff``; same gradient to rounding.
    """
    return states_autodiff(act, xs, U, V, b, h0, mask)


def _at(a, t):
    """a[t] for a traced index t: one (B, K) slab, read in place."""
    return lax.dynamic_index_in_dim(a, t, 0, keepdims=False)


def states_buffer(act, xs, U, V, b, h0, mask):
    """The recurrence written into ONE (T+1, B, H) buffer: row 0 is h0, row t+1 is h_t.

    Each step reads its previous state from the buffer and writes the new one
    in place; nothing else is carried. Row t then holds h_{t-1}, the state that
    step t multiplies by V, which is what the backward pass pairs with dA_t.
    With a mask the state is also carried: then XLA computes the new state in
    its own fusion, split over two threads, before copying it into the buffer
    (reading it back from the buffer, XLA fused the select into the in-place
    write on one thread: 60.5 against 54.9 ms per training step at
    (B, T, I, H) = (128, 200, 8, 256)).
    """
    phi = get_activation(act).value
    T = xs.shape[0]
    # h0 above T zero rows, written once (zeros then an update would copy the buffer)
    buf = jnp.concatenate([h0[None], jnp.zeros((T,) + h0.shape, h0.dtype)], axis=0)

    if mask is None:
        def step(t, buf):
            h = _at(buf, t)  # (B, H) h_{t-1}
            new = phi(_at(xs, t) @ U + h @ V + b[None, :])
            return lax.dynamic_update_index_in_dim(buf, new, t + 1, 0)
        return lax.fori_loop(0, T, step, buf)

    def step_held(t, carry):
        h, buf = carry
        new = jnp.where(_at(mask, t), phi(_at(xs, t) @ U + h @ V + b[None, :]), h)
        return new, lax.dynamic_update_index_in_dim(buf, new, t + 1, 0)
    return lax.fori_loop(0, T, step_held, (h0, buf))[1]


def _fast_fwd(act, xs, U, V, b, h0, mask):
    buf = states_buffer(act, xs, U, V, b, h0, mask)  # (T+1, B, H)
    return buf[1:], (xs, U, V, buf, mask)


def _fast_bwd(act, res, g):
    """Reverse pass. g = dL/dh_t from the outputs, (T, B, H)."""
    xs, U, V, buf, mask = res
    T = xs.shape[0]
    # 1. The reverse loop, over the same kind of buffer: dA_t goes to row t of `da`
    #    (row T stays zero), and only dL/dh_t through the recurrence is carried.
    #    phi'(a_t) is taken from h_t inside the body, where XLA fuses it with the multiply.
    #    Measured at (B, T, I, H) = (128, 200, 8, 256) inside a training loop: 56.6 ms per
    #    step against 60.9 ms for lax.scan loops, which copied the carried slabs every step
    #    (and, before that, 15 ms more for a shifted copy of the states before dV).
    dphi = get_activation(act).grad_from_output
    Vt = V.T

    def step(i, carry):
        dh, da_buf = carry
        t = T - 1 - i
        gh = _at(g, t) + dh  # (B, H) dL/dh_t
        h_t = _at(buf, t + 1)
        if mask is None:
            da = gh * dphi(h_t)  # (B, H) dL/da_t
            back = da @ Vt  # dA_t V^T = dL/dh_{t-1} through the recurrence
        else:
            m = _at(mask, t)
            zero = jnp.zeros_like(gh)
            da = jnp.where(m, gh * dphi(h_t), zero)  # a padded step has no pre-activation
            # ... and passes dL/dh_t unchanged to h_{t-1}, since h_t = h_{t-1} there
            back = da @ Vt + jnp.where(m, zero, gh)
        return back, lax.dynamic_update_index_in_dim(da_buf, da, t, 0)
    dh0, da = lax.fori_loop(0, T, step, (jnp.zeros_like(buf[0]), jnp.zeros_like(buf)))
    # 2. The parameter gradients as single products over all (T+1)*B rows: row t of `buf`
    #    is h_{t-1} and row t of `da` is dA_t, so the pairs line up (the last row adds 0).
    dV = _tb_product(buf, da)  # (H, H) sum_t h_{t-1}^T dA_t
    xs_ext = jnp.concatenate([xs, jnp.zeros_like(xs[:1])], axis=0)  # (T+1, B, I); small, I << H
    dU = _tb_product(xs_ext, da)  # (I, H)
    db = jnp.sum(da, axis=(0, 1))  # (H,)
    dxs = times(da, U.T)[:T]  # (T, B, I); dropped by XLA when unused
    return dxs, dU, dV, db, dh0, None


states_fast.defvjp(_fast_fwd, _fast_bwd)
