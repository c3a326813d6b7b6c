"""RESULTS.md from the numbers of one suite run (``run.run_suite``): pure text, no measuring.

The summary dict holds "machine", "parts" (one result dict per benchmark, as
each script's RESULT line gives it), the load and the command.
"""
from __future__ import annotations

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
                         f"({p['training_programs']} training programs over both). Cores obtained "
                         f"(CPU seconds per wall second): serial {_cores(s):.2f}, two workers "
                         f"{_cores(p):.2f} of 2; their CPU seconds: {s['cpu_seconds']:.0f} serial, "
                         f"{p['cpu_seconds'] + p['worker_cpu_seconds']:.0f} with two workers "
                         f"(the best two fully used cores could give: serial wall time over half "
                         f"the two-worker CPU seconds, "
                         f"{2 * s['wall_seconds'] / (p['cpu_seconds'] + p['worker_cpu_seconds']):.2f}x).")
        if "sweep.training_programs" in missed:
            lines.append(f"- Training programs by hidden size: {s['compiles_by_hidden']}.")
    step = parts.get("step", {})
    for b in step.get("breakdowns", []):
        name = "x".join(map(str, b["shape"]))
        if not any(n.startswith("step.") and n.endswith("_" + name) for n in missed):
            continue
        row = next((r for r in step["rows"] if r["shape"] == b["shape"]), None)
        lines.append(
            f"- Training step at {'x'.join(map(str, b['shape']))}"
            + (f" ({row['fast_ms']:.1f} ms)" if row else "") + f": forward {b['forward_ms']:.1f} ms, "
            f"forward + BPTT {b['forward_backward_ms']:.1f} ms, of which the dV product alone "
            f"{b['dV_product_ms']:.1f} ms. The recurrence is a chain of small products, one per time "
            f"step: XLA runs the ({b['shape'][0]} x {b['shape'][3]}) x ({b['shape'][3]} x "
            f"{b['shape'][3]}) one (with its tanh) at {b['xla_step_product_gflops']:.0f} GFLOP/s in its "
            f"loop, numpy the product alone at {b['numpy_step_product_gflops']:.0f} GFLOP/s; the "
            f"1024 x 1024 rate of the targets is {step['matmul_gflops']:.0f}.")
    odd = [r for r in step.get("rows", []) if r["matmul_fraction"] > 1.0]
    if odd:
        lines.append(f"- Step benchmark not trustworthy in this run: {len(odd)} shape(s) ran faster than "
                     f"numpy's matmul rate ({step['matmul_gflops']:.0f} GFLOP/s, measured once at its "
                     "start), which a step made of matrix products cannot do; the load changed between "
                     f"the measurements (load at its end: {step.get('load')}).")
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


def _cores(r: dict) -> float:
    """CPU seconds per wall second of a sweep (its own process plus its workers)."""
    return (r["cpu_seconds"] + r.get("worker_cpu_seconds", 0.0)) / max(r["wall_seconds"], 1e-9)


def _ms_per_step(r: dict) -> str:
    later = r.get("later_epoch_median_seconds")
    return f"{1e3 * later / r['steps_per_epoch']:.2f}" if later else "?"


def render(summary: dict) -> str:
    m, parts = summary["machine"], summary["parts"]
    v = m["versions"]
    load = summary["load_during"]
    busy = summary["busy_before"]
    # The suite itself keeps both cores busy (load near the core count while it runs), so
    # only the load before it started, a peak well above the cores, or busy processes
    # found at the start say that other work shared the machine.
    shared = (summary["load_before"][:1] > [1.0] or load["max"] > m["cores"] + 1
              or bool(busy))
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
    lines += _gated_section(parts.get("gated", {}))
    lines += _sweep_section(parts.get("sweep", {}))
    lines += _latency_section(parts.get("latency", {}))
    lines += _first_result_section(parts.get("first_result", {}))
    lines += _memory_section(parts.get("memory", {}))
    lines += _forecast_section(parts.get("forecast", {}))
    return "\n".join(lines) + "\n"


def _forecast_section(part: dict) -> list:
    out = ["", "## Forecast (bench_forecast.py)", ""] + _failed(part)
    if "target_only" not in part:
        return out
    rows = [(key, part[key]["cold_seconds"], part[key].get("warm_median_seconds", ""), part[key]["programs"])
            for key in ("target_only", "future_inputs")]
    return out + [f"`result.forecast(24)` with 80 % and 95 % bounds on {part['rows']} demo rows (the fit "
                  "is not timed): target only (horizon 12, two blocks), and with input columns "
                  "(horizon 24, future inputs read from the frame).", ""] + \
        _table(rows, ("forecast", "cold s", "warm median s", "programs compiled"))


def _failed(part: dict) -> list:
    return ["", "Failed:", "", "```", part["error"], "```"] if part.get("error") else []


def _step_section(part: dict) -> list:
    out = ["", "## Training step (bench_step.py)", ""] + _failed(part)
    if part.get("missing"):
        return out + ["bench_step.py is not in benchmarks/ yet: not measured."]
    if "rows" not in part:
        return out
    out += [f"Forward + BPTT + Adam, float32, many-to-one tanh; rnnkit (fast BPTT), autodiff of the "
            f"scan and torch.nn.RNN + Linear + Adam timed side by side in one process, each over the "
            f"same 8 minibatches; the JAX steps inside one compiled loop with the step mask (every "
            f"step real), as rnnkit's trainer runs them, torch in its Python loop. \"no mask\": "
            f"the same loop without the mask, as a direct call of rnnkit.loss runs; \"one call\": "
            f"rnnkit's step jitted alone, no mask, called once per step. numpy float32 1024x1024 "
            f"matmul in the same run: "
            f"{part['matmul_gflops']:.1f} GFLOP/s.", ""]
    rows = [("x".join(map(str, r["shape"])), f"{r['fast_ms']:.2f}", f"{r['autodiff_ms']:.2f}",
             f"{r['fast_nomask_ms']:.2f}" if "fast_nomask_ms" in r else "-",
             f"{r['fast_call_ms']:.2f}" if "fast_call_ms" in r else "-",
             f"{r['torch_ms']:.2f}", f"{r['torch_over_fast']:.2f}x", f"{r['gflops']:.1f}",
             f"{100 * r['matmul_fraction']:.1f}%") for r in part["rows"]]
    out += _table(rows, ("B x T x I x H", "rnnkit ms", "autodiff ms", "no mask ms", "one call ms",
                         "torch ms", "torch / rnnkit", "GFLOP/s", "of matmul"))
    own = [f"{t['name']}: {t['shown']} (target {t['target']}) {t['status']}"
           for t in part.get("own_targets", [])]
    return out + ["", "bench_step.py's output (its own checks included):", "", "```",
                  part.get("output", "").rstrip(), "```"] + \
        (["", "Its own checks: " + "; ".join(own) + "."] if own else [])


def _gated_section(part: dict) -> list:
    if not part:
        return []
    out = ["", "## Gated cells' training step (bench_gated.py)", ""] + _failed(part)
    if "rows" not in part:
        return out
    out += ["GRU and LSTM: forward + BPTT + Adam, float32, many-to-one tanh; rnnkit (custom-VJP "
            "BPTT), autodiff of the scan and torch.nn.GRU / torch.nn.LSTM + Linear + Adam side by "
            "side in one process over the same 8 minibatches; medians over rounds, and the ratio "
            "of the best rounds." + (" One core for the whole process." if part.get("one_core") else ""),
            ""]
    rows = [(r["cell"], "x".join(map(str, r["shape"])), f"{r['fast_ms']:.2f}", f"{r['autodiff_ms']:.2f}",
             f"{r['torch_ms']:.2f}", f"{r['torch_over_fast']:.2f}x",
             f"{r.get('best_torch_over_best_fast', float('nan')):.2f}x") for r in part["rows"]]
    return out + _table(rows, ("cell", "B x T x I x H", "rnnkit ms", "autodiff ms", "torch ms",
                               "torch / rnnkit", "best / best"))


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
            f"Cores obtained (CPU s per wall s): serial {_cores(s):.2f}, two workers {_cores(p):.2f}.",
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


def _first_result_section(part: dict) -> list:
    out = ["", "## Time to first result (bench_first_result.py)", ""] + _failed(part)
    if "surface" not in part:
        return out
    s = part["surface"]
    e, f = part["fit_empty_cache"], part["fit_filled_cache"]
    rows = [("import rnnkit (median)", f"{part['import_seconds']:.2f}", "", ""),
            ("first fit, fresh process: empty / filled program folder",
             f"{part['fit_empty_seconds']:.2f} / {part['fit_filled_seconds']:.2f}",
             f"{part['fit_empty_over_filled']:.2f}x",
             f"training epochs {min(x['training_seconds'] for x in f):.2f} s; compile phases "
             f"empty {e[0]['compile']['by_phase']}, filled {f[0]['compile']['by_phase']}; "
             f"{f[0]['cache_hits']} programs loaded"),
            (f"loss surface {s['points']} points, cold: loop / batched",
             f"{s['cold']['loop']:.2f} / {s['cold']['batched']:.2f}", f"{part['surface_cold_ratio']:.2f}x",
             f"{s['windows']} windows x {s['steps']} steps, H = {s['hidden']}; disk cache off"),
            (f"loss surface {s['points']} points, warm: loop / batched",
             f"{s['warm']['loop']:.2f} / {s['warm']['batched']:.2f}", f"{part['surface_warm_ratio']:.2f}x",
             f"max relative difference {s['max_relative_difference']:.1e}; 21 x 21 surface warm "
             f"{s['default_surface_warm']:.2f} s"),
            ("panel Train to last figure, fresh process: empty / filled program folder",
             f"{part['click_empty_seconds']:.2f} / {part['click_filled_seconds']:.2f}",
             f"{part['click_empty_seconds'] / part['click_filled_seconds']:.2f}x",
             f"second click {part['click_again_seconds']:.2f} s; phases of the filled-folder process "
             f"{ {k: [round(x, 2) for x in v] for k, v in part['panel_filled_cache'][0]['phases'].items()} }")]
    out += [f"Best of {part['rounds']} round(s); every measurement in a fresh process with its own "
            "folder of compiled programs.", ""]
    return out + _table(rows, ("what", "seconds", "ratio", "details"))


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
