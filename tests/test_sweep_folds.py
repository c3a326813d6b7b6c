"""Sweeps ranked by backtest: one stored run per (setting, seed, fold), resume by fold, the document."""
import concurrent.futures as cf
import json
import sqlite3
import threading

import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import nile

import rnnkit
from rnnkit.sweeps._store import RunStore
from tolerances import EXACT64, REPRODUCE

BASE = dict(target="volume", window=5, hidden=3, epochs=2, patience=None, batch_size=16)


def _nile():
    """statsmodels' nile: annual flow of the Nile at Aswan, 1871-1970 (100 values)."""
    d = nile.load_pandas().data
    return pd.DataFrame({"volume": d["volume"].to_numpy()},
                        index=pd.Index(d["year"].astype(int).to_numpy(), name="year"))


def test_folds_sweep_resumes_fold_by_fold_and_records_its_scoring(tmp_path):
    df = _nile()
    cfg = rnnkit.Config(**BASE)
    space = {"window": [4, 6]}
    store = tmp_path / "runs.db"
    stop, seen = threading.Event(), []

    def on_run(rec):
        seen.append(rec)
        if len(seen) == 5:
            stop.set()  # a sweep killed after 5 fold runs

    first = rnnkit.sweep(df, cfg, space, seeds=2, folds=3, test_size=10, store=store, stop=stop,
                         on_run=on_run, progress=False)
    assert len(first.table) == 5 and first.missing == 7
    assert {r["fold"]["fold"] for r in seen} <= {1, 2, 3}
    again_seen = []
    res = rnnkit.sweep(df, cfg, space, seeds=2, folds=3, test_size=10, store=store, progress=False,
                       on_run=again_seen.append)
    assert len(again_seen) == 7  # only the missing (setting, seed, fold) runs ran
    assert len(res.table) == 12 and res.missing == 0
    assert sorted(res.table.groupby(["window", "seed"]).size()) == [3, 3, 3, 3]
    # a setting's score is the mean over its folds, then over seeds
    s = res.summary().set_index("window")
    t = res.table
    for w in (4, 6):
        per_seed = t[t.window == w].groupby("seed")["val_rmse"].mean()
        np.testing.assert_allclose(s.loc[w, "val_rmse"], per_seed.mean(), **EXACT64)
    # the document says how the winner was scored, and a backtest with it gives the same number
    path = res.export(tmp_path / "best.json")
    doc = json.loads(path.read_text())
    assert doc["scoring"] == {"folds": 3, "scheme": "rolling origin", "window": "expanding",
                              "test_size": 10, "seed": 0}
    best = rnnkit.load_config(path)
    bt = rnnkit.backtest(df, best, folds=3, test_size=10, seed=doc["scoring"]["seed"], progress=False)
    assert bt.mean.loc["rnn", "val_rmse"] == pytest.approx(doc["metric"]["value"], **REPRODUCE)


def test_folds_share_programs_across_settings_and_folds():
    df = _nile()
    res = rnnkit.sweep(df, rnnkit.Config(**BASE, dtype="float64").replace(hidden=7),
                       {"window": [3, 5, 8]}, folds=4, test_size=8, progress=False)
    # 3 windows x 4 folds = 12 runs padded to one shape plan: one training program at most,
    # compiled by the first run (none if another test in this process made it already)
    assert len(res.table) == 12
    assert res.table["compiles"].sum() <= 1 and (res.table["compiles"].iloc[1:] == 0).all()
    # the same fold runs handed to an Executor (the parallel path) give the same numbers
    with cf.ThreadPoolExecutor(2) as pool:
        there = rnnkit.sweep(df, rnnkit.Config(**BASE, dtype="float64").replace(hidden=7),
                             {"window": [3, 5, 8]}, folds=4, test_size=8, progress=False, executor=pool)
    cols = ["window", "fold", "val_rmse", "test_rmse", "persistence_test_rmse"]
    pd.testing.assert_frame_equal(res.table[cols], there.table[cols])


def test_layout_1_store_gains_the_fold_column(tmp_path):
    path = tmp_path / "old.db"
    db = sqlite3.connect(path)
    with db:
        db.execute("""CREATE TABLE runs (key TEXT PRIMARY KEY, config TEXT NOT NULL, fingerprint TEXT NOT NULL,
            status TEXT NOT NULL, epochs INTEGER NOT NULL, seconds REAL NOT NULL, compiles INTEGER NOT NULL,
            metrics TEXT NOT NULL, message TEXT NOT NULL, finished TEXT NOT NULL)""")
        db.execute("CREATE TABLE layout (version INTEGER NOT NULL)")
        db.execute("INSERT INTO layout VALUES (1)")
        db.execute("INSERT INTO runs VALUES ('k', '{}', 'sha256:x', 'ok', 3, 1.0, 1, '{\"val_rmse\": 2.0}', '', "
                   "'2026-01-01T00:00:00+00:00')")
    db.close()
    with RunStore(path) as store:
        (rec,) = store.records()
        assert rec["fold"] is None and rec["metrics"] == {"val_rmse": 2.0}
        store.put({**rec, "key": "k2", "fold": {"fold": 2, "folds": 3}})
        assert store.get(["k2"])["k2"]["fold"] == {"fold": 2, "folds": 3}


def test_folds_arguments_are_checked():
    df = _nile()
    cfg = rnnkit.Config(**BASE)
    with pytest.raises(ValueError, match="`folds`"):
        rnnkit.sweep(df, cfg, {"hidden": [2]}, folds=0, progress=False)
    with pytest.raises(ValueError, match="give `folds`"):
        rnnkit.sweep(df, cfg, {"hidden": [2]}, test_size=5, progress=False)
    with pytest.raises(ValueError, match="`fold_window`"):
        rnnkit.sweep(df, cfg, {"hidden": [2]}, folds=2, fold_window="rolling", progress=False)
    with pytest.raises(rnnkit.DataError, match="fewer `folds`"):  # every fold run failed on its data
        rnnkit.sweep(df, cfg, {"hidden": [2, 3]}, folds=40, test_size=10, progress=False)


def test_the_schema_checks_scoring():
    from rnnkit.sweeps._export import document, validate

    doc = document(rnnkit.Config(**BASE), scoring={"folds": 3, "scheme": "rolling origin",
                                                   "window": 40, "test_size": 10, "seed": 0})
    validate(doc)
    for bad in ({"folds": 0, "scheme": "split"}, {"folds": 2, "scheme": "sliding"},
                {"folds": 2, "scheme": "rolling origin", "window": "growing"},
                {"folds": 2, "scheme": "split", "extra": 1}, {"scheme": "split"}):
        with pytest.raises(ValueError, match="scoring"):
            validate({**doc, "scoring": bad})
