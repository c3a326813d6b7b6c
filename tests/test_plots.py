"""Figure builders: each returns a Figure, draws exactly the data given, draws
into a given Axes, refuses bad shapes, and renders without warnings."""
import io
import threading

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402
from matplotlib.collections import PolyCollection, QuadMesh  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Rectangle  # noqa: E402

from rnnkit import plots  # noqa: E402

from tolerances import EXACT64  # noqa: E402

RNG = np.random.default_rng(0)


# ------------------------------------------------------------------ inputs

def _history(n=12):
    return pd.DataFrame({"epoch": np.arange(1, n + 1),
                         "train_loss": np.geomspace(1.0, 0.05, n),
                         "val_loss": np.r_[np.geomspace(1.2, 0.1, n - 3), [0.12, 0.13, 0.15]],
                         "grad_norm": np.linspace(2.0, 0.5, n)})


def _pred(n=60):
    time = pd.date_range("2024-03-01", periods=n, freq="h", name="time")
    actual = np.sin(np.arange(n) / 4.0) * 10 + 50
    return pd.DataFrame({"actual": actual, "predicted": actual + RNG.normal(0, 1, n)}, index=time)


def _class_pred(n=40, classes=("normal", "belt_slip", "bearing_wear")):
    p = RNG.dirichlet(np.ones(len(classes)), size=n)  # (n, K)
    frame = pd.DataFrame({"actual": np.array(classes)[RNG.integers(0, len(classes), n)],
                          "predicted": np.array(classes)[p.argmax(axis=1)]})
    for k, c in enumerate(classes):
        frame[f"p_{c}"] = p[:, k]
    return frame


def _sweep_table():
    rows = []
    for window in (12, 24, 48):
        for hidden in (8, 32):
            for seed in range(3):
                value = 1.0 + window / 100 + hidden / 1000 + 0.01 * seed
                rows.append(dict(window=window, hidden=hidden, seed=seed, activation="tanh",
                                 val_rmse=value, status="ok"))
    table = pd.DataFrame(rows)
    dead = (table["window"] == 48) & (table["hidden"] == 32)
    table.loc[dead, "status"] = "diverged at epoch 3"
    table.loc[dead, "val_rmse"] = np.nan
    # One diverged run in an otherwise healthy cell must not count in its mean.
    table.loc[(table["window"] == 12) & (table["hidden"] == 8) & (table["seed"] == 2),
              ["status", "val_rmse"]] = ["diverged at epoch 9", 1e6]
    return table


def _metrics():
    return pd.DataFrame({"test_rmse": [9.6, 17.1, 38.5, 11.5], "test_mae": [7.0, 12.0, 30.0, 8.0]},
                        index=["rnn", "persistence", "seasonal_naive", "linear_ar"])


def _future():
    """Known values and a forecast frame laid out as FitResult.forecast() returns it."""
    past = pd.Series(np.linspace(10, 20, 30), index=pd.date_range("2024-01-01", periods=30, freq="D"),
                     name="load")
    idx = pd.date_range("2024-01-31", periods=5, freq="D")
    point = np.full(5, 20.0)
    spread = np.arange(1.0, 6.0)
    fut = pd.DataFrame({"lead": np.arange(1, 6), "forecast": point, "lower_80": point - spread,
                        "upper_80": point + spread, "lower_95": point - 2 * spread,
                        "upper_95": point + 2 * spread}, index=idx)
    return past, fut


ALPHAS = np.linspace(-1, 1, 11)
BETAS = np.linspace(-0.5, 0.5, 7)
SURFACE = 0.2 + np.add.outer(BETAS ** 2, ALPHAS ** 2) * 3  # (B, A)
STATES = np.tanh(np.cumsum(RNG.normal(0, 0.3, (50, 6)), axis=0))  # (T, H)

# Every builder with a valid input, for the common checks.
CALLS = {
    "training_curves": lambda ax=None: plots.training_curves(_history(), status="ok", ax=ax),
    "forecast": lambda ax=None: plots.forecast(_pred(), ax=ax),
    "class_forecast": lambda ax=None: plots.class_forecast(_class_pred(), ax=ax),
    "gradient_flow": lambda ax=None: plots.gradient_flow(np.geomspace(1e-4, 1, 20), sigma_max=0.8, ax=ax),
    "hidden_heatmap": lambda ax=None: plots.hidden_heatmap(STATES, ax=ax),
    "hidden_path": lambda ax=None: plots.hidden_path(STATES, ax=ax),
    "loss_surface": lambda ax=None: plots.loss_surface(ALPHAS, BETAS, SURFACE, ax=ax),
    "loss_slice": lambda ax=None: plots.loss_slice(ALPHAS, 0.1 + ALPHAS ** 2, ax=ax),
    "sweep_surface": lambda ax=None: plots.sweep_surface(_sweep_table(), "window", "hidden", ax=ax),
    "spectrum": lambda ax=None: plots.spectrum([1.3, 0.9, 0.2], ax=ax),
    "metrics_bar": lambda ax=None: plots.metrics_bar(_metrics(), column="test_rmse", ax=ax),
    "backtest_folds": lambda ax=None: plots.backtest_folds(
        pd.DataFrame({"rnn": [1.0, 2.0], "persistence": [1.5, 1.2]}, index=[1, 2]), column="test_rmse", ax=ax),
    "fan_chart": lambda ax=None: plots.fan_chart(_future()[0], _future()[1], ax=ax),
}


def _only_axes(fig):
    return fig.axes[0]


# ------------------------------------------------------------------ common behaviour

def test_every_public_builder_is_covered():
    assert set(CALLS) == set(plots.__all__)


@pytest.mark.parametrize("name", sorted(CALLS))
def test_builder_returns_a_figure_that_renders(name):
    fig = CALLS[name]()
    assert isinstance(fig, Figure)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=50)  # draws everything; warnings are errors
    assert buf.getvalue()[:4] == b"\x89PNG"


@pytest.mark.parametrize("name", sorted(CALLS))
def test_builder_draws_into_a_given_axes(name):
    fig = Figure()
    left, right = fig.subplots(1, 2)
    assert CALLS[name](ax=right) is fig
    assert right.has_data() and not left.has_data()
    with pytest.raises(TypeError, match="ax"):
        CALLS[name](ax="not an axes")


def test_builders_do_not_touch_pyplot_and_run_in_a_thread():
    import matplotlib.pyplot as plt
    before = plt.get_fignums()
    made = []
    threads = [threading.Thread(target=lambda n=n: made.append(CALLS[n]())) for n in sorted(CALLS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(made) == len(CALLS) and all(isinstance(f, Figure) for f in made)
    assert plt.get_fignums() == before  # nothing registered with pyplot


# ------------------------------------------------------------------ training curves

def test_training_curves_draws_the_losses_and_best_epoch():
    h = _history()
    ax = _only_axes(plots.training_curves(h))
    lines = {l.get_label(): l for l in ax.get_lines()}
    np.testing.assert_array_equal(lines["training loss"].get_ydata(), h["train_loss"])
    np.testing.assert_array_equal(lines["validation loss"].get_xdata(), h["epoch"])
    np.testing.assert_array_equal(lines["validation loss"].get_ydata(), h["val_loss"])
    best = int(np.argmin(h["val_loss"]))
    star = lines[f"best epoch {best + 1}"]
    assert list(star.get_xdata()) == [h["epoch"][best]]
    assert ax.get_yscale() == "log"


def test_training_curves_marks_divergence_and_keeps_gaps():
    h = _history()
    h.loc[8:, "train_loss"] = np.inf
    h.loc[8:, "val_loss"] = np.nan
    fig = plots.training_curves(h, status="diverged at epoch 9")
    ax = fig.axes[0]
    marker = [l for l in ax.get_lines() if l.get_label() == "diverged at epoch 9"]
    assert len(marker) == 1 and list(marker[0].get_xdata()) == [9, 9]
    train = [l for l in ax.get_lines() if l.get_label() == "training loss"][0].get_ydata()
    assert np.isnan(train[8:]).all()  # inf drawn as a gap
    assert "diverged at epoch 9" in ax.get_title(loc="left")


def test_training_curves_linear_when_losses_not_positive_and_refuses_bad_input():
    h = _history().drop(columns="grad_norm")
    h["train_loss"] -= 0.5  # e.g. a shifted objective
    assert _only_axes(plots.training_curves(h)).get_yscale() == "linear"
    with pytest.raises(ValueError, match="val_loss"):
        plots.training_curves(h.drop(columns="val_loss"))
    with pytest.raises(TypeError, match="history"):
        plots.training_curves(h.to_numpy())
    with pytest.raises(ValueError, match="history"):
        plots.training_curves(h.iloc[:0])
    with pytest.raises(TypeError, match="status"):
        plots.training_curves(h, status=3)


# ------------------------------------------------------------------ forecasts

def test_forecast_draws_actual_predicted_and_baseline():
    pred = _pred()
    baseline = pred["actual"].shift(1).rename("persistence")
    ax = _only_axes(plots.forecast(pred, baseline=baseline))
    lines = {l.get_label(): l for l in ax.get_lines()}
    np.testing.assert_array_equal(lines["actual"].get_ydata(), pred["actual"])
    np.testing.assert_array_equal(lines["predicted"].get_ydata(), pred["predicted"])
    np.testing.assert_array_equal(lines["persistence"].get_ydata(), baseline)
    np.testing.assert_array_equal(lines["actual"].get_xdata(), pred.index.to_numpy())
    # A baseline on part of the index is aligned by label, the rest left as a gap.
    part = baseline.iloc[10:20]
    ax = _only_axes(plots.forecast(pred, baseline=part, baseline_name="last value"))
    drawn = [l for l in ax.get_lines() if l.get_label() == "last value"][0].get_ydata()
    np.testing.assert_array_equal(drawn[10:20], part)
    assert np.isnan(drawn[:10]).all() and np.isnan(drawn[20:]).all()


def test_forecast_of_several_targets_draws_the_first_and_says_so():
    pred = _pred()
    multi = pd.DataFrame({"load_actual": pred["actual"], "temp_actual": pred["actual"] / 10,
                          "load_predicted": pred["predicted"], "temp_predicted": pred["predicted"] / 10})
    ax = _only_axes(plots.forecast(multi))
    assert "first of 2 targets" in ax.get_title(loc="left") and "load" in ax.get_title(loc="left")
    np.testing.assert_array_equal(ax.get_lines()[0].get_ydata(), pred["actual"])


def test_forecast_shades_the_held_out_parts():
    pred = _pred()
    pred["split"] = [None] * 5 + ["train"] * 35 + ["val"] * 10 + ["test"] * 10
    ax = _only_axes(plots.forecast(pred))
    assert len([p for p in ax.patches if isinstance(p, Rectangle)]) == 2
    # Sequences spread over the parts: one band per run of rows.
    pred["split"] = (["train"] * 10 + ["test"] * 10 + ["val"] * 10) * 2
    ax = _only_axes(plots.forecast(pred))
    assert len([p for p in ax.patches if isinstance(p, Rectangle)]) == 4
    assert {"val", "test"} <= {t.get_text() for t in ax.texts}


def test_forecast_refuses_bad_input():
    pred = _pred()
    with pytest.raises(ValueError, match="actual"):
        plots.forecast(pred.rename(columns={"actual": "y"}))
    with pytest.raises(TypeError, match="pred"):
        plots.forecast(pred["actual"])
    with pytest.raises(ValueError, match="class_forecast"):
        plots.forecast(_class_pred())
    with pytest.raises(ValueError, match="baseline"):
        plots.forecast(pred, baseline=np.zeros(5))
    with pytest.raises(ValueError, match="baseline"):
        plots.forecast(pred, baseline=pd.Series([1.0, 2.0], index=[-1, -2]))


def test_class_forecast_stacks_probabilities_and_draws_strips():
    pred = _class_pred()
    ax = _only_axes(plots.class_forecast(pred))
    stacks = [c for c in ax.collections if isinstance(c, PolyCollection)]
    assert len(stacks) == 3
    # The top of the stack is 1 everywhere (probabilities sum to one).
    top = stacks[-1].get_paths()[0].vertices[:, 1]
    np.testing.assert_allclose(top.max(), 1.0, **EXACT64)
    # Steps, not ramps: each probability holds flat over its own target, so the top edge of
    # the first class's area takes exactly the class's probabilities as its levels.
    first = stacks[0].get_paths()[0].vertices
    levels = np.unique(np.round(first[:, 1], 12))
    expected = np.unique(np.round(np.r_[0.0, pred.filter(like="p_").iloc[:, 0]], 12))
    np.testing.assert_array_equal(levels, expected)
    xs = first[:, 0]
    assert len(np.unique(np.round(xs, 9))) == len(pred) + 1  # one cell per target, edge to edge
    strips = [c for c in ax.collections if isinstance(c, QuadMesh)]
    assert len(strips) == 2
    codes = {"normal": 0, "belt_slip": 1, "bearing_wear": 2}
    np.testing.assert_array_equal(np.ravel(strips[0].get_array()), pred["actual"].map(codes))
    np.testing.assert_array_equal(np.ravel(strips[1].get_array()), pred["predicted"].map(codes))


def test_class_forecast_leaves_unknown_labels_blank_and_refuses_bad_input():
    pred = _class_pred(10)
    pred.loc[3, "actual"] = np.nan
    # Rows before the first full window have no prediction (as FitResult.predict gives them).
    pred.loc[:1, "predicted"] = None
    pred.loc[:1, [c for c in pred.columns if c.startswith("p_")]] = np.nan
    fig = plots.class_forecast(pred)
    fig.savefig(io.BytesIO(), format="png", dpi=40)
    actual_strip, predicted_strip = [c.get_array() for c in fig.axes[0].collections
                                     if isinstance(c, QuadMesh)]
    assert np.ma.getmaskarray(actual_strip).ravel().tolist() == [False] * 3 + [True] + [False] * 6
    assert np.ma.getmaskarray(predicted_strip).ravel().tolist() == [True] * 2 + [False] * 8
    with pytest.raises(ValueError, match="p_<class>"):
        plots.class_forecast(pred[["actual", "predicted", "p_normal"]])
    bad = pred.copy()
    bad["p_normal"] = bad["p_normal"] * 5
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        plots.class_forecast(bad)


# ------------------------------------------------------------------ comparisons

def test_sweep_surface_cells_are_means_over_healthy_runs():
    table = _sweep_table()
    ax = plots.sweep_surface(table, "window", "hidden").axes[0]
    drawn = ax.images[0].get_array()  # (hidden values, window values)
    # pandas' pivot_table is the reference for the mean over seeds.
    healthy = table[~table["status"].str.startswith("diverged")]
    ref = healthy.pivot_table(index="hidden", columns="window", values="val_rmse", aggfunc="mean")
    ref = ref.reindex(index=[8, 32], columns=[12, 24, 48])
    np.testing.assert_allclose(drawn.filled(np.nan), ref.to_numpy(), equal_nan=True, **EXACT64)
    assert drawn.mask[1, 2]  # all runs diverged there
    hatched = [p for p in ax.patches if p.get_hatch()]
    assert len(hatched) == 1 and hatched[0].get_xy() == (1.5, 0.5)
    best = [p for p in ax.patches if p.get_label() == "best"]
    i, j = np.unravel_index(np.nanargmin(ref.to_numpy()), ref.shape)
    assert len(best) == 1 and best[0].get_xy() == (j - 0.5, i - 0.5)
    texts = {t.get_text() for t in ax.texts}
    assert f"{ref.to_numpy()[0, 0]:.3g}" in texts and "diverged" in texts


def test_sweep_surface_higher_is_better_for_accuracy_and_mixed_labels():
    table = pd.DataFrame({"window": [12, 12, "full", "full"], "activation": ["tanh", "relu"] * 2,
                          "val_accuracy": [0.7, 0.8, 0.9, 0.6]})
    ax = plots.sweep_surface(table, "window", "activation", metric="val_accuracy").axes[0]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["12", "full"]
    best = [p for p in ax.patches if p.get_label() == "best"][0]
    assert best.get_xy() == (0.5, 0.5)  # column "full" (1), row "tanh" (1 of relu, tanh)
    assert "higher is better" in ax.get_title(loc="left")


def test_sweep_surface_refuses_bad_input():
    table = _sweep_table()
    with pytest.raises(ValueError, match="depth"):
        plots.sweep_surface(table, "depth", "hidden")
    with pytest.raises(ValueError, match="two different"):
        plots.sweep_surface(table, "hidden", "hidden")
    with pytest.raises(ValueError, match="val_mae"):
        plots.sweep_surface(table, "window", "hidden", metric="val_mae")
    with pytest.raises(ValueError, match="numbers"):
        plots.sweep_surface(table, "window", "hidden", metric="status")


def test_metrics_bar_one_bar_per_model_rnn_highlighted():
    m = _metrics()
    m.loc["persistence", "test_rmse"] = np.nan
    ax = plots.metrics_bar(m, column="test_rmse").axes[0]
    bars = ax.patches
    finite = m["test_rmse"].dropna()
    np.testing.assert_array_equal([b.get_width() for b in bars], finite)
    colours = [b.get_facecolor() for b in bars]
    assert colours[0] != colours[1] and colours[1] == colours[2]  # rnn stands out
    assert [t.get_text() for t in ax.get_yticklabels()] == list(m.index)
    texts = [t.get_text() for t in ax.texts]
    assert "n/a" in texts and any(t.endswith("best") and t.startswith("9.6") for t in texts)
    with pytest.raises(ValueError, match="test_r2"):
        plots.metrics_bar(m, column="test_r2")
    with pytest.raises(TypeError, match="column"):
        plots.metrics_bar(m, column=3)
