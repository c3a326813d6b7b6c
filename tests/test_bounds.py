"""Bounds on every number from a file or the command line, and strict JSON reading."""
import json
import os

import pytest

import rnnkit
from rnnkit import Config, load_config
from rnnkit.cli import main
from rnnkit.cli._main import _capped_workers
from rnnkit.sweeps._export import validate
from rnnkit.sweeps._plan import plan
from rnnkit.sweeps._runner import pool_size, usable_cores


@pytest.mark.parametrize("field, value", [
    ("window", 10**30), ("window", 100_001), ("horizon", 10**30), ("gap", 10**30),
    ("season", 10**30), ("hidden", 10**30), ("epochs", 10**30), ("batch_size", 10**30),
    ("patience", 10**30)])
def test_huge_numbers_are_refused_by_config_and_schema(field, value):
    base = {"group_column": "g", "target_as_input": False}
    with pytest.raises(ValueError, match=f"`{field}`"):
        Config(**base, **{field: value})
    with pytest.raises(ValueError, match=f"\\$.{field}"):
        validate({**base, field: value}, part="config")


def test_the_largest_allowed_values_are_accepted():
    c = Config(window=100_000, horizon=100_000, season=100_000, gap=100_000_000, epochs=100_000)
    assert c.window == 100_000 and c.gap == 100_000_000


def test_seeds_and_samples_are_bounded():
    with pytest.raises(ValueError, match="`seeds`"):
        plan(Config(), {"hidden": [4]}, seeds=10**30)
    with pytest.raises(ValueError, match="`seeds` lists 1001"):
        plan(Config(), {"hidden": [4]}, seeds=list(range(1001)))
    with pytest.raises(ValueError, match="`n_samples`"):
        plan(Config(), {"hidden": [4, 8]}, strategy="random", n_samples=10**30)
    with pytest.raises(ValueError, match="`workers`"):
        rnnkit.sweep(rnnkit.datasets.cold_storage_load(years=0.05), Config(), {"hidden": [4]},
                     workers=10**6, progress=False)


def test_workers_are_capped_at_runs_and_cores_with_a_note(capsys):
    assert pool_size(1000, 8) == min(8, usable_cores())
    assert pool_size(4, 1) == 1
    n = _capped_workers(1000, Config(), {"hidden": [4, 8]}, {"seeds": 2})
    assert n == min(4, usable_cores())
    assert "--workers 1000 capped to" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["sweep", "s.json", "--data", "d.csv", "--workers", "100000"])
    assert "--workers must be from 1 to 1024" in capsys.readouterr().err


def _write(path, data: bytes):
    path.write_bytes(data)
    return path


@pytest.mark.parametrize("name, data, words", [
    ("deep.json", b'{"config": {"hidden": 8}, "notes": ' + b"[" * 100 + b"]" * 100 + b"}", "deeper than 32"),
    ("dup.json", b'{"hidden": 8, "hidden": 16}', "'hidden' appears twice"),
    ("latin1.json", '{"target": "Größe"}'.encode("latin-1"), "not UTF-8"),
    ("nan.json", b'{"lr": NaN}', "NaN is not valid JSON"),
])
def test_bad_json_documents_are_refused_naming_the_file(tmp_path, name, data, words, capsys):
    path = _write(tmp_path / name, data)
    with pytest.raises(ValueError, match=words) as err:
        load_config(path)
    assert name in str(err.value)
    # the same files as a sweep's space file on the command line: exit 2, one line naming the file
    assert main(["sweep", str(path), "--data", "d.csv"]) == 2
    msg = capsys.readouterr().err.strip()
    assert name in msg and len(msg.splitlines()) == 1


def test_a_depth_inside_strings_does_not_count(tmp_path):
    path = save = rnnkit.save_config(Config(hidden=8), tmp_path / "c.json", notes="[" * 100 + "{" * 50)
    assert load_config(path) == Config(hidden=8) and save.exists()


@pytest.mark.skipif(not os.path.exists("/dev/zero"), reason="needs /dev/zero")
def test_non_regular_files_are_refused(tmp_path, capsys):
    link = tmp_path / "zero.json"
    link.symlink_to("/dev/zero")
    for path in (link, tmp_path):
        with pytest.raises(ValueError, match="is not a regular file") as err:
            load_config(path)
        assert str(path) in str(err.value)
    assert main(["sweep", str(link), "--data", "d.csv"]) == 2
    assert "zero.json" in capsys.readouterr().err


def test_a_plain_sweep_file_still_reads(tmp_path):
    path = tmp_path / "s.json"
    path.write_text(json.dumps({"space": {"window": [8]}, "seeds": 2}))
    from rnnkit.cli._main import read_space
    config, space, options = read_space(str(path))
    assert space == {"window": [8]} and options == {"seeds": 2}
