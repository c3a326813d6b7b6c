"""Command line: the same fits and sweeps as the notebook, for terminals and batch jobs.

    rnnkit demo [--out DIR]
    rnnkit fit CONFIG.json --data FILE [--out DIR]
    rnnkit sweep SPACE.json --data FILE [--store runs.db] [--workers N] [--folds K] [--out DIR]
    rnnkit backtest CONFIG.json --data FILE [--folds K] [--test-size N] [--window N] [--out DIR]
    rnnkit check-gradients CONFIG.json --data FILE
    rnnkit forecast MODEL_DIR --data FILE [--steps N] --out FILE.csv

Bad input ends with exit status 2 and one line on stderr that says what to fix.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Optional, Sequence

_DATA_SUFFIXES = (".csv", ".parquet", ".pq")
_SPACE_KEYS = ("config", "space", "strategy", "seeds", "n_samples", "metric")
_MAX_WORKERS = 1024  # as rnnkit.sweeps._runner.MAX_WORKERS (kept here: the parser loads no jax)


class UsageError(Exception):
    """Bad command-line input: printed as one line, exit status 2."""


# --- reading inputs ---------------------------------------------------------

def read_data(path: str, index_col: Optional[str] = "auto", keep: Optional[str] = None):
    """Read a CSV or Parquet file into a DataFrame.

    With ``index_col="auto"`` an unnamed first column (as pandas writes an
    index) or a first column that parses wholly as dates becomes the index;
    ``index_col=None`` keeps a plain range index; any other value names the
    column to use as index. ``keep`` (the config's time column) is never made
    the index by "auto": the config reads it as a column.
    """
    import pandas as pd

    p = Path(path)
    if not p.is_file():
        raise UsageError(f"--data {path}: no such file")
    suffix = p.suffix.lower()
    if suffix not in _DATA_SUFFIXES:
        raise UsageError(f"--data {path}: unknown file type {suffix!r}; use a .csv or .parquet file")
    try:
        df = pd.read_csv(p) if suffix == ".csv" else pd.read_parquet(p)
    except (ValueError, OSError, ImportError) as e:
        raise UsageError(f"--data {path}: could not be read ({e})") from None
    if df.shape[1] == 0:
        raise UsageError(f"--data {path}: the file has no columns")
    if index_col is None:
        return df
    if index_col != "auto":
        if index_col not in df.columns:
            raise UsageError(f"--index-col {index_col!r} is not a column of {path}; "
                             f"columns are {list(df.columns)}")
        return df.set_index(index_col)
    first = df.columns[0]
    if first == keep:
        return df
    if str(first).startswith("Unnamed"):
        return df.set_index(first).rename_axis(None)
    col = df[first]
    if col.dtype == object or str(col.dtype).startswith(("str", "string")):
        try:
            parsed = pd.to_datetime(col, errors="coerce", format="mixed")
        except ValueError:  # several UTC offsets (local times across DST): read them as UTC
            parsed = pd.to_datetime(col, errors="coerce", format="mixed", utc=True)
        if parsed.notna().all():
            return df.drop(columns=[first]).set_index(pd.DatetimeIndex(parsed, name=first))
    elif str(col.dtype).startswith("datetime"):
        return df.set_index(first)
    return df


def read_json(path: str, what: str) -> dict:
    from ..sweeps._export import read_json_file

    if not Path(path).exists():
        raise UsageError(f"{what} {path}: no such file")
    try:
        doc = read_json_file(path, what)
    except ValueError as e:
        raise UsageError(str(e)) from None
    if not isinstance(doc, dict):
        raise UsageError(f"{what} {path}: the top level must be a JSON object")
    return doc


def read_space(path: str):
    """A sweep file: {"config": {...}, "space": {...}, "strategy", "seeds", "n_samples", "metric"}."""
    from ..data._config import Config

    doc = read_json(path, "SPACE")
    unknown = sorted(set(doc) - set(_SPACE_KEYS))
    if unknown:
        raise UsageError(f"SPACE {path}: unknown key(s) {unknown}; allowed are {list(_SPACE_KEYS)}")
    if not isinstance(doc.get("space"), dict) or not doc["space"]:
        raise UsageError(f'SPACE {path}: needs a non-empty "space" object, for example '
                         '{"space": {"window": [24, 48], "hidden": [16, 32]}}')
    base = doc.get("config", {})
    if not isinstance(base, dict):
        raise UsageError(f'SPACE {path}: "config" must be an object of Config fields')
    try:
        config = Config.from_dict(base)
    except (TypeError, ValueError) as e:
        raise UsageError(f'SPACE {path}: "config": {e}') from None
    options = {k: doc[k] for k in ("strategy", "seeds", "n_samples", "metric") if k in doc}
    return config, doc["space"], options


# --- commands ---------------------------------------------------------------

def cmd_demo(args) -> int:
    from ._demo import run_demo

    run_demo(args.out, workers=args.workers, progress=not args.no_progress, quick=args.quick)
    return 0


def _out_folder(value) -> Path:
    """The --out folder; a file there is refused before any training starts."""
    out = Path(value)
    if out.exists() and not out.is_dir():
        raise UsageError(f"--out {value} is a file; give a folder (it is made if missing)")
    return out


def cmd_fit(args) -> int:
    from ..sweeps._export import load_config
    from ..fitting._fit import fit
    from ._report import write_report

    out = _out_folder(args.out)
    config = load_config(args.config)
    df = read_data(args.data, args.index_col, keep=config.time_column)
    result = fit(df, config, progress=not args.no_progress)
    result.save(out / "model")
    write_report(out / "report.html", result, title=f"rnnkit fit of {Path(args.data).name}")
    print(f"status: {result.status}")
    print(result.metrics.to_string(float_format=lambda v: f"{v:.4g}"))
    print(f"wrote {out / 'model'} and {out / 'report.html'}")
    return 0


def cmd_sweep(args) -> int:
    from ..fitting._fit import fit
    from ._report import write_report
    from ..sweeps._sweep import sweep

    out = _out_folder(args.out)
    config, space, options = read_space(args.space)
    df = read_data(args.data, args.index_col, keep=config.time_column)
    out.mkdir(parents=True, exist_ok=True)
    workers = _capped_workers(args.workers, config, space, options, args.folds)
    result = sweep(df, config, space, workers=workers, store=args.store,
                   progress=not args.no_progress, folds=args.folds, **options)
    _atomic_csv(result.table, out / "results.csv")
    result.export(out / "best-config.json")
    best = fit(df, result.best(), progress=False)
    write_report(out / "report.html", best, sweep_result=result,
                 title=f"rnnkit sweep of {Path(args.data).name}")
    print(result.summary().to_string(float_format=lambda v: f"{v:.4g}"))
    print(f"wrote {out / 'results.csv'}, {out / 'best-config.json'} and {out / 'report.html'}")
    return 0


def cmd_backtest(args) -> int:
    from ..sweeps._export import load_config
    from ..fitting._backtest import backtest
    from ._report import write_backtest_report

    out = _out_folder(args.out)
    config = load_config(args.config)
    df = read_data(args.data, args.index_col, keep=config.time_column)
    window = "expanding" if args.window is None else args.window
    result = backtest(df, config, args.folds, window=window, test_size=args.test_size,
                      progress=not args.no_progress)
    out.mkdir(parents=True, exist_ok=True)
    _atomic_csv(result.metrics.reset_index(), out / "results.csv")
    _atomic_csv(result.errors, out / "errors.csv")
    write_backtest_report(out / "report.html", result, title=f"rnnkit backtest of {Path(args.data).name}")
    print(result.summary().to_string(float_format=lambda v: f"{v:.4g}"))
    for v in result.comparison["verdict"]:
        print(v)
    print(f"wrote {out / 'results.csv'}, {out / 'errors.csv'} and {out / 'report.html'}")
    return 0


def _capped_workers(workers: int, config, space, options, folds=None) -> int:
    """--workers, capped at the planned runs and the usable cores, with a note on stderr."""
    from ..sweeps._plan import plan
    from ..sweeps._runner import pool_size, usable_cores

    if workers <= 1:
        return workers
    try:
        runs = len(plan(config, space, options.get("strategy", "grid"), options.get("n_samples"),
                        options.get("seeds", 1))) * (folds or 1)
    except (TypeError, ValueError):
        return workers  # sweep() names the fault
    n = pool_size(workers, runs)
    if n < workers:
        print(f"rnnkit sweep: note: --workers {workers} capped to {n} ({runs} run(s) planned, "
              f"{usable_cores()} usable core(s))", file=sys.stderr)
    return n


def gradient_check_on_data(df, config, *, n_windows: int = 4):
    """check_gradients on the first training windows of the user's data, at init."""
    import jax

    from ..recurrent._cells import init_params
    from ..data._prepare import prepare
    from ..inspection._gradcheck import check_gradients

    if n_windows < 1:
        raise UsageError("--windows must be at least 1")
    prep = prepare(df, config)
    x, y, mask = prep.windows("train")
    k = min(n_windows, len(x))
    key = jax.random.PRNGKey(config.seed)
    params = init_params(key, prep.n_inputs, config.hidden, prep.net_outputs, scheme=config.init,
                         recurrent_scale=config.recurrent_scale, cell=config.cell)
    if prep.leads > 1:  # the network's outputs are the leads, side by side
        y = y.reshape(len(y), -1)
    kw = dict(activation=config.activation, task=config.task, mode=config.mode, cell=config.cell)
    if mask is not None:
        kw["mask"] = mask[:k]
    return check_gradients(params, x[:k], y[:k], **kw)


def cmd_forecast(args) -> int:
    from ..data._atomic import write_text
    from ..fitting._fit import load_fit

    out = Path(args.out)
    if out.suffix.lower() != ".csv":
        raise UsageError(f"--out {args.out}: the forecast is written as CSV; give a .csv file name")
    if out.is_dir():
        raise UsageError(f"--out {args.out} is a folder; give a .csv file name")
    if args.steps is not None and args.steps < 1:
        raise UsageError(f"--steps {args.steps}: give a whole number >= 1 (default: the horizon)")
    result = load_fit(args.model)
    df = read_data(args.data, args.index_col, keep=result.config.time_column)
    table = result.forecast(steps=args.steps, df=df)
    out.parent.mkdir(parents=True, exist_ok=True)
    write_text(out, table.to_csv(index=True))
    print(table.to_string(float_format=lambda v: f"{v:.4g}"))
    print(f"wrote {out} ({len(table)} rows)")
    return 0


def cmd_check_gradients(args) -> int:
    from ..sweeps._export import load_config

    config = load_config(args.config)
    df = read_data(args.data, args.index_col, keep=config.time_column)
    table = gradient_check_on_data(df, config, n_windows=args.windows)
    print(table.to_string(float_format=lambda v: f"{v:.3g}"))
    worst = float(table["jax_vs_fd_rel"].max())
    if worst > args.tolerance:
        print(f"gradients disagree: largest relative difference {worst:.3g} > {args.tolerance:g}",
              file=sys.stderr)
        return 1
    print(f"gradients agree (largest relative difference {worst:.3g} <= {args.tolerance:g})")
    return 0


def _atomic_csv(frame, path: Path) -> None:
    from ..data._atomic import write_text

    write_text(path, frame.to_csv(index=False))


# --- parser -----------------------------------------------------------------

def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rnnkit", description="Train, diagnose and sweep simple recurrent networks on "
        "time series from the command line.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def common(p, data=True):
        if data:
            p.add_argument("--data", required=True, metavar="FILE",
                           help="CSV or Parquet file with one row per time step")
            p.add_argument("--index-col", default="auto", metavar="NAME",
                           help="column to use as the index ('auto': an unnamed first "
                           "column or a first column of dates)")
        p.add_argument("--no-progress", action="store_true", help="no progress bars")

    p = sub.add_parser("demo", help="a small sweep on the built-in cold-storage load data, "
                       "with a report")
    p.add_argument("--out", default="demo-out", metavar="DIR", help="output folder (default demo-out)")
    p.add_argument("--workers", type=int, default=1, metavar="N", help="worker processes")
    p.add_argument("--quick", action="store_true", help="a smaller sweep (for tests)")
    common(p, data=False)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("fit", help="fit one config to a data file and write the model and a report")
    p.add_argument("config", metavar="CONFIG.json", help="a config or exported experiment document")
    p.add_argument("--out", default="fit-out", metavar="DIR", help="output folder (default fit-out)")
    common(p)
    p.set_defaults(func=cmd_fit)

    p = sub.add_parser("sweep", help="run a sweep described by a JSON file; resumable with --store")
    p.add_argument("space", metavar="SPACE.json",
                   help='{"config": {...}, "space": {"window": [24, 48], ...}, "seeds": 1}')
    p.add_argument("--store", default=None, metavar="FILE", help="SQLite file that keeps every "
                   "finished run; running again resumes")
    p.add_argument("--workers", type=int, default=1, metavar="N", help="worker processes")
    p.add_argument("--out", default="sweep-out", metavar="DIR", help="output folder (default sweep-out)")
    p.add_argument("--folds", type=int, default=None, metavar="K",
                   help="rank settings by the mean over K backtest folds (default: one split)")
    common(p)
    p.set_defaults(func=cmd_sweep)

    p = sub.add_parser("backtest", help="rolling-origin backtest of one config against the baselines, "
                       "with significance tests and a report")
    p.add_argument("config", metavar="CONFIG.json", help="a config or exported experiment document")
    p.add_argument("--folds", type=int, default=5, metavar="K", help="forecast origins (default 5)")
    p.add_argument("--test-size", type=int, default=None, metavar="N",
                   help="rows forecast per fold (default: the last half of the series in K blocks)")
    p.add_argument("--window", type=int, default=None, metavar="N",
                   help="train on the last N rows before each origin (default: every row before it)")
    p.add_argument("--out", default="backtest-out", metavar="DIR",
                   help="output folder (default backtest-out)")
    common(p)
    p.set_defaults(func=cmd_backtest)
    p = sub.add_parser("forecast", help="forecast past the end of a data file with a saved model, "
                       "with prediction intervals")
    p.add_argument("model", metavar="MODEL_DIR", help="a fit folder (written by `rnnkit fit` or "
                   "FitResult.save)")
    p.add_argument("--steps", type=int, default=None, metavar="N",
                   help="future steps (default: the model's horizon, or the rows of future inputs)")
    p.add_argument("--out", required=True, metavar="FILE.csv", help="where to write the forecast")
    common(p)
    p.set_defaults(func=cmd_forecast)

    p = sub.add_parser("check-gradients", help="compare JAX gradients with hand-written BPTT "
                       "and finite differences on windows of your data")
    p.add_argument("config", metavar="CONFIG.json")
    p.add_argument("--windows", type=int, default=4, metavar="N", help="training windows to use")
    p.add_argument("--tolerance", type=float, default=1e-4, metavar="RTOL",
                   help="largest relative difference to accept (default 1e-4)")
    common(p)
    p.set_defaults(func=cmd_check_gradients)
    return parser


def main(argv: Optional[Sequence[str]] = None) -> int:
    from ..data._errors import DataError

    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "workers", None) is not None and not 1 <= args.workers <= _MAX_WORKERS:
        parser.error(f"--workers must be from 1 to {_MAX_WORKERS}")
    try:
        return args.func(args)
    except UsageError as e:
        print(f"rnnkit {args.command}: {e}", file=sys.stderr)
        return 2
    except (DataError, ValueError, TypeError, OSError) as e:  # OSError: unreadable/unwritable paths
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        print(f"rnnkit {args.command}: {msg}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"rnnkit {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
