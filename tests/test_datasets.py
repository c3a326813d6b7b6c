"""The demo data: deterministic, documented columns, and the patterns the demos need."""
import numpy as np
import pandas as pd
import pytest
from scipy.signal import welch
from statsmodels.tsa.stattools import acf

import rnnkit
from rnnkit import datasets

from tolerances import EXACT64


@pytest.fixture(scope="module")
def load():
    return datasets.cold_storage_load()


@pytest.fixture(scope="module")
def line():
    return datasets.packaging_line_faults()


# ---------------------------------------------------------------- cold storage

def test_load_is_deterministic_per_seed():
    a = datasets.cold_storage_load(years=0.1, seed=3)
    b = datasets.cold_storage_load(years=0.1, seed=3)
    c = datasets.cold_storage_load(years=0.1, seed=4)
    pd.testing.assert_frame_equal(a, b)
    assert not np.allclose(a["outdoor_temp_c"], c["outdoor_temp_c"])


def test_load_columns_index_and_dtypes(load):
    assert list(load.columns) == ["load_kw", "outdoor_temp_c", "doors_open"]
    assert isinstance(load.index, pd.DatetimeIndex)
    assert load.index.name == "time"
    assert load.index.freqstr == "h"
    assert len(load) == 2 * 8760
    assert load.index.is_monotonic_increasing and load.index.is_unique
    assert load["load_kw"].dtype == np.float64
    assert load["outdoor_temp_c"].dtype == np.float64
    assert load["doors_open"].dtype == np.int64
    assert len(datasets.cold_storage_load(years=0.5)) == 4380


def test_load_has_the_documented_missing_readings(load):
    missing = np.flatnonzero(load["load_kw"].isna().to_numpy())
    assert len(missing) == 8  # four a year over two years, as documented
    assert np.all(np.diff(missing) > 1)  # scattered, never two in a row
    assert missing.min() >= 48 and missing.max() < len(load) - 48
    assert not load[["outdoor_temp_c", "doors_open"]].isna().any().any()


def test_load_magnitudes_are_plausible(load):
    # A mid-sized freezer store draws some hundreds of kW (common practice, no source).
    assert 60 < load["load_kw"].min() and load["load_kw"].max() < 600
    assert -25 < load["outdoor_temp_c"].min() and load["outdoor_temp_c"].max() < 40
    assert load["doors_open"].min() == 0 and load["doors_open"].max() < 60


def _autocorrelation(x, lags):
    """Sample autocorrelation r_k = sum (x_t - m)(x_{t+k} - m) / sum (x_t - m)^2
    (Box & Jenkins, Time Series Analysis, the usual biased estimator)."""
    d = x - x.mean()
    return np.array([np.dot(d[: len(d) - k], d[k:]) / np.dot(d, d) for k in lags])


def test_load_has_daily_and_weekly_cycles(load):
    y = load["load_kw"].interpolate().to_numpy()
    mine = _autocorrelation(y, [12, 24, 156, 168])
    # statsmodels' acf is the reference implementation of the same estimator.
    ref = acf(y, nlags=168, fft=False)[[12, 24, 156, 168]]
    np.testing.assert_allclose(mine, ref, **EXACT64)
    r12, r24, r156, r168 = ref
    assert r24 > 0.5 and r24 > r12 + 0.3  # a day later looks alike, half a day later does not
    assert r168 > r156  # the same hour a week later beats the same hour 6.5 days later


def test_load_rises_with_outdoor_temperature(load):
    daily = load.resample("D").mean()
    assert daily["load_kw"].corr(daily["outdoor_temp_c"]) > 0.5


def test_doors_stay_shut_on_sundays_and_closed_days(load):
    idx = load.index
    closed = np.array([(m, d) in datasets.CLOSED_DAYS for m, d in zip(idx.month, idx.day)])
    sunday = idx.dayofweek == 6
    assert load.loc[closed | sunday, "doors_open"].sum() == 0
    working = ~closed & (idx.dayofweek < 5) & (idx.hour >= 8) & (idx.hour < 18)
    assert load.loc[working, "doors_open"].mean() > 5
    # Closed weekdays draw clearly less than open ones.
    day = load.resample("D").mean()
    d_idx = day.index
    d_closed = np.array([(m, d) in datasets.CLOSED_DAYS for m, d in zip(d_idx.month, d_idx.day)])
    weekday = d_idx.dayofweek < 5
    assert day.loc[weekday & d_closed, "load_kw"].mean() < day.loc[weekday & ~d_closed, "load_kw"].mean() - 30


def test_load_is_learnable_beyond_persistence(load):
    # A linear autoregression on a 48-hour window (least squares, numpy) must beat
    # persistence clearly at horizons 1 and 24; persistence as the yardstick is
    # common practice (Hyndman & Athanasopoulos, Forecasting: Principles and Practice).
    z = load.interpolate().to_numpy(dtype=np.float64)  # (R, 3)
    n, window = len(z), 48
    train_end = int(0.7 * n)
    for horizon in (1, 24):
        starts = np.arange(n - window - horizon + 1)
        target_row = starts + window - 1 + horizon
        x = np.lib.stride_tricks.sliding_window_view(z, (window, 3))[starts, 0]  # (N, 48, 3)
        a = np.c_[x.reshape(len(x), -1), np.ones(len(x))]
        y = z[target_row, 0]
        train, test = target_row < train_end, target_row >= int(0.85 * n)
        coef = np.linalg.lstsq(a[train], y[train], rcond=None)[0]
        rmse_ar = np.sqrt(np.mean((a[test] @ coef - y[test]) ** 2))
        rmse_persist = np.sqrt(np.mean((x[test, -1, 0] - y[test]) ** 2))
        assert rmse_ar < 0.8 * rmse_persist, (horizon, rmse_ar, rmse_persist)


def test_load_refuses_bad_arguments():
    with pytest.raises(ValueError, match="years"):
        datasets.cold_storage_load(years=0.001)
    with pytest.raises(TypeError, match="years"):
        datasets.cold_storage_load(years="2")


@pytest.mark.skipif(not hasattr(rnnkit, "prepare"), reason="rnnkit.prepare not available")
def test_missing_readings_meet_the_missing_policy():
    df = datasets.cold_storage_load(years=0.1)
    cfg = datasets.suggested_config("cold_storage_load")
    with pytest.raises(rnnkit.DataError):
        rnnkit.prepare(df, cfg.replace(missing="error"))
    rnnkit.prepare(df, cfg)  # missing="interpolate"


# ---------------------------------------------------------------- packaging line

def test_line_is_deterministic_per_seed():
    a = datasets.packaging_line_faults(n_cycles=10, seed=1)
    pd.testing.assert_frame_equal(a, datasets.packaging_line_faults(n_cycles=10, seed=1))
    b = datasets.packaging_line_faults(n_cycles=10, seed=2)
    assert len(a) != len(b) or not np.allclose(a["vibration_x"], b["vibration_x"])


def test_line_columns_and_dtypes(line):
    assert list(line.columns) == ["cycle", "step", "vibration_x", "vibration_y",
                                  "motor_current_a", "condition", "cycle_condition"]
    for col in ("cycle", "step"):
        assert line[col].dtype == np.int64
    for col in datasets.PACKAGING_CHANNELS:
        assert line[col].dtype == np.float64
        assert np.isfinite(line[col]).all()
    for col in ("condition", "cycle_condition"):
        assert pd.api.types.is_string_dtype(line[col])
    assert isinstance(line.index, pd.RangeIndex)


def test_line_cycles_are_whole_and_ordered(line):
    assert sorted(line["cycle"].unique()) == list(range(120))
    assert line["cycle"].is_monotonic_increasing
    for _, g in line.groupby("cycle"):
        assert 60 <= len(g) <= 100
        np.testing.assert_array_equal(g["step"].to_numpy(), np.arange(len(g)))
    lengths = line.groupby("cycle").size()
    assert lengths.nunique() > 10  # lengths vary


def test_line_labels(line):
    severity = {c: i for i, c in enumerate(datasets.CONDITIONS)}
    assert set(line["condition"]) == set(datasets.CONDITIONS)
    per_cycle = line.groupby("cycle")["cycle_condition"]
    assert (per_cycle.nunique() == 1).all()  # constant within a cycle
    assert set(per_cycle.first()) == set(datasets.CONDITIONS)
    mid_cycle_onsets = 0
    for _, g in line.groupby("cycle"):
        codes = g["condition"].map(severity).to_numpy()
        assert np.all(np.diff(codes) >= 0) and len(set(codes)) <= 2  # normal, then one fault
        assert g["cycle_condition"].iloc[0] == datasets.CONDITIONS[codes.max()]  # the worst
        mid_cycle_onsets += int(codes[0] == 0 and codes[-1] > 0)
    assert mid_cycle_onsets > 10  # faults that start mid-cycle, for per-step labels
    # Small frames still have every condition.
    small = datasets.packaging_line_faults(n_cycles=3, seed=5)
    assert set(small["cycle_condition"]) == set(datasets.CONDITIONS)


def _fault_part(line, condition):
    """Rows of cycles with this cycle label, after the fault onset (all rows if normal)."""
    rows = line[line["cycle_condition"] == condition]
    return rows if condition == "normal" else rows[rows["condition"] == condition]


def test_bearing_wear_adds_high_frequency_vibration(line):
    # Power spectral density by Welch's method (scipy.signal.welch, the reference).
    def high_band_power(rows):
        powers = []
        for _, g in rows.groupby("cycle"):
            if len(g) >= 32:
                f, p = welch(g["vibration_x"].to_numpy(), fs=1.0, nperseg=32)
                powers.append(p[f > 0.35].mean())
        return np.median(powers)
    assert high_band_power(_fault_part(line, "bearing_wear")) > 5 * high_band_power(
        _fault_part(line, "normal"))


def test_belt_slip_lowers_motor_current(line):
    def steady_current(rows):
        frac = rows["step"] / rows.groupby("cycle")["step"].transform("size")
        return rows.loc[(frac > 0.2) & (frac < 0.55), "motor_current_a"].mean()
    assert steady_current(_fault_part(line, "belt_slip")) < steady_current(
        _fault_part(line, "normal")) - 0.3


def test_line_refuses_bad_arguments():
    with pytest.raises(ValueError, match="n_cycles"):
        datasets.packaging_line_faults(n_cycles=2)
    with pytest.raises(ValueError, match="steps"):
        datasets.packaging_line_faults(steps=(100, 60))
    with pytest.raises(ValueError, match="steps"):
        datasets.packaging_line_faults(steps=(5, 8))


# ---------------------------------------------------------------- descriptions

@pytest.mark.parametrize("name", datasets.names())
def test_describe_and_suggested_config_fit_the_frame(name):
    text = datasets.describe(name)
    df = getattr(datasets, name)(**({"years": 0.05} if name == "cold_storage_load" else {"n_cycles": 4}))
    for col in df.columns:
        assert col in text
    configs = [datasets.suggested_config(name)]
    if name == "packaging_line_faults":
        configs.append(datasets.suggested_config(name, per_step=True))
    for cfg in configs:
        assert isinstance(cfg, rnnkit.Config)
        assert set(cfg.targets) <= set(df.columns)
        assert set(cfg.features or ()) <= set(df.columns)
        if cfg.group_column:
            assert cfg.group_column in df.columns


def test_describe_refuses_unknown_names():
    with pytest.raises(ValueError, match="name"):
        datasets.describe("weather")
    with pytest.raises(ValueError, match="name"):
        datasets.suggested_config("weather")
    with pytest.raises(ValueError, match="per_step"):
        datasets.suggested_config("cold_storage_load", per_step=True)
