"""fit(): learning, divergence, early stopping, metrics against baselines, predict, save/load."""
import json

import numpy as np
import pandas as pd
import pytest

import rnnkit
from rnnkit import Config, DataError, fit, load_fit, prepare
from rnnkit.data import _predict
from rnnkit.evaluation._baselines import prepared_mase_scale
from rnnkit.evaluation._metrics import classification_metrics, regression_metrics
from rnnkit.recurrent._model import loss as model_loss
from tolerances import EXACT32, METRIC

# Every sine fit shares these sizes (and adam with clipping), so one compiled epoch program
# serves them all; activation, learning rate, seed and scale are data.
SINE = dict(target="y", window=20, hidden=16, batch_size=64, season=None, lr=1e-2)


def noisy_sine(n=600, noise=0.1, seed=0, period=25):
    """A sine with period 25 plus Gaussian noise (invented data for a known answer:
    common practice, no source)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    y = np.sin(2 * np.pi * t / period) + noise * rng.standard_normal(n)
    return pd.DataFrame({"y": y}, index=pd.RangeIndex(1000, 1000 + n, name="step"))


@pytest.fixture(scope="module")
def sine():
    return noisy_sine()


@pytest.fixture(scope="module")
def trained(sine):
    return fit(sine, Config(**SINE, epochs=40, patience=5), progress=False)


def test_noisy_sine_is_learned(sine, trained):
    r = trained
    assert r.status == "ok" or r.status.startswith("stopped early")
    assert list(r.history.columns) == ["epoch", "train_loss", "val_loss", "grad_norm", "lr", "seconds"]
    assert list(r.metrics.index) == ["rnn", "persistence", "linear_ar"]  # season None: no seasonal naive
    assert list(r.metrics.columns[:8]) == [f"{s}_{m}" for s in ("val", "test")
                                           for m in ("mae", "rmse", "mase", "r2")]
    # then the test part's prediction intervals per coverage level (0.8, 0.95 by default)
    assert list(r.metrics.columns[8:]) == [f"test_{m}_{lv}" for lv in ("80", "95")
                                           for m in ("coverage", "width", "interval_score")]
    assert np.isfinite(r.metrics.to_numpy()).all()
    # A well-trained network forecasts a noisy sine one step ahead far better than the
    # series' own spread (noise sd 0.1 against sd 0.71): common practice, no source.
    assert r.metrics.loc["rnn", "test_rmse"] < 0.2 * sine["y"].std()
    assert r.metrics.loc["rnn", "test_rmse"] < r.metrics.loc["persistence", "test_rmse"]
    assert r.config.target == "y" and r.config.season is None  # resolved config


def test_huge_learning_rate_diverges_without_exception(sine):
    # Linear states with adam at lr 10: the recurrent matrix jumps far past norm 1 in the
    # first steps and the states overflow (Pascanu, Mikolov & Bengio 2013, exploding case).
    r = fit(sine, Config(**{**SINE, "lr": 10.0}, activation="linear", epochs=5), progress=False)
    assert r.status.startswith("diverged at epoch ")
    epoch = int(r.status.rsplit(" ", 1)[1])
    assert epoch == len(r.history) and 1 <= epoch <= 5
    assert r.best_epoch < epoch
    assert all(np.isfinite(v).all() for v in r.params.values())  # the best finite params are kept
    assert r.metrics.shape[0] >= 2  # scored, NaN or not, no exception


def test_early_stopping_restores_best_epoch(sine):
    r = fit(sine, Config(**{**SINE, "lr": 5e-2}, epochs=60, patience=3), progress=False)
    assert r.status.startswith("stopped early at epoch ")
    stopped = int(r.status.rsplit(" ", 1)[1])
    h = r.history
    assert stopped == len(h) and stopped - r.best_epoch == 3
    assert r.best_epoch == int(h.epoch[h.val_loss.idxmin()])
    # The returned parameters are the best epoch's: their validation loss, recomputed here
    # over every validation window, is that epoch's recorded one.
    p = r.prepared
    x, y, mask = p.windows("val")
    again = float(model_loss(r.params, x, y, activation="tanh", mode="many-to-one", mask=mask))
    np.testing.assert_allclose(again, h.val_loss.min(), **EXACT32)


def test_predict_on_training_frame(sine, trained):
    pred = trained.predict()
    assert pred.index.equals(sine.index) and pred.index.name == "step"
    np.testing.assert_array_equal(pred["actual"].to_numpy(), sine["y"].to_numpy())
    assert list(pred.columns) == ["actual", "predicted", "split"]
    p = trained.prepared
    # The first window + horizon - 1 rows are no window's target.
    assert pred["predicted"].iloc[:20].isna().all() and pred["split"].iloc[:20].isna().all()
    for split in ("train", "val", "test"):
        assert (pred["split"] == split).sum() == len(p.starts[split])
    assert np.isfinite(pred.loc[pred["split"].notna(), "predicted"]).all()


def test_rnn_metrics_equal_metrics_of_predict_columns(trained):
    pred = trained.predict()
    scale = prepared_mase_scale(trained.prepared)
    for split in ("val", "test"):
        part = pred[pred["split"] == split]
        m = regression_metrics(part["actual"].to_numpy()[:, None], part["predicted"].to_numpy()[:, None],
                               scale=scale)
        for k, v in m.items():
            np.testing.assert_allclose(trained.metrics.loc["rnn", f"{split}_{k}"], v, **METRIC)


def test_predict_on_new_frame_uses_fitted_scaler(sine, trained):
    part = sine.iloc[150:330]  # its own mean and spread differ from the training part's
    new = trained.predict(part)
    assert new.index.equals(part.index) and set(new["split"].dropna()) == {"new"}
    assert new["predicted"].notna().sum() == len(part) - 20  # every window of the frame
    old = trained.predict()
    rows = new["predicted"].notna()
    # Same rows, same windows: equal predictions only if the FITTED scaler was used (never refit).
    np.testing.assert_allclose(new.loc[rows, "predicted"], old.loc[new.index[rows], "predicted"],
                               **EXACT32)
    np.testing.assert_array_equal(new["actual"], part["y"])
    # a new frame lacking an input column is refused with the column named
    with pytest.raises(DataError, match="'y'"):
        trained.predict(part.rename(columns={"y": "z"}))


def test_save_load_roundtrip(tmp_path, sine, trained):
    path = tmp_path / "model"
    trained.save(path)
    doc = json.loads((path / "config.json").read_text())
    assert doc["format"] == "rnnkit-fit" and doc["version"] == 2  # 2: horizon = leads 1..H
    with np.load(path / "weights.npz", allow_pickle=False) as z:
        assert sorted(z.files) == ["U", "V", "W", "b", "c"]
    loaded = load_fit(path)
    assert loaded.status == trained.status and loaded.config == trained.config
    pd.testing.assert_frame_equal(loaded.history, trained.history)
    pd.testing.assert_frame_equal(loaded.metrics, trained.metrics)
    part = sine.iloc[200:400]
    pd.testing.assert_frame_equal(loaded.predict(part), trained.predict(part))
    np.testing.assert_array_equal(loaded.diagnostics.gradient_through_time,
                                  trained.diagnostics.gradient_through_time)
    with pytest.raises(ValueError, match="loaded without its training frame"):
        loaded.predict()
    # with the training frame attached, predict() and the surfaces work as before
    attached = load_fit(path, df=sine)
    pd.testing.assert_frame_equal(attached.predict(), trained.predict())
    # saving again over an rnnkit folder replaces it; nothing is left beside it
    trained.save(path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model"]


def test_save_refuses_foreign_folder(tmp_path, trained):
    (tmp_path / "notes").mkdir()
    (tmp_path / "notes" / "todo.txt").write_text("mine")
    with pytest.raises(ValueError, match="refusing to overwrite"):
        trained.save(tmp_path / "notes")
    assert (tmp_path / "notes" / "todo.txt").read_text() == "mine"
    with pytest.raises(ValueError, match="not an rnnkit fit folder"):
        load_fit(tmp_path / "notes")


def test_load_with_other_frame_is_refused(tmp_path, sine, trained):
    trained.save(tmp_path / "m")
    with pytest.raises(DataError, match="not the frame this fit was trained on"):
        load_fit(tmp_path / "m", df=sine * 2.0)


def test_config_arguments(sine):
    with pytest.raises(TypeError, match="`config` must be an rnnkit.Config"):
        fit(sine, "window=3")
    with pytest.raises(ValueError, match="unknown config field"):
        fit(sine, {"windw": 3})


def test_figures(trained):
    figs = trained.figures()
    assert {"training", "metrics", "forecast", "gradient_flow", "spectrum", "hidden_states"} <= set(figs)
    assert all(hasattr(f, "savefig") for f in figs.values())


def test_public_names():
    assert rnnkit.fit is fit and rnnkit.load_fit is load_fit
    assert rnnkit.FitResult.__name__ == "FitResult"


def test_many_to_many_predict_keeps_window_ending_there(sine):
    r = fit(sine, Config(**{**SINE, "window": 6}, mode="many-to-many", epochs=2, patience=None),
            progress=False)
    p = r.prepared
    pred = r.predict()
    out = r._split_outputs("val")  # (N, T, 1) predictions of every val window and step
    rows = p.target_rows("val")  # (N, T)
    # a row that is the last target of a window shows that window's last step
    for n in (0, 5, len(rows) - 1):
        assert pred["predicted"].iloc[rows[n, -1]] == out[n, -1, 0]
    # the first rows of the part, which no window ends at, show the first window
    assert pred["predicted"].iloc[rows[0, 0]] == out[0, 0, 0]
    assert np.isfinite(r.metrics.loc["rnn"]).all()


def test_classification_metrics_match_predict(sine):
    # Label the phase of the sine (rising/falling) from the noisy value: an invented task.
    df = sine.assign(rising=np.where(np.gradient(np.sin(2 * np.pi * np.arange(600) / 25)) > 0,
                                     "up", "down"))
    r = fit(df, Config(**{**SINE, "target": "rising"}, features=("y",), task="classification",
                       epochs=3, patience=None), progress=False)
    assert list(r.metrics.index) == ["rnn", "majority", "last_label"]
    pred = r.predict()
    assert [c for c in pred.columns if c.startswith("p_")] == ["p_down", "p_up"]
    for split in ("val", "test"):
        part = pred[pred["split"] == split]
        codes = np.searchsorted(r.spec.classes, part["actual"].to_numpy().astype(str))
        m = classification_metrics(codes, part[["p_down", "p_up"]].to_numpy())
        for k, v in m.items():
            np.testing.assert_allclose(r.metrics.loc["rnn", f"{split}_{k}"], v, **METRIC)
        assert int(r.confusion[split].to_numpy().sum()) == len(part)
        assert (part["predicted"] == np.where(part["p_up"] > part["p_down"], "up", "down")).all()


def test_stop_and_on_epoch(sine):
    import threading

    stop, seen = threading.Event(), []
    stop.set()  # checked after every epoch
    r = fit(sine, Config(**SINE, epochs=5), progress=False, stop=stop, on_epoch=seen.append)
    assert r.status == "stopped by user at epoch 1"
    assert [row["epoch"] for row in seen] == [1] and len(r.history) == 1


def _groups_frame():
    rng = np.random.default_rng(1)
    return pd.DataFrame({"g": np.repeat(["s1", "s2", "s3", "s4"], 30),
                         "a": rng.normal(size=120), "b": rng.normal(size=120) * 5 + 3,
                         "x": rng.normal(size=120)})


def test_prediction_frame_several_targets_and_groups():
    # The frame layout alone (no training): predictions set to actual + 1 on every target row.
    from rnnkit.data._predict import frame_actuals, prediction_frame, spec_of

    df = _groups_frame()
    p = prepare(df, Config(target=("a", "b"), group_column="g", window=3, season=None,
                           split=(0.5, 0.25, 0.25)))
    actual = frame_actuals(df, p)
    np.testing.assert_array_equal(actual, df[["a", "b"]].to_numpy())
    parts = {s: (p.target_rows(s), actual[p.target_rows(s)] + 1.0) for s in ("train", "val", "test")}
    pred = prediction_frame(p, spec_of(p, df.index.name), actual, parts)
    assert list(pred.columns) == ["g", "a_actual", "b_actual", "a_predicted", "b_predicted", "split"]
    assert pred.index.equals(df.index) and (pred["g"] == df["g"]).all()
    done = pred["split"].notna()
    np.testing.assert_allclose(pred.loc[done, "b_predicted"] - pred.loc[done, "b_actual"], 1.0)
    assert set(pred["split"].dropna()) == {"train", "val", "test"}
    # every sequence starts with window + horizon - 1 = 3 rows that no window predicts
    assert pred.groupby("g")["a_predicted"].apply(lambda s: s.iloc[:3].isna().all()).all()


def test_prediction_frame_whole_sequence_regression():
    from rnnkit.data._predict import frame_actuals, prediction_frame, spec_of

    df = _groups_frame()
    p = prepare(df, Config(target="a", group_column="g", window="full", season=None,
                           target_as_input=False, split=(0.5, 0.25, 0.25)))
    actual = frame_actuals(df, p)
    parts = {s: (p.target_rows(s), actual[p.target_rows(s)] * 2) for s in ("train", "val", "test")}
    pred = prediction_frame(p, spec_of(p), actual, parts)
    assert pred.index.name == "g" and sorted(pred.index) == ["s1", "s2", "s3", "s4"]
    assert list(pred.columns) == ["actual", "predicted", "split"]
    last = df.groupby("g")["a"].last()
    np.testing.assert_array_equal(pred["actual"], last[pred.index])
    np.testing.assert_array_equal(pred["predicted"], 2 * last[pred.index])


def test_class_labels_that_print_alike_get_their_own_probability_columns():
    # An object column holding both the number 1 and the text "1": two classes.
    rng = np.random.default_rng(0)
    labels = np.array([1, "1"], dtype=object)[rng.integers(0, 2, 300)]
    df = pd.DataFrame({"x": rng.standard_normal(300), "label": labels})
    cfg = Config(target="label", task="classification", window=4, hidden=4, epochs=1, season=None)
    pred = rnnkit.fit(df, cfg, progress=False).predict()
    prob = [c for c in pred.columns if str(c).startswith("p_")]
    assert sorted(prob) == ["p_'1'", "p_1"]
    rows = pred[prob].dropna()
    assert len(rows) and np.allclose(rows.sum(axis=1), 1.0)
    assert _predict.prob_columns(["a", "b"]) == ["p_a", "p_b"]  # the usual names otherwise
