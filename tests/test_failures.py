"""Failures are results: any exception inside one run of a sweep is a failed row, and
prepare() refuses, before training, frames the baselines cannot score."""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import rnnkit
from rnnkit import Config, DataError, prepare, sweep


@pytest.fixture(scope="module")
def nile():
    # Annual flow of the Nile at Aswan 1871-1970, the open data set shipped with statsmodels.
    return sm.datasets.nile.load_pandas().data[["volume"]].astype(float)


def test_prepare_refuses_one_training_window_before_training(nile):
    # 12 rows, window 3: the training part (4 rows) holds a single window; the linear AR
    # baseline needs two, so the frame is refused here rather than after the network trained.
    cfg = Config(target="volume", window=3, split=(0.34, 0.33, 0.33), season=None)
    with pytest.raises(DataError, match="train part has 1 window.*linear AR.*at least 2"):
        prepare(nile.iloc[:12], cfg)


def test_prepare_refuses_one_row_per_sequence(nile):
    # Every year its own sequence with window="full": no training sequence has a previous
    # value, so MASE and the naive baselines are undefined.
    df = nile.assign(year=np.arange(len(nile)), rain=np.linspace(0.0, 1.0, len(nile)))
    cfg = Config(target="volume", features=("rain",), window="full", group_column="year",
                 target_as_input=False)
    with pytest.raises(DataError, match="two consecutive rows"):
        prepare(df, cfg)


def test_any_exception_in_one_run_is_a_failed_row_and_summary_says_why(nile, monkeypatch):
    real_fit = rnnkit.sweeps._runner.fit

    def fit_or_fail(df, config, **kw):
        if config.hidden == 3:
            raise ZeroDivisionError("internal trouble")
        return real_fit(df, config, **kw)
    monkeypatch.setattr("rnnkit.sweeps._runner.fit", fit_or_fail)
    base = Config(target="volume", epochs=2, batch_size=32, season=None, window=2, hidden=2,
                  split=(0.34, 0.33, 0.33))
    # On 12 rows, window 3 leaves one training window (refused by prepare); hidden 3
    # raises inside the run: both are rows, the other settings run on.
    res = sweep(nile.iloc[:12], base, {"window": [2, 3], "hidden": [2, 3]}, progress=False)
    t = res.table.set_index(["window", "hidden"])
    assert len(t) == 4
    assert t.loc[(2, 2), "status"] == "ok"
    assert t.loc[(2, 3), "status"] == "failed"
    assert t.loc[(2, 3), "message"] == "ZeroDivisionError: internal trouble"
    assert t.loc[(3, 2), "status"] == "failed" and "linear AR" in t.loc[(3, 2), "message"]
    s = res.summary()
    assert list(s.columns[-1:]) == ["reason"]
    assert s.iloc[0]["reason"] == "" and s.iloc[0]["window"] == 2 and s.iloc[0]["hidden"] == 2
    # failed settings sit at the bottom with their reason
    bottom = s.iloc[1:].set_index(["window", "hidden"])
    assert bottom.loc[(2, 3), "reason"] == "ZeroDivisionError: internal trouble"
    assert "linear AR" in bottom.loc[(3, 3), "reason"] or "ZeroDivisionError" in bottom.loc[(3, 3), "reason"]
