"""sweep(): plan, run, store; and SweepResult, the table of runs with its summary.

A sweep is three small pieces composed: ``plan`` (Config + space -> Configs),
``run`` (Configs -> stored records, serially or in parallel) and the run store
(SQLite). ``sweep`` is only their composition plus the table.

Example:
    >>> res = sweep(df, Config(target="load_kw", epochs=10),
    ...             {"window": [24, 48], "hidden": [16, 32]}, seeds=3, store="load.db")
    >>> res.summary().head()
    >>> res.export("best.json")
"""
from __future__ import annotations

import concurrent.futures as cf
import dataclasses
import re
from typing import Callable, Optional, Sequence, Union

import numpy as np
import pandas as pd

from ..data._config import Config
from ..data._errors import DataError
from ._export import document, write_document
from ._plan import plan
from ._runner import MAX_WORKERS, TRAINING_FIELDS, _data_key, fold_spec, run, unpack_history, unpack_params

METRICS = {"regression": ("mae", "rmse", "mase", "r2"),
           "classification": ("accuracy", "balanced_accuracy", "log_loss")}
HIGHER_IS_BETTER = ("accuracy", "balanced_accuracy", "r2")
DEFAULT_METRIC = {"regression": "val_rmse", "classification": "val_log_loss"}
RUN_COLUMNS = ("seed", "status", "epochs", "seconds", "compiles")


def higher_is_better(metric: str) -> bool:
    """Whether a larger value of `metric` (e.g. "val_accuracy") is better."""
    return metric.endswith(tuple("_" + m for m in HIGHER_IS_BETTER))


def _check_metric(metric: Optional[str], task: str) -> str:
    if metric is None:
        return DEFAULT_METRIC[task]
    names = "|".join(METRICS[task])
    pattern = rf"(?:[a-z0-9_]+_)?(?:val|test)_(?:{names})"
    if not isinstance(metric, str) or not re.fullmatch(pattern, metric):
        raise ValueError(f"`metric` (={metric!r}) is not a {task} score; use '<split>_<metric>' "
                         f"with split val or test and metric one of {METRICS[task]} "
                         f"(e.g. {DEFAULT_METRIC[task]!r}), "
                         "or a baseline's score such as 'persistence_val_rmse'")
    return metric


def _missing(v) -> bool:
    return v is None or (isinstance(v, float) and np.isnan(v))


def _same(a, b) -> bool:
    """Equal settings; None and NaN (how groupby hands back a None key) count as one."""
    return (_missing(a) and _missing(b)) or (not _missing(a) and not _missing(b) and a == b)


def _hashable(v):
    return tuple(v) if isinstance(v, list) else v


class SweepResult:
    """The runs of a sweep: ``table`` (one row per run), ``summary()``, ``best()``, ``export()``.

    Attributes:
        table: DataFrame, one row per finished run, in plan order: every varied
            field, seed, status, epochs, seconds, compiles, the network's
            validation and test scores ("val_rmse", ...), the baselines' scores
            ("persistence_val_rmse", ...), message (why a run failed) and key.
        metric: the score runs are ranked by.
        varied: the Config fields the space varies.
        config: the base Config.
        missing: planned runs that did not run (the sweep was stopped).
    """

    def __init__(self, records: Sequence[dict], *, metric: str, varied: Sequence[str], config: Config,
                 planned: int, df: Optional[pd.DataFrame] = None, folds: Optional[dict] = None):
        self.metric, self.varied, self.config = metric, list(varied), config
        self.folds = None if folds is None else dict(folds)
        self.missing = planned - len(records)
        self._df = df
        self._configs = {r["key"]: Config.from_dict(r["config"]) for r in records}
        # The weights each trained run ended with (npz bytes, history, best epoch): result(run).
        self._kept = {r["key"]: (r["params"], r.get("history") or "{}", int(r.get("best_epoch") or 0))
                      for r in records if r.get("params") is not None}
        self._status = {r["key"]: (r["status"], int(r["compiles"]), float(r["seconds"]))
                        for r in records}
        self._prepared = {}  # data setting -> Prepared, shared by the runs that use it
        rows, metric_cols = [], {}
        for r in records:
            c = self._configs[r["key"]]
            row = {f: _hashable(getattr(c, f)) for f in self.varied}
            row.update(seed=c.seed, status=r["status"], epochs=r["epochs"], seconds=r["seconds"],
                       compiles=r["compiles"])
            if self.folds is not None:
                row["fold"] = (r.get("fold") or {}).get("fold")
            for k, v in r["metrics"].items():
                metric_cols.setdefault(k, None)
                row[k] = np.nan if v is None else v
            row.update(message=r["message"], key=r["key"])
            rows.append(row)
        own = [k for k in metric_cols if k.startswith(("val_", "test_"))]
        others = [k for k in metric_cols if k not in own]
        fold_col = ["fold"] if self.folds is not None else []
        cols = self.varied + ["seed"] + fold_col + list(RUN_COLUMNS[1:]) + own + others + ["message", "key"]
        self.table = pd.DataFrame(rows, columns=cols)
        for k in metric_cols:
            self.table[k] = self.table[k].astype(np.float64)
        self._metric_cols = list(metric_cols)

    def _scored(self) -> pd.DataFrame:
        """One row per (setting, seed): the table itself, or with folds the mean over folds of
        every score (NaN when a fold has none), the worst status and the first fold's key."""
        if self.folds is None:
            return self.table
        t = self.table
        keys = self.varied + ["seed"]
        g = t.groupby(keys, dropna=False, sort=False)
        out = g[self._metric_cols].agg(lambda v: v.mean(skipna=False))
        out["status"] = g["status"].agg(_worst_status)
        out["folds"] = g.size()
        for c in ("epochs", "seconds", "compiles"):
            out[c] = g[c].sum()
        out["message"] = g["message"].agg(lambda m: next((x for x in m if x), ""))
        out["key"] = g["key"].first()
        return out.reset_index()

    def _require_metric(self):
        if self.metric not in self.table.columns:
            raise ValueError(f"no run has the score `metric`={self.metric!r}; the scores are "
                             f"{[c for c in self.table.columns if c.startswith(('val_', 'test_'))]}; "
                             "pass one of them as metric")

    def summary(self) -> pd.DataFrame:
        """One row per setting: mean and spread over seeds, ranked by the metric.

        With folds, each seed's score is first its mean over the folds (a setting with a
        fold that failed or diverged has no score and ranks last).

        Returns:
            DataFrame with the varied fields, ``rank``, ``runs``, the metric's
            mean (named as the metric), ``<metric>_std`` (sample std over
            seeds), ``seed_spread`` (max - min over seeds), the test score and
            the baselines' mean for the same metric, ``diverged`` and ``failed``
            (shares of the setting's runs) and ``reason`` (the message of the
            setting's first failed run, "" when none failed). Best first (lower
            is better except for accuracy, balanced_accuracy and r2); settings
            without a score (every run failed or diverged) last.
        """
        self._require_metric()
        t, m = self._scored(), self.metric
        g = t.groupby(self.varied, dropna=False, sort=False)
        out = pd.DataFrame({"runs": g.size(), m: g[m].mean(), f"{m}_std": g[m].std(ddof=1),
                            "seed_spread": g[m].max() - g[m].min()})
        split_metric = re.fullmatch(r"(?:.*_)?(val|test)_(.+)", m)
        related = [c for c in t.columns if c != m and c.endswith("_" + split_metric.group(2))
                   and c not in self.varied]
        for c in related:
            out[c] = g[c].mean()
        out["diverged"] = g["status"].agg(lambda s: float(s.str.startswith("diverged").mean()))
        out["failed"] = g["status"].agg(lambda s: float((s == "failed").mean()))
        why = t["message"].where(t["status"] == "failed", "").fillna("")
        out["reason"] = why.groupby([t[f] for f in self.varied], dropna=False, sort=False).agg(
            lambda s: next((m for m in s if m), ""))
        out = out.sort_values(m, ascending=not higher_is_better(m), na_position="last", kind="stable")
        out.insert(0, "rank", np.arange(1, len(out) + 1))
        return out.reset_index()

    def best_run(self) -> pd.Series:
        """The table row of the winner: the best setting's run nearest its mean over seeds
        (a typical seed, not the luckiest one); with folds, that seed's means over the folds."""
        top = self.summary().iloc[0]
        if not np.isfinite(top[self.metric]):
            raise ValueError(f"no run has a finite {self.metric!r}; every run failed or diverged "
                             "(see the table's status and message columns)")
        t = self._scored()
        same = np.ones(len(t), bool)
        for f in self.varied:
            same &= np.array([_same(v, top[f]) for v in t[f]], dtype=bool)
        runs = t[same & np.isfinite(t[self.metric].to_numpy())]
        return runs.loc[(runs[self.metric] - top[self.metric]).abs().idxmin()]

    def best(self) -> Config:
        """The winning Config (see ``best_run``), seed included, ready for ``fit``."""
        return self._configs[self.best_run()["key"]]

    def key(self, run=None) -> str:
        """The key of a run: None for the winner (``best_run``), a table row position (int)
        or a key (str)."""
        if run is None:
            return str(self.best_run()["key"])
        if isinstance(run, (int, np.integer)) and not isinstance(run, bool):
            if not -len(self.table) <= run < len(self.table):
                raise IndexError(f"`run` (={run}) is not a row of the table ({len(self.table)} runs); "
                                 f"use 0..{len(self.table) - 1}")
            return str(self.table["key"].iloc[int(run)])
        if isinstance(run, str) and run in self._configs:
            return run
        raise ValueError(f"`run` (={run!r}) is not a run of this sweep; give a row position of "
                         "`table`, a value of its `key` column, or None for the winner")

    def result(self, run=None):
        """The FitResult of one run, rebuilt from the weights the sweep kept (no training).

        Args:
            run: None (the winner), a row position of ``table``, or a run's key.
        Returns:
            FitResult with the run's weights, history, status and config, on the
            sweep's frame: predict(), metrics (scored again, equal to the table's),
            diagnostics and loss surfaces work as after ``fit``.
        Raises:
            ValueError when the run kept no weights (it failed) or the sweep has no frame.
        """
        from ..data._predict import frame_actuals, spec_of, zoned_labels
        from ..data._prepare import prepare
        from ..fitting._fit import SCORED, FitResult, network_predictions, score

        key = self.key(run)
        if key not in self._kept:
            status = self._status[key][0]
            raise ValueError(f"run {key[:12]}... kept no weights (status {status!r}): it failed "
                             "before training; see the table's message column")
        if self._df is None:
            raise ValueError("this SweepResult has no frame to rebuild a run on; "
                             "rebuild it with sweep(df, ...) on the same store")
        df, config = self._df, self._configs[key]
        data = _data_key(config)
        if data not in self._prepared:
            self._prepared[data] = prepare(df, config)
        shared = self._prepared[data]
        # One preparation serves every run of a data setting; the run's own training fields
        # (activation, hidden, seed...) go into the config it carries.
        prepared = dataclasses.replace(shared, config=shared.config.replace(
            **{f: getattr(config, f) for f in TRAINING_FIELDS}))
        blob, history, best_epoch = self._kept[key]
        params = unpack_params(blob)
        status, compiles, seconds = self._status[key]
        actual = frame_actuals(df, prepared)
        outputs = {s: network_predictions(params, prepared, s)
                   for s in SCORED if len(prepared.starts[s])}
        metrics, matrices = score(prepared, actual, outputs)
        return FitResult(params=params, spec=spec_of(prepared, df.index.name), status=status,
                         history=unpack_history(history), metrics=metrics, confusion=matrices,
                         prepared=prepared, actual=actual, best_epoch=best_epoch,
                         compiles=compiles, seconds=seconds, outputs=outputs,
                         labels=zoned_labels(df, prepared.rows, config.time_column))

    def export(self, path, *, notes: Optional[str] = None):
        """Write the winner as an experiment document (JSON, checked, atomic); returns the Path."""
        row = self.best_run()
        metrics = {k: row[k] for k in self.table.columns if k.startswith(("val_", "test_"))
                   or re.fullmatch(r".+_(val|test)_.+", k)}
        data = self._df if self._df is not None else None
        doc = document(self._configs[row["key"]], metric=(self.metric, row[self.metric]),
                       metrics=metrics, data=data, notes=notes, scoring=self.scoring)
        return write_document(doc, path)

    @property
    def scoring(self) -> dict:
        """How each setting was scored (the document's "scoring"): one split, or the mean over
        the folds of a backtest (number, scheme, window, test_size, seed)."""
        if self.folds is None:
            return {"folds": 1, "scheme": "split", "split": list(self.config.split)}
        scheme = "sequences" if self.config.group_column is not None else "rolling origin"
        return {**self.folds, "scheme": scheme}

    def __repr__(self) -> str:
        n = len(self.table)
        counts = self.table["status"].str.replace(r" at epoch \d+", "", regex=True).value_counts()
        text = ", ".join(f"{v} {k}" for k, v in counts.items())
        more = f", {self.missing} not run" if self.missing else ""
        return f"SweepResult({n} runs: {text}{more}; varied {self.varied}; metric {self.metric!r})"


def _worst_status(statuses) -> str:
    """The status that speaks for a setting's folds: failed, then diverged, then the first."""
    for prefix in ("failed", "diverged", "stopped by user"):
        hit = [s for s in statuses if str(s).startswith(prefix)]
        if hit:
            return hit[0]
    return statuses.iloc[0]


def sweep(df: pd.DataFrame, config: Optional[Config], space: dict, *, strategy: str = "grid",
          n_samples: Optional[int] = None, seeds: Union[int, Sequence[int]] = 1,
          metric: Optional[str] = None, workers: int = 1, executor: Optional[cf.Executor] = None,
          store=None, progress: bool = True, stop=None,
          on_run: Optional[Callable[[dict], None]] = None, folds: Optional[int] = None,
          test_size: Optional[int] = None, fold_window: Union[str, int] = "expanding") -> SweepResult:
    """Train every setting of a search space, store each run as it finishes, rank them.

    Args:
        df: the frame (never modified).
        config: base Config (None: defaults); fields not in `space` keep its values.
        space: Config field -> list of values; strategy="random" also takes ranges
            {"from": 1e-4, "to": 0.1, "spacing": "log"} ("spacing" "even" by default;
            "whole": true draws whole numbers, both ends included).
        strategy: "grid" or "random".
        n_samples: settings to draw (random only).
        seeds: seeds per setting (count: config.seed + 0..n-1) or a list of seeds.
        metric: score to rank by; default "val_rmse" (regression) / "val_log_loss"
            (classification).
        workers: processes to run in (1: this process; at most MAX_WORKERS). Our own
            pool starts no more processes than there are runs to do and usable
            cores (``pool_size``). Each worker is a spawned
            process bound to one core (round robin), so XLA and BLAS run one
            thread there; results equal the serial run's to float32 rounding.
            Its processes share a temporary compilation cache.
        executor: a concurrent.futures.Executor to run on instead, e.g.
            ``dask.distributed.Client(...).get_executor()``; every run is
            submitted at once (workers > 1: at most that many in flight). A
            worker process sets XLA_FLAGS for one thread before its first jax
            work; this process keeps the store and writes every row.
        store: path of the SQLite run store (resume: give the same path again),
            a RunStore, or None (in memory).
        progress: show a tqdm bar over runs.
        stop: threading.Event; when set, the sweep ends after the runs in flight.
        on_run: called with each finished run's record (dict).
        folds: None scores each run on the config's own split; K >= 1 backtests every
            setting and seed (``rnnkit.backtest``: rolling origins, or whole-sequence folds
            with ``group_column``; folds shuffled by `config.seed`) and ranks settings by
            the mean over folds. The store keeps one row per (setting, seed, fold), so a
            killed sweep resumes fold by fold; all folds share compiled programs.
        test_size, fold_window: with folds, one series: rows forecast per fold (None: the
            last half of the series in K blocks) and "expanding" or a rolling training
            window of that many rows (``backtest``'s `test_size` and `window`).
    Returns:
        SweepResult.
    Raises:
        DataError when every planned run failed (any exception inside one run, not only
        bad data, is that run's failed row with its message; the sweep goes on).
    """
    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"`df` must be a pandas DataFrame, got {type(df).__name__}")
    config = Config() if config is None else config
    if not isinstance(config, Config):
        raise TypeError(f"`config` must be an rnnkit.Config or None, got {type(config).__name__}")
    metric = _check_metric(metric, config.task)
    if isinstance(workers, bool) or not isinstance(workers, int) or not 1 <= workers <= MAX_WORKERS:
        raise ValueError(f"`workers` (={workers!r}) must be a whole number from 1 to {MAX_WORKERS}")
    if executor is not None and not isinstance(executor, cf.Executor):
        raise TypeError(f"`executor` (={executor!r}) must be a concurrent.futures.Executor, e.g. "
                        "dask.distributed.Client(...).get_executor(), or None")
    if stop is not None and not callable(getattr(stop, "is_set", None)):
        raise TypeError(f"`stop` (={stop!r}) must be a threading.Event or None")
    if on_run is not None and not callable(on_run):
        raise TypeError(f"`on_run` (={on_run!r}) must be a function of one dict, or None")
    spec = None
    if folds is not None:
        if isinstance(folds, bool) or not isinstance(folds, int) or folds < 1:
            raise ValueError(f"`folds` (={folds!r}) must be a whole number >= 1 or None (one split)")
        if test_size is not None and (isinstance(test_size, bool) or not isinstance(test_size, int)
                                      or test_size < 1):
            raise ValueError(f"`test_size` (={test_size!r}) must be a whole number of rows >= 1 or None")
        if fold_window != "expanding" and (isinstance(fold_window, bool) or not isinstance(fold_window, int)
                                           or fold_window < 2):
            raise ValueError(f"`fold_window` (={fold_window!r}) must be 'expanding' or a whole number "
                             "of rows >= 2")
        if config.split_column is not None:
            raise ValueError(f"`split_column` (={config.split_column!r}) fixes one split; with `folds` "
                             "the folds are the split: set `split_column` to None")
        spec = fold_spec(folds, test_size, fold_window, config.seed)
    elif test_size is not None or fold_window != "expanding":
        raise ValueError("`test_size` and `fold_window` shape the folds of a backtest sweep; give `folds` too")
    configs = plan(config, space, strategy, n_samples, seeds)
    records = run(df, configs, store=store, workers=workers, executor=executor,
                  progress=progress, stop=stop, on_run=on_run, folds=spec)
    planned = len(configs) * (1 if spec is None else spec["folds"])
    if len(records) == planned and all(r["status"] == "failed" for r in records):
        raise DataError(f"every one of the {len(records)} runs failed (each is stored as a failed "
                        f"row); the first: {records[0]['message']}")
    result = SweepResult(records, metric=metric, varied=list(space), config=config,
                         planned=planned, df=df, folds=spec)
    if any(r["status"] != "failed" for r in records):
        result._require_metric()
    return result

