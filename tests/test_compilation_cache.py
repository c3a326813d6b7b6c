"""Compiled programs on disk (rnnkit/training/_cache.py): where, on/off, shared, damage-proof.

The cross-process checks run fresh Python processes with their own cache
folder (never the user's; tests/conftest.py gives the session its own folder).
Two kinds of entries share the folder: rnnkit's training programs kept whole
(rnnkit/training/_stored.py, "whole-*": neither traced nor lowered again,
counted by ``_stored.counts()``) and jax's entries for every other program
("A program was loaded, not compiled" read from jax's own monitoring events
/jax/compilation_cache/cache_hits and cache_misses, jax/_src/compiler.py).
"""
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import jax
import numpy as np
import pytest

import rnnkit
from rnnkit.sweeps import _runner
from rnnkit.training import _cache

ROOT = Path(__file__).resolve().parents[1]

# A fit of the demo data small enough for a test; prints what jax's cache did and the result.
PROBE = textwrap.dedent("""
    import json, sys
    import jax.monitoring
    events = {}
    jax.monitoring.register_event_listener(lambda e, **kw: events.__setitem__(e, events.get(e, 0) + 1))
    import rnnkit
    df = rnnkit.datasets.cold_storage_load(years=0.05)
    cfg = rnnkit.Config(target="load_kw", missing="interpolate", hidden=4, epochs=2, window=8)
    res = rnnkit.fit(df, cfg, progress=False)
    print(json.dumps({"hits": events.get("/jax/compilation_cache/cache_hits", 0),
                      "misses": events.get("/jax/compilation_cache/cache_misses", 0),
                      "whole": rnnkit.training._stored.counts(),
                      "folder": str(rnnkit.training._cache.cache_dir()),
                      "val_loss": res.history["val_loss"].tolist(),
                      "V": res.params["V"].tolist()}))
""")


def _probe(cache, *flags, env=None):
    e = {**os.environ, "PYTHONPATH": str(ROOT), **(env or {})}
    e.pop("JAX_COMPILATION_CACHE_DIR", None)
    if cache is not None:
        e[_cache.ENV] = str(cache)
    out = subprocess.run([sys.executable, *flags, "-c", PROBE], capture_output=True, text=True,
                         timeout=600, env=e, cwd=str(ROOT))
    assert out.returncode == 0, out.stderr[-3000:]
    return json.loads(out.stdout.strip().splitlines()[-1])


def _entries(folder):
    return sorted(Path(folder).glob("*-rnnkit"))


def _whole(folder):
    return sorted(Path(folder).glob("whole-*-rnnkit"))


def test_a_second_process_loads_the_programs_and_damage_is_compiled_again(tmp_path, monkeypatch):
    monkeypatch.delenv("RNNKIT_WHOLE_PROGRAMS", raising=False)  # whole programs on disk: the default
    cache = tmp_path / "programs"
    first = _probe(cache)
    assert first["folder"] == str(cache)
    # the init, epoch and outputs programs: compiled afresh and kept whole
    assert first["whole"]["loaded"] == 0 and first["whole"]["compiled"] >= 3
    assert first["whole"]["written"] == first["whole"]["compiled"] == len(_whole(cache))

    # A second process loads every kept program: nothing is traced, lowered or compiled.
    second = _probe(cache)
    assert second["whole"] == {"loaded": len(_whole(cache)), "compiled": 0, "written": 0,
                               "dropped": 0, "held": len(_whole(cache))}
    assert second["misses"] == 0  # nor does any other program miss jax's entries
    assert second["val_loss"] == first["val_loss"] and second["V"] == first["V"]
    files = sorted(_whole(cache), key=lambda f: -f.stat().st_size)

    # Damage: one entry cut short, one with bytes changed in the middle, one emptied. With
    # warnings as errors, a warning would fail the fit: none may come.
    for f, how in zip(files, ("truncate", "garble", "empty")):
        data = bytearray(f.read_bytes())
        if how == "truncate":
            data = data[:len(data) // 2]
        elif how == "garble":
            mid = len(data) // 2
            data[mid:mid + 64] = bytes(255 - b for b in data[mid:mid + 64])
        else:
            data = bytearray()
        f.write_bytes(bytes(data))
    damaged = min(len(files), 3)
    third = _probe(cache, "-W", "error")
    assert third["whole"]["loaded"] == len(files) - damaged
    assert third["whole"]["compiled"] == third["whole"]["written"] == damaged
    assert third["val_loss"] == first["val_loss"] and third["V"] == first["V"]
    # each damaged entry was replaced by a whole one, which the next process loads
    assert _probe(cache)["whole"]["loaded"] == len(files)

    # Programs that are not kept whole still go through jax's entries (same folder).
    kept_by_jax = [f for f in _entries(cache) if not f.name.startswith("whole-")]
    store = _cache.CheckedFiles(cache)
    assert all(store.get(f.name[:-len("-rnnkit")]) is not None for f in kept_by_jax)


def test_with_whole_programs_off_a_second_process_loads_through_jax_entries(tmp_path, monkeypatch):
    monkeypatch.setenv("RNNKIT_WHOLE_PROGRAMS", "0")
    cache = tmp_path / "programs"
    first = _probe(cache)
    assert first["whole"]["written"] == 0 and first["misses"] >= 2  # at least epoch and init
    second = _probe(cache)
    assert second["hits"] >= 2 and second["whole"]["loaded"] == 0 and not _whole(cache)
    assert second["val_loss"] == first["val_loss"] and second["V"] == first["V"]


def test_a_deleted_folder_is_made_again_and_off_writes_nothing(tmp_path):
    cache = tmp_path / "gone" / "programs"
    store = _cache.CheckedFiles(cache)
    store.put("k", b"compiled bytes")
    assert store.get("k") == b"compiled bytes" and store.get("other") is None
    import shutil

    shutil.rmtree(tmp_path / "gone")  # deleted while a process uses it
    assert store.get("k") is None  # a miss, not an error
    store.put("k", b"again")
    assert store.get("k") == b"again"
    assert [p.name for p in cache.iterdir()] == ["k-rnnkit"]  # no temp file left behind
    store.clear()
    assert store.get("k") is None

    off = _probe("off")
    assert off["folder"] == "None" and off["hits"] == 0 and off["misses"] == 0


@pytest.fixture
def restore_cache():
    before = _cache.cache_dir()
    yield
    rnnkit.compilation_cache(before if before is not None else None)


def test_the_switch_moves_and_turns_off_the_cache(tmp_path, restore_cache):
    assert rnnkit.compilation_cache is _cache.compilation_cache
    assert rnnkit.compilation_cache(tmp_path / "here") == tmp_path / "here"
    assert rnnkit.compilation_cache() == tmp_path / "here"  # asking changes nothing
    assert jax.config.jax_compilation_cache_dir == str(tmp_path / "here")
    assert _cache.cache_dir() == tmp_path / "here"
    # a new program goes into the new folder
    jax.jit(lambda x: x * 3.0 + 1.0).lower(np.ones(3)).compile()
    assert rnnkit.compilation_cache(None) is None
    assert jax.config.jax_compilation_cache_dir is None and rnnkit.compilation_cache() is None
    assert rnnkit.compilation_cache(True) == _cache.default_dir()  # the session's folder here
    assert rnnkit.compilation_cache(False) is None
    with pytest.raises(TypeError, match="`path`"):
        rnnkit.compilation_cache(3)
    with pytest.raises(ValueError, match="`path`"):
        rnnkit.compilation_cache("  ")


@pytest.mark.parametrize("platform, env, expected", [
    ("linux", {}, "{home}/.cache/rnnkit/programs"),
    ("linux", {"XDG_CACHE_HOME": "/xdg"}, "/xdg/rnnkit/programs"),
    ("linux", {"XDG_CACHE_HOME": "relative"}, "{home}/.cache/rnnkit/programs"),  # XDG: ignored
    ("darwin", {}, "{home}/Library/Caches/rnnkit/programs"),
    ("win32", {"LOCALAPPDATA": "/lad"}, "/lad/rnnkit/Cache/programs"),
    ("linux", {"RNNKIT_CACHE_DIR": "/mine"}, "/mine"),
    ("linux", {"RNNKIT_CACHE_DIR": "off"}, None),
    ("linux", {"RNNKIT_CACHE_DIR": ""}, None),
])
def test_the_default_folder_follows_the_platform(monkeypatch, tmp_path, platform, env, expected):
    for k in ("XDG_CACHE_HOME", "LOCALAPPDATA", "RNNKIT_CACHE_DIR"):
        monkeypatch.delenv(k, raising=False)
    for k, v in env.items():
        monkeypatch.setenv(k, v)
    monkeypatch.setattr(sys, "platform", platform)
    monkeypatch.setattr(Path, "home", staticmethod(lambda: tmp_path))
    got = _cache.default_dir()
    assert got == (None if expected is None else Path(expected.format(home=tmp_path)))


def test_a_cache_the_user_gave_jax_is_respected(tmp_path):
    code = ("import jax, rnnkit; from rnnkit.training import _cache; "
            "print(jax.config.jax_compilation_cache_dir, _cache.cache_dir())")
    env = {**os.environ, "PYTHONPATH": str(ROOT), "JAX_COMPILATION_CACHE_DIR": str(tmp_path / "theirs")}
    env.pop(_cache.ENV)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                         timeout=300, check=True)
    assert out.stdout.split() == [str(tmp_path / "theirs"), "None"]


def test_sweep_workers_share_the_cache_in_use(tmp_path, monkeypatch, restore_cache):
    rnnkit.compilation_cache(tmp_path / "shared")
    assert _runner._shared_compile_cache() == ({_cache.ENV: str(tmp_path / "shared")}, None)
    rnnkit.compilation_cache(None)  # off: a folder for the pool's lifetime
    env, temp = _runner._shared_compile_cache()
    try:
        assert temp is not None and env == {_cache.ENV: temp}
    finally:
        os.rmdir(temp)
    monkeypatch.setenv("JAX_COMPILATION_CACHE_DIR", str(tmp_path))
    assert _runner._shared_compile_cache() == ({}, None)
