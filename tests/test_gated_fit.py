"""Gated cells in the whole path: fit, evaluate, diagnose (gradient through time, spectra, gate
activity), save and load; on open data shipped with statsmodels."""
import jax
import numpy as np
import pytest
import statsmodels.api as sm

import rnnkit
from rnnkit import Config, fit, load_fit, reference
from rnnkit.inspection._diagnose import SATURATION, gradient_through_time
from tolerances import EXACT32, TORCH64

CELLS = ("gru", "lstm")


@pytest.fixture(scope="module")
def nile():
    # Annual flow of the Nile at Aswan 1871-1970, the open data set shipped with statsmodels.
    return sm.datasets.nile.load_pandas().data[["volume"]]


@pytest.fixture(scope="module", params=CELLS)
def result(request, nile):
    cfg = Config(target="volume", window=8, hidden=5, epochs=4, batch_size=16, season=None,
                 cell=request.param)
    return fit(nile, cfg, progress=False)


def test_fit_trains_scores_and_evaluates(result, nile):
    cell = result.config.cell
    assert result.status == "ok" and len(result.history) == 4
    assert np.isfinite(result.history["train_loss"]).all()
    assert set(result.params) == set(rnnkit.init_params(jax.random.key(0), 1, 5, 1, cell=cell))
    assert np.isfinite(result.metrics.loc["rnn", "test_rmse"])
    # the fitted network's predictions are rnnkit.outputs of the same cell on the same windows
    p = result.prepared
    x, _, _ = p.windows("val")
    scaled = rnnkit.outputs(result.params, x, cell=cell)[:, -1]
    pred = result.predict()
    val = pred[pred["split"] == "val"]["predicted"].to_numpy()
    np.testing.assert_allclose(val, p.scaler.inverse_targets(np.asarray(scaled))[:, 0], **EXACT32)


def test_gate_activity_against_the_numpy_reference(result):
    # The shares of gate values near 0 and near 1 and the LSTM forget gate along the window,
    # recomputed from the gates of the NumPy reference forward pass (float64).
    d = result.diagnostics
    cell = result.config.cell
    x, _, mask = result.prepared.windows(d.split)
    mask = np.ones(x.shape[:2], bool) if mask is None else mask
    p64 = {k: np.asarray(v, np.float64) for k, v in result.params.items()}
    run = reference._RUN[cell]
    keep, hs, _ = run(p64, np.asarray(x, np.float64), mask, np.zeros((len(x), 5)), "tanh")
    gates = {"gru": {"reset": "r", "update": "z"}, "lstm": {"input": "i", "forget": "f", "output": "o"}}[cell]
    assert d.gate_names == tuple(gates)
    for k, name in enumerate(d.gate_names):
        g = keep[gates[name]][mask]  # (real steps, H)
        assert d.gate_near_zero[k] == pytest.approx(np.mean(g < 1 - SATURATION), abs=1e-6)
        assert d.gate_near_one[k] == pytest.approx(np.mean(g > SATURATION), abs=1e-6)
        assert d.gate_mean[k] == pytest.approx(np.mean(g), rel=1e-5)
    if cell == "lstm":
        np.testing.assert_allclose(d.forget_along_window, keep["f"].mean(axis=(0, 2)), rtol=1e-5)
        assert "mean_forget_gate" in d.summary()
    else:
        assert len(d.forget_along_window) == 0
    # spectra: every (H, H) block of V; the headline numbers are the candidate block's
    V = np.asarray(result.params["V"], np.float64)
    assert list(d.block_singular_values) == (["reset", "update", "candidate"] if cell == "gru"
                                             else ["input", "forget", "candidate", "output"])
    for j, (name, sv) in enumerate(d.block_singular_values.items()):
        np.testing.assert_allclose(sv, np.linalg.svd(V[:, 5 * j:5 * (j + 1)], compute_uv=False), rtol=1e-10)
    np.testing.assert_allclose(d.singular_values, d.block_singular_values["candidate"], rtol=1e-12)
    assert not d.gradient_bound_applies and "no sigma_max bound" in d.gradient_bound_note
    assert d.gradient_through_time.shape == (8,) and np.isfinite(d.gradient_through_time).all()
    assert "gate_activity" in result.figures()


def test_save_and_load_keep_the_cell(result, nile, tmp_path):
    result.save(tmp_path / "fit")
    back = load_fit(tmp_path / "fit")
    assert back.config.cell == result.config.cell
    assert set(back.params) == set(result.params)
    for k in result.params:
        np.testing.assert_array_equal(back.params[k], result.params[k])
    np.testing.assert_array_equal(back.predict(nile)["predicted"], result.predict(nile)["predicted"])
    d, e = back.diagnostics, result.diagnostics
    assert d.cell == e.cell and d.gate_names == e.gate_names
    np.testing.assert_array_equal(d.gate_near_one, e.gate_near_one)
    np.testing.assert_array_equal(d.forget_along_window, e.forget_along_window)
    assert list(d.block_singular_values) == list(e.block_singular_values)


@pytest.mark.parametrize("cell,task,mode", [("gru", "regression", "many-to-one"),
                                            ("lstm", "classification", "many-to-many")])
def test_gradient_through_time_equals_torch(cell, task, mode):
    # Reference library: PyTorch's GRUCell / LSTMCell stepped by hand, float64, with
    # retain_grad on every h_k: the gradient of the summed per-window losses at each state.
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(8)
    B, T, I, H, O = 3, 5, 2, 4, 3
    p = rnnkit.init_params(jax.random.key(3), I, H, O, cell=cell, dtype=np.float64)
    p = {k: np.asarray(v) + 0.2 * rng.normal(size=v.shape) for k, v in p.items()}
    xs = rng.normal(size=(B, T, I))
    ys = rng.normal(size=(B, O)) if task == "regression" else rng.integers(0, O, size=(B, T))
    with jax.enable_x64(True):
        ours = gradient_through_time({k: jax.numpy.asarray(v) for k, v in p.items()}, xs, ys, None,
                                     activation="tanh", task=task, mode=mode, cell=cell)
    step = (torch.nn.GRUCell if cell == "gru" else torch.nn.LSTMCell)(I, H, dtype=torch.float64)
    b_hh = np.zeros(p["b"].shape)
    if cell == "gru":
        b_hh[2 * H:] = p["bn"]
    with torch.no_grad():
        step.weight_ih.copy_(torch.from_numpy(p["U"].T))
        step.weight_hh.copy_(torch.from_numpy(p["V"].T))
        step.bias_ih.copy_(torch.from_numpy(p["b"]))
        step.bias_hh.copy_(torch.from_numpy(b_hh))
    W, c = torch.from_numpy(p["W"]), torch.from_numpy(p["c"])
    h = torch.zeros(B, H, dtype=torch.float64)
    s = torch.zeros(B, H, dtype=torch.float64)
    hs, losses = [], []
    for t in range(T):
        x = torch.from_numpy(xs[:, t])
        if cell == "gru":
            h = step(x, h)
        else:
            h, s = step(x, (h, s))
        h.retain_grad()
        hs.append(h)
        if task == "classification":
            losses.append(torch.nn.functional.cross_entropy(h @ W + c, torch.from_numpy(ys[:, t]),
                                                            reduction="none"))
    if task == "regression":
        total = (((h @ W + c) - torch.from_numpy(ys)) ** 2).mean(dim=1).sum()
    else:
        total = torch.stack(losses, dim=1).mean(dim=1).sum()
    total.backward()
    theirs = np.array([hk.grad.norm(dim=1).mean().item() for hk in hs])
    np.testing.assert_allclose(ours, theirs, **TORCH64)
