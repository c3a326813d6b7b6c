"""The JAX model: init schemes, fast BPTT vs plain autodiff, dtypes, compiles, input errors."""
import itertools

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import rnnkit
from rnnkit.recurrent import _model
from rnnkit.data._config import ACTIVATIONS, MODES, TASKS
from tolerances import EXACT32, EXACT64, FAST_VS_AUTODIFF


def data(seed, B=3, T=6, I=2, H=5, O=3, dtype=np.float64, cell="elman"):
    rng = np.random.default_rng(seed)
    p = rnnkit.init_params(jax.random.key(seed), I, H, O, scheme="orthogonal", dtype=dtype, cell=cell)
    p = {k: jnp.asarray(np.asarray(v) + 0.1 * rng.normal(size=v.shape), dtype) for k, v in p.items()}
    xs = rng.normal(size=(B, T, I)).astype(dtype)
    mask = rng.random((B, T)) > 0.3
    ys = {("regression", "many-to-many"): rng.normal(size=(B, T, O)).astype(dtype),
          ("regression", "many-to-one"): rng.normal(size=(B, O)).astype(dtype),
          ("classification", "many-to-many"): rng.integers(0, O, (B, T)),
          ("classification", "many-to-one"): rng.integers(0, O, (B,))}
    return p, xs, ys, mask


# ---------------------------------------------------------------- initialisation

def test_glorot_uniform_bounds_and_variance():
    # Glorot & Bengio (2010), eq. 16: W ~ U[-sqrt(6/(n_in+n_out)), +sqrt(6/(n_in+n_out))],
    # whose variance is 2 / (n_in + n_out).
    p = rnnkit.init_params(jax.random.key(0), 40, 60, 20, scheme="glorot", dtype=jnp.float64)
    for name, (fan_in, fan_out) in {"U": (40, 60), "V": (60, 60), "W": (60, 20)}.items():
        w = np.asarray(p[name])
        limit = np.sqrt(6 / (fan_in + fan_out))
        assert np.abs(w).max() <= limit
        assert np.abs(w).max() > 0.95 * limit
        assert np.var(w) == pytest.approx(2 / (fan_in + fan_out), rel=0.15)
    assert not np.any(p["b"]) and not np.any(p["c"])  # zero biases (common practice, no source)


def test_init_shapes_dtypes_and_scale():
    p = rnnkit.init_params(jax.random.key(1), 3, 7, 2, scheme="identity", recurrent_scale=0.5,
                           dtype=jnp.float64)
    assert {k: v.shape for k, v in p.items()} == {"U": (3, 7), "V": (7, 7), "b": (7,),
                                                  "W": (7, 2), "c": (2,)}
    assert all(v.dtype == jnp.float64 for v in p.values())
    np.testing.assert_array_equal(p["V"], 0.5 * np.eye(7))
    q = rnnkit.init_params(jax.random.key(1), 3, 7, 2)
    assert all(v.dtype == jnp.float32 for v in q.values())
    with pytest.raises(ValueError, match="scheme"):
        rnnkit.init_params(jax.random.key(1), 3, 7, 2, scheme="he")
    with pytest.raises(ValueError, match="n_hidden"):
        rnnkit.init_params(jax.random.key(1), 3, 0, 2)
    with pytest.raises(ValueError, match="recurrent_scale"):
        rnnkit.init_params(jax.random.key(1), 3, 4, 2, recurrent_scale=-1.0)


# ---------------------------------------------------------------- fast BPTT

@pytest.mark.parametrize("task,mode", list(itertools.product(TASKS, MODES)))
def test_fast_bptt_equals_autodiff_of_the_scan(task, mode):
    # Masked data: the general path (padded steps hold the state); the unmasked scan is
    # covered below and, against the NumPy BPTT, in test_reference.py.
    p, xs, ys, mask = data(1)
    h0 = np.linspace(-0.5, 0.5, 5)

    def vg(fn):  # one program per function; the activation is data
        return jax.jit(lambda p, xs, y, a: jax.value_and_grad(fn, (0, 1))(
            p, xs, y, h0=h0, activation=a, task=task, mode=mode, mask=mask))
    fast, plain = vg(_model.loss), vg(_model._loss_autodiff)
    for k in range(len(ACTIVATIONS)):
        args = (p, xs, ys[task, mode], jnp.int32(k))
        (v1, g1), (v2, g2) = fast(*args), plain(*args)
        np.testing.assert_allclose(v1, v2, **FAST_VS_AUTODIFF)
        for a, b in zip(jax.tree.leaves(g1), jax.tree.leaves(g2)):
            np.testing.assert_allclose(a, b, **FAST_VS_AUTODIFF, err_msg=ACTIVATIONS[k])


@pytest.mark.parametrize("masked", [False, True])
def test_fast_bptt_equals_autodiff_for_states(masked):
    # Any cotangent on the states, also into h0: full (many-to-many) and last step only.
    p, xs, _, mask = data(2)
    h0 = jnp.full((3, 5), 0.2)
    cot = np.random.default_rng(0).normal(size=(2, 3, 6, 5))
    cot[1, :, :-1] = 0.0  # many-to-one: only the last step carries a gradient

    def vjp(fn):
        def f(p, h0, xs, c, a):
            hs = fn(p, xs, activation=a, h0=h0, mask=mask if masked else None)
            return jnp.sum(c * hs)
        return jax.jit(jax.grad(f, argnums=(0, 1, 2)))
    fast, plain = vjp(rnnkit.hidden_states), vjp(_model._hidden_states_autodiff)
    for c, k in itertools.product(cot, range(len(ACTIVATIONS))):
        g1, g2 = fast(p, h0, xs, c, jnp.int32(k)), plain(p, h0, xs, c, jnp.int32(k))
        for a, b in zip(jax.tree.leaves(g1), jax.tree.leaves(g2)):
            np.testing.assert_allclose(a, b, **FAST_VS_AUTODIFF, err_msg=ACTIVATIONS[k])


@pytest.mark.parametrize("masked", [False, True])
def test_many_to_one_shortcuts_equal_the_general_path(masked, monkeypatch):
    # The epoch's shortcuts change only the order of sums: the last-state VJP (no (T, B, H)
    # cotangent), x_t U as I fused multiplies, db as a product. Each against its general
    # path (the full-states VJP, the matrix product, the reduction), and against autodiff.
    from rnnkit.recurrent import _scan

    p, xs, ys, mask = data(3, I=3)
    args = (p, xs, ys["regression", "many-to-one"])

    def value_and_grad(fn):  # a fresh program: the switches are read while tracing
        return jax.jit(lambda p, xs, y, a: jax.value_and_grad(fn)(
            p, xs, y, activation=a, mode="many-to-one", mask=mask if masked else None))
    for k in range(len(ACTIVATIONS)):
        short = value_and_grad(_model.loss)(*args, jnp.int32(k))
        plain = value_and_grad(_model._loss_autodiff)(*args, jnp.int32(k))
        with monkeypatch.context() as m:
            m.setattr(_scan, "LAST_STATE_MAX", 0)
            m.setattr(_scan, "ELEMENTWISE_INPUTS", 0)
            m.setattr(_scan, "BIAS_BY_PRODUCT", 0)
            general = value_and_grad(_model.loss)(*args, jnp.int32(k))
        for other in (plain, general):
            np.testing.assert_allclose(short[0], other[0], **FAST_VS_AUTODIFF)
            for name in p:
                np.testing.assert_allclose(short[1][name], other[1][name], **FAST_VS_AUTODIFF,
                                           err_msg=f"{ACTIVATIONS[k]} {name}")


def test_input_product_equals_the_matrix_product():
    rng = np.random.default_rng(4)
    from rnnkit.recurrent import _scan
    for n_in, n_hid in ((1, 8), (3, 32), (4, 64), (5, 16), (3, 65)):
        x = jnp.asarray(rng.normal(size=(6, n_in)))
        U = jnp.asarray(rng.normal(size=(n_in, n_hid)))
        np.testing.assert_allclose(_scan.input_product(x, U), np.asarray(x) @ np.asarray(U), **EXACT64)


@pytest.mark.parametrize("cell,task,mode", [(c, t, m) for c in ("elman", "gru", "lstm")
                                            for t, m in itertools.product(TASKS, MODES)])
def test_loss_counted_equals_loss_when_only_filler_rows_are_masked(cell, task, mode):
    # The trainer's mask-free program: rows either all real or all filler (the last
    # minibatch's zero-weight entries, inputs zero). Holding the fillers' state or not
    # changes no counted term, so value and gradient agree to rounding.
    p, xs, ys, _ = data(5, B=5, cell=cell)
    rows = np.array([True, True, False, True, False])
    mask = np.repeat(rows[:, None], xs.shape[1], axis=1)  # (B, T)
    xs = np.where(mask[:, :, None], xs, 0.0)

    def value_and_grad(fn):
        return jax.jit(lambda p: jax.value_and_grad(fn)(p, xs, ys[task, mode], activation="tanh",
                                                        task=task, mode=mode, mask=mask, cell=cell))
    v1, g1 = value_and_grad(_model.loss_counted)(p)
    v2, g2 = value_and_grad(_model.loss)(p)
    np.testing.assert_allclose(v1, v2, **EXACT64)
    for name in p:
        np.testing.assert_allclose(g1[name], g2[name], **EXACT64, err_msg=name)
    # and the fillers do not count: the loss of the real rows alone
    alone = _model.loss(p, xs[rows], ys[task, mode][rows], activation="tanh", task=task, mode=mode,
                        cell=cell)
    np.testing.assert_allclose(v1, alone, **EXACT64)


def test_float32_by_default_float64_on_request():
    p32, xs32, ys32, _ = data(3, dtype=np.float32)
    vg = jax.jit(jax.value_and_grad(rnnkit.loss))
    v, g = vg(p32, xs32, ys32["regression", "many-to-many"])
    assert v.dtype == jnp.float32 and all(x.dtype == jnp.float32 for x in g.values())
    assert rnnkit.hidden_states(p32, xs32).dtype == jnp.float32
    p64 = {k: v.astype(jnp.float64) for k, v in p32.items()}
    v64, g64 = vg(p64, xs32.astype(np.float64), ys32["regression", "many-to-many"])
    assert v64.dtype == jnp.float64
    np.testing.assert_allclose(v, v64, **EXACT32)
    for k in g:
        np.testing.assert_allclose(g[k], g64[k], **EXACT32)


def test_predict_classes_is_argmax_of_outputs():
    p, xs, _, mask = data(4)
    o = np.asarray(rnnkit.outputs(p, xs, activation="relu", mask=mask))
    np.testing.assert_array_equal(
        rnnkit.predict_classes(p, xs, activation="relu", mode="many-to-many", mask=mask), o.argmax(-1))
    np.testing.assert_array_equal(
        rnnkit.predict_classes(p, xs[0], activation="relu", mode="many-to-one"),
        np.asarray(rnnkit.outputs(p, xs[0], activation="relu"))[-1].argmax())


# ---------------------------------------------------------------- compiles

def test_second_jitted_call_does_not_recompile():
    # A jitted step must not recompile on its second call (habit taken from optax's tests).
    p, xs, ys, _ = data(5)
    traces = []

    def step(p, xs, ys):
        traces.append(1)
        return jax.value_and_grad(rnnkit.loss)(p, xs, ys, activation="tanh",
                                               task="classification", mode="many-to-one")
    step = jax.jit(step)
    y = ys["classification", "many-to-one"]
    step(p, xs, y)
    step(jax.tree.map(lambda a: a + 1.0, p), xs + 1.0, (y + 1) % 3)
    assert len(traces) == 1
    vg = jax.jit(jax.value_and_grad(rnnkit.loss), static_argnames=("activation", "task", "mode"))
    for act in ("tanh", "tanh", "relu"):
        v, _ = vg(p, xs, y, activation=act, task="classification", mode="many-to-one")
        assert np.isfinite(v)
    assert vg._cache_size() == 2


def test_one_program_serves_every_activation():
    p, xs, ys, mask = data(6)
    traces = []

    def step(p, xs, ys, mask, act):
        traces.append(1)
        return jax.value_and_grad(rnnkit.loss)(p, xs, ys, activation=act, mask=mask,
                                               mode="many-to-many")
    step = jax.jit(step)
    by_name = jax.jit(lambda p, xs, y, m, a: jax.value_and_grad(rnnkit.loss)(
        p, xs, y, activation=a, mask=m, mode="many-to-many"), static_argnums=4)
    y = ys["regression", "many-to-many"]
    for k, name in enumerate(ACTIVATIONS):
        v, g = step(p, xs, y, mask, jnp.int32(k))
        v_ref, g_ref = by_name(p, xs, y, mask, name)
        np.testing.assert_allclose(v, v_ref, **EXACT64)
        for a in g:
            np.testing.assert_allclose(g[a], g_ref[a], **EXACT64)
    assert len(traces) == 1


# ---------------------------------------------------------------- bad input

P, XS, YS, MASK = data(7, B=2, T=4, I=2, H=3, O=2)


@pytest.mark.parametrize("call,exc,words", [
    (lambda: rnnkit.loss(P, XS[0, 0], YS["regression", "many-to-many"]), ValueError, ["`xs`", "(2,)", "(B, T, I)"]),
    (lambda: rnnkit.loss(P, XS[..., :1], YS["regression", "many-to-many"]), ValueError, ["`xs`", "(2, 4, 1)", "I = 2"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-one"]), ValueError, ["`ys`", "(2, 2)", "(2, 4, 2)"]),
    (lambda: rnnkit.loss(P, XS, YS["classification", "many-to-many"], task="classification",
                         mode="many-to-one"), ValueError, ["`ys`", "(2, 4)", "(2,)"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-many"], task="classification"),
     ValueError, ["`ys`", "(2, 4, 2)", "(2, 4)"]),
    (lambda: rnnkit.loss(P, XS, np.full((2, 4), 2), task="classification"), ValueError, ["`ys`", "[2]", "0..1"]),
    (lambda: rnnkit.loss(P, XS, np.full((2, 4), 0.0), task="classification"), TypeError, ["`ys`", "float64", "integer"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-many"], activation="gelu"), ValueError, ["`activation`", "'gelu'", "'tanh'"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-many"], activation=7), ValueError, ["`activation`", "7", "0..3"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-many"], activation=1.5), TypeError, ["`activation`", "1.5"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-many"], task="ranking"), ValueError, ["`task`", "'ranking'", "'regression'"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-many"], mode="seq2seq"), ValueError, ["`mode`", "'seq2seq'", "'many-to-one'"]),
    (lambda: rnnkit.loss(P, XS, YS["regression", "many-to-many"], mask=MASK[:, :3]), ValueError, ["`mask`", "(2, 3)", "(2, 4)"]),
    (lambda: rnnkit.outputs(P, XS, h0=np.zeros(4)), ValueError, ["`h0`", "(4,)", "(3,)"]),
    (lambda: rnnkit.outputs({**P, "V": P["V"][:2]}, XS), ValueError, ["`params['V']`", "(2, 3)", "(3, 3)"]),
    (lambda: rnnkit.outputs({k: P[k] for k in "UVbW"}, XS), ValueError, ["`params`", "'c'"]),
    (lambda: rnnkit.predict_classes(P, XS, activation="tanh", mode="last"), ValueError, ["`mode`", "'last'"]),
])
def test_errors_name_the_argument(call, exc, words):
    with pytest.raises(exc) as info:
        call()
    for w in words:
        assert w in str(info.value), (w, str(info.value))


def test_labels_are_not_checked_under_tracing():
    # Under jit the labels are abstract; the check must not force them to values.
    f = jax.jit(lambda y: rnnkit.loss(P, XS, y, task="classification", mode="many-to-one"))
    assert np.isfinite(f(np.array([0, 1])))
