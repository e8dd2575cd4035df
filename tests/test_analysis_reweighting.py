"""Reweighting in theta against direct runs and against the exact one-site free energy."""

import math

import numpy as np
import pytest

from sigmasim.analysis.gamma import gamma_analysis
from sigmasim.analysis.reweighting import (delta_action, free_energy_shift, kish_ess, multi_histogram,
                                           reweight, reweight_omega_h, theta_action)
from sigmasim.chain import simulate
from sigmasim.config import config_from_dict
from sigmasim.exact import one_site_u


pytestmark = pytest.mark.usefixtures("one_thread")  # conftest: one numba thread


def run(theta, seed, shape, beta, meas, placement="mass", mass=0.5, kappa=0.5, nf=2):
    cfg = config_from_dict({
        "seed": seed, "lattice": {"shape": shape},
        "model": {"nf": nf, "beta": beta, "mass": mass, "kappa": kappa, "theta": float(theta),
                  "theta_placement": placement},
        "run": {"thermalize": 100, "measurements": meas},
    })
    return simulate(cfg), cfg


@pytest.mark.parametrize("placement", ["mass", "split"])
def test_theta_action_matches_recorded_terms(placement):
    s, cfg = run(1.3, 4, [4, 4], 0.5, 50, placement)
    # the recomputed theta-dependent action equals the recorded mass + det terms
    assert np.allclose(theta_action(s, cfg, cfg.theta) / cfg.volume, s["action_mass"] + s["action_det"],
                       atol=1e-12)
    assert np.allclose(delta_action(s, cfg, cfg.theta), 0.0)
    # Delta S from the formula with the per-flavour condensates and the det
    tm, ta = cfg.theta_angles
    c2 = config_from_dict({**cfg.to_dict(), "model": {**cfg.to_dict()["model"], "theta": 1.7}})
    tm2, ta2 = c2.theta_angles
    h = np.array(cfg.mass)
    ds = (-cfg.volume * ((s["condensate"] @ (h * np.exp(1j * tm2))).real
                         - (s["condensate"] @ (h * np.exp(1j * tm))).real)
          - 2 * cfg.kappa * cfg.volume * ((np.exp(1j * ta2) - np.exp(1j * ta)) * s["det"]).real)
    assert np.allclose(delta_action(s, cfg, 1.7), ds)


def test_kish_ess():
    assert kish_ess(np.zeros(10)) == pytest.approx(10.0)
    assert kish_ess(np.array([0.0, -1000.0, -1000.0])) == pytest.approx(1.0)


def test_single_histogram_agrees_with_direct_runs():
    theta0, shift = 2.0, 0.25
    s, cfg = run(theta0, 1, [4, 4], 0.5, 6000)
    for t in (theta0 - shift, theta0 + shift):
        re, im = reweight_omega_h(s, cfg, t)
        assert re.ess_fraction > 0.5            # a small shift keeps most of the sample
        d, _ = run(t, 99, [4, 4], 0.5, 6000)
        for part, rw in ((d["omega_h"].real, re), (d["omega_h"].imag, im)):
            g = gamma_analysis(part)
            assert abs(rw.value - g.value) < 4 * math.hypot(rw.error, g.error)
        # the reweighted value moved: it differs from the unreweighted mean at theta0
        assert abs(im.value - np.mean(s["omega_h"].imag)) > 3 * im.error
    # observable given by name
    r = reweight(s, cfg, theta0 + shift, "action_beta")
    assert math.isfinite(r.value) and r.error > 0


def test_multi_histogram_free_energy_matches_exact_one_site():
    # beta = 0: every site independent, ln Z_lattice = V ln Z_site
    nf, h, kappa, shape = 2, 1.0, 0.5, [4]
    ladder = np.linspace(0.0, math.pi, 7)
    runs = [run(t, 10 + i, shape, 0.0, 2000, mass=h, kappa=kappa, nf=nf) for i, t in enumerate(ladder)]
    ev = np.linspace(0.0, math.pi, 9)
    res = multi_histogram(runs, ev, 0.0, n_boot=40, seed=1)
    assert res.converged
    v = 4
    exact = np.array([-v * (one_site_u(nf, h, kappa, t / nf, 0.0)["ln_z"] - one_site_u(nf, h, kappa)["ln_z"])
                      for t in ev])
    assert res.delta_f[0] == pytest.approx(0.0, abs=1e-12)
    assert exact[-1] > 0.5                                        # a sizeable theta dependence
    assert np.all(np.abs(res.delta_f[1:] - exact[1:]) < 4 * res.error[1:])
    # the same at the run angles
    ex_runs = np.array([-v * (one_site_u(nf, h, kappa, t / nf, 0.0)["ln_z"] - one_site_u(nf, h, kappa)["ln_z"])
                        for t in ladder])
    assert np.allclose(res.f_runs, ex_runs, atol=0.06)
    # single-histogram free energy of a small step agrees too
    f, e, ess = free_energy_shift(*runs[0], ladder[1])
    assert abs(f - ex_runs[1]) < 4 * e and ess > 1000


def test_multi_histogram_refuses_mixed_runs():
    a = run(0.0, 1, [4], 0.0, 20)
    b = run(0.5, 2, [4], 0.0, 20, kappa=0.7)
    with pytest.raises(ValueError, match="differ in kappa"):
        multi_histogram([a, b], [0.2])


def _u3_branch_run(theta, k, seed, meas=1000):
    cfg = config_from_dict({
        "seed": seed, "lattice": {"shape": [4, 4, 4]},
        "model": {"nf": 3, "beta": 3.0, "mass": 0.3, "kappa": 3.0, "theta": float(theta)},
        "run": {"thermalize": 50, "measurements": meas, "start": "branch", "start_branch": k},
    })
    return simulate(cfg), cfg


def test_reweighting_across_pi_into_an_unvisited_vacuum_is_refused():
    """U(3), 4^3, beta 3, h 0.3, kappa 3 (tree level, sigmasim.vacua: first-order point at pi,
    branch 0 global below, branch -1 above).  A run at theta = 3.0 sits in branch 0 throughout;
    reweighted to 3.3 it gives Im omega_h > 0 with a Kish ESS of hundreds of samples, while the
    direct run at 3.3 in the global branch -1 has Im omega_h < 0 (measured: +0.52 with ESS fraction
    0.30, i.e. 297 of 1000, against -0.63; +0.61 with 0.60 before the heatbath's random subgroup
    order changed the chain).  An ESS fraction above about 0.1 is commonly read as a trustworthy
    reweighting (common practice, no source).  The ESS cannot see this; the branch census does."""
    import warnings

    from sigmasim.analysis.reweighting import (UnvisitedVacuumError, UnvisitedVacuumWarning,
                                               branch_census)

    s, cfg = _u3_branch_run(3.0, 0, 1)
    assert branch_census(s, cfg, 3.3) == {0: 1.0}
    _, im = reweight_omega_h(s, cfg, 3.3, branch_check="off")
    d, _ = _u3_branch_run(3.3, -1, 2)
    direct = gamma_analysis(d["omega_h"].imag)
    assert im.ess_fraction > 0.2                     # "healthy" ESS (well above 0.1) ...
    assert im.value > 0 > direct.value + 4 * direct.error  # ... and the wrong sign
    with pytest.raises(UnvisitedVacuumError, match="branch -1"):
        reweight_omega_h(s, cfg, 3.3)
    with pytest.warns(UnvisitedVacuumWarning):
        re, _ = reweight_omega_h(s, cfg, 3.3, branch_check="warn")
    assert re.warning and re.target_global == (-1,)
    # on the same side of pi the run's branch is the global one: no complaint
    with warnings.catch_warnings():
        warnings.simplefilter("error", UnvisitedVacuumWarning)
        re, _ = reweight_omega_h(s, cfg, 3.1)
    assert re.warning is None and re.target_global == (0,)
    # multi-histogram from runs at 2.9 and 3.0 (both only in branch 0; a run at 3.1 on this
    # small lattice already tunnels to branch -1, which the census would count as visited):
    # 3.2 is flagged, 2.95 is not
    s2, cfg2 = _u3_branch_run(2.9, 0, 3)
    assert branch_census(s2, cfg2, 3.2) == {0: 1.0}
    with pytest.warns(UnvisitedVacuumWarning, match="3.2"):
        mh = multi_histogram([(s, cfg), (s2, cfg2)], [2.95, 3.2], theta_ref=3.0, n_boot=4)
    assert mh.unreliable.tolist() == [False, True]
