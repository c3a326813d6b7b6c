"""The faces of the backtest: `rnnkit backtest` (report, results.csv) and plots.backtest_folds."""
import json

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle
from statsmodels.datasets import nile

from rnnkit import plots
from rnnkit.cli import main
from tolerances import METRIC


def test_cli_backtest_writes_report_and_per_fold_results(tmp_path, capsys):
    # statsmodels' nile: annual flow of the Nile at Aswan, 1871-1970.
    d = nile.load_pandas().data
    data = tmp_path / "nile.csv"
    pd.DataFrame({"year": d["year"].astype(int), "volume": d["volume"]}).to_csv(data, index=False)
    cfg = tmp_path / "cfg.json"
    cfg.write_text(json.dumps({"target": "volume", "time_column": "year", "window": 5, "hidden": 3,
                               "epochs": 2, "patience": None, "dtype": "float64"}))
    out = tmp_path / "out"
    code = main(["backtest", str(cfg), "--data", str(data), "--folds", "3", "--test-size", "10",
                 "--out", str(out), "--no-progress"])
    assert code == 0
    printed = capsys.readouterr().out
    assert "than persistence at the 5% level" in printed or "no evidence of a difference" in printed
    html = (out / "report.html").read_text()
    assert "data:image/png;base64," in html and "Verdicts" in html
    res = pd.read_csv(out / "results.csv")
    assert list(res.columns[:2]) == ["fold", "model"] and set(res.fold) == {1, 2, 3}
    # persistence per fold, computed independently with pandas: y_t - y_{t-1} on the last 30 years
    y = d["volume"]
    for k in (1, 2, 3):
        origin = 100 - 10 * (4 - k)
        err = (y - y.shift(1)).iloc[origin:origin + 10]
        row = res[(res.fold == k) & (res.model == "persistence")].iloc[0]
        np.testing.assert_allclose(row["test_mae"], err.abs().mean(), **METRIC)
    errors = pd.read_csv(out / "errors.csv")
    assert len(errors[errors.model == "rnn"]) == 30
    # bad input: one line on stderr, exit status 2
    assert main(["backtest", str(cfg), "--data", str(data), "--folds", "40", "--test-size", "10",
                 "--out", str(tmp_path / "o2"), "--no-progress"]) == 2
    assert "fewer `folds`" in capsys.readouterr().err


def test_backtest_folds_figure():
    per_fold = pd.DataFrame({"rnn": [1.0, 2.0, np.nan], "persistence": [1.5, 1.2, 1.1]},
                            index=pd.Index([1, 2, 3], name="fold"))
    fig = plots.backtest_folds(per_fold, column="test_rmse",
                               verdicts={"persistence": "no evidence of a difference"})
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    bars = [p for p in ax.patches if isinstance(p, Rectangle)]
    heights = sorted(round(b.get_height(), 6) for b in bars)
    assert heights == [1.0, 1.1, 1.2, 1.5, 2.0]  # the NaN bar is left out ...
    assert any(t.get_text() == "n/a" for t in ax.texts)  # ... and marked
    assert "no evidence of a difference" in ax.get_title(loc="left")
    with pytest.raises(ValueError, match="per_fold"):
        plots.backtest_folds(pd.DataFrame(), column="test_rmse")
    with pytest.raises(TypeError, match="column"):
        plots.backtest_folds(per_fold, column=3)


def test_backtest_view_shows_verdicts_and_bars():
    from rnnkit.notebook import backtest_view

    import rnnkit

    d = nile.load_pandas().data  # statsmodels' nile
    df = pd.DataFrame({"volume": d["volume"].to_numpy()})
    bt = rnnkit.backtest(df, rnnkit.Config(target="volume", window=5, hidden=3, epochs=2, patience=None,
                                           dtype="float64"), folds=3, test_size=10, progress=False)
    box = backtest_view(bt)
    for sentence in bt.comparison["verdict"]:
        assert sentence in box.verdicts.value
    assert bytes(box.figure.value[:4]) == b"\x89PNG"
    assert "rnnkit-fig-backtest" in box.figure._dom_classes
    assert "persistence" in box.table.value
    with pytest.raises(TypeError, match="BacktestResult"):
        backtest_view(bt.metrics)
