"""Data preparation: Config, checks of the caller's frame, splits, windows by index, scaling.

Turns a DataFrame into a Prepared (arrays and row numbers, nothing trained);
also the invented demo data. May import: recurrent.
"""
from ._config import Config as Config
from ._errors import DataError as DataError
from ._prepare import prepare as prepare
from ._windows import Prepared as Prepared
from . import datasets as datasets
