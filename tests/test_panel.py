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
import numpy as np
import pandas as pd
import pytest

import rnnkit
from rnnkit import plots
from rnnkit.notebook._panel import Panel
from rnnkit.notebook._views import render, sized

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


def _press(p: Panel, button: widgets.Button) -> None:
    button.click()
    assert p.wait(WAIT), "the panel's background job did not finish"


@pytest.fixture(scope="module")
def trained(demo, start):
    """One panel, trained once through its controls (shared by the read-only checks)."""
    p = Panel(demo, start)
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
    assert im["training"].value == render(sized("training", plots.training_curves, r.history,
                                                status=r.status))
    d = r.diagnostics
    assert im["spectrum"].value == render(sized("spectrum", plots.spectrum, d.singular_values))
    assert im["path"].value == render(sized("path", plots.hidden_path, d.val_states,
                                            times=d.val_times))
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
                                 times=window_times(trained.result, 3, len(states))))
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
        sized("sweep", plots.sweep_surface, t, "window", "activation", metric=r.metric))

    path = tmp_path / "best.json"
    c["path"].value = str(path)
    p.export_button.click()
    assert p.status_level == "ok" and "best sweep run" in p.status.value
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
