"""The specification: plain NumPy Elman, GRU and LSTM networks, hand-written BPTT, finite differences.

Slow and readable on purpose; float64 throughout. The JAX model (``rnnkit.loss``
and friends) must agree with these functions, and the tests hold it to that.

Row-vector convention, parameters shared by every step:

    a_t = x_t U + h_{t-1} V + b      U (I, H), V (H, H), b (H,)
    h_t = phi(a_t)                   (held, h_t = h_{t-1}, on a padded step)
    o_t = h_t W + c                  W (H, O), c (O,)

GRU (``cell="gru"``), as torch.nn.GRU computes it (Cho et al. 2014 with the
reset gate applied after the recurrent product; the torch.nn.GRU docs' formula),
gate blocks [r | z | n] of width H along the last axis:

    r = sigma(x U_r + h V_r + b_r)      z = sigma(x U_z + h V_z + b_z)
    n = phi(x U_n + b_n + r * (h V_n + bn))
    h' = (1 - z) * n + z * h

LSTM (``cell="lstm"``) with a forget gate and no peepholes (Hochreiter &
Schmidhuber 1997; Gers, Schmidhuber & Cummins 2000), as torch.nn.LSTM, blocks
[i | f | g | o]:

    i, f, o = sigma(.), g = phi(.)  of  x U + h V + b
    c' = f * c + i * g,   h' = o * phi(c')

A padded step holds the whole state (h and c).

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


_NAMES = {"elman": ("U", "V", "b", "W", "c"), "gru": ("U", "V", "b", "bn", "W", "c"),
          "lstm": ("U", "V", "b", "W", "c")}


def _as64(params, cell="elman"):
    _choice("cell", cell, tuple(_NAMES))
    return {k: np.asarray(params[k], dtype=np.float64) for k in _NAMES[cell]}


def _sigma(a):
    return 1.0 / (1.0 + np.exp(-a))


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


def _run_gru(p, x, m, h0, activation):
    """GRU forward pass on batched inputs; keeps every gate for BPTT."""
    _choice("activation", activation, tuple(_PHI))
    phi, _ = _PHI[activation]
    B, T, _ = x.shape
    H = p["V"].shape[0]
    keep = {k: np.zeros((B, T, H)) for k in ("r", "z", "n", "an", "hn")}
    hs = np.zeros((B, T, H))
    h = h0
    for t in range(T):
        ax = x[:, t] @ p["U"] + p["b"]  # (B, 3H)
        ah = h @ p["V"]  # (B, 3H)
        r = _sigma(ax[:, :H] + ah[:, :H])
        z = _sigma(ax[:, H:2 * H] + ah[:, H:2 * H])
        hn = ah[:, 2 * H:] + p["bn"]  # the recurrent part of the candidate, before the reset gate
        an = ax[:, 2 * H:] + r * hn
        n = phi(an)
        h = np.where(m[:, t, None], (1 - z) * n + z * h, h)
        hs[:, t] = h
        for k, v in (("r", r), ("z", z), ("n", n), ("an", an), ("hn", hn)):
            keep[k][:, t] = v
    return keep, hs, hs @ p["W"] + p["c"]


def _run_lstm(p, x, m, h0, activation):
    """LSTM forward pass on batched inputs; keeps gates and cell states for BPTT."""
    _choice("activation", activation, tuple(_PHI))
    phi, _ = _PHI[activation]
    B, T, _ = x.shape
    H = p["V"].shape[0]
    keep = {k: np.zeros((B, T, H)) for k in ("i", "f", "g", "o", "ag", "c", "c_prev")}
    hs = np.zeros((B, T, H))
    h, c = h0, np.zeros_like(h0)
    for t in range(T):
        a = x[:, t] @ p["U"] + h @ p["V"] + p["b"]  # (B, 4H)
        i, f, o = _sigma(a[:, :H]), _sigma(a[:, H:2 * H]), _sigma(a[:, 3 * H:])
        g = phi(a[:, 2 * H:3 * H])
        real = m[:, t, None]
        keep["c_prev"][:, t] = c
        c_new = f * c + i * g
        h = np.where(real, o * phi(c_new), h)
        c = np.where(real, c_new, c)
        hs[:, t] = h
        for k, v in (("i", i), ("f", f), ("g", g), ("o", o), ("ag", a[:, 2 * H:3 * H]), ("c", c_new)):
            keep[k][:, t] = v
    return keep, hs, hs @ p["W"] + p["c"]


_RUN = {"elman": _run, "gru": _run_gru, "lstm": _run_lstm}


def forward(params, xs, *, activation="tanh", h0=None, mask=None, cell="elman"):
    """States and outputs of every step.

    Args:
      params: dict U (I, H), V (H, H), b (H,), W (H, O), c (O,) for Elman; the
        gated layouts as ``rnnkit.init_params`` (GRU adds bn (H,); blocks of width H).
      xs: (B, T, I) or (T, I).
      activation: "tanh", "sigmoid", "relu" or "linear".
      h0: initial state (H,) or (B, H); zeros when None.
      mask: (B, T) or (T,) bool; a False step holds the state.
      cell: "elman", "gru" or "lstm".

    Returns:
      hs (B, T, H) and os (B, T, O); without the B axis for unbatched xs.
    """
    p = _as64(params, cell)
    x, m, h, batched = _batched(xs, mask, h0, p["V"].shape[0])
    _, hs, os = _RUN[cell](p, x, m, h, activation)
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
         mask=None, h0=None, cell="elman"):
    """The scalar loss (same conventions as ``rnnkit.loss``)."""
    p = _as64(params, cell)
    x, m, h, batched = _batched(xs, mask, h0, p["V"].shape[0])
    _, _, os = _RUN[cell](p, x, m, h, activation)
    return _loss_and_dout(os, ys, m, task, mode, batched)[0]


def bptt(params, xs, ys, *, activation="tanh", task="regression", mode="many-to-many",
         mask=None, h0=None, cell="elman"):
    """Loss and gradients by hand-written backpropagation through time.

    The equations of Goodfellow, Bengio & Courville, Deep Learning (2016),
    sec. 10.2.2, in the row-vector convention, with dL/do_t from the loss:

        dW = sum_t h_t^T do_t                dc = sum_t do_t
        dh_t = do_t W^T + dL/dh_t from step t+1
        da_t = dh_t * phi'(a_t)              (0 on a padded step)
        dL/dh_{t-1} = da_t V^T  (+ dh_t on a padded step, whose state is held)
        dU = sum_t x_t^T da_t   dV = sum_t h_{t-1}^T da_t   db = sum_t da_t

    The gated cells have their own backward steps (``_bptt_gru``, ``_bptt_lstm``).

    Args: as ``loss``.

    Returns:
      (loss, grads) with grads a dict of the same shapes as params.
    """
    if cell != "elman":
        _choice("cell", cell, tuple(_NAMES))
        return _GATED_BPTT[cell](_as64(params, cell), xs, ys, activation, task, mode, mask, h0)
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
      **model_kw: activation, task, mode, mask, h0, cell.

    Returns:
      dict of gradients with the shapes of params.
    """
    p = _as64(params, model_kw.get("cell", "elman"))
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


def _bptt_gru(p, xs, ys, activation, task, mode, mask, h0):
    """GRU loss and gradients by hand-written BPTT (chain rule through the forward above).

    With dh = dL/dh_t (from o_t and from step t+1), on a real step:

        dn = dh (1 - z)          dz = dh (h_{t-1} - n)        dL/dh_{t-1} gets dh z
        da_n = dn phi'(a_n)      dr = da_n hn   (hn = h_{t-1} V_n + bn)    dhn = da_n r
        da_r = dr r (1 - r)      da_z = dz z (1 - z)
        dU += x^T [da_r da_z da_n]      db += [da_r da_z da_n]
        dV += h_{t-1}^T [da_r da_z dhn] dbn += dhn
        dL/dh_{t-1} += [da_r da_z dhn] V^T
    """
    x, m, h0_, batched = _batched(xs, mask, h0, p["V"].shape[0])
    _, dphi = _PHI[activation]
    keep, hs, os = _run_gru(p, x, m, h0_, activation)
    L, d_os = _loss_and_dout(os, ys, m, task, mode, batched)
    T = x.shape[1]
    g = {k: np.zeros_like(v) for k, v in p.items()}
    g["W"] = np.einsum("bth,bto->ho", hs, d_os)
    g["c"] = d_os.sum(axis=(0, 1))
    dh_next = np.zeros_like(h0_)
    for t in reversed(range(T)):
        dh = d_os[:, t] @ p["W"].T + dh_next  # (B, H)
        real = m[:, t, None]
        r, z, n, an, hn = (keep[k][:, t] for k in ("r", "z", "n", "an", "hn"))
        h_prev = hs[:, t - 1] if t > 0 else h0_
        dn = dh * (1 - z)
        dz = dh * (h_prev - n)
        da_n = dn * dphi(an)
        dr = da_n * hn
        dhn = da_n * r
        da_r = dr * r * (1 - r)
        da_z = dz * z * (1 - z)
        dax = np.where(real, np.concatenate([da_r, da_z, da_n], axis=1), 0.0)  # (B, 3H)
        dah = np.where(real, np.concatenate([da_r, da_z, dhn], axis=1), 0.0)  # (B, 3H)
        g["U"] += x[:, t].T @ dax
        g["b"] += dax.sum(axis=0)
        g["V"] += h_prev.T @ dah
        g["bn"] += np.where(real, dhn, 0.0).sum(axis=0)
        dh_next = dah @ p["V"].T + np.where(real, dh * z, dh)  # a padded step passes dh on
    return L, g


def _bptt_lstm(p, xs, ys, activation, task, mode, mask, h0):
    """LSTM loss and gradients by hand-written BPTT.

    With dh = dL/dh_t and dc = dL/dc_t from step t+1, on a real step:

        dc += dh o phi'(c_t)     do = dh phi(c_t)
        di = dc g    df = dc c_{t-1}    dg = dc i    dL/dc_{t-1} = dc f
        da = [di i(1-i), df f(1-f), dg phi'(a_g), do o(1-o)]
        dU += x^T da    dV += h_{t-1}^T da    db += da    dL/dh_{t-1} = da V^T
    """
    x, m, h0_, batched = _batched(xs, mask, h0, p["V"].shape[0])
    phi, dphi = _PHI[activation]
    keep, hs, os = _run_lstm(p, x, m, h0_, activation)
    L, d_os = _loss_and_dout(os, ys, m, task, mode, batched)
    T = x.shape[1]
    g = {k: np.zeros_like(v) for k, v in p.items()}
    g["W"] = np.einsum("bth,bto->ho", hs, d_os)
    g["c"] = d_os.sum(axis=(0, 1))
    dh_next = np.zeros_like(h0_)
    dc_next = np.zeros_like(h0_)
    for t in reversed(range(T)):
        dh = d_os[:, t] @ p["W"].T + dh_next  # (B, H)
        real = m[:, t, None]
        i, f, gg, o, ag, c, c_prev = (keep[k][:, t] for k in ("i", "f", "g", "o", "ag", "c", "c_prev"))
        h_prev = hs[:, t - 1] if t > 0 else h0_
        dc = dc_next + dh * o * dphi(c)
        do = dh * phi(c)
        da = np.concatenate([dc * gg * i * (1 - i), dc * c_prev * f * (1 - f),
                             dc * i * dphi(ag), do * o * (1 - o)], axis=1)  # (B, 4H)
        da = np.where(real, da, 0.0)
        g["U"] += x[:, t].T @ da
        g["V"] += h_prev.T @ da
        g["b"] += da.sum(axis=0)
        dh_next = da @ p["V"].T + np.where(real, 0.0, dh)
        dc_next = np.where(real, dc * f, dc_next)
    return L, g


_GATED_BPTT = {"gru": _bptt_gru, "lstm": _bptt_lstm}
