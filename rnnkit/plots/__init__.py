"""Pure figure builders: data in, a matplotlib Figure out.

Every function takes plain data (arrays, DataFrames) and an optional
``ax``: without it a new ``matplotlib.figure.Figure`` is made (not through
pyplot, so building figures in a background thread is safe and nothing is
shown or kept); with it the drawing goes into that Axes and its figure is
returned. Nothing here calls ``show``. The lowest part: imports no other part
of rnnkit, so a figure never depends on a result object. Bad input raises ValueError or
TypeError naming the argument and the expected shape.

Training and results:
    training_curves(history, status=)       loss per epoch, best epoch, divergence
    forecast(pred, baseline=)               actual vs predicted over time
    fan_chart(history, future)              recent history, the forecast past it and its bands
    class_forecast(pred)                    class probabilities and class strips
    metrics_bar(metrics, column=)           one bar per model
    sweep_surface(table, x, y, metric=)     mean metric over two settings
    backtest_folds(per_fold, column=)       one bar per fold and model

Inside the network:
    gradient_flow(norms, sigma_max=)        ||dL/dh_k|| against step k, with its bound
    spectrum(singular_values)               singular values of V against 1
    gate_activity(names, near_zero, near_one, forget_along=)   GRU/LSTM gates shut or open
    hidden_heatmap(states)                  units x time image
    hidden_path(states)                     principal-component path of the state
    loss_surface(alphas, betas, values)     loss on a plane through the weights
    loss_slice(alphas, values)              loss along one direction

Example:
    >>> import pandas as pd
    >>> from rnnkit import plots
    >>> h = pd.DataFrame({"epoch": [1, 2, 3], "train_loss": [1.0, 0.5, 0.4],
    ...                   "val_loss": [1.1, 0.6, 0.7]})
    >>> fig = plots.training_curves(h)
    >>> fig.savefig("curves.png")  # doctest: +SKIP
"""
from ._backtest import backtest_folds as backtest_folds
from ._compare import metrics_bar as metrics_bar
from ._future import fan_chart as fan_chart
from ._compare import sweep_surface as sweep_surface
from ._inside import gate_activity as gate_activity
from ._inside import gradient_flow as gradient_flow
from ._inside import hidden_heatmap as hidden_heatmap
from ._inside import hidden_path as hidden_path
from ._inside import spectrum as spectrum
from ._surface import loss_slice as loss_slice
from ._surface import loss_surface as loss_surface
from ._training import class_forecast as class_forecast
from ._training import forecast as forecast
from ._training import training_curves as training_curves

__all__ = ["training_curves", "forecast", "fan_chart", "class_forecast", "metrics_bar", "sweep_surface",
           "backtest_folds",
           "gradient_flow", "spectrum", "hidden_heatmap", "hidden_path", "loss_surface",
           "loss_slice"]
