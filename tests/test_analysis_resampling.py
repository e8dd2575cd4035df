"""Tests of binning, jackknife and bootstrap (sigmasim.analysis.resampling)."""

import math

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from sigmasim.analysis.gamma import gamma_analysis
from sigmasim.analysis.resampling import (
    auto_bin_size,
    bin_data,
    bootstrap,
    jackknife,
    jackknife_means,
)


def ar1(rho, n, seed):
    """Stationary AR(1) series, tau_int = (1 + rho) / (2 (1 - rho))."""
    rng = np.random.default_rng(seed)
    eps = rng.standard_normal(n)
    c = np.sqrt(1.0 - rho**2)
    eps[0] /= c
    return scipy.signal.lfilter([c], [1.0, -rho], eps)


# ---------------------------------------------------------------- binning


def test_bin_data_shapes_and_values():
    # definition of binning (common practice, no source)
    x = np.arange(23.0)
    b = bin_data(x, 5)
    np.testing.assert_allclose(b, [2.0, 7.0, 12.0, 17.0])  # remainder dropped
    y = np.arange(40.0).reshape(20, 2)
    assert bin_data(y, 4).shape == (5, 2)
    with pytest.raises(ValueError):
        bin_data(x, 0)
    with pytest.raises(ValueError, match="too few"):
        bin_data(x, 20)


def test_auto_bin_size_rule():
    x = ar1(0.8, 100_000, seed=1)
    tau = gamma_analysis(x).tau_int
    # documented rule of the resampling module (common practice, no source)
    assert auto_bin_size(x) == math.ceil(10 * tau)  # documented rule
    assert auto_bin_size(x[:400]) <= 400 // 20  # capped: >= 20 bins remain
    assert auto_bin_size(np.ones((100, 3))) == 5  # tau = 1/2 -> ceil(5)


# ---------------------------------------------------------------- jackknife


@settings(max_examples=50, deadline=None)
@given(arrays(np.float64, st.integers(2, 300), elements=st.floats(-1e6, 1e6)))
def test_jackknife_mean_is_standard_error(bins):
    # exact algebraic identity (common practice, e.g. Efron 1982)
    res = jackknife(bins)
    se = np.std(bins, ddof=1) / np.sqrt(bins.size)
    assert res.value == pytest.approx(np.mean(bins), rel=1e-12, abs=1e-6)
    assert res.error == pytest.approx(se, rel=1e-8, abs=1e-8)


def test_jackknife_vector_covariance_exact():
    rng = np.random.default_rng(3)
    bins = rng.standard_normal((50, 3)) @ np.array([[1, 0.5, 0], [0, 1, 0.3], [0, 0, 1.0]])
    res = jackknife(bins)
    # exact identity: jackknife covariance of the mean = sample covariance / n (Efron 1982)
    np.testing.assert_allclose(res.covariance, np.cov(bins.T) / 50, rtol=1e-12)
    np.testing.assert_allclose(res.error, np.sqrt(np.diag(res.covariance)), rtol=1e-14)
    assert res.samples.shape == (50, 3)
    np.testing.assert_allclose(res.samples, jackknife_means(bins), rtol=1e-14)


def test_jackknife_bias_correction_of_square():
    # for f = mean^2 the jackknife bias-corrected estimate is exactly
    # mean^2 - s^2 / n (Quenouille/Tukey jackknife; Efron 1982)
    rng = np.random.default_rng(4)
    x = rng.normal(1.0, 2.0, size=40)
    res = jackknife(x, lambda m: m**2)
    expected = x.mean() ** 2 - np.var(x, ddof=1) / x.size
    assert res.bias_corrected_value == pytest.approx(expected, rel=1e-12)


# ---------------------------------------------------------------- bootstrap


def test_bootstrap_reproducible_and_mean_error():
    rng = np.random.default_rng(5)
    x = rng.standard_normal(200)
    r1 = bootstrap(x, n_boot=2000, rng=42)
    r2 = bootstrap(x, n_boot=2000, rng=np.random.default_rng(42))
    # seeded generator -> identical samples (numpy Generator semantics)
    np.testing.assert_array_equal(r1.samples, r2.samples)
    se = np.std(x, ddof=0) / np.sqrt(x.size)  # bootstrap targets the plug-in estimate
    # relative fluctuation of a std from n_boot samples ~ 1/sqrt(2 n_boot);
    # 4 of those (common practice, no source)
    assert r1.error == pytest.approx(se, rel=4 / np.sqrt(2 * 2000))
    vec = bootstrap(np.stack([x, 2 * x], 1), lambda m: m * np.array([1.0, 0.5]), n_boot=100)
    assert vec.covariance.shape == (2, 2)
    np.testing.assert_allclose(vec.samples[:, 0], vec.samples[:, 1], rtol=1e-12)


# ---------------------------------------------------------------- vs Gamma method


def test_nonlinear_resampling_agrees_with_gamma_method():
    n, rho = 100_000, 0.8
    x, y = ar1(rho, n, seed=10), ar1(rho, n, seed=11)
    data = np.stack([1.0 + 0.5 * x, 2.0 + 0.5 * (0.6 * x + 0.8 * y)], axis=1)

    def f(m):
        return m[0] / m[1]

    g = gamma_analysis(data, f)
    bsize = auto_bin_size(data)
    bins = bin_data(data, bsize)
    jk = jackknife(bins, f)
    bs = bootstrap(bins, f, n_boot=1000, rng=1)
    nb = bins.shape[0]
    # binning drops < B trailing samples, which moves the value by << error
    assert abs(jk.value - g.value) < 0.1 * g.error
    # tolerance: 4 x combined relative statistical errors (jackknife error on
    # nb bins ~ 1/sqrt(2 nb); Gamma error ~ sqrt((W+1/2)/N) (Wolff 2004);
    # bootstrap ~ 1/sqrt(2 n_boot)) plus the binning bias tau/(2B) in the
    # error for exponential autocorrelations (see resampling module docstring)
    stat = np.sqrt(1 / (2 * nb) + (g.window + 0.5) / n)
    bias = g.tau_int / (2 * bsize)
    assert jk.error == pytest.approx(g.error, rel=4 * stat + bias)
    assert bs.error == pytest.approx(g.error, rel=4 * np.hypot(stat, 1 / np.sqrt(2000)) + bias)
    # binned data with bin_size=None inside jackknife gives the same answer
    assert jackknife(data, f, bin_size=None).error == pytest.approx(jk.error, rel=1e-12)


def test_too_few_bins():
    # clear errors for unusable input (common practice, no source)
    with pytest.raises(ValueError):
        jackknife(np.array([1.0]))
    with pytest.raises(ValueError):
        bootstrap(np.arange(5.0), n_boot=1)
