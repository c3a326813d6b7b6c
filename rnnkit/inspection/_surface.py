"""Loss surfaces around the trained weights, with filter-normalised directions.

Li, Xu, Taylor, Studer & Goldstein (2018), "Visualizing the loss landscape of
neural nets": a random direction d has the scale of the weights it moves
only after "filter normalisation": for every unit, its slice of d is rescaled
to the norm of the same slice of the weights; biases are left still (d = 0).
In our row-vector network a unit's incoming weights are a COLUMN of U, V and
W (a_t = x_t U + h_{t-1} V + b, o_t = h_t W + c), so the columns are rescaled.

Every point of the grid is evaluated by ONE jitted program: ``lax.map`` over
the grid with a ``batch_size``, i.e. vmap over a block of points at a time.
Each point runs its own forward pass that keeps only the state (and, many to
many, a running sum of the loss terms): the model's ``loss`` keeps every
step's state for its gradient, which for a block of points is tens of MB
written and read again (``lax.map`` of ``loss`` measured 2.3-3.6 s on the
demo's 15 x 15 surface, no faster than a loop of ``loss`` calls). The panel's
surface and slice (266 points on the demo's 2604 validation windows of 24
steps, H = 32) took 0.9 CPU seconds warm against 2.5 for the loop, 1.8
against 2.9 cold (benchmarks/bench_first_result.py, side by side on a busy
2-core machine). Its values equal ``loss`` to rounding (tests/test_diagnose.py).
"""
from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

from ..training._stored import stored_jit

from ..recurrent._cells import get_activation
from ..recurrent._model import loss as model_loss

# State floats (points x windows x hidden) of one block of points run together. Measured on
# the demo (2604 windows, H = 32, 2 busy cores): blocks of 2**20 floats (12 points, 4 MiB
# in float32) ran fastest; 2**22 and more were 2-3x slower (a block's states no longer
# stay in the CPU's caches between steps).
_BATCH_ELEMENTS = 2 ** 20
_MATRICES = ("U", "V", "W")


def filter_normalised(direction: dict, params: dict) -> dict:
    """Rescale each unit's column of every weight matrix to the weights' column norm; zero biases.

    Args:
      direction: dict like params (U (I,H), V (H,H), b (H,), W (H,O), c (O,)).
      params: the trained weights.

    Returns:
      dict of the same shapes: for a matrix, column j of the result has the norm
      of column j of the weights; vectors (biases) are zero.
    """
    out = {}
    for k, w in params.items():
        w = jnp.asarray(w)
        d = jnp.asarray(direction[k], w.dtype)
        if w.ndim < 2:
            out[k] = jnp.zeros_like(w)
            continue
        w_norm = jnp.linalg.norm(w, axis=0, keepdims=True)  # (1, units)
        d_norm = jnp.linalg.norm(d, axis=0, keepdims=True)
        tiny = jnp.asarray(jnp.finfo(w.dtype).tiny, w.dtype)
        out[k] = d * (w_norm / jnp.maximum(d_norm, tiny))
    return out


def random_direction(key, params: dict) -> dict:
    """A standard-normal direction with the shapes and dtypes of ``params``, filter-normalised."""
    keys = jax.random.split(key, len(params))
    raw = {k: jax.random.normal(kk, jnp.shape(v), jnp.asarray(v).dtype)
           for kk, (k, v) in zip(keys, sorted(params.items()))}
    return filter_normalised(raw, params)


def _point_loss(p, xt, yt, m, w, count, *, act, task, mode):
    """The model's loss at one point of the grid, keeping only the state.

    Args:
      p: params at the point.
      xt: (T, B, I) time-major windows.  m: (T, B, 1) bool mask or None.
      yt: targets, padded ones zeroed: regression (B, O) / (T, B, O), classification (B,) / (T, B).
      w: counted terms, (B,) / (T, B) bool, or None (all count).
      count: () number of counted terms (float).

    Returns:
      () the mean loss over counted terms, as ``recurrent.loss``.
    """
    phi = get_activation(act).value

    def advance(h, x, mt):
        new = phi(x @ p["U"] + h @ p["V"] + p["b"][None, :])  # (B, H)
        return new if mt is None else jnp.where(mt, new, h)  # padded steps hold the state

    def terms(h, y):  # (B, H), targets of one step -> (B,)
        o = h @ p["W"] + p["c"][None, :]  # (B, O)
        if task == "regression":
            return jnp.mean(jnp.square(o - y), axis=-1)
        picked = jnp.take_along_axis(o, y[:, None].astype(jnp.int32), axis=-1)[:, 0]
        return jax.nn.logsumexp(o, axis=-1) - picked  # softmax cross-entropy

    h0 = jnp.zeros((xt.shape[1], p["V"].shape[0]), xt.dtype)  # (B, H)
    if mode == "many-to-one":
        h, _ = lax.scan(lambda h, inp: (advance(h, inp[0], inp[1]), None), h0,
                        (xt, m) if m is not None else (xt, None))
        t = terms(h, yt)  # (B,)
        return jnp.sum(t if w is None else jnp.where(w, t, jnp.zeros_like(t))) / count

    def step(carry, inp):
        h, total = carry
        x, y, mt, wt = inp
        h = advance(h, x, mt)
        t = terms(h, y)
        return (h, total + jnp.sum(t if wt is None else jnp.where(wt, t, jnp.zeros_like(t)))), None

    (_, total), _ = lax.scan(step, (h0, jnp.zeros((), xt.dtype)), (xt, yt, m, w))
    return total / count


@stored_jit(static_argnames=("act", "task", "mode", "batch", "cell"))
def _grid_losses(params, d1, d2, points, xs, ys, mask, *, act, task, mode, batch, cell="elman"):
    """Loss at params + a d1 + b d2 for every (a, b) row of ``points`` (P, 2): (P,).

    xs (B, T, I), ys and mask (B, T) or None as ``recurrent.loss`` takes them.
    """
    xt = jnp.swapaxes(xs, 0, 1)  # (T, B, I)
    m = None if mask is None else jnp.swapaxes(mask, 0, 1)[:, :, None]  # (T, B, 1)
    yt = ys if mode == "many-to-one" else jnp.swapaxes(ys, 0, 1)  # (B, ...) / (T, B, ...)
    if m is None:
        w = None
        count = jnp.asarray(yt.shape[0] if mode == "many-to-one" else yt.shape[0] * yt.shape[1],
                            xs.dtype)
    else:
        w = jnp.any(m[:, :, 0], axis=0) if mode == "many-to-one" else m[:, :, 0]  # (B,) / (T, B)
        count = jnp.maximum(jnp.sum(w), 1).astype(xs.dtype)
        # Padded targets may hold NaN or -1: zero them (they count for nothing).
        yt = jnp.where(w if task == "classification" else w[..., None], yt, jnp.zeros_like(yt))

    def at(ab):
        p = {k: params[k] + ab[0] * d1[k] + ab[1] * d2[k] for k in params}
        if cell != "elman":  # gated cells: the model's own loss (its states are not kept either)
            return model_loss(p, xs, ys, activation=act, task=task, mode=mode, mask=mask, cell=cell)
        return _point_loss(p, xt, yt, m, w, count, act=act, task=task, mode=mode)

    return lax.map(at, points, batch_size=batch)


def _data(result, split):
    prepared = getattr(result, "prepared", None)
    if prepared is None:
        raise ValueError("this FitResult has no data attached (it was loaded from disk); "
                         "use load_fit(path, df=<the training frame>) to attach it")
    if split not in ("train", "val", "test"):
        raise ValueError(f"`split` (={split!r}) must be 'train', 'val' or 'test'")
    if len(prepared.starts[split]) == 0:
        raise ValueError(f"the {split!r} split has no window; choose another `split`")
    return prepared


def _axis(steps, span, name="steps"):
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or not 2 <= steps <= 401:
        raise ValueError(f"`{name}` (={steps!r}) must be a whole number from 2 to 401")
    if isinstance(span, bool) or not isinstance(span, (int, float)) or not math.isfinite(span) \
            or span <= 0:
        raise ValueError(f"`span` (={span!r}) must be a finite number > 0")
    a = np.linspace(-float(span), float(span), int(steps))
    if steps % 2:
        a[steps // 2] = 0.0  # the trained point exactly
    return a


def _evaluate(result, split, d1, d2, points):
    """Loss at every grid point (P,) as float64 numpy, in the config's dtype."""
    from ..training._train import precision

    prepared = result.prepared
    cfg = prepared.config
    dtype = np.dtype(cfg.dtype)
    x, y, mask = prepared.windows(split)
    if prepared.leads > 1:  # (N, L, O) -> the network's (N, L*O) outputs, lead-major
        y = y.reshape(len(y), -1)
    n, T = x.shape[:2]
    width = max(int(np.shape(result.params["V"])[0]), x.shape[2])
    batch = int(max(1, min(len(points), _BATCH_ELEMENTS // max(n * width, 1))))
    # Whole blocks only (the last point repeated): lax.map compiles a second copy of the
    # forward pass for a remainder (measured on the demo: 1.1-1.6 s to compile instead of 0.7-0.8 s).
    n_points = len(points)
    points = np.concatenate([points, np.repeat(points[-1:], -n_points % batch, axis=0)])
    with precision(cfg.dtype):
        p = {k: np.asarray(v, dtype) for k, v in result.params.items()}
        d1 = {k: np.asarray(v, dtype) for k, v in d1.items()}
        d2 = {k: np.asarray(v, dtype) for k, v in d2.items()}
        ys = np.asarray(y) if cfg.task == "classification" else np.asarray(y, dtype)
        values = _grid_losses(p, d1, d2, np.asarray(points, dtype), np.asarray(x, dtype), ys,
                              None if mask is None else np.asarray(mask), act=cfg.activation,
                              task=cfg.task, mode=cfg.mode, batch=batch, cell=cfg.cell)
    return np.asarray(values, np.float64)[:n_points]


def _directions(result, seed, how_many):
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= seed < 2 ** 32:
        raise ValueError(f"`seed` (={seed!r}) must be a whole number from 0 to 2**32 - 1")
    from ..training._train import precision

    dtype = np.dtype(result.prepared.config.dtype)
    with precision(dtype.name):
        params = {k: np.asarray(v, dtype) for k, v in result.params.items()}
        directions = _seeded_directions(params, np.asarray(seed, np.uint32), how_many=int(how_many))
        return params, [{k: np.asarray(v) for k, v in d.items()} for d in directions]


@stored_jit(static_argnames=("how_many",))
def _seeded_directions(params, seed, *, how_many):
    """``how_many`` random filter-normalised directions from ``seed``, as one program."""
    keys = jax.random.split(jax.random.key(seed), how_many)
    return [random_direction(keys[i], params) for i in range(how_many)]


def loss_surface(result, *, split: str = "val", steps: int = 21, span: float = 1.0, seed: int = 0):
    """The loss on a plane through the trained weights: theta + alpha d1 + beta d2.

    d1 and d2 are random, filter-normalised directions (Li et al. 2018); the
    loss is the model's loss (scaled units) over every window of ``split``.

    Args:
      result: a FitResult with its data (from ``fit``, or ``load_fit(path, df=...)``).
      split: "train", "val" or "test".
      steps: grid points per axis (odd: the trained point is on the grid).
      span: the grid covers [-span, span] in units of the weights' own norms.
      seed: seeds the two directions.

    Returns:
      (alphas (steps,), betas (steps,), values (steps, steps)) with values[i, j]
      the loss at (alphas[j], betas[i]), as ``rnnkit.plots.loss_surface`` takes it.

    Example:
      >>> a, b, v = loss_surface(result, steps=11)
      >>> fig = rnnkit.plots.loss_surface(a, b, v)
    """
    _data(result, split)
    alphas = _axis(steps, span)
    _, (d1, d2) = _directions(result, seed, 2)
    aa, bb = np.meshgrid(alphas, alphas)  # (steps, steps): rows follow beta
    points = np.stack([aa.ravel(), bb.ravel()], axis=1)  # (P, 2)
    values = _evaluate(result, split, d1, d2, points).reshape(len(alphas), len(alphas))
    return alphas, alphas.copy(), values


def loss_slice(result, *, param: str = "V", split: str = "val", steps: int = 41,
               span: float = 1.0, seed: int = 0):
    """The loss along one random filter-normalised direction that moves only one matrix.

    With ``param="V"`` this shows how sharply the loss depends on the recurrent
    matrix alone, every other weight held at its trained value.

    Args:
      result: a FitResult with its data.
      param: "V" (default), "U" or "W".
      split, steps, span, seed: as ``loss_surface``.

    Returns:
      (alphas (steps,), values (steps,)).
    """
    if param not in _MATRICES:
        raise ValueError(f"`param` (={param!r}) must be one of {list(_MATRICES)} (biases have no "
                         "filter-normalised direction: Li et al. 2018 keep them still)")
    _data(result, split)
    alphas = _axis(steps, span)
    _, (d,) = _directions(result, seed, 1)
    d1 = {k: (v if k == param else np.zeros_like(v)) for k, v in d.items()}
    d2 = {k: np.zeros_like(v) for k, v in d.items()}
    points = np.stack([alphas, np.zeros_like(alphas)], axis=1)  # (steps, 2)
    return alphas, _evaluate(result, split, d1, d2, points)
