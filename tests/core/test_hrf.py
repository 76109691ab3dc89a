"""Tests of voxelscope.core.hrf: kernel shapes against published formulas and shape facts.

References (see /work/shared/references.md):

* Gamma kernel: Boynton et al. (1996), J Neurosci 16:4207-4221, parameters *from memory*;
  formula ``((t-d)/tau)^(n-1) exp(-(t-d)/tau) / (tau (n-1)!)`` written out here with
  ``math.factorial`` and compared with ``scipy.stats.gamma.pdf``.
* Double-gamma: Friston et al. (1998), NeuroImage 7:30-40, parameters *from memory*;
  difference of ``scipy.stats.gamma.pdf`` densities.
* Shape facts (references.md): an impulse response peaks 4.5-6.5 s after onset; the
  double-gamma undershoot is negative and falls 10-18 s after onset; kernels integrate to a
  finite, positive area.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import integrate, stats

from voxelscope.core.errors import InputError
from voxelscope.core.hrf import (
    DEFAULT_KERNELS,
    FIR,
    KERNEL_NAMES,
    DoubleGamma,
    Gamma,
    Gaussian,
    get_kernel,
)

SMOOTH = ("gaussian", "gamma", "double-gamma")

#: The default kernels written independently of the module (defaults from memory:
#: Gaussian peak 5 s, sigma 1.5 s; gamma n 3, tau 1.2 s, delay 2.5 s; double-gamma a1 6,
#: a2 16, b 1 s, c 1/6), unscaled.
PUBLISHED_SHAPES = {
    "gaussian": lambda t: np.exp(-0.5 * ((t - 5.0) / 1.5) ** 2),
    "gamma": lambda t: stats.gamma.pdf(t - 2.5, 3.0, scale=1.2),
    "double-gamma": lambda t: stats.gamma.pdf(t, 6.0) - stats.gamma.pdf(t, 16.0) / 6.0,
}


@pytest.mark.parametrize("name", SMOOTH)
def test_impulse_peak_in_published_range(name):
    """Peak 4.5-6.5 s after onset (references.md shape fact), on the sampled basis too."""
    k = get_kernel(name)
    assert 4.5 <= k.peak_s() <= 6.5
    dt = 0.05
    h = k.basis(dt)[0][1]
    assert 4.5 <= np.argmax(h) * dt <= 6.5


def test_double_gamma_undershoot():
    """Negative undershoot, its minimum 10-18 s after onset (references.md shape fact)."""
    dt = 0.01
    h = get_kernel("double-gamma").basis(dt)[0][1]
    t = np.arange(h.size) * dt
    assert h.min() < 0
    assert 10.0 <= t[np.argmin(h)] <= 18.0
    assert np.all(h[t < 8.0] >= -1e-12)  # nothing negative before the peak has passed


@pytest.mark.parametrize("name", SMOOTH)
def test_finite_positive_area(name):
    """Integral of the unscaled shape over its support (scipy.integrate.quad) is finite, > 0."""
    k = get_kernel(name)
    area, _ = integrate.quad(lambda s: float(k.shape(np.array([s]))[0]), 0, k.length_s, limit=200)
    assert math.isfinite(area) and area > 0


@pytest.mark.parametrize("name", ("boxcar", *SMOOTH))
@pytest.mark.parametrize("dt", [0.05, 0.125, 2.0 / 16])
def test_unit_area_samples(name, dt):
    """Unit-area convention of the module docstring: sum(h) * dt == 1."""
    h = get_kernel(name).basis(dt)[0][1]
    assert_allclose(h.sum() * dt, 1.0, rtol=1e-12)


@given(
    st.floats(2.0, 8.0),  # n
    st.floats(0.5, 2.0),  # tau
    st.floats(0.0, 3.0),  # delay
)
def test_gamma_matches_published_formula(n, tau, delay):
    """Gamma shape equals the docstring formula and scipy.stats.gamma.pdf."""
    k = Gamma(n=n, tau_s=tau, delay_s=delay)
    t = np.linspace(0, 24, 481)
    s = np.clip(t - delay, 0, None)
    formula = np.where(
        t > delay, (s / tau) ** (n - 1) * np.exp(-s / tau) / (tau * math.gamma(n)), 0.0
    )
    assert_allclose(k.shape(t), formula, rtol=1e-10, atol=1e-15)
    assert_allclose(k.shape(t), stats.gamma.pdf(t - delay, n, scale=tau), rtol=1e-12)


def test_gamma_default_is_boynton_with_factorial():
    """Defaults n=3, tau=1.2, delay=2.5 (from memory); (n-1)! with math.factorial; peak 4.9."""
    k = Gamma()
    t = np.linspace(2.6, 20, 100)
    x = (t - 2.5) / 1.2
    assert_allclose(k.shape(t), x**2 * np.exp(-x) / (1.2 * math.factorial(2)), rtol=1e-12)
    assert k.peak_s() == pytest.approx(2.5 + 2 * 1.2, abs=0.011)


@given(
    st.floats(4.0, 8.0),
    st.floats(12.0, 18.0),
    st.floats(0.7, 1.3),
    st.floats(0.7, 1.3),
    st.floats(0.05, 0.5),
)
def test_double_gamma_matches_scipy(a1, a2, b1, b2, c):
    """h(t) = g(t; a1, b1) - c g(t; a2, b2) with scipy.stats.gamma.pdf; unit-area samples."""
    k = DoubleGamma(a1=a1, a2=a2, b1=b1, b2=b2, c=c)
    t = np.linspace(0, 32, 641)
    ref = stats.gamma.pdf(t, a1, scale=b1) - c * stats.gamma.pdf(t, a2, scale=b2)
    assert_allclose(k.shape(t), ref, rtol=1e-12, atol=1e-15)
    dt = 0.05
    tb = np.arange(math.ceil(32 / dt) + 1) * dt
    refb = stats.gamma.pdf(tb, a1, scale=b1) - c * stats.gamma.pdf(tb, a2, scale=b2)
    assert_allclose(k.basis(dt)[0][1], refb / (refb.sum() * dt), rtol=1e-10, atol=1e-14)


def test_double_gamma_default_peak_at_first_mode():
    """Friston et al. (1998), from memory: the peak is at the first gamma's mode, (6-1)*1 = 5 s."""
    assert get_kernel("double-gamma").peak_s() == pytest.approx(5.0, abs=0.05)


def test_gaussian_default_peak():
    k = Gaussian()
    t = np.linspace(0, 16, 1601)
    assert_allclose(k.shape(t), np.exp(-0.5 * ((t - 5.0) / 1.5) ** 2), rtol=1e-12)


@pytest.mark.parametrize("name", SMOOTH)
def test_temporal_derivative_is_the_time_derivative(name):
    """The `_dt` function is dh/dt of the unit-area kernel.

    Reference: a symmetric difference (h(t + d) - h(t - d)) / 2d with d = 1e-4 s of the
    published shape written independently (``PUBLISHED_SHAPES``: scipy.stats.gamma.pdf and
    the Gaussian formula, default parameters from memory), scaled to unit area; the basis
    samples every 0.05 s, so agreement is to the fine grid's O(dt^2) (0.5 % of the
    derivative's range).
    """
    k = get_kernel(name)
    dt = 0.05
    basis = k.basis(dt, derivatives=1)
    assert [s for s, _ in basis] == ["", "_dt"]
    dh = basis[1][1]
    t = np.arange(dh.size) * dt
    shape = PUBLISHED_SHAPES[name]
    area = shape(t).sum() * dt
    d = 1e-4
    ref = (shape(t + d) - shape(t - d)) / (2 * d) / area
    # away from the ends and from the gamma's delay, where the shape has a kink
    inner = (t > 2 * dt) & (t < t[-1] - 2 * dt)
    if name == "gamma":
        inner &= np.abs(t - k.delay_s) > 3 * dt
    assert_allclose(dh[inner], ref[inner], atol=5e-3 * np.abs(ref).max())
    assert abs(dh.sum() * dt) < 1e-2 * np.abs(dh).max()  # h starts and ends near 0


def test_dispersion_derivative_only_for_double_gamma():
    assert [s for s, _ in get_kernel("double-gamma").basis(0.1, 2)] == ["", "_dt", "_dd"]
    assert [s for s, _ in get_kernel("gamma").basis(0.1, 2)] == ["", "_dt"]


@pytest.mark.parametrize(("n_bins", "bin_s", "dt"), [(12, 2.0, 0.125), (5, 1.5, 0.05)])
def test_fir_basis_boxes_of_height_one(n_bins, bin_s, dt):
    """FIR basis functions are indicator boxes of height 1 (module docstring), one per bin."""
    k = FIR(n_bins=n_bins, bin_s=bin_s)
    basis = k.basis(dt)
    assert [s for s, _ in basis] == [f"_fir{i}" for i in range(n_bins)]
    t = np.arange(basis[0][1].size) * dt
    for i, (_, box) in enumerate(basis):
        assert set(np.unique(box)) <= {0.0, 1.0}
        inside = (t >= i * bin_s + 1e-6) & (t < (i + 1) * bin_s - 1e-6)
        assert np.all(box[inside] == 1.0)
        assert np.all(box[(t < i * bin_s - 1e-6) | (t > (i + 1) * bin_s + 1e-6)] == 0.0)
    assert k.length_s == pytest.approx(n_bins * bin_s)
    assert_allclose(k.bin_centres(), (np.arange(n_bins) + 0.5) * bin_s)


def test_get_kernel_names_and_errors():
    assert set(DEFAULT_KERNELS) <= set(KERNEL_NAMES)
    assert get_kernel("Double_Gamma").name == "double-gamma"
    assert get_kernel("fir", n_bins=4, bin_s=1.25).length_s == 5.0
    with pytest.raises(InputError) as err:
        get_kernel("wavelet")
    assert "wavelet" in str(err.value) and "double-gamma" in str(err.value)
    with pytest.raises(InputError):
        get_kernel("gamma", width=3.0)
    with pytest.raises(InputError):
        FIR(n_bins=0)


def test_boxcar_ignores_derivatives_in_the_design():
    """Derivatives are defined for smooth kernels only; the boxcar keeps one column."""
    from voxelscope.core.events import Condition
    from voxelscope.core.model import Analysis, ModelSettings

    a = Analysis([Condition("tone", [10.0, 50.0], [15.0, 15.0])], n_volumes=70, tr=1.25)
    s = ModelSettings(kernels=("boxcar", "gamma"), derivatives=1)
    fits = a.fit_voxel(np.random.default_rng(0).standard_normal(70), s)
    assert fits.by_kernel("boxcar").design.condition_columns["tone"] == (0,)
    assert fits.by_kernel("gamma").design.names[:2] == ("tone", "tone_dt")


@pytest.mark.parametrize("shape_", [1.0, 1.5, 3.0, 6.0, 16.0, 40.0])
@pytest.mark.parametrize("scale", [0.3, 1.0, 2.5])
def test_gamma_density_equals_scipy_stats(shape_, scale):
    """The module's own gamma density equals scipy.stats.gamma.pdf (reference library),
    including t <= 0 (zero) and the far tail (underflow to zero, never NaN)."""
    from voxelscope.core.hrf import _gamma_pdf

    t = np.concatenate([[-5.0, -1e-9], np.linspace(1e-6, 60.0, 997), [500.0, 5000.0]])
    ours = _gamma_pdf(t, shape_, scale)
    ref = stats.gamma.pdf(t, shape_, scale=scale)
    assert np.all(np.isfinite(ours))
    assert_allclose(ours, ref, rtol=1e-12, atol=1e-300)
