"""Baselines see the data the network saw before the test part: the nearest-neighbour
baseline on the UCR archive's fixed split agrees with scikit-learn's 1-NN."""
import numpy as np
import pandas as pd
import pytest
from aeon.datasets import load_classification
from sklearn.neighbors import KNeighborsClassifier

from rnnkit import Config, prepare
from rnnkit.evaluation import _baselines as B


def _long(x, y, part):
    n, c, steps = x.shape
    d = pd.DataFrame(x.transpose(0, 2, 1).reshape(-1, c), columns=[f"ch{i}" for i in range(c)])
    d["case"] = np.repeat([f"{part}{i:03d}" for i in range(n)], steps)
    d["label"] = np.repeat(y, steps)
    d["part"] = part
    return d


@pytest.fixture(scope="module")
def gunpoint():
    # GunPoint, UCR archive, shipped in aeon, with the archive's own train/test split.
    xtr, ytr = load_classification("GunPoint", split="train")
    xte, yte = load_classification("GunPoint", split="test")
    return xtr, ytr, xte, yte


def test_nearest_neighbour_on_the_archive_split_equals_scikit_learn(gunpoint):
    xtr, ytr, xte, yte = gunpoint
    df = pd.concat([_long(xtr, ytr, "train"), _long(xte, yte, "test")], ignore_index=True)
    # no 'val' cases: rnnkit carves validation out of the archive's training cases, and the
    # test scores still come from baselines fitted on all of them (train + val)
    p = prepare(df, Config(target="label", task="classification", window="full", group_column="case",
                           split_column="part", scale="none", season=None))
    assert len(p.starts["val"]) > 0 and len(p.starts["train"]) + len(p.starts["val"]) == len(xtr)
    # Reference library: scikit-learn's KNeighborsClassifier(n_neighbors=1), Euclidean distance
    knn = KNeighborsClassifier(n_neighbors=1).fit(xtr.reshape(len(xtr), -1), ytr)
    expected = knn.predict(xte.reshape(len(xte), -1))
    got = p.decode(B.baseline_predictions(p, "test")["nearest_neighbour"].argmax(-1))
    np.testing.assert_array_equal(got, expected)
    table = B.score_baselines(p)
    accuracy = table.loc["nearest_neighbour", "test_accuracy"]
    assert accuracy == pytest.approx(np.mean(expected == yte), abs=1e-12)
    # the archive's published 1-NN Euclidean error on GunPoint is 0.087 (from memory)
    assert accuracy == pytest.approx(1 - 0.087, abs=1e-3)


def test_validation_scores_come_from_the_training_part_only(gunpoint):
    xtr, ytr, xte, yte = gunpoint
    df = pd.concat([_long(xtr, ytr, "train"), _long(xte, yte, "test")], ignore_index=True)
    p = prepare(df, Config(target="label", task="classification", window="full", group_column="case",
                           split_column="part", scale="none", season=None))
    x_train, y_train, _ = p.windows("train")
    x_val, _, _ = p.windows("val")
    knn = KNeighborsClassifier(n_neighbors=1).fit(x_train.reshape(len(x_train), -1), y_train)
    got = B.baseline_predictions(p, "val")["nearest_neighbour"].argmax(-1)
    np.testing.assert_array_equal(got, knn.predict(x_val.reshape(len(x_val), -1)))
    assert B.fit_baselines(p).parts == ("train",)
    assert B.fit_baselines(p, parts=B.parts_before("test")).parts == ("train", "val")
