"""Training programs kept whole on disk (rnnkit/training/_stored.py).

The cross-process behaviour (a second process loads, damage is compiled
again) is in tests/test_compilation_cache.py; here, in one process: what makes
a new entry, what is never kept, and a loaded entry that cannot run.
"""
import gc
import os
import weakref

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import rnnkit
from rnnkit.training import _cache, _stored


@pytest.fixture
def folder(tmp_path, monkeypatch):
    monkeypatch.delenv(_stored.ENV, raising=False)  # kept on disk: the default (see _stored.on_disk)
    before = _cache.cache_dir()
    rnnkit.compilation_cache(tmp_path / "programs")
    yield tmp_path / "programs"
    rnnkit.compilation_cache(before if before is not None else None)


def _program(fn, key):
    return _stored.StoredProgram(lambda: jax.jit(fn), key)


def _whole(folder):
    return sorted(folder.glob("whole-*-rnnkit"))


def test_one_entry_per_signature_and_memory_first(folder):
    traced = []

    def f(x, y):
        traced.append(1)
        return jnp.tanh(x) @ y

    p = _program(f, ("test", "tanh-matmul"))
    x, y = np.ones((3, 2), np.float32), np.ones((2, 4), np.float32)
    before = _stored.counts()
    np.testing.assert_allclose(p(x, y), np.tanh(x) @ y, rtol=1e-6)
    p(x, y)  # memory: no second trace
    assert len(traced) == 1 and len(_whole(folder)) == 1
    p(np.ones((5, 2), np.float32), y)  # another shape: another entry
    assert len(traced) == 2 and len(_whole(folder)) == 2
    with jax.enable_x64(True):  # a setting that changes the trace: another entry
        p(x.astype(np.float64), y.astype(np.float64))
    assert len(_whole(folder)) == 3
    after = _stored.counts()
    assert after["compiled"] - before["compiled"] == 3 and after["written"] - before["written"] == 3

    # A new process is a new StoredProgram with an empty memory: it loads, it does not trace.
    again = _program(f, ("test", "tanh-matmul"))
    np.testing.assert_allclose(again(x, y), np.tanh(x) @ y, rtol=1e-6)
    assert len(traced) == 3  # loaded: not traced again
    assert _stored.counts()["loaded"] - after["loaded"] == 1


def test_the_key_and_the_installation_name_the_entry(monkeypatch):
    p = _program(lambda x: x + 1, ("test", "plus-one"))
    sig = (jax.tree.structure((1,)), ((3,), "float32", False), _stored._settings())
    name = p._entry(sig)
    assert _program(lambda x: x + 1, ("test", "plus-two"))._entry(sig) != name  # another key
    monkeypatch.setitem(_stored._FINGERPRINT, "value", "an edited rnnkit or another machine")
    assert p._entry(sig) != name
    # the fingerprint digests rnnkit's own source: a changed line changes it
    assert len(_stored._source_digest()) == 32


def test_a_loaded_entry_that_cannot_run_is_compiled_again(folder):
    x = np.arange(4, dtype=np.float32)
    good = _program(lambda v: v * 2.0, ("test", "double"))
    good(x)
    [entry] = _whole(folder)
    # Put a loadable but wrong program (another signature) under the same name: a stale entry.
    other = jax.jit(lambda a, b: a + b).lower(x, x).compile()
    store = _cache.CheckedFiles(folder)
    assert _stored._save(store, entry.name[:-len("-rnnkit")], other)

    fresh = _program(lambda v: v * 2.0, ("test", "double"))
    before = _stored.counts()
    np.testing.assert_array_equal(fresh(x), x * 2.0)  # the first call failed, was compiled again
    after = _stored.counts()
    assert after["loaded"] - before["loaded"] == 1 and after["compiled"] - before["compiled"] == 1
    # ... and the entry now holds the right program
    np.testing.assert_array_equal(_program(lambda v: v * 2.0, ("test", "double"))(x), x * 2.0)
    assert _stored.counts()["compiled"] == after["compiled"]


def test_a_loaded_program_keeps_no_argument_of_its_first_call(folder):
    # The first call's arrays (in a fit, the whole series) must not live as long as the program.
    _program(lambda v: v - 3.0, ("test", "minus-three"))(np.zeros(5, np.float32))  # writes the entry
    loaded = _program(lambda v: v - 3.0, ("test", "minus-three"))
    big = np.arange(5, dtype=np.float32)
    gone = weakref.ref(big)
    before = _stored.counts()
    np.testing.assert_array_equal(loaded(big), big - 3.0)
    assert _stored.counts()["loaded"] - before["loaded"] == 1
    del big
    gc.collect()
    assert gone() is None


def test_programs_that_call_the_host_are_not_kept(folder):
    def f(x):
        return jax.pure_callback(lambda a: np.asarray(a) * 3, jax.ShapeDtypeStruct(x.shape, x.dtype), x)

    p = _program(f, ("test", "callback"))
    np.testing.assert_array_equal(p(np.ones(3, np.float32)), np.full(3, 3.0, np.float32))
    assert _whole(folder) == []


def test_off_keeps_programs_in_memory_only(tmp_path):
    before = _cache.cache_dir()
    rnnkit.compilation_cache(None)
    try:
        p = _program(lambda v: v - 1.0, ("test", "minus"))
        c0 = _stored.counts()
        p(np.ones(2, np.float32))
        p(np.ones(2, np.float32))
        c1 = _stored.counts()
        assert c1["compiled"] - c0["compiled"] == 1 and c1["written"] == c0["written"]
    finally:
        rnnkit.compilation_cache(before if before is not None else None)


def test_jax_disable_jit_runs_the_python_function(folder):
    seen = []

    def f(v):
        seen.append(type(v))
        return v + 1

    p = _program(f, ("test", "eager"))
    with jax.disable_jit():
        np.testing.assert_array_equal(p(np.zeros(2, np.float32)), np.ones(2, np.float32))
    assert _whole(folder) == [] and seen and seen[0] is not jax.core.Tracer


def test_fresh_compiles_keep_jax_store_out(folder):
    store = _cache.CheckedFiles(folder)
    assert store.put("k", b"bytes") and store.get("k") == b"bytes"
    with _cache.fresh_compiles():
        assert store.get("k") is None and store.put("k2", b"x") is False
    assert store.get("k") == b"bytes" and store.get("k2") is None


def _fresh_program(key):
    """A program whose jitted function is a new function object each time it is built (as
    rnnkit's builders make theirs), so jax's caches keyed on it let go when it is rebuilt."""
    def build():
        def f(x):
            return jnp.cumsum(jnp.tanh(x) * 2.0, axis=0) @ x.T
        return jax.jit(f)
    return _stored.StoredProgram(build, key)


def test_compiled_forms_are_kept_within_the_bound_least_recently_used_first(monkeypatch):
    monkeypatch.setattr(_stored, "KEPT", 4)
    a, b, c = (_fresh_program(("test", "bound", k)) for k in "abc")
    x = [np.ones((n, 2), np.float32) for n in range(1, 7)]
    for v in x[:2]:
        a(v)
    for v in x[:2]:
        b(v)
    assert len(a._compiled) == 2 and len(b._compiled) == 2
    a(x[0])  # a is now the more recently used
    before = _stored.counts()
    c(x[0])  # 5 forms: b, used longest ago, lets its two go
    assert len(a._compiled) == 2 and len(b._compiled) == 0 and len(c._compiled) == 1
    assert _stored.counts()["dropped"] - before["dropped"] == 2
    for v in x:  # one program past the bound alone keeps the newest form
        np.testing.assert_allclose(c(v), np.cumsum(np.tanh(v) * 2, axis=0) @ v.T, rtol=1e-5)
    held = sum(len(p._compiled) for p in (a, b, c))
    assert held <= 4 and (6, 2) in [sig[1][0][0] for sig in c._compiled]
    # a program that let its forms go still answers (compiled again)
    np.testing.assert_allclose(b(x[1]), np.cumsum(np.tanh(x[1]) * 2, axis=0) @ x[1].T, rtol=1e-5)


@pytest.mark.skipif(not os.path.exists("/proc/self/maps"), reason="memory mappings are read from Linux's /proc")
def test_memory_mappings_stop_growing_under_the_bound(monkeypatch):
    # Linux caps the mappings of one process (vm.max_map_count, 65,530 by default: the kernel's
    # Documentation/admin-guide/sysctl/vm.rst); past it, XLA crashes while compiling. Each compiled
    # program holds some; with the bound, compiling more distinct programs must not add more.
    def mappings():
        with open("/proc/self/maps") as f:
            return sum(1 for _ in f)

    monkeypatch.setattr(_stored, "KEPT", 3)
    programs = [_fresh_program(("test", "mappings", k)) for k in range(40)]
    v = np.ones((5, 3), np.float32)
    for p in programs[:10]:  # let the process settle (first compiles map shared pieces)
        p(v)
    gc.collect()
    settled = mappings()
    for p in programs[10:]:
        p(v)
    gc.collect()
    unbounded_guess = 30 * 5  # each program of this size holds well over 5 mappings
    assert mappings() - settled < unbounded_guess / 3, (mappings(), settled)


@pytest.mark.parametrize("n, dtype", [(1, "float32"), (7, "float32"), (32, "float32"), (32, "float64")])
def test_the_orthogonal_init_equals_jax_initializer_without_lapack(n, dtype):
    # The reference is jax.nn.initializers.orthogonal (QR of a standard-normal matrix by LAPACK,
    # R's diagonal made positive: Mezzadri 2007); ours gets the same Q by Householder reflections.
    from rnnkit.recurrent._cells import _orthogonal

    with jax.enable_x64(dtype == "float64"):
        for seed in range(3):
            key = jax.random.key(seed)
            ours = np.asarray(_orthogonal(key, n, jnp.dtype(dtype)))
            ref = np.asarray(jax.nn.initializers.orthogonal()(key, (n, n), jnp.dtype(dtype)))
            tol = 2e-6 if dtype == "float32" else 1e-13
            np.testing.assert_allclose(ours, ref, atol=tol)
            np.testing.assert_allclose(ours.T @ ours, np.eye(n), atol=tol)
        # ... and its program calls no library: a fresh process runs it without setting up LAPACK
        text = jax.jit(lambda k: _orthogonal(k, n, jnp.dtype(dtype))).lower(key).compile().as_text()
        assert "custom_call_target" not in text
