"""Config field checks: every bad value is refused with the field named; dict round trips."""
import json
import math

import pytest

from rnnkit import Config
from rnnkit.data._config import config_fields

# (field, bad value, extra fields that make the case reach that check)
BAD = [
    ("target", "", {}),
    ("target", ("load", "load"), {}),
    ("target", ("a", "b"), {"task": "classification"}),
    ("target", {"a": 1}, {}),
    ("features", ("x", 3), {}),
    ("features", ("x", "x"), {}),
    ("features", ("load",), {"target": "load"}),
    ("target_as_input", "yes", {}),
    ("time_column", 5, {}),
    ("time_column", "load", {"target": "load"}),
    ("group_column", "", {}),
    ("group_column", "ts", {"time_column": "ts"}),
    ("split_column", "part", {"group_column": "part"}),
    ("task", "forecast", {}),
    ("mode", "many-to-few", {}),
    ("mode", "many-to-many", {"window": "full", "group_column": "id", "task": "classification"}),
    ("window", 0, {}),
    ("window", 2.5, {}),
    ("window", True, {}),
    ("window", "whole", {}),
    ("window", "full", {"task": "classification"}),  # no group_column
    ("target_as_input", True, {"window": "full", "group_column": "id"}),  # would feed the answer
    ("horizon", -1, {}),
    ("horizon", 0, {}),  # regression with target_as_input sees its own target
    ("split", (0.5, 0.5), {}),
    ("split", (0.7, 0.2, 0.2), {}),
    ("split", (1.0, 0.0, 0.0), {}),
    ("split", (0.7, math.nan, 0.3), {}),
    ("split", "0.7,0.15,0.15", {}),
    ("gap", -2, {}),
    ("gap", 1.5, {}),
    ("scale", "robust", {}),
    ("missing", "drop", {}),
    ("season", 0, {}),
    ("season", "weekly", {}),
    ("season", True, {}),
    ("short_sequences", "skip", {}),
    ("transform", "sqrt", {}),
    ("transform", "log", {"task": "classification"}),
    ("transform", "diff", {"horizon": 0, "target_as_input": False}),  # no last known level
    ("transform", "diff", {"mode": "many-to-many", "horizon": 2}),
    ("coverage", (0.8, 1.0), {}),
    ("coverage", (0.9, 0.9), {}),
    ("coverage", 0.9, {}),
    ("hidden", 0, {}),
    ("hidden", 5000, {}),
    ("hidden", 8.0, {}),
    ("activation", "gelu", {}),
    ("init", "he", {}),
    ("recurrent_scale", 0.0, {}),
    ("recurrent_scale", math.inf, {}),
    ("cell", "transformer", {}),
    ("cell", "GRU", {}),
    ("optimizer", "lbfgs", {}),
    ("lr", -1e-3, {}),
    ("lr", math.nan, {}),
    ("lr", True, {}),
    ("weight_decay", 1.0, {}),
    ("weight_decay", False, {}),
    ("epochs", 0, {}),
    ("epochs", 10.0, {}),
    ("batch_size", 0, {}),
    ("batch_size", 10**6, {}),
    ("clip", 0.0, {}),
    ("clip", "1", {}),
    ("patience", 0, {}),
    ("patience", 10**30, {}),
    ("watch", "accuracy", {}),
    ("window", 10**30, {}),
    ("season", 10**30, {}),
    ("seed", -1, {}),
    ("seed", 2**31, {}),
    ("dtype", "float16", {}),
]


@pytest.mark.parametrize("field, value, extra", BAD, ids=[f"{f}={v!r}" for f, v, _ in BAD])
def test_bad_value_names_the_field(field, value, extra):
    with pytest.raises((ValueError, TypeError)) as err:
        Config(**{**extra, field: value})
    assert f"`{field}`" in str(err.value)


def test_every_field_has_a_refused_value():
    assert {f for f, _, _ in BAD} == set(config_fields())


@pytest.mark.parametrize("kw", [
    {},
    {"target": "load", "features": ["temp", "wind"], "window": 48, "season": None, "split": [0.6, 0.2, 0.2]},
    {"target": ["a", "b"], "time_column": "ts", "gap": 3, "scale": "minmax", "missing": "interpolate",
     "clip": None, "patience": None, "dtype": "float64", "optimizer": "adamw", "weight_decay": 0.01},
    {"task": "classification", "target": "state", "group_column": "unit", "window": "full",
     "split_column": "part", "short_sequences": "drop", "activation": "relu", "init": "identity"},
])
def test_dict_and_json_round_trip(kw):
    c = Config(**kw)
    assert Config.from_dict(c.to_dict()) == c
    assert Config.from_dict(json.loads(c.to_json())) == c
    d = c.to_dict()
    assert set(d) == set(config_fields()) and not any(isinstance(v, tuple) for v in d.values())
    assert hash(c) == hash(Config.from_dict(d))  # frozen and hashable after lists became tuples


def test_unknown_key_refused_by_name():
    with pytest.raises(ValueError, match="'hidden_size'") as err:
        Config.from_dict({"hidden_size": 8, "window": 4})
    assert "hidden" in str(err.value)  # the known names are listed
    with pytest.raises(TypeError, match="from_dict"):
        Config.from_dict([("window", 4)])


def test_replace_checks_again_and_targets_property():
    c = Config(target="load")
    assert c.replace(window=12).window == 12 and c.targets == ("load",)
    assert Config(target=["a", "b"]).targets == ("a", "b") and Config().targets == ()
    with pytest.raises(ValueError, match="`hidden`"):
        c.replace(hidden=-3)
