"""backtest(): fold boundaries, per-fold baselines against pandas, tests against statsmodels."""
import numpy as np
import pandas as pd
import pytest
from aeon.datasets import load_airline, load_classification
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from statsmodels.stats.contingency_tables import mcnemar as sm_mcnemar

import rnnkit
from rnnkit.evaluation._significance import diebold_mariano
from rnnkit.fitting._backtest import group_folds, series_folds
from tolerances import EXACT64, METRIC

TINY = dict(hidden=3, epochs=2, patience=None, batch_size=16)


def _airline():
    """aeon's Airline series: 144 monthly passenger totals, 1949-01 .. 1960-12."""
    y = load_airline()
    return pd.DataFrame({"passengers": y},
                        index=pd.period_range("1949-01", periods=len(y), freq="M").to_timestamp())


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(n=st.integers(20, 400), folds=st.integers(1, 8), test_size=st.integers(1, 30),
       lookback=st.integers(0, 30), val=st.floats(0.05, 0.6),
       window=st.one_of(st.just("expanding"), st.integers(2, 300)), cover=st.integers(1, 4))
def test_no_training_or_scaling_row_at_or_after_its_folds_origin(n, folds, test_size, lookback, val, window,
                                                                 cover):
    # cover: rows one forecast's targets span (leads 1..cover); lookback 0 is what reach-back
    # test windows give (they read inputs from before the block)
    try:
        plan = series_folds(n, folds, test_size=test_size, lookback=lookback, val_fraction=val,
                            window=window, cover=cover)
    except rnnkit.DataError as e:
        if test_size < cover:
            assert "test_size" in str(e) and str(cover) in str(e)
        else:
            assert n - folds * test_size - lookback < 2 and "folds" in str(e)
        return
    assert test_size >= cover
    assert len(plan) == folds and plan[-1].end == n
    for k, f in enumerate(plan):
        train, valid, test = f.rows("train"), f.rows("val"), f.rows("test")
        # The scaler and the baselines are fitted on the training part; early stopping reads val.
        assert len(train) and len(valid)
        assert train.max() < f.origin and valid.max() < f.origin
        assert train.max() < valid.min() and valid.max() < test.min()
        assert test.min() == f.origin - lookback and test.max() == f.end - 1
        assert not (f.part[f.end:] != None).any()  # noqa: E711: nothing after the block is read
        assert f.end - f.origin == test_size
        if k:
            assert f.origin == plan[k - 1].end  # origins move forward block by block
        if window != "expanding":
            assert len(train) + len(valid) <= window
        # validation holds what one window's targets need whenever a training row is left for it
        assert len(valid) >= min(lookback + cover, len(train) + len(valid) - 1)


@settings(max_examples=60, deadline=None)
@given(sizes=st.lists(st.integers(1, 4), min_size=4, max_size=30), folds=st.integers(2, 4),
       seed=st.integers(0, 1000), classes=st.integers(0, 3))
def test_grouped_folds_test_every_sequence_once_and_never_train_on_it(sizes, folds, seed, classes):
    codes = np.repeat(np.arange(len(sizes)), sizes)
    strata = None if classes == 0 else np.arange(len(sizes)) % (classes + 1)
    try:
        plan = group_folds(codes, folds, val_fraction=0.2, seed=seed, strata=strata)
    except rnnkit.DataError:
        assert len(sizes) < folds + 2 or len(sizes) - (-(-len(sizes) // folds)) < 2
        return
    tested = np.zeros(len(sizes), int)
    for f in plan:
        for part in ("train", "val", "test"):
            seqs = np.unique(codes[f.rows(part)])
            # whole sequences: every row of a sequence is in the same part
            assert all((f.part[codes == s] == part).all() for s in seqs)
        tested[np.unique(codes[f.rows("test")])] += 1
        assert len(f.rows("train")) and len(f.rows("val"))
    assert (tested == 1).all()
    if strata is not None:  # stratified: each class spread over the folds within one sequence
        for c in np.unique(strata):
            per_fold = [np.sum(strata[np.unique(codes[f.rows("test")])] == c) for f in plan]
            assert max(per_fold) - min(per_fold) <= 1


def test_baselines_per_fold_match_pandas_on_airline():
    df = _airline()
    # float64 end to end, so the baselines' numbers are exact to rounding
    bt = rnnkit.backtest(df, rnnkit.Config(target="passengers", window=12, dtype="float64", **TINY),
                         folds=4, test_size=12, progress=False)
    y = df["passengers"]
    # Independent computation with pandas: the naive forecasts are shifted copies of the series
    # (persistence: y_{t-1}; seasonal naive, m = 12 months: y_{t-12}; Hyndman & Athanasopoulos,
    # "Forecasting: principles and practice", sec. 5.2).
    for k in range(4):
        origin = 144 - 12 * (4 - k)
        target = y.iloc[origin:origin + 12]
        for name, lag in (("persistence", 1), ("seasonal_naive", 12)):
            err = target - y.shift(lag).iloc[origin:origin + 12]
            m = bt.metrics.loc[(k + 1, name)]
            np.testing.assert_allclose(m["test_rmse"], np.sqrt((err ** 2).mean()), **METRIC)
            np.testing.assert_allclose(m["test_mae"], err.abs().mean(), **METRIC)
            got = bt.errors[(bt.errors.fold == k + 1) & (bt.errors.model == name)]
            assert list(got["time"]) == list(target.index)
            np.testing.assert_allclose(got["error"].to_numpy(), err.to_numpy(), **METRIC)
        # MASE scale from the fold's training rows only (Hyndman & Koehler 2006): the rows before
        # its validation part, which ends at the origin (test windows read their inputs from
        # the rows before their part, so the test part is exactly the forecast block).
        f = bt.fits[k]
        n_train = f.prepared.counts["rows_train"]
        train = y.iloc[:n_train]
        assert n_train + f.prepared.counts["rows_val"] == origin
        scale = (train - train.shift(12)).abs().mean()
        sn = bt.metrics.loc[(k + 1, "seasonal_naive")]
        np.testing.assert_allclose(sn["test_mase"], sn["test_mae"] / scale, **METRIC)
        # the scaler: mean and spread of the training rows only (population std, ddof=0)
        np.testing.assert_allclose(f.prepared.scaler.target_mean, [train.mean()], **EXACT64)
        np.testing.assert_allclose(f.prepared.scaler.target_scale, [train.std(ddof=0)], **EXACT64)
    # the mean over folds is the plain mean of the per-fold rows
    np.testing.assert_allclose(bt.mean.loc["seasonal_naive", "test_rmse"],
                               bt.metrics.xs("seasonal_naive", level="model")["test_rmse"].mean(), **EXACT64)
    # The comparison: the Diebold-Mariano/HLN test on the pooled squared errors, h = 1.
    e = bt.errors
    net = e[e.model == "rnn"]["error"].to_numpy() ** 2
    for name in ("persistence", "seasonal_naive", "linear_ar"):
        other = e[e.model == name]["error"].to_numpy() ** 2
        t = diebold_mariano(net, other, horizon=1)
        row = bt.comparison.loc[name]
        np.testing.assert_allclose([row["statistic"], row["pvalue"]], [t.statistic, t.pvalue], **EXACT64)
        np.testing.assert_allclose(row["mean_difference"], net.mean() - other.mean(), **EXACT64)
        assert row["n"] == 48 and name in row["verdict"]
    s = bt.summary()
    assert list(s.index[:1]) == ["rnn"] and "verdict" in s.columns


def test_folds_share_compiled_programs():
    df = _airline()
    bt = rnnkit.backtest(df, rnnkit.Config(target="passengers", window=12, hidden=5, epochs=2,
                                           patience=None), folds=5, test_size=6, progress=False)
    # one training program and one evaluation program at most, all in the first fold
    assert list(bt.folds["compiles"][1:]) == [0, 0, 0, 0]
    assert bt.compiles <= 2


def test_rolling_window_and_bad_arguments():
    df = _airline()
    cfg = rnnkit.Config(target="passengers", window=6, **TINY)
    before = df.copy()
    bt = rnnkit.backtest(df, cfg, folds=3, window=60, test_size=8, progress=False)
    pd.testing.assert_frame_equal(df, before)  # the caller's frame is never changed
    for f in bt.fits:
        used = f.prepared.counts["rows_train"] + f.prepared.counts["rows_val"]
        assert used <= 60
    assert bt.scheme == {"folds": 3, "scheme": "rolling origin", "window": 60, "test_size": 8}
    with pytest.raises(ValueError, match="split_column"):
        rnnkit.backtest(df.assign(s="train"), cfg.replace(split_column="s"), folds=2)
    with pytest.raises(rnnkit.DataError, match="fewer `folds`"):
        rnnkit.backtest(df, cfg, folds=20, test_size=12)
    with pytest.raises(ValueError, match="`window`"):
        rnnkit.backtest(df, cfg, folds=2, window="sliding")
    with pytest.raises(ValueError, match="`folds`"):
        rnnkit.backtest(df, cfg, folds=0)


def test_whole_sequence_folds_on_gunpoint_with_mcnemar():
    # aeon's GunPoint (Ratanamahatana & Keogh 2005), first 36 training cases, every 5th step.
    x, labels = load_classification("GunPoint", split="train")
    x, labels = x[:36, 0, ::5], labels[:36]
    n, t = x.shape
    df = pd.DataFrame({"case": np.repeat(np.arange(n), t), "value": x.reshape(-1),
                       "label": np.repeat(labels, t)})
    cfg = rnnkit.Config(target="label", features=("value",), group_column="case", task="classification",
                        window="full", **TINY)
    bt = rnnkit.backtest(df, cfg, folds=3, progress=False)
    assert bt.scheme["scheme"] == "sequences" and bt.scheme["stratified"]
    e = bt.errors
    net = e[e.model == "rnn"]
    assert sorted(net["sequence"]) == list(range(n))  # every case tested exactly once
    for name in ("majority", "nearest_neighbour"):
        other = e[e.model == name]
        a, b = net["correct"].to_numpy(bool), other["correct"].to_numpy(bool)
        table = [[np.sum(a & b), np.sum(a & ~b)], [np.sum(~a & b), np.sum(~a & ~b)]]
        exact = table[0][1] + table[1][0] < 25
        ref = sm_mcnemar(table, exact=exact, correction=True)  # the reference implementation
        row = bt.comparison.loc[name]
        np.testing.assert_allclose([row["statistic"], row["pvalue"]], [ref.statistic, ref.pvalue], **EXACT64)
    # per-fold accuracy of the majority baseline, recomputed from its errors
    for k in (1, 2, 3):
        maj = e[(e.model == "majority") & (e.fold == k)]
        np.testing.assert_allclose(bt.metrics.loc[(k, "majority"), "test_accuracy"],
                                   maj["correct"].mean(), **METRIC)


def test_folds_on_an_executor_equal_the_folds_in_turn():
    import concurrent.futures as cf

    df = _airline()
    cfg = rnnkit.Config(target="passengers", window=12, dtype="float64", **TINY)
    here = rnnkit.backtest(df, cfg, folds=4, test_size=12, progress=False)
    with cf.ThreadPoolExecutor(2) as pool:
        there = rnnkit.backtest(df, cfg, folds=4, test_size=12, progress=False, executor=pool)
    # the same programs, data and seeds: the same numbers
    pd.testing.assert_frame_equal(here.metrics, there.metrics)
    pd.testing.assert_frame_equal(here.comparison, there.comparison)
    assert there.fits == [] and len(here.fits) == 4
    with pytest.raises(TypeError, match="`executor`"):
        rnnkit.backtest(df, cfg, folds=2, executor="two")


def test_horizon_three_backtest_on_airline_scores_every_lead():
    # aeon's Airline series (Box & Jenkins, "Time series analysis", series G): 144 monthly totals.
    df = _airline()
    H, B = 3, 12
    bt = rnnkit.backtest(df, rnnkit.Config(target="passengers", window=12, horizon=H, dtype="float64",
                                           **TINY), folds=3, test_size=B, progress=False)
    y = df["passengers"]
    e = bt.errors
    assert sorted(e["lead"].unique()) == [1, 2, 3]
    for k in range(3):
        origin, end = 144 - B * (3 - k), 144 - B * (2 - k)
        f = bt.fits[k].prepared
        # nothing fitted at or after the origin; the validation part ends right before it
        assert f.counts["rows_train"] + f.counts["rows_val"] == origin
        fe = e[e.fold == k + 1]
        # every row of the block is forecast, by every lead whose origin lies before the block
        # ends: lead j covers rows origin + j - 1 .. end - H + j - 1 (the whole path in the block)
        assert set(fe["row"]) == set(range(origin, end))
        for j in range(1, H + 1):
            for name, lag in (("persistence", j), ("seasonal_naive", 12)):
                got = fe[(fe.model == name) & (fe.lead == j)]
                rows = np.arange(origin + j - 1, end - H + j)
                assert list(got["row"]) == list(rows)
                assert (got["origin_row"] == got["row"] - j).all()
                # Independent: persistence at lead j repeats y_{t-j}, the last value known at the
                # origin; seasonal naive y_{t-12} (Hyndman & Athanasopoulos, FPP sec. 5.2).
                want = y.iloc[rows].to_numpy() - y.shift(lag).iloc[rows].to_numpy()
                np.testing.assert_allclose(got["error"].to_numpy(), want, **METRIC)
        # the fold's per-lead scores are these errors' scores
        m = bt.fits[k].metrics_by_lead
        for j in range(1, H + 1):
            err = fe[(fe.model == "persistence") & (fe.lead == j)]["error"]
            np.testing.assert_allclose(m.loc[("persistence", j), "test_rmse"], np.sqrt((err ** 2).mean()),
                                       **METRIC)
    # The comparison: one loss per origin, the squared error averaged over the three leads, in
    # fold and origin order; Diebold-Mariano/HLN with h = 3 (the common choice for an h-step
    # path, Harvey, Leybourne & Newbold 1997). By lead: lead j alone with h = j.
    def per_origin(model, lead=None):
        x = e[(e.model == model) & ((e.lead == lead) if lead else True)]
        return (x["error"] ** 2).groupby([x["fold"], x["origin_row"]]).mean().to_numpy()
    net = per_origin("rnn")
    assert len(net) == 3 * (B - H + 1)
    for name in ("persistence", "seasonal_naive", "linear_ar"):
        t = diebold_mariano(net, per_origin(name), horizon=H)
        row = bt.comparison.loc[name]
        np.testing.assert_allclose([row["statistic"], row["pvalue"]], [t.statistic, t.pvalue], **EXACT64)
        assert row["n"] == len(net) and "mean over leads" in row["loss"]
        for j in (1, 2, 3):
            t = diebold_mariano(per_origin("rnn", j), per_origin(name, j), horizon=j)
            np.testing.assert_allclose(bt.comparison_by_lead.loc[(name, j), "pvalue"], t.pvalue, **EXACT64)
