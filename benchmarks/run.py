"""Run every rnnkit benchmark, print each target beside its measured value, write RESULTS.md.

    python benchmarks/run.py            # the full suite (tens of minutes on 2 busy cores)
    python benchmarks/run.py --quick    # shorter sweeps and fewer repeats
    python benchmarks/run.py --smoke    # tiny sizes, to check that the suite runs (numbers meaningless)

Each benchmark runs in its own fresh process (so compile caches, thread
settings and peak memory of one never leak into another):

    bench_step.py          training step vs torch.nn.RNN + Linear + Adam, and GFLOP/s
                           against numpy's float32 matmul rate (its own ratios, one run)
    bench_sweep.py         programs compiled, compile share, 2 workers vs 1
    bench_latency.py       cold and warm fit() of the default config on the demo data
    bench_train_memory.py  peak resident set of prepare + training on 10 million rows

RESULTS.md (written atomically) records the machine, the date, the versions,
the command and how busy the machine was while the suite ran.
"""
from __future__ import annotations

import argparse
import datetime as dt
import importlib.metadata
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
                         ("sweep", lambda: _mine("bench_sweep.py", mode)),
                         ("latency", lambda: _mine("bench_latency.py", mode)),
                         ("memory", lambda: _mine("bench_train_memory.py", mode))):
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
    """Write a temp file in the same folder, then rename it over ``path``."""
    fd, tmp = tempfile.mkstemp(dir=str(path.parent), prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


# --- RESULTS.md ---

def _table(rows, header) -> list:
    out = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(str(c) for c in r) + " |" for r in rows]
    return out


def _evidence(parts: dict) -> list:
    """Plain statements of where the time went, for every target that missed."""
    lines = []
    sweep, lat = parts.get("sweep", {}), parts.get("latency", {})
    missed = {t["name"] for p in parts.values() for t in p.get("targets", []) if t["status"] == "MISS"}
    if "serial" in sweep:
        s, p = sweep["serial"], sweep["parallel"]
        c = s["compile"]
        if "sweep.compile_share" in missed:
            lines.append(f"- Sweep compile share: {c['seconds']:.1f} s of {s['wall_seconds']:.1f} s wall; "
                         f"in CPU time {c['cpu_seconds']:.1f} s of {s['cpu_seconds']:.1f} s "
                         f"({100 * sweep['compile_share_cpu']:.0f}%) "
                         f"(trace {c['by_phase']['trace']:.1f}, lowering {c['by_phase']['lower']:.1f}, "
                         f"XLA {c['by_phase']['xla_compile']:.1f}); {c['backend_compiles']} XLA compiles; "
                         f"costliest: {c['by_function']}.")
        if "sweep.speedup_2_workers" in missed:
            lines.append(f"- Two workers: {p['wall_seconds']:.1f} s against {s['wall_seconds']:.1f} s; "
                         f"the workers' runs took {p['run_seconds_sum']:.1f} s in all (serial "
                         f"{s['run_seconds_sum']:.1f} s), each worker compiling its own programs "
                         f"({p['training_programs']} training programs over both).")
        if "sweep.training_programs" in missed:
            lines.append(f"- Training programs by hidden size: {s['compiles_by_hidden']}.")
    if "cold" in lat:
        for key, name in (("cold", "latency.cold_fit"), ("warm", "latency.warm_fit")):
            if name not in missed:
                continue
            r = lat["cold"] if key == "cold" else lat["warm"][0]
            w = r["breakdown"]["wall"]
            lines.append(
                f"- {key.capitalize()} fit {r['seconds']:.2f} s wall, {r['cpu_seconds']:.2f} s CPU (all "
                f"threads), {r['compile_seconds']:.2f} s compiling ({r['compile_cpu_seconds']:.2f} s CPU); "
                f"{r['epochs']} epochs ({w.get('training_epochs', 0):.2f} s; first "
                f"{r['first_epoch_seconds']:.2f} s, compile included, then "
                f"{r['later_epoch_median_seconds']} s each: {r['steps_per_epoch']} minibatch steps and "
                f"{r['val_windows']} validation windows, {_ms_per_step(r)} ms per step with validation); "
                f"phases {w}; compile by phase {r['breakdown']['compile']}.")
        if "latency.cold_fit" in missed:
            lines.append(f"- Cold compile detail: {lat['cold']['compile_detail']}.")
    return lines


def _ms_per_step(r: dict) -> str:
    later = r.get("later_epoch_median_seconds")
    return f"{1e3 * later / r['steps_per_epoch']:.2f}" if later else "?"


def render(summary: dict) -> str:
    m, parts = summary["machine"], summary["parts"]
    v = m["versions"]
    load = summary["load_during"]
    busy = summary["busy_before"]
    shared = load["mean"] > 1.5 or summary["load_before"][:1] > [1.5] or bool(busy)
    lines = ["# rnnkit benchmark results", "",
             f"Command: `{summary['command']}` (from the repository root); started "
             f"{summary['started']} UTC, took {summary['seconds'] / 60:.1f} min.", "",
             f"Machine: {m['cpu']}; {m['cores']} cores ({m['usable_cores']} usable); "
             f"{m['memory_gib']} GiB memory; {m['platform']}.", "",
             "Versions: " + ", ".join(f"{k} {x}" for k, x in v.items()) + ".", "",
             f"Load average (1 min) while the suite ran: min {load['min']}, mean {load['mean']}, "
             f"max {load['max']} on {m['cores']} cores (before it started: {summary['load_before']})."]
    if shared:
        lines += ["", f"**Other work was running on this machine during the run** (load above what "
                  f"the suite alone makes; busy processes at the start: {len(busy)}"
                  + (f", e.g. {', '.join(busy[:6])}" if busy else "") + "). Wall times are "
                  "inflated by sharing the cores; the ratios inside one benchmark (both sides "
                  "timed in the same run) are less affected than absolute seconds."]
    if summary["mode"] != "full":
        lines += ["", f"Mode `--{summary['mode']}`: smaller sizes than the targets are defined on."]
    rows = [(t["name"], t["shown"], t["target"], t["status"])
            for p in parts.values() for t in p.get("targets", [])]
    lines += ["", "## Targets", ""] + _table(rows, ("target", "measured", "goal", "status"))
    evidence = _evidence(parts)
    if evidence:
        lines += ["", "## Where the time goes (missed targets)", ""] + evidence
    lines += _step_section(parts.get("step", {}))
    lines += _sweep_section(parts.get("sweep", {}))
    lines += _latency_section(parts.get("latency", {}))
    lines += _memory_section(parts.get("memory", {}))
    return "\n".join(lines) + "\n"


def _failed(part: dict) -> list:
    return ["", "Failed:", "", "```", part["error"], "```"] if part.get("error") else []


def _step_section(part: dict) -> list:
    out = ["", "## Training step (bench_step.py)", ""] + _failed(part)
    if part.get("missing"):
        return out + ["bench_step.py is not in benchmarks/ yet: not measured."]
    if "rows" not in part:
        return out
    out += [f"Forward + BPTT + Adam, float32, many-to-one tanh; rnnkit (fast BPTT), autodiff of the "
            f"scan and torch.nn.RNN + Linear + Adam timed side by side in one process. numpy float32 "
            f"1024x1024 matmul in the same run: {part['matmul_gflops']:.1f} GFLOP/s.", ""]
    rows = [("x".join(map(str, r["shape"])), f"{r['fast_ms']:.2f}", f"{r['autodiff_ms']:.2f}",
             f"{r['torch_ms']:.2f}", f"{r['torch_over_fast']:.2f}x", f"{r['gflops']:.1f}",
             f"{100 * r['matmul_fraction']:.1f}%") for r in part["rows"]]
    out += _table(rows, ("B x T x I x H", "rnnkit ms", "autodiff ms", "torch ms", "torch / rnnkit",
                         "GFLOP/s", "of matmul"))
    own = [f"{t['name']}: {t['shown']} (target {t['target']}) {t['status']}"
           for t in part.get("own_targets", [])]
    return out + ["", "bench_step.py's output (its own checks included):", "", "```",
                  part.get("output", "").rstrip(), "```"] + \
        (["", "Its own checks: " + "; ".join(own) + "."] if own else [])


def _sweep_section(part: dict) -> list:
    out = ["", "## Sweep (bench_sweep.py)", ""] + _failed(part)
    if "serial" not in part:
        return out
    st, s, p = part["setup"], part["serial"], part["parallel"]
    out += [f"Grid {st['space']} ({st['runs']} runs, 1 seed) on `cold_storage_load(years={st['years']})` "
            f"({st['rows']} hourly rows), {st['epochs_per_run']} epochs per run with patience off "
            "(every run does the same work). Each sweep in a fresh process with a fresh SQLite store.", ""]
    out += _table([("1 (in-process)", s["wall_seconds"], s["cpu_seconds"], s["run_seconds_sum"],
                    s["training_programs"], s["programs_traced_here"],
                    f"{s['compile']['seconds']} ({s['compile']['cpu_seconds']} CPU)", s["statuses"]),
                   ("2 (spawned processes)", p["wall_seconds"],
                    f"{p['cpu_seconds']} + workers {p['worker_cpu_seconds']}", p["run_seconds_sum"],
                    p["training_programs"], "-", "-", p["statuses"])],
                  ("workers", "wall s", "CPU s", "sum of run s", "training programs (table)",
                   "programs traced (compile_count)", "compile s (jax.monitoring)", "statuses"))
    c = s["compile"]
    out += ["", f"Serial sweep compile time by phase: {c['by_phase']}; XLA compiles {c['backend_compiles']}; "
            f"costliest functions: {c['by_function']}.",
            f"Speed-up {part['speedup']:.2f}x; compile share {100 * part['compile_share']:.1f}% of wall "
            f"time, {100 * part['compile_share_cpu']:.1f}% of CPU time."]
    return out


def _latency_section(part: dict) -> list:
    out = ["", "## Latency of one fit (bench_latency.py)", ""] + _failed(part)
    if "cold" not in part:
        return out
    c, w = part["cold"], part["warm"]
    out += [f"`rnnkit.fit(cold_storage_load(), Config(target='load_kw', missing='interpolate'), "
            f"progress=False)` on {part['rows']} rows. Imports {part['import_seconds']} s and demo data "
            f"{part['data_seconds']} s are not counted.", ""]
    phases = list(c["breakdown"]["wall"])
    rows = [(name, r["seconds"], r["cpu_seconds"], r["compile_seconds"], r["compile_cpu_seconds"],
             r["epochs"]) + tuple(r["breakdown"]["wall"].get(k, "") for k in phases)
            for name, r in [("cold", c)] + [(f"warm {i + 1}", x) for i, x in enumerate(w)]]
    out += _table(rows, ("fit", "wall s", "CPU s", "compile s", "compile CPU s", "epochs") + tuple(phases))
    out += ["", f"Cold compile seconds by phase of fit: {c['breakdown']['compile']}.",
            f"Cold compile detail: {c['compile_detail']}.",
            f"Diagnostics (lazy, not part of fit), first use: {part['diagnostics_first_use']}."]
    return out


def _memory_section(part: dict) -> list:
    out = ["", "## Memory (bench_train_memory.py)", ""] + _failed(part)
    if "rss_peak_mb" not in part:
        return out
    return out + [f"{part['rows']} rows x {part['inputs']} inputs, window {part['window']}, hidden "
                  f"{part['hidden']}, batch {part['batch_size']}: {part['train_windows']} training "
                  f"windows; {part['steps']} optimizer steps"
                  + (" (epoch capped; shuffle over all windows still done)" if part["capped"] else "")
                  + f". Peak resident {part['rss_peak_mb']} MB (after imports "
                  f"{part['rss_after_imports_mb']}, after the frame {part['rss_after_frame_mb']}, after "
                  f"prepare {part['rss_after_prepare_mb']}, resident just before training "
                  f"{part['rss_now_before_train_mb']}); a materialised window copy would be "
                  f"{part['materialised_copy_mb']} MB. prepare {part['prepare_seconds']} s, train "
                  f"{part['train_seconds']} s."]


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    group = ap.add_mutually_exclusive_group()
    group.add_argument("--quick", action="store_true", help="shorter sweeps, fewer repeats")
    group.add_argument("--smoke", action="store_true", help="tiny sizes: checks that the suite runs")
    ap.add_argument("--out", type=Path, default=RESULTS, help="where to write the results (Markdown)")
    args = ap.parse_args(argv)
    mode = "smoke" if args.smoke else "quick" if args.quick else "full"
    summary = run_suite(mode)
    write_atomically(args.out, render(summary))
    n_miss = sum(t["status"] == "MISS" for p in summary["parts"].values() for t in p["targets"])
    print(f"wrote {args.out} ({n_miss} target(s) missed) in {summary['seconds'] / 60:.1f} min")
    return summary


if __name__ == "__main__":
    main()
