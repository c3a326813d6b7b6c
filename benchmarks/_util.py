"""Pieces shared by the benchmark scripts: jax compile time, target lines, child processes.

Every benchmark script prints one line per target,

    TARGET <name>: <measured> (target <target>) PASS|MISS

and, last, ``RESULT <json>`` holding the same numbers and the details, which
``run.py`` reads when it runs the script as a child process.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Dict, List, Optional, Sequence

ROOT = Path(__file__).resolve().parents[1]  # the checkout, so that `import rnnkit` finds it
RESULT_PREFIX = "RESULT "

# Compile phases of a jitted function, as jax 0.10.2 names its monitoring events
# (jax/_src/dispatch.py): tracing to a jaxpr, lowering to an MLIR module, and
# XLA's compile. Read from jax when it has them, so a renamed event shows up as
# an error here instead of as a silent zero.
_EVENT_NAMES = ("JAXPR_TRACE_EVENT", "JAXPR_TO_MLIR_MODULE_EVENT", "BACKEND_COMPILE_EVENT")
_EVENT_LITERALS = ("/jax/core/compile/jaxpr_trace_duration",
                   "/jax/core/compile/jaxpr_to_mlir_module_duration",
                   "/jax/core/compile/backend_compile_duration")


def compile_events() -> tuple:
    """The three compile-phase event names of the installed jax."""
    from jax._src import dispatch

    missing = [n for n in _EVENT_NAMES if not hasattr(dispatch, n)]
    if missing:
        raise RuntimeError(f"jax {__import__('jax').__version__} has no {missing} in jax._src.dispatch; "
                           f"the benchmark's compile clock expects {_EVENT_LITERALS}")
    return tuple(getattr(dispatch, n) for n in _EVENT_NAMES)


class CompileClock:
    """Seconds jax spends compiling while the clock is on (a context manager).

    Listens to jax.monitoring duration events; sums trace + lowering + XLA
    compile, by phase and by function name. The trace event is recorded only
    at the outermost trace (jax checks ``trace_state_clean``), so nested jits
    are not counted twice. Only the calling process is seen: compiles in a
    worker process need a clock in that process.

    Also the process CPU time spent inside those events (``cpu_seconds``;
    jax records a scalar at each event's start): on a shared machine wall
    time stretches with the load, CPU time much less. It assumes that no
    other thread of the process computes while one compiles (true of the
    benchmark processes, which compile and train in one thread).
    """

    def __init__(self):
        self.events = compile_events()
        self.by_event: Dict[str, float] = {e: 0.0 for e in self.events}
        self.by_function: Dict[str, float] = {}
        self.backend_compiles = 0
        self.cpu_seconds = 0.0
        self._cpu_start: Dict[str, float] = {}
        self._lock = threading.Lock()

    def _start(self, event, value, **kw):
        if event in self.by_event:
            self._cpu_start[event] = time.process_time()

    def _listen(self, event, duration, **kw):
        if event not in self.by_event:
            return
        with self._lock:
            start = self._cpu_start.pop(event, None)
            if start is not None:
                self.cpu_seconds += time.process_time() - start
            self.by_event[event] += float(duration)
            name = str(kw.get("fun_name", "?"))
            self.by_function[name] = self.by_function.get(name, 0.0) + float(duration)
            if event == self.events[2]:
                self.backend_compiles += 1

    def __enter__(self) -> "CompileClock":
        import jax.monitoring

        jax.monitoring.register_scalar_listener(self._start)
        jax.monitoring.register_event_duration_secs_listener(self._listen)
        return self

    def __exit__(self, *exc):
        import jax.monitoring

        jax.monitoring.unregister_event_duration_listener(self._listen)
        jax.monitoring.unregister_scalar_listener(self._start)

    @property
    def seconds(self) -> float:
        return sum(self.by_event.values())

    def summary(self, top: int = 6) -> dict:
        """Total, per phase (short names) and the costliest functions, in seconds."""
        short = dict(zip(self.events, ("trace", "lower", "xla_compile")))
        worst = sorted(self.by_function.items(), key=lambda kv: -kv[1])[:top]
        return {"seconds": round(self.seconds, 3), "cpu_seconds": round(self.cpu_seconds, 3),
                "by_phase": {short[e]: round(v, 3) for e, v in self.by_event.items()},
                "backend_compiles": self.backend_compiles,
                "by_function": {k: round(v, 3) for k, v in worst}}


def target(name: str, measured, goal: str, ok: bool, unit: str = "") -> dict:
    """One target's record; ``print_target`` shows it."""
    if isinstance(measured, float):
        shown = f"{measured:.0f}" if abs(measured) >= 100 else f"{measured:.3g}"
    else:
        shown = str(measured)
    return {"name": name, "measured": measured, "shown": shown + unit, "target": goal,
            "status": "PASS" if ok else "MISS"}


def print_target(t: dict) -> None:
    print(f"TARGET {t['name']}: {t['shown']} (target {t['target']}) {t['status']}", flush=True)


def emit(result: dict) -> None:
    """Print every target line, then the RESULT line (last line of the output)."""
    for t in result.get("targets", []):
        print_target(t)
    print(RESULT_PREFIX + json.dumps(result, default=_plain), flush=True)


def _plain(v):
    # numpy scalars and paths in the details
    if hasattr(v, "item"):
        return v.item()
    return str(v)


def python_env(extra: Optional[dict] = None) -> dict:
    """The environment of a child benchmark: this checkout first on the path."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT)] + [p for p in [env.get("PYTHONPATH")] if p])
    env.setdefault("MPLBACKEND", "Agg")
    # No compiled programs from earlier runs (a "cold" fit compiles) and none left in the
    # user's cache folder; a benchmark about that cache passes its own folder in `extra`.
    env["RNNKIT_CACHE_DIR"] = "off"
    env.update(extra or {})
    return env


def run_child(args: Sequence[str], timeout: float, extra_env: Optional[dict] = None,
              keep_output: bool = False) -> dict:
    """Run ``python <args>`` in a fresh process; its parsed RESULT dict.

    With ``keep_output`` the dict also holds the child's other lines under "output".
    Raises RuntimeError with the child's last output when it fails or prints no RESULT line.
    """
    proc = subprocess.run([sys.executable, *args], capture_output=True, text=True, timeout=timeout,
                          env=python_env(extra_env), cwd=str(ROOT))
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith(RESULT_PREFIX)]
    if proc.returncode != 0 or not lines:
        raise RuntimeError(f"`python {' '.join(args)}` exited with {proc.returncode}:\n"
                           f"{proc.stdout[-2000:]}\n{proc.stderr[-3000:]}")
    result = json.loads(lines[-1][len(RESULT_PREFIX):])
    if keep_output:
        result["output"] = "\n".join(ln for ln in proc.stdout.splitlines()
                                     if not ln.startswith(RESULT_PREFIX))
    return result


def load_average() -> List[float]:
    """1, 5 and 15 minute load averages (Linux), or [] elsewhere."""
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except OSError:
        return []


def timed_rounds(fns, min_seconds, min_reps, max_reps):
    """Seconds of each fn() per round, in rounds (one call of each per round, in turn), so that
    every side sees the same load; each is warmed up twice first. Returns a list per fn."""
    for fn in fns:
        fn()
        fn()
    times = [[] for _ in fns]
    start = time.perf_counter()
    while len(times[0]) < max_reps and (len(times[0]) < min_reps
                                        or time.perf_counter() - start < min_seconds):
        for fn, ts in zip(fns, times):
            t = time.perf_counter()
            fn()
            ts.append(time.perf_counter() - t)
    return times
