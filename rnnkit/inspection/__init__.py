"""Inspection: gradient through time, spectra, saturation, loss surfaces, gradient checks.

Works on weights and a Prepared. May import: training, data, recurrent.
"""
from ._diagnose import Diagnostics as Diagnostics
from ._surface import loss_slice as loss_slice
from ._surface import loss_surface as loss_surface
from ._gradcheck import check_gradients as check_gradients
