"""The SQLite run store: one committed row per run key, WAL journal, refusals."""
import hashlib
import json
import math
import sqlite3
import threading

import pytest

from rnnkit import Config
from rnnkit.sweeps._store import RunStore, open_store, run_key

FP = "sha256:" + "ab" * 32


def _record(config, status="ok", **metrics):
    return {"key": run_key(config, FP), "config": config.to_dict(), "fingerprint": FP,
            "status": status, "epochs": 3, "seconds": 0.5, "compiles": 1,
            "metrics": metrics or {"val_rmse": 0.5, "persistence_val_rmse": 0.7}, "message": ""}


def test_run_key_is_sha256_of_canonical_config_and_fingerprint():
    cfg = Config(hidden=8)
    blob = json.dumps({"config": cfg.to_dict(), "data": FP}, sort_keys=True, separators=(",", ":"))
    assert run_key(cfg, FP) == hashlib.sha256(blob.encode()).hexdigest()
    assert run_key(cfg, FP) == run_key(Config(hidden=8), FP)
    others = {run_key(cfg.replace(seed=1), FP), run_key(cfg.replace(lr=0.01), FP),
              run_key(cfg, "sha256:" + "cd" * 32), run_key(cfg.replace(window=12), FP)}
    assert len(others) == 4 and run_key(cfg, FP) not in others


def test_rows_are_committed_in_wal_mode_and_read_back(tmp_path):
    path = tmp_path / "runs.db"
    a, b = Config(hidden=8), Config(hidden=16)
    with RunStore(path) as store:
        store.put(_record(a))
        # A second, independent connection (the sqlite3 library itself) sees the row at once:
        # it was committed before put() returned.
        other = sqlite3.connect(path)
        assert other.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert other.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == 1
        other.close()
        store.put(_record(b, status="diverged at epoch 2", val_rmse=float("nan")))
        assert len(store) == 2
        assert store.keys() == {run_key(a, FP), run_key(b, FP)}
    with RunStore(path) as store:  # reopened: everything is still there
        got = store.get([run_key(b, FP), "absent"])
        assert list(got) == [run_key(b, FP)]
        rec = got[run_key(b, FP)]
        assert rec["status"] == "diverged at epoch 2" and rec["metrics"] == {"val_rmse": None}
        assert Config.from_dict(rec["config"]) == b
        table = store.table()
        assert list(table["hidden"]) == [8, 16] and math.isnan(table["val_rmse"].iloc[1])


def test_one_row_per_key(tmp_path):
    cfg = Config(hidden=8)
    with RunStore(tmp_path / "runs.db") as store:
        store.put(_record(cfg, val_rmse=1.0))
        store.put(_record(cfg, val_rmse=2.0))
        assert len(store) == 1
        assert store.records()[0]["metrics"] == {"val_rmse": 2.0}


def test_writes_from_another_thread(tmp_path):
    store = RunStore(tmp_path / "runs.db")
    t = threading.Thread(target=store.put, args=(_record(Config(hidden=4)),))
    t.start()
    t.join()
    assert len(store) == 1
    store.close()


def test_memory_store_and_open_store():
    store, owned = open_store(None)
    assert owned and store.path is None
    store.put(_record(Config()))
    assert len(store) == 1
    same, owned = open_store(store)
    assert same is store and not owned
    store.close()


def test_refusals(tmp_path):
    bad = tmp_path / "notes.db"
    bad.write_text("these are my notes, not a database " * 50)
    with pytest.raises(ValueError, match="not an rnnkit run store"):
        RunStore(bad)
    old = tmp_path / "old.db"
    RunStore(old).close()
    db = sqlite3.connect(old)
    with db:  # commits
        db.execute("UPDATE layout SET version = 99")
    db.close()
    with pytest.raises(ValueError, match="layout 99"):
        RunStore(old)
    with pytest.raises(TypeError, match="`store`"):
        RunStore(42)
    with RunStore(None) as store, pytest.raises(ValueError, match="lacks"):
        store.put({"key": "k"})


def test_kept_weights_go_with_their_row_and_old_stores_gain_the_table(tmp_path):
    import io

    import numpy as np

    from rnnkit.sweeps._runner import pack_history, pack_params, unpack_history, unpack_params

    path = tmp_path / "old.sqlite"
    # A store written before weights were kept: the runs table and layout only.
    with RunStore(path) as store:
        store.put(_record(Config(hidden=3)))
    db = sqlite3.connect(path)
    db.execute("DROP TABLE weights")
    db.commit()
    db.close()
    params = {"U": np.arange(6, dtype=np.float32).reshape(2, 3), "c": np.array([0.5])}
    import pandas as pd
    history = pd.DataFrame({"epoch": [1, 2], "train_loss": [0.5, float("nan")]})
    with RunStore(path) as store:  # opening adds the weights table
        assert store.kept([run_key(Config(hidden=3), FP)]) == {}
        rec = _record(Config(hidden=4))
        rec.update(params=pack_params(params), history=pack_history(history), best_epoch=2)
        store.put(rec)
        kept = store.kept([rec["key"], run_key(Config(hidden=3), FP)])
    assert list(kept) == [rec["key"]] and kept[rec["key"]]["best_epoch"] == 2
    # The blob is a plain .npz: numpy reads it without pickle.
    with np.load(io.BytesIO(kept[rec["key"]]["params"]), allow_pickle=False) as z:
        np.testing.assert_array_equal(z["U"], params["U"])
    back = unpack_params(kept[rec["key"]]["params"])
    assert set(back) == {"U", "c"} and back["c"].dtype == np.float64
    h = unpack_history(kept[rec["key"]]["history"])
    assert h["epoch"].tolist() == [1, 2] and h["train_loss"][0] == 0.5 and np.isnan(h["train_loss"][1])
