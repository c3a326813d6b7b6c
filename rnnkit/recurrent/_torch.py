"""The way to and from PyTorch: the same network as torch.nn.RNN / GRU / LSTM + torch.nn.Linear.

torch stays optional: it is imported inside these functions only.

The mapping (row vectors here, torch's column weights there):

    weight_ih_l0 = U^T   weight_hh_l0 = V^T   (gate blocks already in torch's order)
    Elman  bias_ih_l0 = b, bias_hh_l0 = 0
    GRU    bias_ih_l0 = b, bias_hh_l0 = [0, 0, bn]  (b_hr and b_hz fold into b on the way back)
    LSTM   bias_ih_l0 = b, bias_hh_l0 = 0           (b = b_ih + b_hh on the way back)
    Linear weight = W^T, bias = c
"""
from __future__ import annotations

import numpy as np

from ._cells import cell_of, get_cell
from ._model import _check_params

_TORCH_ACTS = {"elman": ("tanh", "relu"), "gru": ("tanh",), "lstm": ("tanh",)}


def _torch():
    try:
        import torch
    except ImportError as e:  # torch is an optional dependency
        raise ImportError("rnnkit.to_torch / from_torch need PyTorch, which is not installed; "
                          "install it with `pip install torch`") from e
    return torch


def _field(config, name):
    value = config.get(name) if isinstance(config, dict) else getattr(config, name, None)
    if value is None:
        raise TypeError(f"`config` has no `{name}`; pass the rnnkit.Config the params were trained with "
                        "(or a dict with 'cell' and 'activation')")
    return value


def to_torch(params: dict, config):
    """The network as PyTorch modules with the weights copied: (rnn, linear).

    ``rnn`` is ``torch.nn.RNN`` (Elman), ``torch.nn.GRU`` or ``torch.nn.LSTM``,
    one layer, ``batch_first=True``; ``linear`` is ``torch.nn.Linear(H, O)``. So
    ``linear(rnn(x)[0])`` equals ``rnnkit.outputs(params, x, ...)`` for x (B, T, I).
    The modules take the parameters' float dtype.

    Args:
      params: the trained dict (``FitResult.params`` or ``init_params``).
      config: the Config they belong to (its ``cell`` and ``activation`` are read),
        or a dict with those two keys.

    Returns:
      (rnn, linear) torch modules.

    Raises:
      ImportError: torch is not installed (``pip install torch``).
      ValueError: an activation torch's module does not offer (torch.nn.RNN has
        tanh and relu; GRU and LSTM have tanh only).

    Example:
      >>> rnn, linear = rnnkit.to_torch(result.params, result.config)
      >>> y = linear(rnn(torch.as_tensor(x))[0][:, -1])
    """
    cell, act = _field(config, "cell"), _field(config, "activation")
    get_cell(cell)
    if act not in _TORCH_ACTS[cell]:
        module = "RNN" if cell == "elman" else cell.upper()
        raise ValueError(f"`config.activation` (={act!r}) has no torch.nn.{module} equivalent; torch "
                         f"offers {list(_TORCH_ACTS[cell])} for cell={cell!r}: train with one of those")
    p = {k: np.asarray(v) for k, v in _check_params(params, cell).items()}
    torch = _torch()
    dtype = torch.float64 if p["U"].dtype == np.float64 else torch.float32
    n_in, H, n_out = p["U"].shape[0], p["V"].shape[0], p["W"].shape[1]
    if cell == "elman":
        rnn = torch.nn.RNN(n_in, H, nonlinearity=act, batch_first=True, dtype=dtype)
    else:
        rnn = (torch.nn.GRU if cell == "gru" else torch.nn.LSTM)(n_in, H, batch_first=True, dtype=dtype)
    linear = torch.nn.Linear(H, n_out, dtype=dtype)
    b_hh = np.zeros_like(p["b"])
    if cell == "gru":
        b_hh[2 * H:] = p["bn"]
    as_t = lambda a: torch.from_numpy(np.array(a, copy=True, order="C")).to(dtype)  # noqa: E731
    with torch.no_grad():
        rnn.weight_ih_l0.copy_(as_t(p["U"].T))
        rnn.weight_hh_l0.copy_(as_t(p["V"].T))
        rnn.bias_ih_l0.copy_(as_t(p["b"]))
        rnn.bias_hh_l0.copy_(as_t(b_hh))
        linear.weight.copy_(as_t(p["W"].T))
        linear.bias.copy_(as_t(p["c"]))
    return rnn, linear


def from_torch(rnn, linear):
    """rnnkit parameters from a one-layer torch.nn.RNN / GRU / LSTM and a torch.nn.Linear.

    Args:
      rnn: torch.nn.RNN (tanh or relu), torch.nn.GRU or torch.nn.LSTM; one layer,
        one direction, no LSTM projection (``batch_first`` does not matter).
      linear: torch.nn.Linear(H, O), the output layer applied to every state.

    Returns:
      (params, fields): params a dict of numpy arrays in the modules' dtype (the
      layout of ``init_params``); fields {"cell", "activation", "hidden"} to build
      the Config with (``Config(**fields, ...)``) or to pass as ``cell=`` and
      ``activation=`` to ``rnnkit.outputs``.
    """
    torch = _torch()
    kinds = {torch.nn.RNN: "elman", torch.nn.GRU: "gru", torch.nn.LSTM: "lstm"}
    cell = kinds.get(type(rnn))
    if cell is None:
        raise TypeError(f"`rnn` must be a torch.nn.RNN, GRU or LSTM; got {type(rnn).__name__}")
    if rnn.num_layers != 1 or rnn.bidirectional or getattr(rnn, "proj_size", 0):
        raise ValueError(f"`rnn` has num_layers={rnn.num_layers}, bidirectional={rnn.bidirectional}"
                         f"{', proj_size=' + str(rnn.proj_size) if getattr(rnn, 'proj_size', 0) else ''}; "
                         "rnnkit's networks have one layer, one direction, no projection")
    if not isinstance(linear, torch.nn.Linear):
        raise TypeError(f"`linear` must be a torch.nn.Linear; got {type(linear).__name__}")
    H = rnn.hidden_size
    if linear.in_features != H:
        raise ValueError(f"`linear` has in_features={linear.in_features}, but `rnn` has "
                         f"hidden_size={H}; the output layer must read the {H} hidden units")
    act = rnn.nonlinearity if cell == "elman" else "tanh"
    arr = lambda t: t.detach().cpu().numpy().copy()  # noqa: E731
    U, V = arr(rnn.weight_ih_l0).T.copy(), arr(rnn.weight_hh_l0).T.copy()
    zeros = np.zeros(U.shape[1], U.dtype)
    b_ih = arr(rnn.bias_ih_l0) if rnn.bias else zeros
    b_hh = arr(rnn.bias_hh_l0) if rnn.bias else zeros
    params = {"U": U, "V": V}
    if cell == "gru":
        params["b"] = b_ih + np.concatenate([b_hh[:2 * H], np.zeros(H, b_hh.dtype)])
        params["bn"] = b_hh[2 * H:].copy()
    else:
        params["b"] = b_ih + b_hh
    params["W"] = arr(linear.weight).T.copy()
    params["c"] = arr(linear.bias) if linear.bias is not None else np.zeros(linear.out_features, U.dtype)
    params = {k: params[k] for k in get_cell(cell).param_names}
    return params, {"cell": cell_of(params), "activation": act, "hidden": H}
