"""Numbers that mean something: targets whose squared errors underflow are refused; a
network far worse than the best baseline and an undefined MASE are said in notes."""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from rnnkit import Config, DataError, fit, load_fit, prepare
from rnnkit.fitting._fit import fit_notes


@pytest.fixture(scope="module")
def nile():
    # Annual flow of the Nile at Aswan 1871-1970, the open data set shipped with statsmodels.
    return sm.datasets.nile.load_pandas().data[["volume"]].astype(float)


@pytest.mark.parametrize("factor, word", [(1e-300, "underflow"), (1e200, "overflow")])
def test_targets_whose_squares_leave_float64_are_refused(nile, factor, word):
    # IEEE 754 double: the smallest normal number is about 2.2e-308, so (1e-300)^2 is 0.
    assert (1e-300 * 1e-300) == 0.0
    with pytest.raises(DataError, match=f"'volume'.*{word}.*rescale") as err:
        prepare(nile * factor, Config(target="volume", window=4, season=None))
    assert "1e" in str(err.value)
    prepare(nile * 1e-100, Config(target="volume", window=4, season=None))  # still fine


def test_a_network_far_worse_than_a_baseline_is_noted(tmp_path):
    # Weekly CO2 at Mauna Loa (statsmodels): smooth, so persistence is very good and a
    # network that has barely moved from its initial weights is far worse.
    co2 = sm.datasets.co2.load_pandas().data.iloc[:400]
    cfg = Config(target="co2", window=4, hidden=2, epochs=1, lr=1e-6, missing="interpolate", season=None)
    res = fit(co2, cfg, progress=False)
    m = res.metrics["val_rmse"]
    ratio = m["rnn"] / m.drop("rnn").min()
    assert ratio > 2 and res.status == "ok"
    assert any("far worse than a baseline" in n for n in res.notes)
    res.save(tmp_path / "m")
    assert load_fit(tmp_path / "m").notes == res.notes


def test_notes_only_when_far_worse(monkeypatch):
    idx = pd.Index(["rnn", "persistence", "linear_ar"], name="model")
    close = pd.DataFrame({"val_rmse": [1.9, 1.0, 1.2]}, index=idx)
    far = pd.DataFrame({"val_rmse": [2.1, 1.0, 1.2]}, index=idx)
    # fit_notes asks the Prepared only for its MASE scale: a nonzero one here
    monkeypatch.setattr("rnnkit.fitting._fit.prepared_mase_scale", lambda p: np.array([1.0]))
    assert fit_notes(close, None) == ()
    assert "2.1 times" in fit_notes(far, None)[0]
    acc = pd.DataFrame({"val_accuracy": [0.5, 0.75]}, index=["rnn", "majority"])
    assert fit_notes(acc, None)[0].startswith("the network's val accuracy (0.5) is far below")
    assert fit_notes(acc.assign(val_accuracy=[0.6, 0.75]), None) == ()


def test_a_constant_training_target_notes_that_mase_is_undefined():
    # A constant target is common practice's edge case for MASE (Hyndman & Koehler 2006:
    # the scale is the in-sample naive MAE, 0 here, so MASE is undefined).
    rng = np.random.default_rng(0)
    df = pd.DataFrame({"y": np.r_[np.full(70, 3.0), 3.0 + rng.normal(size=30)], "x": rng.normal(size=100)})
    res = fit(df, Config(target="y", window=3, hidden=2, epochs=1, season=None), progress=False)
    assert np.isnan(res.metrics.loc["rnn", "val_mase"])
    assert any("MASE" in n and "undefined" in n for n in res.notes)
