"""The specification: a plain NumPy Elman network, hand-written BPTT, finite differences.

Slow and readable on purpose; float64 throughout. The JAX model (``rnnkit.loss``
and friends) must agree with these functions, and the tests hold it to that.

Row-vector convention, parameters shared by every step:

    a_t = x_t U + h_{t-1} V + b      U (I, H), V (H, H), b (H,)
    h_t = phi(a_t)                   (held, h_t = h_{t-1}, on a padded step)
    o_t = h_t W + c                  W (H, O), c (O,)

Loss: regression, the mean of (o - y)^2 over counted terms and output units
(no 1/2); classification, the mean softmax cross-entropy over counted terms.
Many-to-many counts every real step; many-to-one counts the last step of every
sequence that has at least one real step.
"""
from __future__ import annotations

import numpy as np

_PHI = {  # value phi(a) and derivative phi'(a), both in terms of a
    "tanh": (np.tanh, lambda a: 1.0 - np.tanh(a) ** 2),
    "sigmoid": (lambda a: 1.0 / (1.0 + np.exp(-a)),
                lambda a: np.exp(-a) / (1.0 + np.exp(-a)) ** 2),
    "relu": (lambda a: np.maximum(a, 0.0), lambda a: (a > 0).astype(np.float64)),
    "linear": (lambda a: a, np.ones_like),
}
_TASKS = ("regression", "classification")
_MODES = ("many-to-one", "many-to-many")


def _choice(name, value, allowed):
    if value not in allowed:
        raise ValueError(f"`{name}` (={value!r}) is unknown; use one of {allowed}")


def _as64(params):
    return {k: np.asarray(params[k], dtype=np.float64) for k in ("U", "V", "b", "W", "c")}


def _batched(xs, mask, h0, n_hidden):
    """(B, T, I) inputs, (B, T) bool mask and (B, H) initial state, and whether xs was batched."""
    xs = np.asarray(xs, dtype=np.float64)
    if xs.ndim not in (2, 3):
        raise ValueError(f"`xs` has shape {xs.shape}; expected (T, I) or (B, T, I)")
    batched = xs.ndim == 3
    x = xs if batched else xs[None]
    B, T, _ = x.shape
    m = np.ones((B, T), bool) if mask is None else np.asarray(mask, bool).reshape(B, T)
    h = np.zeros((B, n_hidden)) if h0 is None else np.broadcast_to(
        np.asarray(h0, np.float64), (B, n_hidden))
    return x, m, h, batched


def _run(p, x, m, h0, activation):
    """Forward pass on batched inputs; keeps what BPTT needs."""
    _choice("activation", activation, tuple(_PHI))
    phi, _ = _PHI[activation]
    B, T, _ = x.shape
    H = p["V"].shape[0]
    a = np.zeros((B, T, H))
    hs = np.zeros((B, T, H))
    h = h0
    for t in range(T):
        a[:, t] = x[:, t] @ p["U"] + h @ p["V"] + p["b"]
        h = np.where(m[:, t, None], phi(a[:, t]), h)  # padded step: hold the state
        hs[:, t] = h
    os = hs @ p["W"] + p["c"]  # (B, T, O)
    return a, hs, os


def forward(params, xs, *, activation="tanh", h0=None, mask=None):
    """States and outputs of every step.

    Args:
      params: dict U (I, H), V (H, H), b (H,), W (H, O), c (O,).
      xs: (B, T, I) or (T, I).
      activation: "tanh", "sigmoid", "relu" or "linear".
      h0: initial state (H,) or (B, H); zeros when None.
      mask: (B, T) or (T,) bool; a False step holds the state.

    Returns:
      hs (B, T, H) and os (B, T, O); without the B axis for unbatched xs.
    """
    p = _as64(params)
    x, m, h, batched = _batched(xs, mask, h0, p["V"].shape[0])
    _, hs, os = _run(p, x, m, h, activation)
    return (hs, os) if batched else (hs[0], os[0])


def _softmax(o):
    e = np.exp(o - o.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def _loss_and_dout(os, ys, m, task, mode, batched):
    """The loss and dL/do_t for every step, (B, T, O)."""
    _choice("task", task, _TASKS)
    _choice("mode", mode, _MODES)
    B, T, O = os.shape
    ys = np.asarray(ys)
    y = ys if batched else ys[None]
    # w (B, T): which output terms count.
    if mode == "many-to-many":
        w = m.astype(np.float64)
    else:
        w = np.zeros((B, T))
        w[:, -1] = m.any(axis=1)
        y = np.repeat(y[:, None], T, axis=1)  # only the last step is used
    n = max(w.sum(), 1.0)
    if task == "regression":
        y = np.where(w[..., None] > 0, y.astype(np.float64).reshape(B, T, O), 0.0)
        err = os - y
        L = np.sum(w[..., None] * err ** 2) / (n * O)
        d_os = 2.0 * w[..., None] * err / (n * O)
    else:
        y = np.where(w > 0, y.astype(np.int64).reshape(B, T), 0)
        onehot = np.eye(O)[y]  # (B, T, O)
        q = _softmax(os)
        logz = np.log(np.exp(os - os.max(-1, keepdims=True)).sum(-1)) + os.max(-1)
        L = np.sum(w * (logz - np.sum(onehot * os, axis=-1))) / n
        d_os = w[..., None] * (q - onehot) / n
    return L, d_os


def loss(params, xs, ys, *, activation="tanh", task="regression", mode="many-to-many",
         mask=None, h0=None):
    """The scalar loss (same conventions as ``rnnkit.loss``)."""
    p = _as64(params)
    x, m, h, batched = _batched(xs, mask, h0, p["V"].shape[0])
    _, _, os = _run(p, x, m, h, activation)
    return _loss_and_dout(os, ys, m, task, mode, batched)[0]


def bptt(params, xs, ys, *, activation="tanh", task="regression", mode="many-to-many",
         mask=None, h0=None):
    """Loss and gradients by hand-written backpropagation through time.

    The equations of Goodfellow, Bengio & Courville, Deep Learning (2016),
    sec. 10.2.2, in the row-vector convention, with dL/do_t from the loss:

        dW = sum_t h_t^T do_t                dc = sum_t do_t
        dh_t = do_t W^T + dL/dh_t from step t+1
        da_t = dh_t * phi'(a_t)              (0 on a padded step)
        dL/dh_{t-1} = da_t V^T  (+ dh_t on a padded step, whose state is held)
        dU = sum_t x_t^T da_t   dV = sum_t h_{t-1}^T da_t   db = sum_t da_t

    Args: as ``loss``.

    Returns:
      (loss, grads) with grads a dict of the same shapes as params.
    """
    p = _as64(params)
    x, m, h0_, batched = _batched(xs, mask, h0, p["V"].shape[0])
    _choice("activation", activation, tuple(_PHI))
    _, dphi = _PHI[activation]
    a, hs, os = _run(p, x, m, h0_, activation)
    L, d_os = _loss_and_dout(os, ys, m, task, mode, batched)
    B, T, _ = x.shape
    g = {k: np.zeros_like(v) for k, v in p.items()}
    g["W"] = np.einsum("bth,bto->ho", hs, d_os)
    g["c"] = d_os.sum(axis=(0, 1))
    dh_next = np.zeros_like(h0_)  # dL/dh_t arriving from step t+1
    for t in reversed(range(T)):
        dh = d_os[:, t] @ p["W"].T + dh_next  # (B, H)
        real = m[:, t, None]
        da = np.where(real, dh * dphi(a[:, t]), 0.0)  # (B, H)
        h_prev = hs[:, t - 1] if t > 0 else h0_
        g["U"] += x[:, t].T @ da
        g["V"] += h_prev.T @ da
        g["b"] += da.sum(axis=0)
        dh_next = da @ p["V"].T + np.where(real, 0.0, dh)
    return L, g


def finite_difference_grads(params, xs, ys, *, eps=1e-6, **model_kw):
    """Central differences (L(p + eps) - L(p - eps)) / (2 eps) for every parameter entry.

    Args:
      params, xs, ys: as ``loss``.
      eps: the step; about 1e-6 balances truncation and rounding in float64.
      **model_kw: activation, task, mode, mask, h0.

    Returns:
      dict of gradients with the shapes of params.
    """
    p = _as64(params)
    grads = {}
    for k, v in p.items():
        gk = np.zeros_like(v)
        for idx in np.ndindex(v.shape):
            plus = {**p, k: v.copy()}
            minus = {**p, k: v.copy()}
            plus[k][idx] += eps
            minus[k][idx] -= eps
            gk[idx] = (loss(plus, xs, ys, **model_kw) - loss(minus, xs, ys, **model_kw)) / (2 * eps)
        grads[k] = gk
    return grads
