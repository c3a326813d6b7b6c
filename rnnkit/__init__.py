"""rnnkit: train, diagnose and tune simple recurrent networks on your own time series.

The parts, from the faces down (a part imports only parts below it):

    notebook, cli   the panel; the command line, its HTML report, the demo
    sweeps          plan, run, store; the JSON document
    fitting         fit(), FitResult, save and load; backtest()
    evaluation      metrics, baselines, significance tests
    inspection      gradient through time, spectra, saturation, loss surfaces
    training        optax loop, compiled epoch programs
    data            Config, checks, splits, windows, scaling; demo data
    recurrent       cells, scans, fast BPTT, the NumPy reference
    plots           figure builders (data in, Figure out)
"""
from ._version import __version__ as __version__
from .inspection import check_gradients as check_gradients
from .recurrent import hidden_states as hidden_states
from .recurrent import init_params as init_params
from .recurrent import loss as loss
from .recurrent import outputs as outputs
from .recurrent import predict_classes as predict_classes
from .recurrent import reference as reference
from .recurrent import from_torch as from_torch
from .recurrent import to_torch as to_torch
from .data import Config as Config
from .data import DataError as DataError
from .data import Prepared as Prepared
from .data import datasets as datasets
from .data import prepare as prepare
from .training import compilation_cache as compilation_cache
from .training import compile_count as compile_count
from .inspection import Diagnostics as Diagnostics
from .inspection import loss_slice as loss_slice
from .inspection import loss_surface as loss_surface
from .fitting import FitResult as FitResult
from .fitting import fit as fit
from .fitting import load_fit as load_fit
from .fitting import BacktestResult as BacktestResult
from .fitting import backtest as backtest
from .sweeps import FingerprintWarning as FingerprintWarning
from .sweeps import RunStore as RunStore
from .sweeps import SweepResult as SweepResult
from .sweeps import check_fingerprint as check_fingerprint
from .sweeps import load_config as load_config
from .sweeps import plan as plan
from .sweeps import run as run
from .sweeps import save_config as save_config
from .sweeps import sweep as sweep


# matplotlib and ipywidgets load on first use of `rnnkit.plots` or `rnnkit.panel`, not
# on `import rnnkit`: about 0.5 s that a script, the command line or a sweep's worker
# process never needs.
_LAZY = {"plots": ("rnnkit.plots", None), "panel": ("rnnkit.notebook", "panel")}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        value = importlib.import_module(module)
        value = value if attr is None else getattr(value, attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'rnnkit' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
