"""Tests of correlators, effective masses and cosh fits on free Gaussian fields.

Free scalar field on a periodic T x L^(d-1) lattice with action
S = sum_x [ 1/2 sum_mu (phi_{x+mu} - phi_x)^2 + m2/2 phi_x^2 ].  With the
unitary Fourier transform every mode is an independent Gaussian of variance
1 / (m2 + sum_mu 4 sin^2(p_mu / 2)); equivalently phi = K^(-1/2) eta with
K = -Laplacian + m2 and white noise eta (both exact, standard results).
The zero-momentum correlator per spatial volume is

    C(t) = (1/V_s) <S(0) S(t)> = (1/T) sum_{p0} cos(p0 t) / (m2 + 4 sin^2(p0/2))
         = cosh(m (t - T/2)) / (2 sinh(m) sinh(m T / 2)),   m = 2 asinh(sqrt(m2)/2)

(standard lattice propagator results; both identities are checked below).
"""

import numpy as np
import pytest

from sigmasim.analysis.correlators import (
    connected_correlator,
    correlator_bootstrap,
    correlator_jackknife,
    cosh_model,
    effective_mass,
    effective_mass_errors,
    fit_correlator,
    fit_cosh,
    scan_fit_windows,
    symmetrise,
)

T, L, D, M2, N_CONF = 24, 6, 3, 0.09, 2000
MASS = 2.0 * np.arcsinh(np.sqrt(M2) / 2.0)
AMP = 1.0 / (2.0 * np.sinh(MASS) * np.sinh(MASS * T / 2.0))


def lattice_p2(shape):
    """sum_mu 4 sin^2(p_mu/2) on the momentum grid of numpy.fft."""
    ps = np.meshgrid(*[2 * np.pi * np.fft.fftfreq(n) for n in shape], indexing="ij")
    return sum(4.0 * np.sin(p / 2.0) ** 2 for p in ps)


def free_fields(eta, m2):
    """phi = K^(-1/2) eta via FFT over all but the first (configuration) axis.

    fftn / ifftn are inverse to each other, and dividing by the real, even
    sqrt(m2 + p^2) is the circulant operator K^(-1/2); so Cov(phi) = K^(-1).
    """
    axes = tuple(range(1, eta.ndim))
    p2 = lattice_p2(eta.shape[1:])
    return np.fft.ifftn(np.fft.fftn(eta, axes=axes) / np.sqrt(m2 + p2), axes=axes).real


def exact_correlator(T_, m2):
    t = np.arange(T_)
    p0 = 2 * np.pi * np.arange(T_) / T_
    return (np.cos(np.outer(t, p0)) / (m2 + 4 * np.sin(p0 / 2) ** 2)).sum(axis=1) / T_


@pytest.fixture(scope="module")
def slice_sums():
    rng = np.random.default_rng(20240601)
    phi = free_fields(rng.standard_normal((N_CONF, T) + (L,) * (D - 1)), M2)
    return phi.sum(axis=tuple(range(2, phi.ndim)))  # (N_conf, T)


@pytest.fixture(scope="module")
def estimate(slice_sums):
    # configurations are exact independent samples; bins of 10 keep the
    # number of brentq solves in the effective-mass tests small
    return correlator_jackknife(
        slice_sums, bin_size=10, spatial_volume=L ** (D - 1), symmetrise_result=True
    )


# ---------------------------------------------------------------- exact facts


def test_exact_correlator_is_single_cosh():
    t = np.arange(T)
    np.testing.assert_allclose(
        exact_correlator(T, M2), AMP * np.cosh(MASS * (t - T / 2)), rtol=1e-12
    )


def test_generator_and_normalisation_exact_on_tiny_lattice():
    """Build K explicitly on a 4 x 3 lattice: the FFT generator has covariance
    K^-1, and (1/V_s) sum_{xs,ys} K^-1 gives the Fourier-sum C(t)."""
    Tt, Ls, m2 = 4, 3, 0.3
    n = Tt * Ls
    idx = np.arange(n).reshape(Tt, Ls)
    K = np.eye(n) * (m2 + 4.0)
    for shift, ax in [(1, 0), (-1, 0), (1, 1), (-1, 1)]:
        K[idx.ravel(), np.roll(idx, shift, axis=ax).ravel()] -= 1.0
    G = free_fields(np.eye(n).reshape(n, Tt, Ls), m2).reshape(n, n)  # rows: phi(e_j)
    np.testing.assert_allclose(G.T @ G, np.linalg.inv(K), atol=1e-12)
    Kinv = np.linalg.inv(K).reshape(Tt, Ls, Tt, Ls)
    c = Kinv.sum(axis=(1, 3))[0] / Ls  # (1/V_s) <S(0) S(t)>
    np.testing.assert_allclose(c, exact_correlator(Tt, m2), rtol=1e-12)


# ---------------------------------------------------------------- correlators


def test_measured_correlator_matches_exact(estimate):
    assert estimate.mean.shape == (T,) and estimate.n_bins == N_CONF // 10
    pull = (estimate.mean - exact_correlator(T, M2)) / estimate.error
    # 4 sigma at each of 24 points (common practice, no source)
    assert np.all(np.abs(pull) < 4.0), pull


def test_vacuum_subtraction_and_plain_estimator(slice_sums):
    vs = L ** (D - 1)
    c = connected_correlator(slice_sums, spatial_volume=vs)
    # definitions in the correlators module docstring (common practice, no source)
    assert c.shape == (N_CONF, T)
    # same as the textbook <S(t0+t) S(t0)> - <S>^2 averaged over t0
    s = slice_sums
    naive = np.array(
        [np.mean(np.roll(s, -t, axis=1) * s) for t in range(T)]
    ) - s.mean() ** 2
    np.testing.assert_allclose(c.mean(axis=0), naive / vs, rtol=1e-10, atol=1e-12)
    # a constant shift of the field (<O> != 0) leaves C(t) and its errors unchanged
    shifted = slice_sums + 3.0 * vs
    e0 = correlator_jackknife(slice_sums, spatial_volume=vs, bin_size=20)
    e1 = correlator_jackknife(shifted, spatial_volume=vs, bin_size=20)
    np.testing.assert_allclose(e1.mean, e0.mean, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(e1.error, e0.error, rtol=1e-8)
    np.testing.assert_allclose(e0.mean, c.mean(axis=0), rtol=1e-10, atol=1e-13)


def test_jackknife_redoes_subtraction_per_sample():
    rng = np.random.default_rng(7)
    a = rng.normal(2.0, 1.0, size=(12, 6))
    b = a + rng.normal(0.0, 0.5, size=(12, 6))
    est = correlator_jackknife(a, b)
    # leave-one-out jackknife with the subtraction redone (common practice, no source)
    brute = np.array(
        [connected_correlator(np.delete(a, k, 0), np.delete(b, k, 0)).mean(0) for k in range(12)]
    )
    np.testing.assert_allclose(est.samples, brute, rtol=1e-10, atol=1e-14)
    # complex operators: real part of O(t0+t) conj(O(t0))
    z = a + 1j * rng.normal(size=a.shape)
    cz = connected_correlator(z).mean(0)
    cr = connected_correlator(z.real).mean(0) + connected_correlator(z.imag).mean(0)
    np.testing.assert_allclose(cz, cr, rtol=1e-10, atol=1e-14)


def test_bootstrap_errors_agree_with_jackknife(slice_sums, estimate):
    bs = correlator_bootstrap(
        slice_sums, bin_size=10, spatial_volume=L ** (D - 1), symmetrise_result=True,
        n_boot=500, rng=3,
    )
    np.testing.assert_allclose(bs.mean, estimate.mean, rtol=1e-12)
    # bootstrap std fluctuates by ~1/sqrt(2 n_boot) = 3 %; allow 4 of those
    # plus the (n-1)/n difference of the two estimators (common practice)
    np.testing.assert_allclose(bs.error, estimate.error, rtol=4 / np.sqrt(1000) + 0.01)


def test_symmetrise():
    rng = np.random.default_rng(1)
    c = rng.normal(size=(3, 8))
    s = symmetrise(c)
    # definition C(t) <-> C(T - t) (common practice, no source)
    np.testing.assert_allclose(s[:, 1:], s[:, :0:-1])
    np.testing.assert_allclose(s[:, 0], c[:, 0])
    np.testing.assert_allclose(symmetrise(s), s)


# ---------------------------------------------------------------- effective masses


def test_effective_mass_exact_data():
    c = exact_correlator(T, M2)
    # a single exact cosh gives m_eff = m at every t (follows from the definition)
    np.testing.assert_allclose(effective_mass(c, "cosh"), MASS, rtol=1e-10)
    t = np.arange(40)
    np.testing.assert_allclose(effective_mass(np.exp(-0.7 * t), "log"), 0.7, rtol=1e-12)
    # the log mass is biased low near T/2 by the backward-propagating part
    assert np.all(effective_mass(c, "log")[: T // 2] < MASS)
    assert np.isnan(effective_mass(np.array([1.0, -1.0, 1.0, 1.0]), "cosh")[0])


def test_effective_mass_plateau(estimate):
    m, err = effective_mass_errors(estimate, "cosh")
    window = slice(2, 10)  # noise-dominated beyond t ~ 10 for these statistics
    assert np.all(np.isfinite(err[window]))
    pull = (m[window] - MASS) / err[window]
    # 4 sigma per point (common practice, no source)
    assert np.all(np.abs(pull) < 4.0), pull


# ---------------------------------------------------------------- fits


def test_fit_mass_matches_exact(estimate):
    fit = fit_correlator(estimate, 2, T // 2)
    # exact lattice mass within 4 sigma; p-value from scipy.stats.chi2.sf
    # (common practice, no source)
    assert fit.dof == (T // 2 - 2 + 1) - 2
    assert abs(fit.mass - MASS) < 4 * fit.mass_error
    assert abs(fit.params[0] - AMP) < 4 * fit.errors[0]
    assert fit.p_value > 1e-3  # a single cosh is exact for the free field


def test_window_scan_rule(estimate):
    scan = scan_fit_windows(estimate, p_min=0.05)
    # documented window rule: earliest t_min with p >= p_min (common practice, no source)
    assert scan.best is not None
    assert all(f.p_value < 0.05 for t0, f in scan.fits.items() if t0 < scan.best.t_min)
    assert scan.best.p_value >= 0.05 and scan.best.t_max == T // 2
    assert abs(scan.best.mass - MASS) < 4 * scan.best.mass_error


def test_noiseless_fit_recovers_parameters():
    t = np.arange(T)
    cov = np.diag((1e-3 * exact_correlator(T, M2)) ** 2)
    fit = fit_cosh(exact_correlator(T, M2), cov, T, 1, T // 2)
    # noiseless data: the fit must be exact to 1e-8 (common practice, no source)
    np.testing.assert_allclose(fit.params, [AMP, MASS], rtol=1e-8)
    assert fit.chi2 < 1e-12
    p2 = np.array([AMP, MASS, 3 * AMP, 1.1])
    c2 = cosh_model(t, p2, T)
    fit2 = fit_cosh(c2, np.diag((1e-3 * c2) ** 2), T, 1, T // 2, n_states=2)
    np.testing.assert_allclose(fit2.params, p2, rtol=1e-8)


def test_fit_errors_on_bad_input(slice_sums):
    few = correlator_jackknife(slice_sums[:80], bin_size=10, symmetrise_result=True)
    # documented ValueErrors of fit_cosh (common practice, no source)
    with pytest.raises(ValueError, match="too few samples"):
        fit_correlator(few, 1, T // 2)  # 8 bins <= 12 points
    c = exact_correlator(T, M2)
    with pytest.raises(ValueError, match="too few points"):
        fit_cosh(c, np.eye(T), T, 10, 11)
    with pytest.raises(ValueError, match="too few points"):
        fit_cosh(c, np.eye(T), T, 8, 11, n_states=2)
    with pytest.raises(ValueError, match="positive definite"):
        fit_cosh(c, np.ones((T, T)), T, 2, 8)
