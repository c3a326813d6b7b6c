"""The gated cells (GRU, LSTM) against PyTorch, the NumPy reference and finite differences.

Reference library: PyTorch 2.13.0 (CPU), float64. The torch.nn.GRU docs' formula
(Cho et al. 2014 with the reset gate applied to W_hn h + b_hn):
    r = sigma(W_ir x + b_ir + W_hr h + b_hr),  z = sigma(W_iz x + b_iz + W_hz h + b_hz)
    n = tanh(W_in x + b_in + r * (W_hn h + b_hn)),  h' = (1 - z) * n + z * h
and torch.nn.LSTM (Hochreiter & Schmidhuber 1997, forget gate of Gers et al. 2000),
gates i, f, g, o. Ours: U = W_ih^T, V = W_hh^T, b = b_ih (+ b_hh for r, z and LSTM),
bn = b_hn, output layer torch.nn.Linear(weight W^T, bias c).
"""
import itertools

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import rnnkit
from rnnkit import reference
from tolerances import EXACT64, FAST_VS_AUTODIFF, FINITE_DIFF, TORCH64

torch = pytest.importorskip("torch")

B, T, I, H, O = 3, 6, 2, 4, 3
CELLS = ("gru", "lstm")


def make(seed, cell):
    """Random float64 params of `cell`, the same weights in torch modules, and inputs."""
    rng = np.random.default_rng(seed)
    p = rnnkit.init_params(jax.random.key(seed), I, H, O, scheme="orthogonal", dtype=jnp.float64,
                           cell=cell)
    p = {k: np.asarray(v) + 0.2 * rng.normal(size=v.shape) for k, v in p.items()}
    module = torch.nn.GRU if cell == "gru" else torch.nn.LSTM
    rnn = module(I, H, batch_first=True, dtype=torch.float64)
    lin = torch.nn.Linear(H, O, dtype=torch.float64)
    b_hh = np.zeros(p["b"].shape)
    if cell == "gru":
        b_hh[2 * H:] = p["bn"]
    with torch.no_grad():
        rnn.weight_ih_l0.copy_(torch.from_numpy(p["U"].T))
        rnn.weight_hh_l0.copy_(torch.from_numpy(p["V"].T))
        rnn.bias_ih_l0.copy_(torch.from_numpy(p["b"]))
        rnn.bias_hh_l0.copy_(torch.from_numpy(b_hh))
        lin.weight.copy_(torch.from_numpy(p["W"].T))
        lin.bias.copy_(torch.from_numpy(p["c"]))
    return p, rnn, lin, rng.normal(size=(B, T, I)), rng


def torch_grads(rnn, lin, cell):
    g = {"U": rnn.weight_ih_l0.grad.numpy().T, "V": rnn.weight_hh_l0.grad.numpy().T,
         "b": rnn.bias_ih_l0.grad.numpy(), "W": lin.weight.grad.numpy().T, "c": lin.bias.grad.numpy()}
    if cell == "gru":
        g["bn"] = rnn.bias_hh_l0.grad.numpy()[2 * H:]
    return g


def targets(rng, task, mode, n=B, steps=T):
    if task == "regression":
        return rng.normal(size=(n, steps, O) if mode == "many-to-many" else (n, O))
    return rng.integers(0, O, size=(n, steps) if mode == "many-to-many" else (n,))


def torch_loss(os, ys, task, mode):
    if task == "regression":  # MSELoss averages over steps and output units, as ours
        out = os if mode == "many-to-many" else os[:, -1]
        return torch.nn.MSELoss()(out, torch.from_numpy(ys))
    out = os.reshape(-1, O) if mode == "many-to-many" else os[:, -1]
    return torch.nn.CrossEntropyLoss()(out, torch.from_numpy(ys).reshape(-1))


_vg = jax.jit(jax.value_and_grad(rnnkit.loss), static_argnames=("activation", "task", "mode", "cell"))
_vg_plain = jax.jit(jax.value_and_grad(rnnkit.recurrent._model._loss_autodiff),
                    static_argnames=("activation", "task", "mode", "cell"))


@pytest.mark.parametrize("cell", CELLS)
def test_states_and_outputs_equal_torch(cell):
    p, rnn, lin, xs, rng = make(0, cell)
    hs_t = rnn(torch.from_numpy(xs))[0]
    np.testing.assert_allclose(rnnkit.hidden_states(p, xs, cell=cell), hs_t.detach().numpy(), **TORCH64)
    np.testing.assert_allclose(rnnkit.outputs(p, xs, cell=cell), lin(hs_t).detach().numpy(), **TORCH64)
    # h0 is torch's h_0 (1, B, H); the LSTM's c_0 is zero
    h0 = rng.normal(size=(B, H))
    init = torch.from_numpy(h0[None])
    init = init if cell == "gru" else (init, torch.zeros_like(init))
    hs_t = rnn(torch.from_numpy(xs), init)[0]
    np.testing.assert_allclose(rnnkit.hidden_states(p, xs, h0=h0, cell=cell), hs_t.detach().numpy(),
                               **TORCH64)
    # the NumPy reference computes the same states
    np.testing.assert_allclose(reference.forward(p, xs, h0=h0, cell=cell)[0], hs_t.detach().numpy(),
                               **TORCH64)


@pytest.mark.parametrize("cell,task,mode", list(itertools.product(
    CELLS, ["regression", "classification"], ["many-to-one", "many-to-many"])))
def test_loss_and_every_gradient_equal_torch(cell, task, mode):
    p, rnn, lin, xs, rng = make(1, cell)
    ys = targets(rng, task, mode)
    loss_t = torch_loss(lin(rnn(torch.from_numpy(xs))[0]), ys, task, mode)
    loss_t.backward()
    g_t = torch_grads(rnn, lin, cell)
    for vg in (_vg, _vg_plain):  # the fast path and plain autodiff of the scan
        value, grads = vg(p, xs, ys, task=task, mode=mode, cell=cell)
        np.testing.assert_allclose(value, loss_t.item(), **TORCH64)
        assert set(grads) == set(g_t)
        for k in g_t:
            np.testing.assert_allclose(grads[k], g_t[k], **TORCH64, err_msg=k)
    # the hand-written NumPy BPTT too
    value, grads = reference.bptt(p, xs, ys, task=task, mode=mode, cell=cell)
    np.testing.assert_allclose(value, loss_t.item(), **TORCH64)
    for k in g_t:
        np.testing.assert_allclose(grads[k], g_t[k], **TORCH64, err_msg=k)
    # biases that enter a pre-activation alike get the same gradient in torch
    same = slice(0, 2 * H) if cell == "gru" else slice(None)
    np.testing.assert_allclose(rnn.bias_hh_l0.grad.numpy()[same], g_t["b"][same], **TORCH64)


@pytest.mark.parametrize("cell", CELLS)
def test_end_padding_equals_torch_packed_sequences(cell):
    # torch.nn.utils.rnn.pack_padded_sequence: h_n is each sequence's state at its own last real
    # step, which is our held state at step T-1 when the tail is masked (h and c held).
    p, rnn, lin, xs, rng = make(2, cell)
    lengths = np.array([6, 2, 4])
    mask = np.arange(T)[None, :] < lengths[:, None]  # (B, T)
    xs = np.where(mask[..., None], xs, 99.0)  # the padding values must not matter
    ys = rng.normal(size=(B, O))
    packed = torch.nn.utils.rnn.pack_padded_sequence(torch.from_numpy(xs), torch.from_numpy(lengths),
                                                     batch_first=True, enforce_sorted=False)
    out = rnn(packed)[1]
    hn = out if cell == "gru" else out[0]
    loss_t = torch.nn.MSELoss()(lin(hn[0]), torch.from_numpy(ys))
    loss_t.backward()
    value, grads = _vg(p, xs, ys, task="regression", mode="many-to-one", mask=mask, cell=cell)
    np.testing.assert_allclose(value, loss_t.item(), **TORCH64)
    for k, g in torch_grads(rnn, lin, cell).items():
        np.testing.assert_allclose(grads[k], g, **TORCH64, err_msg=k)


@pytest.mark.parametrize("cell,act,task,mode,masked", [
    ("gru", "tanh", "regression", "many-to-many", True),
    ("gru", "sigmoid", "classification", "many-to-one", True),
    ("gru", "relu", "regression", "many-to-one", False),
    ("lstm", "tanh", "classification", "many-to-many", True),
    ("lstm", "linear", "regression", "many-to-one", True),
    ("lstm", "sigmoid", "regression", "many-to-many", False),
])
def test_gradients_against_reference_and_central_differences(cell, act, task, mode, masked):
    # Central differences of the NumPy loss (common practice, no source) and the hand-written
    # BPTT of rnnkit.reference, through check_gradients; front and end padding when masked.
    p, _, _, xs, rng = make(3, cell)
    mask = None
    if masked:
        mask = np.ones((B, T), bool)
        mask[0, :2] = False  # front padding (bucketed windows)
        mask[1, 4:] = False  # end padding (shorter sequence)
    ys = targets(rng, task, mode)
    table = rnnkit.check_gradients(p, xs, ys, activation=act, task=task, mode=mode, mask=mask, cell=cell)
    assert list(table.index) == list(p)
    assert (table["jax_vs_bptt_rel"] < EXACT64["rtol"]).all(), table
    assert (table["jax_vs_fd_rel"] < FINITE_DIFF["rtol"]).all(), table
    assert (table["grad_norm"] > 0).all()


@pytest.mark.parametrize("cell", CELLS)
def test_a_padded_step_holds_the_whole_state(cell):
    # Masked steps change nothing: the same sequence with padding spliced in anywhere gives the
    # same final state and the same gradient (h and, for LSTM, c held).
    p, _, _, xs, rng = make(4, cell)
    x = xs[:1]  # (1, T, I)
    padded = np.concatenate([np.full((1, 2, I), 5.0), x[:, :3], np.full((1, 1, I), -5.0), x[:, 3:]], axis=1)
    mask = np.ones(padded.shape[:2], bool)
    mask[0, [0, 1, 5]] = False
    ys = rng.normal(size=(1, O))
    h_plain = rnnkit.hidden_states(p, x, cell=cell)[0, -1]
    h_pad = rnnkit.hidden_states(p, padded, mask=mask, cell=cell)[0, -1]
    np.testing.assert_allclose(h_pad, h_plain, **EXACT64)
    _, g_plain = _vg(p, x, ys, mode="many-to-one", cell=cell)
    _, g_pad = _vg(p, padded, ys, mode="many-to-one", mask=mask, cell=cell)
    for k in g_plain:
        np.testing.assert_allclose(g_pad[k], g_plain[k], **EXACT64, err_msg=k)


def test_params_of_another_cell_are_refused_with_the_layout():
    p = rnnkit.init_params(jax.random.key(0), I, H, O, cell="lstm")
    with pytest.raises(ValueError) as info:
        rnnkit.outputs(p, np.zeros((T, I)), cell="gru")
    assert "`params`" in str(info.value) and "bn" in str(info.value)
    with pytest.raises(ValueError) as info:
        rnnkit.outputs(p, np.zeros((T, I)))  # Elman by default: V (H, 4H) is not (H, H)
    assert "`params['V']`" in str(info.value) and "cell='elman'" in str(info.value)
    with pytest.raises(ValueError, match="`cell`"):
        rnnkit.init_params(jax.random.key(0), I, H, O, cell="transformer")


def test_layout_of_init_params():
    # Shapes and gate order as documented in init_params; the LSTM forget-gate bias starts at 1
    # (Jozefowicz, Zaremba & Sutskever 2015); orthogonal init makes each V block orthogonal
    # (Saxe et al. 2014).
    g = rnnkit.init_params(jax.random.key(0), I, H, O, cell="gru", scheme="orthogonal", dtype=jnp.float64)
    assert {k: v.shape for k, v in g.items()} == {"U": (I, 3 * H), "V": (H, 3 * H), "b": (3 * H,),
                                                  "bn": (H,), "W": (H, O), "c": (O,)}
    for k in range(3):
        block = np.asarray(g["V"][:, k * H:(k + 1) * H])
        np.testing.assert_allclose(block.T @ block, np.eye(H), **EXACT64)
    s = rnnkit.init_params(jax.random.key(0), I, H, O, cell="lstm")
    assert {k: v.shape for k, v in s.items()} == {"U": (I, 4 * H), "V": (H, 4 * H), "b": (4 * H,),
                                                  "W": (H, O), "c": (O,)}
    np.testing.assert_array_equal(np.asarray(s["b"]), np.repeat([0.0, 1.0, 0.0, 0.0], H))


@pytest.mark.parametrize("cell,act,masked", [("gru", "tanh", True), ("gru", "relu", False),
                                             ("lstm", "sigmoid", True), ("lstm", "tanh", False)])
def test_fast_backward_equals_autodiff_of_the_scan(cell, act, masked):
    # The custom VJP (weight gradients as bulk products after the reverse loop) against JAX
    # autodiff of the plain lax.scan: every parameter, the inputs and h0, float64.
    p, _, _, xs, rng = make(5, cell)
    mask = None
    if masked:
        mask = np.ones((B, T), bool)
        mask[0, :3] = False
        mask[2, 5:] = False
    ys = targets(rng, "regression", "many-to-many")
    h0 = rng.normal(size=(B, H))
    kw = dict(activation=act, mode="many-to-many", mask=mask, cell=cell)
    fast = jax.grad(lambda p, x, h: rnnkit.loss(p, x, ys, h0=h, **kw), argnums=(0, 1, 2))(p, xs, h0)
    plain = jax.grad(lambda p, x, h: rnnkit.recurrent._model._loss_autodiff(p, x, ys, h0=h, **kw),
                     argnums=(0, 1, 2))(p, xs, h0)
    for k in p:
        np.testing.assert_allclose(fast[0][k], plain[0][k], **FAST_VS_AUTODIFF, err_msg=k)
    np.testing.assert_allclose(fast[1], plain[1], **FAST_VS_AUTODIFF)
    np.testing.assert_allclose(fast[2], plain[2], **FAST_VS_AUTODIFF)
