"""Time one training step: rnnkit's fast BPTT vs plain autodiff of the scan vs PyTorch.

    python benchmarks/bench_step.py            # every shape, repeats until ~1 s per timing
    python benchmarks/bench_step.py --quick    # the four smaller shapes, fewer repeats
    python benchmarks/bench_step.py --smoke    # tiny shapes: checks that it runs (numbers meaningless)

A training step is forward + BPTT + Adam on a many-to-one regression loss
(tanh state, O = 1), float32, over one minibatch (B, T, I):

    fast     jax.value_and_grad(rnnkit.loss)          (custom-VJP BPTT)
    autodiff jax.value_and_grad(rnnkit.recurrent._model._loss_autodiff)   (autodiff of lax.scan)
    torch    torch.nn.RNN + torch.nn.Linear + MSELoss + torch.optim.Adam

Each side runs STEPS steps over STEPS different minibatches, timed together and
divided by STEPS; the sides take turns, one run each per round, and each
reports its median over the rounds. The JAX steps run as rnnkit's trainer runs them: inside one
compiled loop (``lax.fori_loop``; rnnkit's epoch program is a while loop over
minibatches) and with the step mask the trainer always passes (every step real
here, given as data, so that the work equals torch's). torch runs its usual
Python loop. Two more columns of the fast step, for comparison: ``no mask``
(the same loop, mask=None, as a direct call of ``rnnkit.loss`` without a mask
runs) and ``call ms`` (jitted alone, no mask, called once per step). Measured
at (128, 200, 8, 256) the masked step is the faster: XLA's cost model splits a
fusion over two threads by the bytes it touches, and the masked loop bodies,
which also read the mask and the held state, cross that line where the
unmasked ones do not. A call per step takes fresh pages from the kernel for
its (T, B, H) buffers every time (about 19,000 minor page faults and 40 ms of
system CPU time per call at that shape), which a loop inside one program pays
once.

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
STEPS = 8  # minibatches per timed loop


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


def timed_together(fns, min_seconds, min_reps, max_reps):
    """Median seconds of each fn(), timed in rounds (``_util.timed_rounds``), so that every
    side sees the same load on a shared machine."""
    return [statistics.median(ts) for ts in _util.timed_rounds(fns, min_seconds, min_reps, max_reps)]


def numpy_matmul_gflops(reps):
    a = np.random.default_rng(0).standard_normal((1024, 1024), dtype=np.float32)
    b = np.random.default_rng(1).standard_normal((1024, 1024), dtype=np.float32)
    return 2 * 1024 ** 3 / timed(lambda: a @ b, 0.5, reps, 200) / 1e9


def step_flops(B, T, I, H, O=1):
    # forward: x U, h V, h W; backward: dA V^T, dV, dU, dW
    return 6 * T * B * H * H + 4 * T * B * I * H + 4 * B * H * O


def _batches(B, T, I):
    rng = np.random.default_rng(0)
    return (rng.standard_normal((STEPS, B, T, I), dtype=np.float32),
            rng.standard_normal((STEPS, B, 1), dtype=np.float32))


def jax_steps(B, T, I, H):
    """Runners of STEPS training steps: fast and autodiff in one compiled loop, fast per call."""
    import jax
    import optax
    from jax import lax

    import rnnkit
    from rnnkit.recurrent import _model

    xs_np, ys_np = _batches(B, T, I)
    xs, ys = jax.numpy.asarray(xs_np), jax.numpy.asarray(ys_np)
    opt = optax.adam(1e-3)
    kw = dict(activation="tanh", task="regression", mode="many-to-one")

    # The mask the trainer passes with every batch: every step real here. It is data
    # (an argument), as in the epoch program, so XLA cannot fold it away.
    masks = jax.numpy.ones((STEPS, B, T), bool)

    def step(loss_fn, params, opt_state, x, y, mask=None):
        value, grads = jax.value_and_grad(loss_fn)(params, x, y, mask=mask, **kw)
        updates, opt_state = opt.update(grads, opt_state, params)
        return optax.apply_updates(params, updates), opt_state, value

    def runner(loss_fn, in_loop, masked=True):
        params = rnnkit.init_params(jax.random.key(0), I, H, 1, scheme="orthogonal")
        state = [params, opt.init(params)]
        if in_loop:
            @jax.jit
            def steps(params, opt_state, xs, ys, masks):
                def body(k, carry):
                    params, opt_state, total = carry
                    params, opt_state, value = step(loss_fn, params, opt_state, xs[k], ys[k],
                                                    masks[k] if masked else None)
                    return params, opt_state, total + value
                return lax.fori_loop(0, STEPS, body, (params, opt_state, jax.numpy.float32(0)))

            def run():
                state[0], state[1], v = steps(state[0], state[1], xs, ys, masks)
                v.block_until_ready()
        else:
            one = jax.jit(lambda p, s, x, y: step(loss_fn, p, s, x, y))

            def run():
                for k in range(STEPS):
                    state[0], state[1], v = one(state[0], state[1], xs[k], ys[k])
                v.block_until_ready()
        return run

    # the two gradients at the starting point, to show they agree
    params = rnnkit.init_params(jax.random.key(0), I, H, 1, scheme="orthogonal")
    g1 = jax.jit(jax.grad(lambda p: rnnkit.loss(p, xs[0], ys[0], **kw)))(params)
    g2 = jax.jit(jax.grad(lambda p: _model._loss_autodiff(p, xs[0], ys[0], **kw)))(params)
    rel = max(float(np.max(np.abs(g1[k] - g2[k])) / max(np.max(np.abs(g2[k])), 1e-30)) for k in g1)
    return (runner(rnnkit.loss, True), runner(_model._loss_autodiff, True),
            runner(rnnkit.loss, True, masked=False), runner(rnnkit.loss, False), rel)


def torch_step(B, T, I, H):
    """Runner of STEPS torch training steps over the same minibatches."""
    import torch

    torch.manual_seed(0)
    rnn = torch.nn.RNN(I, H, nonlinearity="tanh", batch_first=True)
    lin = torch.nn.Linear(H, 1)
    opt = torch.optim.Adam(list(rnn.parameters()) + list(lin.parameters()), lr=1e-3)
    xs_np, ys_np = _batches(B, T, I)
    xs, ys = torch.from_numpy(xs_np), torch.from_numpy(ys_np)
    mse = torch.nn.MSELoss()

    def run():
        for k in range(STEPS):
            opt.zero_grad()
            out = lin(rnn(xs[k])[0][:, -1])
            mse(out, ys[k]).backward()
            opt.step()
    return run


def breakdown(B, T, I, H, min_s, min_reps, max_reps) -> dict:
    """Where rnnkit's step goes at one shape, each part timed alone (ms per step) and the rate
    of its per-step product (B, H) x (H, H) in XLA's loop against numpy's (GFLOP/s)."""
    import jax
    import jax.numpy as jnp
    from jax import lax

    import rnnkit
    from rnnkit.recurrent import _scan

    xs_np, ys_np = _batches(B, T, I)
    xs, ys = jnp.asarray(xs_np), jnp.asarray(ys_np)
    params = rnnkit.init_params(jax.random.key(0), I, H, 1, scheme="orthogonal")
    kw = dict(activation="tanh", task="regression", mode="many-to-one")

    masks = jnp.ones((STEPS, B, T), bool)  # the trainer's mask, as data, as in jax_steps

    def looped(fn):
        @jax.jit
        def run(params, xs, ys, masks):
            def body(k, total):
                out = fn(params, xs[k], ys[k], masks[k])
                return total + sum(jnp.sum(v) for v in jax.tree_util.tree_leaves(out))
            return lax.fori_loop(0, STEPS, body, jnp.float32(0))
        return lambda: run(params, xs, ys, masks).block_until_ready()

    def ms(fn):
        return 1e3 * timed(fn, min_s, min_reps, max_reps) / STEPS

    rng = np.random.default_rng(1)
    hs = jnp.asarray(rng.standard_normal((T, B, H), dtype=np.float32))
    da = jnp.asarray(rng.standard_normal((T, B, H), dtype=np.float32))
    dv = jax.jit(_scan._tb_product)
    h0 = jnp.asarray(rng.standard_normal((B, H), dtype=np.float32))
    V = jnp.asarray(0.05 * rng.standard_normal((H, H), dtype=np.float32))
    steps = jax.jit(lambda h, v: lax.fori_loop(0, T, lambda i, h: jnp.tanh(h @ v), h))
    flops = 2 * B * H * H
    a, b = np.asarray(h0), np.asarray(V)
    out = {"shape": [B, T, I, H],
           "forward_ms": ms(looped(lambda p, x, y, m: rnnkit.loss(p, x, y, mask=m, **kw))),
           "forward_backward_ms": ms(looped(jax.grad(
               lambda p, x, y, m: rnnkit.loss(p, x, y, mask=m, **kw)))),
           "dV_product_ms": 1e3 * timed(lambda: dv(hs, da).block_until_ready(), min_s, min_reps, max_reps),
           "xla_step_product_gflops": T * flops / timed(lambda: steps(h0, V).block_until_ready(),
                                                         min_s, min_reps, max_reps) / 1e9,
           "numpy_step_product_gflops": flops / timed(lambda: a @ b, min_s, max(min_reps, 50), 2000) / 1e9}
    print(f"where the step goes at {tuple(out['shape'])}: forward {out['forward_ms']:.1f} ms, forward + "
          f"BPTT {out['forward_backward_ms']:.1f} ms (the dV product alone {out['dV_product_ms']:.1f} ms); "
          f"the per-step ({B} x {H}) x ({H} x {H}) product in XLA's loop (with tanh) "
          f"{out['xla_step_product_gflops']:.0f} GFLOP/s, numpy's {out['numpy_step_product_gflops']:.0f}",
          flush=True)
    return out


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
    print(f"{'B,T,I,H':>18} {'fast ms':>9} {'autodiff ms':>12} {'no mask':>8} {'call ms':>8} {'torch ms':>9} {'autodiff/fast':>14} "
          f"{'torch/fast':>11} {'GFLOP/s':>8} {'matmul':>7} {'% matmul':>9} {'grad rel diff':>14}")
    rows = []
    for B, T, I, H in shapes:
        fast, plain, fast_plain, fast_call, rel = jax_steps(B, T, I, H)
        matmul_before = numpy_matmul_gflops(matmul_reps)
        sides = [fast, plain, fast_plain, fast_call] + ([torch_step(B, T, I, H)] if torch else [])
        got = [t / STEPS for t in timed_together(sides, 5 * min_s, min_reps, max_reps)]
        t_fast, t_plain, t_nomask, t_call = got[:4]
        t_torch = got[4] if torch else float("nan")
        # numpy's rate just before and just after this shape's timings, averaged
        matmul = (matmul_before + numpy_matmul_gflops(matmul_reps)) / 2
        gflops = step_flops(B, T, I, H) / t_fast / 1e9
        row = {"shape": [B, T, I, H], "fast_ms": 1e3 * t_fast, "autodiff_ms": 1e3 * t_plain,
               "fast_call_ms": 1e3 * t_call, "torch_over_fast_call": t_torch / t_call,
               "fast_nomask_ms": 1e3 * t_nomask, "torch_over_fast_nomask": t_torch / t_nomask,
               "torch_ms": 1e3 * t_torch, "autodiff_over_fast": t_plain / t_fast,
               "torch_over_fast": t_torch / t_fast, "gflops": gflops,
               "matmul_gflops": matmul, "matmul_fraction": gflops / matmul, "grad_rel_diff": rel,
               "load": _util.load_average()}
        rows.append(row)
        print(f"{str((B, T, I, H)):>18} {row['fast_ms']:9.2f} {row['autodiff_ms']:12.2f} {row['fast_nomask_ms']:8.2f} {row['fast_call_ms']:8.2f} "
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
    parts = [breakdown(*r["shape"], min_s, min_reps, max_reps) for r in rows
             if r["shape"][3] >= 128] or [breakdown(*large["shape"], min_s, min_reps, max_reps)]
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
                "matmul_gflops": statistics.median(r["matmul_gflops"] for r in rows), "rows": rows, "breakdowns": parts, "load": _util.load_average(),
                "targets": targets})


if __name__ == "__main__":
    main()
