"""Symmetries of the action, checked on short chains.

* theta placement: U -> e^{i alpha} U moves theta between the mass and the
  anomaly phase (common practice, no source); e^{i theta_m} Omega and det
  observables in the rotated frame agree within 4 sigma.
* kappa = 0: theta is unphysical; e^{i theta_m} Omega at theta equals Omega at 0.
* h = 0: the action is Z_nf symmetric (U -> e^{2 pi i/nf} U), so arg Omega
  spends 1/nf of the time in each of the nf sectors.
* exact conservation: overrelaxation keeps S to rounding where it is exact.
"""

import numpy as np
import pytest

from sigmasim.analysis.gamma import gamma_analysis
from sigmasim.chain import Simulation, simulate
from sigmasim.config import config_from_dict


def _cfg(**model):
    run = model.pop("run", {})
    shape = model.pop("shape", [8, 8])
    sched = model.pop("schedule", [{"update": "heatbath"}, {"update": "overrelax", "repeat": 2}])
    return config_from_dict({
        "seed": model.pop("seed", 5),
        "lattice": {"shape": shape},
        "model": model,
        "updates": {"schedule": sched},
        "run": {"thermalize": 100, "measurements": 1500, "start": "hot", **run},
    })


def _agree(a, b):
    ga, gb = gamma_analysis(a), gamma_analysis(b)
    return abs(ga.value - gb.value) <= 4 * np.hypot(ga.error, gb.error), (ga, gb)


@pytest.mark.parametrize("nf", [1, 2, 3])
def test_theta_placement_does_not_matter(nf):
    base = dict(nf=nf, beta=0.3, mass=0.6, kappa=0.8, theta=2.4)
    runs = {p: simulate(_cfg(**base, theta_placement=p, seed=10 + i))
            for i, p in enumerate(["mass", "anomaly", "split"])}
    for p in ("anomaly", "split"):
        for key in ("action", "action_mass", "action_det"):
            ok, info = _agree(runs["mass"][key], runs[p][key])
            assert ok, (p, key, info)
        for part in (np.real, np.imag):
            ok, info = _agree(part(runs["mass"]["omega_h"]), part(runs[p]["omega_h"]))
            assert ok, (p, info)


@pytest.mark.parametrize("nf", [1, 3])
def test_theta_is_unphysical_without_anomaly(nf):
    at_theta = simulate(_cfg(nf=nf, beta=0.3, mass=0.7, kappa=0.0, theta=2.0, seed=21))
    at_zero = simulate(_cfg(nf=nf, beta=0.3, mass=0.7, kappa=0.0, theta=0.0, seed=22))
    for part in (np.real, np.imag):
        ok, info = _agree(part(at_theta["omega_h"]), part(at_zero["omega"]))
        assert ok, info
    ok, info = _agree(at_theta["action"], at_zero["action"])
    assert ok, info


@pytest.mark.parametrize("nf", [2, 3])
def test_zero_mass_has_z_nf_symmetry(nf):
    # small volume, moderate beta: arg Omega wanders through all sectors
    data = simulate(_cfg(nf=nf, beta=0.25, mass=0.0, kappa=0.6, theta=1.0, shape=[4, 4],
                         run={"measurements": 6000}, seed=31))
    sector = np.floor((np.angle(data["omega"]) % (2 * np.pi)) / (2 * np.pi / nf)).astype(int) % nf
    for k in range(nf):
        g = gamma_analysis((sector == k).astype(float))
        assert abs(g.value - 1 / nf) <= 4 * g.error, (k, g.value, g.error)


def _full_action(sim):
    """S of the current field by numpy (independent of the kernels)."""
    cfg, lat, st = sim.config, sim.lattice, sim.state
    nf = cfg.nf
    u = (st.re + 1j * st.im).T.reshape(-1, nf, nf)
    link = 0.0
    for mu in range(lat.ndim):
        v = u[lat.neighbours[2 * mu]]
        link += np.einsum("xab,xab->", u.conj(), v).real
    mass = np.einsum("f,xff->", sim.hdiag, u).real
    det = np.linalg.det(u).sum()
    return -cfg.beta * link - mass - 2 * cfg.kappa * (cfg.eta * det).real


@pytest.mark.parametrize("nf, group, kappa", [(1, "U", 0.7), (2, "SU", 0.0), (3, "SU", 0.0),
                                              (3, "U", 0.0), (4, "U", 0.0)])
def test_overrelaxation_keeps_the_action(nf, group, kappa):
    cfg = _cfg(nf=nf, group=group, beta=0.4, mass=[0.3 + 0.1 * f for f in range(nf)],
               kappa=kappa, theta=1.3, shape=[4, 4, 4], schedule=[{"update": "overrelax"}])
    sim = Simulation(cfg)
    s0 = _full_action(sim)
    for _ in range(5):
        sim.sweep()
    assert abs(_full_action(sim) - s0) < 1e-9 * max(1.0, abs(s0))
    # and the field moved
    assert not np.allclose(sim.state.re, Simulation(cfg).state.re)


@pytest.mark.parametrize("nf, group", [(1, "U"), (2, "U"), (3, "SU"), (5, "U"), (8, "U")])
def test_measured_action_equals_full_action(nf, group):
    cfg = _cfg(nf=nf, group=group, beta=0.4, mass=[0.3 - 0.2 * f for f in range(nf)], kappa=0.5,
               theta=2.2, theta_placement="split", shape=[4, 2, 4])
    sim = Simulation(cfg)
    for _ in range(3):
        sim.sweep()
    rec = sim.measure()
    assert np.isclose(rec["action"] * cfg.volume, _full_action(sim), rtol=1e-12, atol=1e-10)
