"""Sweeps: plans, the table and summary, failures as rows, resume, stop, compile economy."""
import json
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

import rnnkit
from rnnkit import Config, DataError
from rnnkit.sweeps import _runner
from rnnkit.sweeps._plan import plan
from rnnkit.sweeps._sweep import _check_metric, sweep
from tolerances import OTHER_PROCESS, PADDED32, SAME_RUN

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def sunspots():
    # Yearly sunspot numbers 1700-2008, the open data set shipped with statsmodels.
    return sm.datasets.sunspots.load_pandas().data[["SUNACTIVITY"]]


BASE = Config(target="SUNACTIVITY", hidden=4, epochs=2, batch_size=32, season=11, window=8)


# ---------------------------------------------------------------- plans


def test_grid_plan_sizes_and_order():
    space = {"window": [4, 8, 12], "activation": ["tanh", "relu", "linear"]}
    cfgs = plan(BASE.replace(seed=5), space, seeds=2)
    assert len(cfgs) == 3 * 3 * 2
    assert [(c.window, c.activation, c.seed) for c in cfgs[:4]] == [
        (4, "tanh", 5), (4, "tanh", 6), (4, "relu", 5), (4, "relu", 6)]
    assert all(c.hidden == BASE.hidden for c in cfgs)
    assert [c.seed for c in plan(BASE, {"hidden": [4]}, seeds=[3, 11, 7])] == [3, 11, 7]
    # numpy values are taken as plain numbers; a repeated value is run once
    assert [c.hidden for c in plan(BASE, {"hidden": np.array([4, 8, 4])})] == [4, 8]


def test_random_plan_ranges_are_respected_and_seeded():
    space = {"lr": {"from": 1e-4, "to": 1e-1, "spacing": "log"}, "hidden": {"from": 8, "to": 64, "whole": True},
             "activation": ["tanh", "relu"]}
    cfgs = plan(BASE, space, strategy="random", n_samples=400, seed=1)
    lr = np.array([c.lr for c in cfgs])
    hidden = np.array([c.hidden for c in cfgs])
    assert len(cfgs) == 400 and ((1e-4 <= lr) & (lr <= 1e-1)).all()
    assert all(isinstance(c.hidden, int) for c in cfgs) and hidden.min() >= 8 and hidden.max() <= 64
    # Log scale: log10(lr) is uniform on [-4, -1] (Kolmogorov-Smirnov test, scipy.stats).
    assert stats.kstest(np.log10(lr), stats.uniform(loc=-4, scale=3).cdf).pvalue > 1e-3
    # ... and not uniform on the linear scale, where most draws would lie above 0.01.
    assert np.mean(lr > 1e-2) < 0.5
    assert plan(BASE, space, strategy="random", n_samples=5, seed=1) == cfgs[:5]
    assert plan(BASE, space, strategy="random", n_samples=5, seed=2) != cfgs[:5]
    # Only lists: distinct settings, never more than the grid holds.
    grid = {"window": [4, 8, 12], "hidden": [4, 8]}
    picked = plan(BASE, grid, strategy="random", n_samples=6)
    assert len({(c.window, c.hidden) for c in picked}) == 6
    with pytest.raises(ValueError, match="more than the 6 distinct settings"):
        plan(BASE, grid, strategy="random", n_samples=7)


@pytest.mark.parametrize("space, kw, match", [
    ({"hiden": [4]}, {}, "'hiden', which is not a Config field"),
    ({"hidden": [4, 0]}, {}, "`hidden` \\(=0\\)"),
    ({"activation": ["tanh", "softplus"]}, {}, "`activation`"),
    ({"hidden": 4}, {}, "space\\['hidden'\\]"),
    ({"hidden": []}, {}, "space\\['hidden'\\]"),
    ({"lr": {"from": 1e-4, "to": 1e-1}}, {}, "ranges need strategy='random'"),
    ({"lr": {"from": 0.0, "to": 1e-1, "spacing": "log"}}, {"strategy": "random", "n_samples": 2}, "'from' > 0"),
    ({"lr": {"from": 0.1, "to": 0.01}}, {"strategy": "random", "n_samples": 2}, "below 'to'"),
    ({"lr": {"low": 0.1, "high": 0.2}}, {"strategy": "random", "n_samples": 2}, "not a range"),
    ({"lr": {"from": 0.1, "to": 0.2, "spacing": "ln"}}, {"strategy": "random", "n_samples": 2}, "'spacing'"),
    ({"hidden": {"from": 2, "to": 8.5, "whole": True}}, {"strategy": "random", "n_samples": 2}, "whole"),
    ({"seed": [1, 2]}, {}, "`seeds` argument"),
    ({"hidden": [4]}, {"n_samples": 3}, "`n_samples`"),
    ({"hidden": [4]}, {"strategy": "random"}, "`n_samples`"),
    ({"hidden": [4]}, {"seeds": 0}, "`seeds`"),
    ({"hidden": [4]}, {"seeds": [1, 1]}, "repeats a seed"),
    ({"hidden": [4]}, {"strategy": "bayes"}, "`strategy`"),
])
def test_plan_refusals_name_the_field(space, kw, match):
    with pytest.raises((ValueError, TypeError), match=match):
        plan(BASE, space, **kw)


def test_bad_arguments_are_refused_before_anything_runs(sunspots, tmp_path):
    db = tmp_path / "runs.db"
    # The bad value is last in the list: the whole plan is checked first.
    with pytest.raises(ValueError, match="`window`"):
        sweep(sunspots, BASE, {"window": [4, 8, -1]}, store=db, progress=False)
    with pytest.raises(ValueError, match="`metric`"):
        sweep(sunspots, BASE, {"window": [4]}, metric="val_accuracy", store=db, progress=False)
    with pytest.raises(ValueError, match="`workers`"):
        sweep(sunspots, BASE, {"window": [4]}, workers=0, store=db, progress=False)
    with pytest.raises(TypeError, match="`executor`"):
        sweep(sunspots, BASE, {"window": [4]}, executor="dask", store=db, progress=False)
    assert not db.exists()
    assert _check_metric(None, "classification") == "val_log_loss"
    assert _check_metric("persistence_test_mae", "regression") == "persistence_test_mae"


# ---------------------------------------------------------------- sweeps in this process


def test_table_summary_best_and_compile_economy(sunspots, capsys):
    # batch_size 20 is used by no other test, so these programs are new to this process.
    base = BASE.replace(batch_size=20)
    space = {"window": [4, 8, 12], "activation": ["tanh", "relu", "linear"], "hidden": [4, 6]}
    res = sweep(sunspots, base, space, progress=True)
    assert "sweep" in capsys.readouterr().err  # the tqdm bar over runs
    t = res.table
    assert len(t) == 18 and (t["status"] == "ok").all() and (t["epochs"] == 2).all()
    for col in ("window", "activation", "hidden", "seed", "seconds", "compiles", "val_rmse", "test_rmse",
                "val_mase", "persistence_val_rmse", "seasonal_naive_test_mae", "linear_ar_val_rmse"):
        assert col in t.columns, col
    # Windows are padded to one shape and activation is data: one training program per hidden size.
    per_hidden = t.groupby("hidden")["compiles"].sum()
    assert (per_hidden <= 1).all() and per_hidden.sum() >= 1, per_hidden
    # Baselines do not depend on the network's settings, only on the window.
    assert t.groupby("window")["persistence_val_rmse"].nunique().eq(1).all()

    s = res.summary()
    assert list(s["rank"]) == list(range(1, 19)) and s["val_rmse"].is_monotonic_increasing
    assert (s["runs"] == 1).all() and (s["seed_spread"] == 0).all() and s["val_rmse_std"].isna().all()
    top = s.iloc[0]
    assert res.best() == base.replace(window=int(top["window"]), activation=str(top["activation"]),
                                      hidden=int(top["hidden"]))
    assert res.best_run()["val_rmse"] == t["val_rmse"].min()
    res.metric = "val_r2"  # higher is better: ranked the other way
    assert res.summary()["val_r2"].is_monotonic_decreasing
    assert "18 ok" in repr(res)


def test_seeds_summary_and_failed_and_diverged_rows(sunspots):
    base = BASE.replace(clip=None, optimizer="sgd", activation="linear", lr=0.01)
    # lr=10 without clipping blows up (Pascanu, Mikolov & Bengio 2013 on exploding
    # gradients); window=300 leaves no training windows in 309 rows: a DataError.
    res = sweep(sunspots, base, {"lr": [0.01, 10.0], "window": [8, 300]}, seeds=2, progress=False)
    t = res.table.set_index(["lr", "window", "seed"])
    assert len(t) == 8
    assert t.loc[(10.0, 8), "status"].str.startswith("diverged at epoch").all()
    assert (t.loc[(0.01, 8), "status"] == "ok").all()
    assert (t.xs(300, level="window")["status"] == "failed").all()
    assert t.xs(300, level="window")["message"].str.contains("window").all()
    s = res.summary().set_index(["lr", "window"])
    assert s.loc[(10.0, 8), "diverged"] == 1.0 and s.loc[(0.01, 8), "diverged"] == 0.0
    assert s.loc[(0.01, 300), "failed"] == 1.0 and np.isnan(s.loc[(0.01, 300), "val_rmse"])
    ok = t.loc[(0.01, 8), "val_rmse"]
    assert s.loc[(0.01, 8), "val_rmse"] == pytest.approx(ok.mean(), rel=1e-12)
    assert s.loc[(0.01, 8), "val_rmse_std"] == pytest.approx(ok.std(ddof=1), rel=1e-12)
    assert s.loc[(0.01, 8), "seed_spread"] == pytest.approx(abs(ok.iloc[0] - ok.iloc[1]), rel=1e-12)
    assert res.best().lr == 0.01
    with pytest.raises(DataError, match="every one of the 2 runs failed"):
        sweep(sunspots, base, {"window": [300, 400]}, progress=False)


def test_interrupt_and_stop_keep_finished_runs_and_resume(sunspots, tmp_path):
    db = tmp_path / "runs.db"
    space = {"window": [4, 8], "activation": ["tanh", "relu"]}

    def interrupt_after_two(rec, seen=[]):
        seen.append(rec)
        if len(seen) == 2:
            raise KeyboardInterrupt
    with pytest.raises(KeyboardInterrupt):
        sweep(sunspots, BASE, space, store=db, progress=False, on_run=interrupt_after_two)
    with rnnkit.RunStore(db) as store:
        assert len(store) == 2

    stop, ran = threading.Event(), []
    res = sweep(sunspots, BASE, space, store=db, progress=False, stop=stop,
                on_run=lambda rec: (ran.append(rec), stop.set()))
    assert len(ran) == 1 and len(res.table) == 3 and res.missing == 1

    ran.clear()
    res = sweep(sunspots, BASE, space, store=db, progress=False, on_run=ran.append)
    assert len(ran) == 1 and len(res.table) == 4 and res.missing == 0
    assert res.table["key"].is_unique


_SCRIPT = """
import sys, time
import statsmodels.api as sm
import rnnkit
df = sm.datasets.sunspots.load_pandas().data[["SUNACTIVITY"]]
base = rnnkit.Config(target="SUNACTIVITY", hidden=4, epochs=2, batch_size=32, season=11)
rnnkit.sweep(df, base, {"window": [4, 8], "activation": ["tanh", "relu"]}, seeds=2, store=sys.argv[1],
             progress=False, on_run=lambda rec: time.sleep(0.3))
"""


def _rows(db: Path) -> int:
    if not db.exists():
        return 0
    con = sqlite3.connect(db, timeout=30)
    try:
        return con.execute("SELECT COUNT(*) FROM runs").fetchone()[0]
    except sqlite3.OperationalError:  # the table is not created yet
        return 0
    finally:
        con.close()


def test_a_killed_sweep_resumes_with_every_run_once(sunspots, tmp_path):
    db = tmp_path / "runs.db"
    script = tmp_path / "sweep_job.py"
    script.write_text(textwrap.dedent(_SCRIPT))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    err = tmp_path / "stderr.txt"
    with open(err, "w") as f:
        proc = subprocess.Popen([sys.executable, str(script), str(db)], cwd=ROOT, env=env,
                                stdout=subprocess.DEVNULL, stderr=f)
    try:
        deadline = time.monotonic() + 600
        while _rows(db) < 3 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
        proc.send_signal(signal.SIGKILL)  # no clean-up, no goodbye
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    before = _rows(db)
    assert 3 <= before < 8, f"the job was not killed midway ({before} of 8 stored): {err.read_text()}"
    base = Config(target="SUNACTIVITY", hidden=4, epochs=2, batch_size=32, season=11)
    ran = []
    res = sweep(sunspots, base, {"window": [4, 8], "activation": ["tanh", "relu"]}, seeds=2, store=db,
                progress=False, on_run=ran.append)
    assert len(ran) == 8 - before  # only the missing runs ran
    assert len(res.table) == 8 and _rows(db) == 8 and res.table["key"].is_unique
    assert sorted(zip(res.table["window"], res.table["activation"], res.table["seed"])) == sorted(
        (w, a, s) for w in (4, 8) for a in ("tanh", "relu") for s in (0, 1))


# ---------------------------------------------------------------- processes


def test_process_workers_equal_the_serial_run(sunspots, monkeypatch):
    made = []
    real = _runner._shared_compile_cache

    def spy():
        env, path = real()
        made.append(path)
        return env, path
    monkeypatch.setattr(_runner, "_shared_compile_cache", spy)
    monkeypatch.delenv("JAX_COMPILATION_CACHE_DIR", raising=False)
    # rnnkit's cache off: the pool's own temporary folder (with it on, the workers get its
    # folder: tests/test_compilation_cache.py)
    kept = rnnkit.training._cache.cache_dir()
    rnnkit.compilation_cache(None)
    try:
        _pooled_equal_serial(sunspots, made)
    finally:
        rnnkit.compilation_cache(kept if kept is not None else None)


def _pooled_equal_serial(sunspots, made):
    space = {"window": [4, 8], "activation": ["tanh", "relu"]}
    serial = sweep(sunspots, BASE, space, progress=False)
    seen = []
    pooled = sweep(sunspots, BASE, space, workers=2, progress=False,
                   on_run=lambda rec: seen.extend(os.listdir(made[0])))
    # The workers wrote their compiled programs to one shared directory, gone afterwards
    # (jax's entries, or rnnkit's whole programs: rnnkit/training/_stored.py).
    assert any(name.startswith(("jit_epoch", "whole-")) for name in seen), seen
    assert not os.path.exists(made[0])
    cols = [c for c in serial.table.columns if "_val_" in c or "_test_" in c
            or c.startswith(("val_", "test_"))]
    # Same programs, same seeds; the workers run XLA on one thread, so float32
    # rounding may differ (common practice, no source: thread count changes blocking).
    pd.testing.assert_frame_equal(serial.table[cols + ["key", "status", "epochs"]],
                                  pooled.table[cols + ["key", "status", "epochs"]], **OTHER_PROCESS)


@pytest.mark.skipif(not hasattr(os, "sched_setaffinity") or len(os.sched_getaffinity(0)) < 2,
                    reason="binding workers to cores needs Linux and two usable cores")
def test_pool_workers_are_bound_to_one_core_each(tmp_path):
    probe = tmp_path / "probe.py"
    probe.write_text(textwrap.dedent("""
        import json, os, time
        from rnnkit.sweeps import _runner

        def where(_):
            time.sleep(0.5)  # keeps a worker busy so that both take tasks
            return os.getpid(), sorted(os.sched_getaffinity(0))

        if __name__ == "__main__":
            with _runner.process_pool(2) as pool:
                print(json.dumps(dict(pool.map(where, range(4)))))
    """))
    out = subprocess.run([sys.executable, str(probe)], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    cores = list(json.loads(out.stdout.strip().splitlines()[-1]).values())
    assert len(cores) == 2 and all(len(c) == 1 for c in cores) and cores[0] != cores[1], cores


def test_cell_is_a_sweep_dimension_with_one_program_per_cell_and_hidden(sunspots):
    # batch_size 22 is used by no other test, so these programs are new to this process.
    base = BASE.replace(batch_size=22, epochs=1)
    space = {"cell": ["elman", "gru", "lstm"], "window": [4, 8], "hidden": [3],
             "activation": ["tanh", "relu"]}
    res = sweep(sunspots, base, space, progress=False)
    t = res.table
    assert len(t) == 12 and (t["status"] == "ok").all()
    # windows padded to one shape, activation as data, the cell static: one program per (cell, hidden)
    per_program = t.groupby(["cell", "hidden"])["compiles"].sum()
    assert len(per_program) == 3 and (per_program <= 1).all(), per_program
    assert t.groupby("cell")["val_rmse"].nunique().gt(1).all()  # the cells trained differently
    assert res.best().cell in ("elman", "gru", "lstm")


def test_interleave_takes_one_run_per_program_in_turn():
    cfgs = [BASE.replace(hidden=h, activation=a) for h in (32, 16, 8)
            for a in ("tanh", "relu", "sigmoid")]
    tasks = [(i, {"steps": 8}) for i in range(len(cfgs))]
    order = _runner.interleave(tasks, cfgs)
    assert sorted(order) == sorted(tasks)  # every run once, nothing added
    assert [cfgs[i].hidden for i, _ in order] == [32, 16, 8] * 3
    assert [i for i, _ in order][:3] == [0, 3, 6]  # plan order kept within a program
    # runs whose padded shapes differ compile different programs
    split = _runner.interleave([(0, {"steps": 8}), (1, {"steps": 8}), (2, {"steps": 16})], cfgs)
    assert [i for i, _ in split] == [0, 2, 1]


def test_a_compilation_cache_of_the_callers_is_left_alone(monkeypatch, tmp_path):
    # rnnkit's own cache off (as at import when the caller set up jax's): workers keep the caller's
    monkeypatch.setattr(_runner._cache, "cache_dir", lambda: None)
    monkeypatch.setenv("JAX_COMPILATION_CACHE_DIR", str(tmp_path))
    assert _runner._shared_compile_cache() == ({}, None)


def test_public_names():
    assert rnnkit.sweep is sweep and rnnkit.plan is plan
    assert rnnkit.SweepResult.__name__ == "SweepResult"


def test_any_executor_stop_and_errors(sunspots, tmp_path, monkeypatch):
    # A thread pool is a concurrent.futures.Executor too: the same path as Dask, without processes.
    db = tmp_path / "runs.db"
    space = {"window": [4, 8], "activation": ["tanh", "relu", "linear"]}
    serial = sweep(sunspots, BASE, space, progress=False)
    stop = threading.Event()
    with ThreadPoolExecutor(max_workers=1) as pool:
        part = sweep(sunspots, BASE, space, executor=pool, store=db, progress=False, stop=stop,
                     on_run=lambda rec: stop.set())
    assert 1 <= len(part.table) < 6 and part.missing == 6 - len(part.table)
    with ThreadPoolExecutor(max_workers=2) as pool:
        rest = sweep(sunspots, BASE, space, executor=pool, workers=2, store=db, progress=False)
    cols = [c for c in serial.table.columns if c.startswith(("val_", "test_"))]
    pd.testing.assert_frame_equal(serial.table[cols + ["key"]], rest.table[cols + ["key"]], **SAME_RUN)

    def broken(*args, **kwargs):
        raise RuntimeError("a bug, not bad data")
    monkeypatch.setattr("rnnkit.sweeps._runner.fit", broken)
    # Any exception inside a run is that run's failed row; the sweep stores it and goes on.
    with ThreadPoolExecutor(max_workers=2) as pool, \
            pytest.raises(DataError, match="RuntimeError: a bug, not bad data"):
        sweep(sunspots, BASE, {"window": [5, 6]}, executor=pool, store=db, progress=False)
    with rnnkit.RunStore(db) as store:
        assert sum(r["status"] == "failed" for r in store.records()) == 2


def test_classification_sweep_ranks_by_log_loss():
    # Our generated demo scenario (labelled machine cycles): this checks the sweep's plumbing
    # for classification scores, not the quality of the network.
    df = rnnkit.datasets.packaging_line_faults(n_cycles=30)
    cfg = rnnkit.datasets.suggested_config("packaging_line_faults").replace(hidden=4, epochs=2)
    res = sweep(df, cfg, {"activation": ["tanh", "relu"]}, progress=False)
    assert res.metric == "val_log_loss"
    assert {"val_accuracy", "val_balanced_accuracy", "test_log_loss", "majority_val_log_loss"} <= set(
        res.table.columns)
    s = res.summary()
    assert s["val_log_loss"].is_monotonic_increasing and res.best().activation == s["activation"][0]
    res.metric = "val_accuracy"  # higher is better
    assert res.summary()["val_accuracy"].is_monotonic_decreasing


# ---------------------------------------------------------------- kept weights


def test_a_run_is_rebuilt_from_its_kept_weights(sunspots, tmp_path):
    from sklearn.metrics import mean_squared_error

    from rnnkit.sweeps._store import RunStore

    path = tmp_path / "kept.sqlite"
    space = {"window": [4, 8], "activation": ["tanh", "relu"]}
    res = sweep(sunspots, BASE, space, store=path, progress=False)
    t = res.table
    for i in range(len(t)):
        r = res.result(i)
        assert (r.config.window, r.config.activation) == (t["window"][i], t["activation"][i])
        assert r.status == t["status"][i]
        assert len(r.history) == t["epochs"][i] == 2
        # Scored again from the kept weights, without training: the sweep's own numbers.
        np.testing.assert_allclose(r.metrics.loc["rnn", "val_rmse"], t["val_rmse"][i], **SAME_RUN)
        # ... and scikit-learn's RMSE over the rebuilt run's validation predictions agrees
        # (scikit-learn as the outside reference).
        val = r.predict().query("split == 'val'")
        rmse = mean_squared_error(val["actual"], val["predicted"]) ** 0.5
        np.testing.assert_allclose(rmse, t["val_rmse"][i], rtol=1e-6)
    # The winner (None) is the best run; fitting its config again gives the kept weights.
    best = res.result()
    again = rnnkit.fit(sunspots, res.best(), progress=False)
    assert best.config == again.config  # resolved alike (target, features, season filled in)
    for name, w in again.params.items():
        np.testing.assert_allclose(best.params[name], w, **PADDED32)
    # The weights are in the store file, as compressed npz read with allow_pickle=False.
    with RunStore(path) as store:
        kept = store.kept(t["key"])
    assert set(kept) == set(t["key"]) and all(k["best_epoch"] in (0, 1, 2) for k in kept.values())
    # A second sweep over the same store runs nothing and still rebuilds every run.
    res2 = sweep(sunspots, BASE, space, store=path, progress=False)
    assert (res2.table["compiles"] == t["compiles"]).all()
    np.testing.assert_array_equal(res2.result(3).params["V"], res.result(3).params["V"])
    with pytest.raises(IndexError, match="0..3"):
        res.result(4)
    with pytest.raises(ValueError, match="not a run of this sweep"):
        res.result("nope")
