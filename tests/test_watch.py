"""What early stopping and the kept epoch watch: the validation loss, or (classification)
the validation accuracy with ties broken by the loss."""
import numpy as np
import pandas as pd
import pytest
from aeon.datasets import load_classification
from sklearn.metrics import accuracy_score

from rnnkit import Config, fit
from rnnkit.training import _train


@pytest.fixture(scope="module")
def italy():
    # ItalyPowerDemand (UCR archive, shipped in aeon): 67 training days of 24 hourly values.
    x, y = load_classification("ItalyPowerDemand", split="train")
    n, _, steps = x.shape
    return pd.DataFrame({"load": x[:, 0].reshape(-1), "day": np.repeat(np.arange(n), steps),
                         "label": np.repeat(y, steps)})


BASE = Config(target="label", task="classification", window="full", group_column="day",
              target_as_input=False, season=None, hidden=4, epochs=8, batch_size=16, lr=0.02,
              patience=None, split=(0.6, 0.4, 0.0))


def test_watching_accuracy_keeps_the_most_accurate_epoch(italy, monkeypatch):
    seen = []
    real = _train._accuracy

    def spy(*args):
        seen.append(real(*args))
        return seen[-1]
    monkeypatch.setattr(_train, "_accuracy", spy)
    res = fit(italy, BASE.replace(watch="metric"), progress=False)
    assert len(seen) == len(res.history) == 8
    score = [(-a, v) for a, v in zip(seen, res.history["val_loss"])]
    assert res.best_epoch == 1 + min(range(8), key=lambda i: score[i])
    pred = res.predict()
    val = pred[pred["split"] == "val"]
    # scikit-learn's accuracy_score on the kept parameters' validation predictions
    assert accuracy_score(val["actual"].astype(str), val["predicted"].astype(str)) == pytest.approx(max(seen))
    assert res.watched == "val_accuracy" and "by val_accuracy" in repr(res)


def test_the_default_watches_the_validation_loss(italy):
    res = fit(italy, BASE, progress=False)
    assert res.config.watch == "loss" and res.watched == "val_loss"
    assert res.best_epoch == 1 + int(np.argmin(res.history["val_loss"].to_numpy()))


def test_watch_is_checked():
    with pytest.raises(ValueError, match="`watch`"):
        Config(watch="accuracy")
