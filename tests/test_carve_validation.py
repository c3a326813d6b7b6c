"""Validation carved out of a given training part: whole sequences stratified by class
(classification), the last sequences in time (regression)."""
import numpy as np
import pandas as pd
import pytest
from aeon.datasets import load_classification
from sklearn.model_selection import StratifiedShuffleSplit

from rnnkit import Config, prepare
from rnnkit.data._split import stratified_pick


def _long(xs, y, part):
    frames = []
    for i, (x, label) in enumerate(zip(xs, y)):  # x: (channels, steps), steps differ
        d = pd.DataFrame(x.T, columns=[f"c{j}" for j in range(x.shape[0])])
        d["case"], d["label"], d["part"] = f"{part}{i:03d}", label, part
        frames.append(d)
    return pd.concat(frames, ignore_index=True)


@pytest.fixture(scope="module")
def vowels():
    # JapaneseVowels (UCR/UEA archive, shipped in aeon): 270 training cases ordered by
    # speaker, so the last training cases are all one class; unequal lengths.
    xtr, ytr = load_classification("JapaneseVowels", split="train")
    xte, yte = load_classification("JapaneseVowels", split="test")
    return pd.concat([_long(xtr, ytr, "train"), _long(xte, yte, "test")], ignore_index=True), ytr


def test_japanese_vowels_validation_holds_every_class_in_proportion(vowels):
    df, ytr = vowels
    cfg = Config(target="label", task="classification", window="full", group_column="case",
                 split_column="part", season=None, seed=3)
    p = prepare(df, cfg)  # refused before: "label '9' ... is in the val targets but never in training"
    y = {s: p.decode(p.targets[p.target_rows(s)]) for s in ("train", "val")}
    n_val = len(y["val"])
    assert n_val + len(y["train"]) == len(ytr)
    # the val share of each class equals the overall val share (30 cases per class here)
    counts = pd.Series(y["val"]).value_counts()
    assert set(counts.index) == set(np.unique(ytr))
    assert counts.max() - counts.min() <= 1
    # scikit-learn's StratifiedShuffleSplit, the usual stratified hold-out, gives the same
    # number of validation cases per class
    sss = StratifiedShuffleSplit(n_splits=1, test_size=n_val, random_state=0)
    _, held = next(sss.split(np.zeros(len(ytr)), ytr))
    ref = pd.Series(ytr[held]).value_counts()
    assert (counts.sort_index() - ref.sort_index()).abs().max() <= 1
    assert any("drawn per class" in n for n in p.notes)
    # seeded: the same seed gives the same carve, another seed another one
    again = prepare(df, cfg)
    np.testing.assert_array_equal(again.starts["val"], p.starts["val"])
    other = prepare(df, cfg.replace(seed=4))
    assert not np.array_equal(other.starts["val"], p.starts["val"])


def test_stratified_pick_keeps_each_class_in_training():
    labels = np.array([0] * 10 + [1] * 4 + [2] * 1)
    pick = stratified_pick(labels, 5, seed=0)
    per = np.bincount(labels[pick], minlength=3)
    assert per.tolist() in ([3, 2, 0], [4, 1, 0]) and len(pick) == 5
    assert per[2] == 0  # a class with one sequence is never taken out of training


def test_regression_keeps_time_order():
    rng = np.random.default_rng(0)
    frames = [pd.DataFrame({"case": g, "t": pd.date_range(f"2024-01-{g + 1:02d}", periods=12, freq="h"),
                            "x": rng.normal(size=12), "y": rng.normal(size=12), "part": "train"})
              for g in range(10)]
    df = pd.concat(frames, ignore_index=True)
    p = prepare(df, Config(target="y", features=("x",), group_column="case", time_column="t",
                           split_column="part", window=4, split=(0.8, 0.2, 0.0), season=None))
    val_cases = set(p.groups[p.starts["val"]])
    assert val_cases == {8, 9}  # the two latest sequences (common practice, no source)
