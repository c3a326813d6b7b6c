"""Gradient flow through time: the vanishing bound, exploding growth, init spectra."""
import jax
import jax.numpy as jnp
import numpy as np
import pytest

import rnnkit
from rnnkit.data._config import ACTIVATIONS

T, I, H = 16, 2, 8


@jax.jit
def _state_jacobians(p, xs, h0s, masks, act):
    """dh_{T-1}/dh_k for every k as (T-1, H, H), with ONE compiled program.

    Row k starts from h0 = h_k and masks steps 0..k, so the state is held at h_k and
    steps k+1..T-1 run on the same inputs as in the full sequence (the mask contract).
    """
    def last_state(h0, mask):
        return rnnkit.hidden_states(p, xs, activation=act, h0=h0, mask=mask)[-1]  # (H,)
    return jax.vmap(jax.jacrev(last_state), in_axes=(0, 0))(h0s, masks)


def jacobian_norms(p, xs, act=0):
    """Spectral norms ||dh_{T-1}/dh_k||_2 against the distance n = T-1-k."""
    hs = rnnkit.hidden_states(p, xs, activation=act)  # (T, H)
    ks = np.arange(T - 1)
    masks = np.arange(T)[None, :] > ks[:, None]  # row k: steps 0..k padded
    jac = _state_jacobians(p, xs, hs[:-1], masks, jnp.int32(act))  # (T-1, H, H)
    return T - 1 - ks, np.linalg.norm(np.asarray(jac), ord=2, axis=(1, 2))


def _params(scale, scheme="orthogonal"):
    return rnnkit.init_params(jax.random.key(3), I, H, 1, scheme=scheme, recurrent_scale=scale,
                              dtype=jnp.float64)


def test_jacobian_trick_equals_direct_jacobian():
    # The held-state construction must give the Jacobian of the shorter run itself.
    p = _params(1.0)
    xs = np.random.default_rng(0).normal(size=(T, I))
    n, norms = jacobian_norms(p, xs)
    hs = rnnkit.hidden_states(p, xs)
    k = 5
    direct = jax.jit(jax.jacrev(lambda h: rnnkit.hidden_states(p, xs[k + 1:], h0=h)[-1]))(hs[k])
    assert norms[k] == pytest.approx(np.linalg.norm(direct, ord=2), rel=1e-12)


def test_tanh_gradients_vanish_at_the_spectral_bound():
    # Pascanu, Mikolov & Bengio (2013), sec. 3.2: with |tanh'| <= 1,
    # ||dh_T/dh_k|| <= prod ||diag(tanh'(a)) V^T|| <= sigma_max(V)^(T-k).
    p = _params(0.9)
    sigma = np.linalg.svd(np.asarray(p["V"]), compute_uv=False).max()
    assert sigma == pytest.approx(0.9, rel=1e-12)
    xs = np.random.default_rng(1).normal(size=(T, I))
    n, norms = jacobian_norms(p, xs, act=0)
    assert np.all(norms <= sigma ** n * (1 + 1e-12))
    assert norms[0] < 0.9 ** 15  # 15 steps back: below 0.21 of the signal survives


def test_large_recurrent_scale_makes_gradients_grow():
    # Pascanu, Mikolov & Bengio (2013), sec. 3.1: in the linear case the norm of
    # (V^T)^n follows the largest singular value; for an orthogonal V scaled by s,
    # every singular value is s, so ||dh_T/dh_k|| = s^(T-k) exactly.
    p = _params(1.3)
    xs = np.random.default_rng(2).normal(size=(T, I))
    n, norms = jacobian_norms(p, xs, act=ACTIVATIONS.index("linear"))
    np.testing.assert_allclose(norms, 1.3 ** n, rtol=1e-10)
    # tanh near the origin (tiny inputs, so tanh' ~ 1) behaves like the linear case ...
    _, near = jacobian_norms(p, 1e-4 * xs, act=0)
    np.testing.assert_allclose(near, 1.3 ** n, rtol=1e-3)
    # ... and a large scale explodes where a scale below 1 vanishes, on the same inputs
    _, large = jacobian_norms(_params(3.0), 1e-4 * xs, act=0)
    _, shrunk = jacobian_norms(_params(0.9), 1e-4 * xs, act=0)
    assert large[0] > 1e3 and shrunk[0] < 0.9 ** 15 * (1 + 1e-12)


def test_orthogonal_init_has_unit_singular_values():
    # Saxe, McClelland & Ganguli (2014): an orthogonal recurrent matrix has every
    # singular value equal to 1, so it neither shrinks nor stretches any direction.
    V = np.asarray(rnnkit.init_params(jax.random.key(4), 3, 32, 1, scheme="orthogonal",
                                      dtype=jnp.float64)["V"])
    np.testing.assert_allclose(np.linalg.svd(V, compute_uv=False), np.ones(32), atol=1e-12)
    np.testing.assert_allclose(V.T @ V, np.eye(32), atol=1e-12)
    glorot = np.asarray(rnnkit.init_params(jax.random.key(4), 3, 32, 1, scheme="glorot",
                                           dtype=jnp.float64)["V"])
    assert np.ptp(np.linalg.svd(glorot, compute_uv=False)) > 0.5  # Glorot is not orthogonal


def test_identity_init_is_the_identity():
    # Le, Jaitly & Hinton (2015): V = I, so a relu network with zero input copies its state.
    p = rnnkit.init_params(jax.random.key(5), 3, 6, 1, scheme="identity", dtype=jnp.float64)
    np.testing.assert_array_equal(p["V"], np.eye(6))
    h0 = np.abs(np.random.default_rng(0).normal(size=6))
    hs = rnnkit.hidden_states(p, np.zeros((4, 3)), activation="relu", h0=h0)
    np.testing.assert_allclose(hs, np.tile(h0, (4, 1)), rtol=0, atol=0)

