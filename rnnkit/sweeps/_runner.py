"""Run planned Configs: serially, in worker processes, or on any Executor; store each run.

The parent process owns the run store. It checks the plan against the store,
prepares each distinct data setting once to find the common padded shapes
(``_train.shape_plan``), then hands runs out; a worker returns a small result
dict and the parent commits it before it reports the run as done. Runs that
differ only in activation, learning rate or seed reuse one compiled program
in a process; different windows share it through the padded shapes.
"""
from __future__ import annotations

import concurrent.futures as cf
import contextlib
import datetime as _dt
import io
import json
import math
import multiprocessing
import os
import re
import shutil
import signal
import tempfile
import threading
import time
from typing import Callable, Dict, List, Optional, Sequence

import jax
import numpy as np
import pandas as pd

from ..data._config import Config
from ..data._prepare import prepare
from ..data._errors import DataError
from ._export import fingerprint
from ..fitting._backtest import fold_frame, plan_folds
from ..fitting._fit import fit
from ._store import open_store, process_alive, run_key
from ..training import _cache
from ..training._train import shape_plan

# One XLA / BLAS thread per worker process, in its environment from the start (jax
# reads XLA_FLAGS when its CPU backend starts, BLAS libraries when they load). The XLA
# flags alone do not hold XLA's matrix products to one thread (measured: a training loop
# still used 1.76 cores); our own pool's workers also bind themselves to one core
# (_worker_init), which does.
WORKER_ENV = {
    "XLA_FLAGS": "--xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1",
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}
# Fields that change neither the windows nor the scaled data (they only shape training).
TRAINING_FIELDS = ("hidden", "activation", "init", "recurrent_scale", "cell", "optimizer", "lr",
                   "weight_decay", "epochs", "batch_size", "clip", "patience", "seed")
_ENV_LOCK = threading.Lock()
MAX_WORKERS = 1024  # worker processes or runs in flight


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the system has one)."""
    if hasattr(os, "sched_getaffinity"):
        return max(len(os.sched_getaffinity(0)), 1)
    return max(os.cpu_count() or 1, 1)


def pool_size(workers: int, runs: int) -> int:
    """Processes our own pool starts: `workers`, but no more than the runs and the usable cores
    (each worker binds itself to one core, so more would only queue and cost memory)."""
    return max(1, min(int(workers), int(runs), usable_cores()))


def worker_env(base: Optional[dict] = None) -> dict:
    """The environment variables of a worker: WORKER_ENV, XLA_FLAGS appended to any already set."""
    base = os.environ if base is None else base
    env = dict(WORKER_ENV)
    if base.get("XLA_FLAGS"):
        env["XLA_FLAGS"] = f"{base['XLA_FLAGS']} {WORKER_ENV['XLA_FLAGS']}"
    return env


@contextlib.contextmanager
def _spawn_env(extra: Optional[dict] = None):
    """Hold WORKER_ENV (and `extra`) in os.environ while the pool spawns a child, so the
    child starts with it (spawned children copy the parent's environment at start)."""
    env = {**worker_env(), **(extra or {})}
    with _ENV_LOCK:
        saved = {k: os.environ.get(k) for k in env}
        os.environ.update(env)
        try:
            yield
        finally:
            for k, v in saved.items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v


def _worker_init(counter=None) -> None:
    """Set up a pool worker before its first task (before jax starts its CPU backend).

    With `counter` (a shared multiprocessing Value), the n-th worker started binds
    itself to the n-th usable core (round robin): XLA then sizes its thread pool to
    that one core. Measured here, XLA's intra-op threads are a poor trade for the
    small products of these networks: one fit ran 2.99 s on one pinned core against
    2.86 s with XLA's two threads on 1.16 cores, so two pinned workers each get a
    whole core's worth of runs instead of competing for both.
    """
    # A no-op when the pool spawned us under _spawn_env; keeps later imports single-threaded otherwise.
    for k, v in WORKER_ENV.items():
        os.environ.setdefault(k, v)
    # Ctrl-C in a terminal reaches every process of the group: the sweep's own process
    # handles it (and ends its workers); a worker that also raised would leave the pool
    # half-broken, with the parent waiting on it.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if counter is None or not hasattr(os, "sched_setaffinity"):
        return
    with counter.get_lock():
        n = counter.value
        counter.value += 1
    cores = sorted(os.sched_getaffinity(0))
    if len(cores) > 1:
        os.sched_setaffinity(0, {cores[n % len(cores)]})


def _shared_compile_cache() -> tuple:
    """(environment, directory to remove afterwards) for a pool whose workers share compiled programs.

    Every worker process compiles its own programs; with jax's persistent
    compilation cache in one directory, a program one worker has compiled is
    loaded from disk by the others (measured: a first fit of 4.2 s took 1.6 s
    with the program on disk). The workers use this process's folder
    (``training._cache``: the user's cache, or the one ``compilation_cache``
    chose), so programs also outlive the sweep. With that cache off, a
    temporary folder lives as long as the pool. A cache the caller has set up
    for jax itself (JAX_COMPILATION_CACHE_DIR) is used as it is.
    """
    remove_stale_caches()  # folders of earlier pools whose process was killed
    if _cache.cache_dir() is not None:
        return {_cache.ENV: str(_cache.cache_dir())}, None
    if os.environ.get("JAX_COMPILATION_CACHE_DIR"):
        return {}, None
    path = tempfile.mkdtemp(prefix=f"{CACHE_PREFIX}{os.getpid()}-")
    return {_cache.ENV: path}, path


CACHE_PREFIX = "rnnkit-programs-"  # + "<pid of the sweep's process>-<random>"


def remove_stale_caches(folder: Optional[str] = None) -> list:
    """Remove compilation-cache folders of sweeps whose process is gone (killed before it could
    clean up); returns the paths removed. Folders of live processes are left alone."""
    folder = tempfile.gettempdir() if folder is None else folder
    removed = []
    try:
        names = os.listdir(folder)
    except OSError:
        return removed
    for name in names:
        m = re.fullmatch(re.escape(CACHE_PREFIX) + r"(\d+)-\w+", name)
        if m is None or process_alive(int(m.group(1))):
            continue
        path = os.path.join(folder, name)
        if os.path.isdir(path) and not os.path.islink(path):
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    return removed


def _end_workers(pool: cf.ProcessPoolExecutor) -> None:
    """Terminate our pool's processes at once (Ctrl-C or an error): runs in flight are lost,
    finished ones are stored already, and nothing is left waiting on a worker."""
    for proc in list((getattr(pool, "_processes", None) or {}).values()):
        if proc.is_alive():
            proc.terminate()
    for proc in list((getattr(pool, "_processes", None) or {}).values()):
        proc.join(timeout=5)


def _program_group(config: Config, shapes: Optional[dict]) -> tuple:
    """What tells two runs' training programs apart (parameter shapes, padded data shapes,
    static choices); runs in one group share a program."""
    return (config.cell, config.hidden, config.optimizer, config.batch_size, config.clip is None, config.init,
            config.dtype, tuple(sorted((shapes or {}).items())))


def interleave(tasks: Sequence[tuple], configs: Sequence[Config]) -> list:
    """(plan index, shapes) tasks reordered one per program group in turn, groups in order of
    first appearance: workers starting together compile different programs, and with a
    shared compilation cache each program is compiled about once."""
    groups: Dict[tuple, list] = {}
    for i, s in tasks:
        groups.setdefault(_program_group(configs[i], s), []).append((i, s))
    queues = list(groups.values())
    out = []
    while queues:
        out += [q.pop(0) for q in queues]
        queues = [q for q in queues if q]
    return out


def process_pool(workers: int) -> cf.ProcessPoolExecutor:
    """A pool of `workers` spawned processes, each bound to one core (round robin) and so
    running XLA on one thread."""
    ctx = multiprocessing.get_context("spawn")
    return cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_worker_init,
                                  initargs=(ctx.Value("i", 0),))


def flat_metrics(metrics: pd.DataFrame) -> Dict[str, float]:
    """FitResult.metrics -> {"val_rmse": .., "persistence_val_rmse": ..}: the network's
    validation and test scores under their own names, each baseline's prefixed by its name."""
    out = {}
    for model, row in metrics.iterrows():
        for col, v in row.items():
            if str(col).startswith(("val_", "test_")):
                out[str(col) if model == "rnn" else f"{model}_{col}"] = float(v)
    return out


def pack_params(params: dict) -> bytes:
    """A run's weights as compressed .npz bytes (plain arrays, no pickle)."""
    buf = io.BytesIO()
    np.savez_compressed(buf, **{k: np.asarray(v) for k, v in params.items()})
    return buf.getvalue()


def unpack_params(blob: bytes) -> dict:
    """The weights dict from ``pack_params`` bytes (read with allow_pickle=False)."""
    with np.load(io.BytesIO(blob), allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def pack_history(history: pd.DataFrame) -> str:
    """A history frame as JSON text: column -> list of values (NaN as null)."""
    cols = {str(c): [None if (isinstance(v, float) and not math.isfinite(v)) else v
                     for v in history[c].tolist()] for c in history.columns}
    return json.dumps(cols, allow_nan=False)


def unpack_history(text: str) -> pd.DataFrame:
    """The history frame from ``pack_history`` text (null back to NaN)."""
    cols = json.loads(text)
    frame = pd.DataFrame(cols)
    for c in frame.columns:
        if c != "epoch":
            frame[c] = frame[c].astype(np.float64)
    return frame


def run_one(df: pd.DataFrame, config: Config, shapes: Optional[dict],
            x64: Optional[bool] = None) -> dict:
    """Fit one Config and return its outcome; any exception becomes a "failed" outcome.

    Args:
        df: the frame.
        config: the run's Config.
        shapes: padding targets shared by the sweep's runs (``shape_plan``), or None.
        x64: jax's x64 mode to compute in (the parent's), so that a worker's
            numbers equal the parent's; None leaves it alone.
    Returns:
        dict status, epochs, seconds, compiles, metrics ({name: float}), message,
        and for a trained run the kept weights: params (npz bytes), history (JSON
        text), best_epoch.
    """
    if x64 is not None and bool(jax.config.jax_enable_x64) != x64:
        jax.config.update("jax_enable_x64", x64)
    t0 = time.perf_counter()
    try:
        res = fit(df, config, progress=False, shapes=shapes)
    except Exception as e:  # noqa: BLE001 - a failure is one run's result, never the sweep's end
        return failed_outcome(e, time.perf_counter() - t0)
    return {"status": res.status, "epochs": int(len(res.history)),
            "seconds": time.perf_counter() - t0, "compiles": int(res.compiles),
            "metrics": flat_metrics(res.metrics), "message": "",
            "params": pack_params(res.params), "history": pack_history(res.history),
            "best_epoch": int(res.best_epoch)}


def failure_message(e: BaseException) -> str:
    """The message of a failed run: a DataError's own text, else the exception's type and text."""
    return str(e) if isinstance(e, DataError) else f"{type(e).__name__}: {e}"


def failed_outcome(e: BaseException, seconds: float = 0.0) -> dict:
    """The outcome dict of a run that raised `e`."""
    return {"status": "failed", "epochs": 0, "seconds": float(seconds), "compiles": 0,
            "metrics": {}, "message": failure_message(e)}


def remote_run(df: pd.DataFrame, config: Config, shapes: Optional[dict], x64: bool,
               parent: int) -> dict:
    """``run_one`` as a task for another process (a pool worker or a Dask worker).

    In a process other than the sweep's own, WORKER_ENV is added to the
    environment first: it takes effect when this is the process's first jax
    work (jax reads XLA_FLAGS when it starts its CPU backend). A cluster
    started with ``env=WORKER_ENV`` for its workers has it from the start.
    """
    if os.getpid() != parent:
        for k, v in WORKER_ENV.items():
            if k == "XLA_FLAGS":
                if "xla_cpu_multi_thread_eigen" not in os.environ.get(k, ""):
                    os.environ[k] = worker_env()[k]
            else:
                os.environ.setdefault(k, v)
    return run_one(df, config, shapes, x64)


def _data_key(config: Config) -> Config:
    return config.replace(**{f: getattr(Config, f) for f in TRAINING_FIELDS})


def plan_shapes(df: pd.DataFrame, configs: Sequence[Config], folds: Optional[dict] = None,
                units: Optional[Sequence[tuple]] = None):
    """Common padded shapes for the runs, and the message of runs that cannot be prepared.

    Args:
        df: the frame.
        configs: the planned Configs.
        folds: None, or the fold spec of a backtest sweep (``fold_spec``).
        units: (config index, fold number or None) pairs to plan; None: every config, no fold.
    Returns:
        (shapes, failed, frames): shapes[j] a dict for ``train(shapes=)`` or None;
        failed {j: message}; frames[j] None or (fold frame, Config with its split column)
        for unit j. All folds of all settings share one plan per family.
    """
    units = [(i, None) for i in range(len(configs))] if units is None else list(units)
    prepared, failed, frames, plans_of = {}, {}, [], {}
    for j, (i, k) in enumerate(units):
        c = configs[i]
        dk = _data_key(c)
        frame = None
        if k is not None:
            if dk not in plans_of:
                try:
                    fl, fcfg, column, _ = plan_folds(df, dk, folds["folds"], test_size=folds["test_size"],
                                                     window=folds["window"], seed=folds["seed"])
                    plans_of[dk] = (fl, column)
                except DataError as e:
                    plans_of[dk] = e
            if isinstance(plans_of[dk], DataError):
                failed[j] = str(plans_of[dk])
                frames.append(None)
                continue
            fl, column = plans_of[dk]
            frame = (fold_frame(df, fl[k - 1], column), c.replace(split_column=column))
        frames.append(frame)
        key = (dk, k)
        if key not in prepared:
            try:
                prepared[key] = prepare(df, c) if frame is None else prepare(frame[0], frame[1])
            except Exception as e:  # noqa: BLE001 - recorded as the run's failure
                prepared[key] = e
        if isinstance(prepared[key], Exception):
            msg = failure_message(prepared[key])
            failed[j] = f"fold {k}: {msg}" if k is not None else msg
    # Runs can share a program only when they agree on everything but the window geometry.
    families: Dict[tuple, list] = {}
    for key, p in prepared.items():
        if not isinstance(p, Exception):
            k = key[0]
            families.setdefault((k.task, k.mode, k.dtype, p.n_inputs, p.n_outputs), []).append(key)
    plans = {}
    for members in families.values():
        sp = shape_plan([prepared[key] for key in members])
        plans.update({key: sp for key in members})
    shapes = [plans.get((_data_key(configs[i]), k)) for i, k in units]
    return shapes, failed, frames


def fold_spec(folds: int, test_size: Optional[int] = None, window="expanding", seed: int = 0) -> dict:
    """How a backtest sweep makes its folds (part of every fold run's key and of the document)."""
    return {"folds": int(folds), "test_size": None if test_size is None else int(test_size),
            "window": window, "seed": int(seed)}


def _record(key, config, fp, outcome, fold=None) -> dict:
    rec = {"key": key, "config": config.to_dict(), "fingerprint": fp, "fold": fold}
    rec.update(outcome)
    rec["finished"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    return rec


def _fingerprints(df, configs) -> List[str]:
    cache = {}
    out = []
    for c in configs:
        cols = (c.target, c.features, c.time_column, c.group_column, c.split_column, c.task)
        if cols not in cache:
            try:
                cache[cols] = fingerprint(df, c)
            except Exception:  # noqa: BLE001 - the run will fail and say why
                cache[cols] = fingerprint(df, None)  # the run will fail; key it by the whole frame
        out.append(cache[cols])
    return out


def run(df: pd.DataFrame, configs: Sequence[Config], *, store=None, workers: int = 1,
        executor: Optional[cf.Executor] = None, progress: bool = True,
        stop: Optional[threading.Event] = None, on_run: Optional[Callable[[dict], None]] = None,
        folds: Optional[dict] = None) -> List[dict]:
    """Run every Config not yet in `store`; commit each finished run before reporting it.

    Args:
        df: the frame (never modified).
        configs: the planned Configs.
        store: a RunStore, the path of one, or None (in memory); runs already
            in it are not run again.
        workers: 1 runs in this process; N > 1 in N spawned processes (or, with
            `executor`, at most N runs in flight).
        executor: any concurrent.futures.Executor (e.g. a Dask client's
            ``get_executor()``); all runs are submitted at once unless workers > 1.
        progress: a tqdm bar over runs.
        stop: a threading.Event; once set, no new run starts, runs in flight finish and are stored.
        on_run: called with each stored record (dict), in the calling thread.
        folds: None (each Config fitted on its own split), or a ``fold_spec``: each Config
            is backtested, one stored run per fold (record "fold": {"fold": k, ...}).
    Returns:
        the stored records of `configs`, in plan order, folds in order (runs never started
        are absent); a trained run's record also holds its kept weights (params, history,
        best_epoch).
    """
    store, owned = open_store(store)
    try:
        return _run(df, configs, store, workers, executor, progress, stop, on_run, folds)
    finally:
        if owned:
            store.close()


def _run(df, configs, store, workers, executor, progress, stop, on_run, folds=None) -> List[dict]:
    fps = _fingerprints(df, configs)
    units = [(i, k) for i in range(len(configs))
             for k in ([None] if folds is None else range(1, folds["folds"] + 1))]
    specs = [None if k is None else {"fold": k, **folds} for _, k in units]
    keys = [run_key(configs[i], fps[i], spec) for (i, _), spec in zip(units, specs)]
    done = store.keys()
    first = {}  # key -> first plan position: a Config listed twice runs once
    for u, k in enumerate(keys):
        first.setdefault(k, u)
    todo = [u for k, u in first.items() if k not in done]
    from tqdm.auto import tqdm  # on first use, as in training._train

    bar = tqdm(total=len(first), initial=len(first) - len(todo), desc="sweep", unit="run",
               disable=not progress)

    def finish(u, outcome):
        i = units[u][0]
        rec = _record(keys[u], configs[i], fps[i], outcome, specs[u])
        store.put(rec)  # committed before anything else learns of the run
        bar.update(1)
        bar.set_postfix(status=rec["status"][:20])
        if on_run is not None:
            on_run(rec)

    def stopped():
        return stop is not None and stop.is_set()

    def claim(i):  # False: another process runs it (or has stored it)
        return store.claim(keys[i])

    try:
        if todo:
            shapes, failed, frames = plan_shapes(df, configs, folds, [units[u] for u in todo])
            tasks, jobs = [], {}
            for j, u in enumerate(todo):
                if j in failed:
                    finish(u, {"status": "failed", "epochs": 0, "seconds": 0.0, "compiles": 0,
                               "metrics": {}, "message": failed[j]})
                else:
                    tasks.append((u, shapes[j]))
                    i = units[u][0]
                    jobs[u] = (df, configs[i]) if frames[j] is None else frames[j]
            x64 = bool(jax.config.jax_enable_x64)
            while tasks and not stopped():
                if executor is None and workers == 1:
                    skipped = []
                    for u, s in tasks:
                        if stopped():
                            break
                        if not claim(u):
                            skipped.append((u, s))
                            continue
                        finish(u, run_one(*jobs[u], s))
                else:
                    skipped = _run_parallel(jobs, [configs[i] for i, _ in units], tasks, x64, workers,
                                            executor, stop, finish, claim)
                tasks = _wait_for_others(store, keys, skipped, stopped, bar)
    finally:
        store.release()
        bar.close()
    got = store.get(keys)
    kept = store.kept(got)
    for k, w in kept.items():
        got[k].update(w)
    return [got[k] for k in dict.fromkeys(keys) if k in got]


def _wait_for_others(store, keys, skipped, stopped, bar, poll: float = 0.5) -> list:
    """Wait while other processes run the `skipped` runs they claimed; return those to run here
    (not stored, and their claim gone: the other process stopped or died), or [] when all are stored."""
    while skipped and not stopped():
        done = store.keys()
        left = [t for t in skipped if keys[t[0]] not in done]
        bar.update(len(skipped) - len(left))
        skipped = left
        busy = store.claimed_elsewhere(keys[i] for i, _ in left)
        if any(keys[i] not in busy for i, _ in left):
            return left
        if left:
            time.sleep(poll)
    return []


def _run_parallel(jobs, configs, tasks, x64, workers, executor, stop, finish, claim) -> list:
    """Submit runs to a pool (ours) or the caller's executor; store each result as it comes.

    jobs: unit -> (frame, Config) to fit; configs: unit -> Config (for the program groups).
    Returns the tasks not run because `claim` said another process runs them."""
    own = executor is None
    if own:
        workers = pool_size(workers, len(tasks))
    pool = process_pool(workers) if own else executor
    cache_env, cache_dir = _shared_compile_cache() if own else ({}, None)
    limit = workers if (own or workers > 1) else max(len(tasks), 1)
    pending = interleave(tasks, configs)
    running: Dict[cf.Future, int] = {}
    skipped = []
    ok = False
    try:
        while pending or running:
            while pending and len(running) < limit and not (stop is not None and stop.is_set()):
                i, s = pending.pop(0)
                if not claim(i):
                    skipped.append((i, s))
                    continue
                with _spawn_env(cache_env) if own else contextlib.nullcontext():
                    frame, config = jobs[i]
                    running[pool.submit(remote_run, frame, config, s, x64, os.getpid())] = i
            if not running:
                break
            finished, _ = cf.wait(running, timeout=0.5, return_when=cf.FIRST_COMPLETED)
            for f in finished:
                i = running.pop(f)
                try:
                    outcome = f.result()
                except Exception as e:  # noqa: BLE001 - a lost worker or a task that could not be sent
                    outcome = failed_outcome(e)
                finish(i, outcome)
            if stop is not None and stop.is_set():
                for f in [f for f in running if f.cancel()]:
                    running.pop(f)
                pending.clear()
        ok = True
    finally:
        if not ok:
            for f in running:
                f.cancel()
            if own:
                _end_workers(pool)
        if own:
            pool.shutdown(wait=ok, cancel_futures=True)
        if cache_dir is not None:
            shutil.rmtree(cache_dir, ignore_errors=True)
    return skipped
