"""Optimizers by name, with every numeric hyperparameter held as data.

All optimizers come from optax. Each is wrapped in ``optax.inject_hyperparams``
so that the learning rate, the weight decay and the clipping norm live in the
optimizer *state* (arrays), not in the traced program: two runs that differ
only in those numbers reuse one compiled training program. What does change
the program (the optimizer's name and whether clipping is on) is returned as
a hashable ``key`` for the program cache.
"""
from __future__ import annotations

from typing import Dict, Tuple

import jax.numpy as jnp
import numpy as np

from ..data._config import OPTIMIZERS

MOMENTUM = 0.9  # heavy-ball coefficient of the "momentum" optimizer


def _inner(name: str, learning_rate, weight_decay=None):
    # The optax transformation for one name; hyperparameters may be traced arrays.
    import optax  # loaded by the first training, not by `import rnnkit` (about 0.1 s)

    if name == "sgd":
        return optax.sgd(learning_rate)
    if name == "momentum":
        return optax.sgd(learning_rate, momentum=MOMENTUM)
    if name == "rmsprop":
        return optax.rmsprop(learning_rate)
    if name == "adam":
        return optax.adam(learning_rate)
    return optax.adamw(learning_rate, weight_decay=weight_decay)


def program_key(optimizer: str, clip) -> Tuple[str, bool]:
    """What of the optimizer choice changes the compiled program: (name, clipping on)."""
    if optimizer not in OPTIMIZERS:
        raise ValueError(f"`optimizer` (={optimizer!r}) is unknown; use one of "
                         + ", ".join(repr(o) for o in OPTIMIZERS))
    return optimizer, clip is not None


def make_optimizer(optimizer: str, clipping: bool, dtype) -> "optax.GradientTransformation":
    """``chain(clip_by_global_norm, optimizer)`` with injected hyperparameters.

    Args:
      optimizer: one of OPTIMIZERS.
      clipping: whether to clip the global gradient norm first (Pascanu et al. 2013).
      dtype: float dtype of the parameters; the hyperparameters are stored in it
        so that an update never promotes float32 parameters to float64.

    Returns:
      a factory ``f(**hyperparams)`` whose result is a GradientTransformation; the
      keyword names are those of ``hyperparams(...)`` for the same arguments.
    """
    import optax  # loaded by the first training, not by `import rnnkit` (about 0.1 s)

    name, _ = program_key(optimizer, None)
    if clipping:
        def factory(learning_rate, max_norm, weight_decay=None):
            return optax.chain(optax.clip_by_global_norm(max_norm),
                               _inner(name, learning_rate, weight_decay))
    else:
        def factory(learning_rate, weight_decay=None):
            return _inner(name, learning_rate, weight_decay)
    return optax.inject_hyperparams(factory, hyperparam_dtype=np.dtype(dtype))


def hyperparams(optimizer: str, lr: float, clip, weight_decay: float, dtype) -> Dict[str, np.ndarray]:
    """The numeric hyperparameters for ``make_optimizer(...)(**hyperparams)``.

    Args:
      optimizer, lr, clip, weight_decay: the Config fields of the same names.
      dtype: float dtype of the parameters.

    Returns:
      dict learning_rate, [max_norm], [weight_decay] of 0-d arrays in ``dtype``.
    """
    dt = np.dtype(dtype)
    out = {"learning_rate": np.asarray(lr, dt)}
    if clip is not None:
        out["max_norm"] = np.asarray(clip, dt)
    if optimizer == "adamw":
        out["weight_decay"] = np.asarray(weight_decay, dt)
    return out


def init_state(optimizer: str, lr: float, clip, weight_decay: float, params: dict):
    """Initial optimizer state for ``params`` with the given hyperparameters in it."""
    dtype = jnp.result_type(params["U"])
    factory = make_optimizer(optimizer, clip is not None, dtype)
    return factory(**hyperparams(optimizer, lr, clip, weight_decay, dtype)).init(params)

