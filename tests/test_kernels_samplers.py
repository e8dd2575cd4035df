"""The exact one-site samplers against their densities (Kolmogorov-Smirnov tests).

Fixed seeds; a p-value below 1e-3 fails (a correct sampler fails with
probability 1e-3 per test, and the seeds are fixed, so the result is stable).
"""

import numpy as np
import pytest
from numba import njit
from scipy import integrate, stats

from sigmasim.kernels.group import sample_su2_x0, von_mises_angle
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
