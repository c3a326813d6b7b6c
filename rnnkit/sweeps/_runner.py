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
import multiprocessing
import os
import shutil
import tempfile
import threading
import time
from typing import Callable, Dict, List, Optional, Sequence

import jax
import pandas as pd
from tqdm.auto import tqdm

from ..data._config import Config
from ..data._prepare import prepare
from ..data._errors import DataError
from ._export import fingerprint
from ..fitting._fit import fit
from ._store import open_store, run_key
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
    with the program on disk). The directory lives as long as the pool. A cache
    the caller has set up (JAX_COMPILATION_CACHE_DIR) is used as it is.
    """
    if os.environ.get("JAX_COMPILATION_CACHE_DIR"):
        return {}, None
    path = tempfile.mkdtemp(prefix="rnnkit-programs-")
    return {"JAX_COMPILATION_CACHE_DIR": path,
            "JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS": "0",
            "JAX_PERSISTENT_CACHE_MIN_ENTRY_SIZE_BYTES": "0"}, path


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


def run_one(df: pd.DataFrame, config: Config, shapes: Optional[dict],
            x64: Optional[bool] = None) -> dict:
    """Fit one Config and return its outcome; a DataError becomes a "failed" outcome.

    Args:
        df: the frame.
        config: the run's Config.
        shapes: padding targets shared by the sweep's runs (``shape_plan``), or None.
        x64: jax's x64 mode to compute in (the parent's), so that a worker's
            numbers equal the parent's; None leaves it alone.
    Returns:
        dict status, epochs, seconds, compiles, metrics ({name: float}), message.
    """
    if x64 is not None and bool(jax.config.jax_enable_x64) != x64:
        jax.config.update("jax_enable_x64", x64)
    t0 = time.perf_counter()
    try:
        res = fit(df, config, progress=False, shapes=shapes)
    except DataError as e:
        return {"status": "failed", "epochs": 0, "seconds": time.perf_counter() - t0,
                "compiles": 0, "metrics": {}, "message": str(e)}
    return {"status": res.status, "epochs": int(len(res.history)),
            "seconds": time.perf_counter() - t0, "compiles": int(res.compiles),
            "metrics": flat_metrics(res.metrics), "message": ""}


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


def plan_shapes(df: pd.DataFrame, configs: Sequence[Config]):
    """Common padded shapes for the runs, and the DataError message of runs that cannot be prepared.

    Returns:
        (shapes, failed): shapes[i] a dict for ``train(shapes=)`` or None;
        failed {i: message}.
    """
    prepared, failed = {}, {}
    for i, c in enumerate(configs):
        k = _data_key(c)
        if k not in prepared:
            try:
                prepared[k] = prepare(df, c)
            except DataError as e:
                prepared[k] = e
        if isinstance(prepared[k], DataError):
            failed[i] = str(prepared[k])
    # Runs can share a program only when they agree on everything but the window geometry.
    families: Dict[tuple, list] = {}
    for k, p in prepared.items():
        if not isinstance(p, DataError):
            families.setdefault((k.task, k.mode, k.dtype, p.n_inputs, p.n_outputs), []).append(k)
    plans = {}
    for members in families.values():
        s = shape_plan([prepared[k] for k in members])
        plans.update({k: s for k in members})
    return [plans.get(_data_key(c)) for c in configs], failed


def _record(key, config, fp, outcome) -> dict:
    rec = {"key": key, "config": config.to_dict(), "fingerprint": fp}
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
            except DataError:
                cache[cols] = fingerprint(df, None)  # the run will fail; key it by the whole frame
        out.append(cache[cols])
    return out


def run(df: pd.DataFrame, configs: Sequence[Config], *, store=None, workers: int = 1,
        executor: Optional[cf.Executor] = None, progress: bool = True,
        stop: Optional[threading.Event] = None, on_run: Optional[Callable[[dict], None]] = None
        ) -> List[dict]:
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
    Returns:
        the stored records of `configs`, in plan order (runs never started are absent).
    """
    store, owned = open_store(store)
    try:
        return _run(df, configs, store, workers, executor, progress, stop, on_run)
    finally:
        if owned:
            store.close()


def _run(df, configs, store, workers, executor, progress, stop, on_run) -> List[dict]:
    fps = _fingerprints(df, configs)
    keys = [run_key(c, fp) for c, fp in zip(configs, fps)]
    done = store.keys()
    first = {}  # key -> first plan position: a Config listed twice runs once
    for i, k in enumerate(keys):
        first.setdefault(k, i)
    todo = [i for k, i in first.items() if k not in done]
    bar = tqdm(total=len(first), initial=len(first) - len(todo), desc="sweep", unit="run",
               disable=not progress)

    def finish(i, outcome):
        rec = _record(keys[i], configs[i], fps[i], outcome)
        store.put(rec)  # committed before anything else learns of the run
        bar.update(1)
        bar.set_postfix(status=rec["status"][:20])
        if on_run is not None:
            on_run(rec)

    try:
        if todo:
            shapes, failed = plan_shapes(df, [configs[i] for i in todo])
            tasks = []
            for j, i in enumerate(todo):
                if j in failed:
                    finish(i, {"status": "failed", "epochs": 0, "seconds": 0.0, "compiles": 0,
                               "metrics": {}, "message": failed[j]})
                else:
                    tasks.append((i, shapes[j]))
            x64 = bool(jax.config.jax_enable_x64)
            if executor is None and workers == 1:
                for i, s in tasks:
                    if stop is not None and stop.is_set():
                        break
                    finish(i, run_one(df, configs[i], s))
            else:
                _run_parallel(df, configs, tasks, x64, workers, executor, stop, finish)
    finally:
        bar.close()
    got = store.get(keys)
    return [got[k] for k in dict.fromkeys(keys) if k in got]


def _run_parallel(df, configs, tasks, x64, workers, executor, stop, finish) -> None:
    """Submit runs to a pool (ours) or the caller's executor; store each result as it comes."""
    own = executor is None
    pool = process_pool(workers) if own else executor
    cache_env, cache_dir = _shared_compile_cache() if own else ({}, None)
    limit = workers if (own or workers > 1) else max(len(tasks), 1)
    pending = interleave(tasks, configs)
    running: Dict[cf.Future, int] = {}
    ok = False
    try:
        while pending or running:
            while pending and len(running) < limit and not (stop is not None and stop.is_set()):
                i, s = pending.pop(0)
                with _spawn_env(cache_env) if own else contextlib.nullcontext():
                    running[pool.submit(remote_run, df, configs[i], s, x64, os.getpid())] = i
            if not running:
                break
            finished, _ = cf.wait(running, timeout=0.5, return_when=cf.FIRST_COMPLETED)
            for f in finished:
                i = running.pop(f)
                finish(i, f.result())  # a worker's unexpected error ends the sweep here
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
            pool.shutdown(wait=ok, cancel_futures=True)
        if cache_dir is not None:
            shutil.rmtree(cache_dir, ignore_errors=True)
