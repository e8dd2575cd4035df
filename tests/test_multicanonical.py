"""Multicanonical sampling: exactness of the biased kernel, the one-site distribution, estimators.

Statistical checks use fixed seeds and 4-sigma bounds from Gamma-method errors.
"""

from __future__ import annotations

import numpy as np
import pytest

from sigmasim import exact
from sigmasim.chain import Simulation
from sigmasim.config import config_from_dict
from sigmasim.kernels.bias import biased_sweeps
from sigmasim.kernels.general import metropolis, overrelax
from sigmasim.multicanonical import Weight, profile, reweighted_mean, round_trips, run_biased
from sigmasim.rng import mix64_int, step_key
from sigmasim.updates import proposal_table


def _cfg(nf=3, group="U", shape=(4, 4), beta=0.7, h=0.5, kappa=0.3, theta=2.0, seed=5, **run):
    return config_from_dict({
        "name": "muca", "seed": seed, "lattice": {"shape": list(shape)},
        "model": {"group": group, "nf": nf, "beta": beta, "mass": h, "kappa": kappa if group == "U" else 0.0,
                  "theta": theta},
        "run": {"start": "hot", "thermalize": 0, "measurements": 1, "threads": 1, **run}})


@pytest.mark.parametrize("nf,group", [(3, "U"), (1, "U"), (2, "SU"), (2, "U")])
def test_zero_weight_is_the_plain_chain_bit_for_bit(nf, group):
    """W = 0: the biased sweep is the plain Metropolis + overrelaxation kernels, same keys, same bits."""
    cfg = _cfg(nf, group)
    sim = Simulation(cfg)
    lat = sim.lattice
    re0, im0 = sim.state.re.copy(), sim.state.im.copy()
    re1, im1 = re0.copy(), im0.copy()
    step, eps, hits = 0, 0.4, 3
    for _ in range(3):
        for c in (0, 1):
            t, td = proposal_table(nf, cfg.special, eps, step_key(cfg.seed, step, 0x5EED))
            metropolis(re0, im0, lat.neighbours, c * lat.half, (c + 1) * lat.half, nf, cfg.beta, sim.hdiag,
                       cfg.kappa, cfg.eta, t, td, hits, step_key(cfg.seed, step), 1)
            step += 1
        for c in (0, 1):
            overrelax(re0, im0, lat.neighbours, c * lat.half, (c + 1) * lat.half, nf, cfg.beta, sim.hdiag,
                      cfg.kappa, cfg.eta, cfg.special, step_key(cfg.seed, step), 1)
            step += 1
    xs = np.zeros(3)
    counts = np.zeros(4, np.int64)
    end = biased_sweeps(re1, im1, lat.neighbours, nf, cfg.special, cfg.beta, sim.hdiag, cfg.kappa, cfg.eta, hits,
                        1, eps, np.uint64(mix64_int(cfg.seed)), 0, 3, 0, complex(np.exp(1j * cfg.theta_angles[0])),
                        -1.0, 0.2, np.zeros(10), 10.0, 0.0, np.zeros(10, np.int64), xs, counts)
    assert end == step
    assert np.array_equal(re0, re1) and np.array_equal(im0, im1)
    assert counts[0] > 0 and counts[1] == 3 * lat.volume * hits


def _one_site_chain(nf, h, kappa, theta_m, theta_a, weight, variable, sweeps, seed=3, eps=1.0):
    """The biased kernel on a single site (beta = 0): x after every sweep."""
    mode = {"im_omega_h": 0, "im_det": 1}[variable]
    cvar = complex(np.exp(1j * (theta_m if mode == 0 else theta_a)))
    re = np.zeros((nf * nf, 1))
    im = np.zeros((nf * nf, 1))
    re[np.arange(nf) * (nf + 1), 0] = 1.0
    nbr = np.zeros((2, 1), dtype=np.int64)
    hdiag = np.full(nf, h * np.exp(1j * theta_m), dtype=np.complex128)
    xs = np.empty(sweeps)
    counts = np.zeros(4, np.int64)
    biased_sweeps(re, im, nbr, nf, False, 0.0, hdiag, kappa, complex(np.exp(1j * theta_a)), 2, 1, eps,
                  np.uint64(mix64_int(seed)), 0, sweeps, mode, cvar, weight.lo, weight.dx, weight.values.copy(),
                  weight.wall, 0.0, np.zeros(weight.bins, np.int64), xs, counts)
    return xs, counts


ONE_SITE = [  # nf, h, kappa, theta_m, theta_a, variable, sweeps
    (1, 0.5, 2.0, 0.4, 0.3, "im_omega_h", 60000),
    (3, 0.5, 2.0, np.pi / 3, 0.0, "im_omega_h", 60000),  # theta = pi: the U(3) case of the study
    (3, 0.5, 2.0, 0.4, 0.3, "im_det", 60000),
]


@pytest.mark.parametrize("nf,h,kappa,theta_m,theta_a,variable,sweeps", ONE_SITE)
def test_one_site_biased_chain_reweights_to_the_exact_distribution(nf, h, kappa, theta_m, theta_a, variable,
                                                                   sweeps):
    """beta = 0, one site: sampling exp(-S - W) with W = 2 ln P (an over-flattening weight: the
    sampled density is about 1/P) and reweighting with exp(+W) gives the exact one-site P(x) per
    bin within 4 sigma (Gamma method), while the sampled histogram is far from P (the bias acted)."""
    lo, hi, bins = -0.8, 0.8, 16
    edges = np.linspace(lo, hi, bins + 1)
    p_exact = exact.one_site_variable_distribution(nf, h, kappa, theta_m, theta_a, edges, variable, n_gauss=24)
    weight = Weight(lo, hi, 2.0 * np.log(p_exact / p_exact.max()), wall=5.0)
    xs, counts = _one_site_chain(nf, h, kappa, theta_m, theta_a, weight, variable, sweeps)
    assert counts[0] > 0.2 * counts[1]
    prof = profile(xs, weight(xs), edges)
    p_mc = prof["p"] * np.diff(edges)
    err = prof["p_error"] * np.diff(edges)
    pulls = (p_mc - p_exact) / err
    assert np.all(np.isfinite(pulls)), pulls
    assert np.max(np.abs(pulls)) < 4.0, pulls
    assert p_exact.max() / p_exact.min() > 2.0
    sampled = prof["counts"] / prof["counts"].sum()
    assert np.max(np.abs(sampled / (p_exact / p_exact.sum()) - 1.0)) > 0.4


def test_one_site_sign_of_the_weight_matters():
    """A weight of the wrong sign (exp(+W) sampled) fails the same comparison: the test can fail."""
    lo, hi, bins = -0.8, 0.8, 16
    edges = np.linspace(lo, hi, bins + 1)
    p_exact = exact.one_site_variable_distribution(1, 0.5, 2.0, 0.4, 0.3, edges, "im_omega_h", n_gauss=24)
    weight = Weight(lo, hi, np.log(p_exact / p_exact.max()), wall=5.0)
    xs, _ = _one_site_chain(1, 0.5, 2.0, 0.4, 0.3, weight, "im_omega_h", 20000)
    prof = profile(xs, -weight(xs), edges)
    pulls = (prof["p"] * np.diff(edges) - p_exact) / (prof["p_error"] * np.diff(edges))
    assert np.nanmax(np.abs(pulls)) > 10.0


def _mean_nodes(breaks, n=20):
    """Nodes and weights on [-1, 1], split at ``breaks``, mapped to be smooth at the split points."""
    xi, wi = np.polynomial.legendre.leggauss(n)
    br = np.array([-1.0, *breaks, 1.0])
    lo, hi = br[:-1, None], br[1:, None]
    a = 0.5 * np.pi * (1.0 + xi[None, :])
    return ((lo + (hi - lo) * (1.0 - np.cos(a)) / 2.0).ravel(),
            ((hi - lo) * np.pi / 4.0 * np.sin(a) * wi[None, :]).ravel())


@pytest.mark.parametrize("nf", [1, 2, 3])
def test_one_site_distribution_mean_and_convergence(nf):
    """The exact bin probabilities are non-negative, sum to 1 and give <x> of one_site_u (Bessel
    sums, an independent method): <x> = 1 - int_{-1}^{1} P(x < e) de with P(x < e) from the bins.
    The integral over e is split where P(x < e) has kinks (Nf e = -Nf, -Nf + 2, ..., Nf)."""
    theta_m, theta_a = 0.4, 0.3
    ref = exact.one_site_u(nf, 0.5, kappa=2.0, theta_m=theta_m, theta_a=theta_a)
    for variable, key, breaks in (("im_omega_h", "im_tr_thetam_u", [(2 * k - nf) / nf for k in range(1, nf)]),
                                  ("im_det", "im_thetaa_det_u", [])):
        e, w = _mean_nodes(breaks)
        p = exact.one_site_variable_distribution(nf, 0.5, 2.0, theta_m, theta_a, np.concatenate([[-1.0], e]),
                                                 variable, n_gauss=24)
        assert p.min() > -1e-6  # quadrature accuracy of the bins at n_gauss = 24 (about 1e-6 for U(3))
        mean = 1.0 - np.sum(w * np.cumsum(p))
        assert abs(mean - ref[key]) < 1e-6, (variable, mean, ref[key])
        full = exact.one_site_variable_distribution(nf, 0.5, 2.0, theta_m, theta_a, [-1.0, 1.0], variable)
        assert abs(full[0] - 1.0) < 1e-12
    if nf < 3:
        edges = np.linspace(-0.7, 0.9, 17)
        a = exact.one_site_variable_distribution(nf, 0.5, 2.0, theta_m, theta_a, edges, "im_omega_h", n_gauss=24)
        b = exact.one_site_variable_distribution(nf, 0.5, 2.0, theta_m, theta_a, edges, "im_omega_h", n_gauss=48)
        assert np.max(np.abs(a - b)) < 1e-5


def test_reweighted_mean_bias_and_coverage():
    """Synthetic biased samples with a known canonical mean: the ratio estimator is unbiased to
    within its error and its 1-sigma interval covers the truth in about 68 % of 200 replicas.

    Canonical x ~ N(0, 1); sampled with W(x) = -x (density N(1, 1)); <x>_canonical = 0.
    """
    rng = np.random.default_rng(7)
    hits = 0
    vals, errs = [], []
    for _ in range(200):
        x = rng.normal(1.0, 1.0, size=400)
        v, e, _ = reweighted_mean(x, -x)
        vals.append(v)
        errs.append(e)
        hits += abs(v) < e
    vals = np.array(vals)
    assert abs(vals.mean()) < 4 * vals.std() / np.sqrt(vals.size) + 0.01  # ratio bias O(1/N) = small
    assert 0.60 < hits / 200 < 0.76
    # few events: 10 samples still give a finite estimate and error
    v, e, _ = reweighted_mean(rng.normal(1.0, 1.0, size=10), -rng.normal(1.0, 1.0, size=10))
    assert np.isfinite(v) and e > 0


def test_round_trips_counts_full_cycles_only():
    x = np.array([0, -1, 0, 1, 0, -1, -1, 1, 1, -1, 0.5])
    n, at = round_trips(x, -0.5, 0.5)
    # left (1) -> right (3) -> left (5): 1; -> right (7) -> left (9): 2
    assert n == 2 and list(at) == [5, 9]
    assert round_trips(np.zeros(5), -0.5, 0.5)[0] == 0
    assert round_trips(np.array([1.0, -1.0]), -0.5, 0.5)[0] == 0


def test_weight_function_matches_the_kernel():
    """Weight.__call__ is the function the kernel samples (interpolation, flat ends, walls)."""
    from sigmasim.kernels.bias import weight_value

    w = Weight(-0.5, 0.5, np.array([3.0, 1.0, 0.0, 2.0]), wall=7.0)
    for x in np.linspace(-0.9, 0.9, 37):
        assert abs(float(w(x)) - weight_value(x, w.lo, w.dx, w.values, w.wall)) < 1e-12
    assert float(w(-0.5)) == 3.0 and float(w(0.5)) == 2.0
    assert abs(float(w(-0.75)) - (3.0 + 7.0)) < 1e-12


def test_resume_continues_the_chain_exactly():
    cfg = _cfg(3, "U", shape=(4, 4), seed=9)
    w = Weight.harmonic(20.0, 0.0, -0.6, 0.6, 24)
    one = run_biased(cfg, w, 40, thermalize=10)
    a = run_biased(cfg, w, 20, thermalize=10)
    b = run_biased(cfg, w, 20, state=a.state)
    assert np.array_equal(np.concatenate([a.x, b.x]), one.x)
    assert np.array_equal(one.series["action"], np.concatenate([a.series["action"], b.series["action"]]))
    # x is Im omega_h of the run's own measurement
    assert np.allclose(one.x, one.series["omega_h"].imag, atol=1e-12)
