"""Ctrl-C stops a command-line sweep at once (serial or with workers), keeps every finished
run, exits 130; compilation-cache folders of killed sweeps are removed on the next start."""
import os
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest
import statsmodels.api as sm

import rnnkit
from rnnkit.sweeps import _runner
from rnnkit.training import _cache

ROOT = Path(__file__).resolve().parents[1]


def _rows(db: Path) -> int:
    if not db.exists():
        return 0
    con = sqlite3.connect(db, timeout=30)
    try:
        return con.execute("SELECT COUNT(*) FROM runs").fetchone()[0]
    except sqlite3.OperationalError:
        return 0
    finally:
        con.close()


@pytest.fixture(scope="module")
def sunspots_csv(tmp_path_factory):
    # Yearly sunspot numbers 1700-2008, the open data set shipped with statsmodels.
    d = tmp_path_factory.mktemp("ctrl-c")
    sm.datasets.sunspots.load_pandas().data[["SUNACTIVITY"]].to_csv(d / "sun.csv")
    space = ('{"config": {"target": "SUNACTIVITY", "hidden": 4, "epochs": 40, "batch_size": 32, '
             '"season": 11, "patience": null}, "space": {"window": [4, 5, 6, 7, 8, 9]}, "seeds": 3}')
    (d / "space.json").write_text(space)
    return d


@pytest.mark.parametrize("workers", ["1", "2"])
def test_ctrl_c_stops_the_sweep_keeps_finished_runs_and_exits_130(sunspots_csv, tmp_path, workers):
    db = tmp_path / "runs.db"
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    env = dict(os.environ, PYTHONPATH=str(ROOT), TMPDIR=str(tmp))
    err = tmp_path / "stderr.txt"
    with open(err, "w") as f:
        # its own process group, as a terminal's foreground job: Ctrl-C reaches every process in it
        proc = subprocess.Popen([sys.executable, "-m", "rnnkit", "sweep", str(sunspots_csv / "space.json"),
                                 "--data", str(sunspots_csv / "sun.csv"), "--store", str(db),
                                 "--workers", workers, "--out", str(tmp_path / "out"), "--no-progress"],
                                env=env, stdout=subprocess.DEVNULL, stderr=f, start_new_session=True)
    try:
        deadline = time.monotonic() + 300
        while _rows(db) < 1 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
        assert proc.poll() is None, f"the sweep ended before it could be interrupted: {err.read_text()}"
        os.killpg(proc.pid, signal.SIGINT)  # what Ctrl-C in a terminal does
        t0 = time.monotonic()
        rc = proc.wait(timeout=60)
        stopped_in = time.monotonic() - t0
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    assert rc == 130, err.read_text()
    assert "interrupted" in err.read_text()
    kept = _rows(db)
    assert 1 <= kept < 18
    assert stopped_in < 30  # at once, not after the other runs
    assert not any(p.name.startswith("rnnkit-programs-") for p in tmp.iterdir())  # cleaned up


def test_stale_cache_folders_are_removed_on_the_next_start(tmp_path, monkeypatch):
    gone = int(subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                              capture_output=True, text=True).stdout)
    stale = tmp_path / f"rnnkit-programs-{gone}-abc123"
    live = tmp_path / f"rnnkit-programs-{os.getpid()}-def456"
    other = tmp_path / "someone-elses"
    for p in (stale, live, other):
        p.mkdir()
    (stale / "program.bin").write_bytes(b"x")
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    monkeypatch.delenv("JAX_COMPILATION_CACHE_DIR", raising=False)
    kept = rnnkit.compilation_cache()
    rnnkit.compilation_cache(None)  # rnnkit's own folder off: the pool makes a temporary one
    try:
        env, made = _runner._shared_compile_cache()
        try:
            assert not stale.exists() and live.exists() and other.exists()
            assert Path(made).name.startswith(f"rnnkit-programs-{os.getpid()}-")
            assert env[_cache.ENV] == made
        finally:
            os.rmdir(made)
    finally:
        rnnkit.compilation_cache(kept if kept is not None else None)
