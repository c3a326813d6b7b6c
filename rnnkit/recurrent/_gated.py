"""The gated cells over time: GRU and LSTM states, time-major and batched.

Everything here is time-major: xs (T, B, I), states (T, B, H), mask (T, B, 1)
bool or None. ``states_autodiff`` is the plain ``lax.scan`` of the cell's step
(``_cells.gru_step`` / ``lstm_step``), differentiated by JAX.
"""
from __future__ import annotations

from ._scan import scan_cell


def states_autodiff(cell: str, act: str, xs, params, h0, mask):
    """Hidden states (T, B, H) of a gated cell; the gradient is JAX autodiff of the scan."""
    return scan_cell(cell, act, xs, params, h0, mask)


states_fast = states_autodiff
