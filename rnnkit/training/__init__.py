"""Training: optax optimizers, one compiled program per epoch, early stopping, evaluation.

Takes a Prepared and a Config, returns weights and a history. May import:
data, recurrent.
"""
from ._train import compile_count as compile_count
from ._train import evaluate as evaluate
from ._train import train as train
