"""The experiment document: schema, Config agreement, refusals, fingerprint, atomic writes."""
import hashlib
import json
import math
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from jsonschema import Draft202012Validator

import rnnkit
from rnnkit.data import _config
from rnnkit.data._config import Config, config_fields
from tolerances import REPRODUCE
from rnnkit.sweeps._export import (FingerprintWarning, check_fingerprint, document, fingerprint, load_config,
                            read_document, save_config, schema, validate, write_document)

CONFIG_SCHEMA = schema()["$defs"]["config"]


def _schema_ok(d) -> bool:
    try:
        validate(d, part="config")
        return True
    except ValueError:
        return False


def _config_ok(base: Config, d) -> bool:
    try:
        base.replace(**d)
        return True
    except (TypeError, ValueError):
        return False


def test_schema_is_valid_draft_2020_12():
    # The JSON Schema meta-schema (draft 2020-12), as shipped in the jsonschema library.
    Draft202012Validator.check_schema(schema())
    assert schema()["$schema"] == "https://json-schema.org/draft/2020-12/schema"


def test_schema_names_every_config_field_with_its_default():
    props = CONFIG_SCHEMA["properties"]
    assert set(props) == set(config_fields())
    assert CONFIG_SCHEMA["additionalProperties"] is False
    defaults = Config().to_dict()
    for name in config_fields():
        assert props[name]["default"] == defaults[name], name
        assert _schema_ok({name: defaults[name]}), name


def test_schema_choices_equal_config_choices():
    choices = {"task": _config.TASKS, "mode": _config.MODES, "scale": _config.SCALES,
               "missing": _config.MISSING, "short_sequences": _config.SHORT,
               "activation": _config.ACTIVATIONS, "init": _config.INITS,
               "optimizer": _config.OPTIMIZERS, "dtype": _config.DTYPES, "watch": _config.WATCHES,
               "cell": _config.CELLS, "transform": _config.TRANSFORMS}
    enums = {k: v["enum"] for k, v in CONFIG_SCHEMA["properties"].items() if "enum" in v}
    assert enums == {k: list(v) for k, v in choices.items()}


# Values tried in every field: each type, each boundary of the ranges, each choice.
_PROBES = [None, True, False, 0, 1, 2, -1, 0.5, 1.0, 1.5, 10, 10.5, 100, 100.5, 4096, 4097, 10**30,
           65536, 65537, 100000, 100001, 100000000, 100000001, 2**31 - 1, 2**31, 1e6, 1e7,
           float("inf"), "", "a", "auto", "full",
           "none", [], ["a"], ["a", "b"], ["a", "a"], ["a", 1], [0.7, 0.15, 0.15], [0.6, 0.4, 0.0],
           [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.5, 0.5], ["a", "b", "c"], {"a": 1}]
_PROBES += sorted({v for p in CONFIG_SCHEMA["properties"].values() for v in p.get("enum", ())})


@pytest.mark.parametrize("name", config_fields())
def test_schema_and_config_accept_the_same_values(name):
    # A base on which rules tying several fields together cannot fire, so that
    # each field's own rule decides (window "full" needs a group column and no
    # target input; horizon 0 needs no target input).
    base = Config(group_column="g", target_as_input=False)
    for v in _PROBES:
        d = {name: v}
        if isinstance(v, float) and not math.isfinite(v):
            continue  # JSON has no infinity; load_config refuses it while parsing (tested below)
        assert _schema_ok(d) == _config_ok(base, d), (name, v)


def _valid_values():
    """A strategy for a dict of some Config fields with values valid on their own."""
    word = st.text("abcdefgh_", min_size=1, max_size=6)
    fields = {
        "target": st.one_of(st.none(), word, st.lists(word, min_size=1, max_size=3, unique=True)),
        "hidden": st.integers(1, 4096), "epochs": st.integers(1, 100000),
        "batch_size": st.integers(1, 65536), "window": st.one_of(st.integers(1, 500)),
        "horizon": st.integers(1, 50), "gap": st.integers(0, 50), "seed": st.integers(0, 2**31 - 1),
        "lr": st.floats(1e-6, 10.0), "weight_decay": st.floats(0.0, 0.99),
        "recurrent_scale": st.floats(1e-3, 100.0), "clip": st.one_of(st.none(), st.floats(1e-3, 1e6)),
        "patience": st.one_of(st.none(), st.integers(1, 100)),
        "season": st.one_of(st.none(), st.just("auto"), st.integers(1, 400)),
        "split": st.sampled_from([[0.7, 0.15, 0.15], [0.6, 0.2, 0.2], [0.8, 0.2, 0.0]]),
        "target_as_input": st.booleans(),
    }
    for name, prop in CONFIG_SCHEMA["properties"].items():
        if "enum" in prop:
            fields[name] = st.sampled_from(prop["enum"])
    return st.fixed_dictionaries({}, optional=fields)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(_valid_values())
def test_valid_configs_round_trip(d):
    try:
        config = Config.from_dict(d)
    except (TypeError, ValueError):
        return  # a rule tying two fields together; not this test's subject
    with tempfile.TemporaryDirectory() as tmp:
        path = save_config(config, Path(tmp) / "c.json", metric=("val_rmse", 0.25))
        assert load_config(path) == config
        bare = Path(tmp) / "bare.json"
        bare.write_text(json.dumps(config.to_dict()))
        assert load_config(bare) == config


_WRONG = st.one_of(st.text(max_size=5), st.booleans(), st.floats(allow_nan=False, allow_infinity=False),
                   st.integers(-10**12, 10**12), st.lists(st.integers(), max_size=3),
                   st.dictionaries(st.text(max_size=3), st.integers(), max_size=2))


@settings(max_examples=150, deadline=None)
@given(name=st.sampled_from(config_fields()), value=_WRONG, envelope=st.booleans())
def test_wrong_values_are_refused_naming_the_field(name, value, envelope):
    if _config_ok(Config(), {name: value}) and _schema_ok({name: value}):
        return  # the draw happens to be a valid value
    doc = {"format": "rnnkit.experiment", "version": 2, "config": {name: value}} if envelope \
        else {name: value}
    with pytest.raises(ValueError) as err:
        load_config(doc)
    assert name in str(err.value)


@settings(max_examples=60, deadline=None)
@given(key=st.text(min_size=1, max_size=12).filter(lambda k: k not in config_fields()),
       envelope=st.booleans())
def test_extra_keys_are_refused_naming_the_key(key, envelope):
    cfg = {"hidden": 8, key: 1}
    doc = {"format": "rnnkit.experiment", "version": 2, "config": cfg} if envelope else cfg
    with pytest.raises(ValueError) as err:
        load_config(doc)
    assert repr(key) in str(err.value) or key in str(err.value)


def _good_doc():
    return document(Config(target="y", hidden=8), metric=("val_rmse", 0.5),
                    metrics={"val_rmse": 0.5, "persistence_val_rmse": 0.7})


@pytest.mark.parametrize("change, where", [
    (lambda d: d.pop("config"), "'config' is a required property"),
    (lambda d: d.update(format="something.else"), "$.format"),
    (lambda d: d.update(version=3), "$.version"),
    (lambda d: d.update(extra=1), "'extra' was unexpected"),
    (lambda d: d["metric"].pop("value"), "$.metric"),
    (lambda d: d["metric"].update(value="low"), "$.metric.value"),
    (lambda d: d["metrics"].update(val_rmse="x"), "$.metrics.val_rmse"),
    (lambda d: d.update(data={"fingerprint": "md5:00", "rows": 3, "columns": []}), "$.data.fingerprint"),
    (lambda d: d.update(data={"fingerprint": "sha256:" + "0" * 64, "rows": -1, "columns": []}),
     "$.data.rows"),
    (lambda d: d.update(created="yesterday"), "$.created"),
    (lambda d: d["config"].update(hidden=8.0), "$.config.hidden"),
    (lambda d: d["config"].update(activation="softplus"), "$.config.activation"),
    (lambda d: d["config"].update(split=[0.7, 0.3]), "$.config.split"),
])
def test_malformed_documents_are_refused_with_the_json_path(change, where, tmp_path):
    doc = _good_doc()
    change(doc)
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(ValueError) as err:
        load_config(path)
    assert where in str(err.value)
    assert str(path) in str(err.value)


def test_non_json_and_nan_are_refused(tmp_path):
    p = tmp_path / "nan.json"
    p.write_text('{"lr": NaN}')
    with pytest.raises(ValueError, match="NaN"):
        load_config(p)
    p.write_text("hidden: 8")
    with pytest.raises(ValueError, match="not JSON"):
        load_config(p)
    with pytest.raises(TypeError, match="unknown part"):
        save_config(Config(), tmp_path / "x.json", colour="red")


def test_write_is_atomic_and_keeps_the_old_file_on_failure(tmp_path, monkeypatch):
    path = save_config(Config(hidden=8), tmp_path / "c.json")
    before = path.read_bytes()
    with pytest.raises(ValueError):
        save_config(Config(hidden=16), path, metrics={"val rmse": 1.0})  # key breaks the schema
    assert path.read_bytes() == before

    def boom(src, dst):
        raise OSError("disk full")
    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError):
        save_config(Config(hidden=16), path)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.json"]  # no temp file left


def _frame():
    idx = pd.date_range("2021-03-01", periods=5, freq="D", name="day")
    return pd.DataFrame({"y": [1.0, 2.5, np.nan, 4.0, 5.0], "x": [1, 2, 3, 4, 5],
                         "note": ["a", "b", "c", "d", "e"]}, index=idx)


def test_fingerprint_hashes_exactly_the_documented_bytes():
    # Only these bytes enter sha256, nothing from the process (no hash() seeds, no
    # object ids), so the value is the same in every run and on every machine.
    df, cfg = _frame(), Config(target="y", features=("x",))
    # The layout written in fingerprint()'s docstring, rebuilt here by hand.
    h = hashlib.sha256()
    h.update(b"rnnkit.fingerprint/1\n" + b"rows=5\n")
    ns = (pd.date_range("2021-03-01", periods=5, freq="D").as_unit("ns").asi8).astype("<i8")
    h.update(b"<index>\n" + b"M8\n" + ns.tobytes())
    h.update(b"x\n" + b"f8\n" + np.arange(1, 6, dtype="<f8").tobytes())
    h.update(b"y\n" + b"f8\n" + np.array([1.0, 2.5, np.nan, 4.0, 5.0], dtype="<f8").tobytes())
    assert fingerprint(df, cfg) == "sha256:" + h.hexdigest()


def test_fingerprint_follows_the_used_data_only():
    df, cfg = _frame(), Config(target="y", features=("x",))
    fp = fingerprint(df, cfg)
    assert fingerprint(df[["note", "x", "y"]], cfg) == fp  # column order
    assert fingerprint(df.assign(note="z"), cfg) == fp  # unused column
    assert fingerprint(df.assign(x=df["x"].astype(float)), cfg) == fp  # same values as floats
    assert fingerprint(df.assign(y=df["y"].fillna(0.0)), cfg) != fp
    assert fingerprint(df.iloc[:4], cfg) != fp
    assert fingerprint(df.set_axis(df.index + pd.Timedelta("1h")), cfg) != fp
    # Time-zone aware times hash as their UTC instants.
    utc = df.set_axis(df.index.tz_localize("UTC"))
    assert fingerprint(utc, cfg) == fingerprint(utc.set_axis(utc.index.tz_convert("Asia/Tokyo")), cfg)
    assert df.equals(_frame())  # the caller's frame is untouched


def test_a_different_frame_warns(tmp_path):
    df, cfg = _frame(), Config(target="y", features=("x",))
    path = save_config(cfg, tmp_path / "c.json", data=df)
    doc = read_document(path)
    assert doc["data"]["rows"] == 5 and doc["data"]["columns"] == ["x", "y"]
    assert doc["data"]["start"] == "2021-03-01T00:00:00"
    assert set(doc["software"]) >= {"rnnkit", "jax", "optax", "numpy", "pandas", "python"}
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert check_fingerprint(df, path) is True
        assert load_config(path, df=df) == cfg
    other = df.assign(y=df["y"] * 2)
    with pytest.warns(FingerprintWarning, match="fingerprint"):
        assert check_fingerprint(other, path) is False
    with pytest.warns(FingerprintWarning):
        load_config(path, df=other)
    assert issubclass(FingerprintWarning, UserWarning)
    with pytest.raises(ValueError, match="no `data` part"):
        check_fingerprint(df, write_document(_good_doc(), tmp_path / "nodata.json"))


def test_public_names():
    assert rnnkit.load_config is load_config and rnnkit.save_config is save_config
    assert rnnkit.check_fingerprint is check_fingerprint


def test_export_load_fit_reproduces_the_recorded_metric(tmp_path):
    # Yearly sunspot numbers 1700-2008, the open data set shipped with statsmodels.
    import statsmodels.api as sm

    df = sm.datasets.sunspots.load_pandas().data[["SUNACTIVITY"]]
    base = Config(target="SUNACTIVITY", hidden=4, epochs=3, batch_size=32, season=11)
    # Two windows: the sweep pads both runs to the longer one; fit alone does not pad.
    res = rnnkit.sweep(df, base, {"window": [4, 8]}, progress=False)
    path = res.export(tmp_path / "best.json")
    doc = read_document(path)
    assert doc["metric"]["name"] == "val_rmse"
    assert doc["metric"]["value"] == res.best_run()["val_rmse"] == res.table["val_rmse"].min()
    assert doc["metrics"]["persistence_val_rmse"] == res.best_run()["persistence_val_rmse"]
    assert doc["data"]["fingerprint"] == fingerprint(df, res.best())
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the same frame: no fingerprint warning
        config = load_config(path, df=df)
    assert config == res.best().replace(features=())  # the document writes out the inputs used
    again = rnnkit.fit(df, config, progress=False)
    assert again.metrics.loc["rnn", "val_rmse"] == pytest.approx(doc["metric"]["value"], **REPRODUCE)
    for k, v in doc["metrics"].items():
        if k.startswith(("val_", "test_")):
            model, col = "rnn", k
        else:
            split_at = min(i for i in (k.find("_val_"), k.find("_test_")) if i >= 0)
            model, col = k[:split_at], k[split_at + 1:]
        assert again.metrics.loc[model, col] == pytest.approx(v, **REPRODUCE), k
