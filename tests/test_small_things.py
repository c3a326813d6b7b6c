"""The small things: help(Config) lists every field, documents name the resolved columns,
a short repr of Diagnostics, the small-part warning and the note on auto-chosen inputs."""
import pydoc
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import rnnkit
from rnnkit import Config, fit, load_config, prepare, save_config
from rnnkit.data._config import config_fields
from rnnkit.data._errors import SmallPartWarning


def test_help_shows_every_field_with_its_description():
    text = pydoc.render_doc(Config, renderer=pydoc.plaintext)
    for name in config_fields():
        line = next((ln for ln in text.splitlines() if ln.strip(" |").startswith(f"{name} = ")), None)
        assert line is not None, name
        assert len(line.split(": ", 1)[-1]) > 5, line  # the one-line description is there
    assert "hidden units H" in text and "learning rate" in text


@pytest.fixture(scope="module")
def macro():
    # US macroeconomic data 1959-2009 (statsmodels): its year and quarter columns are numeric
    return sm.datasets.macrodata.load_pandas().data[["year", "quarter", "realgdp", "realcons", "infl"]]


def test_auto_chosen_inputs_are_listed_in_a_note(macro):
    p = prepare(macro, Config(target="realgdp", window=4, season=None))
    note = next(n for n in p.notes if "input columns chosen automatically" in n)
    assert "'year'" in note and "'quarter'" in note and "'realcons'" in note
    assert not any("chosen automatically" in n for n in prepare(
        macro, Config(target="realgdp", features=("realcons",), window=4, season=None)).notes)


def test_the_document_names_the_resolved_target_and_inputs(macro, tmp_path):
    path = save_config(Config(window=4, season=None), tmp_path / "c.json", data=macro)
    cfg = load_config(path)
    assert cfg.target == "year"  # the first numeric column, written out
    assert cfg.features == ("quarter", "realgdp", "realcons", "infl")
    # a reordered frame now refits the same columns
    reordered = macro[["infl", "realcons", "realgdp", "quarter", "year"]]
    assert prepare(reordered, cfg).input_names == prepare(macro, cfg).input_names


def test_short_repr_of_diagnostics():
    nile = sm.datasets.nile.load_pandas().data[["volume"]].astype(float)
    res = fit(nile, Config(target="volume", window=5, hidden=3, epochs=2, season=None), progress=False)
    text = repr(res.diagnostics)
    assert text.startswith("Diagnostics(val, tanh, T=5, H=3, spectral_radius=") and len(text) < 300


def test_small_val_and_test_parts_warn():
    # fewer than 30 windows: common practice, no source
    nile = sm.datasets.nile.load_pandas().data[["volume"]].astype(float)
    # 100 rows split 0.7/0.15/0.15: every one of the 15 val rows is a target (windows reach back)
    with pytest.warns(SmallPartWarning, match="the val part has only 15 windows"):
        p = prepare(nile, Config(target="volume", window=4, season=None))
    assert any("fewer than 30" in n for n in p.notes)
    long = pd.DataFrame({"y": np.sin(np.arange(2000) / 7.0)})
    with warnings.catch_warnings():
        warnings.simplefilter("error", SmallPartWarning)
        prepare(long, Config(target="y", window=4, season=None))  # 300 val windows: no warning
