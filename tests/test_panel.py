"""Headless tests of the notebook panel: set controls, press buttons, check what happened.

The panel is driven the way ipywidgets' own tests drive widgets: by setting
``.value`` and calling ``.click()``. The background job is joined with
``Panel.wait``. Every check is about an outcome: the FitResult the panel
holds, the PNG figures it shows, the sweep table, the files it writes.
"""
import io
import json

import ipywidgets as widgets
import matplotlib.image
import html

import numpy as np
import pandas as pd
import pytest

import rnnkit
from rnnkit import plots
from rnnkit.notebook._panel import Panel
from rnnkit.notebook import _panel
from rnnkit.notebook._views import caption, render, sized

WAIT = 600  # seconds; a generous bound for a few jit compiles on a busy 2-core machine
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _png_shape(data: bytes):
    """(height, width) of PNG bytes, read back by matplotlib (not by our code)."""
    data = bytes(data)  # Image.value is a memoryview
    assert data.startswith(PNG_MAGIC)
    return matplotlib.image.imread(io.BytesIO(data), format="png").shape[:2]


@pytest.fixture(scope="module")
def demo():
    """60 days of the hourly demo load: short enough for seconds-long fits."""
    return rnnkit.datasets.cold_storage_load().iloc[: 24 * 60]


@pytest.fixture(scope="module")
def start():
    return rnnkit.Config(target="load_kw", missing="interpolate", window=12, hidden=6,
                         epochs=3, batch_size=32)


@pytest.fixture(autouse=True)
def fresh_run_stores():
    """Each test starts without the runs earlier tests kept (the stores live per kernel)."""
    _panel._STORES.clear()
    yield
    _panel._STORES.clear()


def _press(p: Panel, button: widgets.Button) -> None:
    button.click()
    assert p.wait(WAIT), "the panel's background job did not finish"


@pytest.fixture(scope="module")
def trained(demo, start):
    """One panel, trained once through its controls (shared by the read-only checks).

    Its start config says nothing about gaps (missing="error", the default): the
    first Train on the demo data, which has gaps, must still work.
    """
    p = Panel(demo, start.replace(missing="error"))
    p.controls["hidden"].value = 5
    p.controls["epochs"].value = 2
    p.controls["activation"].value = "relu"
    _press(p, p.train_button)
    return p


def test_panel_returns_the_widget_with_its_panel(demo, start):
    w = rnnkit.panel(demo, start)
    assert isinstance(w, widgets.Widget)
    assert isinstance(w.panel, Panel) and w.panel.widget is w
    assert w.panel.config() == start  # the controls start at the given config
    assert w.panel.controls["time_column"].layout.display == "none"  # a DatetimeIndex has the time
    with pytest.raises(TypeError, match="DataFrame"):
        rnnkit.panel(demo["load_kw"])
    # a dict of Config fields is taken as fit() takes it; anything else is refused
    assert rnnkit.panel(demo, start.to_dict()).panel.config() == start
    with pytest.raises(TypeError, match="config"):
        rnnkit.panel(demo, 5)


def test_panel_leaves_the_frame_alone(demo, trained):
    # Never mutate the caller's DataFrame: the demo still has its NaNs after a fit.
    assert demo["load_kw"].isna().sum() > 0
    assert trained._df is demo


def test_train_uses_the_controls_and_draws_every_figure(trained):
    r = trained.result
    assert (r.config.hidden, r.config.activation, r.config.epochs) == (5, "relu", 2)
    assert r.history["epoch"].tolist() == [1, 2]
    assert trained.status_level == "ok" and "Trained 2 epochs" in trained.status.value
    for name in ("training", "forecast", "gradient", "spectrum", "heatmap", "path", "surface",
                 "slice", "scores"):
        h, w = _png_shape(trained.views.images[name].value)
        assert h > 200 and w > 300, name
        assert trained.views.images[name].layout.display is None, name
    assert trained.views.images["sweep"].value == b""  # no sweep yet: nothing shown
    assert not trained.train_button.disabled and trained.stop_button.disabled


def test_figures_show_the_results_series(trained):
    """Each PNG equals the plots builder drawn on the result's own data (rendering is deterministic)."""
    r, im = trained.result, trained.views.images
    made = caption(r.config, "trained here")  # every figure names the settings and run
    assert "window 12" in made and "5 relu units" in made and "seed 0" in made
    assert im["training"].value == render(sized("training", plots.training_curves, r.history,
                                                status=r.status, caption=made))
    d = r.diagnostics
    assert im["spectrum"].value == render(sized("spectrum", plots.spectrum, d.singular_values,
                                                caption=made))
    assert im["path"].value == render(sized("path", plots.hidden_path, d.val_states,
                                            times=d.val_times, caption=made))
    # The forecast page shows the test range only, on the frame's own time index.
    from rnnkit.notebook._data import forecast_frame
    shown = forecast_frame(r)
    assert set(shown["split"]) == {"test"}
    assert shown.index.isin(trained._df.index).all()
    # The metrics table lists the network and every baseline of result.metrics.
    for model in r.metrics.index:
        assert f">{model}</td>" in trained.views.metrics_table.value


def test_forecast_baseline_is_the_best_scored_one(trained):
    from sklearn.metrics import mean_squared_error

    from rnnkit.notebook._data import baseline_series, best_baseline, forecast_frame
    r = trained.result
    name = best_baseline(r)
    others = r.metrics.drop(index="rnn")["test_rmse"]
    assert others[name] == others.min()
    shown = forecast_frame(r)
    got_name, values = baseline_series(r, shown.index)
    assert got_name == name and values.shape == (len(shown),)
    # One series, many-to-one: the page shows every test target, so the RMSE of
    # the drawn baseline line against the drawn actual line is that baseline's
    # test RMSE (scikit-learn's RMSE as the outside reference).
    rmse = mean_squared_error(shown["actual"], values) ** 0.5
    assert rmse == pytest.approx(others[name], rel=1e-6)
    net = mean_squared_error(shown["actual"], shown["predicted"]) ** 0.5
    assert net == pytest.approx(r.metrics.loc["rnn", "test_rmse"], rel=1e-6)


def test_window_slider_picks_the_heatmap_window(trained):
    d = trained.result.diagnostics
    slider = trained.views.window_slider
    assert slider.max == len(d.val_states) - 1
    first = trained.views.images["heatmap"].value
    slider.value = 3
    third = trained.views.images["heatmap"].value
    assert third != first
    from rnnkit.notebook._data import window_times
    states = d.window_states(3)
    assert third == render(sized("heatmap", plots.hidden_heatmap, states,
                                 times=window_times(trained.result, 3, len(states)),
                                 caption=trained.views.caption))
    slider.value = 0
    assert trained.views.images["heatmap"].value == first


def test_export_writes_the_controls_config_and_shows_it(trained, tmp_path):
    trained.controls["seed"].value = 7
    trained.controls["clip"].value = 0.0  # 0 turns clipping off
    path = tmp_path / "current.json"
    trained.controls["path"].value = str(path)
    trained.export_button.click()  # quick: runs in the calling thread
    assert trained.status_level == "ok", trained.status.value
    cfg = rnnkit.load_config(path)
    assert cfg == trained.config().replace(features=cfg.features)  # the document names the inputs
    assert cfg.features == ("outdoor_temp_c", "doors_open")
    assert (cfg.seed, cfg.clip, cfg.hidden, cfg.activation) == (7, None, 5, "relu")
    assert json.loads(path.read_text())["config"]["seed"] == 7
    assert "&quot;seed&quot;: 7" in trained.views.document.value
    assert trained.views.tab.selected_index == trained.views.PAGES.index("JSON")


def test_load_sets_every_control(demo, start, tmp_path):
    target = rnnkit.Config(target="load_kw", missing="ffill", window=18, horizon=2, hidden=5,
                           activation="sigmoid", init="glorot", optimizer="rmsprop", lr=2e-3,
                           epochs=7, batch_size=16, clip=None, seed=3, patience=2,
                           features=("outdoor_temp_c",), mode="many-to-many")
    path = tmp_path / "in.json"
    rnnkit.save_config(target, path)
    p = Panel(demo, start)
    p.controls["path"].value = str(path)
    p.load_button.click()
    assert p.status_level == "ok", p.status.value
    c = p.controls
    assert (c["window"].value, c["horizon"].value, c["hidden"].value) == (18, 2, 5)
    assert (c["activation"].value, c["init"].value, c["optimizer"].value) == ("sigmoid", "glorot", "rmsprop")
    assert (c["epochs"].value, c["batch_size"].value, c["clip"].value, c["seed"].value) == (7, 16, 0.0, 3)
    assert c["features"].value == ("outdoor_temp_c",) and c["mode"].value == "many-to-many"
    assert c["missing"].value == "ffill"
    assert p.config() == target  # fields without a control (patience) come from the file too
    # The browser snaps the log slider to its grid; the loaded value survives that.
    c["lr"].value = 10 ** (-5 + 0.05 * round((np.log10(2e-3) + 5) / 0.05))
    assert p.config().lr == 2e-3


def test_bad_settings_show_messages_not_exceptions(demo, start, tmp_path):
    p = Panel(demo, start)
    p.controls["window_full"].value = True  # whole sequences need a sequence id column
    p.train_button.click()
    assert p.status_level == "error" and "group_column" in p.status.value
    assert p._thread is None and not p.train_button.disabled
    p.controls["window_full"].value = False

    p.controls["sweep_windows"].value = "12, twelve"
    p.sweep_button.click()
    assert p.status_level == "error" and "twelve" in p.status.value
    p.controls["sweep_windows"].value = "12"
    p.controls["sweep_lr"].value = "0.01, -1"
    p.sweep_button.click()
    assert p.status_level == "error" and "learning rates" in p.status.value and "-1" in p.status.value

    p.best_button.click()  # no sweep yet: nothing to save, and it says why
    assert p.status_level == "error" and "No sweep winner" in p.status.value

    p.controls["path"].value = str(tmp_path / "missing.json")
    p.load_button.click()
    assert p.status_level == "error" and "missing.json" in p.status.value

    (tmp_path / "broken.json").write_text('{"hidden": -3}')
    p.controls["path"].value = str(tmp_path / "broken.json")
    p.load_button.click()
    assert p.status_level == "error" and "hidden" in p.status.value
    assert p.config() == start  # a failed load changes no control


def test_data_error_in_the_worker_lands_in_the_status(demo, start):
    p = Panel(demo, start)
    p.controls["missing"].value = "error"  # the demo has NaNs in load_kw
    _press(p, p.train_button)
    assert p.status_level == "error"
    assert p.status.value.startswith("<div") and "data cannot be used" in p.status.value
    assert "Traceback" not in p.status.value
    assert p.result is None and not p.train_button.disabled and p.stop_button.disabled
    assert p.progress.bar_style == "danger"


def test_diverged_run_is_reported_and_drawn(demo, start):
    # Plain SGD at lr 1 without clipping, from an identity V scaled by 2: the state
    # doubles every step, so the loss overflows at once. Same shapes and activation
    # as `trained`, so the diagnostics reuse its compiled programs.
    p = Panel(demo, start.replace(recurrent_scale=2.0))
    c = p.controls
    c["optimizer"].value, c["lr"].value, c["init"].value = "sgd", 1.0, "identity"
    c["activation"].value, c["hidden"].value, c["clip"].value = "relu", 5, 0.0
    _press(p, p.train_button)
    assert p.result.status.startswith("diverged at epoch")
    assert p.status_level == "warn" and "diverged" in p.status.value
    assert _png_shape(p.views.images["training"].value)[1] > 300  # the curves mark the epoch


def test_stop_during_training_keeps_the_epochs_done(demo, start):
    p = Panel(demo, start.replace(epochs=50, patience=None, hidden=5, activation="relu"))
    on_epoch = p._on_epoch

    def press_stop_after_first(row):
        on_epoch(row)
        if row["epoch"] == 1:
            p.stop_button.click()

    p._on_epoch = press_stop_after_first
    _press(p, p.train_button)
    assert p.result.status == "stopped by user at epoch 1"
    assert len(p.result.history) == 1
    assert bytes(p.views.images["training"].value).startswith(PNG_MAGIC)


def test_sweep_runs_every_combination_and_exports_the_winner(demo, start, tmp_path):
    p = Panel(demo, start.replace(epochs=2))
    c = p.controls
    c["sweep_windows"].value = "12, 24"
    c["sweep_hidden"].value = "4"
    c["sweep_activations"].value = ("tanh", "relu")
    c["sweep_seeds"].value = 2
    _press(p, p.sweep_button)
    r = p.sweep_result
    assert p.status_level == "ok", p.status.value
    t = r.table
    assert len(t) == 2 * 1 * 2 * 2  # windows x hidden sizes x activations x seeds
    combos = set(zip(t["window"], t["hidden"], t["activation"], t["seed"]))
    assert combos == {(w, 4, a, s) for w in (12, 24) for a in ("tanh", "relu") for s in (0, 1)}
    assert p.progress.value == p.progress.max == 8
    summary = r.summary()
    assert len(summary) == 4 and "seed_spread" in summary.columns
    assert "seed_spread" in p.views.sweep_table.value
    assert p.views.sweep_table.value.count("<tr style='background") == 4  # one row per setting
    assert _png_shape(p.views.images["sweep"].value)[1] > 300
    # Another pair of axes redraws the surface.
    before = p.views.images["sweep"].value
    p.views.sweep_y.value = "activation"
    assert p.views.images["sweep"].value != before
    assert p.views.images["sweep"].value == render(
        sized("sweep", plots.sweep_surface, t, "window", "activation", metric=r.metric,
              caption=f"sweep of 8 runs, ranked by {r.metric}"))
    # The settings table scrolls inside its own box instead of being cut off.
    assert "rnnkit-table-box' style='overflow:auto;max-height:300px" in p.views.sweep_table.value

    path = tmp_path / "best.json"
    c["path"].value = str(path)
    p.best_button.click()  # the explicitly named action
    assert p.status_level == "ok" and "sweep winner" in p.status.value
    best = rnnkit.load_config(path)
    assert best == r.best().replace(features=best.features) and best.features  # inputs written out


def test_stop_during_a_sweep_keeps_finished_runs(demo, start):
    p = Panel(demo, start.replace(epochs=2))
    c = p.controls
    c["sweep_windows"].value = "12, 24"
    c["sweep_hidden"].value = "4, 6"
    c["sweep_activations"].value = ("tanh",)
    c["sweep_seeds"].value = 2
    on_run = p._on_run

    def press_stop_after_first(record):
        on_run(record)
        p.stop_button.click()

    p._on_run = press_stop_after_first
    _press(p, p.sweep_button)
    r = p.sweep_result
    # Serial runs check the stop flag before each new run: one finished, seven never started.
    assert len(r.table) == 1 and r.missing == 7
    assert r.table["status"].iloc[0] == "ok"
    assert p.status_level == "warn" and "1 of 8 runs" in p.status.value
    assert not p.sweep_button.disabled and p.stop_button.disabled


def test_sequence_classification_draws_class_probabilities():
    df = rnnkit.datasets.packaging_line_faults()
    cfg = rnnkit.datasets.suggested_config("packaging_line_faults").replace(
        hidden=4, epochs=2, batch_size=32)
    p = Panel(df, cfg)
    assert p.controls["window_full"].value and p.controls["group_column"].value == "cycle"
    # A RangeIndex carries no time, so the time-column choice is shown.
    assert p.controls["time_column"].layout.display is None
    _press(p, p.train_button)
    assert p.status_level == "ok", p.status.value
    assert "test_accuracy" in p.status.value
    assert _png_shape(p.views.images["forecast"].value)[1] > 300
    assert bytes(p.views.images["heatmap"].value).startswith(PNG_MAGIC)
    from rnnkit.notebook._data import forecast_frame
    shown = forecast_frame(p.result)
    assert set(shown["split"]) == {"test"} and any(str(c).startswith("p_") for c in shown.columns)
    assert isinstance(shown, pd.DataFrame)


# ---------------------------------------------------------------- sliders


def test_sliders_have_a_typed_value_beside_them(demo, start):
    p = Panel(demo, start)
    c = p.controls
    for name in ("window", "hidden", "epochs"):
        assert isinstance(c[name], widgets.IntSlider) and c[name + "_value"].value == c[name].value
        c[name].value = 7
        assert c[name + "_value"].value == 7  # the box follows the slider
        c[name + "_value"].value = 9
        assert c[name].value == 9  # and the slider the box
    # A typed value past the slider's end widens the slider instead of being cut to it.
    c["window_value"].value = 5000
    assert c["window"].value == 5000 and c["window"].max == 5000 and p.config().window == 5000
    assert isinstance(c["lr"], widgets.FloatLogSlider)
    c["lr_value"].value = 0.02
    assert p.config().lr == 0.02
    c["lr"].value = 1e-4
    assert c["lr_value"].value == 1e-4


def test_sweep_ranges_write_the_lists_and_a_typed_list_is_taken(demo, start):
    from rnnkit.notebook._controls import read_space

    p = Panel(demo, start)
    c = p.controls
    c["sweep_windows_range"].value = (10, 40)
    c["sweep_windows_count"].value = 4
    assert c["sweep_windows"].value == "10, 20, 30, 40"  # evenly spaced
    c["sweep_hidden_range"].value = (4, 64)
    c["sweep_hidden_count"].value = 5
    # log-spaced (common practice, no source): 4 x 2^k, as numpy's geomspace gives
    assert c["sweep_hidden"].value == ", ".join(str(int(round(v))) for v in np.geomspace(4, 64, 5))
    assert c["sweep_hidden"].value == "4, 8, 16, 32, 64"
    c["sweep_lr_range"].value = (-4.0, -2.0)
    c["sweep_lr_count"].value = 3
    assert c["sweep_lr"].value == "0.0001, 0.001, 0.01"
    space, seeds, base = read_space(c)
    assert space["window"] == [10, 20, 30, 40] and space["lr"] == [1e-4, 1e-3, 1e-2]
    assert base == {"cell": "elman"}  # the one cell picked is the base's
    # A typed list wins over the sliders; one learning rate is the base's, not a varied field.
    c["sweep_windows"].value = "6, 96"
    c["sweep_lr"].value = "0.003"
    space, seeds, base = read_space(c)
    assert space["window"] == [6, 96] and "lr" not in space and base == {"lr": 0.003, "cell": "elman"}
    # With one learning rate in the grid, it follows the model's learning rate.
    c["sweep_lr_count"].value = 1
    c["lr"].value = 1e-3
    assert c["sweep_lr"].value == "0.001"


def test_a_cell_control_appears_only_when_config_has_the_field(demo, start):
    from rnnkit.notebook._controls import has_field

    p = Panel(demo, start)
    assert ("cell" in p.controls) == ("sweep_cells" in p.controls) == has_field("cell")
    assert has_field("hidden") and not has_field("no_such_field")


# ---------------------------------------------------------------- the first click


def test_gaps_are_said_and_offered_on_the_first_tab(demo, trained):
    # The demo data has gaps and `trained` started from missing="error": the panel chose
    # interpolation, said so when it opened, and the first Train worked.
    assert demo["load_kw"].isna().sum() > 0
    assert trained.result.config.missing == "interpolate"
    assert trained.gaps == {"load_kw": int(demo["load_kw"].isna().sum())}
    settings = trained.widget.children[1].children[0].children[0]  # the settings tabs
    assert settings.selected_index == 0 and settings.titles[0] == "Model"
    first = settings.children[0].children
    assert trained.controls["missing"] in first  # the policy is offered where the user is
    note = next(w for w in first if "rnnkit-gaps" in w._dom_classes)
    assert "missing values (load_kw: " in note.value
    p = Panel(demo.fillna(0.0), rnnkit.Config(target="load_kw"))
    assert p.gaps == {} and p.config().missing == "error" and p.status_level == "info"


# ---------------------------------------------------------------- progressive figures


def test_curve_and_scores_come_first_then_each_slower_page(demo, start):
    p = Panel(demo, start.replace(hidden=5, activation="relu", epochs=2))
    order, surface_note, phases = [], [], []
    for name, img in p.views.images.items():
        img.observe(lambda ch, name=name: order.append(name) if ch["new"] else None, names="value")
    p.views.images["training"].observe(
        lambda ch: surface_note.append(p.views.notes["Surface"].value), names="value")
    bar = []
    p.phase.observe(lambda ch: (phases.append(p.phase_now),
                                bar.append((p.progress.value, p.progress.bar_style))),
                    names="value")
    _press(p, p.train_button)
    assert phases == ["compiling", "training", "figures", None]  # compiling is its own phase
    # ... with its own slot of the bar, in its own colour: not an empty bar while it lasts.
    assert bar[0] == (1, "warning") and p.progress.max == 2 + 1 and p.progress.value == 3
    assert order.index("training") < order.index("gradient") < order.index("surface")
    assert order.index("scores") < order.index("gradient")
    # When the curve appears, the slower pages already say they are computing.
    assert surface_note == [surface_note[0]] and "Computing the loss surface" in surface_note[0]
    # A second run: while it trains the first one's figures are marked as previous, and
    # while the slow pages compute they say so.
    seen = {}

    def at_first_epoch(row):
        seen["classes"] = list(p.views.images["training"]._dom_classes)
        seen["note"] = p.views.notes["Training"].value
        p._on_epoch_original(row)

    def at_curve(change):
        seen.setdefault("surface", p.views.notes["Surface"].value)
        seen.setdefault("surface_classes", list(p.views.images["surface"]._dom_classes))

    p._on_epoch_original, p._on_epoch = p._on_epoch, at_first_epoch
    p.views.images["training"].observe(at_curve, names="value")
    p.controls["epochs"].value = 3  # another curve (the same settings would draw the same PNG)
    _press(p, p.train_button)
    assert "rnnkit-previous" in seen["classes"] and "Previous run" in seen["note"]
    assert "Computing the loss surface" in seen["surface"]
    assert "rnnkit-previous" in seen["surface_classes"]
    for img in p.views.images.values():  # all drawn now: nothing is marked previous
        assert "rnnkit-previous" not in img._dom_classes


def test_an_early_stop_says_why():
    from types import SimpleNamespace

    from rnnkit.notebook._panel import stop_reason

    r = SimpleNamespace(status="stopped early at epoch 9", config=rnnkit.Config(patience=3),
                        best_epoch=6)
    assert stop_reason(r) == ("It stopped early at epoch 9: the validation loss had not improved "
                              "for 3 epochs (patience), so the weights kept are those of epoch 6.")
    assert "1 epoch (" in stop_reason(SimpleNamespace(status=r.status, best_epoch=6,
                                                      config=rnnkit.Config(patience=1)))
    assert stop_reason(SimpleNamespace(status="ok", config=r.config, best_epoch=2)) == ""


# ---------------------------------------------------------------- scrubbing a sweep


def test_sliders_scrub_through_a_finished_sweep_without_training(demo, start, tmp_path,
                                                                monkeypatch):
    p = Panel(demo, start.replace(epochs=2))
    c = p.controls
    c["sweep_windows"].value = "8, 16"
    c["sweep_hidden"].value = "3, 6"
    c["sweep_activations"].value = ("tanh", "relu")
    c["sweep_seeds"].value = 1
    _press(p, p.sweep_button)
    r = p.sweep_result
    assert len(r.table) == 8 and p.browse.value and not p.browse.disabled
    # The winner is on the controls and on every page.
    assert p.shown_run == r.key() and p.result.config == r.result().config
    assert "sweep run" in p.views.caption

    def no_training(*a, **k):
        raise AssertionError("scrubbing must not train")

    monkeypatch.setattr(_panel, "fit", no_training)
    # Move the sliders: off-grid values snap to the grid (hidden on a log scale).
    c["hidden_value"].value = 5  # nearer 6 than 3 on a log scale
    c["window"].value = 9
    c["activation"].value = "relu"
    assert p.wait(WAIT)
    assert (c["hidden"].value, c["window"].value) == (6, 8)
    assert (c["hidden_value"].value, c["window_value"].value) == (6, 8)  # the boxes follow
    row = r.table.query("window == 8 and hidden == 6 and activation == 'relu'").iloc[0]
    assert p.shown_run == row["key"]
    shown = p.result
    assert (shown.config.window, shown.config.hidden, shown.config.activation) == (8, 6, "relu")
    assert shown.metrics.loc["rnn", r.metric] == pytest.approx(row[r.metric], rel=1e-9)
    # Every figure switched to that run: they equal the run's own, with its caption.
    made = p.views.caption
    assert "window 8 · 6 relu units" in made and f"of {len(r.table)}" in made
    assert p.views.images["training"].value == render(
        sized("training", plots.training_curves, shown.history, status=shown.status, caption=made))
    assert p.views.images["spectrum"].value == render(
        sized("spectrum", plots.spectrum, shown.diagnostics.singular_values, caption=made))
    for name in ("forecast", "scores", "gradient", "heatmap", "path", "surface", "slice"):
        assert "rnnkit-previous" not in p.views.images[name]._dom_classes, name

    # Save writes what is on the controls (the run shown); the winner has its own button.
    here, best = tmp_path / "here.json", tmp_path / "best.json"
    c["path"].value = str(here)
    p.export_button.click()
    assert "current settings" in p.status.value
    cfg = rnnkit.load_config(here)
    assert (cfg.window, cfg.hidden, cfg.activation) == (8, 6, "relu")
    c["path"].value = str(best)
    p.best_button.click()
    saved = rnnkit.load_config(best)
    assert saved == r.best().replace(features=saved.features) and saved.features  # inputs written out

    # Unticking the box leaves the figures alone when the sliders move.
    p.browse.value = False
    c["activation"].value = "tanh"
    assert p.wait(WAIT) and p.shown_run == row["key"]


def test_a_stopped_sweep_is_resumed_by_the_next(demo, start):
    p = Panel(demo, start.replace(epochs=2))
    c = p.controls
    c["sweep_windows"].value = "12"
    c["sweep_hidden"].value = "4, 6"
    c["sweep_activations"].value = ("tanh",)
    c["sweep_seeds"].value = 2
    on_run, ran = p._on_run, []

    def stop_after_first(record):
        ran.append(record["key"])
        on_run(record)
        p.stop_button.click()

    p._on_run = stop_after_first
    _press(p, p.sweep_button)
    assert len(p.sweep_result.table) == 1 and "press Sweep again" in p.status.value
    q = Panel(demo, start.replace(epochs=2))  # another panel on the same frame shares the runs
    for k in ("sweep_windows", "sweep_hidden", "sweep_activations", "sweep_seeds"):
        q.controls[k].value = c[k].value
    q_on_run = q._on_run
    q._on_run = lambda record: (ran.append(record["key"]), q_on_run(record))
    _press(q, q.sweep_button)
    assert len(q.sweep_result.table) == 4 and q.sweep_result.missing == 0
    assert len(ran) == len(set(ran)) == 4  # the first run was not run again
    assert "1 kept from before" in q.status.value and q.progress.value == q.progress.max == 4


# ---------------------------------------------------------------- words for classification


def test_classification_pages_use_classification_words():
    df = rnnkit.datasets.packaging_line_faults()
    cfg = rnnkit.datasets.suggested_config("packaging_line_faults").replace(
        hidden=4, epochs=2, batch_size=32)
    p = Panel(df, cfg)
    c = p.controls
    c["sweep_windows"].value = "full"
    c["sweep_hidden"].value = "4"
    c["sweep_activations"].value = ("tanh",)
    c["sweep_seeds"].value = 1
    _press(p, p.sweep_button)
    assert p.status_level == "ok", p.status.value
    assert "1 run" in p.status.value and "1 runs" not in p.status.value
    notes = " ".join(n.value for n in p.views.notes.values())
    for word in ("MASE", "scaled units", "own units", "bound", "sigma^"):
        assert word not in notes, word
    assert "sequences" in p.views.notes["Scores"].value
    assert "sequence" in p.views.notes["States"].value and "window" not in p.views.notes["States"].value
    assert p.views.window_slider.description == "sequence #"
    assert "one step per held-out sequence" in p.views.notes["Forecast"].value
    # One name per tab: the settings' tabs and the result pages share none.
    settings = p.widget.children[1].children[0].children[0]
    assert not set(settings.titles) & set(p.views.PAGES)


# ---------------------------------------------------------------- ending cleanly


@pytest.mark.timeout(600)
def test_a_script_that_exits_while_the_panel_trains_ends_cleanly(tmp_path):
    import subprocess
    import sys
    from pathlib import Path

    script = tmp_path / "exit_early.py"
    # The script's own exit hook is registered before the panel module loads, so it runs
    # after the panel's: it reports whether the training thread was still running then.
    script.write_text(
        "import atexit, time, rnnkit\n"
        "atexit.register(lambda: print('worker alive at exit:', p._thread.is_alive(), flush=True))\n"
        "df = rnnkit.datasets.cold_storage_load().iloc[: 24 * 60]\n"
        "w = rnnkit.panel(df, rnnkit.Config(target='load_kw', window=12, hidden=6, epochs=400,\n"
        "                                   patience=None, batch_size=16))\n"
        "p = w.panel\n"
        "p.train_button.click()\n"
        "while p.progress.value < 2:\n"  # past the compiling slot: inside the training loop
        "    time.sleep(0.05)\n"
        "print('leaving at epoch', p.progress.value, flush=True)\n")
    env = dict(__import__("os").environ)
    env["PYTHONPATH"] = str(Path(__file__).resolve().parents[1])
    proc = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                          timeout=500, env=env)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "leaving at epoch" in proc.stdout
    assert "worker alive at exit: False" in proc.stdout  # stopped and joined, not cut off
    assert "FATAL" not in proc.stderr and "Traceback" not in proc.stderr, proc.stderr[-2000:]


def test_forecast_page_shows_the_future_past_the_end_when_the_target_is_the_only_input():
    import statsmodels.api as sm

    from rnnkit.notebook._panel import Panel

    # statsmodels' Nile series (open data shipped in the package): one column, so
    # forecast() needs no future inputs and the page draws it below the held-out range.
    df = sm.datasets.nile.load_pandas().data[["volume"]]
    p = Panel(df, rnnkit.Config(target="volume", window=8, horizon=4, hidden=4, epochs=2))
    p.train_button.click()
    assert p.wait(WAIT) and p.status_level == "ok"
    future = p.result.forecast()
    assert len(future) == 4 and p.views.images["future"].value
    assert "next 4 steps past the end" in p.views.notes["Forecast"].value
    # With another input column, the page says what a forecast past the end needs instead.
    df2 = df.assign(other=np.arange(len(df), dtype=float))
    q = Panel(df2, rnnkit.Config(target="volume", window=8, hidden=4, epochs=2))
    q.train_button.click()
    assert q.wait(WAIT) and q.status_level == "ok"
    assert not q.views.images["future"].value
    assert "forecast(df=frame)" in q.views.notes["Forecast"].value


def test_backtest_button_fills_the_backtest_page_with_verdicts_and_fold_bars():
    import statsmodels.api as sm

    from rnnkit.notebook._panel import Panel

    # statsmodels' Nile series (open data shipped in the package)
    df = sm.datasets.nile.load_pandas().data[["volume"]]
    p = Panel(df, rnnkit.Config(target="volume", window=6, hidden=3, epochs=2))
    p.folds.value = 3
    p.backtest_button.click()
    assert p.wait(WAIT) and p.status_level == "ok", p.status.value
    r = p.backtest_result
    assert r is not None and r.metrics.index.get_level_values(0).nunique() == 3  # three folds
    (box,) = p.views.backtest_box.children
    assert box.figure.value and "rnnkit-fig-backtest" in box.figure._dom_classes
    for v in r.comparison["verdict"]:
        assert html.escape(v) in box.verdicts.value
    assert p.views.tab.selected_index == p.views.PAGES.index("Backtest")
    assert r.comparison["verdict"].iloc[0] in p.status.value
