"""Run every rnnkit benchmark, print each target beside its measured value, write RESULTS.md.

    python benchmarks/run.py            # the full suite (tens of minutes on 2 busy cores)
    python benchmarks/run.py --quick    # shorter sweeps and fewer repeats
    python benchmarks/run.py --smoke    # tiny sizes, to check that the suite runs (numbers meaningless)

Each benchmark runs in its own fresh process (so compile caches, thread
settings and peak memory of one never leak into another):

    bench_step.py          training step vs torch.nn.RNN + Linear + Adam, and GFLOP/s
                           against numpy's float32 matmul rate (its own ratios, one run)
    bench_gated.py         GRU and LSTM training steps vs torch.nn.GRU / LSTM + Linear + Adam
    bench_sweep.py         programs compiled, compile share, 2 workers vs 1
    bench_latency.py       cold and warm fit() of the default config on the demo data
    bench_first_result.py  import time; a fresh process's first fit with an empty and a filled
                           folder of compiled programs; loss surfaces batched vs the loop;
                           panel Train to last figure
    bench_train_memory.py  peak resident set of prepare + training on 10 million rows
    bench_forecast.py      warm forecast() of 24 steps with intervals on the demo data

RESULTS.md (written atomically) records the machine, the date, the versions,
the command and how busy the machine was while the suite ran; RESULTS.json
beside it holds every number (``run.py --render RESULTS.json`` rebuilds the
Markdown from it).
"""
from __future__ import annotations

import argparse
import datetime as dt
import importlib.metadata
import json
import os
import platform
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _util  # noqa: E402
from _report_md import render  # noqa: E402

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "RESULTS.md"
STEP_SCRIPT = HERE / "bench_step.py"


def machine() -> dict:
    """CPU model, cores, memory, load, versions."""
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem_gib = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                mem_gib = round(int(line.split()[1]) / 2**20, 1)
    except OSError:
        pass
    versions = {}
    for pkg in ("jax", "jaxlib", "torch", "numpy", "optax", "pandas"):
        try:
            versions[pkg] = importlib.metadata.version(pkg)
        except importlib.metadata.PackageNotFoundError:
            versions[pkg] = "not installed"
    versions["python"] = platform.python_version()
    return {"cpu": cpu, "cores": os.cpu_count(), "usable_cores": len(os.sched_getaffinity(0)),
            "memory_gib": mem_gib, "platform": platform.platform(), "versions": versions}


class LoadSampler(threading.Thread):
    """Samples the 1-minute load average every few seconds while the suite runs."""

    def __init__(self, every: float = 5.0):
        super().__init__(daemon=True)
        self.every, self.samples = every, []
        self._stop_event = threading.Event()

    def run(self):
        while not self._stop_event.is_set():
            la = _util.load_average()
            if la:
                self.samples.append(la[0])
            self._stop_event.wait(self.every)

    def stop(self) -> dict:
        self._stop_event.set()
        self.join(timeout=self.every + 1)
        s = self.samples or [float("nan")]
        return {"min": min(s), "mean": round(sum(s) / len(s), 2), "max": max(s), "samples": len(s)}


def other_busy_processes() -> list:
    """Other processes using CPU right now (two `ps` snapshots 1 s apart are overkill; one
    `top -bn1` style read of ps is enough to say that other work was running)."""
    try:
        out = subprocess.run(["ps", "-eo", "pid=,pcpu=,comm="], capture_output=True, text=True,
                             timeout=10).stdout
    except (OSError, subprocess.SubprocessError):
        return []
    mine = os.getpid()
    busy = []
    for line in out.splitlines():
        parts = line.split(None, 2)
        if len(parts) == 3 and int(parts[0]) != mine and float(parts[1]) >= 10.0:
            busy.append(f"{parts[2]} ({parts[1]}%)")
    return busy


# --- the training-step benchmark (bench_step.py belongs to the model's owner) ---

STEP_RATIO = 2.0  # rnnkit's step at least twice as fast as torch's, at every shape
STEP_MATMUL_SHARE = 0.5  # at H >= 128: at least half of numpy's float32 matmul rate
STEP_LARGE_H = 128


def step_benchmark(mode: str) -> dict:
    """Run bench_step.py in a fresh process and judge the step targets from its rows.

    bench_step.py prints its own TARGET lines (its own thresholds) and a RESULT
    line with one row per shape (fast_ms, torch_ms, torch_over_fast, gflops,
    matmul_fraction) and the matmul rate it measured in the same run. The
    suite's targets are computed here from those rows.
    """
    if not STEP_SCRIPT.exists():
        return {"benchmark": "step", "missing": True, "targets": [], "output": ""}
    args = [str(STEP_SCRIPT)] + ([f"--{mode}"] if mode != "full" else [])
    try:
        got = _util.run_child(args, timeout=7200, keep_output=True)
    except (RuntimeError, subprocess.TimeoutExpired) as e:
        return {"benchmark": "step", "error": str(e)[-3000:],
                "targets": [_util.target("step.runs", "failed", "runs", False)]}
    own = got.get("targets", [])
    targets = []
    for r in got["rows"]:
        shape = "x".join(map(str, r["shape"]))
        targets.append(_util.target(f"step.torch_over_rnnkit_{shape}", float(r["torch_over_fast"]),
                                    f">= {STEP_RATIO:g}x", r["torch_over_fast"] >= STEP_RATIO, "x"))
    large = [r for r in got["rows"] if r["shape"][3] >= STEP_LARGE_H]
    for r in large:
        shape = "x".join(map(str, r["shape"]))
        share = 100 * float(r["matmul_fraction"])
        targets.append(_util.target(f"step.matmul_share_{shape}", share,
                                    f">= {100 * STEP_MATMUL_SHARE:.0f}% of numpy matmul "
                                    f"({got['matmul_gflops']:.0f} GFLOP/s)",
                                    share >= 100 * STEP_MATMUL_SHARE, "%"))
    if not large:
        targets.append(_util.target("step.matmul_share_H>=128", "not measured (no shape with H >= 128 "
                                    "in this mode)", f">= {100 * STEP_MATMUL_SHARE:.0f}%", False))
    return {**got, "targets": targets, "own_targets": own}


# --- running the suite ---

def _mine(script: str, mode: str) -> dict:
    args = [str(HERE / script)] + ([f"--{mode}"] if mode != "full" else [])
    try:
        return _util.run_child(args, timeout=7200)
    except (RuntimeError, subprocess.TimeoutExpired) as e:
        name = script.removeprefix("bench_").removesuffix(".py")
        return {"benchmark": name, "error": str(e)[-3000:],
                "targets": [{"name": f"{name}.runs", "shown": "failed", "target": "runs",
                             "status": "MISS", "measured": None}]}


def run_suite(mode: str) -> dict:
    """Every benchmark, one after another, each in a fresh process."""
    sampler = LoadSampler()
    start = dt.datetime.now(dt.timezone.utc)
    busy_before = other_busy_processes()
    load_before = _util.load_average()
    sampler.start()
    t0 = time.perf_counter()
    parts = {}
    try:
        for name, fn in (("step", lambda: step_benchmark(mode)),
                         ("gated", lambda: _mine("bench_gated.py", mode)),
                         ("sweep", lambda: _mine("bench_sweep.py", mode)),
                         ("latency", lambda: _mine("bench_latency.py", mode)),
                         ("first_result", lambda: _mine("bench_first_result.py", mode)),
                         ("memory", lambda: _mine("bench_train_memory.py", mode)),
                         ("forecast", lambda: _mine("bench_forecast.py", mode))):
            t = time.perf_counter()
            print(f"== {name}", flush=True)
            parts[name] = fn()
            parts[name]["suite_seconds"] = round(time.perf_counter() - t, 1)
            for target in parts[name]["targets"]:
                _util.print_target(target)
            if parts[name].get("missing"):
                print(f"   {STEP_SCRIPT.name} is not there; no step targets measured", flush=True)
            if parts[name].get("error"):
                print(f"   failed: {parts[name]['error'][-600:]}", flush=True)
    finally:
        load = sampler.stop()
    return {"mode": mode, "started": start.isoformat(timespec="seconds"),
            "seconds": round(time.perf_counter() - t0, 1), "machine": machine(),
            "load_before": load_before, "load_during": load, "busy_before": busy_before,
            "command": "python benchmarks/run.py" + (f" --{mode}" if mode != "full" else ""),
            "parts": parts}


def write_atomically(path: Path, text: str) -> None:
    """Write a temp file in the same folder, then rename it over ``path``.

    Not rnnkit.data._atomic.write_text: importing rnnkit would load jax into this parent
    process, which only starts and reads the measured children.
    """
    fd, tmp = tempfile.mkstemp(dir=str(path.parent), prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    group = ap.add_mutually_exclusive_group()
    group.add_argument("--quick", action="store_true", help="shorter sweeps, fewer repeats")
    group.add_argument("--smoke", action="store_true", help="tiny sizes: checks that the suite runs")
    ap.add_argument("--out", type=Path, default=RESULTS,
                    help="where to write the results (Markdown; the raw numbers go beside it as .json)")
    ap.add_argument("--render", type=Path, metavar="JSON",
                    help="only rebuild the Markdown from a saved .json of an earlier run")
    args = ap.parse_args(argv)
    if args.render is not None:
        summary = json.loads(args.render.read_text())
        write_atomically(args.out, render(summary))
        print(f"wrote {args.out} from {args.render}")
        return summary
    mode = "smoke" if args.smoke else "quick" if args.quick else "full"
    summary = run_suite(mode)
    write_atomically(args.out.with_suffix(".json"), json.dumps(summary, indent=1, default=str) + "\n")
    write_atomically(args.out, render(summary))
    n_miss = sum(t["status"] == "MISS" for p in summary["parts"].values() for t in p["targets"])
    print(f"wrote {args.out} ({n_miss} target(s) missed) in {summary['seconds'] / 60:.1f} min")
    return summary


if __name__ == "__main__":
    main()
