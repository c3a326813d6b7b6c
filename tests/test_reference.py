"""The JAX model against the NumPy specification: states, loss, BPTT and finite differences."""
import itertools

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import rnnkit
from rnnkit import reference
from rnnkit.data._config import ACTIVATIONS, MODES, TASKS
from tolerances import EXACT64, FINITE_DIFF

# (B, T, I, H, O) per case; T = 1 and B = 1 included on purpose.
SHAPES = [(1, 1, 2, 3, 2), (3, 5, 2, 4, 3), (1, 6, 1, 3, 2), (4, 1, 3, 2, 2),
          (2, 7, 2, 5, 1), (3, 3, 1, 4, 3), (1, 4, 2, 3, 2), (2, 2, 3, 3, 2)]
CASES = list(itertools.product(TASKS, MODES, (False, True)))


def problem(seed, shape, task, mode, masked, activation):
    """Random float64 params, inputs, targets and mask for one case.

    For relu, redraw until no pre-activation lies within 1e-3 of the kink at 0,
    where central differences would straddle two slopes.
    """
    rng = np.random.default_rng(seed)
    B, T, I, H, O = shape
    for _ in range(100):
        p = rnnkit.init_params(jax.random.key(int(rng.integers(1 << 30))), I, H, O,
                               scheme="glorot", dtype=jnp.float64)
        p = {k: np.asarray(v) + (0.1 * rng.normal(size=v.shape) if k in "bc" else 0.0)
             for k, v in p.items()}
        xs = rng.normal(size=(B, T, I))
        mask = None
        if masked:
            mask = rng.random((B, T)) > 0.35
            if B > 1:
                mask[0] = False  # an all-padding row
        if task == "regression":
            ys = rng.normal(size=(B, T, O) if mode == "many-to-many" else (B, O))
        else:
            ys = rng.integers(0, O, size=(B, T) if mode == "many-to-many" else (B,))
        a = _preactivations(p, xs, mask, activation)
        if activation != "relu" or np.min(np.abs(a)) > 1e-3:
            return p, xs, ys, mask
    raise RuntimeError("could not draw relu data away from the kink")


def _preactivations(p, xs, mask, activation):
    hs, _ = reference.forward(p, xs, activation=activation, mask=mask)
    h_prev = np.concatenate([np.zeros_like(hs[:, :1]), hs[:, :-1]], axis=1)
    return xs @ p["U"] + h_prev @ p["V"] + p["b"]


@pytest.fixture(scope="module")
def grad_fn():
    """One jitted value_and_grad per (task, mode, masked): the activation is data."""
    cache = {}

    def get(task, mode, masked):
        if (task, mode, masked) not in cache:
            def f(p, xs, ys, mask, act):
                return jax.value_and_grad(rnnkit.loss)(p, xs, ys, activation=act, task=task,
                                                       mode=mode, mask=mask)
            cache[task, mode, masked] = jax.jit(f)
        return cache[task, mode, masked]
    return get


@pytest.mark.parametrize("case", range(len(CASES)))
def test_grads_equal_bptt_and_finite_differences(case, grad_fn):
    # Hand-written BPTT: Goodfellow, Bengio & Courville, Deep Learning (2016), sec. 10.2.2.
    # Central differences: error O(eps^2), a standard numerical check (common practice, no source).
    task, mode, masked = CASES[case]
    shape = SHAPES[case]
    f = grad_fn(task, mode, masked)
    for k, act in enumerate(ACTIVATIONS):
        p, xs, ys, mask = problem(100 * case + k, shape, task, mode, masked, act)
        value, g = f(p, xs, ys, mask, jnp.int32(k))
        loss_ref, g_ref = reference.bptt(p, xs, ys, activation=act, task=task, mode=mode, mask=mask)
        g_fd = reference.finite_difference_grads(p, xs, ys, activation=act, task=task, mode=mode,
                                                 mask=mask)
        np.testing.assert_allclose(value, loss_ref, **EXACT64)
        for name in ("U", "V", "b", "W", "c"):
            assert g[name].dtype == jnp.float64
            np.testing.assert_allclose(g[name], g_ref[name], **EXACT64, err_msg=f"{act} {name}")
            np.testing.assert_allclose(g_ref[name], g_fd[name], **FINITE_DIFF, err_msg=f"{act} {name}")
            np.testing.assert_allclose(g[name], g_fd[name], **FINITE_DIFF, err_msg=f"{act} {name}")


@pytest.mark.parametrize("act", ACTIVATIONS)
def test_states_and_outputs_equal_reference(act):
    p, xs, _, mask = problem(7, (3, 6, 2, 4, 2), "regression", "many-to-many", True, act)
    h0 = np.random.default_rng(1).normal(size=(4,))
    hs_ref, os_ref = reference.forward(p, xs, activation=act, mask=mask, h0=h0)
    np.testing.assert_allclose(rnnkit.hidden_states(p, xs, activation=act, mask=mask, h0=h0),
                               hs_ref, **EXACT64)
    np.testing.assert_allclose(rnnkit.outputs(p, xs, activation=act, mask=mask, h0=h0),
                               os_ref, **EXACT64)
    # unbatched (T, I) gives row 1 of the batched result
    hs1, os1 = reference.forward(p, xs[1], activation=act, mask=mask[1], h0=h0)
    np.testing.assert_allclose(hs1, hs_ref[1], **EXACT64)
    np.testing.assert_allclose(rnnkit.outputs(p, xs[1], activation=act, mask=mask[1], h0=h0),
                               os1, **EXACT64)


def test_reference_loss_definitions():
    # Mean squared error without 1/2, and mean softmax cross-entropy, written out by hand
    # for one output (common practice, no source).
    p, xs, ys, _ = problem(3, (2, 3, 1, 2, 3), "regression", "many-to-one", False, "tanh")
    _, os = reference.forward(p, xs)
    assert reference.loss(p, xs, ys, mode="many-to-one") == pytest.approx(
        np.mean((os[:, -1] - ys) ** 2), rel=1e-12)
    labels = np.array([2, 0])
    logits = os[:, -1]
    ce = -np.log(np.exp(logits[[0, 1], labels]) / np.exp(logits).sum(axis=1))
    assert reference.loss(p, xs, labels, task="classification", mode="many-to-one") == pytest.approx(
        ce.mean(), rel=1e-12)


@pytest.mark.parametrize("where", ["front", "end"])
def test_padding_changes_nothing(where):
    # DEVELOPERS.md contract: a padded step holds the state and adds no loss term, so a
    # padded sequence gives the loss and gradients of the unpadded one.
    p, xs, ys, _ = problem(5, (1, 5, 2, 3, 2), "regression", "many-to-many", False, "tanh")
    pad = np.zeros((1, 3, 2))
    padded = np.concatenate([pad, xs] if where == "front" else [xs, pad], axis=1)
    mask = np.ones((1, 8), bool)
    if where == "front":
        mask[0, :3] = False
        ys_p = np.concatenate([np.full((1, 3, 2), np.nan), ys], axis=1)
    else:
        mask[0, 5:] = False
        ys_p = np.concatenate([ys, np.full((1, 3, 2), np.nan)], axis=1)
    v, g = jax.value_and_grad(rnnkit.loss)(p, xs, ys)
    vp, gp = jax.value_and_grad(rnnkit.loss)(p, padded, ys_p, mask=mask)
    np.testing.assert_allclose(vp, v, **EXACT64)
    for k in g:
        np.testing.assert_allclose(gp[k], g[k], **EXACT64)
    # many-to-one reads the last step, which holds the last real state
    last = reference.forward(p, xs)[1][:, -1]
    np.testing.assert_allclose(rnnkit.loss(p, padded, last, mode="many-to-one", mask=mask), 0.0,
                               atol=1e-20)


def test_check_gradients_table():
    p, xs, ys, mask = problem(11, (2, 4, 2, 3, 2), "classification", "many-to-many", True, "sigmoid")
    table = rnnkit.check_gradients(p, xs.astype(np.float32), ys, activation=1,  # sigmoid
                                   task="classification", mode="many-to-many", mask=mask)
    assert list(table.index) == ["U", "V", "b", "W", "c"]
    assert table.loc["V", "shape"] == (3, 3)
    assert (table["jax_vs_bptt_rel"] < 1e-10).all()
    assert (table["jax_vs_fd_rel"] < 1e-6).all()
    assert (table["grad_norm"] > 0).all()


def test_check_gradients_reports_a_wrong_gradient(monkeypatch):
    # The table must be able to fail: a gradient 1% too large shows as a 1% relative difference.
    import rnnkit.inspection._gradcheck as gc
    monkeypatch.setattr(gc, "_jax_loss", lambda *a, **kw: 1.01 * rnnkit.loss(*a, **kw))
    p, xs, ys, _ = problem(12, (2, 3, 1, 2, 1), "regression", "many-to-one", False, "tanh")
    table = gc.check_gradients(p, xs, ys, mode="many-to-one")
    np.testing.assert_allclose(table["jax_vs_bptt_rel"], 0.01 / 1.01, rtol=1e-6)
    assert (table["bptt_vs_fd_rel"] < 1e-6).all()
