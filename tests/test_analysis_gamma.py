"""Tests of the Gamma method (sigmasim.analysis.gamma) and the thermalisation cut.

Reference process: the AR(1) chain x_t = rho x_{t-1} + sqrt(1 - rho^2) eps_t,
started in equilibrium (x_0 ~ N(0, 1)), has rho(t) = rho^|t| and
tau_int = 1/2 + sum_{t>=1} rho^t = (1 + rho) / (2 (1 - rho))
(standard result, e.g. U. Wolff, Comput. Phys. Commun. 156 (2004) 143).
"""

import emcee
import numpy as np
import pytest
import scipy.signal
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from sigmasim.analysis.gamma import autocorrelation, gamma_analysis
from sigmasim.analysis.thermalisation import thermalisation_cut


def ar1(rho, n, seed, n_series=None):
    """AR(1) series in equilibrium, shape (n,) or (n_series, n)."""
    rng = np.random.default_rng(seed)
    shape = (n,) if n_series is None else (n_series, n)
    eps = rng.standard_normal(shape)
    c = np.sqrt(1.0 - rho**2)
    eps[..., 0] /= c  # so that x_0 = eps_0 ~ N(0, 1): stationary start
    return scipy.signal.lfilter([c], [1.0, -rho], eps, axis=-1)


def tau_exact(rho):
    return (1.0 + rho) / (2.0 * (1.0 - rho))


def var_mean_exact(rho, n):
    """Exact Var(mean) of n AR(1) samples: (1/n^2) sum_{ij} rho^|i-j| (closed form)."""
    if rho == 0.0:
        return 1.0 / n
    return ((1 + rho) / (1 - rho) - 2 * rho * (1 - rho**n) / (n * (1 - rho) ** 2)) / n


def chi2_ratio_interval(n_series, prob=0.999):
    """Two-sided interval for s/sigma of a sample std of n_series normal values.

    (n-1) s^2 / sigma^2 ~ chi^2_{n-1} (Cochran's theorem; common practice).
    """
    dof = n_series - 1
    lo = scipy.stats.chi2.ppf((1 - prob) / 2, dof) / dof
    hi = scipy.stats.chi2.ppf(1 - (1 - prob) / 2, dof) / dof
    return np.sqrt(lo), np.sqrt(hi)


# ---------------------------------------------------------------- rho(t)


def test_autocorrelation_ar1_matches_rho_power_t():
    rho, n = 0.8, 100_000
    r = autocorrelation(ar1(rho, n, seed=11), t_max=10)
    assert r.shape == (11,) and r[0] == 1.0
    # Bartlett's variance bound for AR(1) (M.S. Bartlett, J. R. Stat. Soc.
    # Suppl. 8 (1946) 27): Var(rho_hat(t)) <= (1 + rho^2) / ((1 - rho^2) N)
    sd = np.sqrt((1 + rho**2) / ((1 - rho**2) * n))
    np.testing.assert_allclose(r, rho ** np.arange(11), atol=5 * sd)


def test_autocorrelation_constant_and_short():
    # convention for zero variance (common practice, no source)
    r = autocorrelation(np.full(50, 3.7))
    assert r[0] == 1.0 and np.all(r[1:] == 0.0)
    with pytest.raises(ValueError, match="too short"):
        autocorrelation(np.ones(1))


# ---------------------------------------------------------------- tau_int


@pytest.mark.parametrize("rho", [0.0, 0.5, 0.8, 0.95])
def test_tau_int_ar1_exact(rho):
    n = 200_000
    x = ar1(rho, n, seed=int(100 * rho) + 1)
    res = gamma_analysis(x)
    # agreement within 4 x the method's own error estimate (Wolff 2004)
    assert abs(res.tau_int - tau_exact(rho)) < 4 * res.tau_int_error
    # internal consistency of the documented convention tau = 1/2 + sum rho
    assert res.rho.shape == (res.window + 1,) and res.rho[0] == pytest.approx(1.0)
    assert res.tau_int == pytest.approx(0.5 + res.rho[1:].sum(), rel=1e-12)
    assert res.n == n and res.n_independent == pytest.approx(n / (2 * res.tau_int))
    # error^2 = 2 tau_int Gamma(0) / N, up to the O(W/N) bias correction (Wolff 2004)
    assert res.error**2 == pytest.approx(2 * res.tau_int * np.var(x) / n, rel=1e-3)


@pytest.mark.parametrize("rho", [0.5, 0.8, 0.95])
def test_tau_int_against_emcee(rho):
    """Cross-check with emcee.autocorr.integrated_time.

    emcee: Foreman-Mackey et al., PASP 125 (2013) 306; its tau = 1 + 2 sum rho
    = 2 x our tau_int.  Both estimators use the same data and differ only in
    the summation window (emcee: M >= 5 tau_emcee) and in small O(W/N) bias
    corrections, so their difference is bounded by the statistical error of
    the larger window, 2 tau sqrt((W_max + 1/2)/N) (Madras-Sokal estimate as in
    Wolff 2004); we allow 4 of those.
    """
    n = 200_000
    x = ar1(rho, n, seed=int(1000 * rho) + 7)
    ours = gamma_analysis(x)
    t_emcee = float(np.atleast_1d(emcee.autocorr.integrated_time(x))[0]) / 2.0
    w_max = max(ours.window, 5 * 2 * t_emcee)
    tol = 4 * 2 * ours.tau_int * np.sqrt((w_max + 0.5) / n)
    assert abs(t_emcee - ours.tau_int) < tol


# ---------------------------------------------------------------- errors


def test_error_of_mean_matches_spread_over_series():
    rho, n, n_series = 0.8, 5000, 200
    xs = ar1(rho, n, seed=2024, n_series=n_series)
    errs = np.array([gamma_analysis(x).error for x in xs])
    spread = np.std(xs.mean(axis=1), ddof=1)
    rms_err = np.sqrt(np.mean(errs**2))
    # the sample std of 200 means fluctuates as chi^2_199 (99.9 % interval);
    # 5 % extra margin for the O(exp(-W/tau), tau/N) systematics of the
    # Gamma method on N = 5000 samples (common practice, no source)
    lo, hi = chi2_ratio_interval(n_series)
    assert lo / 1.05 < spread / rms_err < hi * 1.05
    # the average estimated error is close to the exact one (its own spread
    # is ~ sqrt((W+1/2)/N)/sqrt(200) ~ 0.5 %, so 5 % is generous)
    assert rms_err == pytest.approx(np.sqrt(var_mean_exact(rho, n)), rel=0.05)


def test_derived_ratio_error_matches_spread():
    rho, n, n_series = 0.7, 5000, 200
    x = ar1(rho, n, seed=5, n_series=n_series)
    y = ar1(rho, n, seed=6, n_series=n_series)
    a = 1.0 + 0.5 * x
    b = 2.0 + 0.5 * (0.6 * x + 0.8 * y)  # correlated with a

    def f(m):
        return m[0] / m[1]

    res = [gamma_analysis(np.stack([ai, bi], axis=1), f) for ai, bi in zip(a, b)]
    ratios = a.mean(axis=1) / b.mean(axis=1)
    spread = np.std(ratios, ddof=1)
    rms_err = np.sqrt(np.mean([r.error**2 for r in res]))
    lo, hi = chi2_ratio_interval(n_series)  # as in the previous test
    assert lo / 1.05 < spread / rms_err < hi * 1.05
    assert res[0].value == pytest.approx(ratios[0], rel=1e-14)


def test_replicas_split_chain_same_result():
    rho, n = 0.8, 200_000
    x = ar1(rho, n, seed=3)
    one = gamma_analysis(x)
    # replica combination of Wolff 2004 (Sec. 3.3): Gamma summed over replica;
    # tolerances: the method's own error-of-error / tau_int error
    four = gamma_analysis(x, replicas=[n // 4] * 4)
    as_list = gamma_analysis(list(x.reshape(4, -1)))
    assert four.n_replicas == 4 and four.n == n
    assert four.value == pytest.approx(one.value, rel=1e-12, abs=1e-15)
    # only 3 of ~N/tau correlated pairs are lost at the cuts
    assert abs(four.error - one.error) < one.error_of_error
    assert abs(four.tau_int - one.tau_int) < one.tau_int_error
    assert as_list.error == four.error and as_list.tau_int == four.tau_int
    # unequal lengths
    uneq = gamma_analysis(x, replicas=[30_000, 70_000, 50_000, 50_000])
    assert abs(uneq.error - one.error) < one.error_of_error


def test_independent_replicas_tau_exact():
    rho = 0.9
    chains = [ar1(rho, n, seed=40 + i) for i, n in enumerate([40_000, 60_000, 50_000])]
    res = gamma_analysis(chains)
    # independent replica of one process (Wolff 2004): exact tau within 4 errors
    assert res.n == 150_000 and res.n_replicas == 3
    assert abs(res.tau_int - tau_exact(rho)) < 4 * res.tau_int_error
    assert res.value == pytest.approx(np.concatenate(chains).mean(), rel=1e-12)


def test_bias_correction_linear_func_is_identity():
    x = ar1(0.5, 8000, seed=9)
    res = gamma_analysis(x, lambda m: 3.0 * m[0] + 1.0, replicas=[2000] * 4, bias_correct=True)
    # Wolff 2004 replica bias correction vanishes for linear functions (exact)
    assert res.bias_corrected_value == pytest.approx(res.value, rel=1e-10)


def test_multiple_observables_without_func():
    x = ar1(0.5, 10_000, seed=1)
    y = ar1(0.8, 10_000, seed=2)
    res = gamma_analysis(np.stack([x, y], axis=1))
    # one independent analysis per column (API convention, no source)
    assert isinstance(res, list) and len(res) == 2
    assert res[1].tau_int == gamma_analysis(y).tau_int


# ---------------------------------------------------------------- edge cases


def test_constant_series():
    # zero variance: error 0, tau_int 1/2 by convention (common practice, no source)
    res = gamma_analysis(np.full(1000, 0.1))
    assert res.error == 0.0 and res.tau_int == 0.5 and res.value == pytest.approx(0.1)
    assert res.error_of_error == 0.0 and res.tau_int_error == 0.0
    # derived quantity of constant inputs, and a zero gradient
    const2 = np.stack([np.full(100, 2.0), np.full(100, 4.0)], axis=1)
    res2 = gamma_analysis(const2, lambda m: m[0] * m[1])
    assert res2.value == pytest.approx(8.0) and res2.error == 0.0
    res3 = gamma_analysis(ar1(0.5, 100, seed=1), lambda m: 1.0)
    assert res3.error == 0.0 and res3.tau_int == 0.5


def test_bad_input():
    # clear errors for unusable input (common practice, no source)
    with pytest.raises(ValueError, match="too short"):
        gamma_analysis(np.arange(3.0))
    with pytest.raises(ValueError, match="too short"):
        gamma_analysis([np.arange(10.0), np.array([1.0])])
    with pytest.raises(ValueError, match="add up"):
        gamma_analysis(np.arange(20.0), replicas=[5, 5])
    with pytest.raises(ValueError, match="NaN"):
        gamma_analysis(np.array([1.0, np.nan] * 10))


@settings(max_examples=40, deadline=None)
@given(arrays(np.float64, st.integers(8, 200), elements=st.floats(-1e3, 1e3)))
def test_value_is_mean_and_error_nonnegative(x):
    # basic invariants on arbitrary data (common practice, no source)
    res = gamma_analysis(x)
    assert res.value == pytest.approx(np.mean(x), rel=1e-9, abs=1e-9)
    assert res.error >= 0.0 and np.isfinite(res.error)
    assert res.tau_int > 0.0


# ---------------------------------------------------------------- thermalisation


def test_thermalisation_cuts_transient():
    rho, n, amp, tau_th = 0.8, 20_000, 10.0, 300.0
    t = np.arange(n)
    x = ar1(rho, n, seed=77) + amp * np.exp(-t / tau_th)
    res = thermalisation_cut(x)
    # rule of sigmasim.analysis.thermalisation (common practice, no source);
    # the offset falls below the noise (std 1) at t = tau_th ln(amp)
    t_noise = tau_th * np.log(amp)
    assert res.thermalised
    assert t_noise < res.cut < 4 * t_noise, res.reason
    assert "Cutting" in res.reason


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_thermalisation_stationary(seed):
    res = thermalisation_cut(ar1(0.8, 20_000, seed=seed))
    # false-cut probability ~1e-3 per series at z_max = 4 (see module docstring)
    assert res.cut <= res.block_size and res.thermalised, res.reason


def test_thermalisation_edge_cases():
    # documented rules 5 and 6 of the thermalisation module (common practice, no source)
    assert thermalisation_cut(np.full(1000, 2.0)).cut == 0
    # drift through the whole run: flagged via the reference half
    drifting = np.linspace(0.0, 100.0, 2000) + ar1(0.5, 2000, seed=1)
    res = thermalisation_cut(drifting)
    assert not res.thermalised and "Not trusted" in res.reason
    # offset over the whole first half: cut at N/2 and flagged
    step = ar1(0.5, 4000, seed=2) + 5.0 * (np.arange(4000) < 2000)
    res = thermalisation_cut(step)
    assert not res.thermalised and res.cut == 2000
    with pytest.raises(ValueError, match="too short"):
        thermalisation_cut(np.ones(10))
