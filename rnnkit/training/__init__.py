"""Training: optax optimizers, one compiled program per epoch, early stopping, evaluation.

Takes a Prepared and a Config, returns weights and a history. May import:
data, recurrent. Importing it switches on the on-disk cache of compiled
programs (``_cache``; ``compilation_cache`` moves it or turns it off).
"""
from . import _cache
from ._cache import compilation_cache as compilation_cache
from ._train import compile_count as compile_count
from ._train import evaluate as evaluate
from ._train import train as train

_cache.switch_on_default()
