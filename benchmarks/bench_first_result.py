"""Time to first result: import, a fresh process's first fit, loss surfaces, Train to last figure.

    python benchmarks/bench_first_result.py            # 2 rounds of every measurement
    python benchmarks/bench_first_result.py --quick    # 1 round
    python benchmarks/bench_first_result.py --smoke    # tiny data; only checks that it runs

Every measurement runs in a fresh Python process, as a restarted kernel
would, with its own cache folder of compiled programs (never the user's):

    import          ``import rnnkit`` (median over the rounds)
    fit             the first ``fit`` of the default config on the demo data
                    (the clock starts after the imports and the frame), once
                    with an EMPTY folder of compiled programs and once more in
                    another fresh process with the folder the first one filled
    surface         the panel's loss surface (15 x 15) and slice (41 points), cold
                    (first call: compiling included) and warm, by the batched
                    program of rnnkit.inspection._surface and by the reference
                    loop it replaced (one jitted ``rnnkit.loss`` call per point),
                    in one process with the disk cache off, side by side
    panel           ``rnnkit.panel(df, config)``, Train ``.click()`` until the job
                    ends with every figure drawn (``Panel.wait``): the first click
                    of a fresh process with an empty folder, the first click of a
                    fresh process with the folder filled, and a second click

The sides of each comparison take turns round by round, so a shared
machine's load falls on both; the ratios are printed. Targets (this 2-core
machine): fresh-process fit with the folder filled under 1.5 s; Train to the
last figure, fresh process with the folder filled, under 5 s.
"""
from __future__ import annotations

import argparse
import json
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _util  # noqa: E402

HERE = Path(__file__).resolve()
WARM_FIT_LIMIT = 1.5
PANEL_LIMIT = 5.0
SURFACE_STEPS, SLICE_STEPS = 15, 41  # as the panel draws them (rnnkit/notebook/_data.py)


def _frame_and_config(rnnkit, smoke: bool):
    df = rnnkit.datasets.cold_storage_load(years=0.05 if smoke else 2.0)
    config = rnnkit.Config(target="load_kw", missing="interpolate")
    if smoke:
        config = config.replace(epochs=2, hidden=4)
    return df, config


# --- children (each a fresh process) ---

def child_import() -> dict:
    t0 = time.perf_counter()
    import rnnkit  # noqa: F401
    return {"seconds": time.perf_counter() - t0}


def child_fit(smoke: bool) -> dict:
    import jax.monitoring

    events = {}
    jax.monitoring.register_event_listener(lambda e, **kw: events.__setitem__(e, events.get(e, 0) + 1))
    t0 = time.perf_counter()
    import rnnkit
    import_seconds = time.perf_counter() - t0
    df, config = _frame_and_config(rnnkit, smoke)
    with _util.CompileClock() as clock:
        t0, c0 = time.perf_counter(), time.process_time()
        res = rnnkit.fit(df, config, progress=False)
        seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    return {"seconds": seconds, "cpu_seconds": cpu, "import_seconds": import_seconds,
            "epochs": len(res.history),
            "training_seconds": float(res.history["seconds"].sum()),
            "cache_hits": events.get("/jax/compilation_cache/cache_hits", 0),
            "cache_misses": events.get("/jax/compilation_cache/cache_misses", 0),
            "whole": rnnkit.training._stored.counts(),
            "compile": clock.summary()}


def _loop_losses(result, split, d1, d2, points):
    """The reference: one jitted ``rnnkit.loss`` call per grid point, as before the batched program."""
    import jax
    import jax.numpy as jnp
    import numpy as np
    import rnnkit

    cfg = result.prepared.config
    dtype = np.dtype(cfg.dtype)
    x, y, mask = result.prepared.windows(split)
    one = jax.jit(lambda p, x, y, m: rnnkit.loss(p, x, y, activation=cfg.activation, task=cfg.task,
                                                   mode=cfg.mode, mask=m))
    params = {k: jnp.asarray(np.asarray(v), dtype) for k, v in result.params.items()}
    x = jnp.asarray(x, dtype)
    y = jnp.asarray(y) if cfg.task == "classification" else jnp.asarray(y, dtype)
    m = None if mask is None else jnp.asarray(mask)
    out = [one({k: params[k] + dtype.type(a) * d1[k] + dtype.type(b) * d2[k] for k in params}, x, y, m)
           for a, b in points]
    return np.asarray(jax.block_until_ready(out), np.float64)


def loop_planes(result, split, steps2, steps1):
    """((alphas, betas, values), (alphas, values)) as ``notebook._data.loss_planes``, by the loop."""
    import numpy as np
    from rnnkit.inspection import _surface

    a2 = _surface._axis(steps2, 1.0)
    _, (d1, d2) = _surface._directions(result, 0, 2)
    aa, bb = np.meshgrid(a2, a2)
    values = _loop_losses(result, split, d1, d2, np.stack([aa.ravel(), bb.ravel()], 1))
    a1 = _surface._axis(steps1, 1.0)
    _, (d,) = _surface._directions(result, 0, 1)
    dv = {k: (v if k == "V" else np.zeros_like(v)) for k, v in d.items()}
    zero = {k: np.zeros_like(v) for k, v in d.items()}
    line = _loop_losses(result, split, dv, zero, np.stack([a1, np.zeros_like(a1)], 1))
    return (a2, a2, values.reshape(steps2, steps2)), (a1, line)


def batched_planes(result, split, steps2, steps1):
    import rnnkit

    return (rnnkit.loss_surface(result, split=split, steps=steps2),
            rnnkit.loss_slice(result, param="V", split=split, steps=steps1))


def child_surface(smoke: bool, repeats: int) -> dict:
    import numpy as np
    import rnnkit

    df, config = _frame_and_config(rnnkit, smoke)
    res = rnnkit.fit(df, config, progress=False)
    split = "val"
    steps2, steps1 = (5, 7) if smoke else (SURFACE_STEPS, SLICE_STEPS)
    from rnnkit.inspection import _surface

    for how_many in (1, 2):  # what both sides share (the directions' small programs), done once
        _surface._directions(res, 0, how_many)
    res.prepared.windows(split)
    sides = {"batched": batched_planes, "loop": loop_planes}
    times = {name: [] for name in sides}
    cpu = {name: [] for name in sides}
    got = {}
    for r in range(repeats + 1):  # round 0 is the cold call of each side (compiling included)
        for name in (sides if r % 2 == 0 else list(sides)[::-1]):
            t0, c0 = time.perf_counter(), time.process_time()
            got[name] = sides[name](res, split, steps2, steps1)
            times[name].append(time.perf_counter() - t0)
            cpu[name].append(time.process_time() - c0)
    (_, _, vb), (_, lb) = got["batched"]
    (_, _, vl), (_, ll) = got["loop"]
    diff = float(max(np.max(np.abs(vb - vl) / np.maximum(np.abs(vl), 1e-12)),
                     np.max(np.abs(lb - ll) / np.maximum(np.abs(ll), 1e-12))))
    default = []  # loss_surface's own default grid (21 x 21), warm
    rnnkit.loss_surface(res, split=split, steps=7 if smoke else 21)
    for _ in range(repeats):
        t0 = time.perf_counter()
        rnnkit.loss_surface(res, split=split, steps=7 if smoke else 21)
        default.append(time.perf_counter() - t0)
    x = res.prepared.windows(split)[0]
    return {"windows": int(x.shape[0]), "steps": int(x.shape[1]), "hidden": int(res.config.hidden),
            "points": steps2 * steps2 + steps1, "cold": {k: v[0] for k, v in times.items()},
            "warm": {k: min(v[1:]) for k, v in times.items()},
            "cold_cpu": {k: v[0] for k, v in cpu.items()}, "warm_cpu": {k: min(v[1:]) for k, v in cpu.items()},
            "max_relative_difference": diff,
            "default_surface_warm": min(default)}


def child_panel(smoke: bool) -> dict:
    t0 = time.perf_counter()
    import rnnkit
    from rnnkit.notebook._panel import Panel

    import_seconds = time.perf_counter() - t0
    df, config = _frame_and_config(rnnkit, smoke)
    p = Panel(df, config)
    phases = {}

    def timed(name, fn):
        def inner(*args, **kwargs):
            t = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                phases.setdefault(name, []).append(time.perf_counter() - t)
        return inner
    # the panel draws in stages: curve and scores first, then the inside views, then surfaces
    p.views.show_fast = timed("figures", p.views.show_fast)
    p.views.show_inside = timed("inside", p.views.show_inside)
    p.views.show_surfaces = timed("surfaces", p.views.show_surfaces)
    clicks, cpu = [], []
    for _ in range(2):
        t0, c0 = time.perf_counter(), time.process_time()
        p.train_button.click()
        if not p.wait(1800):
            raise RuntimeError("the panel's job did not end")
        wait_views = getattr(p.views, "wait", None)  # figures drawn in the background, if any
        if callable(wait_views):
            wait_views()
        clicks.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
        if p.status_level == "error":
            raise RuntimeError(f"the panel reported an error: {p.status.value}")
    fit_seconds = [float(h) for h in (p.result.history["seconds"].sum(),)]
    return {"import_seconds": import_seconds, "clicks": clicks, "clicks_cpu": cpu, "phases": phases,
            "epochs": len(p.result.history), "training_seconds_last": fit_seconds[0]}


# --- the parent: rounds of fresh processes, side by side ---

def _run(mode: str, smoke: bool, cache, extra=()) -> dict:
    args = [str(HERE), "--child", mode] + (["--smoke"] if smoke else []) + list(extra)
    env = {"RNNKIT_CACHE_DIR": str(cache) if cache is not None else "off"}
    return _util.run_child(args, timeout=1800, extra_env=env)


def measure(smoke: bool, rounds: int) -> dict:
    imports, empty, filled, panel_empty, panel_filled = [], [], [], [], []
    for _ in range(rounds):
        imports.append(_run("import", smoke, None)["seconds"])
        folder = Path(tempfile.mkdtemp(prefix="rnnkit-bench-programs-"))
        try:
            empty.append(_run("fit", smoke, folder))
            filled.append(_run("fit", smoke, folder))
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        folder = Path(tempfile.mkdtemp(prefix="rnnkit-bench-programs-"))
        try:
            panel_empty.append(_run("panel", smoke, folder))
            panel_filled.append(_run("panel", smoke, folder))
        finally:
            shutil.rmtree(folder, ignore_errors=True)
    surface = _run("surface", smoke, None, ["--repeats", str(max(rounds, 2))])

    def best(rows, key="seconds"):
        return min(r[key] for r in rows)

    fit_empty, fit_filled = best(empty), best(filled)
    click_empty = min(r["clicks"][0] for r in panel_empty)
    click_filled = min(r["clicks"][0] for r in panel_filled)
    click_again = min(min(r["clicks"][1:]) for r in panel_empty + panel_filled)
    out = {"benchmark": "first_result", "smoke": smoke, "rounds": rounds,
           "import_seconds": statistics.median(imports), "imports": imports,
           "fit_empty_cache": empty, "fit_filled_cache": filled,
           "fit_empty_seconds": fit_empty, "fit_filled_seconds": fit_filled,
           "fit_empty_over_filled": fit_empty / fit_filled,
           "panel_empty_cache": panel_empty, "panel_filled_cache": panel_filled,
           "click_empty_seconds": click_empty, "click_filled_seconds": click_filled,
           "click_again_seconds": click_again, "surface": surface,
           "surface_cold_ratio": surface["cold"]["loop"] / surface["cold"]["batched"],
           "surface_warm_ratio": surface["warm"]["loop"] / surface["warm"]["batched"],
           "load_average": _util.load_average()}
    out["targets"] = [
        _util.target("first_result.fit_fresh_process_filled_cache", fit_filled,
                     f"< {WARM_FIT_LIMIT:g} s", fit_filled < WARM_FIT_LIMIT, " s"),
        _util.target("first_result.train_to_last_figure_filled_cache", click_filled,
                     f"< {PANEL_LIMIT:g} s", click_filled < PANEL_LIMIT, " s"),
    ]
    return out


def report(r: dict) -> None:
    e, f = r["fit_empty_cache"], r["fit_filled_cache"]
    s = r["surface"]
    print(f"import rnnkit: {r['import_seconds']:.2f} s (median of {r['imports']})")
    print(f"fresh-process first fit: empty cache {r['fit_empty_seconds']:.2f} s, filled cache "
          f"{r['fit_filled_seconds']:.2f} s -> {r['fit_empty_over_filled']:.2f}x; CPU "
          f"{min(x['cpu_seconds'] for x in e):.2f} s / {min(x['cpu_seconds'] for x in f):.2f} s "
          f"(training epochs alone {min(x['training_seconds'] for x in f):.2f} s; filled: "
          f"{f[0]['whole']['loaded']} programs loaded whole, {f[0]['whole']['compiled']} compiled; "
          f"jax's entries: {f[0]['cache_hits']} loaded, {f[0]['cache_misses']} missed; compile phases "
          f"empty {e[0]['compile']['by_phase']} filled {f[0]['compile']['by_phase']})")
    print(f"loss surface {s['points']} points ({s['windows']} windows x {s['steps']} steps, H = "
          f"{s['hidden']}): cold loop {s['cold']['loop']:.2f} s / batched {s['cold']['batched']:.2f} s "
          f"-> {r['surface_cold_ratio']:.2f}x; warm loop {s['warm']['loop']:.2f} s / batched "
          f"{s['warm']['batched']:.2f} s -> {r['surface_warm_ratio']:.2f}x (CPU s: cold "
          f"{s['cold_cpu']['loop']:.2f} / {s['cold_cpu']['batched']:.2f}, warm {s['warm_cpu']['loop']:.2f} / "
          f"{s['warm_cpu']['batched']:.2f}); max relative difference "
          f"{s['max_relative_difference']:.1e}; default 21 x 21 surface warm "
          f"{s['default_surface_warm']:.2f} s")
    print(f"panel Train to last figure: fresh process, empty cache {r['click_empty_seconds']:.2f} s; "
          f"fresh process, filled cache {r['click_filled_seconds']:.2f} s -> "
          f"{r['click_empty_seconds'] / r['click_filled_seconds']:.2f}x; second click "
          f"{r['click_again_seconds']:.2f} s; phases (s) of the filled-cache process "
          f"{ {k: [round(x, 2) for x in v] for k, v in r['panel_filled_cache'][0]['phases'].items()} }")


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--smoke", action="store_true", help="tiny data: checks that it runs")
    ap.add_argument("--quick", action="store_true", help="one round instead of two")
    ap.add_argument("--rounds", type=int, default=None)
    ap.add_argument("--repeats", type=int, default=2, help=argparse.SUPPRESS)
    ap.add_argument("--child", choices=("import", "fit", "surface", "panel"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        result = {"import": child_import, "fit": lambda: child_fit(args.smoke),
                  "surface": lambda: child_surface(args.smoke, args.repeats),
                  "panel": lambda: child_panel(args.smoke)}[args.child]()
        print(_util.RESULT_PREFIX + json.dumps(result, default=_util._plain), flush=True)
        return result
    rounds = args.rounds or (1 if (args.quick or args.smoke) else 2)
    result = measure(args.smoke, rounds)
    report(result)
    _util.emit(result)
    return result


if __name__ == "__main__":
    main()
