"""check_gradients: the fast JAX gradient against hand-written BPTT and finite differences."""
from __future__ import annotations

import jax
import numpy as np
import pandas as pd

from ..recurrent import reference
from ..recurrent._cells import get_cell
from ..recurrent._model import _resolve_activation, loss as _jax_loss


def _diff(a, b):
    """Max abs difference, and that divided by the larger gradient magnitude of the two."""
    abs_ = float(np.max(np.abs(a - b))) if a.size else 0.0
    scale = max(float(np.max(np.abs(a))) if a.size else 0.0,
                float(np.max(np.abs(b))) if b.size else 0.0)
    return abs_, (abs_ / scale if scale > 0 else 0.0)


def check_gradients(params, xs, ys, *, eps: float = 1e-6, **model_kw) -> pd.DataFrame:
    """Compare three gradients of the same loss, all in float64.

    ``jax`` is ``jax.grad(rnnkit.loss)`` (the fast custom-VJP BPTT), ``bptt`` the
    hand-written NumPy BPTT of ``rnnkit.reference``, ``fd`` central finite
    differences of the NumPy loss. A relative difference is the max abs
    difference divided by the largest entry (in magnitude) of the two gradients,
    so that entries near zero do not blow it up. Expect about 1e-12 between jax
    and bptt, and 1e-7 or less against fd; relu units whose pre-activation sits
    near 0 can make fd differ more (the kink).

    Finite differences cost two forward passes per parameter entry: keep H small.
    Works for every cell (``cell="gru"`` / ``"lstm"`` in ``model_kw``): the
    reference has a hand-written BPTT for each.

    Args:
      params: dict U (I, H), V (H, H), b (H,), W (H, O), c (O,), or a gated
        cell's dict (``init_params``).
      xs, ys: as ``rnnkit.loss``.
      eps: finite-difference step.
      **model_kw: activation (a name), task, mode, mask, h0, cell.

    Returns:
      DataFrame indexed by parameter name (U, V, b, [bn,] W, c) with columns shape,
      grad_norm, jax_vs_bptt_abs, jax_vs_bptt_rel, jax_vs_fd_abs, jax_vs_fd_rel,
      bptt_vs_fd_abs, bptt_vs_fd_rel.

    Example:
      >>> check_gradients(params, xs, ys, activation="tanh", task="regression",
      ...                 mode="many-to-one").round(10)
    """
    names = get_cell(model_kw.get("cell", "elman")).param_names
    if not isinstance(params, dict) or any(k not in params for k in names):
        raise ValueError(f"`params` must be a dict with keys {list(names)} "
                         "(make them with rnnkit.init_params)")
    if "activation" in model_kw and not isinstance(model_kw["activation"], str):
        # an index (as the training loop passes it) becomes its name for the NumPy reference
        model_kw["activation"] = _resolve_activation(model_kw["activation"])
    p64 = {k: np.asarray(params[k], dtype=np.float64) for k in names}
    xs64 = np.asarray(xs, dtype=np.float64)
    ys_np = np.asarray(ys)
    if np.issubdtype(ys_np.dtype, np.floating):
        ys_np = ys_np.astype(np.float64)
    # float64 JAX even when the session runs with x64 off (the usual default).
    with jax.enable_x64(True):
        g_jax = jax.grad(_jax_loss)(p64, xs64, ys_np, **model_kw)
        g_jax = {k: np.asarray(v, dtype=np.float64) for k, v in g_jax.items()}
    _, g_bptt = reference.bptt(p64, xs64, ys_np, **model_kw)
    g_fd = reference.finite_difference_grads(p64, xs64, ys_np, eps=eps, **model_kw)
    rows = []
    for k in names:
        row = {"parameter": k, "shape": tuple(p64[k].shape),
               "grad_norm": float(np.linalg.norm(g_jax[k]))}
        for name, a, b in (("jax_vs_bptt", g_jax[k], g_bptt[k]), ("jax_vs_fd", g_jax[k], g_fd[k]),
                           ("bptt_vs_fd", g_bptt[k], g_fd[k])):
            row[name + "_abs"], row[name + "_rel"] = _diff(a, b)
        rows.append(row)
    return pd.DataFrame(rows).set_index("parameter")
