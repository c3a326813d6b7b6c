"""rnnkit: train, diagnose and tune simple recurrent networks on your own time series."""
from ._config import Config as Config
from ._errors import DataError as DataError
from ._cells import init_params as init_params
from ._model import hidden_states as hidden_states
from ._model import outputs as outputs
from ._model import loss as loss
from ._model import predict_classes as predict_classes
from ._gradcheck import check_gradients as check_gradients
from . import reference as reference
from . import datasets as datasets

__version__ = "0.1.0"
from ._data import prepare as prepare
from ._windows import Prepared as Prepared
from ._export import load_config as load_config
from ._export import save_config as save_config
from ._export import check_fingerprint as check_fingerprint
from ._export import FingerprintWarning as FingerprintWarning
from ._fit import fit as fit
from ._fit import FitResult as FitResult
from ._fit_io import load_fit as load_fit
from ._diagnose import Diagnostics as Diagnostics
from ._diagnose import loss_surface as loss_surface
from ._diagnose import loss_slice as loss_slice
from ._sweep import sweep as sweep
from ._sweep import SweepResult as SweepResult
from ._plan import plan as plan
from ._runner import run as run
from ._store import RunStore as RunStore
from ._train import compile_count as compile_count


# matplotlib and ipywidgets load on first use of `rnnkit.plots` or `rnnkit.panel`, not
# on `import rnnkit`: about 0.5 s that a script, the command line or a sweep's worker
# process never needs.
_LAZY = {"plots": ("rnnkit.plots", None), "panel": ("rnnkit._panel", "panel")}


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
