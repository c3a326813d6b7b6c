"""Metrics against scikit-learn and against hand-worked MASE cases."""
import warnings

import numpy as np
import pytest
from sklearn import metrics as skm

from rnnkit.evaluation import _metrics as M
from tolerances import HAND, METRIC, METRIC32


def _close(a, b):
    np.testing.assert_allclose(a, b, **METRIC)


@pytest.fixture
def rng():
    return np.random.default_rng(7)


@pytest.mark.parametrize("shape", [(50,), (40, 3), (12, 5, 2)])
def test_regression_metrics_equal_sklearn(rng, shape):
    # Reference library: scikit-learn (mean_absolute_error, mean_squared_error, r2_score).
    yt = rng.normal(size=shape) * np.arange(1, shape[-1] + 1) * 3.0 + 5.0
    yp = yt + rng.normal(size=shape)
    cols = (lambda a: a.reshape(-1, 1)) if len(shape) == 1 else (lambda a: a.reshape(-1, shape[-1]))
    flat_t, flat_p = yt.ravel(), yp.ravel()
    np.testing.assert_allclose(M.mae(yt, yp), skm.mean_absolute_error(flat_t, flat_p), **METRIC)
    np.testing.assert_allclose(M.rmse(yt, yp), np.sqrt(skm.mean_squared_error(flat_t, flat_p)),
                               **METRIC)
    np.testing.assert_allclose(
        M.r2(yt, yp), skm.r2_score(cols(yt), cols(yp), multioutput="uniform_average"), **METRIC)


def test_r2_convention_is_uniform_average_over_outputs(rng):
    # Reference library: scikit-learn r2_score. The two outputs have very
    # different spreads, so the three conventions give different numbers and
    # only "uniform_average" may match.
    yt = rng.normal(size=(200, 2)) * np.array([1.0, 100.0])
    yp = yt + rng.normal(size=(200, 2)) * np.array([0.8, 10.0])
    ours = M.r2(yt, yp)
    uniform = skm.r2_score(yt, yp, multioutput="uniform_average")
    weighted = skm.r2_score(yt, yp, multioutput="variance_weighted")
    pooled = 1 - np.sum((yt - yp) ** 2) / np.sum((yt - yt.mean()) ** 2)
    np.testing.assert_allclose(ours, uniform, **METRIC)
    assert abs(ours - weighted) > 1e-3 and abs(ours - pooled) > 1e-3
    # one output: the same as 1 - SSres/SStot over all elements
    y1, p1 = yt[:, 0], yp[:, 0]
    np.testing.assert_allclose(M.r2(y1, p1), 1 - np.sum((y1 - p1) ** 2) / np.sum((y1 - y1.mean()) ** 2),
                               **METRIC)


def test_r2_constant_target_follows_sklearn():
    # Reference library: scikit-learn r2_score (force_finite=True default).
    yt = np.full(5, 3.0)
    assert M.r2(yt, yt) == skm.r2_score(yt, yt) == 1.0
    assert M.r2(yt, yt + 1) == skm.r2_score(yt, yt + 1) == 0.0


def test_mase_scale_hand_worked():
    # Hyndman & Koehler (2006), eq. for the scaled error: q = e / mean|y_t - y_{t-1}|;
    # seasonal form mean|y_t - y_{t-m}| from Hyndman & Athanasopoulos,
    # "Forecasting: Principles and Practice", section on scaled errors.
    y = np.array([1.0, 3.0, 2.0, 5.0, 4.0])
    # m=1: |3-1|, |2-3|, |5-2|, |4-5| = 2, 1, 3, 1 -> 7/4
    assert M.mase_scale(y, 1) == pytest.approx(1.75, **HAND)
    assert M.mase_scale(y, None) == pytest.approx(1.75, **HAND)
    # m=2: |2-1|, |5-3|, |4-2| = 1, 2, 2 -> 5/3
    assert M.mase_scale(y, 2) == pytest.approx(5 / 3, **HAND)
    # forecast errors |3-2|, |6-4| -> MAE 1.5; MASE = 1.5 / 1.75
    assert M.mase([3.0, 6.0], [2.0, 4.0], 1.75) == pytest.approx(1.5 / 1.75, **HAND)


def test_mase_scale_never_differences_across_groups():
    # Hand-worked: groups a=[1,3,2], b=[10,14]; within-group diffs 2, 1, 4 -> 7/3.
    # The boundary difference |10-2|=8 must not enter.
    y = np.array([1.0, 3.0, 2.0, 10.0, 14.0])
    g = np.array(["a", "a", "a", "b", "b"])
    assert M.mase_scale(y, 1, groups=g) == pytest.approx(7 / 3, **HAND)
    assert M.mase_scale(y, 1) == pytest.approx((2 + 1 + 8 + 4) / 4, **HAND)
    # m=2: only |2-1| in a; b has no pair two apart -> 1
    assert M.mase_scale(y, 2, groups=g) == pytest.approx(1.0, **HAND)
    # a group id that reappears later is a new sequence: no difference across the break
    g2 = np.array([0, 0, 1, 0, 0])
    assert M.mase_scale(y, 1, groups=g2) == pytest.approx((2 + 4) / 2, **HAND)


def test_mase_per_output_and_undefined_cases():
    y = np.stack([np.array([1.0, 3.0, 2.0, 5.0, 4.0]), 10 * np.array([1.0, 3.0, 2.0, 5.0, 4.0])], 1)
    q = M.mase_scale(y, 1)
    np.testing.assert_allclose(q, [1.75, 17.5])
    # each output divided by its own scale: both 1.5/1.75
    yt = np.array([[3.0, 30.0], [6.0, 60.0]])
    yp = np.array([[2.0, 20.0], [4.0, 40.0]])
    assert M.mase(yt, yp, q) == pytest.approx(1.5 / 1.75, **HAND)
    assert np.isnan(M.mase([1.0], [2.0], 0.0))  # constant training series: undefined
    with pytest.raises(ValueError, match="season"):
        M.mase_scale([1.0, 2.0, 3.0], 5)
    with pytest.raises(ValueError, match="scale"):
        M.mase(yt, yp, [1.0, 2.0, 3.0])


def _proba(rng, n, c, dtype=np.float64):
    z = rng.normal(size=(n, c)) * 2
    p = np.exp(z) / np.exp(z).sum(1, keepdims=True)
    return p.astype(dtype)


def test_classification_metrics_equal_sklearn_with_absent_class(rng):
    # Reference library: scikit-learn accuracy_score, balanced_accuracy_score, log_loss.
    c = 4
    yt = rng.choice([0, 1, 3], size=80)  # class 2 never occurs in y_true
    p = _proba(rng, 80, c)
    p[:5, 2] += 5.0
    p /= p.sum(1, keepdims=True)
    yp = p.argmax(1)
    assert (yp == 2).any()
    got = M.classification_metrics(yt, p)
    _close(got["accuracy"], skm.accuracy_score(yt, yp))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # sklearn warns on a class absent from y_true
        ref_bal = skm.balanced_accuracy_score(yt, yp)
    _close(got["balanced_accuracy"], ref_bal)
    ref_ll = skm.log_loss(yt, p, labels=list(range(c)))
    _close(got["log_loss"], ref_ll)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_log_loss_clips_like_sklearn(rng, dtype):
    # Reference library: scikit-learn log_loss clips to the dtype's machine epsilon.
    yt = np.array([0, 1, 2, 1])
    p = np.array([[1.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.2, 0.3, 0.5], [0.0, 1.0, 0.0]], dtype=dtype)
    ours = M.log_loss(yt, p, 3)
    assert np.isfinite(ours)
    np.testing.assert_allclose(ours, skm.log_loss(yt, p, labels=[0, 1, 2]), **METRIC32)


def test_many_to_many_classification_and_mask(rng):
    # Reference library: scikit-learn on the flattened counted steps.
    yt = rng.integers(0, 3, size=(6, 5))
    p = _proba(rng, 30, 3).reshape(6, 5, 3)
    mask = rng.random((6, 5)) > 0.3
    got = M.classification_metrics(yt, p, mask=mask)
    yk, pk = yt[mask], p[mask]
    _close(got["accuracy"], skm.accuracy_score(yk, pk.argmax(1)))
    _close(got["log_loss"], skm.log_loss(yk, pk, labels=[0, 1, 2]))


def test_confusion_equals_sklearn(rng):
    # Reference library: scikit-learn confusion_matrix (rows true, columns predicted).
    classes = np.array(["idle", "walk", "run"])
    yt, yp = rng.integers(0, 3, 60), rng.integers(0, 3, 60)
    df = M.confusion(yt, yp, classes)
    np.testing.assert_array_equal(df.to_numpy(), skm.confusion_matrix(yt, yp, labels=[0, 1, 2]))
    assert list(df.index) == list(classes) and df.index.name == "true"
    assert df.columns.name == "predicted"


def test_nan_prediction_is_an_error_naming_model_and_split():
    yt = np.arange(6.0).reshape(3, 2)
    yp = yt.copy()
    yp[1, 0] = np.nan
    with pytest.raises(ValueError, match=r"model 'linear_ar' on split 'test'.*row\(s\) \[1\]"):
        M.regression_metrics(yt, yp, scale=1.0, model="linear_ar", split="test")
    p = np.full((2, 3), 1 / 3)
    p[0, 0] = np.nan
    with pytest.raises(ValueError, match="'rnn'"):
        M.classification_metrics(np.array([0, 1]), p, model="rnn")


def test_bad_inputs_are_refused():
    with pytest.raises(ValueError, match="shape"):
        M.mae(np.zeros(3), np.zeros(4))
    with pytest.raises(ValueError, match="sum to 1"):
        M.log_loss([0, 1], np.array([[0.5, 0.2], [0.5, 0.5]]), 2)
    with pytest.raises(ValueError, match="outside"):
        M.log_loss([0, 3], np.array([[0.5, 0.5], [0.5, 0.5]]), 2)
    with pytest.raises(TypeError, match="integer"):
        M.accuracy(np.array([0.5, 1.0]), np.array([0, 1]))


def test_regression_metrics_bundle_with_mask(rng):
    yt = rng.normal(size=(4, 6, 1))
    yp = yt + 0.1 * rng.normal(size=(4, 6, 1))
    mask = np.ones((4, 6), dtype=bool)
    mask[:, :2] = False
    yp_bad = yp.copy()
    yp_bad[:, :2] = 1e6  # padded steps must not count
    got = M.regression_metrics(yt, yp_bad, scale=0.5, mask=mask)
    assert set(got) == {"mae", "rmse", "mase", "r2"}
    ref = skm.mean_absolute_error(yt[:, 2:].ravel(), yp[:, 2:].ravel())
    _close(got["mae"], ref)
    _close(got["mase"], ref / 0.5)
