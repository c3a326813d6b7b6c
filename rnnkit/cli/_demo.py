"""`rnnkit demo`: a small sweep on the invented cold-storage load data, with a report."""
from __future__ import annotations

from pathlib import Path

from ..data._atomic import write_text
from ..data._config import Config
from ..data import datasets

# Full demo: 2 windows x 2 hidden sizes x the three cells on two years of hourly
# load, 12 epochs each: is a plain network enough, or does a gated cell pay?
# Quick demo (tests): a few weeks, 2 windows x 2 cells, 2 epochs.
# The network forecasts the next day (24 leads). The last day of the data plays the
# future: its temperatures and door openings are known (a weather forecast, a shift
# plan), its load is not; the report shows the forecast for it with its intervals.
_AHEAD = 24
_SPACE = {"window": [24, 48], "hidden": [16, 32], "cell": ["elman", "gru", "lstm"]}
_QUICK_SPACE = {"window": [12, 24], "cell": ["elman", "gru"]}


def demo_setup(quick: bool = False):
    """The demo's data frame, base config and search space."""
    years = 45 / 365 if quick else 2.0
    df = datasets.cold_storage_load(years=years)
    base = Config(target="load_kw", features=("outdoor_temp_c", "doors_open"),
                  missing="interpolate", window=24, horizon=_AHEAD, hidden=16,
                  epochs=2 if quick else 12, batch_size=64, lr=5e-3, patience=4)
    return df, base, (_QUICK_SPACE if quick else _SPACE)


def run_demo(out, *, workers: int = 1, progress: bool = True, quick: bool = False):
    """Sweep, export the winner, refit it and write results.csv, best-config.json, report.html."""
    from ..fitting._fit import fit
    from ._report import cell_comparison, write_report
    from ..sweeps._sweep import sweep

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    whole, base, space = demo_setup(quick)
    df = whole.iloc[:-_AHEAD]  # the known past
    result = sweep(df, base, space, seeds=1, workers=workers, store=str(out / "runs.db"),
                   progress=progress)
    write_text(out / "results.csv", result.table.to_csv(index=False))
    result.export(out / "best-config.json")
    best = fit(df, result.best(), progress=False)
    ahead = whole.copy()
    ahead.iloc[-_AHEAD:, ahead.columns.get_loc("load_kw")] = float("nan")  # inputs known, load not
    future = best.forecast(df=ahead)
    write_text(out / "forecast.csv", future.to_csv(index=True))
    write_report(out / "report.html", best, sweep_result=result, future=future,
                 title="rnnkit demo: hourly load of an invented cold-storage warehouse")
    print(result.summary().to_string(float_format=lambda v: f"{v:.4g}"))
    cells = cell_comparison(result)
    if cells is not None:
        print("\n" + cells[1])
    print()
    print(best.metrics.to_string(float_format=lambda v: f"{v:.4g}"))
    print()
    print(future.to_string(float_format=lambda v: f"{v:.4g}"))
    print(f"\nwrote {out / 'results.csv'}, {out / 'best-config.json'}, {out / 'forecast.csv'} and "
          f"{out / 'report.html'}")
    return result, best
