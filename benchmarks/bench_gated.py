"""Time one GRU and one LSTM training step: rnnkit vs PyTorch, side by side in one run.

    python benchmarks/bench_gated.py            # the five shapes of bench_step.py
    python benchmarks/bench_gated.py --quick    # the four smaller shapes, fewer repeats
    python benchmarks/bench_gated.py --smoke    # tiny shapes: checks that it runs
    python benchmarks/bench_gated.py --one-core # bind the process to one core, torch on one thread

A training step is forward + BPTT + Adam on a many-to-one regression loss
(tanh candidate, O = 1), float32, over one minibatch (B, T, I):

    fast      jax.value_and_grad(rnnkit.loss(..., cell=c))   the cell's custom-VJP BPTT
    autodiff  the same through recurrent._model._loss_autodiff (autodiff of lax.scan)
    torch     torch.nn.GRU / torch.nn.LSTM + torch.nn.Linear + MSELoss + torch.optim.Adam

As in bench_step.py: STEPS minibatches per timed run; the JAX steps run inside one
compiled loop with the trainer's step mask (every step real, given as data); torch
runs its usual Python loop; the sides take turns, round after round, and each
reports its median (and, for a loaded machine, the ratio of the best rounds:
torch's threads lose far more than XLA's under competing load). Prints a row per (cell, shape), TARGET lines (torch/fast per
shape and the median over the shapes, target >= 1.5x) and a RESULT line (JSON).
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import _util  # noqa: E402
from bench_step import SHAPES, SMOKE_SHAPES, STEPS, _batches  # noqa: E402

TARGET_RATIO = 1.5  # median over the shapes of torch ms / rnnkit ms, per cell


def jax_runners(cell, B, T, I, H):
    """Runners of STEPS training steps (fast, autodiff) in one compiled loop, and the two
    gradients' largest relative difference at the start."""
    import jax
    import optax
    from jax import lax

    import rnnkit
    from rnnkit.recurrent import _model

    xs_np, ys_np = _batches(B, T, I)
    xs, ys = jax.numpy.asarray(xs_np), jax.numpy.asarray(ys_np)
    masks = jax.numpy.ones((STEPS, B, T), bool)  # the trainer's mask, as data
    opt = optax.adam(1e-3)
    kw = dict(activation="tanh", task="regression", mode="many-to-one", cell=cell)

    def runner(loss_fn):
        params = rnnkit.init_params(jax.random.key(0), I, H, 1, scheme="orthogonal", cell=cell)
        state = [params, opt.init(params)]

        @jax.jit
        def steps(params, opt_state, xs, ys, masks):
            def body(k, carry):
                params, opt_state, total = carry
                value, grads = jax.value_and_grad(loss_fn)(params, xs[k], ys[k], mask=masks[k], **kw)
                updates, opt_state = opt.update(grads, opt_state, params)
                return optax.apply_updates(params, updates), opt_state, total + value
            return lax.fori_loop(0, STEPS, body, (params, opt_state, jax.numpy.float32(0)))

        def run():
            state[0], state[1], v = steps(state[0], state[1], xs, ys, masks)
            v.block_until_ready()
        return run

    params = rnnkit.init_params(jax.random.key(0), I, H, 1, scheme="orthogonal", cell=cell)
    g1 = jax.jit(jax.grad(lambda p: rnnkit.loss(p, xs[0], ys[0], mask=masks[0], **kw)))(params)
    g2 = jax.jit(jax.grad(lambda p: _model._loss_autodiff(p, xs[0], ys[0], mask=masks[0], **kw)))(params)
    rel = max(float(np.max(np.abs(g1[k] - g2[k])) / max(np.max(np.abs(g2[k])), 1e-30)) for k in g1)
    return runner(rnnkit.loss), runner(_model._loss_autodiff), rel


def torch_runner(cell, B, T, I, H):
    import torch

    torch.manual_seed(0)
    rnn = (torch.nn.GRU if cell == "gru" else torch.nn.LSTM)(I, H, batch_first=True)
    lin = torch.nn.Linear(H, 1)
    opt = torch.optim.Adam(list(rnn.parameters()) + list(lin.parameters()), lr=1e-3)
    xs_np, ys_np = _batches(B, T, I)
    xs, ys = torch.from_numpy(xs_np), torch.from_numpy(ys_np)
    mse = torch.nn.MSELoss()

    def run():
        for k in range(STEPS):
            opt.zero_grad()
            mse(lin(rnn(xs[k])[0][:, -1]), ys[k]).backward()
            opt.step()
    return run


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    g = ap.add_mutually_exclusive_group()
    g.add_argument("--quick", action="store_true", help="the four smaller shapes, fewer repeats")
    g.add_argument("--smoke", action="store_true", help="tiny shapes: checks that the script runs")
    ap.add_argument("--one-core", action="store_true",
                    help="bind this process to one core (XLA and torch on one thread each): on a "
                         "shared, oversubscribed machine torch's OpenMP threads stall, and one core "
                         "each compares the two engines' own work")
    ap.add_argument("--cells", default="gru,lstm", help="comma-separated cells to time (default gru,lstm)")
    args = ap.parse_args(argv)
    cells = tuple(c for c in args.cells.split(",") if c)
    if not cells or any(c not in ("gru", "lstm") for c in cells):
        ap.error(f"--cells (={args.cells!r}) must name gru and/or lstm, comma-separated")
    if args.one_core:  # before jax and torch start their thread pools
        os.sched_setaffinity(0, {sorted(os.sched_getaffinity(0))[0]})
    shapes = SMOKE_SHAPES if args.smoke else SHAPES[:4] if args.quick else SHAPES
    min_s, min_reps, max_reps = (0.0, 1, 2) if args.smoke else (0.3, 3, 20) if args.quick else (1.0, 5, 60)

    import jax
    import torch
    torch.set_num_threads(1 if args.one_core else 2)
    print(f"jax {jax.__version__}, torch {torch.__version__}, load {_util.load_average()}"
          + (", one core" if args.one_core else ""))
    print(f"{'cell':>5} {'B,T,I,H':>18} {'fast ms':>9} {'autodiff ms':>12} {'torch ms':>9} "
          f"{'autodiff/fast':>14} {'torch/fast':>11} {'best/best':>10} {'grad rel diff':>14}")
    rows = []
    for cell in cells:
        for B, T, I, H in shapes:
            fast, plain, rel = jax_runners(cell, B, T, I, H)
            rounds = _util.timed_rounds([fast, plain, torch_runner(cell, B, T, I, H)], 5 * min_s, min_reps,
                                  max_reps)
            t_fast, t_plain, t_torch = (statistics.median(ts) / STEPS for ts in rounds)
            b_fast, b_plain, b_torch = (min(ts) / STEPS for ts in rounds)
            row = {"cell": cell, "shape": [B, T, I, H], "fast_ms": 1e3 * t_fast,
                   "autodiff_ms": 1e3 * t_plain, "torch_ms": 1e3 * t_torch,
                   "autodiff_over_fast": t_plain / t_fast, "torch_over_fast": t_torch / t_fast,
                   "best_torch_over_best_fast": b_torch / b_fast,
                   "best_autodiff_over_best_fast": b_plain / b_fast, "rounds": len(rounds[0]),
                   "grad_rel_diff": rel, "load": _util.load_average()}
            rows.append(row)
            print(f"{cell:>5} {str((B, T, I, H)):>18} {row['fast_ms']:9.2f} {row['autodiff_ms']:12.2f} "
                  f"{row['torch_ms']:9.2f} {row['autodiff_over_fast']:13.2f}x {row['torch_over_fast']:10.2f}x "
                  f"{row['best_torch_over_best_fast']:9.2f}x {rel:14.1e}", flush=True)
    load = _util.load_average()
    if load and load[0] > (os.cpu_count() or 1):
        print(f"WARNING: load {load[0]} exceeds the {os.cpu_count()} cores; torch's threads lose more "
              "than XLA's under oversubscription, so the ratios flatter rnnkit in this run", flush=True)
    targets = []
    for cell in cells:
        mine = [r for r in rows if r["cell"] == cell]
        for r in mine:
            name = "x".join(map(str, r["shape"]))
            targets.append(_util.target(f"gated.{cell}_torch_over_rnnkit_{name}", r["torch_over_fast"],
                                        f">= {TARGET_RATIO:g}x", r["torch_over_fast"] >= TARGET_RATIO, "x"))
        med = statistics.median(r["torch_over_fast"] for r in mine)
        targets.append(_util.target(f"gated.{cell}_torch_over_rnnkit_median", med,
                                    f">= {TARGET_RATIO:g}x", med >= TARGET_RATIO, "x"))
    worst = max(r["grad_rel_diff"] for r in rows)
    targets.append(_util.target("gated.grads_fast_equal_autodiff", worst, "<= 1e-5 relative (float32)",
                                worst <= 1e-5))
    _util.emit({"benchmark": "gated", "mode": "smoke" if args.smoke else "quick" if args.quick else "full",
                "one_core": bool(args.one_core), "rows": rows, "load": _util.load_average(), "targets": targets})


if __name__ == "__main__":
    main()
