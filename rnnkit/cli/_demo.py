"""`rnnkit demo`: a small sweep on the invented cold-storage load data, with a report."""
from __future__ import annotations

from pathlib import Path

from ..data._atomic import write_text
from ..data._config import Config
from ..data import datasets

# Full demo: 2 windows x 2 hidden sizes x 2 activations on two years of hourly
# load, 12 epochs each. Quick demo (tests): a few weeks, 2 runs, 2 epochs.
_SPACE = {"window": [24, 48], "hidden": [16, 32], "activation": ["tanh", "relu"]}
_QUICK_SPACE = {"window": [12, 24]}


def demo_setup(quick: bool = False):
    """The demo's data frame, base config and search space."""
    years = 45 / 365 if quick else 2.0
    df = datasets.cold_storage_load(years=years)
    base = Config(target="load_kw", features=("outdoor_temp_c", "doors_open"),
                  missing="interpolate", window=24, horizon=1, hidden=16,
                  epochs=2 if quick else 12, batch_size=64, lr=5e-3, patience=4)
    return df, base, (_QUICK_SPACE if quick else _SPACE)


def run_demo(out, *, workers: int = 1, progress: bool = True, quick: bool = False):
    """Sweep, export the winner, refit it and write results.csv, best-config.json, report.html."""
    from ..fitting._fit import fit
    from ._report import write_report
    from ..sweeps._sweep import sweep

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    df, base, space = demo_setup(quick)
    result = sweep(df, base, space, seeds=1, workers=workers, store=str(out / "runs.db"),
                   progress=progress)
    write_text(out / "results.csv", result.table.to_csv(index=False))
    result.export(out / "best-config.json")
    best = fit(df, result.best(), progress=False)
    write_report(out / "report.html", best, sweep_result=result,
                 title="rnnkit demo: hourly load of an invented cold-storage warehouse")
    print(result.summary().to_string(float_format=lambda v: f"{v:.4g}"))
    print()
    print(best.metrics.to_string(float_format=lambda v: f"{v:.4g}"))
    print(f"\nwrote {out / 'results.csv'}, {out / 'best-config.json'} and {out / 'report.html'}")
    return result, best
