"""Time one training step: rnnkit's fast BPTT vs plain autodiff of the scan vs PyTorch.

    python benchmarks/bench_step.py            # every shape, repeats until ~1 s per timing
    python benchmarks/bench_step.py --quick    # the four smaller shapes, fewer repeats
    python benchmarks/bench_step.py --smoke    # tiny shapes: checks that it runs (numbers meaningless)

A training step is forward + BPTT + Adam on a many-to-one regression loss
(tanh state, O = 1), float32, jitted as one program for JAX:

    fast     jax.value_and_grad(rnnkit.loss)          (custom-VJP BPTT)
    autodiff jax.value_and_grad(rnnkit._model._loss_autodiff)   (autodiff of lax.scan)
    torch    torch.nn.RNN + torch.nn.Linear + MSELoss + torch.optim.Adam

Achieved GFLOP/s counts the matrix products of one step,
6 T B H^2 + 4 T B I H (+ the output layer), and is set against numpy's float32
1024 x 1024 matmul rate measured right beside each shape (the machine is shared:
one rate taken at the start would not describe the load during a later shape). Prints one row per shape, the
TARGET lines read by ``run.py``, and a RESULT line (JSON).
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import _util  # noqa: E402

SHAPES = [(1, 100, 1, 8), (16, 50, 1, 16), (64, 50, 3, 32), (64, 100, 3, 128), (128, 200, 8, 256)]
SMOKE_SHAPES = [(1, 5, 1, 4), (4, 6, 2, 8)]


def timed(fn, min_seconds, min_reps, max_reps):
    """Median seconds of fn() (which must block until its result is ready)."""
    fn()  # warm-up: compile, caches
    times = []
    start = time.perf_counter()
    while len(times) < max_reps and (len(times) < min_reps or time.perf_counter() - start < min_seconds):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def numpy_matmul_gflops(reps):
    a = np.random.default_rng(0).standard_normal((1024, 1024), dtype=np.float32)
    b = np.random.default_rng(1).standard_normal((1024, 1024), dtype=np.float32)
    return 2 * 1024 ** 3 / timed(lambda: a @ b, 0.5, reps, 200) / 1e9


def step_flops(B, T, I, H, O=1):
    # forward: x U, h V, h W; backward: dA V^T, dV, dU, dW
    return 6 * T * B * H * H + 4 * T * B * I * H + 4 * B * H * O


def jax_steps(B, T, I, H):
    """Jitted (fast, autodiff) training steps and their arguments."""
    import jax
    import optax

    import rnnkit
    from rnnkit import _model

    rng = np.random.default_rng(0)
    xs = jax.numpy.asarray(rng.standard_normal((B, T, I), dtype=np.float32))
    ys = jax.numpy.asarray(rng.standard_normal((B, 1), dtype=np.float32))
    opt = optax.adam(1e-3)

    def make(loss_fn):
        @jax.jit
        def step(params, opt_state, xs, ys):
            value, grads = jax.value_and_grad(loss_fn)(params, xs, ys, activation="tanh",
                                                       task="regression", mode="many-to-one")
            updates, opt_state = opt.update(grads, opt_state, params)
            return optax.apply_updates(params, updates), opt_state, value
        params = rnnkit.init_params(jax.random.key(0), I, H, 1, scheme="orthogonal")
        state = [params, opt.init(params)]

        def run():
            state[0], state[1], v = step(state[0], state[1], xs, ys)
            v.block_until_ready()
        return run

    # the two gradients at the starting point, to show they agree
    params = rnnkit.init_params(jax.random.key(0), I, H, 1, scheme="orthogonal")
    kw = dict(activation="tanh", task="regression", mode="many-to-one")
    g1 = jax.jit(jax.grad(lambda p: rnnkit.loss(p, xs, ys, **kw)))(params)
    g2 = jax.jit(jax.grad(lambda p: _model._loss_autodiff(p, xs, ys, **kw)))(params)
    rel = max(float(np.max(np.abs(g1[k] - g2[k])) / max(np.max(np.abs(g2[k])), 1e-30)) for k in g1)
    return make(rnnkit.loss), make(_model._loss_autodiff), rel


def torch_step(B, T, I, H):
    import torch

    torch.manual_seed(0)
    rnn = torch.nn.RNN(I, H, nonlinearity="tanh", batch_first=True)
    lin = torch.nn.Linear(H, 1)
    opt = torch.optim.Adam(list(rnn.parameters()) + list(lin.parameters()), lr=1e-3)
    rng = np.random.default_rng(0)
    xs = torch.from_numpy(rng.standard_normal((B, T, I), dtype=np.float32))
    ys = torch.from_numpy(rng.standard_normal((B, 1), dtype=np.float32))
    mse = torch.nn.MSELoss()

    def run():
        opt.zero_grad()
        out = lin(rnn(xs)[0][:, -1])
        mse(out, ys).backward()
        opt.step()
    return run


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    g = ap.add_mutually_exclusive_group()
    g.add_argument("--quick", action="store_true", help="the four smaller shapes, fewer repeats")
    g.add_argument("--smoke", action="store_true", help="tiny shapes: checks that the script runs")
    args = ap.parse_args(argv)
    shapes = SMOKE_SHAPES if args.smoke else SHAPES[:4] if args.quick else SHAPES
    min_s, min_reps, max_reps = (0.0, 1, 2) if args.smoke else (0.3, 3, 20) if args.quick else (1.0, 5, 100)

    import jax
    try:
        import torch
        torch.set_num_threads(2)
    except ImportError:
        torch = None
    matmul_reps = 3 if args.smoke else 20
    print(f"jax {jax.__version__}, torch {torch.__version__ if torch else 'absent'}, "
          f"load {_util.load_average()}")
    print(f"{'B,T,I,H':>18} {'fast ms':>9} {'autodiff ms':>12} {'torch ms':>9} {'autodiff/fast':>14} "
          f"{'torch/fast':>11} {'GFLOP/s':>8} {'matmul':>7} {'% matmul':>9} {'grad rel diff':>14}")
    rows = []
    for B, T, I, H in shapes:
        fast, plain, rel = jax_steps(B, T, I, H)
        matmul_before = numpy_matmul_gflops(matmul_reps)
        t_fast = timed(fast, min_s, min_reps, max_reps)
        t_plain = timed(plain, min_s, min_reps, max_reps)
        t_torch = timed(torch_step(B, T, I, H), min_s, min_reps, max_reps) if torch else float("nan")
        # numpy's rate just before and just after this shape's timings, averaged
        matmul = (matmul_before + numpy_matmul_gflops(matmul_reps)) / 2
        gflops = step_flops(B, T, I, H) / t_fast / 1e9
        row = {"shape": [B, T, I, H], "fast_ms": 1e3 * t_fast, "autodiff_ms": 1e3 * t_plain,
               "torch_ms": 1e3 * t_torch, "autodiff_over_fast": t_plain / t_fast,
               "torch_over_fast": t_torch / t_fast, "gflops": gflops,
               "matmul_gflops": matmul, "matmul_fraction": gflops / matmul, "grad_rel_diff": rel,
               "load": _util.load_average()}
        rows.append(row)
        print(f"{str((B, T, I, H)):>18} {row['fast_ms']:9.2f} {row['autodiff_ms']:12.2f} "
              f"{row['torch_ms']:9.2f} {row['autodiff_over_fast']:13.2f}x {row['torch_over_fast']:10.2f}x "
              f"{gflops:8.1f} {matmul:7.0f} {100 * row['matmul_fraction']:8.1f}% {rel:14.1e}", flush=True)

    load = _util.load_average()
    if load and load[0] > (os.cpu_count() or 1):
        # Under oversubscription numpy's and torch's threads lose far more than XLA's:
        # the ratios then flatter rnnkit. Measure again on a quiet machine.
        print(f"WARNING: load {load[0]} exceeds the {os.cpu_count()} cores; the torch and "
              "numpy-matmul ratios are not trustworthy in this run", flush=True)
    large = rows[-1]
    name = "x".join(map(str, large["shape"]))
    targets = [
        _util.target(f"step.fast_over_autodiff_{name}", large["autodiff_over_fast"], ">= 1.1x",
                     large["autodiff_over_fast"] >= 1.1, "x"),
        _util.target("step.grads_fast_equal_autodiff", max(r["grad_rel_diff"] for r in rows),
                     "<= 1e-5 relative (float32)", max(r["grad_rel_diff"] for r in rows) <= 1e-5),
    ]
    for r in rows:
        name = "x".join(map(str, r["shape"]))
        targets.append(_util.target(f"step.torch_over_fast_{name}", r["torch_over_fast"], ">= 2x",
                                    r["torch_over_fast"] >= 2.0, "x"))
        if r["shape"][3] >= 128:
            targets.append(_util.target(f"step.matmul_fraction_{name}", 100 * r["matmul_fraction"],
                                        ">= 50% of numpy's matmul rate",
                                        r["matmul_fraction"] >= 0.5, "%"))
    _util.emit({"benchmark": "step", "mode": "smoke" if args.smoke else "quick" if args.quick else "full",
                "matmul_gflops": statistics.median(r["matmul_gflops"] for r in rows), "rows": rows, "load": _util.load_average(),
                "targets": targets})


if __name__ == "__main__":
    main()
