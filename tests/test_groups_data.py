"""prepare() with several sequences: group_column, split_column and window="full"."""
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rnnkit import Config, DataError, prepare
from tolerances import EXACT64

SPLITS = ("train", "val", "test")


def machines(n_groups=6, length=30, seed=0, interleave=False, with_time=True, ragged=False):
    """Long-format frame: one row per (machine, time step)."""
    rng = np.random.default_rng(seed)
    parts = []
    for g in range(n_groups):
        n = length + (int(rng.integers(0, 10)) if ragged else 0)
        t0 = pd.Timestamp("2024-01-01") + pd.Timedelta(hours=5 * g)
        parts.append(pd.DataFrame({"machine": f"m{g}", "ts": pd.date_range(t0, periods=n, freq="h"),
                                   "temp": rng.standard_normal(n).cumsum(), "vib": rng.standard_normal(n),
                                   "status": "ok" if g % 2 else "worn"}))
    df = pd.concat(parts, ignore_index=True)
    if interleave:
        df = df.sort_values(["ts", "machine"], kind="stable").reset_index(drop=True)
    return df if with_time else df.drop(columns="ts")


def untouched(df, cfg):
    before = df.copy(deep=True)
    p = prepare(df, cfg)
    pd.testing.assert_frame_equal(df, before)
    return p


def refused(df, cfg, match):
    before = df.copy(deep=True)
    with pytest.raises(DataError, match=match) as err:
        prepare(df, cfg)
    pd.testing.assert_frame_equal(df, before)
    return str(err.value)


# ---------- properties ----------

@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(n_groups=st.integers(3, 9), length=st.integers(12, 40), window=st.integers(1, 8),
       horizon=st.integers(1, 3), mode=st.sampled_from(["many-to-one", "many-to-many"]),
       interleave=st.booleans(), seed=st.integers(0, 10**6))
def test_windows_stay_inside_one_group_and_targets_match(n_groups, length, window, horizon, mode,
                                                          interleave, seed):
    df = machines(n_groups, length, seed, interleave=interleave, ragged=True)
    cfg = Config(target="temp", features=("vib",), group_column="machine", time_column="ts", window=window,
                 horizon=horizon, mode=mode, dtype="float64", season=None)
    p = untouched(df, cfg)
    for split in SPLITS:
        s = p.starts[split]
        every = s[:, None] + np.arange(window + horizon)[None, :]  # (N, T + h) rows touched
        assert np.all(p.groups[every] == p.groups[s][:, None])  # never across a sequence
        x, y, _ = p.windows(split)
        rows = p.rows[p.target_rows(split)]  # positions in the caller's frame
        np.testing.assert_allclose(p.scaler.inverse_targets(y)[..., 0], df["temp"].to_numpy()[rows], **EXACT64)
        assert np.all(df["machine"].to_numpy()[rows] == p.target_groups(split))
        np.testing.assert_array_equal(df["ts"].to_numpy()[rows], p.target_times(split))
    # sequences go whole to one part, and earlier-starting sequences to earlier parts
    owner = {sp: set(p.groups[p.starts[sp]]) for sp in SPLITS}
    assert not (owner["train"] & owner["val"]) and not (owner["val"] & owner["test"])
    assert not (owner["train"] & owner["test"])
    first = df.groupby("machine")["ts"].min()
    assert first[list(owner["train"])].max() <= first[list(owner["val"])].min()
    assert first[list(owner["val"])].max() <= first[list(owner["test"])].min()


def test_one_group_gives_the_single_series_windows():
    df = machines(1, 200)
    cfg = Config(target="temp", features=("vib",), time_column="ts", window=6, horizon=2, gap=1)
    one = prepare(df, cfg.replace(group_column="machine"))
    plain = prepare(df.drop(columns="machine"), cfg)
    for split in SPLITS:
        np.testing.assert_array_equal(one.starts[split], plain.starts[split])
        np.testing.assert_array_equal(one.windows(split)[0], plain.windows(split)[0])
    np.testing.assert_array_equal(one.inputs, plain.inputs)


def test_interleaved_rows_are_brought_together_in_order_of_appearance():
    df = machines(4, 20, interleave=True)
    p = prepare(df, Config(target="temp", group_column="machine", time_column="ts", window=3, dtype="float64"))
    assert list(dict.fromkeys(p.groups)) == ["m0", "m1", "m2", "m3"]
    np.testing.assert_array_equal(df["machine"].to_numpy()[p.rows], p.groups)
    np.testing.assert_allclose(p.scaler.inverse_inputs(p.inputs)[:, 0], df["temp"].to_numpy()[p.rows], **EXACT64)


def test_same_time_in_two_groups_is_fine_but_not_within_one():
    df = machines(4, 20)
    df["ts"] = np.tile(pd.date_range("2024-01-01", periods=20, freq="h"), 4)  # every machine shares times
    p = prepare(df, Config(target="temp", group_column="machine", time_column="ts", window=3))
    assert p.season == 24
    df.loc[25, "ts"] = df.loc[24, "ts"]  # m1 repeats a time
    refused(df, Config(target="temp", group_column="machine", time_column="ts", window=3),
            "duplicated.*group 'm1'")


# ---------- group split without split_column ----------

def test_groups_without_time_are_shuffled_by_seed():
    df = machines(10, 15, with_time=False)
    cfg = Config(target="temp", group_column="machine", window=3, split=(0.6, 0.2, 0.2))
    a, b = prepare(df, cfg), prepare(df, cfg)
    owners = lambda p: [sorted(set(p.groups[p.starts[s]])) for s in SPLITS]  # noqa: E731
    assert owners(a) == owners(b) and [len(o) for o in owners(a)] == [6, 2, 2]
    others = {tuple(map(tuple, owners(prepare(df, cfg.replace(seed=s))))) for s in range(1, 6)}
    assert len(others) > 1  # the seed decides
    assert any("seed 0" in n for n in a.notes)


def test_too_few_groups():
    msg = refused(machines(2, 30), Config(target="temp", group_column="machine", time_column="ts",
                                          window=3), "2 sequence")
    assert "at least 3" in msg


def test_every_part_gets_a_group():
    p = prepare(machines(3, 30), Config(target="temp", group_column="machine", time_column="ts",
                                       window=3, split=(0.9, 0.05, 0.05)))
    assert all(len(p.starts[s]) for s in SPLITS)


# ---------- split_column ----------

def labelled(df, labels):
    return df.assign(part=df["machine"].map(labels))


def test_split_column_fixes_the_split():
    df = labelled(machines(5, 20), {"m0": "test", "m1": "train", "m2": "val", "m3": "train", "m4": "test"})
    p = untouched(df, Config(target="temp", group_column="machine", split_column="part", time_column="ts",
                             window=4))
    assert [sorted(set(p.groups[p.starts[s]])) for s in SPLITS] == [["m1", "m3"], ["m2"], ["m0", "m4"]]
    assert "part" not in p.input_names


def test_split_column_without_val_takes_last_train_groups_and_says_so():
    df = labelled(machines(6, 20), {"m0": "train", "m1": "train", "m2": "train", "m3": "train",
                                    "m4": "test", "m5": "test"})
    p = prepare(df, Config(target="temp", group_column="machine", split_column="part", time_column="ts",
                           window=4, split=(0.5, 0.25, 0.25)))
    assert sorted(set(p.groups[p.starts["val"]])) == ["m3"]  # round(4 train * 0.25 / (0.5 + 0.25)) = 1
    assert any("became val" in n for n in p.summary()["detail"])


def test_split_column_rows_of_one_series():
    df = machines(1, 120).drop(columns="machine")
    df["part"] = ["train"] * 80 + ["test"] * 40
    p = prepare(df, Config(target="temp", split_column="part", time_column="ts", window=5, gap=2))
    # round(80 train rows * 0.15 / (0.7 + 0.15)) = 14 rows become val, then `gap` drops 2 of them
    assert p.counts["rows_train"] == 66 and p.counts["rows_val"] == 14 - 2 and p.counts["rows_test"] == 40 - 2
    assert any("last 14 training rows became val" in n for n in p.notes)


def test_split_column_bad_value():
    df = labelled(machines(4, 20), {"m0": "train", "m1": "validation", "m2": "val", "m3": "test"})
    refused(df, Config(target="temp", group_column="machine", split_column="part", window=3),
            "'part' holds 'validation'")


def test_group_under_two_split_labels():
    df = labelled(machines(4, 20), {"m0": "train", "m1": "train", "m2": "val", "m3": "test"})
    df.loc[df.index[df["machine"] == "m1"][-1], "part"] = "val"
    refused(df, Config(target="temp", group_column="machine", split_column="part", window=3),
            "'m1' has rows labelled 'train' and 'val'")


def test_group_column_missing_or_nan():
    df = machines(4, 20)
    refused(df, Config(target="temp", group_column="unit", window=3), "'unit'.*'machine'")
    df.loc[7, "machine"] = None
    refused(df, Config(target="temp", group_column="machine", window=3), "'machine' has 1 missing id")


def test_short_sequences_error_lists_them_or_drop_counts_them():
    df = machines(8, 30)
    df = df[~((df["machine"].isin(["m2", "m5"])) & (df.groupby("machine").cumcount() >= 6))]
    msg = refused(df, Config(target="temp", group_column="machine", time_column="ts", window=8),
                  "2 of 8 sequences")
    assert "'m2' (6 rows)" in msg and "'m5' (6 rows)" in msg and "short_sequences" in msg
    p = prepare(df, Config(target="temp", group_column="machine", time_column="ts", window=8,
                           short_sequences="drop"))
    assert p.dropped["rows"].tolist() == [12] and "2 sequences" in p.dropped["reason"][0]
    assert "m2" not in set(p.groups)


# ---------- window="full" ----------

def full_cfg(**kw):
    return Config(task="classification", target="status", features=("temp", "vib"), group_column="machine",
                  time_column="ts", window="full", **kw)


def test_full_sequences_are_one_example_each():
    df = machines(8, 20, ragged=True)
    p = untouched(df, full_cfg())
    sizes = df.groupby("machine", sort=False).size()
    assert p.window == sizes.max() and p.horizon == 0
    for split in SPLITS:
        x, y, mask = p.windows(split)
        ids = p.groups[p.starts[split]]
        np.testing.assert_array_equal(p.lengths[split], sizes[ids].to_numpy())
        np.testing.assert_array_equal(mask.sum(1), p.lengths[split])
        assert np.all(x[~mask] == 0.0)  # padding is zeros
        assert list(p.decode(y)) == ["ok" if int(g[1:]) % 2 else "worn" for g in ids]
        last = p.rows[p.target_rows(split)]
        np.testing.assert_array_equal(df["machine"].to_numpy()[last], ids)
        after = last + 1  # the row after a sequence's last row belongs to another sequence (or is past the end)
        inside = after < len(df)
        assert np.all(df["machine"].to_numpy()[after[inside]] != ids[inside])
    assert list(p.classes) == ["ok", "worn"]


def test_full_target_is_the_last_rows_label_and_summary_says_so():
    df = machines(8, 20)
    df.loc[df.index[df["machine"] == "m1"][:5], "status"] = "worn"  # m1 ends "ok"
    p = prepare(df, full_cfg())
    split = next(s for s in SPLITS if "m1" in set(p.groups[p.starts[s]]))
    k = list(p.groups[p.starts[split]]).index("m1")
    assert p.decode(p.windows(split)[1])[k] == "ok"
    assert any("vary within 1 sequence" in d for d in p.summary()["detail"])


def test_full_regression_needs_target_not_as_input():
    with pytest.raises(ValueError, match="target_as_input"):
        Config(target="temp", group_column="machine", window="full")
    df = machines(6, 20, ragged=True)
    p = prepare(df, Config(target="temp", features=("vib",), group_column="machine", window="full",
                           target_as_input=False, dtype="float64"))
    x, y, mask = p.windows("val")
    last = p.rows[p.target_rows("val")]
    np.testing.assert_allclose(p.scaler.inverse_targets(y)[:, 0], df["temp"].to_numpy()[last], **EXACT64)


def test_unseen_label_in_validation_sequences():
    df = machines(6, 20)
    df.loc[df["machine"] == "m3", "status"] = "broken"  # m3 lands in val (by first time)
    refused(df, full_cfg(split=(0.5, 0.25, 0.25)), "'broken'.*val")


def test_full_on_aeon_basic_motions():
    # aeon's BasicMotions (open data set shipped in the package): 40 training cases,
    # 6 channels, 100 steps, 4 activities (standing, walking, running, badminton).
    from aeon.datasets import load_basic_motions
    X, y = load_basic_motions(split="train")  # (40, 6, 100)
    n, c, t = X.shape
    df = pd.DataFrame(X.transpose(0, 2, 1).reshape(n * t, c), columns=[f"ch{j}" for j in range(c)])
    df["case"] = np.repeat(np.arange(n), t)
    df["activity"] = np.repeat(y, t)
    p = prepare(df, Config(task="classification", target="activity", group_column="case", window="full",
                           split=(0.6, 0.2, 0.2), seed=1))
    assert p.window == 100 and p.n_inputs == 6 and sorted(p.classes) == list(p.classes)
    assert sum(len(p.starts[s]) for s in SPLITS) == 40
    assert set(p.classes) == set(np.unique(y)) and len(p.classes) == 4


@pytest.mark.parametrize("policy", ["ffill", "interpolate"])
def test_missing_values_are_filled_inside_each_sequence_only(policy):
    df = machines(4, 20)
    first_m1 = df.index[df["machine"] == "m1"][0]
    df.loc[[first_m1, first_m1 + 1], "temp"] = np.nan  # m1 starts with two holes
    df.loc[first_m1 - 1, "temp"] = np.nan  # m0 ends with a hole
    df.loc[first_m1 + 7, "vib"] = np.nan  # a hole inside m1
    p = untouched(df, Config(target="temp", features=("vib",), group_column="machine", time_column="ts",
                             window=3, missing=policy, dtype="float64"))
    assert p.dropped["rows"].tolist() == [2]  # m1's leading holes: nothing of m1 before them
    assert first_m1 not in p.rows and first_m1 + 1 not in p.rows
    # pandas' own fill, per sequence (reference library); "interpolate" holds the last value at the end
    if policy == "ffill":
        ref = df.groupby("machine")[["temp", "vib"]].ffill()
    else:
        ref = df.groupby("machine")[["temp", "vib"]].transform(
            lambda s: s.set_axis(df.loc[s.index, "ts"]).interpolate(method="time").to_numpy())
    np.testing.assert_allclose(p.scaler.inverse_inputs(p.inputs), ref.to_numpy()[p.rows], **EXACT64)
