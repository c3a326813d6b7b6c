"""Inside a trained network: gradient through time, the spectrum of V, saturated units, states,
and for the gated cells (GRU, LSTM) the activity of their gates.

All numbers come from the trained parameters and the validation windows (the
training windows when there are none). The gradient through time is measured
the way Pascanu, Mikolov & Bengio (2013) reason about it: add a perturbation
e_k (zero) to every state h_k, and differentiate the loss with respect to it.
dL/de_k = dL/dh_k is the total gradient reaching step k, through every later
step, so its norm against k shows gradients fading (||V|| < 1, saturated
units) or growing (||V|| > 1) as they travel back in time.

For the gated cells the same perturbation is added to h_k after each step;
the Pascanu et al. bound ||dL/dh_k|| <= ||dL/dh_T|| (sigma_max(V) max|phi'|)^(T-k)
holds for the Elman recurrence only (a gate multiplies the path, and the LSTM
cell state adds one without V), so it is given for Elman alone. A gated cell's
gates are measured instead: the share of values near 0 or 1 (a gate that is
shut or open), and for LSTM the mean forget gate at every step of the window
(near 1: the cell keeps what it holds; near 0: it forgets each step).

The loss surfaces (Li et al. 2018) are in ``_surface.py`` and re-exported here.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Optional

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
from jax import lax

from ..training._stored import stored_jit

from ..recurrent._cells import GATE_BLOCKS, LOGISTIC_GATES, cell_of, get_activation
from ..recurrent._scan import scan_cell

# Windows per chunk when running every window of a split through the network:
# fixed so that one program serves every chunk (the last one is padded).
_CHUNK_ELEMENTS = 2 ** 22  # (chunk, T, H) floats per chunk, 32 MiB in float64
# Windows in the batch whose gradient through time is measured.
GRADIENT_BATCH = 256
# |h| beyond which a tanh unit is called saturated; sigmoid: h < 0.05 or h > 0.95.
SATURATION = 0.95


def _tb(a):
    """(B, T, ...) <-> (T, B, ...)."""
    return jnp.swapaxes(a, 0, 1)


def perturbed_states(params, xs, mask, eps, act: str, cell: str = "elman", with_gates: bool = False):
    """Hidden states with a perturbation added to each state: h_t = step(h_{t-1}, x_t) + e_t.

    The step is the cell's step of ``_model`` (a False mask step holds the
    state); with ``eps`` zero this equals ``rnnkit.hidden_states``.

    Args:
      params: the cell's dict (``init_params``).
      xs: (B, T, I).  mask: (B, T) bool.  eps: (B, T, H).
      act: activation name (static).  cell: "elman", "gru" or "lstm" (static).
      with_gates: also return the gate values (gated cells only).

    Returns:
      (B, T, H) states (perturbation included); with_gates: (states, gates), gates
      a tuple of (B, T, H) arrays in the cell's block order.
    """
    if cell != "elman" or with_gates:
        h0 = jnp.zeros((xs.shape[0], params["V"].shape[0]), params["V"].dtype)  # (B, H)
        out = scan_cell(cell, act, _tb(xs), params, h0, _tb(mask)[:, :, None], _tb(eps), with_gates)
        if with_gates:
            return _tb(out[0]), tuple(_tb(g) for g in out[1])
        return _tb(out)
    phi = get_activation(act).value
    xp = lax.dot_general(xs, params["U"], (((2,), (0,)), ((), ())))  # (B, T, H)
    xp = xp + params["b"][None, None, :]
    h0 = jnp.zeros((xs.shape[0], params["V"].shape[0]), xp.dtype)  # (B, H)

    def step(h, inp):
        p, m, e = inp  # (B, H), (B, 1), (B, H)
        h = jnp.where(m, phi(p + h @ params["V"]), h) + e
        return h, h

    _, hs = lax.scan(step, h0, (_tb(xp), _tb(mask)[:, :, None], _tb(eps)))
    return _tb(hs)  # (B, T, H)


def example_losses(params, xs, ys, mask, eps, act: str, task: str, mode: str, cell: str = "elman"):
    """Each window's own loss (the model's loss terms, averaged within the window).

    Args:
      xs (B, T, I); ys: regression (B, O) or (B, T, O), classification (B,) or (B, T);
      mask (B, T) bool; eps (B, T, H).

    Returns:
      (B,) losses.
    """
    hs = perturbed_states(params, xs, mask, eps, act, cell)  # (B, T, H)
    if mode == "many-to-one":
        hs = hs[:, -1]  # (B, H): padded steps held the state
    o = lax.dot_general(hs, params["W"], (((hs.ndim - 1,), (0,)), ((), ())))  # (B, [T,] O)
    o = o + params["c"].reshape((1,) * (o.ndim - 1) + params["c"].shape)
    if task == "regression":
        terms = jnp.mean(jnp.square(o - ys.astype(o.dtype)), axis=-1)  # (B,) or (B, T)
    else:
        picked = jnp.take_along_axis(o, jnp.maximum(ys, 0)[..., None].astype(jnp.int32), axis=-1)[..., 0]
        terms = jax.nn.logsumexp(o, axis=-1) - picked
    if mode == "many-to-one":
        return terms
    w = mask.astype(terms.dtype)  # (B, T)
    return jnp.sum(terms * w, axis=1) / jnp.maximum(jnp.sum(w, axis=1), jnp.ones((), terms.dtype))


@stored_jit(static_argnames=("act", "task", "mode", "cell"))
def _state_gradients(params, xs, ys, mask, *, act, task, mode, cell="elman"):
    """dL_i/dh_k for every window i and step k: (B, T, H)."""
    eps = jnp.zeros(xs.shape[:2] + (params["V"].shape[0],), params["V"].dtype)  # (B, T, H)
    total = lambda e: jnp.sum(example_losses(params, xs, ys, mask, e, act, task, mode, cell))  # noqa: E731
    # The sum of per-window losses: its gradient at window i is that window's own dL_i/dh_k.
    return jax.grad(total)(eps)


def gradient_through_time(params, xs, ys, mask, *, activation: str, task: str, mode: str,
                          cell: str = "elman"):
    """Mean norm of dL/dh_k over a batch of windows, for every step k.

    Args:
      params: the network.  xs (B, T, I); ys targets of the batch; mask (B, T) bool or None.
      activation, task, mode, cell: as in the Config.

    Returns:
      (T,) float64: mean over windows (whose step k is real) of ||dL_i/dh_k||;
      the last entry is the last step. NaN at a step no window reaches.
    """
    mask = np.ones(np.shape(xs)[:2], bool) if mask is None else np.asarray(mask, bool)
    g = _state_gradients(params, xs, ys, mask, act=activation,
                         task=task, mode=mode, cell=cell)  # (B, T, H)
    norms = np.linalg.norm(np.asarray(g, np.float64), axis=-1)  # (B, T)
    count = mask.sum(axis=0)  # (T,)
    total = np.where(mask, norms, 0.0).sum(axis=0)
    return np.where(count > 0, total / np.maximum(count, 1), np.nan)


@stored_jit(static_argnames=("act", "cell"))
def _window_states(params, xs, mask, *, act, cell="elman"):
    """The states of a few windows (B, T, H), as one program."""
    eps = jnp.zeros(xs.shape[:2] + (params["V"].shape[0],), params["V"].dtype)
    return perturbed_states(params, xs, mask, eps, act, cell)


def saturated(h, activation: str):
    """Which states count as saturated (works on numpy and jax arrays).

    tanh |h| > 0.95; sigmoid h < 0.05 or h > 0.95; relu exactly 0 (a dead
    unit passes no gradient); linear never.
    """
    get_activation(activation)  # ValueError naming the choices for an unknown name
    if activation == "tanh":
        return abs(h) > SATURATION
    if activation == "sigmoid":
        return (h < 1 - SATURATION) | (h > SATURATION)
    if activation == "relu":
        return h == 0
    return h != h  # linear: never saturated (all False unless NaN), same type as h


@stored_jit(static_argnames=("act", "cell"))
def _chunk_summary(params, xs, mask, *, act, cell="elman"):
    """For one chunk of windows: last states (B, H), saturated counts (H,), real steps (),
    and the gate counts: near 0 (G,), near 1 (G,), sums (G,) of each logistic gate over
    real steps and units, and the forget gate's sum per step (T,) (LSTM; zeros otherwise)."""
    eps = jnp.zeros(xs.shape[:2] + (params["V"].shape[0],), params["V"].dtype)
    if cell == "elman":
        hs, gates = perturbed_states(params, xs, mask, eps, act), ()  # (B, T, H)
    else:
        hs, gates = perturbed_states(params, xs, mask, eps, act, cell, with_gates=True)
    real = mask[:, :, None]  # (B, T, 1)
    hit = saturated(hs, act) & real  # (B, T, H)
    blocks = GATE_BLOCKS[cell]
    logistic = [gates[blocks.index(name)] for name in LOGISTIC_GATES[cell]]  # each (B, T, H)
    low = jnp.stack([jnp.sum((g < 1 - SATURATION) & real) for g in logistic]) if logistic else jnp.zeros(0)
    high = jnp.stack([jnp.sum((g > SATURATION) & real) for g in logistic]) if logistic else jnp.zeros(0)
    sums = jnp.stack([jnp.sum(jnp.where(real, g, 0)) for g in logistic]) if logistic else jnp.zeros(0)
    if cell == "lstm":
        f = gates[blocks.index("forget")]
        forget = jnp.sum(jnp.where(real, f, 0), axis=(0, 2))  # (T,)
    else:
        forget = jnp.zeros(xs.shape[1])
    return hs[:, -1], jnp.sum(hit, axis=(0, 1)), jnp.sum(mask), low, high, sums, forget, \
        jnp.sum(mask, axis=0)


def recurrent_blocks(V, cell: str) -> dict:
    """The (H, H) blocks of V by name, in the cell's block order (Elman: V itself)."""
    V = np.asarray(V, dtype=np.float64)
    H = V.shape[0]
    return {name: V[:, k * H:(k + 1) * H] for k, name in enumerate(GATE_BLOCKS[cell])}


def spectrum(V):
    """Singular values (largest first), eigenvalues and spectral radius of V (H, H)."""
    V = np.asarray(V, dtype=np.float64)
    sv = np.linalg.svd(V, compute_uv=False)  # (H,) descending
    eig = np.linalg.eigvals(V)  # (H,) complex
    return sv, eig, float(np.max(np.abs(eig)))


@dataclass(frozen=True, eq=False)
class Diagnostics:
    """What the trained network does inside, measured on the validation windows.

    ``window_states(i)`` gives the states of any window of a split (it needs the
    data: a result loaded from disk has only the first validation window).
    """

    split: str  # the windows measured: "val", or "train" when there is no val
    activation: str
    gradient_through_time: np.ndarray  # (T,) mean ||dL/dh_k|| over a batch, k = 1..T
    gradient_windows: int  # windows in that batch
    singular_values: np.ndarray  # (H,) of V, largest first
    eigenvalues: np.ndarray  # (H,) complex, of V
    spectral_radius: float  # max |eigenvalue of V|
    saturation: np.ndarray  # (H,) share of each unit's states that are saturated
    window_state: np.ndarray  # (T, H) the states of the first window of `split`
    val_states: np.ndarray  # (N, H) the state at the last step of every window of `split`
    val_times: np.ndarray  # (N,) the target time of each of those windows
    _states_of: Optional[Callable] = field(default=None, repr=False)  # (split, i) -> (T, H)
    # For a gated cell, singular_values / eigenvalues / spectral_radius are those of the
    # candidate block of V (the map from h to the new content, Elman's V in a gated cell).
    cell: str = "elman"
    block_singular_values: dict = field(default_factory=dict)  # block name -> (H,), largest first
    gate_names: tuple = ()  # the logistic gates measured (GRU reset, update; LSTM input, forget, output)
    gate_near_zero: np.ndarray = field(default_factory=lambda: np.zeros(0))  # (G,) share of values < 0.05
    gate_near_one: np.ndarray = field(default_factory=lambda: np.zeros(0))  # (G,) share of values > 0.95
    gate_mean: np.ndarray = field(default_factory=lambda: np.zeros(0))  # (G,) mean gate value
    forget_along_window: np.ndarray = field(default_factory=lambda: np.zeros(0))  # (T,) LSTM mean f_k

    @property
    def gradient_bound_applies(self) -> bool:
        """Whether the Pascanu et al. (2013) bound sigma_max(V) max|phi'| holds (Elman only)."""
        return self.cell == "elman"

    @property
    def gradient_bound_note(self) -> str:
        """One sentence on the gradient bound for this cell."""
        if self.gradient_bound_applies:
            return ("||dL/dh_k|| <= ||dL/dh_T|| (sigma_max(V) max|phi'|)^(T-k) "
                    "(Pascanu, Mikolov & Bengio 2013)")
        return (f"no sigma_max bound for the {self.cell.upper()} cell: its gates scale the path back "
                "in time" + (" and the cell state carries one without V" if self.cell == "lstm" else "")
                + "; read the gate activity instead")

    def gate_activity(self) -> pd.DataFrame:
        """Per logistic gate: share of values near 0 (shut), near 1 (open), mean; empty for Elman."""
        return pd.DataFrame({"near_0": self.gate_near_zero, "near_1": self.gate_near_one,
                             "mean": self.gate_mean},
                            index=pd.Index(list(self.gate_names), name="gate"))

    def window_states(self, i: int = 0, split: Optional[str] = None) -> np.ndarray:
        """The hidden states (T, H) of window ``i`` of ``split`` (default: the measured split)."""
        split = self.split if split is None else split
        if isinstance(i, bool) or not isinstance(i, (int, np.integer)):
            raise TypeError(f"`i` (={i!r}) must be a whole number, the window's position in its split")
        if self._states_of is None:
            if i == 0 and split == self.split:
                return self.window_state
            raise ValueError(f"window_states({i}, {split!r}) needs the data, and this result was loaded "
                             "from disk; use load_fit(path, df=<the training frame>) to attach it")
        return self._states_of(split, int(i))

    @property
    def gradient_ratio(self) -> float:
        """||dL/dh_1|| / ||dL/dh_T||: far below 1 = vanishing, far above 1 = exploding."""
        g = self.gradient_through_time
        return float(g[0] / g[-1]) if g[-1] > 0 else float("nan")

    def __repr__(self) -> str:
        T, H = np.shape(self.window_state)
        return (f"Diagnostics({self.split}, {self.activation}, T={T}, H={H}, "
                f"spectral_radius={self.spectral_radius:.3g}, "
                f"gradient_ratio_first_to_last={self.gradient_ratio:.3g}, "
                f"mean_saturation={float(np.mean(self.saturation)):.3g}, "
                f"{len(self.val_states)} windows; .summary() for the headline numbers)")

    def summary(self) -> pd.Series:
        """The headline numbers, one per line."""
        return pd.Series({
            "spectral_radius": self.spectral_radius,
            "largest_singular_value": float(self.singular_values[0]),
            "gradient_ratio_first_to_last": self.gradient_ratio,
            "mean_saturation": float(np.mean(self.saturation)),
            "units_mostly_saturated": int(np.sum(self.saturation > 0.5)),
            **{f"{g}_gate_near_0": float(a) for g, a in zip(self.gate_names, self.gate_near_zero)},
            **{f"{g}_gate_near_1": float(a) for g, a in zip(self.gate_names, self.gate_near_one)},
            **({"mean_forget_gate": float(np.mean(self.forget_along_window))}
               if len(self.forget_along_window) else {}),
        }, name="diagnostics")


def _numpy_batch(prepared, split, idx):
    """Windows ``idx`` of a split as (x (B,T,I), y, mask (B,T)) numpy arrays."""
    x, y, mask = prepared.windows(split)
    x, y = np.asarray(x[idx]), np.asarray(y[idx])
    if prepared.leads > 1:  # (B, L, O) -> the network's (B, L*O) outputs, lead-major
        y = y.reshape(len(y), -1)
    mask = np.ones(x.shape[:2], bool) if mask is None else np.asarray(mask[idx])
    return x, y, mask


def _all_windows(params, prepared, split, act, cell="elman"):
    """Run every window of a split in fixed-size chunks: last states (N, H), saturation (H,),
    and the gate activity (near 0, near 1, mean per logistic gate; LSTM forget gate per step)."""
    x_all, _, m_all = prepared.windows(split)
    n, T = x_all.shape[:2]
    H = params["V"].shape[0]
    chunk = int(max(16, min(4096, _CHUNK_ELEMENTS // max(T * H, 1))))
    chunk = min(chunk, max(n, 1))
    last, hits, steps = [], np.zeros(H, np.float64), 0
    n_gates = len(LOGISTIC_GATES[cell])
    low, high, sums = np.zeros(n_gates), np.zeros(n_gates), np.zeros(n_gates)
    forget, per_step = np.zeros(T), np.zeros(T)
    for at in range(0, n, chunk):
        k = min(chunk, n - at)
        x = np.zeros((chunk,) + x_all.shape[1:], x_all.dtype)
        x[:k] = x_all[at:at + k]
        m = np.zeros((chunk, T), bool)
        m[:k] = True if m_all is None else m_all[at:at + k]
        h_last, hit, real, lo, hi, sm, fg, ps = _chunk_summary(params, x, m,
                                                               act=act, cell=cell)
        last.append(np.asarray(h_last)[:k])
        hits += np.asarray(hit, np.float64)
        steps += int(real)
        low, high, sums = low + np.asarray(lo), high + np.asarray(hi), sums + np.asarray(sm)
        forget, per_step = forget + np.asarray(fg), per_step + np.asarray(ps)
    states = np.concatenate(last) if last else np.zeros((0, H))
    values = max(steps, 1) * H  # gate values per gate: real steps x units
    gates = (low / values, high / values, sums / values,
             np.where(per_step > 0, forget / np.maximum(per_step * H, 1), np.nan) if cell == "lstm"
             else np.zeros(0))
    return states, hits / max(steps, 1), gates


def diagnose(params, prepared, *, split: Optional[str] = None) -> Diagnostics:
    """Measure the trained network on the windows of one split.

    Args:
      params: the cell's dict (numpy or jax); the cell is read from its layout.
      prepared: the Prepared it was trained on.
      split: the windows to use; None: "val", or "train" when val has no window.

    Returns:
      Diagnostics.
    """
    from ..training._train import precision  # the training module owns the float64 switch

    if split is None:
        split = "val" if len(prepared.starts["val"]) else "train"
    n = len(prepared.starts[split])
    if n == 0:
        raise ValueError(f"the {split!r} split has no window to diagnose; use another `split`")
    cfg = prepared.config
    act = cfg.activation
    cell = cell_of(params)
    dtype = np.dtype(cfg.dtype)
    with precision(cfg.dtype):
        p = {k: np.asarray(v, dtype) for k, v in params.items()}
        # A batch spread evenly over the split, so that it represents all of it.
        idx = np.unique(np.linspace(0, n - 1, min(n, GRADIENT_BATCH)).round().astype(np.int64))
        x, y, m = _numpy_batch(prepared, split, idx)
        grads = gradient_through_time(p, x, y, m, activation=act, task=cfg.task, mode=cfg.mode,
                                      cell=cell)
        states, share, gates = _all_windows(p, prepared, split, act, cell)

        def states_of(sp, i):
            if sp not in prepared.starts:
                raise ValueError(f"`split` (={sp!r}) is not a split; use one of {sorted(prepared.starts)}")
            count = len(prepared.starts[sp])
            if count == 0:
                raise ValueError(f"split {sp!r} has no windows (its share of `split` is 0 or too "
                                 "short for one window); ask for another split")
            if not 0 <= i < count:
                raise ValueError(f"window `i` (={i}) is out of range: split {sp!r} has {count} "
                                 f"window(s), numbered 0..{count - 1}")
            xi, _, mi = _numpy_batch(prepared, sp, np.array([i]))
            with precision(cfg.dtype):
                hs = _window_states(p, xi, mi, act=act, cell=cell)
            return np.asarray(hs[0])[: int(mi[0].sum())]  # (T, H), real steps only

        first = states_of(split, 0)
    blocks = recurrent_blocks(params["V"], cell)
    sv, eig, radius = spectrum(blocks["state" if cell == "elman" else "candidate"])
    times = prepared.target_times(split)
    times = times[:, -1] if times.ndim == 2 else times  # many-to-many: the window's last target
    return Diagnostics(split, act, grads, len(idx), sv, eig, radius, share, first, states,
                       np.asarray(times), states_of, cell=cell,
                       block_singular_values={k: spectrum(v)[0] for k, v in blocks.items()},
                       gate_names=LOGISTIC_GATES[cell], gate_near_zero=gates[0], gate_near_one=gates[1],
                       gate_mean=gates[2], forget_along_window=gates[3])


from ._surface import loss_slice as loss_slice  # noqa: E402  (re-exported: diagnostics API)
from ._surface import loss_surface as loss_surface  # noqa: E402
