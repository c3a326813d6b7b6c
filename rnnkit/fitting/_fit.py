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

from ..evaluation._baselines import (baseline_predictions, fit_baselines, parts_before, prepared_mase_scale,
                                     training_rows)
from ..evaluation._intervals import by_lead, half_widths, interval_scores
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
    """The network on every window of a split: regression (N, O), (N, L, O) with several
    leads, or (N, T, O), in original units (transform undone); classification (N, [T,] K)
    probabilities; float64."""
    out = evaluate(params, prepared, split, shapes=shapes)
    if prepared.classes is not None:
        return softmax(out)
    if prepared.leads > 1:
        out = out.reshape(len(out), prepared.leads, -1)  # (N, L, O), lead-major outputs
    return prepared.original(out, prepared.target_rows(split))


def _truth(prepared, actual, split):
    rows = prepared.target_rows(split)
    return prepared.targets[rows] if prepared.classes is not None else actual[rows]


def extrapolation_note(prepared) -> tuple:
    """A note when the test targets lie far outside the training range (the network extrapolates).

    "Far": more than a quarter of the test targets beyond the training minimum or
    maximum by over a tenth of the training range (common practice, no source).
    """
    if prepared.classes is not None or len(prepared.starts["test"]) == 0 \
            or prepared.config.transform in ("diff", "log-diff"):  # differences need no new levels
        return ()
    train = prepared.levels[training_rows(prepared)]  # (K, O)
    test = prepared.levels[np.unique(prepared.target_rows("test"))]  # (M, O)
    lo, hi = train.min(axis=0), train.max(axis=0)
    room = 0.1 * np.maximum(hi - lo, 1e-12)
    out = ()
    for j, name in enumerate(prepared.target_names):
        above = float(np.mean(test[:, j] > hi[j] + room[j]))
        below = float(np.mean(test[:, j] < lo[j] - room[j]))
        if max(above, below) > 0.25:
            where = (f"{above:.0%} above the training maximum {hi[j]:.4g}" if above >= below
                     else f"{below:.0%} below the training minimum {lo[j]:.4g}")
            fix = "`transform`='diff' or 'log-diff' (differences stay in range when the level moves)"
            out += (f"the test values of {name!r} lie far outside the training range ({where}): the "
                    f"network must extrapolate, which it does poorly; try {fix}",)
    return out


def interval_widths(prepared, outputs: dict, val_pred: dict) -> tuple:
    """Conformal half widths per model from the validation residuals.

    Returns:
      ({model: (C, L, O) half widths}, notes): C = len(config.coverage).
    """
    levels = prepared.config.coverage
    if prepared.classes is not None or not levels or len(prepared.starts["val"]) == 0:
        return {}, ()
    y = by_lead(prepared.levels[prepared.target_rows("val")], prepared.leads)
    q, notes = {}, ()
    for model, pred in val_pred.items():
        pred = by_lead(pred, prepared.leads)
        if not np.all(np.isfinite(pred)):
            continue
        q[model], capped = half_widths(np.abs(y - pred), levels)
        if model == "rnn" and capped.any():
            short = [f"{v:g}" for v, c in zip(levels, capped) if c]
            notes += (f"only {len(y)} validation windows: too few for a conformal interval at level(s) "
                      f"{', '.join(short)}, which use the largest validation error and cover less than "
                      "they say; give the validation part more rows",)
    return q, notes

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
      test (NaN for a split without windows), then for regression the test part's
      interval scores "test_coverage_<level>", "test_width_<level>",
      "test_interval_score_<level>"; confusion dict split -> DataFrame).
      ``score_all`` also gives the scores per lead and the interval widths.
    """
    metrics, matrices, _, _, _ = score_all(prepared, actual, outputs)
    return metrics, matrices


def fitted_baselines(prepared) -> dict:
    """split -> the baselines fitted on every part before it (test: train + val)."""
    return {split: fit_baselines(prepared, parts=parts_before(split)) for split in SCORED}


def score_all(prepared, actual: np.ndarray, outputs: dict, fitted: Optional[dict] = None):
    """``score`` plus (metrics_by_lead, {model: half widths (C, L, O)}, notes).

    ``fitted``: ``fitted_baselines(prepared)`` when it was computed already.
    """
    regression = prepared.classes is None
    names = REGRESSION_METRICS if regression else CLASSIFICATION_METRICS
    scale = prepared_mase_scale(prepared) if regression else None
    if fitted is None:
        fitted = fitted_baselines(prepared)
    table = {"rnn": {}}
    lead_table = {}
    matrices = {}
    found_by_split = {}
    for split in SCORED:
        if len(prepared.starts[split]) == 0:
            continue
        y = _truth(prepared, actual, split)
        found = {"rnn": outputs[split]}
        found.update(baseline_predictions(prepared, split, fitted[split]))
        found_by_split[split] = (y, found)
        for model, pred in found.items():
            m = _scores(y, pred, prepared, scale, model, split, names)
            table.setdefault(model, {}).update({f"{split}_{k}": v for k, v in m.items()})
            if regression:  # lead by lead (one lead: the same numbers)
                yl, pl = by_lead(y, prepared.leads), by_lead(pred, prepared.leads)
                for k in range(yl.shape[1]):
                    m = _scores(yl[:, k], pl[:, k], prepared, scale, model, split, names)
                    lead_table.setdefault((model, k + 1), {}).update(
                        {f"{split}_{n}": v for n, v in m.items()})
        if not regression and np.all(np.isfinite(outputs[split])):
            matrices[split] = confusion(y, np.argmax(outputs[split], axis=-1), prepared.classes)
    columns = [f"{s}_{m}" for s in SCORED for m in names]
    q, notes = ({}, ())
    if regression and "val" in found_by_split:
        # half widths from validation residuals: the network and the baselines fitted on train
        # only (fitted["val"]); the test intervals centre on the test predictions (baselines
        # fitted on train + val), as a forecaster refitting before the test period would
        q, notes = interval_widths(prepared, outputs, found_by_split["val"][1])
    extra = []
    if q and "test" in found_by_split:
        y, found = found_by_split["test"]
        levels = prepared.config.coverage
        yl = by_lead(y, prepared.leads)
        for model, widths in q.items():
            pl = by_lead(found[model], prepared.leads)
            whole = interval_scores(yl, pl, widths, levels)
            table[model].update({f"test_{k}": float(v) for k, v in whole.items()})
            for k, v in interval_scores(yl, pl, widths, levels, axis=(0, 2)).items():
                for lead, value in enumerate(v, start=1):
                    lead_table[(model, lead)][f"test_{k}"] = float(value)
        extra = [f"test_{k}" for k in whole]
    metrics = pd.DataFrame.from_dict(table, orient="index").reindex(columns=columns + extra)
    by_lead_frame = pd.DataFrame.from_dict(lead_table, orient="index")
    if len(by_lead_frame):
        by_lead_frame = by_lead_frame.reindex(columns=columns + extra).astype(np.float64)
        by_lead_frame.index = pd.MultiIndex.from_tuples(by_lead_frame.index, names=["model", "lead"])
    return metrics.astype(np.float64).rename_axis("model"), matrices, by_lead_frame, q, notes


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
        "<split>_<metric>" for val and test, in the target's original units, every
        lead pooled; regression adds the test part's interval scores per coverage
        level: test_coverage_80, test_width_80, test_interval_score_80, ...
      metrics_by_lead: DataFrame indexed by (model, lead), the same columns lead by lead
        (regression; empty for classification).
      interval_widths: (C, L, O) conformal half widths of the network's intervals, one
        per coverage level, lead and target (None without validation windows).
      notes: sentences to read beside the scores: the data preparation's own notes
        (``prepared.notes``), too few validation windows for an interval, a test part
        far outside the training range, a network far worse than the best baseline,
        an undefined MASE.
      confusion: dict split -> DataFrame (classification; empty for regression).
      diagnostics: Diagnostics of the trained network (measured on first use).
      prepared: the Prepared it was trained on (None when loaded without data).
      best_epoch: the epoch whose parameters these are (0: the initial ones).
      compiles, seconds: training programs compiled, wall time of training.
    """

    def __init__(self, *, params, spec: DataSpec, status, history, metrics, confusion=None,
                 prepared=None, actual=None, best_epoch=0, compiles=0, seconds=0.0,
                 diagnostics=None, outputs=None, labels=None, metrics_by_lead=None,
                 interval_widths=None, notes=()):
        self.params = params
        self.metrics_by_lead = pd.DataFrame() if metrics_by_lead is None else metrics_by_lead
        self.interval_widths = None if interval_widths is None else np.asarray(interval_widths, np.float64)
        self.notes = tuple(notes)
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

    def forecast(self, steps: Optional[int] = None, df: Optional[pd.DataFrame] = None) -> pd.DataFrame:
        """Forecasts past the end of the data, with conformal prediction intervals.

        Args:
          steps: how many future rows; None: the horizon (or, when the network reads
            other input columns, as many rows as the frame gives their future values).
            Beyond the horizon the forecast goes on in blocks of the horizon, each
            block reading the forecasts before it as the target's past.
          df: None for the training frame; or a frame with the fit's columns (a loaded
            fit needs one). Rows at its end with an EMPTY target are future rows: when
            the network reads inputs besides the target, they must carry those inputs'
            future values (a missing one is an error naming the column and row).

        Returns:
          DataFrame indexed by the future time labels (the step read from the frame's
          times: hourly, daily, monthly, quarterly, yearly..., or integers; future rows
          keep their own labels), one row per step and sequence: the group column (with
          several sequences), "lead" (1..steps), "forecast", then "lower_<level>" and
          "upper_<level>" per coverage level (several targets: "<target>_forecast", ...),
          and "calibrated" (False beyond the horizon, where the bounds are widened by
          sqrt(lead / horizon) instead of measured). Original units.

        The intervals are split conformal intervals from the validation errors: they hold
        as far as the future behaves like the validation period.

        Example:
          >>> result.forecast(12)[["forecast", "lower_80", "upper_80"]]
        """
        from ._forecast import forecast

        return forecast(self, steps, df)

    def can_forecast(self) -> bool:
        """True when forecast() can run from the training frame alone (the network reads only the
        target's own past, so no future inputs are needed)."""
        c = self.config
        return (c.task == "regression" and c.mode == "many-to-one" and c.window != "full"
                and self.spec.horizon >= 1 and self.prepared is not None
                and list(self.spec.input_names) == list(self.spec.target_names))

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
            if self.can_forecast():
                figs["future"] = future_figure(self, self.forecast(), pred)
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


def future_figure(result, future: pd.DataFrame, pred: Optional[pd.DataFrame] = None, recent: int = 120):
    """plots.fan_chart of the last sequence's recent known values and its forecast.

    Args:
      result: the FitResult. future: its ``forecast()`` frame. pred: its ``predict()`` frame
        (made when None; needs the training frame).
    """
    from .. import plots

    pred = result.predict() if pred is None else pred
    group = result.config.group_column
    if group is not None and group in future.columns:
        last = future[group].iloc[-1]
        future = future[future[group] == last]
        key = group if group in pred.columns else "sequence"
        pred = pred[pred[key] == last]
    cols = [c for c in pred.columns if c == "actual" or c.endswith("_actual")]
    name = result.spec.target_names[0] if cols[0] == "actual" else cols[0][:-len("_actual")]
    return plots.fan_chart(pred[cols[0]].rename(name), future, recent=recent)


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
    fitted = fitted_baselines(prepared)
    actual = frame_actuals(df, prepared)
    outputs = {s: network_predictions(outcome.params, prepared, s, shapes)
               for s in SCORED if len(prepared.starts[s])}
    metrics, matrices, by_lead_frame, widths, notes = score_all(prepared, actual, outputs, fitted)
    notes = prepared.notes + notes + extrapolation_note(prepared) + fit_notes(metrics, prepared)
    return FitResult(params=outcome.params, spec=spec_of(prepared, df.index.name),
                     metrics_by_lead=by_lead_frame, interval_widths=widths.get("rnn"), notes=notes,
                     status=outcome.status, history=outcome.history, metrics=metrics,
                     confusion=matrices, prepared=prepared, actual=actual,
                     best_epoch=outcome.best_epoch, compiles=outcome.compiles,
                     seconds=outcome.seconds, outputs=outputs,
                     labels=zoned_labels(df, prepared.rows, cfg.time_column))


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
                     metrics=parts["metrics"], metrics_by_lead=parts["metrics_by_lead"],
                     interval_widths=parts["interval_widths"], notes=parts["notes"],
                     confusion=parts["confusion"], prepared=prepared,
                     actual=actual, best_epoch=parts["best_epoch"], compiles=parts["compiles"],
                     seconds=parts["seconds"], diagnostics=diagnostics, labels=labels)
