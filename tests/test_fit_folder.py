"""Saved fits: the path always holds a complete fit; a manifest of SHA-256 digests and
consistency checks make load_fit refuse a damaged or edited folder, naming the file."""
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from rnnkit import Config, fit, load_fit
from rnnkit.fitting import _fit_io

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def trained():
    # Annual flow of the Nile at Aswan 1871-1970, the open data set shipped with statsmodels.
    df = sm.datasets.nile.load_pandas().data[["volume"]].astype(float)
    return fit(df, Config(target="volume", window=6, hidden=3, epochs=2, season=None), progress=False)


def _reseal(folder: Path) -> None:
    """Rewrite the manifest after an edit, as someone changing files by hand might."""
    (folder / "manifest.json").unlink()
    _fit_io._write_manifest(folder)


def test_manifest_lists_every_file_with_its_sha256(trained, tmp_path):
    import hashlib
    folder = tmp_path / "m"
    trained.save(folder)
    listed = json.loads((folder / "manifest.json").read_text())["files"]
    assert set(listed) == {p.name for p in folder.iterdir()} - {"manifest.json"}
    for name, entry in listed.items():
        # hashlib's SHA-256 of the bytes on disk (FIPS 180-4)
        assert entry["sha256"] == hashlib.sha256((folder / name).read_bytes()).hexdigest()


@pytest.mark.parametrize("damage, words", [
    (lambda f: (f / "weights.npz").write_bytes((f / "weights.npz").read_bytes()[:100]), "weights.npz.*bytes"),
    (lambda f: (f / "history.csv").unlink(), "history.csv.*missing"),
    (lambda f: (f / "manifest.json").unlink(), "manifest.json.*missing"),
    (lambda f: (f / "metrics.csv").write_bytes((f / "metrics.csv").read_bytes().replace(b"rnn", b"RNN")),
     "metrics.csv.*SHA-256"),
])
def test_damaged_files_are_named(trained, tmp_path, damage, words):
    folder = tmp_path / "m"
    trained.save(folder)
    damage(folder)
    with pytest.raises(ValueError, match=words):
        load_fit(folder)


def _edit_config(folder, edit):
    doc = json.loads((folder / "config.json").read_text())
    edit(doc)
    (folder / "config.json").write_text(json.dumps(doc))
    _reseal(folder)


@pytest.mark.parametrize("edit, words", [
    (lambda d: d["config"].update(window=3), "`window` is 3 in the config but the fit used 6"),
    (lambda d: d["data"]["scaler"]["mean"].__setitem__(0, float("nan")), "mean holds NaN"),
    (lambda d: d["data"]["scaler"]["scale"].__setitem__(0, 0.0), "scale must be finite and > 0"),
    (lambda d: d["config"].update(hidden=4), "weight shapes"),
])
def test_config_weights_and_scaler_must_agree(trained, tmp_path, edit, words):
    folder = tmp_path / "m"
    trained.save(folder)
    _edit_config(folder, edit)
    with pytest.raises(ValueError, match=words) as err:
        load_fit(folder)
    assert "config.json" in str(err.value) or "weights.npz" in str(err.value)


def test_truncated_weights_with_a_resealed_manifest_name_the_file(trained, tmp_path):
    folder = tmp_path / "m"
    trained.save(folder)
    (folder / "weights.npz").write_bytes((folder / "weights.npz").read_bytes()[:200])
    _reseal(folder)
    with pytest.raises(ValueError, match="weights.npz.*cannot be read"):
        load_fit(folder)


def test_saving_over_a_fit_leaves_no_temporary_folders(trained, tmp_path):
    folder = tmp_path / "m"
    trained.save(folder)
    trained.save(folder)
    assert [p.name for p in tmp_path.iterdir()] == ["m"]
    assert load_fit(folder).config == trained.config


def test_interrupted_between_renames_keeps_the_old_fit(trained, tmp_path, monkeypatch):
    folder = tmp_path / "m"
    trained.save(folder)
    before = (folder / "weights.npz").read_bytes()
    monkeypatch.setattr(_fit_io, "_exchange", lambda a, b: False)  # systems without renameat2
    real = os.rename
    calls = []

    def rename(a, b):
        calls.append((a, b))
        if len(calls) == 2:
            raise KeyboardInterrupt  # between moving the old fit aside and moving the new one in
        return real(a, b)
    monkeypatch.setattr(_fit_io.os, "rename", rename)
    with pytest.raises(KeyboardInterrupt):
        trained.save(folder)
    monkeypatch.setattr(_fit_io.os, "rename", real)
    assert (folder / "weights.npz").read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["m"]


_KILLED = """
import os, signal, sys
from rnnkit import load_fit
from rnnkit.fitting import _fit_io
res = load_fit(sys.argv[1])
_fit_io._exchange = lambda a, b: False
real, calls = os.rename, []
def rename(a, b):
    calls.append(a)
    if len(calls) == 2:
        os.kill(os.getpid(), signal.SIGKILL)  # killed between the two renames
    real(a, b)
_fit_io.os.rename = rename
res.save(sys.argv[1])
"""


def test_a_kill_between_renames_is_recovered_on_the_next_load(trained, tmp_path):
    folder = tmp_path / "m"
    trained.save(folder)
    script = tmp_path / "kill.py"
    script.write_text(textwrap.dedent(_KILLED))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, str(script), str(folder)], env=env, timeout=300,
                       capture_output=True, text=True)
    assert r.returncode == -9, r.stderr
    assert not folder.exists() and any(p.name.startswith(".m.old-") for p in tmp_path.iterdir())
    loaded = load_fit(folder)  # the old fit is put back first
    np.testing.assert_array_equal(loaded.params["V"], trained.params["V"])
    trained.save(folder)
    assert [p.name for p in tmp_path.iterdir() if p.name != "kill.py"] == ["m"]


def test_a_save_in_progress_elsewhere_is_left_alone(trained, tmp_path):
    folder = tmp_path / "m"
    trained.save(folder)
    gone = int(subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                              capture_output=True, text=True).stdout)
    busy = tmp_path / f".m.{os.getpid()}-abc.tmp"  # a live process writing a new fit
    dead = tmp_path / f".m.{gone}-def.tmp"  # left by a process that was killed
    busy.mkdir()
    dead.mkdir()
    load_fit(folder)
    assert busy.exists() and not dead.exists()
