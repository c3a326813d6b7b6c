"""Diagnostics: gradient through time, spectrum of V, saturation, hidden states, loss surfaces."""
import jax
import numpy as np
import pandas as pd
import pytest

import rnnkit
from rnnkit import Config, fit, prepare
from rnnkit.inspection._diagnose import diagnose, gradient_through_time, perturbed_states, spectrum
from rnnkit.inspection._surface import filter_normalised, random_direction
from test_fit import SINE, noisy_sine
from tolerances import EXACT32, EXACT64, TORCH64


@pytest.fixture(scope="module")
def sine():
    return noisy_sine()


@pytest.fixture(scope="module")
def trained(sine):
    return fit(sine, Config(**SINE, epochs=8, patience=None), progress=False)


def _scaled_fit(sine, scale):
    # Linear states and V = scale * (orthogonal matrix): one epoch with a tiny learning
    # rate keeps V close to its initial value, so the factor per step is known.
    return fit(sine, Config(**{**SINE, "lr": 1e-4}, activation="linear", init="orthogonal",
                            recurrent_scale=scale, epochs=1, patience=None), progress=False)


def test_gradient_through_time_vanishes_and_explodes(sine):
    # Pascanu, Mikolov & Bengio (2013), sec. 2.1: dL/dh_k = dL/dh_{k+1} diag(phi') V^T, so with
    # linear states the norm shrinks back in time when ||V|| < 1 and grows when it is > 1.
    small = _scaled_fit(sine, 0.5).diagnostics
    large = _scaled_fit(sine, 1.5).diagnostics
    T = SINE["window"]
    for d in (small, large):
        g = d.gradient_through_time
        assert g.shape == (T,) and np.all(np.isfinite(g)) and np.all(g > 0)
        # and each step's factor lies between the smallest and largest singular value of V
        ratio = g[:-1] / g[1:]
        s = d.singular_values
        assert np.all(ratio >= s[-1] * (1 - 1e-3)) and np.all(ratio <= s[0] * (1 + 1e-3))
    assert np.all(np.diff(small.gradient_through_time) > 0)  # fades going back in time
    assert np.all(np.diff(large.gradient_through_time) < 0)  # grows going back in time
    # 0.5**19 ~ 2e-6 and 1.5**19 ~ 2e3 over the 19 steps back
    assert small.gradient_ratio < 1e-4 and large.gradient_ratio > 1e2
    assert small.spectral_radius < 0.6 < 1.4 < large.spectral_radius


@pytest.mark.parametrize("activation", ["tanh", "sigmoid", "relu"])
def test_gradient_through_time_matches_torch(activation):
    # Reference library: PyTorch autograd on an unrolled Elman recurrence, each h_k kept
    # with retain_grad(); float64.
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(3)
    B, T, I, H, O = 4, 7, 2, 5, 2
    p = {"U": rng.normal(size=(I, H)), "V": 0.6 * rng.normal(size=(H, H)), "b": rng.normal(size=H) * 0.1,
         "W": rng.normal(size=(H, O)), "c": rng.normal(size=O)}
    xs, ys = rng.normal(size=(B, T, I)), rng.normal(size=(B, O))
    ours = gradient_through_time({k: jax.numpy.asarray(v) for k, v in p.items()}, xs, ys, None,
                                 activation=activation, task="regression", mode="many-to-one")
    phi = {"tanh": torch.tanh, "sigmoid": torch.sigmoid, "relu": torch.relu}[activation]
    tp = {k: torch.tensor(v, requires_grad=True) for k, v in p.items()}
    x, y = torch.tensor(xs), torch.tensor(ys)
    h, hs = torch.zeros(B, H, dtype=torch.float64), []
    for t in range(T):
        h = phi(x[:, t] @ tp["U"] + h @ tp["V"] + tp["b"])
        h.retain_grad()
        hs.append(h)
    out = h @ tp["W"] + tp["c"]
    ((out - y) ** 2).mean(dim=1).sum().backward()  # each window's own loss, summed
    theirs = np.array([hk.grad.norm(dim=1).mean().item() for hk in hs])
    np.testing.assert_allclose(ours, theirs, **TORCH64)


def test_many_to_many_classification_gradient_matches_torch():
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(4)
    B, T, I, H, K = 3, 6, 2, 4, 3
    p = {"U": rng.normal(size=(I, H)), "V": 0.5 * rng.normal(size=(H, H)), "b": np.zeros(H),
         "W": rng.normal(size=(H, K)), "c": np.zeros(K)}
    xs, ys = rng.normal(size=(B, T, I)), rng.integers(0, K, size=(B, T))
    ours = gradient_through_time({k: jax.numpy.asarray(v) for k, v in p.items()}, xs, ys, None,
                                 activation="tanh", task="classification", mode="many-to-many")
    tp = {k: torch.tensor(v, requires_grad=True) for k, v in p.items()}
    h, hs, losses = torch.zeros(B, H, dtype=torch.float64), [], []
    for t in range(T):
        h = torch.tanh(torch.tensor(xs[:, t]) @ tp["U"] + h @ tp["V"] + tp["b"])
        h.retain_grad()
        hs.append(h)
        logits = h @ tp["W"] + tp["c"]
        losses.append(torch.nn.functional.cross_entropy(logits, torch.tensor(ys[:, t]), reduction="none"))
    torch.stack(losses, dim=1).mean(dim=1).sum().backward()
    theirs = np.array([hk.grad.norm(dim=1).mean().item() for hk in hs])
    np.testing.assert_allclose(ours, theirs, **TORCH64)


def test_perturbed_states_at_zero_are_the_model_states():
    rng = np.random.default_rng(5)
    p = {k: jax.numpy.asarray(v) for k, v in
         {"U": rng.normal(size=(2, 3)), "V": rng.normal(size=(3, 3)) * 0.5, "b": rng.normal(size=3),
          "W": rng.normal(size=(3, 1)), "c": np.zeros(1)}.items()}
    xs = rng.normal(size=(2, 5, 2))
    mask = np.array([[True] * 5, [True, True, True, False, False]])  # end padding holds the state
    ours = perturbed_states(p, xs, mask, np.zeros((2, 5, 3)), "tanh")
    np.testing.assert_allclose(ours, rnnkit.hidden_states(p, xs, activation="tanh", mask=mask), **EXACT64)


def test_spectrum_against_numpy(trained):
    # A triangular matrix has its diagonal as eigenvalues (textbook linear algebra), while a
    # large off-diagonal entry makes its largest singular value large: radius 0.5, sigma > 10.
    sv, eig, radius = spectrum(np.array([[0.5, 10.0], [0.0, 0.3]]))
    assert radius == pytest.approx(0.5, rel=1e-12) and sv[0] > 10
    d = trained.diagnostics
    V = np.asarray(trained.params["V"], np.float64)
    # Reference library: NumPy (eigvals, svd).
    assert d.spectral_radius == pytest.approx(np.max(np.abs(np.linalg.eigvals(V))), rel=1e-12)
    np.testing.assert_allclose(d.singular_values, np.linalg.svd(V, compute_uv=False), **EXACT64)


@pytest.mark.parametrize("activation, expected", [("tanh", [1.0, 0.0, 1.0]),
                                                  ("sigmoid", [1.0, 0.0, 1.0]),
                                                  ("relu", [0.5, 0.5, 0.5]),
                                                  ("linear", [0.0, 0.0, 0.0])])
def test_saturation_hand_set(activation, expected):
    # Inputs alternate +1/-1 exactly after standard scaling; V = 0, so h_t = phi(x_t U) with
    # U = (10, 0.1, -10): tanh(+-10) and sigmoid(+-10) are saturated, tanh(+-0.1) is not; relu
    # is exactly 0 at every second step in each unit; linear never saturates. Hand-worked.
    df = pd.DataFrame({"y": np.tile([1.0, -1.0], 60)})
    prepared = prepare(df, Config(window=4, hidden=3, activation=activation, season=None))
    params = {"U": np.array([[10.0, 0.1, -10.0]]), "V": np.zeros((3, 3)), "b": np.zeros(3),
              "W": np.zeros((3, 1)), "c": np.zeros(1)}
    params = {k: v.astype(np.float32) for k, v in params.items()}
    d = diagnose(params, prepared)
    np.testing.assert_allclose(d.saturation, expected, atol=1e-12)
    assert d.split == "val" and d.val_states.shape == (len(prepared.starts["val"]), 3)


def test_states_and_times(trained):
    d = trained.diagnostics
    p = trained.prepared
    x, _, _ = p.windows("val")
    T, H = SINE["window"], SINE["hidden"]
    assert d.window_state.shape == (T, H) and d.val_states.shape == (len(x), H)
    np.testing.assert_array_equal(d.val_times, p.target_times("val"))
    states = rnnkit.hidden_states(trained.params, x, activation="tanh")  # (N, T, H)
    np.testing.assert_allclose(d.window_state, states[0], **EXACT32)
    np.testing.assert_allclose(d.window_states(7), states[7], **EXACT32)
    np.testing.assert_allclose(d.val_states, states[:, -1], **EXACT32)
    assert d.window_states(0, "test").shape == (T, H)
    with pytest.raises(ValueError, match="out of range"):
        d.window_states(len(x))
    s = d.summary()
    assert s["spectral_radius"] == d.spectral_radius and 0 <= s["mean_saturation"] <= 1


def test_loss_surface_centre_is_trained_validation_loss(trained):
    a, b, v = rnnkit.loss_surface(trained, steps=7, span=0.5)
    assert a.shape == b.shape == (7,) and v.shape == (7, 7) and a[3] == 0.0 == b[3]
    best = trained.history.val_loss.iloc[trained.best_epoch - 1]
    np.testing.assert_allclose(v[3, 3], best, **EXACT32)
    assert np.isfinite(v).all() and v.min() >= 0
    # The trained point is (near) a minimum along random directions; with span 0.5 the
    # corners are no better (Li et al. 2018 show such bowls around trained weights).
    assert v[3, 3] <= min(v[0, 0], v[0, -1], v[-1, 0], v[-1, -1])
    alphas, values = rnnkit.loss_slice(trained, param="V", steps=9, span=0.5)
    np.testing.assert_allclose(values[4], best, **EXACT32)
    with pytest.raises(ValueError, match="`param`"):
        rnnkit.loss_slice(trained, param="b")


def test_filter_normalisation_gives_weight_norms_per_unit():
    # Li et al. (2018), sec. 4: each filter (here: each unit's column of incoming weights) of the
    # direction is rescaled to the norm of the same filter of the weights; biases get 0.
    rng = np.random.default_rng(6)
    params = {"U": rng.normal(size=(3, 5)), "V": rng.normal(size=(5, 5)), "b": rng.normal(size=5),
              "W": rng.normal(size=(5, 2)), "c": rng.normal(size=2)}
    d = random_direction(jax.random.key(0), {k: jax.numpy.asarray(v) for k, v in params.items()})
    for k in ("U", "V", "W"):
        np.testing.assert_allclose(np.linalg.norm(d[k], axis=0), np.linalg.norm(params[k], axis=0), **EXACT64)
        assert not np.allclose(d[k], params[k])  # a different direction, same scale per unit
    assert np.all(np.asarray(d["b"]) == 0) and np.all(np.asarray(d["c"]) == 0)
    # and directly: a direction of ones, rescaled column by column
    ones = {k: np.ones_like(v) for k, v in params.items()}
    out = filter_normalised(ones, params)
    col = np.linalg.norm(params["V"], axis=0) / np.sqrt(5)
    np.testing.assert_allclose(out["V"], np.broadcast_to(col, (5, 5)), **EXACT64)


def test_loaded_result_without_data(tmp_path, trained):
    trained.save(tmp_path / "m")
    loaded = rnnkit.load_fit(tmp_path / "m")
    d = loaded.diagnostics
    np.testing.assert_array_equal(d.window_states(0), trained.diagnostics.window_state)
    with pytest.raises(ValueError, match="load_fit"):
        d.window_states(1)
    with pytest.raises(ValueError, match="load_fit"):
        rnnkit.loss_surface(loaded)
    attached = rnnkit.load_fit(tmp_path / "m", df=noisy_sine())
    a, b, v = rnnkit.loss_surface(attached, steps=3, span=0.1)
    np.testing.assert_allclose(v[1, 1], trained.history.val_loss.iloc[trained.best_epoch - 1], **EXACT32)


@pytest.mark.parametrize("task, mode, masked, act", [
    ("regression", "many-to-one", False, "tanh"),
    ("regression", "many-to-many", True, "relu"),
    ("classification", "many-to-one", True, "sigmoid"),
    ("classification", "many-to-many", False, "linear"),
])
def test_grid_in_one_program_equals_the_loss_point_by_point(task, mode, masked, act):
    # The batched grid (carry-only forward per point, blocks of points vmapped) against the
    # model's own loss called once per point, as the loop before it did; float64.
    from rnnkit.inspection._surface import _grid_losses
    rng = np.random.default_rng(11)
    B, T, I, H, O = 6, 5, 2, 4, 3
    p = {"U": rng.normal(size=(I, H)), "V": 0.5 * rng.normal(size=(H, H)), "b": rng.normal(size=H),
         "W": rng.normal(size=(H, O)), "c": rng.normal(size=O)}
    d1 = {k: rng.normal(size=v.shape) for k, v in p.items()}
    d2 = {k: rng.normal(size=v.shape) for k, v in p.items()}
    x = rng.normal(size=(B, T, I))
    lead = (B,) if mode == "many-to-one" else (B, T)
    y = rng.integers(0, O, size=lead) if task == "classification" else rng.normal(size=lead + (O,))
    mask = None
    if masked:  # front padding, end padding and one all-padding row
        mask = np.ones((B, T), bool)
        mask[0, :2] = False
        mask[1, 3:] = False
        mask[2] = False
        if task == "classification":
            y[2] = -1  # a padded target that is not a class: never gathered as one
    points = np.array([[0.0, 0.0], [0.5, -0.25], [-1.0, 1.0], [0.1, 0.9], [2.0, 0.0], [0.0, -0.7],
                       [-0.3, -0.3]])
    got = _grid_losses(p, d1, d2, points, x, y, mask, act=act, task=task, mode=mode, batch=3)
    want = [rnnkit.loss({k: p[k] + a * d1[k] + b * d2[k] for k in p}, x, y, activation=act,
                        task=task, mode=mode, mask=mask) for a, b in points]
    np.testing.assert_allclose(np.asarray(got), np.asarray(want), **EXACT64)


def test_surface_points_equal_the_loss_at_moved_weights(trained):
    from rnnkit.inspection._surface import _directions
    a, b, v = rnnkit.loss_surface(trained, steps=5, span=0.8, seed=3)
    params, (d1, d2) = _directions(trained, 3, 2)
    x, y, mask = trained.prepared.windows("val")
    for i, j in [(0, 0), (1, 3), (4, 2), (2, 4)]:
        moved = {k: np.asarray(params[k]) + a[j] * d1[k] + b[i] * d2[k] for k in params}
        want = rnnkit.loss(moved, x.astype(np.float32), y.astype(np.float32), activation="tanh",
                           mode=trained.config.mode)
        np.testing.assert_allclose(v[i, j], want, **EXACT32)
    alphas, values = rnnkit.loss_slice(trained, param="U", steps=5, span=0.8, seed=3)
    _, (d,) = _directions(trained, 3, 1)
    moved = {k: np.asarray(params[k]) + (alphas[1] * d[k] if k == "U" else 0.0) for k in params}
    np.testing.assert_allclose(values[1], rnnkit.loss(moved, x.astype(np.float32), y.astype(np.float32),
                                                      activation="tanh", mode=trained.config.mode),
                               **EXACT32)
