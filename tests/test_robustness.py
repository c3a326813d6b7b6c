"""Odd but valid data trains and predicts; bad data is refused by name, the caller's frame untouched.

Every fit here is tiny (epochs 1-2, hidden 3) and most share one shape
(96 rows, two numeric columns, window 4), so they share one compiled training
program. The frames are invented: these are tests of input handling, not of
what the network learns. Where a number is checked, the outside reference is
named beside the check.
"""
import copy
import os

import numpy as np
import pandas as pd
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.metrics import accuracy_score, mean_absolute_error

import rnnkit
from rnnkit import Config, DataError, fit, load_fit, prepare
from tolerances import METRIC, TORCH64

N = 96
FAST = dict(window=4, hidden=3, batch_size=16, epochs=1, season=None)


def series(n=N, seed=0):
    """A noisy sine `y` and a noise feature `x`, RangeIndex (invented)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    return pd.DataFrame({"y": np.sin(t / 3.0) + 0.1 * rng.standard_normal(n),
                         "x": rng.standard_normal(n)})


def labelled(n=N, seed=0):
    """A feature `a` and a label `lab` that follows its sign (invented)."""
    rng = np.random.default_rng(seed)
    a = rng.standard_normal(n)
    return pd.DataFrame({"a": a, "b": rng.standard_normal(n), "lab": np.where(a > 0, "up", "down")})


def fit_untouched(df, **kw):
    """fit() + predict(); the caller's frame must come out exactly as it went in."""
    before = copy.deepcopy(df)
    r = fit(df, Config(**{**FAST, **kw}), progress=False)
    pred = r.predict()
    pd.testing.assert_frame_equal(df, before)
    return r, pred


def refused(call, df, exc, *needles):
    """call(df) raises `exc` whose message holds every needle; df is left unchanged."""
    before = copy.deepcopy(df)
    with pytest.raises(exc) as info:
        call(df)
    msg = str(info.value)
    for needle in needles:
        assert needle in msg, f"{needle!r} not in message: {msg}"
    pd.testing.assert_frame_equal(df, before)
    return msg


# ---------------------------------------------------------------- odd but valid frames

def _tz(df):
    return df.set_index(pd.date_range("2024-03-30", periods=len(df), freq="h", tz="Europe/Berlin"))


ODD_FRAMES = {
    # index kinds: none of them is time, except the tz-aware and period ones
    "range index offset": lambda d: d.set_index(pd.RangeIndex(1000, 1000 + len(d), name="step")),
    "unsorted integer index": lambda d: d.set_index(pd.Index(np.arange(len(d))[::-1] * 7)),
    "string index": lambda d: d.set_index(pd.Index([f"r{i}" for i in range(len(d))])),
    "tz-aware index across DST": _tz,  # Europe/Berlin springs forward on 2024-03-31
    "period index": lambda d: d.set_index(pd.period_range("1990-01", periods=len(d), freq="M")),
    "time column as ISO text": lambda d: d.assign(ts=pd.date_range("2024-01-01", periods=len(d),
                                                                   freq="D").strftime("%Y-%m-%d")),
    "time column as text with DST offsets": lambda d: d.assign(  # +01:00 then +02:00
        ts=pd.date_range("2024-03-30", periods=len(d), freq="h", tz="Europe/Berlin").astype(str)),
    "numeric time column": lambda d: d.assign(ts=np.arange(len(d)) * 0.25),
    "irregular time steps": lambda d: d.set_index(pd.DatetimeIndex(
        pd.Timestamp("2024-01-01") + pd.to_timedelta(np.cumsum(np.arange(len(d)) % 3 + 1), "h"))),
    # column kinds
    "bool feature": lambda d: d.assign(x=d["x"] > 0),
    "int feature": lambda d: d.assign(x=np.arange(len(d)) % 5),
    "nullable Float64 columns": lambda d: d.astype("Float64"),
    "float32 columns": lambda d: d.astype("float32"),
    "unused text column is ignored": lambda d: d.assign(note=["n"] * len(d)),
    "unused all-NaN column is ignored": lambda d: d.assign(empty=np.nan),
}


@pytest.mark.parametrize("name", list(ODD_FRAMES))
def test_odd_but_valid_frames_train_and_predict_on_their_own_index(name):
    df = ODD_FRAMES[name](series())
    kw = dict(target="y")
    if "ts" in df.columns:
        kw["time_column"] = "ts"
    if "unused" in name:
        kw["features"] = ["x"]
    r, pred = fit_untouched(df, **kw)
    assert r.status == "ok"
    assert len(pred) == len(df)
    # The prediction frame sits on the caller's own labels: the time column (text read as
    # times), or the index as it was given (a zone-aware index keeps its zone); a period
    # is shown by its start.
    want = pd.Index(df["ts"]) if "ts" in df.columns else df.index
    if "ts" in df.columns and df["ts"].dtype != np.float64:  # text read as times (offsets: UTC)
        want = pd.DatetimeIndex(pd.to_datetime(df["ts"], utc="DST" in name))
        want = want.tz_localize(None) if want.tz is not None else want
    if isinstance(want, pd.PeriodIndex):
        want = want.to_timestamp()
    pd.testing.assert_index_equal(pred.index, want.rename(pred.index.name), exact=False)
    held = pred["split"].isin(["val", "test"])
    assert np.isfinite(pred.loc[held.to_numpy(), "predicted"].to_numpy(np.float64)).all()
    # The table's test MAE is the MAE of the test rows of predict()
    # (scikit-learn's mean_absolute_error as the reference).
    test = pred[pred["split"].to_numpy() == "test"]
    np.testing.assert_allclose(r.metrics.loc["rnn", "test_mae"],
                               mean_absolute_error(test["actual"].astype(np.float64),
                                                   test["predicted"]), **METRIC)


def test_zone_aware_times_come_back_in_their_zone(tmp_path):
    import matplotlib.pyplot as plt

    df = _tz(series())
    df["when"] = df.index.tz_convert("America/New_York")  # the same instants, another zone
    for time_column, zone in ((None, "Europe/Berlin"), ("when", "America/New_York")):
        frame = df if time_column is None else df.reset_index(drop=True)
        r, pred = fit_untouched(frame, target="y", time_column=time_column, features=["x"])
        want = pd.DatetimeIndex(frame[time_column] if time_column else frame.index)
        np.testing.assert_array_equal(pred.index.asi8, want.asi8)
        assert str(pred.index.tz) == zone
        new = r.predict(frame.iloc[20:60])
        assert str(new.index.tz) == zone and len(new) == 40
        folder = tmp_path / zone.replace("/", "_")
        r.save(folder)
        pd.testing.assert_frame_equal(load_fit(folder, df=frame).predict(), pred)
        for fig in r.figures().values():  # the forecast figure draws zone-aware times
            plt.close(fig)


def test_index_kind_does_not_change_the_numbers():
    base = series()
    a = fit(base, Config(**FAST, target="y"), progress=False)
    b = fit(_tz(base), Config(**FAST, target="y"), progress=False)
    np.testing.assert_array_equal(a.params["W"], b.params["W"])
    pd.testing.assert_frame_equal(a.metrics, b.metrics)


ODD_CONFIGS = {
    "window 1, batch of one, hidden 1": dict(window=1, batch_size=1, hidden=1),
    "many-to-many, two targets, horizon 2": dict(target=["y", "x"], mode="many-to-many", horizon=2),
    "float64": dict(dtype="float64"),
    "sgd, no clip, no patience": dict(optimizer="sgd", clip=None, patience=None, epochs=2),
    "momentum": dict(optimizer="momentum"),
    "rmsprop": dict(optimizer="rmsprop"),
    "adamw": dict(optimizer="adamw", weight_decay=0.01),
    "relu, identity init": dict(activation="relu", init="identity"),
    "sigmoid, glorot": dict(activation="sigmoid", init="glorot"),
    "linear, minmax": dict(activation="linear", scale="minmax"),
    "no scaling, gap, no test part": dict(scale="none", gap=2, split=(0.8, 0.2, 0.0)),
}


@pytest.mark.parametrize("name", list(ODD_CONFIGS))
def test_unusual_configs_train_and_predict(name):
    kw = {"target": "y", **ODD_CONFIGS[name]}
    r, pred = fit_untouched(series(), **kw)
    assert r.status == "ok"
    assert np.isfinite(r.history[["train_loss", "val_loss"]].to_numpy()).all()
    cols = ["predicted"] if isinstance(kw["target"], str) else [f"{t}_predicted" for t in kw["target"]]
    assert pred[cols].notna().any().all()
    assert r.params["U"].dtype == np.dtype(kw.get("dtype", "float32"))
    new = r.predict(series(40, seed=9))
    assert len(new) == 40 and set(new["split"].dropna()) == {"new"}


LABELS = {
    "text": lambda lab: lab,
    "categorical with an unused category": lambda lab: pd.Categorical(lab, ["down", "up", "flat"]),
    "pandas string dtype": lambda lab: pd.array(lab, dtype="string"),
    "integers": lambda lab: (lab == "up").astype(np.int64),
    "booleans": lambda lab: lab == "up",
    "floats holding whole numbers": lambda lab: (lab == "up").astype(np.float64),
    "mixed int and text": lambda lab: np.array([1 if v == "up" else "down" for v in lab], dtype=object),
}


@pytest.mark.parametrize("kind", list(LABELS))
def test_label_kinds_classify_and_predict_the_same_labels(kind):
    df = labelled()
    df["lab"] = LABELS[kind](df["lab"].to_numpy())
    r, pred = fit_untouched(df, target="lab", features=["a", "b"], task="classification", horizon=0)
    got = pred["predicted"].dropna()
    # predicted labels are values of the label column itself (same type, not their text)
    originals = set(df["lab"].tolist())
    assert set(got.tolist()) <= originals
    assert {type(v) for v in got} <= {type(v) for v in originals}
    # accuracy in the table = accuracy of predict()'s test rows (scikit-learn as reference)
    test = pred[pred["split"].to_numpy() == "test"]
    assert r.metrics.loc["rnn", "test_accuracy"] == pytest.approx(
        accuracy_score(test["actual"].astype(str), test["predicted"].astype(str)), abs=1e-12)


def test_default_label_is_not_a_date_column():
    # A frame whose first column holds timestamps (not set as `time_column`): the default
    # label is the first column of labels, never the dates.
    df = labelled()
    df.insert(0, "logged_at", pd.date_range("2024-01-01", periods=N, freq="min"))
    p = prepare(df, Config(**FAST, task="classification", horizon=0, features=["a", "b"]))
    assert p.config.target == "lab" and sorted(p.classes.tolist()) == ["down", "up"]


def test_classification_many_to_many_and_a_later_horizon():
    r, pred = fit_untouched(labelled(), target="lab", features=["a"], task="classification",
                            mode="many-to-many", horizon=0)
    assert set(r.confusion) == {"val", "test"}
    r, pred = fit_untouched(labelled(), target="lab", task="classification", horizon=2)
    assert pred["predicted"].notna().sum() > 0


def _groups(lengths, seed=0):
    rng = np.random.default_rng(seed)
    ids = np.repeat([f"g{i:03d}" for i in range(len(lengths))], lengths)
    return pd.DataFrame({"seq": ids, "v": rng.standard_normal(len(ids)), "w": rng.standard_normal(len(ids))})


def test_many_sequences_of_unequal_length_and_a_split_column():
    lengths = np.random.default_rng(1).integers(5, 12, size=60)
    df = _groups(lengths)
    r, pred = fit_untouched(df, target="v", group_column="seq", window=3)
    assert len(pred) == len(df) and (pred["seq"].to_numpy() == df["seq"].to_numpy()).all()
    assert set(pred["split"].dropna()) == {"train", "val", "test"}
    parts = np.where(np.arange(60) < 40, "train", np.where(np.arange(60) < 50, "val", "test"))
    df["part"] = pd.Categorical(np.repeat(parts, lengths))
    r, pred = fit_untouched(df, target="v", group_column="seq", split_column="part", window=3)
    got = pred.groupby("seq", sort=False)["split"].agg(lambda s: set(s.dropna()))
    assert all(len(s) <= 1 for s in got)  # a sequence's predictions come from one part


@pytest.mark.parametrize("name", ["split", "actual", "predicted"])
def test_a_sequence_column_named_like_an_output_column_keeps_its_ids(name):
    df = _groups([12] * 8).rename(columns={"seq": name})
    r, pred = fit_untouched(df, target="v", group_column=name, window=3)
    assert {"actual", "predicted", "split"} <= set(pred.columns)
    assert set(pred["split"].dropna()) == {"train", "val", "test"}
    np.testing.assert_allclose(pred["actual"].to_numpy(np.float64), df["v"].to_numpy())
    ids = pred[name if name not in ("actual", "predicted", "split") else "sequence"]
    assert (ids.to_numpy() == df[name].to_numpy()).all()


def test_whole_sequence_classification_on_the_demo_and_a_new_frame():
    df = rnnkit.datasets.packaging_line_faults(n_cycles=24, steps=(10, 14), seed=0)
    cfg = rnnkit.datasets.suggested_config("packaging_line_faults").replace(epochs=1, hidden=3)
    before = copy.deepcopy(df)
    r = fit(df, cfg, progress=False)
    pd.testing.assert_frame_equal(df, before)
    new = rnnkit.datasets.packaging_line_faults(n_cycles=3, steps=(20, 30), seed=5)  # longer cycles
    pred = r.predict(new)
    assert list(pred.index) == list(new["cycle"].unique()) and pred["predicted"].notna().all()


# ---------------------------------------------------------------- bad frames

def _bad(df, col, value, rows=(5,)):
    df = df.copy()
    df[col] = df[col].astype(object) if not isinstance(value, float) else df[col]
    for i in rows:
        df.loc[i, col] = value
    return df


BAD_FRAMES = [
    # (name, frame builder, config, exception, words the message must hold)
    ("empty frame", lambda: series().iloc[:0], dict(target="y"), DataError, ["empty"]),
    ("no columns", lambda: pd.DataFrame(index=range(5)), dict(), DataError, ["empty"]),
    ("missing target column", series, dict(target="load"), DataError, ["'load'", "`target`", "'y'"]),
    ("missing feature column", series, dict(target="y", features=["temp"]), DataError,
     ["'temp'", "`features`"]),
    ("text target for regression", lambda: series().assign(y=lambda d: d.y.map("{:.2f}kW".format)),
     dict(target="y"), DataError, ["'y'", "classification"]),
    ("numbers stored as text", lambda: series().assign(x=lambda d: d.x.astype(str)),
     dict(target="y", features=["x"]), DataError, ["'x'", "pd.to_numeric"]),
    ("object column holding numbers", lambda: series().assign(x=lambda d: d.x.astype(object)),
     dict(target="y", features=["x"]), DataError, ["'x'", "pd.to_numeric"]),
    ("NaN under missing='error'", lambda: _bad(series(), "y", np.nan), dict(target="y"), DataError,
     ["'y'", "row 5", "`missing`"]),
    ("inf in a feature", lambda: _bad(series(), "x", np.inf), dict(target="y"), DataError,
     ["'x'", "infinite", "row 5"]),
    ("-inf in the target", lambda: _bad(series(), "y", -np.inf), dict(target="y"), DataError,
     ["'y'", "infinite"]),
    ("all-NaN feature", lambda: series().assign(x=np.nan), dict(target="y"), DataError,
     ["'x'", "no value"]),
    ("NaT in the time column", lambda: series().assign(
        ts=pd.date_range("2024-01-01", periods=N, freq="h").where(np.arange(N) != 7)),
     dict(target="y", time_column="ts"), DataError, ["'ts'", "NaT", "row 7"]),
    ("unsorted time index", lambda: series().set_index(pd.date_range("2024", periods=N, freq="h")[::-1]),
     dict(target="y"), DataError, ["not sorted", "sort_index"]),
    ("duplicated timestamps", lambda: series().set_index(
        pd.DatetimeIndex(np.repeat(pd.date_range("2024", periods=N // 2, freq="D"), 2))),
     dict(target="y"), DataError, ["duplicated", "drop_duplicates"]),
    ("irregular steps with season 'auto'", lambda: ODD_FRAMES["irregular time steps"](series()),
     dict(target="y", season="auto"), DataError, ["irregular", "`season`"]),
    ("time column of booleans", lambda: series().assign(ts=np.arange(N) % 2 == 0),
     dict(target="y", time_column="ts"), DataError, ["'ts'", "pd.to_datetime"]),
    ("time column of words", lambda: series().assign(ts="soon"), dict(target="y", time_column="ts"),
     DataError, ["'ts'", "pd.to_datetime"]),
    # 12 rows are enough since val/test windows reach back for their inputs (issue 13); 6 are not
    ("too few rows", lambda: series(6), dict(target="y"), DataError, ["too few rows", "minimum"]),
    ("window longer than the series", series, dict(target="y", window=90), DataError, ["`window`"]),
    ("integer column names", lambda: pd.DataFrame(np.zeros((N, 2))), dict(), DataError,
     ["strings", "astype(str)"]),
    ("MultiIndex columns", lambda: pd.DataFrame(np.zeros((N, 2)), columns=pd.MultiIndex.from_tuples(
        [("a", "1"), ("a", "2")])), dict(), DataError, ["MultiIndex"]),
    ("duplicated column names", lambda: pd.DataFrame(np.zeros((N, 2)), columns=["y", "y"]),
     dict(target="y"), DataError, ["'y'", "more than once"]),
    ("single class", lambda: labelled().assign(lab="up"), dict(target="lab", task="classification",
                                                                horizon=0), DataError,
     ["'lab'", "single class", "two"]),
    ("label unseen in training", lambda: labelled().assign(
        lab=lambda d: np.where(np.arange(N) > 85, "sideways", d.lab)),
     dict(target="lab", task="classification", horizon=0), DataError, ["'sideways'", "'lab'", "training"]),
    ("missing label", lambda: _bad(labelled(), "lab", None), dict(target="lab", task="classification",
                                                                  horizon=0), DataError,
     ["'lab'", "missing", "`missing`"]),
    ("group id missing", lambda: _bad(_groups([8] * 10), "seq", None),
     dict(target="v", group_column="seq"), DataError, ["'seq'", "row 5"]),
    ("group column absent", lambda: _groups([8] * 10), dict(target="v", group_column="cycle"),
     DataError, ["'cycle'", "`group_column`"]),
    ("duplicated time within a sequence", lambda: _groups([8] * 10).assign(
        t=np.tile(np.r_[0, 0, np.arange(2, 8)], 10)), dict(target="v", group_column="seq", time_column="t"),
     DataError, ["duplicated", "'g000'"]),
    ("short sequence", lambda: _groups([8] * 9 + [3]), dict(target="v", group_column="seq"), DataError,
     ["'g009'", "short_sequences"]),
    ("too few sequences", lambda: _groups([30, 30]), dict(target="v", group_column="seq"), DataError,
     ["2 sequence", "split_column"]),
    ("unknown split label", lambda: _bad(series().assign(part="train"), "part", "TRAIN"),
     dict(target="y", split_column="part"), DataError, ["'part'", "'TRAIN'", "'val'"]),
    ("split label missing", lambda: _bad(series().assign(part="train"), "part", None),
     dict(target="y", split_column="part"), DataError, ["'part'", "'train'"]),
    ("sequence in two parts", lambda: _groups([8] * 10).assign(part=np.r_[["train"] * 60, ["val"] * 20]),
     dict(target="v", group_column="seq", split_column="part"), DataError, ["'g007'", "one part"]),
    ("complex feature", lambda: series().assign(x=lambda d: d.x + 1j), dict(target="y", features=["x"]),
     DataError, ["'x'", "complex"]),
    ("datetime feature", lambda: series().assign(x=pd.date_range("2024", periods=N, freq="D")),
     dict(target="y", features=["x"]), DataError, ["'x'", "datetime"]),
]


@pytest.mark.parametrize("name,make,cfg,exc,needles", BAD_FRAMES, ids=[b[0] for b in BAD_FRAMES])
def test_bad_frames_are_refused_by_name_and_left_untouched(name, make, cfg, exc, needles):
    df = make()
    config = Config(**{**FAST, **cfg})
    msg = refused(lambda d: prepare(d, config), df, exc, *needles)
    if "stored as text" in msg:  # never a false diagnosis
        assert "dtype str" in msg or "dtype object" in msg


def test_rows_are_named_by_their_plain_label():
    # rows regrouped by sequence: the message shows the caller's label 45, not np.int64(45)
    df = _groups([20] * 6).assign(t=np.tile(np.arange(20.0), 6)).sample(frac=1.0, random_state=0)
    msg = refused(lambda d: prepare(d, Config(**FAST, target="v", group_column="seq", time_column="t")),
                  df, DataError, "not sorted", "sort_values")
    assert "np." not in msg, msg


def test_fit_refuses_like_prepare_and_leaves_the_frame_alone():
    df = _bad(series(), "x", np.inf)
    refused(lambda d: fit(d, Config(**FAST, target="y"), progress=False), df, DataError, "'x'", "infinite")


@pytest.mark.parametrize("bad,exc,needles", [
    (series()["y"], TypeError, ["`df`", "to_frame"]),
    (series().to_numpy(), TypeError, ["`df`", "pd.DataFrame"]),
    ({"y": [1.0, 2.0]}, TypeError, ["`df`"]),
])
def test_not_a_frame(bad, exc, needles):
    with pytest.raises(exc) as info:
        prepare(bad, Config(**FAST))
    assert all(n in str(info.value) for n in needles)


def test_config_must_be_a_config():
    with pytest.raises(TypeError, match="`config`"):
        fit(series(), "config.json", progress=False)
    with pytest.raises(ValueError, match="windw"):
        fit(series(), {"windw": 3}, progress=False)


# ---------------------------------------------------------------- Config fields

def test_numpy_scalars_are_accepted_as_config_values():
    # Values read from a sweep table or np.arange are numpy scalars; 5 is 5.
    cfg = Config(window=np.int64(5), hidden=np.int32(8), epochs=np.int64(2), batch_size=np.int64(16),
                 horizon=np.int64(1), seed=np.int64(3), lr=np.float32(0.01), clip=np.float64(1.0),
                 patience=np.int64(2), season=np.int64(12), target_as_input=np.bool_(True),
                 split=np.array([0.6, 0.2, 0.2]))
    assert cfg == Config(window=5, hidden=8, epochs=2, batch_size=16, horizon=1, seed=3,
                         lr=float(np.float32(0.01)), clip=1.0, patience=2, season=12, split=(0.6, 0.2, 0.2))
    assert type(cfg.window) is int and type(cfg.lr) is float and type(cfg.target_as_input) is bool
    assert Config.from_dict(cfg.to_dict()) == cfg
    for field, value in (("window", np.float64(5.5)), ("hidden", np.bool_(True)), ("lr", np.float64(-1))):
        with pytest.raises(ValueError, match=f"`{field}`"):
            Config(**{field: value})


@pytest.mark.parametrize("kw,field", [
    (dict(window=0), "window"), (dict(window="all"), "window"), (dict(horizon=-1), "horizon"),
    (dict(hidden=0), "hidden"), (dict(lr=0.0), "lr"), (dict(clip=-1.0), "clip"), (dict(patience=0), "patience"),
    (dict(split=(0.5, 0.5)), "split"), (dict(split=(0.9, 0.0, 0.1)), "split"), (dict(optimizer="adam2"), "optimizer"),
    (dict(activation="softplus"), "activation"), (dict(dtype="float16"), "dtype"), (dict(horizon=0), "horizon"),
    (dict(window="full"), "window"), (dict(task="classification", target=["a", "b"]), "target"),
    (dict(target="a", features=["a"]), "features"), (dict(target="a", time_column="a"), "time_column"),
])
def test_bad_config_fields_are_named(kw, field):
    with pytest.raises((ValueError, TypeError)) as info:
        Config(**kw)
    assert f"`{field}`" in str(info.value)


# ---------------------------------------------------------------- predict on a new frame

@pytest.fixture(scope="module")
def fitted():
    return fit(series(), Config(**FAST, target="y"), progress=False)


def test_predict_on_a_new_frame_with_reordered_and_extra_columns(fitted):
    new = series(40, seed=4)
    a = fitted.predict(new)
    b = fitted.predict(new[["x", "y"]].assign(note="n", extra=1.0))
    pd.testing.assert_frame_equal(a, b)
    # the target is not needed to predict when it is no input: its actual values are NaN
    two = dict(z=lambda d: d["x"].shift(1, fill_value=0.0))  # two features: the shapes of `fitted`
    r = fit(series().assign(**two), Config(**FAST, target="y", features=["x", "z"], target_as_input=False),
            progress=False)
    out = r.predict(new.assign(**two).drop(columns="y"))
    assert out["actual"].isna().all() and out["predicted"].notna().sum() == 40 - 4 - 1 + 1


@pytest.mark.parametrize("make,exc,needles", [
    (lambda d: d.assign(x="high"), DataError, ["'x'", "not numeric"]),
    (lambda d: d.assign(x=d.x.astype(str)), DataError, ["'x'", "pd.to_numeric"]),
    (lambda d: d.drop(columns="x"), DataError, ["'x'", "not in the frame"]),
    (lambda d: d.iloc[:4], DataError, ["window + horizon = 5", "longer frame"]),
    (lambda d: d.iloc[:0], DataError, ["empty"]),
    (lambda d: _bad(d, "x", np.nan), DataError, ["'x'", "row 5", "`missing`"]),
    (lambda d: _bad(d, "x", np.inf), DataError, ["'x'", "infinite"]),
    (lambda d: d.set_index(pd.date_range("2024", periods=len(d), freq="h")[::-1]), DataError, ["sort"]),
    (lambda d: d.to_numpy(), TypeError, ["`df`"]),
])
def test_predict_refuses_bad_new_frames_by_name(fitted, make, exc, needles):
    new = make(series(40, seed=4))
    if isinstance(new, pd.DataFrame):
        refused(fitted.predict, new, exc, *needles)
    else:
        with pytest.raises(exc):
            fitted.predict(new)


def test_predict_on_the_training_frame_equals_predict_on_it_again(fitted):
    # The same rows through the saved scaler give the same numbers. predict() keeps windows
    # inside their part, predict(df) takes every window, so compare where both predict.
    again = fitted.predict(series())
    first = fitted.predict()
    both = first["predicted"].notna() & again["predicted"].notna()
    assert both.sum() >= N - 3 * (FAST["window"] + 1)
    np.testing.assert_array_equal(again.loc[both, "predicted"], first.loc[both, "predicted"])


# ---------------------------------------------------------------- public model functions, odd shapes

def _torch_reference(params, xs, activation):
    """Hidden states and outputs of torch.nn.RNN + nn.Linear with our weights (float64)."""
    U, V, b, W, c = (np.array(params[k], np.float64) for k in ("U", "V", "b", "W", "c"))  # writable
    rnn = torch.nn.RNN(U.shape[0], U.shape[1], nonlinearity=activation, batch_first=True,
                       dtype=torch.float64)
    lin = torch.nn.Linear(W.shape[0], W.shape[1], dtype=torch.float64)
    with torch.no_grad():
        rnn.weight_ih_l0.copy_(torch.from_numpy(U.T))  # torch multiplies W_ih x: U = W_ih^T
        rnn.weight_hh_l0.copy_(torch.from_numpy(V.T))
        rnn.bias_ih_l0.copy_(torch.from_numpy(b))
        rnn.bias_hh_l0.zero_()
        lin.weight.copy_(torch.from_numpy(W.T))
        lin.bias.copy_(torch.from_numpy(c))
        x = torch.from_numpy(np.asarray(xs, np.float64))
        h, _ = rnn(x if x.ndim == 3 else x[None])
        o = lin(h)
    h, o = h.numpy(), o.numpy()
    return (h, o) if np.ndim(xs) == 3 else (h[0], o[0])


SHAPES = [(1, 1, 1, 1, None, "tanh"), (1, 3, 2, 2, None, "relu"), (7, 3, 4, 2, None, "tanh"),
          (1, 1, 1, 1, 1, "relu"), (1, 2, 3, 1, 1, "tanh"), (5, 1, 2, 3, 1, "relu"),
          (4, 3, 2, 2, 3, "tanh")]  # (T, I, H, O, B or None for unbatched, activation)


@pytest.mark.parametrize("T,I,H,O,B,activation", SHAPES)
def test_model_functions_match_torch_at_odd_shapes(T, I, H, O, B, activation):
    params = rnnkit.init_params(jax_key(T * 100 + I * 10 + H), I, H, O, scheme="orthogonal",
                                dtype="float64")
    rng = np.random.default_rng(T + I + H + O)
    lead = () if B is None else (B,)
    xs = rng.standard_normal(lead + (T, I))
    h_ref, o_ref = _torch_reference(params, xs, activation)  # torch.nn.RNN as the reference
    h = np.asarray(rnnkit.hidden_states(params, xs, activation=activation))
    o = np.asarray(rnnkit.outputs(params, xs, activation=activation))
    assert h.shape == lead + (T, H) and o.shape == lead + (T, O)
    np.testing.assert_allclose(h, h_ref, **TORCH64)
    np.testing.assert_allclose(o, o_ref, **TORCH64)
    # losses against torch's mse_loss / cross_entropy (mean over terms and outputs)
    y_m2m = rng.standard_normal(lead + (T, O))
    got = float(rnnkit.loss(params, xs, y_m2m, activation=activation, task="regression", mode="many-to-many"))
    want = torch.nn.functional.mse_loss(torch.from_numpy(o_ref), torch.from_numpy(y_m2m)).item()
    assert got == pytest.approx(want, rel=1e-9)
    y_m2o = rng.standard_normal(lead + (O,))
    got = float(rnnkit.loss(params, xs, y_m2o, activation=activation, task="regression", mode="many-to-one"))
    want = torch.nn.functional.mse_loss(torch.from_numpy(o_ref[..., -1, :]), torch.from_numpy(y_m2o)).item()
    assert got == pytest.approx(want, rel=1e-9)
    if O > 1:
        labels = rng.integers(0, O, size=lead + (T,))
        got = float(rnnkit.loss(params, xs, labels, activation=activation, task="classification",
                                mode="many-to-many"))
        logits = torch.from_numpy(o_ref.reshape(-1, O))
        want = torch.nn.functional.cross_entropy(logits, torch.from_numpy(labels.reshape(-1))).item()
        assert got == pytest.approx(want, rel=1e-9)
        cls = np.asarray(rnnkit.predict_classes(params, xs, activation=activation, mode="many-to-one"))
        np.testing.assert_array_equal(cls, np.argmax(o_ref[..., -1, :], axis=-1))


def jax_key(seed):
    import jax
    return jax.random.key(seed)


def test_check_gradients_at_one_step_and_one_sequence():
    params = rnnkit.init_params(jax_key(0), 2, 2, 2, dtype="float64")
    xs = np.random.default_rng(0).standard_normal((1, 2))  # T = 1, unbatched
    table = rnnkit.check_gradients(params, xs, np.array([1]), activation="sigmoid",
                                   task="classification", mode="many-to-many")
    assert (table["jax_vs_fd_rel"] < 1e-6).all()  # central differences (any numerics textbook)


@pytest.mark.parametrize("call,exc,word", [
    (lambda p: rnnkit.hidden_states(p, np.zeros(2)), ValueError, "`xs`"),
    (lambda p: rnnkit.hidden_states(p, np.zeros((0, 2))), ValueError, "`xs`"),
    (lambda p: rnnkit.hidden_states(p, np.zeros((3, 5))), ValueError, "`xs`"),
    (lambda p: rnnkit.hidden_states(p, np.array([["a", "b"]])), TypeError, "`xs`"),
    (lambda p: rnnkit.hidden_states(p, np.zeros((3, 2)), activation="softplus"), ValueError, "`activation`"),
    (lambda p: rnnkit.hidden_states(p, np.zeros((3, 2)), mask=np.ones(4, bool)), ValueError, "`mask`"),
    (lambda p: rnnkit.hidden_states(p, np.zeros((3, 2)), h0=np.zeros(5)), ValueError, "`h0`"),
    (lambda p: rnnkit.hidden_states({"U": p["U"]}, np.zeros((3, 2))), ValueError, "`params`"),
    (lambda p: rnnkit.loss(p, np.zeros((3, 2)), np.zeros((4, 1))), ValueError, "`ys`"),
    (lambda p: rnnkit.loss(p, np.zeros((3, 2)), np.ones(3, int), task="classification"), ValueError, "`ys`"),
    (lambda p: rnnkit.loss(p, np.zeros((3, 2)), np.zeros((3, 1)), mode="one-to-one"), ValueError, "`mode`"),
    (lambda p: rnnkit.init_params(jax_key(0), 2, 0, 1), ValueError, "`n_hidden`"),
    (lambda p: rnnkit.init_params(jax_key(0), 2, 3, 1, scheme="he"), ValueError, "`scheme`"),
])
def test_model_functions_refuse_bad_arguments_by_name(call, exc, word):
    params = rnnkit.init_params(jax_key(0), 2, 3, 1)
    with pytest.raises(exc) as info:
        call(params)
    assert word in str(info.value)


def test_init_params_takes_numpy_integer_sizes():
    p = rnnkit.init_params(jax_key(0), np.int64(2), np.int64(3), np.int32(1))
    assert p["U"].shape == (2, 3) and p["W"].shape == (3, 1)


# ---------------------------------------------------------------- save / load round trips

def _same_predictions(a, b):
    pd.testing.assert_frame_equal(a, b)


@pytest.mark.parametrize("kind", ["regression tz", "classification ints", "classification categorical",
                                  "classification mixed"])
def test_save_load_round_trip_predicts_alike(tmp_path, kind):
    if kind == "regression tz":
        df, kw = _tz(series()), dict(target="y")
    else:
        df = labelled()
        kinds = {"ints": "integers", "categorical": "categorical with an unused category",
                 "mixed": "mixed int and text"}
        df["lab"] = LABELS[kinds[kind.split()[1]]](df["lab"].to_numpy())
        kw = dict(target="lab", task="classification", horizon=0)
    r = fit(df, Config(**FAST, **kw), progress=False)
    r.save(tmp_path / "fit")
    back = load_fit(tmp_path / "fit")
    new = df.iloc[10:60]
    _same_predictions(back.predict(new), r.predict(new))
    pd.testing.assert_frame_equal(back.metrics, r.metrics)
    with_data = load_fit(tmp_path / "fit", df=df)
    _same_predictions(with_data.predict(), r.predict())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fit"]  # no temporary left behind


def test_save_refuses_occupied_places_and_leaves_them_alone(tmp_path, fitted):
    own = tmp_path / "notes"
    own.mkdir()
    (own / "mine.txt").write_text("keep me")
    with pytest.raises(ValueError, match="refusing to overwrite"):
        fitted.save(own)
    assert [p.name for p in own.iterdir()] == ["mine.txt"]
    (tmp_path / "file.txt").write_text("keep me too")
    with pytest.raises(ValueError, match="is a file"):
        fitted.save(tmp_path / "file.txt")
    assert (tmp_path / "file.txt").read_text() == "keep me too"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file.txt", "notes"]


def test_a_failed_save_leaves_the_old_fit_and_no_temporary(tmp_path, fitted, monkeypatch):
    fitted.save(tmp_path / "fit")
    before = {p.name: p.read_bytes() for p in (tmp_path / "fit").iterdir()}
    import rnnkit.fitting._fit_io as fit_io

    def broken(*a, **k):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(fit_io.np, "savez", broken)
    with pytest.raises(OSError, match="simulated"):
        fitted.save(tmp_path / "fit")
    monkeypatch.undo()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fit"]
    assert {p.name: p.read_bytes() for p in (tmp_path / "fit").iterdir()} == before
    load_fit(tmp_path / "fit").predict(series(30, seed=2))


UNUSUAL = [
    Config(target=["y", "x"], mode="many-to-many", horizon=2, dtype="float64", clip=None, patience=None),
    Config(target="lab", task="classification", horizon=0, window="full", group_column="seq",
           features=["a"], split_column="part", season=None),
    Config(optimizer="adamw", weight_decay=0.25, activation="relu", init="identity", window=1,
           split=(0.8, 0.2, 0.0), season=7, scale="none", missing="interpolate", gap=3),
    Config(activation="sigmoid", time_column="when", short_sequences="drop", group_column="g",
           recurrent_scale=0.5, seed=2**31 - 1, epochs=100_000, batch_size=1),
]


@pytest.mark.parametrize("cfg", UNUSUAL, ids=range(len(UNUSUAL)))
def test_export_and_load_config_round_trip(tmp_path, cfg):
    path = rnnkit.save_config(cfg, tmp_path / "best.json", metric=("val_rmse", float("nan")))
    assert rnnkit.load_config(path) == cfg
    assert sorted(p.name for p in tmp_path.iterdir()) == ["best.json"]


def test_save_config_into_a_folder_or_a_new_folder(tmp_path):
    (tmp_path / "runs").mkdir()
    with pytest.raises(ValueError, match="folder"):
        rnnkit.save_config(Config(), tmp_path / "runs")
    assert list((tmp_path / "runs").iterdir()) == []
    assert sorted(p.name for p in tmp_path.iterdir()) == ["runs"]  # no temporary left behind
    path = rnnkit.save_config(Config(), tmp_path / "new" / "best.json")  # the folder is made
    assert rnnkit.load_config(path) == Config()


def test_a_failed_config_write_keeps_the_old_file(tmp_path, monkeypatch):
    path = rnnkit.save_config(Config(hidden=7), tmp_path / "best.json")
    old = path.read_bytes()
    import rnnkit.sweeps._export as export

    def broken(*a, **k):
        raise OSError("no space (simulated)")

    monkeypatch.setattr(export.os, "replace", broken)
    with pytest.raises(OSError, match="simulated"):
        rnnkit.save_config(Config(hidden=9), path)
    monkeypatch.undo()
    assert path.read_bytes() == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["best.json"]


@pytest.mark.parametrize("text,where", [
    ('{"window": 0}', "$.window"), ('{"hidden": 2.5}', "$.hidden"), ('{"windw": 3}', "windw"),
    ('{"format": "rnnkit.experiment", "version": 2, "config": {"task": "ranking"}}', "$.config.task"),
    ("[1, 2]", "object"), ("{not json", "not JSON"), ('{"lr": NaN}', "NaN"),
])
def test_load_config_refuses_bad_files_naming_the_field(tmp_path, text, where):
    path = tmp_path / "c.json"
    path.write_text(text)
    with pytest.raises(ValueError) as info:
        rnnkit.load_config(path)
    assert where in str(info.value)


# ---------------------------------------------------------------- sweeps

def test_sweep_on_odd_space_values_exports_a_winner_that_fits(tmp_path):
    df = _tz(series())
    before = copy.deepcopy(df)
    base = Config(**FAST, target="y")
    result = rnnkit.sweep(df, base, {"window": np.array([1, 4]), "activation": ["tanh", "relu"]},
                          store=tmp_path / "runs" / "sweep.sqlite", progress=False)
    pd.testing.assert_frame_equal(df, before)
    path = result.export(tmp_path / "best.json")
    cfg = rnnkit.load_config(path, df=df)  # same frame: no FingerprintWarning (warnings are errors)
    assert cfg == result.best().replace(features=("x",)) and type(cfg.window) is int  # inputs named
    assert fit(df, cfg, progress=False).status == "ok"


def test_sweep_store_that_is_a_folder_or_not_a_database(tmp_path, fitted):
    base = Config(**FAST, target="y")
    with pytest.raises(ValueError, match="`store`"):
        rnnkit.sweep(series(), base, {"hidden": [2]}, store=tmp_path, progress=False)
    (tmp_path / "junk.sqlite").write_text("not a database")
    with pytest.raises(ValueError, match="`store`"):
        rnnkit.sweep(series(), base, {"hidden": [2]}, store=tmp_path / "junk.sqlite", progress=False)
    assert (tmp_path / "junk.sqlite").read_text() == "not a database"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["junk.sqlite"]


# ---------------------------------------------------------------- command line

def test_cli_refuses_an_output_folder_that_is_a_file(tmp_path, capsys):
    from rnnkit.cli import main

    series().to_csv(tmp_path / "data.csv", index=False)
    rnnkit.save_config(Config(**FAST, target="y"), tmp_path / "cfg.json")
    (tmp_path / "taken").write_text("keep me")
    code = main(["fit", str(tmp_path / "cfg.json"), "--data", str(tmp_path / "data.csv"),
                 "--out", str(tmp_path / "taken"), "--no-progress"])
    err = capsys.readouterr().err
    assert code == 2 and "--out" in err and "folder" in err, err
    assert (tmp_path / "taken").read_text() == "keep me"


def test_cli_keeps_the_configured_time_column_as_a_column(tmp_path, capsys):
    from rnnkit.cli import main

    df = series()
    df.insert(0, "when", pd.date_range("2024-03-30", periods=N, freq="h", tz="Europe/Berlin"))
    df.to_csv(tmp_path / "data.csv", index=False)  # first column of dates, as a logger writes
    rnnkit.save_config(Config(**FAST, target="y", time_column="when"), tmp_path / "cfg.json")
    code = main(["fit", str(tmp_path / "cfg.json"), "--data", str(tmp_path / "data.csv"),
                 "--out", str(tmp_path / "out"), "--no-progress"])
    assert code == 0, capsys.readouterr().err
    assert load_fit(tmp_path / "out" / "model").config.time_column == "when"


def test_cli_reads_a_first_column_of_local_times_across_dst_as_the_index(tmp_path, capsys):
    from rnnkit.cli import read_data

    df = series()
    df.insert(0, "when", pd.date_range("2024-03-30", periods=N, freq="h", tz="Europe/Berlin"))
    df.to_csv(tmp_path / "data.csv", index=False)  # offsets +01:00, then +02:00
    back = read_data(str(tmp_path / "data.csv"))
    assert list(back.columns) == ["y", "x"]
    assert isinstance(back.index, pd.DatetimeIndex)
    assert (back.index == pd.DatetimeIndex(df["when"])).all()  # the same instants


# ---------------------------------------------------------------- any frame: a clean answer or a clean refusal

_KINDS = {
    "float": lambda n, rng: rng.standard_normal(n),
    "float with a NaN": lambda n, rng: np.where(np.arange(n) == n // 2, np.nan, rng.standard_normal(n)),
    "float with an inf": lambda n, rng: np.where(np.arange(n) == n // 3, np.inf, rng.standard_normal(n)),
    "int": lambda n, rng: rng.integers(0, 5, n),
    "bool": lambda n, rng: rng.integers(0, 2, n).astype(bool),
    "text labels": lambda n, rng: np.array(["a", "b", "c"])[rng.integers(0, 3, n)],
    "numbers as objects": lambda n, rng: pd.Series(list(rng.standard_normal(n)), dtype=object).to_numpy(),
    "dates": lambda n, rng: pd.date_range("2024", periods=n, freq="h"),
    "categorical": lambda n, rng: pd.Categorical(np.array(["x", "y"])[rng.integers(0, 2, n)]),
    "nullable Int64 with NA": lambda n, rng: pd.array(np.where(rng.random(n) < 0.1, None,
                                                               rng.integers(0, 9, n)), dtype="Int64"),
    "constant": lambda n, rng: np.full(n, 3.0),
    "all NaN": lambda n, rng: np.full(n, np.nan),
}
_INDEXES = {
    "range": lambda n, rng: pd.RangeIndex(n),
    "daily": lambda n, rng: pd.date_range("2024", periods=n, freq="D"),
    "hourly, zone-aware": lambda n, rng: pd.date_range("2024-03-09", periods=n, freq="h", tz="US/Pacific"),
    "shuffled dates": lambda n, rng: pd.date_range("2024", periods=n, freq="D")[rng.permutation(n)],
    "irregular": lambda n, rng: pd.DatetimeIndex(pd.Timestamp("2024") + pd.to_timedelta(
        np.cumsum(rng.integers(1, 4, n)), "h")),
    "text": lambda n, rng: pd.Index([f"k{i}" for i in range(n)]),
    "monthly periods": lambda n, rng: pd.period_range("2000-01", periods=n, freq="M"),
}


@settings(max_examples=60, deadline=None, suppress_health_check=list(HealthCheck))
@given(n=st.integers(2, 70), kinds=st.lists(st.sampled_from(sorted(_KINDS)), min_size=1, max_size=4),
       index=st.sampled_from(sorted(_INDEXES)), seed=st.integers(0, 999),
       task=st.sampled_from(["regression", "classification"]), mode=st.sampled_from(["many-to-one", "many-to-many"]),
       window=st.integers(1, 6), horizon=st.integers(0, 2), missing=st.sampled_from(["error", "ffill", "interpolate"]),
       season=st.sampled_from(["auto", None, 5]), first_as_target=st.booleans(), groups=st.booleans())
def test_any_frame_is_prepared_or_refused_cleanly(n, kinds, index, seed, task, mode, window, horizon, missing,
                                                  season, first_as_target, groups):
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({f"c{i}": _KINDS[k](n, rng) for i, k in enumerate(kinds)}, index=_INDEXES[index](n, rng))
    kw = dict(task=task, mode=mode, window=window, horizon=horizon, missing=missing, season=season,
              target_as_input=horizon > 0)
    if groups:
        df["seq"] = np.repeat(np.arange(4), -(-n // 4))[:n]
        kw["group_column"] = "seq"
    if first_as_target:
        kw["target"] = "c0"
    cfg = Config(**kw)
    before = copy.deepcopy(df)
    try:
        p = prepare(df, cfg)
    except (DataError, ValueError, TypeError) as e:  # never a KeyError, IndexError or numpy's own error
        assert isinstance(e, DataError), f"{type(e).__name__}: {e}"
        assert len(str(e)) > 30
    else:
        for split in ("train", "val", "test"):
            x, y, _ = p.windows(split)
            assert np.isfinite(x).all()
            assert p.classes is not None or np.isfinite(y).all()
    pd.testing.assert_frame_equal(df, before)


@settings(max_examples=40, deadline=None, suppress_health_check=list(HealthCheck))
@given(n=st.integers(1, 30), y=st.sampled_from(sorted(_KINDS)), x=st.sampled_from(sorted(_KINDS)),
       index=st.sampled_from(sorted(_INDEXES)), seed=st.integers(0, 999), drop=st.sampled_from([None, "y", "x"]))
def test_predict_on_any_new_frame_answers_or_refuses_cleanly(fitted, n, y, x, index, seed, drop):
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({"y": _KINDS[y](n, rng), "x": _KINDS[x](n, rng)}, index=_INDEXES[index](n, rng))
    if drop:
        df = df.drop(columns=drop)
    before = copy.deepcopy(df)
    try:
        pred = fitted.predict(df)
    except (DataError, ValueError, TypeError) as e:
        assert isinstance(e, DataError), f"{type(e).__name__}: {e}"
    else:
        assert len(pred) <= n and pred["predicted"].notna().any()
        assert np.isfinite(pred["predicted"].dropna().to_numpy(np.float64)).all()
    pd.testing.assert_frame_equal(df, before)


def test_values_too_large_to_square_are_refused_naming_the_column():
    # float64 overflows near 1.8e308 (IEEE 754, common practice, no source), so squares
    # of values beyond 1e154 are inf; prepare refuses them before the scaler sees them.
    idx = pd.date_range("2024-01-01", periods=200, freq="h")
    df = pd.DataFrame({"y": np.sin(np.arange(200.0)), "x": np.linspace(0, 1, 200)}, index=idx)
    df.loc[idx[50], "x"] = 3e200
    before = df.copy(deep=True)
    with pytest.raises(rnnkit.DataError, match="'x'.*rescale"):
        rnnkit.prepare(df, rnnkit.Config(target="y", window=8))
    pd.testing.assert_frame_equal(df, before)


def test_unscaled_values_beyond_float32_are_refused():
    # float32's largest value is about 3.4e38 (IEEE 754, common practice, no source).
    idx = pd.date_range("2024-01-01", periods=200, freq="h")
    df = pd.DataFrame({"y": np.sin(np.arange(200.0)), "x": np.linspace(0, 1, 200)}, index=idx)
    df.loc[idx[20], "x"] = 1e40
    with pytest.raises(rnnkit.DataError, match="'x'.*float32"):
        rnnkit.prepare(df, rnnkit.Config(target="y", window=8, scale="none"))
    # float64 holds it
    assert rnnkit.prepare(df, rnnkit.Config(target="y", window=8, scale="none", dtype="float64"))
