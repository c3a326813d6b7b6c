"""The public surface: every documented name is there, documented, and refuses wrong types cleanly."""
import inspect

import numpy as np
import pandas as pd
import pytest

import rnnkit

# The public API listed in the design (DESIGN.md, "Public API") and the README.
DOCUMENTED = ["init_params", "hidden_states", "outputs", "loss", "predict_classes", "check_gradients",
              "Config", "load_config", "save_config", "DataError", "prepare", "Prepared", "fit",
              "FitResult", "load_fit", "sweep", "SweepResult", "panel", "plots", "datasets", "reference",
              "loss_surface", "loss_slice", "Diagnostics", "to_torch", "from_torch"]


@pytest.mark.parametrize("name", DOCUMENTED)
def test_documented_name_exists_with_a_docstring(name):
    obj = getattr(rnnkit, name)
    doc = inspect.getdoc(obj)
    assert doc and len(doc.splitlines()[0]) > 10, f"rnnkit.{name} needs a one-line summary"


def test_reference_module_has_the_specification_functions():
    for name in ("forward", "bptt", "finite_difference_grads"):
        assert callable(getattr(rnnkit.reference, name))


def test_data_error_is_a_value_error():
    # so `except ValueError` in a caller's code catches bad data too
    assert issubclass(rnnkit.DataError, ValueError)


@pytest.mark.parametrize("call", [
    lambda: rnnkit.prepare([[1.0, 2.0]]),
    lambda: rnnkit.fit(np.zeros((10, 2)), progress=False),
    lambda: rnnkit.fit(pd.DataFrame({"y": np.arange(50.0)}), config=3, progress=False),
    lambda: rnnkit.save_config({"window": 3}, "x.json"),
    lambda: rnnkit.load_config(3),
    lambda: rnnkit.sweep([1, 2], None, {"hidden": [2]}, progress=False),
    lambda: rnnkit.panel(np.zeros(3)),
])
def test_wrong_types_give_type_errors_not_tracebacks_from_inside(call, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    with pytest.raises(TypeError) as info:
        call()
    assert "`" in str(info.value) or "needs" in str(info.value)  # names the argument
    assert list(tmp_path.iterdir()) == []  # nothing written


def test_init_params_refuses_a_seed_where_a_key_belongs():
    with pytest.raises(TypeError, match="`key`.*jax.random.key"):
        rnnkit.init_params(0, 2, 3, 1)
