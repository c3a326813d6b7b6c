"""The model against PyTorch: torch.nn.RNN + torch.nn.Linear + MSELoss/CrossEntropyLoss.

Reference library: PyTorch 2.13.0 (CPU), float64. torch.nn.RNN computes
h_t = phi(x_t W_ih^T + b_ih + h_{t-1} W_hh^T + b_hh), so with W_ih = U^T,
W_hh = V^T, b_ih = b and b_hh = 0 it is our Elman network; torch.nn.Linear
with weight W^T and bias c is our output layer.
"""
import itertools

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import rnnkit
from tolerances import TORCH64

torch = pytest.importorskip("torch")

B, T, I, H, O = 3, 7, 2, 5, 3


def make(seed, act):
    rng = np.random.default_rng(seed)
    p = rnnkit.init_params(jax.random.key(seed), I, H, O, scheme="orthogonal", dtype=jnp.float64)
    p = {k: np.asarray(v) + 0.1 * rng.normal(size=v.shape) for k, v in p.items()}
    rnn = torch.nn.RNN(I, H, nonlinearity=act, batch_first=True, dtype=torch.float64)
    lin = torch.nn.Linear(H, O, dtype=torch.float64)
    with torch.no_grad():
        rnn.weight_ih_l0.copy_(torch.from_numpy(p["U"].T))
        rnn.weight_hh_l0.copy_(torch.from_numpy(p["V"].T))
        rnn.bias_ih_l0.copy_(torch.from_numpy(p["b"]))
        rnn.bias_hh_l0.zero_()
        lin.weight.copy_(torch.from_numpy(p["W"].T))
        lin.bias.copy_(torch.from_numpy(p["c"]))
    xs = rng.normal(size=(B, T, I))
    return p, rnn, lin, xs, rng


def torch_grads(rnn, lin):
    return {"U": rnn.weight_ih_l0.grad.numpy().T, "V": rnn.weight_hh_l0.grad.numpy().T,
            "b": rnn.bias_ih_l0.grad.numpy(), "W": lin.weight.grad.numpy().T,
            "c": lin.bias.grad.numpy()}


_vg = jax.jit(jax.value_and_grad(rnnkit.loss), static_argnames=("activation", "task", "mode"))
_states = jax.jit(rnnkit.hidden_states, static_argnames="activation")
_outputs = jax.jit(rnnkit.outputs, static_argnames="activation")


@pytest.mark.parametrize("act", ["tanh", "relu"])
def test_states_and_outputs_equal_torch(act):
    p, rnn, lin, xs, _ = make(0, act)
    hs_t, hn_t = rnn(torch.from_numpy(xs))
    np.testing.assert_allclose(_states(p, xs, activation=act), hs_t.detach().numpy(),
                               **TORCH64)
    np.testing.assert_allclose(_outputs(p, xs, activation=act), lin(hs_t).detach().numpy(),
                               **TORCH64)
    # an initial state enters the same way as torch's h_0 (1, B, H)
    h0 = np.random.default_rng(1).normal(size=(B, H))
    hs_t, _ = rnn(torch.from_numpy(xs), torch.from_numpy(h0[None]))
    np.testing.assert_allclose(_states(p, xs, activation=act, h0=h0),
                               hs_t.detach().numpy(), **TORCH64)


@pytest.mark.parametrize("act,task,mode", list(itertools.product(
    ["tanh", "relu"], ["regression", "classification"], ["many-to-one", "many-to-many"])))
def test_loss_and_gradients_equal_torch(act, task, mode):
    p, rnn, lin, xs, rng = make(1, act)
    os = lin(rnn(torch.from_numpy(xs))[0])  # (B, T, O)
    if task == "regression":
        ys = rng.normal(size=(B, T, O) if mode == "many-to-many" else (B, O))
        # MSELoss (reduction="mean") averages over every element: steps and output units.
        out = os if mode == "many-to-many" else os[:, -1]
        loss_t = torch.nn.MSELoss()(out, torch.from_numpy(ys))
    else:
        ys = rng.integers(0, O, size=(B, T) if mode == "many-to-many" else (B,))
        out = os.reshape(-1, O) if mode == "many-to-many" else os[:, -1]
        loss_t = torch.nn.CrossEntropyLoss()(out, torch.from_numpy(ys).reshape(-1))
    loss_t.backward()
    value, grads = _vg(p, xs, ys, activation=act, task=task, mode=mode)
    np.testing.assert_allclose(value, loss_t.item(), **TORCH64)
    g_t = torch_grads(rnn, lin)
    for k in g_t:
        np.testing.assert_allclose(grads[k], g_t[k], **TORCH64, err_msg=k)
    # b_ih and b_hh enter a_t alike, so torch gives both the same gradient
    np.testing.assert_allclose(rnn.bias_hh_l0.grad.numpy(), g_t["b"], **TORCH64)


def test_end_padding_equals_torch_packed_sequences():
    # torch.nn.utils.rnn.pack_padded_sequence: h_n is each sequence's state at its own last
    # real step, which is our held state at step T-1 when the tail is masked.
    p, rnn, lin, xs, rng = make(2, "tanh")
    lengths = np.array([7, 3, 5])
    mask = np.arange(T)[None, :] < lengths[:, None]  # (B, T)
    xs = np.where(mask[..., None], xs, 99.0)  # the padding values must not matter
    ys = rng.normal(size=(B, O))
    packed = torch.nn.utils.rnn.pack_padded_sequence(torch.from_numpy(xs), torch.from_numpy(lengths),
                                                     batch_first=True, enforce_sorted=False)
    _, hn = rnn(packed)
    loss_t = torch.nn.MSELoss()(lin(hn[0]), torch.from_numpy(ys))
    loss_t.backward()
    value, grads = _vg(p, xs, ys, activation="tanh", task="regression", mode="many-to-one",
                       mask=mask)
    np.testing.assert_allclose(value, loss_t.item(), **TORCH64)
    g_t = torch_grads(rnn, lin)
    for k in g_t:
        np.testing.assert_allclose(grads[k], g_t[k], **TORCH64, err_msg=k)
