"""Sweeps: plan settings, run them (serially, on processes, on any Executor), store every run.

Also the JSON document of a winning setting and its JSON Schema. May import:
fitting and everything below it.
"""
from ._export import FingerprintWarning as FingerprintWarning
from ._export import check_fingerprint as check_fingerprint
from ._export import load_config as load_config
from ._export import save_config as save_config
from ._plan import plan as plan
from ._runner import run as run
from ._store import RunStore as RunStore
from ._sweep import SweepResult as SweepResult
from ._sweep import sweep as sweep
