"""fit(): train, score against the baselines, keep diagnostics; FitResult, save and load;
backtest(): rolling-origin folds of fit() and the significance of the differences.

The one function most users call. May import: evaluation, inspection,
training, data, recurrent, plots.
"""
from ._fit import FitResult as FitResult
from ._fit import fit as fit
from ._fit import load_fit as load_fit
from ._backtest import BacktestResult as BacktestResult
from ._backtest import backtest as backtest
