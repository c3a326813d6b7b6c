"""The training engine: learning, compile economy, padding, determinism, divergence, stopping."""
import threading

import jax
import numpy as np
import optax
import pandas as pd
import pytest

from rnnkit import Config, prepare
from rnnkit.recurrent._model import loss as model_loss
from rnnkit.recurrent._model import outputs as model_outputs
from rnnkit.training._optim import hyperparams, init_state, make_optimizer
from rnnkit.training._train import _judge, compile_count, evaluate, initial_params, shape_plan, train
from tolerances import EXACT32, EXACT64, PADDED32

# Most tests share these sizes so that they share one compiled epoch program.
BASE = dict(target="y", window=8, hidden=8, batch_size=32, seed=0)


def linear_system(n=500, noise=0.0, seed=0):
    """y_t = 0.6 y_{t-1} + 0.5 u_{t-1} + noise: a first-order linear system driven by u."""
    rng = np.random.default_rng(seed)
    u = rng.standard_normal(n)
    e = noise * rng.standard_normal(n)
    y = np.zeros(n)
    for t in range(1, n):
        y[t] = 0.6 * y[t - 1] + 0.5 * u[t - 1] + e[t]
    return pd.DataFrame({"y": y, "u": u}, index=pd.date_range("2024-01-01", periods=n, freq="h"))


@pytest.fixture(scope="module")
def frame():
    return linear_system()


def run(df, progress=False, **changes):
    cfg = Config(**{**BASE, **changes})
    p = prepare(df, cfg)
    return p, cfg, train(p, cfg, progress=progress)


def val_loss_of(params, p, cfg):
    x, y, mask = p.windows("val")
    return float(model_loss(params, x, y, activation=cfg.activation, task=cfg.task, mode=cfg.mode,
                            mask=mask))


def test_linear_system_is_learned(frame):
    p, cfg, out = run(frame, epochs=25, activation="linear", patience=None, lr=1e-2, progress=True)
    h = out.history
    assert out.status == "ok" and list(h.columns) == ["epoch", "train_loss", "val_loss", "grad_norm",
                                                      "lr", "seconds"]
    assert list(h.epoch) == list(range(1, 26)) and np.all(h.lr == cfg.lr)
    # The target is an exact linear function of the last inputs, so ordinary least squares on
    # the windows (scikit-learn, the reference) reaches ~0 error; the network must come close.
    from sklearn.linear_model import LinearRegression
    x, y, _ = p.windows("train")
    xv, yv, _ = p.windows("val")
    ols = LinearRegression().fit(x.reshape(len(x), -1), y)
    ols_mse = float(np.mean((ols.predict(xv.reshape(len(xv), -1)) - yv) ** 2))
    assert ols_mse < 1e-6
    assert h.val_loss.min() < 0.02 and h.train_loss.iloc[-1] < h.train_loss.iloc[0] / 20
    assert out.params["U"].shape == (2, 8) and out.params["U"].dtype == np.float32
    assert isinstance(out.params["V"], np.ndarray)


def test_other_activation_lr_seed_init_do_not_recompile(frame):
    cfg = Config(**{**BASE, "epochs": 2})
    p = prepare(frame, cfg)
    first = train(p, cfg, progress=False)
    assert first.compiles <= 1  # 0 when an earlier test compiled the same shapes already
    before = compile_count()
    for changes in (dict(activation="relu"), dict(activation="sigmoid", lr=0.02, seed=3),
                    dict(init="identity", recurrent_scale=0.5, clip=3.0), dict(patience=None)):
        # the optax test pattern: a re-run with new numbers must not trace again
        again = train(p, cfg.replace(**changes), progress=False)
        assert again.compiles == 0, changes
    assert compile_count() == before
    # adamw's weight decay is data too
    w1 = train(p, cfg.replace(optimizer="adamw", weight_decay=0.1), progress=False)
    w2 = train(p, cfg.replace(optimizer="adamw", weight_decay=0.3, lr=0.1), progress=False)
    assert w1.compiles == 1 and w2.compiles == 0
    assert not np.array_equal(w1.params["V"], w2.params["V"])


def test_sweep_over_windows_and_activations_compiles_once(frame):
    preps = [prepare(frame, Config(**{**BASE, "window": w, "hidden": 6})) for w in (4, 8, 12)]
    shapes = shape_plan(preps)
    assert shapes == {"window": 12, "rows": 500,
                      "n_train": max(len(p.starts["train"]) for p in preps),
                      "n_val": max(len(p.starts["val"]) for p in preps)}
    total = 0
    for p in preps:
        for act in ("tanh", "relu", "linear"):
            total += train(p, p.config.replace(activation=act, epochs=1), shapes=shapes,
                           progress=False).compiles
    assert total == 1


@pytest.mark.parametrize("mode", ["many-to-one", "many-to-many"])
def test_padding_window_and_counts_changes_nothing(frame, mode):
    # Masking padded steps (state held, no loss term) is the standard way to batch sequences
    # of unequal length (common practice, no source): results equal the unpadded run.
    cfg = Config(**{**BASE, "mode": mode, "epochs": 3})
    p = prepare(frame, cfg)
    plain = train(p, cfg, progress=False)
    shapes = {"window": 11, "n_train": len(p.starts["train"]) + 45,
              "n_val": len(p.starts["val"]) + 9, "rows": len(p.inputs) + 30}
    padded = train(p, cfg, shapes=shapes, progress=False)
    for k in plain.params:
        np.testing.assert_allclose(padded.params[k], plain.params[k], **PADDED32)
    np.testing.assert_allclose(padded.history.val_loss, plain.history.val_loss, **PADDED32)
    np.testing.assert_allclose(evaluate(plain.params, p, "test", shapes=shapes),
                               evaluate(plain.params, p, "test"), **PADDED32)


def test_mask_free_program_equals_the_masked_one(frame):
    # An unpadded run trains with the mask-free program; the same run given its own shapes
    # (as a sweep gives them) with the masked one that sweeps share. Fillers of the last
    # minibatch count zero either way: same history and parameters to rounding.
    from rnnkit.training._train import _mask_free

    cfg = Config(**{**BASE, "epochs": 3})
    p = prepare(frame, cfg)
    assert _mask_free(p, cfg, None) and not _mask_free(p, cfg, shape_plan([p]))
    assert len(p.starts["train"]) % cfg.batch_size  # the last minibatch holds fillers
    free = train(p, cfg, progress=False)
    masked = train(p, cfg, shapes=shape_plan([p]), progress=False)
    for k in free.params:
        np.testing.assert_allclose(free.params[k], masked.params[k], **EXACT32)
    for col in ("train_loss", "val_loss", "grad_norm"):
        np.testing.assert_allclose(free.history[col], masked.history[col], **EXACT32)
    # one program each, both cached
    assert train(p, cfg, progress=False).compiles == 0
    assert train(p, cfg, shapes=shape_plan([p]), progress=False).compiles == 0
    # large batch x hidden keeps the masked program (measured faster there)
    assert not _mask_free(p, cfg.replace(batch_size=128, hidden=256), None)


def test_shuffle_order_equals_numpy_stable_argsort():
    # The epoch's shuffle sorts the values alone and places each entry by binary search,
    # falling back to the stable argsort on equal values; NumPy's stable argsort is the
    # reference, with and without ties, fillers last in place.
    from rnnkit.training._epoch import stable_order

    rng = np.random.default_rng(0)
    order = jax.jit(stable_order)
    for n_entries, n, high in ((64, 64, 2 ** 31), (64, 50, 2 ** 31), (200, 130, 40), (7, 0, 9)):
        bits = rng.integers(0, high, n_entries).astype(np.uint32)  # high=40: many ties
        keyed = np.where(np.arange(n_entries) < n, bits, np.uint32(0xFFFFFFFF))
        expected = np.argsort(keyed, kind="stable")
        np.testing.assert_array_equal(order(bits, np.int32(n)), expected)


def test_same_config_and_seed_is_bitwise_repeatable(frame):
    p, cfg, a = run(frame, epochs=3)
    b = train(p, cfg, progress=False)
    for k in a.params:
        np.testing.assert_array_equal(a.params[k], b.params[k])
    pd.testing.assert_frame_equal(a.history.drop(columns="seconds"), b.history.drop(columns="seconds"))
    c = train(p, cfg.replace(seed=1), progress=False)
    assert not np.array_equal(a.params["V"], c.params["V"])


def test_huge_learning_rate_diverges_without_exception(frame):
    p, cfg, out = run(frame, epochs=20, optimizer="sgd", lr=10.0, clip=None, activation="linear",
                      batch_size=8)
    assert out.status == "diverged at epoch 1" and len(out.history) == 1 and out.best_epoch == 0
    for k, v in initial_params(p, cfg).items():  # the initial parameters come back
        np.testing.assert_array_equal(out.params[k], np.asarray(v))


def test_divergence_later_keeps_the_best_finite_epoch():
    # The per-epoch verdict on its own: a non-finite epoch never becomes the best, and the
    # user's stop and patience are only looked at after divergence and improvement.
    rows = [{"epoch": e, "train_loss": 1.0, "val_loss": v, "grad_norm": 1.0}
            for e, v in enumerate([0.5, 0.3, 0.4, np.nan, 0.1], start=1)]
    best, verdicts = (np.inf, 0, "p0"), []
    for row, finite in zip(rows, [True, True, True, True, False]):
        best, status = _judge(row, finite, True, best, f"p{row['epoch']}", patience=5, stop=None)
        verdicts.append(status)
        if status != "ok":
            break
    assert verdicts == ["ok", "ok", "ok", "diverged at epoch 4"] and best == (0.3, 2, "p2")
    stop = threading.Event()
    stop.set()
    assert _judge(rows[0], False, True, (np.inf, 0, "p0"), "p1", 5, stop)[1] == "diverged at epoch 1"
    assert _judge(rows[2], True, True, (0.3, 2, "p2"), "p3", 1, stop)[1] == "stopped early at epoch 3"
    assert _judge(rows[1], True, True, (0.5, 1, "p1"), "p2", 1, stop) == ((0.3, 2, "p2"),
                                                                          "stopped by user at epoch 2")


def test_early_stopping_restores_the_best_epoch():
    df = linear_system(noise=0.5, seed=2)
    p, cfg, out = run(df, epochs=60, lr=0.05, patience=2)
    h = out.history
    assert out.status == f"stopped early at epoch {len(h)}" and len(h) < 60
    assert out.best_epoch == len(h) - 2 == int(h.epoch[h.val_loss.idxmin()])
    recorded = float(h.val_loss[h.epoch == out.best_epoch].iloc[0])
    np.testing.assert_allclose(val_loss_of(out.params, p, cfg), recorded, **EXACT32)


def test_one_full_batch_epoch_is_one_optax_adam_step(frame):
    # Reference library: optax. One epoch with a batch larger than the training set is one
    # step of optax.adam (after clip_by_global_norm) on the mean loss over all windows.
    cfg = Config(**{**BASE, "epochs": 1, "batch_size": 1024, "dtype": "float64"})
    p = prepare(frame, cfg)
    params = initial_params(p, cfg)
    x, y, _ = p.windows("train")
    grads = jax.jit(jax.grad(model_loss), static_argnames=("activation", "mode"))(
        params, x, y, activation="tanh", mode="many-to-one")
    norm = float(optax.tree.norm(grads))
    assert norm > 1.0
    compiles = []
    for clip, lr in ((1.0, 0.01), (1e6, 0.03)):  # the gradient is clipped, then not
        out = train(p, cfg.replace(clip=clip, lr=lr), progress=False)
        ref = optax.chain(optax.clip_by_global_norm(clip), optax.adam(lr))
        updates, _ = ref.update(grads, ref.init(params), params)
        expected = optax.apply_updates(params, updates)
        for k in expected:
            np.testing.assert_allclose(out.params[k], np.asarray(expected[k]), **EXACT64)
        np.testing.assert_allclose(out.history.grad_norm[0], norm, **EXACT64)
        assert out.params["U"].dtype == np.float64
        compiles.append(out.compiles)
    assert compiles[1] == 0  # a new clipping norm and learning rate are data


def test_float64_config_trains_in_float64_without_global_x64(frame):
    p, cfg, ref = run(frame, epochs=2, dtype="float64", batch_size=1024)
    with jax.enable_x64(False):
        out = train(p, cfg, progress=False)
    assert out.params["W"].dtype == np.float64
    for k in ref.params:
        np.testing.assert_array_equal(out.params[k], ref.params[k])


def test_stop_event_ends_after_the_current_epoch(frame):
    stop, seen = threading.Event(), []

    def on_epoch(row):
        seen.append(row)
        if row["epoch"] == 2:
            stop.set()

    cfg = Config(**{**BASE, "epochs": 10, "patience": None})
    p = prepare(frame, cfg)
    out = train(p, cfg, stop=stop, on_epoch=on_epoch, progress=False)
    assert out.status == "stopped by user at epoch 2" and len(out.history) == 2
    assert [r["epoch"] for r in seen] == [1, 2]
    assert seen[1] == out.history.iloc[1].to_dict() | {"epoch": 2}


def basic_motions(n_cases=30):
    """aeon's BasicMotions (shipped open data), cut to unequal lengths to exercise end padding."""
    from aeon.datasets import load_basic_motions
    X, labels = load_basic_motions(split="train")  # (40, 6, 100)
    frames = []
    for k in range(n_cases):
        length = 30 + (k * 17) % 50
        frames.append(pd.DataFrame({"case": f"c{k:02d}", "ax": X[k, 0, :length],
                                    "ay": X[k, 1, :length], "motion": labels[k]}))
    return pd.concat(frames, ignore_index=True)


def test_whole_sequences_with_end_padding():
    cfg = Config(target="motion", features=("ax", "ay"), task="classification", window="full",
                 group_column="case", hidden=8, batch_size=8, epochs=6, patience=None, lr=0.02)
    p = prepare(basic_motions(), cfg)
    assert len(set(p.lengths["val"])) > 1  # unequal lengths: the gather pads at the end
    from rnnkit.training._train import _mask_free
    assert not _mask_free(p, cfg, None)  # padded steps must hold the state: the masked program
    out = train(p, cfg, progress=False)
    h = out.history
    assert h.train_loss.iloc[-1] < h.train_loss.iloc[0]
    recorded = float(h.val_loss[h.epoch == out.best_epoch].iloc[0])
    np.testing.assert_allclose(val_loss_of(out.params, p, cfg), recorded, **EXACT32)
    x, _, mask = p.windows("val")
    expected = np.asarray(model_outputs(out.params, x, activation="tanh", mask=mask))[:, -1]
    np.testing.assert_allclose(evaluate(out.params, p, "val", batch_size=3), expected, **EXACT32)


@pytest.mark.parametrize("mode", ["many-to-one", "many-to-many"])
def test_evaluate_equals_the_model_on_materialised_windows(frame, mode):
    cfg = Config(**{**BASE, "mode": mode})
    p = prepare(frame, cfg)
    params = initial_params(p, cfg)
    x, _, _ = p.windows("test")
    expected = np.asarray(model_outputs(params, x, activation="relu"))
    expected = expected[:, -1] if mode == "many-to-one" else expected
    got = evaluate(params, p, "test", "relu", batch_size=16)
    assert got.shape == expected.shape
    np.testing.assert_allclose(got, expected, **EXACT32)


def test_bad_arguments_name_the_field(frame):
    cfg = Config(**BASE)
    p = prepare(frame, cfg)
    with pytest.raises(ValueError, match=r"shapes\['window'\]"):
        train(p, cfg, shapes={"window": 3}, progress=False)
    with pytest.raises(ValueError, match="unknown key"):
        train(p, cfg, shapes={"steps": 30}, progress=False)
    with pytest.raises(ValueError, match="config.window"):
        train(p, cfg.replace(window=12), progress=False)
    with pytest.raises(TypeError, match="stop"):
        train(p, cfg, stop=True, progress=False)
    with pytest.raises(ValueError, match="split"):
        evaluate(initial_params(p, cfg), p, "holdout")
    with pytest.raises(ValueError, match="prepareds"):
        shape_plan([])


@pytest.mark.parametrize("name, reference", [
    ("sgd", lambda lr: optax.sgd(lr)),
    ("momentum", lambda lr: optax.sgd(lr, momentum=0.9)),
    ("rmsprop", lambda lr: optax.rmsprop(lr)),
    ("adam", lambda lr: optax.adam(lr)),
    ("adamw", lambda lr: optax.adamw(lr, weight_decay=0.2)),
])
def test_injected_optimizers_equal_optax_own(name, reference):
    # Reference library: optax. Two steps of our injected, clipped optimizer equal optax's own
    # chain(clip_by_global_norm, optimizer) built with constant hyperparameters.
    rng = np.random.default_rng(0)
    params = {"U": rng.standard_normal((2, 3)), "c": rng.standard_normal(1)}
    grads = [{k: 3 * rng.standard_normal(v.shape) for k, v in params.items()} for _ in range(2)]
    ours = make_optimizer(name, True, np.float64)(**hyperparams(name, 0.1, 0.5, 0.2, np.float64))
    ref = optax.chain(optax.clip_by_global_norm(0.5), reference(0.1))
    state_ours = init_state(name, 0.1, 0.5, 0.2, params)
    p_ours, p_ref, state_ref = dict(params), dict(params), ref.init(params)
    for g in grads:
        u, state_ours = ours.update(g, state_ours, p_ours)
        p_ours = optax.apply_updates(p_ours, u)
        u, state_ref = ref.update(g, state_ref, p_ref)
        p_ref = optax.apply_updates(p_ref, u)
    for k in params:
        np.testing.assert_allclose(p_ours[k], p_ref[k], **EXACT64)
