"""fit(): a frame in; a trained network, its scores beside honest baselines, and its insides out.

Steps: resolve the config; ``prepare`` the frame; ``train``; run the network
on the validation and test windows; score it and every baseline (fitted on the
same training part, scored on the same targets) in the target's original
units. Diagnostics are measured when first asked for (a sweep never pays for
them). ``FitResult.save`` / ``load_fit`` write and read through ``_fit_io.py``.
"""
from __future__ import annotations

import threading
from typing import Optional

import numpy as np
import pandas as pd

from ..evaluation._baselines import baseline_predictions, fit_baselines, parts_before, prepared_mase_scale
from ..data._config import Config
from ..data._errors import DataError
from ..data._prepare import prepare
from ..evaluation._metrics import classification_metrics, confusion, regression_metrics
from ..data._predict import NEW, DataSpec, frame_actuals, prediction_frame, prepare_like, spec_of, zoned_labels
from ..training._train import evaluate, train
from ._fit_io import read_fit, save_fit

SCORED = ("val", "test")
REGRESSION_METRICS = ("mae", "rmse", "mase", "r2")
CLASSIFICATION_METRICS = ("accuracy", "balanced_accuracy", "log_loss")


def resolve_config(config) -> Config:
    """A Config from a Config, a dict of its fields, or None (the defaults)."""
    if config is None:
        return Config()
    if isinstance(config, Config):
        return config
    if isinstance(config, dict):
        return Config.from_dict(config)
    raise TypeError(f"`config` must be an rnnkit.Config, a dict of its fields or None; got "
                    f"{type(config).__name__} (read a JSON file with rnnkit.load_config(path))")


def softmax(logits: np.ndarray) -> np.ndarray:
    """Class probabilities (..., K) from logits, in float64."""
    z = np.asarray(logits, np.float64)
    z = z - z.max(axis=-1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=-1, keepdims=True)


def network_predictions(params: dict, prepared, split: str, shapes=None) -> np.ndarray:
    """The network on every window of a split: regression (N, [T,] O) in original units,
    classification (N, [T,] K) probabilities; float64."""
    out = evaluate(params, prepared, split, shapes=shapes)
    if prepared.classes is not None:
        return softmax(out)
    return prepared.scaler.inverse_targets(out)


def _truth(prepared, actual, split):
    rows = prepared.target_rows(split)
    return prepared.targets[rows] if prepared.classes is not None else actual[rows]


def _scores(y, pred, prepared, scale, model, split, names):
    """Metric dict for one model and split; NaN throughout when the model's output is not finite."""
    if not np.all(np.isfinite(pred)):
        return {m: float("nan") for m in names}
    if prepared.classes is None:
        return regression_metrics(y, pred, scale=scale, model=model, split=split)
    return classification_metrics(y, pred, model=model, split=split)


def score(prepared, actual: np.ndarray, outputs: dict):
    """The metrics table and (classification) confusion matrices.

    Args:
      prepared: the Prepared.
      actual: true targets of every row (``frame_actuals``).
      outputs: split -> network predictions (``network_predictions``) for "val"/"test".

    Returns:
      (metrics DataFrame indexed by model, columns "<split>_<metric>" for val and
      test (NaN for a split without windows); confusion dict split -> DataFrame).
    """
    regression = prepared.classes is None
    names = REGRESSION_METRICS if regression else CLASSIFICATION_METRICS
    scale = prepared_mase_scale(prepared) if regression else None
    # baselines fitted on every part before the scored one (test: train + val)
    fitted = {split: fit_baselines(prepared, parts=parts_before(split)) for split in SCORED}
    table = {"rnn": {}}
    matrices = {}
    for split in SCORED:
        if len(prepared.starts[split]) == 0:
            continue
        y = _truth(prepared, actual, split)
        found = {"rnn": outputs[split]}
        found.update(baseline_predictions(prepared, split, fitted[split]))
        for model, pred in found.items():
            m = _scores(y, pred, prepared, scale, model, split, names)
            table.setdefault(model, {}).update({f"{split}_{k}": v for k, v in m.items()})
        if not regression and np.all(np.isfinite(outputs[split])):
            matrices[split] = confusion(y, np.argmax(outputs[split], axis=-1), prepared.classes)
    columns = [f"{s}_{m}" for s in SCORED for m in names]
    metrics = pd.DataFrame.from_dict(table, orient="index").reindex(columns=columns)
    return metrics.astype(np.float64).rename_axis("model"), matrices


FAR_WORSE = 2.0  # network val RMSE this many times the best baseline's gets a note (common practice, no source)
ACCURACY_SHORT = 0.2  # classification: val accuracy this far below the best baseline's gets one


def fit_notes(metrics: pd.DataFrame, prepared) -> tuple:
    """Sentences a reader must see beside the scores: a network far behind the best
    baseline, a MASE that is undefined (constant training target)."""
    notes = []
    if "val_rmse" in metrics.columns:
        rnn, others = metrics.loc["rnn", "val_rmse"], metrics["val_rmse"].drop("rnn").dropna()
        if len(others) and np.isfinite(rnn) and rnn > FAR_WORSE * others.min():
            name = others.idxmin()
            notes.append(f"the network's val RMSE ({rnn:.4g}) is {rnn / others.min():.3g} times the best "
                         f"baseline's ({name}, {others.min():.4g}): it is far worse than a baseline; try "
                         "a lower `lr`, more `epochs` or another `window`")
        scale = prepared_mase_scale(prepared)
        if np.any(scale == 0):
            notes.append("the target does not change between consecutive training rows (a constant "
                         "training target): MASE, scaled by that in-sample naive error of 0, is "
                         "undefined and reported as NaN")
    if "val_accuracy" in metrics.columns:
        rnn, others = metrics.loc["rnn", "val_accuracy"], metrics["val_accuracy"].drop("rnn").dropna()
        if len(others) and np.isfinite(rnn) and rnn < others.max() - ACCURACY_SHORT:
            notes.append(f"the network's val accuracy ({rnn:.3g}) is far below the best baseline's "
                         f"({others.idxmax()}, {others.max():.3g}); try a lower `lr`, more `epochs` "
                         "or more `hidden` units")
    return tuple(notes)


class FitResult:
    """One trained network and everything measured about it.

    Attributes:
      params: dict of numpy arrays U (I, H), V (H, H), b (H,), W (H, O), c (O,).
      config: the Config, resolved (target, features and season filled in).
      status: "ok", "diverged at epoch N", "stopped early at epoch N" or
        "stopped by user at epoch N".
      history: DataFrame, one row per epoch: epoch, train_loss, val_loss,
        grad_norm (before clipping), lr, seconds.
      metrics: DataFrame indexed by model ("rnn" and the baselines), columns
        "<split>_<metric>" for val and test, in the target's original units.
      confusion: dict split -> DataFrame (classification; empty for regression).
      diagnostics: Diagnostics of the trained network (measured on first use).
      prepared: the Prepared it was trained on (None when loaded without data).
      best_epoch: the epoch whose parameters these are (0: the initial ones).
      compiles, seconds: training programs compiled, wall time of training.
      notes: sentences to read beside the scores (a network far worse than the
        best baseline, an undefined MASE); the data's own notes are in
        ``prepared.notes``.
    """

    def __init__(self, *, params, spec: DataSpec, status, history, metrics, confusion=None,
                 prepared=None, actual=None, best_epoch=0, compiles=0, seconds=0.0,
                 diagnostics=None, outputs=None, labels=None, notes=()):
        self.params = params
        self.notes = tuple(notes)  # sentences about the scores (fit_notes) to read beside them
        self.spec = spec
        self.config = spec.config
        self.status = status
        self.history = history
        self.metrics = metrics
        self.confusion = dict(confusion or {})
        self.prepared = prepared
        self.best_epoch = int(best_epoch)
        self.compiles = int(compiles)
        self.seconds = float(seconds)
        self._actual = actual
        self._labels = labels  # the training frame's zone-aware times, or None
        self._outputs = dict(outputs or {})
        self._diagnostics = diagnostics
        self._lock = threading.Lock()

    @property
    def watched(self) -> str:
        """What chose the kept epoch and early stopping: "val_loss" or "val_accuracy" (config.watch)."""
        metric = self.config.watch == "metric" and self.config.task == "classification"
        return "val_accuracy" if metric else "val_loss"

    def __repr__(self) -> str:
        task = self.config.task
        col = "val_rmse" if task == "regression" else "val_accuracy"
        rnn = self.metrics[col].get("rnn", float("nan")) if col in self.metrics else float("nan")
        return (f"FitResult({task}, cell={self.config.cell!r}, hidden={self.config.hidden}, "
                f"activation={self.config.activation!r}, "
                f"status={self.status!r}, epochs={len(self.history)}, kept epoch {self.best_epoch} "
                f"by {self.watched}, {col}={rnn:.4g})")

    @property
    def diagnostics(self):
        """Diagnostics (gradient through time, spectrum of V, saturation, states)."""
        with self._lock:
            if self._diagnostics is None:
                if self.prepared is None:
                    raise ValueError("this result has no diagnostics and no data to measure them on; "
                                     "use load_fit(path, df=<the training frame>)")
                from ..inspection._diagnose import diagnose

                self._diagnostics = diagnose(self.params, self.prepared)
            return self._diagnostics

    def _split_outputs(self, split):
        if split not in self._outputs:
            self._outputs[split] = network_predictions(self.params, self.prepared, split)
        return self._outputs[split]

    def predict(self, df: Optional[pd.DataFrame] = None) -> pd.DataFrame:
        """Actual and predicted values on the original time index.

        Args:
          df: None for the training frame (every window of train, val and test;
            the "split" column says which); or any frame with the same columns,
            prepared with the FITTED scaler and class mapping (never refit), every
            window of it predicted ("split" is "new").

        Returns:
          DataFrame indexed by time (the time column or the frame's index), one row
          per used row of the frame; a group column when there is one (named
          "sequence" when its own name is "actual", "predicted", "split"...).
          Regression: "actual"/"predicted" (one target) or "<target>_actual"/
          "<target>_predicted", in original units. Classification: "actual",
          "predicted" (labels) and "p_<class>" probabilities (labels that print
          alike, such as 1 and "1", use their repr: p_1, p_'1'). Rows no window
          predicts hold NaN/None. Many-to-many: each target time shows the window
          that ends there (see ``_predict``). window="full": one row per sequence,
          indexed by its id.
        """
        if df is None:
            if self.prepared is None:
                raise ValueError("this result was loaded without its training frame; pass a frame: "
                                 "result.predict(df), or use load_fit(path, df=...)")
            p = self.prepared
            parts = {s: (p.target_rows(s), self._split_outputs(s))
                     for s in ("train", "val", "test") if len(p.starts[s])}
            return prediction_frame(p, self.spec, self._actual, parts, self._labels)
        p, actual = prepare_like(df, self.spec)
        parts = {NEW: (p.target_rows("train"), network_predictions(self.params, p, "train"))}
        return prediction_frame(p, self.spec, actual, parts,
                                zoned_labels(df, p.rows, self.config.time_column))

    def save(self, path) -> None:
        """Write this result to a folder (atomically); read it back with ``rnnkit.load_fit``."""
        save_fit(self, path)

    def figures(self) -> dict:
        """The standard figures (matplotlib Figures from ``rnnkit.plots``), by name."""
        from .. import plots

        regression = self.config.task == "regression"
        figs = {"training": plots.training_curves(self.history, status=self.status)}
        col = "val_rmse" if regression else "val_accuracy"
        figs["metrics"] = plots.metrics_bar(self.metrics, column=col)
        if self.prepared is not None and self.config.window != "full":
            pred = self.predict()
            figs["forecast"] = plots.forecast(pred) if regression else plots.class_forecast(pred)
        d = self.diagnostics
        bound = 0.25 if d.activation == "sigmoid" else 1.0  # max |phi'|
        # the Pascanu et al. bound holds for the Elman recurrence only
        sigma = float(d.singular_values[0]) * bound if d.gradient_bound_applies else 0.0
        grads = np.nan_to_num(d.gradient_through_time, nan=0.0)
        figs["gradient_flow"] = plots.gradient_flow(grads, sigma_max=sigma if sigma > 0 else None)
        figs["spectrum"] = plots.spectrum(d.singular_values)
        if d.gate_names:  # gated cells: how often each gate is shut or open
            figs["gate_activity"] = plots.gate_activity(
                d.gate_names, d.gate_near_zero, d.gate_near_one,
                forget_along=d.forget_along_window if len(d.forget_along_window) else None)
        figs["hidden_states"] = plots.hidden_heatmap(d.window_state)
        if len(d.val_states) >= 2:
            figs["hidden_path"] = plots.hidden_path(d.val_states)
        return figs


def fit(df: pd.DataFrame, config=None, *, progress: bool = True, stop=None, on_epoch=None,
        shapes: Optional[dict] = None) -> FitResult:
    """Train a recurrent network (``config.cell``: Elman, GRU or LSTM) on a frame and score it
    against baselines.

    Args:
      df: the frame (one series, or sequences with ``group_column``); never modified.
      config: a Config, a dict of Config fields, or None for the defaults.
      progress: show a progress bar over epochs.
      stop: a threading.Event; setting it ends training after the current epoch
        (status "stopped by user at epoch N").
      on_epoch: called after every epoch with that epoch's history row (a dict).
      shapes: padding targets shared by a sweep's runs (``_train.shape_plan``).

    Returns:
      FitResult. A run whose loss blows up ends with status "diverged at epoch N"
      (no exception) and keeps the best parameters before it.

    Example:
      >>> result = rnnkit.fit(df, rnnkit.Config(target="load_kw", window=24, epochs=20))
      >>> result.metrics.loc[["rnn", "persistence"], "test_rmse"]
    """
    cfg = resolve_config(config)
    prepared = prepare(df, cfg)
    outcome = train(prepared, prepared.config, shapes=shapes, progress=progress, stop=stop,
                    on_epoch=on_epoch)
    actual = frame_actuals(df, prepared)
    outputs = {s: network_predictions(outcome.params, prepared, s, shapes)
               for s in SCORED if len(prepared.starts[s])}
    metrics, matrices = score(prepared, actual, outputs)
    return FitResult(params=outcome.params, spec=spec_of(prepared, df.index.name),
                     status=outcome.status, history=outcome.history, metrics=metrics,
                     confusion=matrices, prepared=prepared, actual=actual,
                     best_epoch=outcome.best_epoch, compiles=outcome.compiles,
                     seconds=outcome.seconds, outputs=outputs,
                     labels=zoned_labels(df, prepared.rows, cfg.time_column),
                     notes=fit_notes(metrics, prepared))


def load_fit(path, df=None):
    """Read a fit saved by ``FitResult.save``.

    Args:
      path: the folder.
      df: optional, the frame the fit was trained on: it is prepared again (the
        same split and scaler; checked) so that ``predict()``, diagnostics and
        loss surfaces work as on the original result.

    Returns:
      FitResult. Without ``df``, ``predict(frame)`` works on any frame with the
      same columns, using the saved scaler and class mapping.
    """
    parts = read_fit(path)
    spec = parts["spec"]
    prepared = actual = labels = None
    if df is not None:
        prepared = prepare(df, spec.config)
        sc = prepared.scaler
        if sc.columns != spec.scaler.columns or not (np.array_equal(sc.mean, spec.scaler.mean)
                                                     and np.array_equal(sc.scale, spec.scaler.scale)):
            raise DataError(f"`df` is not the frame this fit was trained on: its training part gives "
                            f"other scaling statistics than the saved ones ({str(path)!r}); pass the "
                            "training frame, or leave `df` out and call result.predict(frame)")
        actual = frame_actuals(df, prepared)
        labels = zoned_labels(df, prepared.rows, spec.config.time_column)
    # With the data attached, diagnostics are measured again (window_states(i) for any i).
    diagnostics = None if prepared is not None else parts["read_diagnostics"]()
    return FitResult(params=parts["params"], spec=spec, status=parts["status"], history=parts["history"],
                     metrics=parts["metrics"], confusion=parts["confusion"], prepared=prepared,
                     actual=actual, best_epoch=parts["best_epoch"], compiles=parts["compiles"],
                     seconds=parts["seconds"], diagnostics=diagnostics, labels=labels,
                     notes=parts.get("notes", ()))
