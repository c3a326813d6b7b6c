"""Figure builders for the network's inside: gradients through time, the
spectrum of V, hidden states and loss surfaces (the common checks of every
builder are in test_plots.py)."""
import io

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402
from sklearn.decomposition import PCA  # noqa: E402

from rnnkit import plots  # noqa: E402

from tolerances import EXACT64  # noqa: E402

RNG = np.random.default_rng(1)
ALPHAS = np.linspace(-1, 1, 11)
BETAS = np.linspace(-0.5, 0.5, 7)
SURFACE = 0.2 + np.add.outer(BETAS ** 2, ALPHAS ** 2) * 3  # (B, A)
STATES = np.tanh(np.cumsum(RNG.normal(0, 0.3, (50, 6)), axis=0))  # (T, H)


def _only_axes(fig):
    return fig.axes[0]


# ------------------------------------------------------------------ inside the network

def test_gradient_flow_draws_norms_and_the_geometric_bound():
    norms = np.array([1e-4, 5e-4, 3e-3, 2e-2, 0.1, 0.5])
    ax = _only_axes(plots.gradient_flow(norms, sigma_max=1.5))
    measured, bound = ax.get_lines()[:2]
    np.testing.assert_array_equal(measured.get_xdata(), np.arange(1, 7))
    np.testing.assert_array_equal(measured.get_ydata(), norms)
    # Pascanu, Mikolov & Bengio (2013), eq. 7: ||dL/dh_k|| <= ||dL/dh_T|| * eta^(T-k).
    k = np.arange(1, 7)
    np.testing.assert_allclose(bound.get_ydata(), norms[-1] * 1.5 ** (6 - k), **EXACT64)
    assert ax.get_yscale() == "log"
    # A long sequence with a large factor must not overflow.
    fig = plots.gradient_flow(np.geomspace(1e-6, 1, 2000), sigma_max=4.0)
    assert np.isfinite(fig.axes[0].get_ylim()).all()
    # Steps no window reaches (NaN) and zeros are gaps; all-zero norms stay on a linear axis.
    ax = _only_axes(plots.gradient_flow([np.nan, 0.0, 0.1, 0.2], sigma_max=0.9))
    assert np.isnan(ax.get_lines()[0].get_ydata()[:2]).all()
    ax = _only_axes(plots.gradient_flow(np.zeros(5), sigma_max=0.9))
    assert ax.get_yscale() == "linear" and len(ax.get_lines()) == 1
    ax.figure.savefig(io.BytesIO(), format="png", dpi=40)


def test_gradient_flow_refuses_bad_input():
    with pytest.raises(ValueError, match=r"norms.*\(T,\)"):
        plots.gradient_flow(np.ones((3, 2)))
    with pytest.raises(ValueError, match="norms"):
        plots.gradient_flow([1.0, np.inf])
    with pytest.raises(ValueError, match="norms"):
        plots.gradient_flow([1.0, -1.0])
    with pytest.raises(ValueError, match="sigma_max"):
        plots.gradient_flow([1.0, 2.0], sigma_max=0)


def test_spectrum_bars_are_the_singular_values():
    s = np.array([1.4, 1.0, 0.6, 0.05])
    ax = _only_axes(plots.spectrum(s))
    np.testing.assert_array_equal([p.get_height() for p in ax.patches], s)
    assert any(list(l.get_ydata()) == [1.0, 1.0] for l in ax.get_lines())  # the line at 1
    with pytest.raises(ValueError, match="singular_values"):
        plots.spectrum(np.eye(3))
    with pytest.raises(ValueError, match="singular_values"):
        plots.spectrum([-0.1, 1.0])


def test_hidden_heatmap_image_is_units_by_time_centred_on_zero():
    times = pd.date_range("2024-01-01", periods=len(STATES), freq="h")
    ax = plots.hidden_heatmap(STATES, times=times).axes[0]
    image = ax.images[0]
    np.testing.assert_array_equal(image.get_array(), STATES.T)
    lo, hi = image.get_clim()
    assert lo == -hi == -np.abs(STATES).max()
    with pytest.raises(ValueError, match=r"states.*\(T, H\)"):
        plots.hidden_heatmap(STATES[:, 0])
    with pytest.raises(ValueError, match="times"):
        plots.hidden_heatmap(STATES, times=times[:5])


def test_hidden_path_matches_scikit_learn_pca():
    ax = plots.hidden_path(STATES).axes[0]
    xy = ax.collections[-1].get_offsets()  # the scatter, (N, 2)
    # scikit-learn's PCA is the reference; component signs are arbitrary.
    pca = PCA(n_components=2).fit(STATES)
    ref = pca.transform(STATES)
    for j in range(2):
        sign = np.sign(ref[:, j] @ xy[:, j])
        np.testing.assert_allclose(xy[:, j], sign * ref[:, j], **EXACT64)
    ratio = pca.explained_variance_ratio_
    assert f"{ratio[0]:.1%}" in ax.get_xlabel() and f"{ratio[1]:.1%}" in ax.get_ylabel()
    np.testing.assert_array_equal(ax.collections[-1].get_array(), np.arange(len(STATES)))


def test_hidden_path_with_one_unit_is_a_path_in_time():
    one = STATES[:, :1]
    ax = plots.hidden_path(one).axes[0]
    xy = ax.collections[-1].get_offsets()
    np.testing.assert_array_equal(xy[:, 0], np.arange(len(one)))
    np.testing.assert_array_equal(xy[:, 1], one[:, 0])
    assert plots.hidden_path(np.zeros((5, 3))) is not None  # constant states: no division by zero
    with pytest.raises(ValueError, match="N >= 2"):
        plots.hidden_path(STATES[:1])
    with pytest.raises(ValueError, match="states"):
        plots.hidden_path(np.zeros((2, 3, 4)))


# ------------------------------------------------------------------ loss surfaces

def test_loss_surface_contours_the_values_and_marks_the_trained_point():
    v = SURFACE.copy()
    v[0, 0] = np.inf  # a blown-up corner stays blank
    ax = plots.loss_surface(ALPHAS, BETAS, v).axes[0]
    filled = ax.collections[0]
    levels = filled.levels
    assert levels[0] <= SURFACE.min() and levels[-1] >= np.sort(SURFACE.ravel())[-2]
    star = [l for l in ax.get_lines() if l.get_label() == "trained weights"][0]
    assert list(star.get_xdata()) == [0.0] and list(star.get_ydata()) == [0.0]
    assert ax.get_xlim() == (ALPHAS[0], ALPHAS[-1]) and ax.get_ylim() == (BETAS[0], BETAS[-1])


def test_clipped_loss_surface_gives_the_basin_the_colours():
    # A steep bowl: without the clip, most colour levels go to the walls.
    v = 0.1 + 50.0 * (ALPHAS[None, :] ** 2 + BETAS[:, None] ** 2) ** 2
    fig = plots.loss_surface(ALPHAS, BETAS, v, clip=0.5)
    ax = fig.axes[0]
    filled = ax.collections[0]
    top = np.quantile(v, 0.5)  # numpy's quantile as the reference for where the scale ends
    np.testing.assert_allclose(filled.levels[-1], top, rtol=1e-12)
    np.testing.assert_allclose(filled.levels, np.geomspace(v.min(), top, 16), rtol=1e-12)
    assert filled.extend == "max" and filled.norm.__class__.__name__ == "LogNorm"
    # The marker's legend lies outside the plot (below it), not over the surface.
    fig.canvas.draw()
    legend = ax.get_legend().get_window_extent()
    assert legend.y1 <= ax.get_window_extent().y0
    with pytest.raises(ValueError, match="clip"):
        plots.loss_surface(ALPHAS, BETAS, v, clip=1.5)


def test_loss_surface_refuses_bad_shapes():
    with pytest.raises(ValueError, match="transpose"):
        plots.loss_surface(ALPHAS, BETAS, SURFACE.T)
    with pytest.raises(ValueError, match="values"):
        plots.loss_surface(ALPHAS, BETAS, SURFACE[:, :3])
    with pytest.raises(ValueError, match="alphas"):
        plots.loss_surface(ALPHAS[::-1], BETAS, SURFACE)
    with pytest.raises(ValueError, match="betas"):
        plots.loss_surface(ALPHAS, BETAS[:1], SURFACE[:1])
    with pytest.raises(ValueError, match="finite"):
        plots.loss_surface(ALPHAS, BETAS, np.full_like(SURFACE, np.nan))


def test_loss_slice_draws_the_values_and_the_trained_point():
    values = 0.1 + ALPHAS ** 2
    ax = plots.loss_slice(ALPHAS, values, label="all weights").axes[0]
    line = ax.get_lines()[0]
    np.testing.assert_array_equal(line.get_xdata(), ALPHAS)
    np.testing.assert_array_equal(line.get_ydata(), values)
    star = [l for l in ax.get_lines() if l.get_label().startswith("trained weights")][0]
    np.testing.assert_allclose(star.get_ydata(), [0.1], **EXACT64)
    assert "all weights" in ax.get_xlabel()
    with pytest.raises(ValueError, match="values"):
        plots.loss_slice(ALPHAS, values[:-1])
    with pytest.raises(TypeError, match="label"):
        plots.loss_slice(ALPHAS, values, label="")
