"""Branch classification and tunnelling rates on synthetic telegraph series (fixed seeds)."""

import numpy as np
import pytest

from sigmasim.analysis.tunnelling import (branch_coordinate, branch_index, dwell_times,
                                          fit_exponential, tunnelling_analysis)


def telegraph(n, p, nf, theta, noise, seed):
    """Markov chain over nf branches, switching with probability p per sweep to a random other one."""
    rng = np.random.default_rng(seed)
    k = np.empty(n, dtype=np.int64)
    k[0] = 0
    switch = rng.random(n) < p
    jumps = rng.integers(1, nf, size=n)
    for i in range(1, n):
        k[i] = (k[i - 1] + jumps[i]) % nf if switch[i] else k[i - 1]
    phase = (theta + 2 * np.pi * k) / nf + rng.normal(0.0, noise, n)
    return k, np.exp(1j * phase) * 0.8


@pytest.mark.parametrize("nf,p", [(2, 0.01), (3, 0.004), (4, 0.02)])
def test_telegraph_rate_recovered(nf, p):
    theta = 2.7
    k, om = telegraph(60000, p, nf, theta, noise=0.15 / nf, seed=11 + nf)
    res = tunnelling_analysis(om, theta, nf, band=0.5, volume=64, seed=3)
    assert np.array_equal(res.index, k)          # noise well inside the band: exact classification
    assert res.n_events == np.count_nonzero(np.diff(k))
    assert abs(res.rate - p) < 4 * res.rate_error
    assert abs(res.rate_mle - p) < 4 * res.rate_mle_error
    assert abs(res.rate_per_volume * 64 - res.rate) < 1e-12
    # geometric dwells of mean 1/p: exponential fit gives tau = 1/p
    assert abs(res.fit.tau_mle - 1 / p) < 4 * res.fit.tau_mle_error
    assert abs(res.fit.tau_hist - 1 / p) < 4 * res.fit.tau_hist_error
    # censored dwells are separate and add up with the completed ones to the whole series
    total = sum(w for _, w in res.completed) + res.censored_first[1] + res.censored_last[1]
    assert total == pytest.approx(res.total_time)
    assert res.occupation.sum() == pytest.approx(1.0)


def test_noise_at_boundary_creates_no_events():
    rng = np.random.default_rng(5)
    nf, theta = 3, 1.0
    x = 0.5 + rng.uniform(-0.2, 0.2, 20000)     # hovering at the midpoint between branches 0 and 1
    om = np.exp(1j * (theta + 2 * np.pi * x) / nf)
    res = tunnelling_analysis(om, theta, nf, band=0.5)
    assert res.n_events == 0
    assert res.censored_last is None and res.censored_first[1] == len(x) - 1
    assert np.isnan(res.rate)
    # without the band the same noise flips the index all the time
    assert tunnelling_analysis(om, theta, nf, band=0.0).n_events > 1000


def test_band_threshold_and_wrap():
    # branch 2 of nf = 3 at x = 2 and branch 0 at x = 3 == 0: circular distance
    x = np.array([0.0, 0.7, 0.76, 0.3, -0.3, -0.8, 2.1])
    idx = branch_index(x, 3, band=0.5)
    assert idx.tolist() == [0, 0, 1, 1, 0, 2, 2]   # 0.7 stays (band), 0.76 and -0.8 switch
    assert branch_index(np.array([0.2, 0.9, 5.0]), 1).tolist() == [0, 0, 0]
    with pytest.raises(ValueError):
        branch_index(x, 3, band=1.0)


def test_branch_coordinate_placement_independent():
    # omega_h of branch k is e^{i (theta + 2 pi k)/nf}
    nf, theta = 3, 3.5
    om = np.exp(1j * (theta + 2 * np.pi * np.arange(3)) / nf)
    x = branch_coordinate(om, theta, nf)
    assert np.allclose(np.round(x) % 3, [0, 1, 2]) and np.allclose(x, np.round(x))


def test_det_source_follows_smooth_transitions():
    nf, theta = 3, 0.4
    rng = np.random.default_rng(2)
    # common phase phi walks from branch 0 to 1 to 2 to 0 with ramps of 20 measurements
    seg = [np.zeros(200), np.linspace(0, 1, 20), np.ones(200), np.linspace(1, 2, 20), 2 * np.ones(200),
           np.linspace(2, 3, 20), 3 * np.ones(200)]
    k = np.concatenate(seg)
    phi = (theta + 2 * np.pi * k) / nf + rng.normal(0, 0.02, len(k))
    v = np.exp(1j * phi)              # V = e^{i phi} 1, mass placement: U = e^{-i theta/nf} V
    det_u = (v * np.exp(-1j * theta / nf)) ** nf
    res = tunnelling_analysis(det_u, theta, nf, source="det", band=0.5)
    om = tunnelling_analysis(v, theta, nf, band=0.5)
    assert res.n_events == 3 and om.n_events == 3
    assert np.array_equal(res.index, om.index)


def test_dwell_times_with_sweeps():
    idx = np.array([0, 0, 1, 1, 1, 0, 0])
    sweeps = np.arange(1, 8) * 10
    events, completed, first, last = dwell_times(idx, sweeps)
    assert events.tolist() == [2, 5]
    assert completed == [(1, 30.0)]
    assert first == (0, 20.0) and last == (0, 10.0)
    assert fit_exponential([]).n == 0
