"""Diebold-Mariano (HLN) and McNemar against hand computations, scipy and statsmodels."""
import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.datasets import nile
from statsmodels.stats.contingency_tables import mcnemar as sm_mcnemar

from rnnkit.evaluation._significance import diebold_mariano, mcnemar, verdict
from tolerances import EXACT64


def _nile_losses(h):
    """Squared errors of two h-step forecasters of the Nile's annual flow (statsmodels' nile,
    1871-1970): persistence y_t -> y_{t+h}, and the mean of the last 5 years."""
    y = nile.load_pandas().data["volume"].to_numpy(np.float64)
    t = np.arange(4, len(y) - h)  # forecast origins with 5 years behind them
    target = y[t + h]
    naive = y[t]
    mean5 = np.array([y[i - 4:i + 1].mean() for i in t])
    return (target - naive) ** 2, (target - mean5) ** 2


def _dm_by_hand(la, lb, h):
    """The statistic written out term by term from Diebold & Mariano (1995), eq. (11)-(12),
    and Harvey, Leybourne & Newbold (1997), eq. (9): plain loops, no numpy reductions."""
    d = [x - z for x, z in zip(la, lb)]
    n = len(d)
    dbar = sum(d) / n
    gamma = []
    for k in range(h):
        s = 0.0
        for t in range(k, n):
            s += (d[t] - dbar) * (d[t - k] - dbar)
        gamma.append(s / n)
    v = (gamma[0] + 2 * sum(gamma[1:])) / n
    dm = dbar / math.sqrt(v)
    return dm * math.sqrt((n + 1 - 2 * h + h * (h - 1) / n) / n)


@pytest.mark.parametrize("h", [1, 2, 3])
def test_dm_hln_matches_the_papers_formula_on_nile(h):
    la, lb = _nile_losses(h)
    got = diebold_mariano(la, lb, horizon=h)
    want = _dm_by_hand(list(la), list(lb), h)
    np.testing.assert_allclose(got.statistic, want, **EXACT64)
    # HLN (1997): compare with Student's t, n - 1 degrees of freedom, two-sided.
    np.testing.assert_allclose(got.pvalue, 2 * stats.t.sf(abs(want), len(la) - 1), **EXACT64)
    assert got.n == len(la) and got.note == ""
    np.testing.assert_allclose(got.difference, la.mean() - lb.mean(), **EXACT64)


def test_dm_one_step_is_the_paired_t_test():
    # With h = 1 the HLN factor sqrt((n-1)/n) turns DM into the one-sample t statistic of the
    # differentials (algebra from HLN 1997 eq. 9); scipy.stats.ttest_1samp is the reference.
    la, lb = _nile_losses(1)
    ref = stats.ttest_1samp(la - lb, 0.0)
    got = diebold_mariano(la, lb, horizon=1)
    np.testing.assert_allclose([got.statistic, got.pvalue], [ref.statistic, ref.pvalue], **EXACT64)


def test_dm_is_antisymmetric_and_verdicts_read_right():
    la, lb = _nile_losses(1)
    ab, ba = diebold_mariano(la, lb), diebold_mariano(lb, la)
    np.testing.assert_allclose(ab.statistic, -ba.statistic, **EXACT64)
    np.testing.assert_allclose(ab.pvalue, ba.pvalue, **EXACT64)
    rng = np.random.default_rng(0)
    small = rng.uniform(0.0, 1.0, 60)
    better = diebold_mariano(small, small + 1.0 + rng.normal(0, 0.1, 60))
    assert verdict(better, "seasonal naive").startswith("the network is better than seasonal naive at the 5% level")
    worse = diebold_mariano(small + 1.0 + rng.normal(0, 0.1, 60), small)
    assert "worse than persistence at the 5% level" in verdict(worse, "persistence")
    same = diebold_mariano(small, small[::-1])
    assert same.pvalue > 0.05 or same.difference == 0.0
    assert verdict(same, "linear_ar").startswith("no evidence of a difference")


def test_dm_refuses_bad_input_and_handles_equal_losses():
    with pytest.raises(ValueError, match="horizon"):
        diebold_mariano([1.0, 2.0, 3.0], [1.0, 2.0, 3.0], horizon=0)
    with pytest.raises(ValueError, match="loss_b"):
        diebold_mariano([1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(ValueError, match="NaN"):
        diebold_mariano([1.0, np.nan], [1.0, 2.0])
    r = diebold_mariano(np.ones(10), np.ones(10))
    assert r.pvalue == 1.0 and r.statistic == 0.0
    r = diebold_mariano(np.zeros(10), np.ones(10))
    assert r.pvalue == 0.0 and r.statistic == -math.inf


def _pairs(b, c, both=30, neither=10):
    a = np.array([True] * both + [True] * b + [False] * c + [False] * neither)
    z = np.array([True] * both + [False] * b + [True] * c + [False] * neither)
    return a, z, np.array([[both, b], [c, neither]])


@pytest.mark.parametrize("b,c", [(0, 0), (1, 0), (3, 9), (10, 10), (12, 30), (40, 22), (5, 19)])
@pytest.mark.parametrize("exact,correction", [(True, True), (False, True), (False, False)])
def test_mcnemar_matches_statsmodels(b, c, exact, correction):
    a, z, table = _pairs(b, c)
    got = mcnemar(a, z, exact=exact, correction=correction)
    if b + c == 0 and not exact:
        assert got.pvalue == 1.0  # statsmodels divides 0 by 0 here; no discordant pair, no evidence
        return
    ref = sm_mcnemar(table, exact=exact, correction=correction)  # the reference implementation
    np.testing.assert_allclose([got.statistic, got.pvalue], [ref.statistic, ref.pvalue], **EXACT64)


def test_mcnemar_automatic_choice_and_verdict():
    a, z, table = _pairs(3, 14)
    got = mcnemar(a, z)  # 17 discordant pairs: exact
    assert got.method == "McNemar (exact)"
    np.testing.assert_allclose(got.pvalue, sm_mcnemar(table, exact=True).pvalue, **EXACT64)
    assert "worse than majority" in verdict(got, "majority")
    a, z, table = _pairs(40, 12)
    got = mcnemar(a, z)
    assert got.method == "McNemar (chi-square)"
    np.testing.assert_allclose(got.pvalue, sm_mcnemar(table, exact=False, correction=True).pvalue, **EXACT64)
    assert "better than last_label" in verdict(got, "last_label")
    with pytest.raises(ValueError, match="bool"):
        mcnemar([1, 0], [1, 1])
    with pytest.raises(ValueError, match="level"):
        verdict(got, "x", level=5)
