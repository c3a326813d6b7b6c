"""The command line: every command runs end to end; bad input exits 2 with one line."""
import json
import subprocess
import sys

import pytest

import rnnkit
from rnnkit.cli import main, read_data


def _run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "rnnkit", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=600)


@pytest.fixture(scope="module")
def data_csv(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    df = rnnkit.datasets.cold_storage_load(years=40 / 365)
    path = d / "load.csv"
    df.to_csv(path)  # the time index is written as the first column
    cfg = rnnkit.Config(target="load_kw", window=12, hidden=6, epochs=2, missing="interpolate")
    rnnkit.save_config(cfg, d / "config.json")
    return d, path, df


@pytest.mark.parametrize("cmd", [[], ["demo"], ["fit"], ["sweep"], ["check-gradients"], ["forecast"]])
def test_help_on_every_command(cmd, capsys):
    with pytest.raises(SystemExit) as e:
        main([*cmd, "--help"])
    assert e.value.code == 0
    assert "usage: rnnkit" in capsys.readouterr().out


def test_help_from_the_installed_entry_point():
    r = _run("--help")
    assert r.returncode == 0, r.stderr
    assert "usage: rnnkit" in r.stdout


def test_read_data_restores_time_index(data_csv):
    d, path, df = data_csv
    back = read_data(str(path))
    assert str(back.index.dtype).startswith("datetime64")
    assert list(back.columns) == list(df.columns)
    assert len(back) == len(df)


def test_fit_writes_model_and_report(data_csv, tmp_path, capsys):
    d, path, df = data_csv
    rc = main(["fit", str(d / "config.json"), "--data", str(path), "--out", str(tmp_path),
               "--no-progress"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "persistence" in out and "status:" in out
    loaded = rnnkit.load_fit(tmp_path / "model")
    assert loaded.config.window == 12
    html = (tmp_path / "report.html").read_text()
    assert html.count("data:image/png;base64,") >= 4


def test_sweep_resumes_from_store(data_csv, tmp_path, capsys):
    d, path, df = data_csv
    space = {"config": json.loads((d / "config.json").read_text())["config"],
             "space": {"window": [8, 12]}, "seeds": 1}
    (tmp_path / "space.json").write_text(json.dumps(space))
    args = ["sweep", str(tmp_path / "space.json"), "--data", str(path), "--store",
            str(tmp_path / "runs.db"), "--out", str(tmp_path / "o"), "--no-progress"]
    assert main(args) == 0
    first = (tmp_path / "o" / "results.csv").read_text()
    assert main(args) == 0  # second run finds both runs in the store
    assert (tmp_path / "o" / "results.csv").read_text().count("\n") == first.count("\n")
    best = rnnkit.load_config(tmp_path / "o" / "best-config.json")
    assert best.window in (8, 12)


def test_check_gradients_agree(data_csv, capsys):
    d, path, df = data_csv
    rc = main(["check-gradients", str(d / "config.json"), "--data", str(path), "--windows", "2"])
    assert rc == 0, capsys.readouterr().err
    assert "gradients agree" in capsys.readouterr().out


@pytest.mark.parametrize("args, words", [
    (["fit", "missing.json", "--data", "x.csv"], "missing.json"),
    (["sweep", "nope.json", "--data", "x.csv"], "nope.json"),
])
def test_missing_files_exit_2(args, words, tmp_path):
    r = _run(*args, cwd=tmp_path)
    assert r.returncode == 2
    assert words in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_bad_data_exits_2_with_one_line(data_csv, tmp_path):
    d, path, df = data_csv
    bad = tmp_path / "bad.csv"
    df.drop(columns=["load_kw"]).to_csv(bad)
    r = _run("fit", str(d / "config.json"), "--data", str(bad), "--out", str(tmp_path / "o"),
             "--no-progress")
    assert r.returncode == 2
    assert "load_kw" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_unknown_space_key_is_refused(data_csv, tmp_path):
    d, path, df = data_csv
    (tmp_path / "s.json").write_text(json.dumps({"space": {"window": [8]}, "sedes": 2}))
    r = _run("sweep", str(tmp_path / "s.json"), "--data", str(path))
    assert r.returncode == 2 and "sedes" in r.stderr


def test_demo_quick_writes_everything(tmp_path):
    r = _run("demo", "--quick", "--out", str(tmp_path / "demo"), "--no-progress")
    assert r.returncode == 0, r.stderr[-2000:]
    out = tmp_path / "demo"
    for name in ("results.csv", "best-config.json", "report.html", "forecast.csv"):
        assert (out / name).is_file(), name
    assert "<h2>Forecast</h2>" in (out / "report.html").read_text()
    cfg = rnnkit.load_config(out / "best-config.json")
    assert cfg.target == "load_kw"
    assert "val_rmse" in r.stdout


def test_forecast_command_writes_the_future_rows(data_csv, tmp_path, capsys):
    import numpy as np
    import pandas as pd

    d, path, df = data_csv
    cfg = rnnkit.Config(target="load_kw", window=12, hidden=4, epochs=2, horizon=6, missing="interpolate")
    rnnkit.fit(df.iloc[:-6], cfg, progress=False).save(tmp_path / "model")
    frame = df.copy()
    frame.iloc[-6:, frame.columns.get_loc("load_kw")] = np.nan  # future rows: inputs known, target empty
    frame.to_csv(tmp_path / "recent.csv")
    out = tmp_path / "f.csv"
    assert main(["forecast", str(tmp_path / "model"), "--data", str(tmp_path / "recent.csv"),
                 "--out", str(out)]) == 0
    back = pd.read_csv(out, index_col=0, parse_dates=True)
    assert list(back.index) == list(df.index[-6:])
    assert list(back.columns) == ["lead", "forecast", "lower_80", "upper_80", "lower_95", "upper_95",
                                  "calibrated"]
    assert "wrote" in capsys.readouterr().out
    assert main(["forecast", str(tmp_path / "model"), "--data", str(tmp_path / "recent.csv"),
                 "--out", str(tmp_path / "f.txt")]) == 2
    assert ".csv" in capsys.readouterr().err
    # more steps than rows of future inputs: one line naming what is missing
    assert main(["forecast", str(tmp_path / "model"), "--data", str(tmp_path / "recent.csv"),
                 "--steps", "9", "--out", str(out)]) == 2
    assert "future row" in capsys.readouterr().err


def test_the_report_compares_cells_when_a_sweep_varied_them():
    import statsmodels.api as sm

    from rnnkit.cli._report import cell_comparison

    # statsmodels' Nile series (open data shipped in the package)
    df = sm.datasets.nile.load_pandas().data[["volume"]]
    sw = rnnkit.sweep(df, rnnkit.Config(target="volume", window=6, hidden=3, epochs=2),
                      {"cell": ["elman", "gru"]}, progress=False)
    table, sentence = cell_comparison(sw)
    s = sw.summary()
    assert list(table["cell"]) == list(s["cell"])  # ranked, one row per cell
    assert table[sw.metric].tolist() == s[sw.metric].tolist()
    assert sentence.startswith(f"Best cell: {s['cell'].iloc[0]}") and "best baseline" in sentence
    base = table["best baseline"].iloc[0]
    assert table[f"baseline {sw.metric}"].iloc[0] == s[f"{base}_{sw.metric}"].iloc[0]
    assert cell_comparison(rnnkit.sweep(df, rnnkit.Config(target="volume", window=6, hidden=3, epochs=2),
                                        {"hidden": [2, 3]}, progress=False)) is None
