"""Run stores: only ours, refused before training when unwritable, damaged rows named,
and two processes on one store share the work."""
import hashlib
import json
import os
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
import statsmodels.api as sm

import rnnkit
from rnnkit import Config
from rnnkit.sweeps import _store
from rnnkit.sweeps._store import APPLICATION_ID, RunStore, run_key

ROOT = Path(__file__).resolve().parents[1]
FP = "sha256:" + "ab" * 32


def _record(config):
    return {"key": run_key(config, FP), "config": config.to_dict(), "fingerprint": FP, "status": "ok",
            "epochs": 1, "seconds": 0.1, "compiles": 1, "metrics": {"val_rmse": 0.5}, "message": ""}


def _digest(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def test_a_foreign_sqlite_file_is_refused_unmodified(tmp_path):
    path = tmp_path / "inventory.db"
    con = sqlite3.connect(path)
    with con:
        con.execute("CREATE TABLE items (name TEXT)")
        con.execute("INSERT INTO items VALUES ('bolts')")
    con.close()
    before = _digest(path)
    with pytest.raises(ValueError, match="not an rnnkit run store.*left unchanged") as err:
        RunStore(path)
    assert str(path) in str(err.value)
    assert _digest(path) == before and sorted(p.name for p in tmp_path.iterdir()) == ["inventory.db"]
    # SQLite's own reading of the header: still the rollback journal, no id of ours
    con = sqlite3.connect(path)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
    assert con.execute("PRAGMA application_id").fetchone()[0] == 0
    con.close()


def test_our_files_carry_the_application_id_and_older_stores_are_adopted(tmp_path):
    new = tmp_path / "new.db"
    RunStore(new).close()
    con = sqlite3.connect(new)
    assert con.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID
    con.close()
    old = tmp_path / "old.db"  # a store written before the id: only our tables, id 0
    con = sqlite3.connect(old)
    with con:
        con.execute(_store._TABLE)
        con.execute("CREATE TABLE layout (version INTEGER NOT NULL)")
        con.execute("INSERT INTO layout VALUES (1)")
    con.close()
    with RunStore(old) as store:
        store.put(_record(Config(hidden=4)))
        assert len(store) == 1


def test_an_unwritable_store_is_refused_before_any_run_trains(monkeypatch):
    trained = []
    monkeypatch.setattr("rnnkit.sweeps._runner.fit", lambda *a, **k: trained.append(1))
    df = sm.datasets.nile.load_pandas().data[["volume"]]
    # /proc refuses new files even to root: a folder nobody may write to
    for path in ("/proc/rnnkit-test-runs.db", "/proc/rnnkit-test/runs.db"):
        with pytest.raises(ValueError, match="`store`.*(cannot be opened|cannot be made)") as err:
            rnnkit.sweep(df, Config(target="volume", epochs=1, hidden=2), {"window": [4]},
                         store=path, progress=False)
        assert "rnnkit-test" in str(err.value)
    assert trained == []


@pytest.mark.skipif(os.geteuid() == 0, reason="root may write to a read-only file")
def test_a_read_only_store_file_is_refused(tmp_path):
    path = tmp_path / "runs.db"
    RunStore(path).close()
    path.chmod(0o444)
    with pytest.raises(ValueError, match="cannot be written"):
        RunStore(path)


def test_a_damaged_row_names_the_store_and_the_run(tmp_path):
    path = tmp_path / "runs.db"
    rec = _record(Config(hidden=4))
    with RunStore(path) as store:
        store.put(rec)
    con = sqlite3.connect(path)
    with con:
        con.execute("UPDATE runs SET metrics = '{not json' WHERE key = ?", (rec["key"],))
    con.close()
    with RunStore(path) as store, pytest.raises(ValueError) as err:
        store.records()
    assert str(path) in str(err.value) and rec["key"] in str(err.value)


def test_claims_hold_for_live_processes_only(tmp_path):
    path = tmp_path / "runs.db"
    a, b = RunStore(path), RunStore(path)
    assert a.claim("k1") and not b.claim("k1")
    assert b.claimed_elsewhere(["k1", "k2"]) == {"k1"}
    a.release()
    assert b.claim("k1") and not a.claim("k1")
    b.put(_record(Config(hidden=4)) | {"key": "k1"})
    assert not a.claim("k1")  # stored: nothing to run
    # a claim of a process that has ended is taken over
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    con = sqlite3.connect(path)
    with con:
        con.execute("INSERT INTO claims VALUES ('k2', 'other', ?, ?, 0)",
                    (_store.socket.gethostname(), int(gone)))
    con.close()
    assert a.claim("k2")
    a.close()
    b.close()


_SHARED = """
import json, sys, time
import statsmodels.api as sm
import rnnkit
df = sm.datasets.nile.load_pandas().data[["volume"]].astype(float)
base = rnnkit.Config(target="volume", hidden=2, epochs=2, batch_size=32, season=None)
ran = []
res = rnnkit.sweep(df, base, {"window": [3, 4, 5], "activation": ["tanh", "relu"]}, store=sys.argv[1],
                   progress=False, on_run=lambda rec: (ran.append(rec["key"]), time.sleep(0.4)))
print(json.dumps({"ran": ran, "rows": len(res.table)}))
"""


def test_two_processes_on_one_store_share_the_runs(tmp_path):
    script = tmp_path / "shared.py"
    script.write_text(textwrap.dedent(_SHARED))
    db = tmp_path / "runs.db"
    RunStore(db).close()  # made before both start, so neither races to create it
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    procs = [subprocess.Popen([sys.executable, str(script), str(db)], env=env, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(2)]
    outs = []
    try:
        for p in procs:
            out, err = p.communicate(timeout=600)
            assert p.returncode == 0, err
            outs.append(json.loads(out.strip().splitlines()[-1]))
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
    ran = outs[0]["ran"] + outs[1]["ran"]
    assert len(ran) == 6 and len(set(ran)) == 6  # every run once, in one process or the other
    assert outs[0]["rows"] == outs[1]["rows"] == 6  # and each sweep reports all of them
    with RunStore(db) as store:
        assert len(store) == 6
        assert store.claimed_elsewhere(store.keys()) == set()
