"""rnnkit: train, diagnose and tune simple recurrent networks on your own time series."""
from ._config import Config as Config
from ._errors import DataError as DataError

__version__ = "0.1.0"
