"""backtest(): rolling-origin evaluation (Tashman 2000) and the significance of the network's gain.

One series: forecast origins move forward through the end of the series,
one block of ``test_size`` rows per fold. Each fold trains on the rows before
its origin (all of them, or a rolling window of fixed length), keeps the last
part of those for early stopping, and forecasts the block. Several sequences
(``group_column``): whole sequences go to folds (grouped k-fold, seeded;
classes stratified for classification).

Each fold is an ordinary ``fit`` of the caller's frame cut to the rows the
fold may see, with a split column that labels them train / val / test, so the
scaler, the baselines and anything else fitted are fitted per fold on rows
before the origin only. Every fold is padded to one shape plan
(``_train.shape_plan``), so the folds share compiled programs: the number of
compiles does not grow with the number of folds.

The network's errors are paired with every baseline's on the same targets:
Diebold-Mariano with the HLN correction on squared errors (regression),
McNemar on correct / incorrect (classification), over all folds together.

Several leads (regression, many-to-one, ``horizon`` H > 1: one network
forecasts leads 1..H from each origin). Validation and test windows read
their inputs from the rows before their part, so a fold's test part is
exactly its forecast block, and every origin in the block whose H targets
all lie in the block is forecast. The errors table has one row per (fold,
model, target time, lead) and an ``origin_row`` column (the row of the window's
last input). ``comparison`` tests the loss a forecaster of the whole path
pays: the squared error averaged over the H leads of one origin, one loss
per origin, with Diebold-Mariano's h = H (origins less than H steps apart
share target rows, so their loss differences are correlated up to lag
H - 1; Diebold & Mariano 1995, Harvey, Leybourne & Newbold 1997).
``comparison_by_lead`` tests every lead k alone with h = k.
"""
from __future__ import annotations

import concurrent.futures as cf
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from typing import List, Optional, Sequence, Tuple, Union

import jax
import numpy as np
import pandas as pd

from ..data._checks import resolve_columns
from ..data._config import Config
from ..data._errors import DataError, SmallPartWarning
from ..data._prepare import prepare
from ..evaluation._baselines import baseline_predictions
from ..evaluation._significance import LEVEL, diebold_mariano, mcnemar, verdict
from ..training._train import compile_count, shape_plan
from ._fit import fit, resolve_config

PARTS = ("train", "val", "test")


@dataclass(frozen=True)
class Fold:
    """Which rows of the caller's frame one fold uses, and for what.

    ``part`` is (R,) object over the caller's frame rows: "train", "val",
    "test" or None (the fold does not read the row). For one series the
    forecast targets are rows ``origin`` .. ``end - 1``; rows of the test part
    before the origin only give the first test windows their inputs.
    """

    fold: int  # 1-based
    part: np.ndarray  # (R,) object: "train" | "val" | "test" | None
    origin: Optional[int]  # first forecast row (one series); None for whole-sequence folds
    end: Optional[int]  # one past the last forecast row (one series)

    def rows(self, name: str) -> np.ndarray:
        """Row positions (in the caller's frame) of one part, ascending."""
        return np.flatnonzero(self.part == name)


def _whole(v, name, low=1):
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < low:
        raise ValueError(f"`{name}` (={v!r}) must be a whole number >= {low}")
    return int(v)


def series_folds(n: int, folds: int, *, test_size: int, lookback: int, val_fraction: float,
                 window: Union[str, int] = "expanding", cover: int = 1) -> List[Fold]:
    """Folds of one series of ``n`` rows with origins moving forward to its end.

    Fold k (1..K) forecasts rows [n - (K-k+1) B, n - (K-k) B), B = test_size.
    Its test part starts ``lookback`` rows before the origin (the inputs of the
    first test window; 0 when test windows read inputs from before their part).
    Before that lie its training rows: every row from the start ("expanding")
    or the last ``window`` rows (a rolling window), the last ``val_fraction``
    of them for validation (at least ``lookback`` + ``cover`` rows, what one
    window's targets need, while one training row is left). ``cover``: rows the
    targets of one window span (the horizon H with leads 1..H; else 1).
    """
    n, folds, test_size = _whole(n, "n"), _whole(folds, "folds"), _whole(test_size, "test_size")
    lookback = _whole(lookback, "lookback", 0)
    cover = _whole(cover, "cover")
    if test_size < cover:
        raise DataError(f"`test_size` (={test_size}) is shorter than the {cover} rows one forecast covers "
                        f"(leads 1..{cover}); give `test_size` >= {cover}")
    if window != "expanding":
        _whole(window, "window", 2)
    if not 0.0 < val_fraction < 1.0:
        raise ValueError(f"`val_fraction` (={val_fraction!r}) must lie strictly between 0 and 1")
    first_origin = n - folds * test_size
    if first_origin - lookback < 2:
        raise DataError(f"{folds} folds of test_size={test_size} rows leave {max(first_origin - lookback, 0)} "
                        f"rows before the first fold's test part ({n} rows, {lookback} rows of inputs for the "
                        "first test window); use fewer `folds` or a smaller `test_size`")
    out = []
    for k in range(folds):
        origin = first_origin + k * test_size
        end = origin + test_size
        test_lo = origin - lookback
        lo = 0 if window == "expanding" else max(0, test_lo - int(window))
        m = test_lo - lo
        # at least the rows one validation window's targets need (as a test part's lead-in, plus cover)
        v = min(max(lookback + cover, int(round(m * val_fraction))), m - 1)
        part = np.full(n, None, dtype=object)
        part[lo:test_lo - v] = "train"
        part[test_lo - v:test_lo] = "val"
        part[test_lo:end] = "test"
        out.append(Fold(k + 1, part, origin, end))
    return out


def group_folds(codes: np.ndarray, folds: int, *, val_fraction: float, seed: int,
                strata: Optional[np.ndarray] = None) -> List[Fold]:
    """Whole-sequence folds: every sequence is tested in exactly one fold.

    Args:
      codes: (R,) int sequence number of every row (0..G-1).
      folds: K.
      val_fraction: share of each fold's training sequences kept for validation (at least one).
      seed: shuffles the sequences (numpy default_rng).
      strata: (G,) class of each sequence, or None; with classes, each class's
        sequences are dealt to the folds in turn (stratified grouped k-fold).
    """
    codes = np.asarray(codes, dtype=np.int64)
    g = int(codes.max()) + 1
    folds = _whole(folds, "folds", 2)
    if g < folds:
        raise DataError(f"`folds` (={folds}) is more than the {g} sequences; each fold tests whole "
                        "sequences: use at most that many folds")
    rng = np.random.default_rng(seed)
    fold_of = np.empty(g, dtype=np.int64)
    if strata is None:
        fold_of[rng.permutation(g)] = np.arange(g) % folds
    else:
        at = 0
        for cls in np.unique(strata):
            members = rng.permutation(np.flatnonzero(strata == cls))
            fold_of[members] = (at + np.arange(len(members))) % folds
            at += len(members)
    out = []
    for k in range(folds):
        test = fold_of == k
        rest = np.flatnonzero(~test)
        if len(rest) < 2:
            raise DataError(f"fold {k + 1} leaves {len(rest)} sequence(s) to train and validate on; use "
                            "fewer `folds` (each fold needs two sequences besides its test sequences)")
        if strata is None:
            val = rng.choice(rest, size=min(max(1, int(round(len(rest) * val_fraction))), len(rest) - 1),
                             replace=False)
        else:
            val = _stratified_pick(rest, strata[rest], val_fraction, rng)
        kind = np.full(g, "train", dtype=object)
        kind[test] = "test"
        kind[val] = "val"
        out.append(Fold(k + 1, kind[codes], None, None))
    return out


def _stratified_pick(items, labels, fraction, rng):
    """About `fraction` of `items`, the same share of each class, at least one, never all."""
    picked = []
    for cls in np.unique(labels):
        members = rng.permutation(items[labels == cls])
        picked += list(members[:int(round(len(members) * fraction))])
    if not picked:
        picked = [rng.choice(items)]
    if len(picked) >= len(items):
        picked = picked[:len(items) - 1]
    return np.asarray(picked, dtype=np.int64)


def _column_name(df: pd.DataFrame) -> str:
    name, k = "_rnnkit_fold_part", 0
    while name in df.columns:
        k += 1
        name = f"_rnnkit_fold_part{k}"
    return name


def fold_frame(df: pd.DataFrame, fold: Fold, column: str) -> pd.DataFrame:
    """The rows a fold reads, with its part labels in `column` (a new frame; `df` is not changed)."""
    used = fold.part != None  # noqa: E711 (element-wise on an object array)
    return df.iloc[np.flatnonzero(used)].assign(**{column: fold.part[used]})


def measure_lookback(df: pd.DataFrame, config: Config, column: str) -> Tuple[int, int]:
    """Rows of a test part that come before its first forecast target, and the rows the
    targets of one window cover.

    Measured on the frame itself (the last third labelled test): the first
    test target's row minus the test part's first row. It is ``gap`` when
    test windows read their inputs from before their part (as they do), and
    window + horizon - 1 + ``gap`` should the frame not prepare. The targets
    of one window cover H rows with H leads, 1 row with one lead, the
    window's rows for many-to-many.
    """
    n = len(df)
    part = np.full(n, "train", dtype=object)
    part[n - max(n // 3, 1):] = "test"
    probe = df.assign(**{column: part})
    fallback = int(config.window) + int(config.horizon) - 1 + int(config.gap), 1
    try:
        with _quiet():
            p = prepare(probe, config)
    except DataError:
        return fallback
    rows = p.target_rows("test")
    if rows.size == 0:
        return fallback
    first_target = int(p.rows[int(np.min(rows))])
    cover = int(p.window) + int(p.horizon) - int(p.reach)
    return max(first_target - (n - max(n // 3, 1)), 0), max(cover, 1)


def _val_fraction(config: Config) -> float:
    f = config.split
    return f[1] / (f[0] + f[1])


def _strata(df, config, codes):
    """(G,) class of each sequence (its last row's label) for stratified folds, or None."""
    if config.task != "classification":
        return None
    special = [c for c in (config.time_column, config.group_column) if c]
    targets, _ = resolve_columns(df, config, special)
    labels = pd.Series(df[targets[0]].to_numpy(dtype=object)).astype(str).to_numpy()
    last = np.zeros(int(codes.max()) + 1, dtype=np.int64)
    last[codes] = np.arange(len(codes))  # the last row of each sequence wins
    return labels[last]


def plan_folds(df: pd.DataFrame, config: Config, folds: int, *, test_size: Optional[int] = None,
               window: Union[str, int] = "expanding", seed: Optional[int] = None):
    """The folds of a backtest and the Config each fold is fitted with.

    Args as ``backtest``; ``seed`` (None: ``config.seed``) shuffles whole-sequence folds.

    Returns:
      (folds [Fold], config with ``split_column`` set to the new label column, column name, scheme dict).
    """
    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"`df` must be a pandas DataFrame, got {type(df).__name__}")
    folds = _whole(folds, "folds")
    if config.split_column is not None:
        raise ValueError(f"`split_column` (={config.split_column!r}) fixes one split; a backtest makes "
                         "its own folds: set `split_column` to None")
    if window != "expanding" and (isinstance(window, bool) or not isinstance(window, (int, np.integer))
                                  or window < 2):
        raise ValueError(f"`window` (={window!r}) must be 'expanding' or a whole number of rows >= 2 "
                         "(a rolling training window of that length)")
    seed = config.seed if seed is None else _whole(seed, "seed", 0)
    if test_size is not None:
        test_size = _whole(test_size, "test_size")
    column = _column_name(df)
    cfg = config.replace(split_column=column)
    codes = None
    if config.group_column is not None and config.group_column in df.columns:
        codes = pd.factorize(df[config.group_column], sort=False)[0]
        if (codes < 0).any():
            codes = None  # prepare names the missing id
    if codes is not None and codes.max() >= 1:
        if test_size is not None or window != "expanding":
            raise ValueError("`test_size` and `window` apply to one series; with several sequences "
                             "(`group_column`) every fold tests whole sequences: leave them out")
        if folds < 2:
            raise ValueError(f"`folds` (={folds}) must be >= 2 with whole-sequence folds")
        out = group_folds(codes, folds, val_fraction=_val_fraction(config), seed=seed,
                          strata=_strata(df, config, codes))
        scheme = {"folds": folds, "scheme": "sequences", "stratified": config.task == "classification",
                  "seed": seed}
        return out, cfg, column, scheme
    n = len(df)
    if test_size is None:
        test_size = max((n // 2) // folds, 1)  # the last half of the series, in `folds` blocks
    lookback, cover = (0, 1) if config.window == "full" else measure_lookback(df, cfg, column)
    out = series_folds(n, folds, test_size=test_size, lookback=lookback,
                       val_fraction=_val_fraction(config), window=window, cover=cover)
    scheme = {"folds": folds, "scheme": "rolling origin", "window": window, "test_size": int(test_size)}
    return out, cfg, column, scheme


# ------------------------------------------------------------------ errors and scores


def fold_errors(result, fold: Fold, offset: np.ndarray) -> pd.DataFrame:
    """Every test target of one fit, every model: one row per (target, output).

    Args:
      result: the fold's FitResult.
      fold: the Fold.
      offset: (r,) the caller-frame position of each row of the fold's frame.

    Returns:
      DataFrame fold, model, row (caller-frame position of the target), time, [sequence],
      [step], lead (1..H with several leads, else the horizon), origin_row (caller-frame
      position of the window's last input row), [target], and regression: actual,
      predicted, error (actual - predicted); classification: actual, predicted (labels),
      correct. The baselines are those of the fit's test scores (fitted on train + val).
    """
    p = result.prepared
    rows = p.target_rows("test")  # (N,), (N, L) or (N, T)
    if rows.size == 0:
        return pd.DataFrame()
    outputs = {"rnn": result._split_outputs("test")}
    outputs.update(baseline_predictions(p, "test"))
    where = {"row": offset[p.rows[rows]], "time": p.index[rows]}
    if p.groups is not None:
        where["sequence"] = p.groups[rows]
    if p.leads > 1:  # (N, L): leads 1..L of one origin
        where["lead"] = np.broadcast_to(np.arange(1, p.leads + 1, dtype=np.int64), rows.shape)
    else:
        if rows.ndim == 2:
            where["step"] = np.broadcast_to(np.arange(rows.shape[1]), rows.shape)
        where["lead"] = np.full(rows.shape, p.horizon, dtype=np.int64)
    s = p.starts["test"]
    last_input = s + (p.lengths["test"] - 1 if p.full else p.window - 1)  # (N,)
    where["origin_row"] = np.broadcast_to(
        offset[p.rows[last_input]].reshape((-1,) + (1,) * (rows.ndim - 1)), rows.shape)
    frames = []
    if p.classes is None:
        actual = result._actual[rows]  # (..., O)
        names = p.target_names
        for model, pred in outputs.items():
            cols = {k: np.repeat(np.asarray(v).reshape(-1), len(names)) for k, v in where.items()}
            frames.append(pd.DataFrame({"fold": fold.fold, "model": model, **cols,
                                        "target": np.tile(names, rows.size),
                                        "actual": actual.reshape(-1),
                                        "predicted": np.asarray(pred, np.float64).reshape(-1)}))
        out = pd.concat(frames, ignore_index=True)
        out["error"] = out["actual"] - out["predicted"]
        if len(names) == 1:
            out = out.drop(columns="target")
        return out
    y = p.targets[rows]
    for model, proba in outputs.items():
        finite = np.all(np.isfinite(proba), axis=-1)
        code = np.where(finite, np.argmax(np.nan_to_num(proba), axis=-1), -1)
        cols = {k: np.asarray(v).reshape(-1) for k, v in where.items()}
        predicted = np.where(code.reshape(-1) >= 0, p.decode(np.maximum(code, 0)).reshape(-1), None)
        frames.append(pd.DataFrame({"fold": fold.fold, "model": model, **cols,
                                    "actual": p.decode(y).reshape(-1), "predicted": predicted,
                                    "correct": (code == y).reshape(-1)}))
    return pd.concat(frames, ignore_index=True)


def _per_target_loss(errors: pd.DataFrame, model: str, regression: bool,
                     lead: Optional[int] = None) -> pd.Series:
    """One loss per forecast origin (fold, window), in fold then window order: the mean squared
    error over the outputs, the steps (many-to-many) and the leads (regression) or 1 - correct
    (classification). ``lead``: only that lead's errors."""
    e = errors[errors["model"] == model]
    if lead is not None:
        e = e[e["lead"] == lead]
    keys = ["fold", "origin_row"]
    if regression:
        loss = (e["error"] ** 2).groupby([e[k] for k in keys], sort=False).mean()
    else:
        loss = (~e["correct"].astype(bool)).astype(np.float64).groupby([e[k] for k in keys], sort=False).mean()
    return loss


def compare(errors: pd.DataFrame, regression: bool, dm_horizon: int, level: float = LEVEL,
            lead: Optional[int] = None) -> pd.DataFrame:
    """The network against each baseline, over the forecast origins of every fold.

    Args:
      errors: ``fold_errors`` of every fold. dm_horizon: Diebold-Mariano's h.
      lead: test only this lead's errors (None: the loss averaged over every lead).

    Returns:
      DataFrame indexed by baseline: loss, n (origins), mean_difference (network minus
      baseline: mean squared error, or error rate), test, statistic, pvalue, verdict.
    """
    models = [m for m in dict.fromkeys(errors["model"]) if m != "rnn"]
    net = _per_target_loss(errors, "rnn", regression, lead)
    several = errors["lead"].nunique() > 1 and lead is None
    rows = {}
    for base in models:
        other = _per_target_loss(errors, base, regression, lead).reindex(net.index)
        loss = ("squared error" + (" (mean over leads)" if several else "")) if regression else "error rate"
        row = {"loss": loss, "n": int(len(net))}
        bad = ~np.isfinite(net.to_numpy()) | ~np.isfinite(other.to_numpy())
        if bad.any():
            folds = sorted({int(k[0]) for k, b in zip(net.index, bad) if b})
            row.update(mean_difference=np.nan, test="", statistic=np.nan, pvalue=np.nan,
                       verdict=f"not tested: forecasts are not finite in fold(s) {folds}")
        else:
            if regression:
                t = diebold_mariano(net.to_numpy(), other.to_numpy(), horizon=dm_horizon)
            else:
                t = mcnemar(net.to_numpy() == 0.0, other.to_numpy() == 0.0)
            row.update(mean_difference=float(net.mean() - other.mean()), test=t.method,
                       statistic=t.statistic, pvalue=t.pvalue, verdict=verdict(t, base, level))
        rows[base] = row
    cols = ["loss", "n", "mean_difference", "test", "statistic", "pvalue", "verdict"]
    return pd.DataFrame.from_dict(rows, orient="index", columns=cols).rename_axis("baseline")


def compare_by_lead(errors: pd.DataFrame, level: float = LEVEL) -> pd.DataFrame:
    """``compare`` lead by lead (regression with several leads): lead k tested with h = k.

    Returns:
      DataFrame indexed by (baseline, lead), the columns of ``compare``; empty with one lead.
    """
    leads = sorted(int(k) for k in errors["lead"].unique()) if len(errors) else []
    if len(leads) < 2:
        return pd.DataFrame()
    parts = {k: compare(errors, True, k, level, lead=k) for k in leads}
    return pd.concat(parts, names=["lead"]).reorder_levels(["baseline", "lead"]).sort_index(
        level="baseline", sort_remaining=False, kind="stable")


class BacktestResult:
    """The folds of a backtest, their scores and errors, and the significance of the differences.

    Attributes:
      folds: DataFrame, one row per fold: fold, origin and end (time of the first and last
        forecast target), train_rows, val_rows, test_targets, status, epochs, compiles, seconds.
      metrics: DataFrame indexed by (fold, model), the columns of FitResult.metrics.
      mean, std: DataFrames indexed by model: mean and sample spread (ddof=1) over folds.
      errors: DataFrame, one row per (fold, model, target, lead): see ``fold_errors``.
      comparison: DataFrame indexed by baseline: mean loss difference (network minus
        baseline), the test (Diebold-Mariano/HLN or McNemar), statistic, p-value, verdict.
        With several leads the loss is the squared error averaged over the leads of one
        origin, tested with h = horizon.
      comparison_by_lead: DataFrame indexed by (baseline, lead): the same, lead k alone
        with h = k (regression with several leads; else empty).
      scheme: dict, how the folds were made (folds, scheme, window, test_size or seed).
      fits: the FitResult of every fold (empty when the folds ran on an executor).
      compiles: programs compiled over all folds (this process; with an executor the folds'
        training programs); seconds: wall time.
    """

    def __init__(self, *, folds, metrics, errors, comparison, scheme, fits, compiles, seconds, config,
                 comparison_by_lead=None):
        self.folds, self.metrics, self.errors = folds, metrics, errors
        self.comparison_by_lead = pd.DataFrame() if comparison_by_lead is None else comparison_by_lead
        self.comparison, self.scheme, self.fits = comparison, scheme, list(fits)
        self.compiles, self.seconds, self.config = int(compiles), float(seconds), config
        g = metrics.groupby(level="model", sort=False)
        self.mean = g.mean()
        self.std = g.std(ddof=1)

    @property
    def task(self) -> str:
        return self.config.task

    def per_fold(self, column: Optional[str] = None) -> pd.DataFrame:
        """One score per fold and model: rows fold, columns model (default column test_rmse /
        test_accuracy)."""
        column = column or ("test_rmse" if self.task == "regression" else "test_accuracy")
        if column not in self.metrics.columns:
            raise ValueError(f"`column` (={column!r}) is not a score; use one of {list(self.metrics.columns)}")
        return self.metrics[column].unstack("model")[list(self.mean.index)]

    def summary(self) -> pd.DataFrame:
        """One row per model: test scores as mean and spread over folds; for each baseline
        the network's mean loss difference, p-value and verdict."""
        test_cols = [c for c in self.metrics.columns if c.startswith("test_")]
        out = pd.DataFrame(index=self.mean.index)
        out["folds"] = self.metrics.groupby(level="model", sort=False).size()
        for c in test_cols:
            out[f"{c}_mean"] = self.mean[c]
            out[f"{c}_std"] = self.std[c]
        cmp = self.comparison.reindex(out.index)
        out["mean_difference"] = cmp["mean_difference"]
        out["pvalue"] = cmp["pvalue"]
        out["verdict"] = cmp["verdict"].where(cmp["verdict"].notna(), "")
        return out

    def figure(self, column: Optional[str] = None):
        """The score of every model in every fold (``rnnkit.plots.backtest_folds``)."""
        from ..plots import backtest_folds

        column = column or ("test_rmse" if self.task == "regression" else "test_accuracy")
        return backtest_folds(self.per_fold(column), column=column,
                              verdicts=dict(self.comparison["verdict"]))

    def __repr__(self) -> str:
        col = "test_rmse" if self.task == "regression" else "test_accuracy"
        rnn = self.mean[col].get("rnn", np.nan) if col in self.mean else np.nan
        return (f"BacktestResult({self.task}, {len(self.folds)} folds ({self.scheme['scheme']}), "
                f"mean {col}={rnn:.4g}, compiles={self.compiles})")


def backtest(df: pd.DataFrame, config=None, folds: int = 5, *, window: Union[str, int] = "expanding",
             test_size: Optional[int] = None, seed: Optional[int] = None, level: float = LEVEL,
             progress: bool = True, shapes: Optional[dict] = None,
             executor: Optional[cf.Executor] = None) -> BacktestResult:
    """Rolling-origin backtest of the network and every baseline, with significance tests.

    Args:
      df: one series, or several sequences (``group_column``); never modified.
      config: a Config, a dict of its fields, or None (defaults). ``split`` gives the share
        of each fold's training rows kept for validation (val / (train + val));
        ``split_column`` must be None (the folds are the split).
      folds: K, the number of forecast origins (or of sequence folds).
      window: one series: "expanding" (each fold trains on every row before its origin)
        or a whole number of rows (a rolling training window of that length).
      test_size: one series: rows forecast per fold; None splits the last half of the
        series into `folds` blocks.
      seed: several sequences: shuffles the sequences into folds (None: ``config.seed``).
      level: significance level of the verdicts.
      progress: a line per fold.
      shapes: padding targets (``shape_plan``) to share programs with other runs; None plans
        them over the folds.
      executor: run the folds in parallel on any concurrent.futures.Executor (a process pool,
        ``dask.distributed.Client(...).get_executor()``); None fits them one after another
        here. With an executor ``fits`` is empty (fits stay in the workers) and ``compiles``
        sums the folds' training programs.

    Returns:
      BacktestResult.

    Example:
      >>> bt = rnnkit.backtest(df, rnnkit.Config(target="passengers", window=12), folds=4, test_size=12)
      >>> bt.comparison[["mean_difference", "pvalue", "verdict"]]
    """
    t0 = time.perf_counter()
    cfg = resolve_config(config)
    if executor is not None and not isinstance(executor, cf.Executor):
        raise TypeError(f"`executor` (={executor!r}) must be a concurrent.futures.Executor, e.g. "
                        "dask.distributed.Client(...).get_executor(), or None")
    fold_list, fold_cfg, column, scheme = plan_folds(df, cfg, folds, test_size=test_size, window=window,
                                                           seed=seed)
    frames = [fold_frame(df, f, column) for f in fold_list]
    prepared = [_prepare_fold(frame, fold_cfg, f) for f, frame in zip(fold_list, frames)]
    if shapes is None:
        shapes = shape_plan(prepared)
    c0 = compile_count()
    outcomes, fits = [], []
    if executor is None:
        for f, frame in zip(fold_list, frames):
            res = _fit_fold(frame, fold_cfg, f, shapes)
            fits.append(res)
            outcomes.append(fold_outcome(res, f))
            if progress:
                _say(outcomes[-1], len(fold_list))
        compiles = compile_count() - c0
    else:
        x64 = bool(jax.config.jax_enable_x64)
        futures = [executor.submit(remote_fold, frame, fold_cfg, f, shapes, x64)
                   for f, frame in zip(fold_list, frames)]
        for fut in futures:  # in fold order; a fold's DataError is raised here, naming the fold
            outcomes.append(fut.result())
            if progress:
                _say(outcomes[-1], len(fold_list))
        compiles = sum(o["row"]["compiles"] for o in outcomes)
    errors = pd.concat([o["errors"] for o in outcomes], ignore_index=True)
    regression = cfg.task == "regression"
    comparison = compare(errors, regression, dm_horizon(prepared[0]), level)
    by_lead = compare_by_lead(errors, level) if regression else None
    return BacktestResult(folds=pd.DataFrame([o["row"] for o in outcomes]), comparison_by_lead=by_lead,
                          metrics=pd.concat([o["metrics"] for o in outcomes]), errors=errors,
                          comparison=comparison, scheme=scheme, fits=fits, compiles=compiles,
                          seconds=time.perf_counter() - t0,
                          config=prepared[0].config.replace(split_column=None))


def fold_outcome(res, f: Fold) -> dict:
    """What a backtest keeps of one fold's fit: metrics (indexed by fold, model), errors, the
    fold's row of ``BacktestResult.folds`` (all plain frames and numbers, to send between processes)."""
    offset = np.flatnonzero(f.part != None)  # noqa: E711: caller-frame position of each fold row
    p = res.prepared
    t = p.target_times("test")
    row = {"fold": f.fold, "origin": t.min() if t.size else None, "end": t.max() if t.size else None,
           "train_rows": p.counts["rows_train"], "val_rows": p.counts["rows_val"],
           "test_targets": int(len(p.starts["test"])), "status": res.status,
           "epochs": int(len(res.history)), "compiles": res.compiles, "seconds": res.seconds}
    metrics = res.metrics.assign(fold=f.fold).set_index("fold", append=True).reorder_levels(["fold", "model"])
    return {"metrics": metrics, "errors": fold_errors(res, f, offset), "row": row}


def remote_fold(frame: pd.DataFrame, config: Config, f: Fold, shapes: dict, x64: Optional[bool]) -> dict:
    """One fold as a task for an Executor (threads, processes, Dask): fit, then ``fold_outcome``.

    ``x64`` is the caller's jax x64 mode, so a worker computes as the caller would.
    """
    if x64 is not None and bool(jax.config.jax_enable_x64) != x64:
        jax.config.update("jax_enable_x64", x64)
    return fold_outcome(_fit_fold(frame, config, f, shapes), f)


def _say(outcome, total):
    r = outcome["row"]
    print(f"fold {r['fold']}/{total}: {r['status']}, {r['test_targets']} test windows, {r['seconds']:.1f} s")


def dm_horizon(prepared) -> int:
    """The h of the Diebold-Mariano test: how far apart two forecasts must be to share no
    error term. Many-to-one: the horizon (with leads 1..H, the loss averaged over the leads
    of one origin shares target rows with the H - 1 origins before it); many-to-many (losses
    per window): window + horizon - 1; whole sequences (independent): 1."""
    if prepared.full:
        return 1
    if prepared.config.mode == "many-to-many":
        return int(prepared.window) + int(prepared.horizon) - 1
    return max(int(prepared.horizon), 1)


def _where(f: Fold) -> str:
    return f"fold {f.fold}" + (f" (forecast rows {f.origin}..{f.end - 1})" if f.origin is not None else "")


@contextmanager
def _quiet():
    """Fold parts are short by design: their small-part warnings stay in each fold's notes
    (one warning per fold and part buried the verdict); the verdict weighs all folds."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SmallPartWarning)
        yield


def _prepare_fold(frame, config, f):
    try:
        with _quiet():
            return prepare(frame, config)
    except DataError as e:
        raise DataError(f"{_where(f)}: {e}") from None


def _fit_fold(frame, config, f, shapes):
    try:
        with _quiet():
            return fit(frame, config, progress=False, shapes=shapes)
    except DataError as e:
        raise DataError(f"{_where(f)}: {e}") from None
