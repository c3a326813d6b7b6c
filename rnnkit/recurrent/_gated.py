"""The gated cells over time: GRU and LSTM states and their fast backward passes (custom VJPs).

Everything here is time-major: xs (T, B, I), states (T, B, H), mask (T, B, 1)
bool or None. ``states_autodiff`` is the plain ``lax.scan`` of the cell's step
(``_cells.gru_step`` / ``lstm_step``), differentiated by JAX. ``states_fast``
has the same value and a hand-written backward pass built like the Elman one
(``_scan._fast_bwd``): the reverse loop carries only what flows into the
previous state (dL/dh, and dL/dc for LSTM) and emits the gradients of the gate
pre-activations; the weight gradients are then single products over all T*B
rows after the loop,

    dV = sum_t h_{t-1}^T dG_t,   dU = sum_t x_t^T dA_t,   db = sum_t dA_t

(GRU: dG equals dA but for the candidate block, where the reset gate sits
between h V_n + bn and the pre-activation: dG_n = dA_n * r, and dbn = sum dG_n).
Unlike the Elman loop, these loops emit their gradients on time and carry only
dL/dh (and dL/dc): carrying the one-step-late gradient as well (the Elman
trick that spares a shifted copy of the states) made the GRU step slower at
small shapes (measured at (B, T, I, H) = (16, 50, 1, 16): 0.98 ms against 0.61 ms
for autodiff of the scan; on time: 0.35 ms against 0.65 ms, busy machine).
The equations are those of ``reference._bptt_gru`` and ``reference._bptt_lstm``.
"""
from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
from jax import lax

from ._cells import get_activation
from ._scan import _tb_product, scan_cell, times


def states_autodiff(cell: str, act: str, xs, params, h0, mask):
    """Hidden states (T, B, H) of a gated cell; the gradient is JAX autodiff of the scan."""
    return scan_cell(cell, act, xs, params, h0, mask)


# The GRU's hand-written backward pays below this many units and not from it: measured here
# (training step, busy 2-core machine, best of rounds, against autodiff of the scan) 1.4-1.9x
# faster at (B, T, I, H) = (16, 50, 1, 16) and (64, 50, 3, 32), but 0.6-0.99x at
# (64, 100, 3, 128) in five runs. The LSTM's paid at every shape tried (1.2-1.4x).
GRU_FAST_BELOW = 128


def states_fast(cell: str, act: str, xs, params, h0, mask):
    """Hidden states (T, B, H) of a gated cell with the fast backward pass where it pays."""
    if cell == "gru" and h0.shape[-1] >= GRU_FAST_BELOW:
        return states_autodiff(cell, act, xs, params, h0, mask)
    if cell == "gru":
        return gru_fast(act, xs, params["U"], params["V"], params["b"], params["bn"], h0, mask)
    return lstm_fast(act, xs, params["U"], params["V"], params["b"], h0, mask)


def _row(v):
    return v[None, :]


# ----------------------------------------------------------------------------------- GRU

@partial(jax.custom_vjp, nondiff_argnums=(0,))
def gru_fast(act, xs, U, V, b, bn, h0, mask):
    return scan_cell("gru", act, xs, {"U": U, "V": V, "b": b, "bn": bn}, h0, mask)


def _gru_fwd(act, xs, U, V, b, bn, h0, mask):
    phi = get_activation(act).value
    H = h0.shape[-1]

    def step(h, inp):
        x, m = inp
        gx = x @ U + _row(b)  # (B, 3H)
        gh = h @ V  # (B, 3H)
        r = jax.nn.sigmoid(gx[:, :H] + gh[:, :H])
        z = jax.nn.sigmoid(gx[:, H:2 * H] + gh[:, H:2 * H])
        hn = gh[:, 2 * H:] + _row(bn)
        n = phi(gx[:, 2 * H:] + r * hn)
        new = (1 - z) * n + z * h
        if m is not None:
            new = jnp.where(m, new, h)
        return new, (new, r, z, n, hn)

    _, (hs, r, z, n, hn) = lax.scan(step, h0, (xs, mask))
    return hs, (xs, U, V, h0, hs, (r, z, n, hn), mask)


def _gru_bwd(act, res, g):
    """Reverse pass. g = dL/dh_t from the outputs, (T, B, H)."""
    xs, U, V, h0, hs, saved, mask = res
    dphi = get_activation(act).grad_from_output
    H = h0.shape[-1]
    Vt = V.T
    h_prev = jnp.concatenate([h0[None], hs[:-1]], axis=0)  # (T, B, H)

    def step(dh, inp):
        g_t, hp, r, z, n, hn, m = inp
        gh = g_t + dh  # (B, H) dL/dh_t
        da_n = gh * (1 - z) * dphi(n)
        da_r = da_n * hn * r * (1 - r)
        da_z = gh * (hp - n) * z * (1 - z)
        dg = jnp.concatenate([da_r, da_z, da_n * r], axis=1)  # (B, 3H) dL/d(h V + [0, 0, bn])
        back = gh * z
        if m is not None:
            dg = jnp.where(m, dg, jnp.zeros_like(dg))  # a padded step has no gates ...
            da_n = jnp.where(m, da_n, jnp.zeros_like(da_n))
            back = jnp.where(m, back, gh)  # ... and passes dL/dh_t on unchanged
        return dg @ Vt + back, (dg, da_n)

    dh0, (dg, da_n) = lax.scan(step, jnp.zeros_like(h0), (g, h_prev) + tuple(saved) + (mask,),
                               reverse=True)
    dV = _tb_product(h_prev, dg)  # (H, 3H): sum_t h_{t-1}^T dG_t
    dbn = jnp.sum(dg[..., 2 * H:], axis=(0, 1))  # (H,)
    # dA equals dG but in the candidate block, where it is da_n (before the reset gate); the
    # small x products are patched rather than a (T, B, 3H) dA built
    dU = _tb_product(xs, dg).at[:, 2 * H:].set(_tb_product(xs, da_n))  # (I, 3H)
    db = jnp.concatenate([jnp.sum(dg[..., :2 * H], axis=(0, 1)), jnp.sum(da_n, axis=(0, 1))])  # (3H,)
    dxs = times(jnp.concatenate([dg[..., :2 * H], da_n], axis=-1), U.T)  # dropped when unused
    return dxs, dU, dV, db, dbn, dh0, None


gru_fast.defvjp(_gru_fwd, _gru_bwd)


# ----------------------------------------------------------------------------------- LSTM

@partial(jax.custom_vjp, nondiff_argnums=(0,))
def lstm_fast(act, xs, U, V, b, h0, mask):
    return scan_cell("lstm", act, xs, {"U": U, "V": V, "b": b}, h0, mask)


def _lstm_fwd(act, xs, U, V, b, h0, mask):
    phi = get_activation(act).value
    H = h0.shape[-1]

    def step(state, inp):
        h, c = state
        x, m = inp
        a = x @ U + h @ V + _row(b)  # (B, 4H)
        i, f, o = jax.nn.sigmoid(a[:, :H]), jax.nn.sigmoid(a[:, H:2 * H]), jax.nn.sigmoid(a[:, 3 * H:])
        gg = phi(a[:, 2 * H:3 * H])
        c_new = f * c + i * gg
        h_new = o * phi(c_new)
        if m is not None:
            h_new, c_new = jnp.where(m, h_new, h), jnp.where(m, c_new, c)
        # saved: the gates and c_{t-1}; c_t = f c_{t-1} + i g is recomputed on the way back
        return (h_new, c_new), (h_new, i, f, gg, o, c)

    _, (hs, *saved) = lax.scan(step, (h0, jnp.zeros_like(h0)), (xs, mask))
    return hs, (xs, U, V, h0, hs, tuple(saved), mask)


def _lstm_bwd(act, res, g):
    """Reverse pass. g = dL/dh_t from the outputs, (T, B, H)."""
    xs, U, V, h0, hs, saved, mask = res
    act_fn = get_activation(act)
    phi, dphi = act_fn.value, act_fn.grad_from_output
    Vt = V.T

    def step(carry, inp):
        dh, dc = carry  # dL/dh_t, dL/dc_t through the recurrence
        g_t, i, f, gg, o, cp, m = inp
        pc = phi(f * cp + i * gg)  # phi(c_t)
        gh = g_t + dh  # (B, H) dL/dh_t
        dct = dc + gh * o * dphi(pc)  # (B, H) dL/dc_t
        da = jnp.concatenate([dct * gg * i * (1 - i), dct * cp * f * (1 - f),
                              dct * i * dphi(gg), gh * pc * o * (1 - o)], axis=1)  # (B, 4H)
        back_c = dct * f
        if m is not None:
            da = jnp.where(m, da, jnp.zeros_like(da))  # a padded step has no gates ...
            back_h = da @ Vt + jnp.where(m, jnp.zeros_like(gh), gh)  # ... and passes dh, dc on
            back_c = jnp.where(m, back_c, dc)
        else:
            back_h = da @ Vt
        return (back_h, back_c), da

    zeros = jnp.zeros_like(h0)
    (dh0, _), da = lax.scan(step, (zeros, zeros), (g,) + tuple(saved) + (mask,), reverse=True)
    h_prev = jnp.concatenate([h0[None], hs[:-1]], axis=0)  # (T, B, H)
    dV = _tb_product(h_prev, da)  # (H, 4H)
    dU = _tb_product(xs, da)  # (I, 4H)
    db = jnp.sum(da, axis=(0, 1))  # (4H,)
    dxs = times(da, U.T)  # dropped when unused
    return dxs, dU, dV, db, dh0, None


lstm_fast.defvjp(_lstm_fwd, _lstm_bwd)
