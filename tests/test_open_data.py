"""fit() end to end on open data sets shipped in packages: statsmodels' sunspots, aeon's BasicMotions."""
import numpy as np
import pandas as pd
import pytest

from rnnkit import Config, fit
from rnnkit.evaluation._metrics import classification_metrics


def test_sunspots_end_to_end():
    # Open data set: statsmodels.api.datasets.sunspots, yearly SUNACTIVITY 1700-2008 (309 rows).
    sm = pytest.importorskip("statsmodels.api")
    df = sm.datasets.sunspots.load_pandas().data
    cfg = Config(target="SUNACTIVITY", time_column="YEAR", window=12, hidden=16, epochs=60,
                 lr=1e-2, batch_size=32, patience=10, seed=0)
    r = fit(df, cfg, progress=False)
    m = r.metrics
    assert list(m.index) == ["rnn", "persistence", "linear_ar"]  # yearly numbers: no season
    assert np.isfinite(m.to_numpy()).all()
    # Observed here (test RMSE, sunspot number units): rnn 15.4 (seed 0; 15.4 to 18.6 over
    # seeds 0-4), persistence 31.3, linear AR on the same 12-year windows 18.6. Only the robust
    # fact is asserted: the network beats persistence (by far, at every seed tried).
    assert m.loc["rnn", "test_rmse"] < m.loc["persistence", "test_rmse"]
    pred = r.predict()
    np.testing.assert_array_equal(pred.index.to_numpy(), df["YEAR"].to_numpy())
    np.testing.assert_array_equal(pred["actual"].to_numpy(), df["SUNACTIVITY"].to_numpy())


def basic_motions_frame():
    """BasicMotions (aeon) as one long frame: id, step, six channels, label, split.

    aeon's fixed split gives train (40) and test (40); the last two training sequences of
    each class are marked "val" so that early-stopping data covers all four classes.
    """
    datasets = pytest.importorskip("aeon.datasets")
    frames = []
    for split in ("train", "test"):
        X, y = datasets.load_basic_motions(split=split)  # (40, 6, 100), (40,)
        n, c, T = X.shape
        part = np.full(n, split, dtype=object)
        if split == "train":
            for label in np.unique(y):
                part[np.flatnonzero(y == label)[-2:]] = "val"
        d = pd.DataFrame(X.transpose(0, 2, 1).reshape(n * T, c), columns=[f"ch{j}" for j in range(c)])
        d.insert(0, "id", np.repeat([f"{split}{i:02d}" for i in range(n)], T))
        d.insert(1, "step", np.tile(np.arange(T), n))
        d["label"] = np.repeat(np.asarray(y, dtype=str), T)
        d["split"] = np.repeat(part, T)
        frames.append(d)
    return pd.concat(frames, ignore_index=True)


def test_basic_motions_classification():
    # Open data set: aeon.datasets.load_basic_motions (4 classes, 6 channels, 100 steps).
    df = basic_motions_frame()
    cfg = Config(task="classification", target="label", group_column="id", split_column="split",
                 time_column="step", window="full", hidden=16, epochs=80, lr=3e-2, patience=None,
                 batch_size=16, seed=0)
    r = fit(df, cfg, progress=False)
    m = r.metrics
    assert list(m.index) == ["rnn", "majority", "nearest_neighbour"]
    assert np.isfinite(m.to_numpy()).all()
    # Observed here (test accuracy): rnn 0.875 at seed 0 (0.875, 0.40, 0.55, 0.425 at seeds
    # 0-3: a plain RNN reading 100 steps into its last state is seed-sensitive); 1-NN with
    # Euclidean distance on our scaled sequences 0.55; the published 1-NN-ED accuracy on
    # BasicMotions is about 0.68 (from memory). Asserted: finite, and above chance (0.25).
    assert m.loc["rnn", "test_accuracy"] > 0.25
    assert m.loc["majority", "test_accuracy"] == pytest.approx(0.25)  # balanced test classes
    pred = r.predict()
    assert len(pred) == 80 and pred.index.name == "id"
    assert list(pred.columns) == ["actual", "predicted", "p_badminton", "p_running", "p_standing",
                                  "p_walking", "split"]
    test = pred[pred["split"] == "test"]
    assert len(test) == 40 and r.confusion["test"].to_numpy().sum() == 40
    codes = np.searchsorted(r.spec.classes, test["actual"].to_numpy().astype(str))
    got = classification_metrics(codes, test.filter(like="p_").to_numpy())
    assert got["accuracy"] == pytest.approx(m.loc["rnn", "test_accuracy"], rel=1e-12)
    d = r.diagnostics
    assert d.gradient_through_time.shape == (100,) and np.isfinite(d.gradient_through_time).all()
