"""Is one forecaster really better than another? Two paired tests and their verdict in words.

- ``diebold_mariano``: equal predictive accuracy of two forecasts of the same
  targets (Diebold & Mariano 1995), with the small-sample correction of
  Harvey, Leybourne & Newbold (1997): h-step loss differentials, their
  autocovariances up to lag h-1, Student's t with n-1 degrees of freedom.
- ``mcnemar``: two classifiers on the same examples (McNemar 1947), from the
  discordant pairs: the exact binomial test, or the chi-square with continuity
  correction (the options of statsmodels' ``mcnemar``).

Both tests are two-sided and compare model "a" (the network) with model "b"
(a baseline); ``verdict`` turns the outcome into one plain sentence.
"""
from __future__ import annotations

import math
from typing import NamedTuple, Optional

import numpy as np

LEVEL = 0.05  # the significance level of the verdicts
EXACT_BELOW = 25  # discordant pairs below which McNemar's test is exact (common practice, no source)


class PairedTest(NamedTuple):
    """One paired test of model "a" against model "b"."""

    method: str  # "Diebold-Mariano (HLN)" or "McNemar (exact)" / "McNemar (chi-square)"
    statistic: float  # DM*: t statistic; McNemar: min(b, c) (exact) or the chi-square value
    pvalue: float  # two-sided
    n: int  # paired observations used
    difference: float  # DM: mean loss of a minus mean loss of b; McNemar: (c - b) / n, its error-rate difference
    note: str  # "" or why the test fell back to a simpler form


def _vector(x, name) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 1:
        raise ValueError(f"`{name}` must be one-dimensional (one number per forecast target); got "
                         f"shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"`{name}` holds {int((~np.isfinite(a)).sum())} NaN/inf value(s); "
                         "drop those targets from both models first")
    return a


def diebold_mariano(loss_a, loss_b, horizon: int = 1) -> PairedTest:
    """Diebold-Mariano test with the Harvey-Leybourne-Newbold correction.

    The loss differential d_t = loss_a[t] - loss_b[t] of h-step forecasts is
    serially correlated up to lag h-1, so its mean's variance is estimated as
    (gamma_0 + 2 sum_{k=1}^{h-1} gamma_k) / n with gamma_k = (1/n) sum_t
    (d_t - dbar)(d_{t-k} - dbar). DM = dbar / sqrt(that), and
    DM* = DM * sqrt((n + 1 - 2h + h(h-1)/n) / n), compared with Student's t on
    n-1 degrees of freedom (HLN 1997, eq. 9). Should the autocovariances make
    the variance non-positive, gamma_0 alone is used (said in ``note``).

    Args:
      loss_a, loss_b: (n,) losses of the two forecasts of the same n targets, in time order
        (for example squared errors).
      horizon: h, the number of steps ahead the forecasts were made (>= 1).

    Returns:
      PairedTest; ``difference`` < 0 means model a had the smaller mean loss.

    Example:
      >>> diebold_mariano((y - f_net) ** 2, (y - f_naive) ** 2, horizon=1).pvalue
    """
    a, b = _vector(loss_a, "loss_a"), _vector(loss_b, "loss_b")
    if a.shape != b.shape:
        raise ValueError(f"`loss_a` has {a.size} values but `loss_b` has {b.size}; the test pairs the "
                         "losses of one target by both models")
    if isinstance(horizon, bool) or not isinstance(horizon, (int, np.integer)) or horizon < 1:
        raise ValueError(f"`horizon` (={horizon!r}) must be a whole number >= 1 (steps ahead)")
    h, n = int(horizon), a.size
    if n < 2:
        raise ValueError(f"the Diebold-Mariano test needs at least 2 paired losses; got {n}: "
                         "forecast more targets (more folds or a longer test block)")
    d = a - b
    dbar = float(d.mean())
    dc = d - dbar
    gamma = [float(dc[k:] @ dc[:n - k]) / n for k in range(min(h, n))]  # gamma_0 .. gamma_{h-1}
    var = gamma[0] + 2.0 * sum(gamma[1:])
    note = ""
    if var <= 0.0 and gamma[0] > 0.0:
        var, note = gamma[0], (f"the autocovariances up to lag {h - 1} made the variance estimate "
                               "non-positive; gamma_0 alone was used")
    method = "Diebold-Mariano (HLN)"
    if var <= 0.0:  # every differential equal: no spread to test against
        stat = 0.0 if dbar == 0.0 else math.copysign(math.inf, dbar)
        return PairedTest(method, stat, 1.0 if dbar == 0.0 else 0.0, n, dbar,
                          "every loss differential is the same number")
    dm = dbar / math.sqrt(var / n)
    factor = (n + 1 - 2 * h + h * (h - 1) / n) / n
    if factor <= 0.0:
        raise ValueError(f"the Harvey-Leybourne-Newbold correction needs more targets than about 2h: "
                         f"n = {n}, h = {h}; forecast more targets or test a shorter horizon")
    stat = dm * math.sqrt(factor)
    from scipy import stats  # on first use: `import rnnkit` stays quick
    p = float(2.0 * stats.t.sf(abs(stat), df=n - 1))
    return PairedTest(method, float(stat), min(p, 1.0), n, dbar, note)


def mcnemar(correct_a, correct_b, *, exact: Optional[bool] = None, correction: bool = True) -> PairedTest:
    """McNemar's test of two classifiers on the same examples.

    With b = examples only model a got right and c = only model b got right,
    the exact test takes min(b, c) against Binomial(b + c, 1/2) (p doubled,
    at most 1); otherwise (|b - c| - 1)^2 / (b + c) (without the 1 when
    ``correction`` is False) against chi-square with 1 degree of freedom. The
    same options and numbers as statsmodels.stats.contingency_tables.mcnemar
    on the table [[both right, b], [c, both wrong]].

    Args:
      correct_a, correct_b: (n,) bool, whether each model classified each example correctly.
      exact: True for the binomial test, False for the chi-square; None picks the exact test
        when b + c < 25.
      correction: the continuity correction of the chi-square.

    Returns:
      PairedTest; ``difference`` < 0 means model a made fewer errors.
    """
    a = np.asarray(correct_a)
    b_ = np.asarray(correct_b)
    for name, v in (("correct_a", a), ("correct_b", b_)):
        if v.ndim != 1 or v.dtype != bool:
            raise ValueError(f"`{name}` must be a one-dimensional bool array (True: classified "
                             f"correctly); got dtype {v.dtype}, shape {v.shape}")
    if a.shape != b_.shape:
        raise ValueError(f"`correct_a` has {a.size} values but `correct_b` has {b_.size}; the test "
                         "pairs the outcomes of one example by both models")
    if exact is not None and not isinstance(exact, bool):
        raise TypeError(f"`exact` (={exact!r}) must be True, False or None (automatic)")
    n = int(a.size)
    if n == 0:
        raise ValueError("McNemar's test needs at least one paired example; got none")
    b = int(np.sum(a & ~b_))  # only a right
    c = int(np.sum(~a & b_))  # only b right
    k = b + c
    use_exact = k < EXACT_BELOW if exact is None else exact
    diff = (c - b) / n
    if k == 0:
        return PairedTest("McNemar (exact)" if use_exact else "McNemar (chi-square)", 0.0, 1.0, n, 0.0,
                          "the two models agree on every example")
    from scipy import stats  # on first use: `import rnnkit` stays quick

    if use_exact:
        stat = float(min(b, c))
        p = float(min(2.0 * stats.binom.cdf(min(b, c), k, 0.5), 1.0))
        return PairedTest("McNemar (exact)", stat, p, n, diff, "")
    stat = (abs(b - c) - int(bool(correction))) ** 2 / k
    return PairedTest("McNemar (chi-square)", float(stat), float(stats.chi2.sf(stat, 1)), n, diff, "")


def verdict(test: PairedTest, baseline: str, level: float = LEVEL, model: str = "the network") -> str:
    """One sentence: is model a better or worse than `baseline`, at `level`, or no evidence either way."""
    if not 0.0 < level < 1.0:
        raise ValueError(f"`level` (={level!r}) must lie strictly between 0 and 1, for example 0.05")
    pct = f"{100 * level:g}%"
    if not math.isfinite(test.pvalue) or test.pvalue >= level or test.difference == 0.0:
        return f"no evidence of a difference between {model} and {baseline} at the {pct} level"
    word = "better" if test.difference < 0 else "worse"
    return f"{model} is {word} than {baseline} at the {pct} level (p = {test.pvalue:.3g})"
