"""prepare() on one long series: windows, split, scaling, season, missing values, errors."""
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.model_selection import train_test_split
from sklearn.preprocessing import MinMaxScaler, StandardScaler

import rnnkit
from rnnkit import Config, DataError, prepare
from tolerances import EXACT32, EXACT64, SCALER

SPLITS = ("train", "val", "test")


def hourly(n=300, seed=0, start="2024-01-01"):
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    return pd.DataFrame({"load": 10 + np.sin(2 * np.pi * t / 24) + 0.1 * rng.standard_normal(n),
                         "temp": 20 + rng.standard_normal(n),
                         "wind": rng.uniform(0, 5, n)},
                        index=pd.date_range(start, periods=n, freq="h"))


def window_rows(p, split):
    """(N, T + horizon) every row a window touches: its inputs and its targets."""
    s = p.starts[split]
    return s[:, None] + np.arange(p.window + p.horizon)[None, :]


# ---------- properties ----------

@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(n=st.integers(130, 260), window=st.integers(1, 12), horizon=st.integers(1, 4),
       gap=st.integers(0, 3), mode=st.sampled_from(["many-to-one", "many-to-many"]),
       scale=st.sampled_from(["standard", "minmax", "none"]), seed=st.integers(0, 10**6))
def test_targets_match_frame_at_their_time(n, window, horizon, gap, mode, scale, seed):
    df = hourly(n, seed)
    cfg = Config(target="load", window=window, horizon=horizon, gap=gap, mode=mode, scale=scale,
                 dtype="float64", season=None)
    p = prepare(df, cfg)
    for split in SPLITS:
        x, y, mask = p.windows(split)
        assert mask is None
        times = p.target_times(split)  # (N,) or (N, T)
        want = df["load"].loc[times.ravel()].to_numpy().reshape(times.shape)
        got = p.scaler.inverse_targets(y)[..., 0]
        np.testing.assert_allclose(got, want, **EXACT64)
        # every input row comes back to the frame's values after inverse scaling
        rows = p.starts[split][:, None] + np.arange(window)[None, :]  # (N, T)
        want_x = df[p.input_names].to_numpy()[p.rows[rows]]
        np.testing.assert_allclose(p.scaler.inverse_inputs(x), want_x, **EXACT64)
    # Targets of the parts never overlap in time: every target of a train window comes at least
    # `gap` rows before every val target. Val/test windows may take inputs from earlier rows
    # (their inputs reach back; on purpose since evaluation windows reach back, issue 13), but
    # a training window never reads a val or test row.
    for early, late in (("train", "val"), ("val", "test")):
        if len(p.starts[late]):
            first_late = p.target_rows(late).min()
            assert p.target_rows(early).max() + gap < first_late
            assert p.index[p.target_rows(early).max()] < p.index[first_late]
            if early == "train":
                assert window_rows(p, "train").max() < first_late - gap


@settings(max_examples=25, deadline=None)
@given(values=st.lists(st.floats(-1e6, 1e6).filter(lambda v: v == 0 or abs(v) > 1e-100),
                       min_size=40, max_size=120),
       scale=st.sampled_from(["standard", "minmax"]))
def test_inverse_scaling_returns_the_original_values(values, scale):
    # (values below 1e-150 alone are refused: their squared errors underflow, test_meaningful_numbers)
    df = pd.DataFrame({"y": values})
    p = prepare(df, Config(window=3, scale=scale, dtype="float64"))
    back = p.scaler.inverse_inputs(p.inputs)[:, 0]
    np.testing.assert_allclose(back, np.asarray(values)[p.rows], rtol=1e-9, atol=1e-6)


# ---------- memory: windows are views ----------

def test_windows_are_views_of_the_rows():
    p = prepare(hourly(400), Config(target="load", window=16))
    for split in SPLITS:
        x, y, _ = p.windows(split)
        assert x.shape == (len(p.starts[split]), 16, 3)
        assert np.shares_memory(x, p.inputs)  # a strided view, no (N, T, I) copy
        assert x.strides[1] == p.inputs.strides[0]
    p2 = prepare(hourly(400), Config(target="load", window=16, mode="many-to-many"))
    x, y, _ = p2.windows("train")
    assert np.shares_memory(y, p2.targets) and y.shape == (len(p2.starts["train"]), 16, 1)


# ---------- split and scaler against scikit-learn ----------

def test_chronological_split_matches_sklearn_unshuffled_split():
    # 200 rows at 0.7/0.15/0.15 are whole numbers of rows, where both rules agree exactly.
    df = hourly(200)
    p = prepare(df, Config(target="load", window=4, horizon=1))
    rows = np.arange(200)
    # scikit-learn's train_test_split with shuffle=False keeps time order (reference library)
    train, rest = train_test_split(rows, test_size=0.3, shuffle=False)
    val, test = train_test_split(rest, test_size=0.5, shuffle=False)
    for split, ref in zip(SPLITS, (train, val, test)):
        # training windows cover exactly the training rows; val and test windows reach back for
        # their inputs, so there their TARGETS cover exactly the part's rows
        used = np.unique(window_rows(p, split) if split == "train" else p.target_rows(split))
        np.testing.assert_array_equal(used, ref)
    assert p.counts["rows_train"] == len(train) and p.summary().query("item == 'val windows'")["count"].item() == 30  # every val row is a target


@pytest.mark.parametrize("scale, ref", [("standard", StandardScaler), ("minmax", MinMaxScaler)])
def test_scaler_matches_sklearn_on_training_rows(scale, ref):
    df = hourly(300, seed=3)
    p = prepare(df, Config(target="load", window=8, scale=scale, dtype="float64"))
    train_rows = np.arange(p.counts["rows_train"])
    cols = ["load", "temp", "wind"]
    sk = ref().fit(df[cols].to_numpy()[train_rows])  # scikit-learn (reference library), fit on train only
    np.testing.assert_allclose(p.inputs, sk.transform(df[cols].to_numpy()), **SCALER)
    np.testing.assert_allclose(p.scaler.inverse_targets(p.targets)[:, 0], df["load"].to_numpy(), **SCALER)
    if scale == "standard":
        np.testing.assert_allclose(p.scaler.input_mean, sk.mean_, **SCALER)
        np.testing.assert_allclose(p.scaler.input_scale, sk.scale_, **SCALER)
    else:
        np.testing.assert_allclose(p.inputs[train_rows].min(0), 0.0, atol=1e-12)
        np.testing.assert_allclose(p.inputs[train_rows].max(0), 1.0, **SCALER)


def test_constant_column_is_centred_not_divided_by_zero():
    df = hourly(120).assign(flat=3.0)
    p = prepare(df, Config(target="load", window=4, dtype="float64"))
    j = p.input_names.index("flat")
    assert p.scaler.input_scale[j] == 1.0 and np.all(p.inputs[:, j] == 0.0)
    # scikit-learn also maps zero variance to scale 1 (reference library)
    assert StandardScaler().fit(df[["flat"]].to_numpy()).scale_[0] == 1.0


def test_scale_none_and_float32():
    df = hourly(100)
    p = prepare(df, Config(target="load", window=4, scale="none"))
    assert p.inputs.dtype == np.float32 and p.targets.dtype == np.float32
    np.testing.assert_allclose(p.inputs[:, 0], df["load"].to_numpy(), **EXACT32)


# ---------- defaults, columns, shapes ----------

def test_defaults_resolve_target_features_season():
    df = hourly(120).assign(tag="x")
    p = prepare(df, Config(window=4))
    assert p.config.target == "load" and p.config.features == ("temp", "wind")  # tag is not numeric
    assert p.input_names == ["load", "temp", "wind"] and p.season == 24 and p.config.season == 24
    q = prepare(df.reset_index(names="ts"), Config(window=4, time_column="ts", target="wind"))
    assert q.input_names == ["wind", "load", "temp"]  # target first, the time column is never an input
    assert q.index.dtype.kind == "M" and q.season == 24
    r = prepare(df, Config(window=4, target="load", target_as_input=False))
    assert r.input_names == ["temp", "wind"] and r.n_outputs == 1


def test_several_targets():
    p = prepare(hourly(120), Config(target=("load", "temp"), window=4))
    assert p.targets.shape == (120, 2) and p.n_outputs == 2 and p.input_names[:2] == ["load", "temp"]
    x, y, _ = p.windows("val")
    assert y.shape == (len(p.starts["val"]), 2)


@pytest.mark.parametrize("freq, season", [("h", 24), ("D", 7), ("W", 52), ("MS", 12), ("ME", 12),
                                          ("QS", 4), ("min", 60), ("15min", None), ("YS", None)])
def test_season_auto_from_time_step(freq, season):
    # season lengths per step: common practice, no source
    df = pd.DataFrame({"y": np.arange(60.0)}, index=pd.date_range("2001-01-31", periods=60, freq=freq))
    assert prepare(df, Config(window=3)).season == season


def test_timezone_aware_index_is_kept_as_utc():
    df = hourly(100)
    df.index = df.index.tz_localize("Europe/Berlin")
    p = prepare(df, Config(target="load", window=3))
    assert p.season == 24 and p.index.dtype == "datetime64[ns]"
    np.testing.assert_array_equal(p.index, df.index.tz_convert("UTC").tz_localize(None).to_numpy())


def test_season_without_time_is_none_and_explicit_season_is_kept():
    df = pd.DataFrame({"y": np.arange(60.0)})
    assert prepare(df, Config(window=3)).season is None
    assert prepare(df, Config(window=3, season=5)).season == 5
    irregular = hourly(60).drop(hourly(60).index[[7, 30]])
    assert prepare(irregular, Config(window=3, season=24)).season == 24  # explicit: no regularity check


def test_classification_labels_sorted_and_decoded():
    rng = np.random.default_rng(1)
    lab = rng.choice(["high", "low", "mid"], 300)
    df = pd.DataFrame({"x": rng.standard_normal(300), "state": lab})
    p = prepare(df, Config(task="classification", window=5))
    assert p.config.target == "state" and list(p.classes) == ["high", "low", "mid"]
    assert p.targets.dtype == np.int32 and p.input_names == ["x"] and p.n_outputs == 3
    x, y, _ = p.windows("train")
    np.testing.assert_array_equal(p.decode(y), lab[p.target_rows("train")])
    ints = prepare(df.assign(state=pd.Series(lab).map({"high": 7, "low": 2, "mid": 4})),
                   Config(task="classification", target="state", window=5))
    assert list(ints.classes) == [2, 4, 7]


def test_gap_rows_are_dropped_and_counted():
    p = prepare(hourly(300), Config(target="load", window=6, horizon=2, gap=5))
    d = dict(zip(p.dropped["reason"], p.dropped["rows"]))
    assert d == {"`gap` rows before val": 5, "`gap` rows before test": 5}
    assert p.target_rows("val").min() == p.counts["rows_train"] + 5  # val targets start after the gap
    assert p.starts["val"][0] == p.counts["rows_train"] + 5 - 6  # ... their inputs reach back


# ---------- missing values ----------

def with_holes():
    df = hourly(200, seed=4)
    df.iloc[[0, 1, 50, 51, 52, 120], 0] = np.nan  # load: two leading holes, a run, a single
    df.iloc[[90], 1] = np.nan
    return df


def test_missing_ffill_matches_pandas_and_drops_leading_rows():
    df = with_holes()
    p = prepare(df, Config(target="load", window=4, missing="ffill", dtype="float64"))
    assert dict(zip(p.dropped["reason"], p.dropped["rows"])) == {
        "leading missing values that could not be filled": 2}
    ref = df.ffill().iloc[2:]  # pandas' own forward fill (reference library)
    np.testing.assert_allclose(p.scaler.inverse_inputs(p.inputs), ref[p.input_names].to_numpy(), **EXACT64)
    assert p.index[0] == df.index[2]


def test_missing_interpolate_matches_pandas_time_interpolation():
    df = with_holes()
    p = prepare(df, Config(target="load", window=4, missing="interpolate", dtype="float64"))
    ref = df.interpolate(method="time").iloc[2:]  # pandas (reference library)
    np.testing.assert_allclose(p.scaler.inverse_inputs(p.inputs), ref[p.input_names].to_numpy(), **EXACT64)


# ---------- bad input: one test each, error class and what the message names ----------

def frame_untouched(df, cfg, match):
    before = df.copy(deep=True)
    with pytest.raises(DataError, match=match) as err:
        prepare(df, cfg)
    pd.testing.assert_frame_equal(df, before)
    assert isinstance(err.value, ValueError)
    return str(err.value)


def test_empty_frame():
    frame_untouched(pd.DataFrame({"y": []}, dtype=float), Config(), "empty")


def test_missing_target_lists_columns():
    msg = frame_untouched(hourly(50), Config(target="price"), "'price'")
    assert "'load'" in msg and "'temp'" in msg


def test_missing_feature():
    frame_untouched(hourly(50), Config(target="load", features=("humidity",)), "'humidity'")


def test_non_numeric_target_for_regression():
    msg = frame_untouched(hourly(50).assign(load="n/a"), Config(target="load"), "'load'")
    assert "'n/a'" in msg and "classification" in msg


def test_non_numeric_feature():
    df = hourly(50).assign(site=["a"] * 50)
    frame_untouched(df, Config(target="load", features=("temp", "site")), "'site'.*'a'")


def test_numbers_stored_as_text():
    df = hourly(50).assign(load=lambda d: d["load"].round(2).astype(str))
    frame_untouched(df, Config(target="load"), "'load'.*stored as text.*to_numeric")


def test_column_without_any_value():
    frame_untouched(hourly(50).assign(temp=np.nan), Config(target="load", missing="ffill"), "'temp'.*no value")


def test_nan_under_error_policy_counts_and_locates():
    df = hourly(50)
    df.iloc[[10, 20, 30], 1] = np.nan
    msg = frame_untouched(df, Config(target="load"), "'temp'")
    assert "3 missing" in msg and "2024-01-01 10:00" in msg and "ffill" in msg


def test_inf_is_refused():
    df = hourly(50)
    df.iloc[7, 2] = np.inf
    frame_untouched(df, Config(target="load", missing="ffill"), "'wind'.*infinite")


def test_nat_in_time_column():
    df = hourly(50).reset_index(names="ts")
    df.loc[5, "ts"] = pd.NaT
    frame_untouched(df, Config(target="load", time_column="ts"), "'ts'.*missing")


def test_unsorted_time_index():
    df = hourly(50)
    df = df.iloc[[1, 0] + list(range(2, 50))]
    frame_untouched(df, Config(target="load"), "not sorted.*sort_index")


def test_unsorted_time_column():
    df = hourly(50).reset_index(names="ts").iloc[::-1]
    frame_untouched(df, Config(target="load", time_column="ts"), "'ts' is not sorted")


def test_duplicated_timestamps():
    df = hourly(50)
    df.index = df.index.where(np.arange(50) != 9, df.index[8])
    frame_untouched(df, Config(target="load"), "duplicated.*2024-01-01 08:00")


def test_irregular_spacing_with_season_auto():
    df = hourly(60)
    df = df.drop(df.index[17])
    msg = frame_untouched(df, Config(target="load"), "irregular")
    assert "2024-01-01 18:00" in msg and "`season`" in msg and "None" in msg


def test_too_few_rows_states_the_minimum():
    msg = frame_untouched(hourly(30), Config(target="load", window=24, horizon=1), "too few rows")
    # train needs two windows, 26 rows at 70 %: at least 26 / 0.7 rows, rounding decides the rest
    # (val and test windows reach back for their inputs: one target row each is enough)
    minimum = int(msg.split("the minimum is ")[1].split()[0])
    prepare(hourly(minimum), Config(target="load", window=24, horizon=1))
    with pytest.raises(DataError):
        prepare(hourly(minimum - 1), Config(target="load", window=24, horizon=1))


def test_single_class():
    df = pd.DataFrame({"x": np.arange(100.0), "state": ["on"] * 100})
    frame_untouched(df, Config(task="classification", target="state", window=3), "single class.*'on'")


def test_unseen_label_in_test():
    df = pd.DataFrame({"x": np.arange(100.0), "state": ["on", "off"] * 45 + ["broken"] * 10})
    frame_untouched(df, Config(task="classification", target="state", window=3), "'broken'.*test")


def test_columns_must_be_strings():
    df = pd.DataFrame(np.random.default_rng(0).standard_normal((50, 2)))
    frame_untouched(df, Config(), "column 0 .*astype\\(str\\)")


def test_not_a_frame_and_not_a_config():
    with pytest.raises(TypeError, match="`df`"):
        prepare(np.zeros((10, 2)), Config())
    with pytest.raises(TypeError, match="`config`"):
        prepare(hourly(50), {"window": 3})


# ---------- the caller's frame is never modified ----------

@pytest.mark.parametrize("cfg", [Config(target="load", missing="ffill", window=4),
                                 Config(target="load", missing="interpolate", window=4, scale="minmax"),
                                 Config(target="load", window=4, mode="many-to-many", gap=2, missing="ffill")])
def test_good_input_leaves_frame_untouched(cfg):
    df = with_holes()
    before = df.copy(deep=True)
    p = prepare(df, cfg)
    pd.testing.assert_frame_equal(df, before)
    assert not p.inputs.flags.writeable


def test_public_names():
    assert rnnkit.prepare is prepare and rnnkit.Prepared is type(prepare(hourly(60), Config(window=3)))
