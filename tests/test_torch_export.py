"""rnnkit.to_torch / from_torch: the same network as torch.nn.RNN/GRU/LSTM + torch.nn.Linear.

Reference library: PyTorch 2.13.0 (CPU). The forward pass of the modules to_torch
returns must equal rnnkit.outputs (float64), and from_torch(to_torch(p)) must give p back.
"""
import subprocess
import sys
import textwrap

import jax
import numpy as np
import pytest

import rnnkit
from rnnkit import Config
from tolerances import TORCH64

torch = pytest.importorskip("torch")


@pytest.mark.parametrize("cell,act", [("elman", "tanh"), ("elman", "relu"), ("gru", "tanh"),
                                      ("lstm", "tanh")])
def test_round_trip_and_forward_agreement(cell, act):
    rng = np.random.default_rng(11)
    B, T, I, H, O = 2, 7, 3, 5, 2
    p = rnnkit.init_params(jax.random.key(5), I, H, O, cell=cell, dtype=np.float64)
    p = {k: np.asarray(v) + 0.3 * rng.normal(size=v.shape) for k, v in p.items()}
    rnn, linear = rnnkit.to_torch(p, Config(cell=cell, activation=act))
    assert rnn.batch_first and rnn.hidden_size == H and linear.out_features == O
    assert type(rnn) is {"elman": torch.nn.RNN, "gru": torch.nn.GRU, "lstm": torch.nn.LSTM}[cell]
    xs = rng.normal(size=(B, T, I))
    with torch.no_grad():
        theirs = linear(rnn(torch.from_numpy(xs))[0]).numpy()
    ours = rnnkit.outputs(p, xs, activation=act, cell=cell)
    np.testing.assert_allclose(ours, theirs, **TORCH64)
    back, fields = rnnkit.from_torch(rnn, linear)
    assert fields == {"cell": cell, "activation": act, "hidden": H}
    assert list(back) == list(p)
    for k in p:
        np.testing.assert_allclose(back[k], p[k], rtol=0, atol=0, err_msg=k)


def test_from_torch_folds_torchs_second_biases():
    # A torch module trained on its own has b_hh != 0: it folds into b (GRU: b_hr, b_hz; b_hn -> bn).
    torch.manual_seed(0)
    for module in (torch.nn.GRU(2, 3, batch_first=True), torch.nn.LSTM(2, 3, batch_first=True),
                   torch.nn.RNN(2, 3, nonlinearity="relu")):
        module = module.double()
        linear = torch.nn.Linear(3, 1).double()
        params, fields = rnnkit.from_torch(module, linear)
        xs = np.random.default_rng(0).normal(size=(4, 6, 2))
        x = torch.from_numpy(xs if module.batch_first else xs.transpose(1, 0, 2))
        with torch.no_grad():
            out = module(x)[0]
            out = out if module.batch_first else out.transpose(0, 1)
            theirs = linear(out).numpy()
        ours = rnnkit.outputs(params, xs, activation=fields["activation"], cell=fields["cell"])
        np.testing.assert_allclose(ours, theirs, **TORCH64)


def test_a_trained_fit_runs_in_torch():
    # float32 weights of a fit give float32 modules with the same predictions.
    import pandas as pd
    rng = np.random.default_rng(0)
    df = pd.DataFrame({"y": np.sin(np.arange(200) / 4) + 0.1 * rng.normal(size=200)})
    result = rnnkit.fit(df, Config(target="y", window=6, hidden=4, epochs=2, cell="gru", season=None),
                        progress=False)
    rnn, linear = rnnkit.to_torch(result.params, result.config)
    assert rnn.weight_ih_l0.dtype == torch.float32
    x, _, _ = result.prepared.windows("test")
    with torch.no_grad():
        theirs = linear(rnn(torch.from_numpy(np.ascontiguousarray(x, np.float32)))[0][:, -1]).numpy()
    ours = np.asarray(rnnkit.outputs(result.params, x, cell="gru"))[:, -1]
    np.testing.assert_allclose(ours, theirs, rtol=1e-5, atol=1e-6)


def test_errors_name_the_argument():
    p = rnnkit.init_params(jax.random.key(0), 2, 3, 1, cell="gru")
    with pytest.raises(ValueError, match="`config.activation`.*'relu'"):
        rnnkit.to_torch(p, Config(cell="gru", activation="relu"))
    with pytest.raises(ValueError, match="`params`"):
        rnnkit.to_torch(p, Config(cell="lstm"))
    with pytest.raises(TypeError, match="`config`"):
        rnnkit.to_torch(p, object())
    with pytest.raises(ValueError, match="num_layers=2"):
        rnnkit.from_torch(torch.nn.GRU(2, 3, num_layers=2), torch.nn.Linear(3, 1))
    with pytest.raises(ValueError, match="in_features=4"):
        rnnkit.from_torch(torch.nn.LSTM(2, 3), torch.nn.Linear(4, 1))
    with pytest.raises(TypeError, match="`rnn`"):
        rnnkit.from_torch(torch.nn.Linear(2, 3), torch.nn.Linear(3, 1))


def test_without_torch_the_message_says_how_to_install_it(tmp_path):
    # torch hidden from the import system: `import rnnkit` works, to_torch says what to do.
    script = textwrap.dedent("""
        import sys
        sys.modules["torch"] = None  # makes `import torch` raise ImportError
        import jax, rnnkit
        p = rnnkit.init_params(jax.random.key(0), 2, 3, 1)
        try:
            rnnkit.to_torch(p, rnnkit.Config())
        except ImportError as e:
            print("MESSAGE", e)
    """)
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert "pip install torch" in out.stdout
