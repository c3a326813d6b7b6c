"""The compiled forecast: one program runs a trained network past the end of the data.

The network forecasts L leads at once from its last T input rows (the
multi-output direct strategy). A longer forecast goes on in blocks of L: the
window slides L rows on, the L forecasts just made become the target's input
values there (when the target is an input), and the next block is forecast
(the recursive strategy at the level of blocks; Ben Taieb et al. 2012 compare
both). Every block, for every sequence at once, runs inside ONE jitted
``lax.fori_loop``: no host round trip between blocks.
"""
from __future__ import annotations

import threading
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

from ..recurrent._model import outputs as model_outputs
from ._epoch import _COMPILER_OPTIONS
from ._stored import StoredProgram

_LOCK = threading.Lock()
_CACHE = {}  # (steps, leads, blocks, fed, cell) -> jitted function


def _build(steps: int, leads: int, blocks: int, fed: int, cell: str):
    def run(params, buffer, act):
        # buffer (G, T + blocks*L, I) scaled inputs: the last T known rows, then future rows
        # (feature values known; target columns, the first `fed`, filled block by block).
        G = buffer.shape[0]
        n_out = params["c"].shape[0] // leads  # O
        mask = jnp.ones((G, steps), dtype=bool)

        def block(b, carry):
            buf, out = carry
            at = b * leads
            x = lax.dynamic_slice_in_dim(buf, at, steps, axis=1)  # (G, T, I)
            o = model_outputs(params, x, activation=act, mask=mask, cell=cell)[:, -1]  # (G, L*O)
            o = o.reshape(G, leads, n_out)  # (G, L, O) lead-major, as trained
            out = lax.dynamic_update_slice_in_dim(out, o, at, axis=1)
            if fed:
                rows = lax.dynamic_slice_in_dim(buf, steps + at, leads, axis=1)  # (G, L, I)
                rows = rows.at[:, :, :fed].set(o)
                buf = lax.dynamic_update_slice_in_dim(buf, rows, steps + at, axis=1)
            return buf, out

        out = jnp.zeros((G, blocks * leads, n_out), buffer.dtype)
        return lax.fori_loop(0, blocks, block, (buffer, out))[1]  # (G, blocks*L, O)

    return jax.jit(run, compiler_options=_COMPILER_OPTIONS)


def rollout_program(*, steps: int, leads: int, blocks: int, fed: int, cell: str = "elman"):
    """The cached jitted ``f(params, buffer (G, T + blocks*L, I), act) -> (G, blocks*L, O)``.

    Args:
      steps: the window T. leads: L outputs per target column. blocks: forecast blocks.
      fed: how many leading input columns are the target's own (O, or 0 when the
        target is no input); they receive each block's forecasts. cell: the recurrent cell.
    Outputs are scaled (and transformed) as the network was trained.
    """
    key = (int(steps), int(leads), int(blocks), int(fed), str(cell))
    with _LOCK:
        if key not in _CACHE:
            _CACHE[key] = StoredProgram(partial(_build, *key), ("rollout",) + key)
        return _CACHE[key]


def rollout(params: dict, buffer: np.ndarray, act, *, steps: int, leads: int, blocks: int,
            fed: int, cell: str = "elman") -> np.ndarray:
    """Run ``rollout_program`` in the params' dtype; numpy (G, blocks*L, O)."""
    from ._train import precision

    dtype = np.dtype(np.asarray(params["U"]).dtype)
    with precision(dtype.name):
        p = {k: np.asarray(v, dtype) for k, v in params.items()}
        program = rollout_program(steps=steps, leads=leads, blocks=blocks, fed=fed, cell=cell)
        return np.asarray(program(p, np.asarray(buffer, dtype), np.asarray(act)))
