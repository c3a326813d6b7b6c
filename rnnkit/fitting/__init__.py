"""fit(): train, score against the baselines, keep diagnostics; FitResult, save and load.

The one function most users call. May import: evaluation, inspection,
training, data, recurrent, plots.
"""
from ._fit import FitResult as FitResult
from ._fit import fit as fit
from ._fit import load_fit as load_fit
