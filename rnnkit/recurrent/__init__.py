"""The recurrent math: cells, the scan over time, its fast backward pass, and the NumPy reference.

Pure functions of arrays and parameter dicts; knows nothing of DataFrames or
Config. Imports no other part of rnnkit.
"""
from ._names import ACTIVATIONS as ACTIVATIONS
from ._names import CELLS as CELLS
from ._names import INITS as INITS
from ._names import MODES as MODES
from ._names import TASKS as TASKS
from ._cells import init_params as init_params
from ._model import hidden_states as hidden_states
from ._model import loss as loss
from ._model import outputs as outputs
from ._model import predict_classes as predict_classes
from ._torch import from_torch as from_torch
from ._torch import to_torch as to_torch
from . import reference as reference
