"""The exact one-site samplers against their densities (Kolmogorov-Smirnov tests).

Fixed seeds; a p-value below 1e-3 fails (a correct sampler fails with
probability 1e-3 per test, and the seeds are fixed, so the result is stable).
"""

import numpy as np
import pytest
from numba import njit
from scipy import integrate, stats

from sigmasim.kernels.group import sample_su2_x0, von_mises_angle
from sigmasim.kernels.simd import log1m, log_pos, one_minus_exp_neg, sincos_pm_pi
from sigmasim.kernels.unf import _vm_draws, _x0_draws
from sigmasim.rng import SITE_STRIDE, step_key


@njit(cache=True)
def _draw_vm(k, key, n):
    out = np.empty(n)
    for i in range(n):
        c, s, _ = von_mises_angle(k, key, np.uint64(i) * SITE_STRIDE)
        out[i] = np.arctan2(s, c)
    return out


@njit(cache=True)
def _draw_x0(alpha, key, n):
    out = np.empty(n)
    for i in range(n):
        x, _ = sample_su2_x0(alpha, key, np.uint64(i) * SITE_STRIDE)
        out[i] = x
    return out


@pytest.mark.parametrize("k", [1e-3, 0.3, 1.0, 4.0, 30.0])
def test_von_mises_against_scipy(k):
    # Best & Fisher, J. R. Stat. Soc. C 28 (1979) 152; reference: scipy.stats.vonmises
    x = _draw_vm(k, step_key(1, int(k * 1000)), 20000)
    p = stats.kstest(x, stats.vonmises(k).cdf).pvalue
    assert p > 1e-3


def _su2_cdf(alpha):
    grid = np.linspace(-1.0, 1.0, 4001)
    dens = np.sqrt(1.0 - grid**2) * np.exp(alpha * (grid - 1.0))
    cdf = integrate.cumulative_trapezoid(dens, grid, initial=0.0)
    cdf /= cdf[-1]
    return lambda x: np.interp(x, grid, cdf)


@pytest.mark.parametrize("alpha", [0.01, 0.5, 1.99, 2.0, 2.99, 3.0, 6.0, 40.0])
def test_su2_x0_against_exact_density(alpha):
    # density ~ sqrt(1 - x0^2) exp(alpha x0): Creutz, PRD 21 (1980) 2308; Kennedy & Pendleton,
    # PLB 156 (1985) 393.  Both branches (alpha < 3 and >= 3) are covered.
    x = _draw_x0(alpha, step_key(2, int(alpha * 100)), 20000)
    assert (np.abs(x) <= 1).all()
    p = stats.kstest(x, _su2_cdf(alpha)).pvalue
    assert p > 1e-3


@njit(cache=True)
def _x0_counters(alpha, key, n):
    """Counters consumed by each of n x0 draws."""
    out = np.empty(n)
    for i in range(n):
        n0 = np.uint64(i) * SITE_STRIDE
        _, n1 = sample_su2_x0(alpha, key, n0)
        out[i] = np.float64(n1 - n0)
    return out


@pytest.mark.parametrize("alpha", [0.05, 1.0, 2.9])
def test_su2_x0_small_alpha_uses_creutz_cost(alpha):
    # Creutz, PRD 21 (1980) 2308: x = 1 - x0 from exp(-alpha x) on (0, 2), accepted with
    # probability sqrt(x (2 - x)), two counters per attempt.  Its acceptance is
    # p = int sqrt(x(2-x)) e^{-alpha x} / int e^{-alpha x}; the attempts are geometric, so the
    # mean counter use is 2/p with standard deviation 2 sqrt(1 - p)/p per draw.  (The disk
    # rejection used before took about 3.5 attempts of three counters at small alpha.)
    num = integrate.quad(lambda x: np.sqrt(x * (2 - x)) * np.exp(-alpha * x), 0, 2)[0]
    p = num / (-np.expm1(-2 * alpha) / alpha)
    n = 20000
    c = _x0_counters(alpha, step_key(5, int(alpha * 100)), n)
    sigma = 2 * np.sqrt(1 - p) / p / np.sqrt(n)
    assert abs(c.mean() - 2 / p) < 4 * sigma, (c.mean(), 2 / p, sigma)


def test_samplers_fail_on_wrong_density():
    # the test can fail: a von Mises sample at k = 1 is not one at k = 1.3
    x = _draw_vm(1.0, step_key(3, 0), 20000)
    assert stats.kstest(x, stats.vonmises(1.3).cdf).pvalue < 1e-3


# ----------------------------------------------------------------------------- vectorised forms
@njit(cache=True, error_model="numpy")
def _poly(x, y, z, w):
    out = np.empty((5, x.shape[0]))
    for i in range(x.shape[0]):
        out[0, i] = log_pos(x[i])
        out[1, i] = log1m(y[i])
        out[2, i], out[3, i] = sincos_pm_pi(z[i])
        out[4, i] = one_minus_exp_neg(w[i])
    return out


def test_polynomial_log_sincos_exp_against_numpy():
    # the kernels' vectorisable log, log(1 - y), sin/cos and 1 - exp(-y) (kernels/simd.py) over the
    # inputs the rejection loops give them: uniforms on the 53-bit grid (down to 2^-54), ratios of
    # them (1e-17 .. 1e17), 1 - y near 1 and 0, angles in [-pi, pi], y in [0, 708] and beyond
    rng = np.random.default_rng(4)
    n = 200_000
    u = (np.floor(rng.random(n) * 2.0**53) + 0.5) * 2.0**-53
    x = np.concatenate([u, u / u[::-1], 10.0 ** rng.uniform(-300, 300, n), 1.0 + rng.uniform(-1e-9, 1e-9, n),
                        [2.0**-54, 1.0 - 2.0**-53, 1.0, np.sqrt(2.0), np.nextafter(np.sqrt(2.0), 2.0), np.sqrt(0.5)]])
    y = np.concatenate([u * -np.expm1(-6.0), u * 1e-12, u, [0.0, 5e-324, 1.0 - 2.0**-53]])
    z = np.concatenate([np.pi * (2.0 * u - 1.0), np.pi * u, [np.pi, -np.pi, 0.0, np.pi / 2, 1e-300]])
    w = np.concatenate([6.0 * u, 1e-8 * u, 800.0 * u, [0.0, 5e-324, 708.0]])
    k = max(len(x), len(y), len(z), len(w))
    x, y, z, w = (np.resize(a, k) for a in (x, y, z, w))
    got = _poly(x, y, z, w)
    for g, ref, rel in ((got[0], np.log(x), True), (got[1], np.log1p(-y), True), (got[2], np.sin(z), False),
                        (got[3], np.cos(z), False), (got[4], -np.expm1(-np.minimum(w, 708.0)), True)):
        err = np.abs(g - ref) / (np.maximum(np.abs(ref), 1e-300) if rel else 1.0)
        err = np.where(ref == 0.0, np.abs(g), err)
        assert err.max() < 1e-15, (err.max(), err.argmax())
    # the test can fail: float32 accuracy is far outside the bound
    assert np.abs(np.float32(np.log(x)) - np.log(x)).max() / np.abs(np.log(x)).max() > 1e-15


@njit(cache=True)
def _vector_draws(a, key):
    """unf's vectorised x0 and von Mises draws for sites s < len(a) with counters from s * SITE_STRIDE."""
    m = a.shape[0]
    out = np.empty((3, m))
    L = np.empty(m, dtype=np.int64)
    T = np.empty((3, m))
    OK = np.empty(m, dtype=np.bool_)
    _x0_draws(a, out[0], L, T[0], T[1], OK, key, np.uint64(0), np.uint64(0), m)
    _vm_draws(a, out[1], out[2], L, T[0], T[1], T[2], OK, key, np.uint64(0), np.uint64(0), m)
    return out


def test_vectorised_rejection_loops_are_the_scalar_samplers():
    # unf._x0_draws / _vm_draws (first attempt of every site in a vector loop, then the rejected
    # sites as a list) must use the counters of group.sample_su2_x0 / von_mises_angle attempt by
    # attempt, so they return the same draws up to the rounding of the polynomial log/sin/cos
    # (a decision flip at the acceptance boundary has probability ~1e-15 per draw): both Creutz
    # and Kennedy-Pendleton x0 (alpha below and above 3), von Mises from k < 1e-12 to large k,
    # no field (alpha < 2e-300: x0 = 2, "r = 1"), non-finite input (NaN out).  The scalar
    # samplers run through the helpers above (same counters, site s from s * SITE_STRIDE).
    key = step_key(7, 0)
    n = 300
    for a in (0.0, 1e-301, 1e-13, 1e-5, 0.3, 1.0, 2.999999, 3.0, 4.5, 12.0, 300.0, np.nan, np.inf):
        got = _vector_draws(np.full(n, a), key)
        if not np.isfinite(a):
            assert np.isnan(got).all()
            continue
        if a < 2e-300:
            assert (got[0] == 2.0).all()
        else:
            np.testing.assert_allclose(got[0], _draw_x0(a, key, n), rtol=0, atol=1e-12)
        ang = np.arctan2(got[2], got[1])
        d = np.angle(np.exp(1j * (ang - _draw_vm(a, key, n))))
        assert np.abs(d).max() < 1e-12, (a, np.abs(d).max())
    # both branches, no field and non-finite input mixed in one chunk: many sites with alpha >= 3
    # (both branches evaluated for every site) and few (a Creutz loop over all sites, then a
    # Kennedy-Pendleton loop over the list of the few)
    kinds = np.array([1.0, 4.5, 0.3, 3.0, 2.999999, 12.0, 0.0, np.nan])
    many = kinds[np.arange(n) * 5 % len(kinds)]
    few = many.copy()
    few[few >= 3.0] = 1.0
    few[::37] = 4.5
    few[5::41] = 3.0
    assert 0 < np.sum(few >= 3.0) * 16 <= n < np.sum(many >= 3.0) * 16
    for mixed in (many, few):
        got = _vector_draws(mixed, key)[0]
        for a in kinds:
            sel = mixed == a if np.isfinite(a) else np.isnan(mixed)
            if not np.isfinite(a):
                assert np.isnan(got[sel]).all()
            elif a < 2e-300:
                assert (got[sel] == 2.0).all()
            else:
                np.testing.assert_allclose(got[sel], _draw_x0(a, key, n)[sel], rtol=0, atol=1e-12)
    # the test can fail: another key gives other draws
    assert np.abs(_vector_draws(np.full(n, 1.0), step_key(7, 1))[0] - _draw_x0(1.0, key, n)).max() > 0.1
