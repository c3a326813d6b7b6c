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
The loop emits its gradients one step late, as the Elman loop does, so that
h_{t-1} pairs with the stored states row for row without a shifted copy.
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


def states_fast(cell: str, act: str, xs, params, h0, mask):
    """Hidden states (T, B, H) of a gated cell with the fast hand-written backward pass."""
    if cell == "gru":
        return gru_fast(act, xs, params["U"], params["V"], params["b"], params["bn"], h0, mask)
    return lstm_fast(act, xs, params["U"], params["V"], params["b"], h0, mask)


def _next_rows(xs):
    """x_{t+1} at row t (zeros at the end); small: I << H."""
    return jnp.concatenate([xs[1:], jnp.zeros_like(xs[:1])], axis=0)


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
        return new, (new, jnp.concatenate([r, z, n, hn], axis=1))  # (B, H), (B, 4H)

    _, (hs, saved) = lax.scan(step, h0, (xs, mask))
    return hs, (xs, U, V, h0, hs, saved, mask)


def _gru_bwd(act, res, g):
    """Reverse pass. g = dL/dh_t from the outputs, (T, B, H)."""
    xs, U, V, h0, hs, saved, mask = res
    dphi = get_activation(act).grad_from_output
    H = h0.shape[-1]
    Vt = V.T
    h_prev = jnp.concatenate([h0[None], hs[:-1]], axis=0)  # (T, B, H); cheap beside the gates
    zeros_g = jnp.zeros((h0.shape[0], 3 * H), h0.dtype)
    zeros_h = jnp.zeros_like(h0)

    def step(carry, inp):
        dh, dg_later, dan_later = carry  # dL/dh_t through the recurrence; dG_{t+1}, dA_n,{t+1}
        g_t, hp, s, m = inp
        r, z, n, hn = s[:, :H], s[:, H:2 * H], s[:, 2 * H:3 * H], s[:, 3 * H:]
        gh = g_t + dh  # (B, H) dL/dh_t
        dn = gh * (1 - z)
        da_n = dn * dphi(n)
        da_r = da_n * hn * r * (1 - r)
        da_z = gh * (hp - n) * z * (1 - z)
        dg = jnp.concatenate([da_r, da_z, da_n * r], axis=1)  # (B, 3H) dL/d(h V + [0, 0, bn])
        back = gh * z
        if m is not None:
            dg = jnp.where(m, dg, jnp.zeros_like(dg))  # a padded step has no gates ...
            da_n = jnp.where(m, da_n, jnp.zeros_like(da_n))
            back = jnp.where(m, back, gh)  # ... and passes dL/dh_t on unchanged
        return (dg @ Vt + back, dg, da_n), (dg_later, dan_later)

    xs_in = (g, h_prev, saved, mask)
    (dh0, dg0, dan0), (dg_next, dan_next) = lax.scan(step, (zeros_h, zeros_g, zeros_h), xs_in,
                                                     reverse=True)
    # the parameter gradients as single products over all T*B rows, plus the t = 0 terms
    dV = _tb_product(hs, dg_next) + h0.T @ dg0  # (H, 3H): sum_t h_{t-1}^T dG_t
    dbn = jnp.sum(dg_next[..., 2 * H:], axis=(0, 1)) + jnp.sum(dg0[:, 2 * H:], axis=0)  # (H,)
    # dA equals dG but in the candidate block, where it is da_n (before the reset gate)
    da_next = jnp.concatenate([dg_next[..., :2 * H], dan_next], axis=-1)  # (T, B, 3H)
    da0 = jnp.concatenate([dg0[:, :2 * H], dan0], axis=-1)  # (B, 3H)
    x_next = _next_rows(xs)
    dU = _tb_product(x_next, da_next) + xs[0].T @ da0  # (I, 3H)
    db = jnp.sum(da_next, axis=(0, 1)) + jnp.sum(da0, axis=0)  # (3H,)
    dxs = jnp.concatenate([(da0 @ U.T)[None], times(da_next[:-1], U.T)], axis=0)  # dropped when unused
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
        return (h_new, c_new), (h_new, jnp.concatenate([i, f, gg, o, c], axis=1))  # (B, 5H)

    _, (hs, saved) = lax.scan(step, (h0, jnp.zeros_like(h0)), (xs, mask))
    return hs, (xs, U, V, h0, hs, saved, mask)


def _lstm_bwd(act, res, g):
    """Reverse pass. g = dL/dh_t from the outputs, (T, B, H)."""
    xs, U, V, h0, hs, saved, mask = res
    act_fn = get_activation(act)
    phi, dphi = act_fn.value, act_fn.grad_from_output
    H = h0.shape[-1]
    Vt = V.T
    zeros_a = jnp.zeros((h0.shape[0], 4 * H), h0.dtype)
    zeros_h = jnp.zeros_like(h0)

    def step(carry, inp):
        dh, dc, da_later = carry  # dL/dh_t, dL/dc_t through the recurrence; dA_{t+1}
        g_t, s, m = inp
        i, f, gg, o, cp = (s[:, k * H:(k + 1) * H] for k in range(5))
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
        return (back_h, back_c, da), da_later

    (dh0, _, da0), da_next = lax.scan(step, (zeros_h, zeros_h, zeros_a), (g, saved, mask),
                                      reverse=True)
    dV = _tb_product(hs, da_next) + h0.T @ da0  # (H, 4H)
    x_next = _next_rows(xs)
    dU = _tb_product(x_next, da_next) + xs[0].T @ da0  # (I, 4H)
    db = jnp.sum(da_next, axis=(0, 1)) + jnp.sum(da0, axis=0)  # (4H,)
    dxs = jnp.concatenate([(da0 @ U.T)[None], times(da_next[:-1], U.T)], axis=0)
    return dxs, dU, dV, db, dh0, None


lstm_fast.defvjp(_lstm_fwd, _lstm_bwd)
