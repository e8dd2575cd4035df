"""The linear sigma model (model.kind = 'linear'): exact checks, identities, reproducibility.

Statistical checks use fixed seeds and 4-sigma Gamma-method bounds (U. Wolff,
Comput. Phys. Commun. 156 (2004) 143, via sigmasim.analysis.gamma).
"""

import numpy as np
import pytest
from scipy import integrate

from sigmasim import validation
from sigmasim.analysis.gamma import gamma_analysis
from sigmasim.chain import make_simulation, simulate
from sigmasim.config import _quartic_det_min, config_from_dict
from sigmasim.errors import ConfigError
from sigmasim.storage import open_run

from runfiles import (assert_same_contents, assert_thread_independent, contents, resume,
                      run_file)

MIXED = [{"update": "metropolis"}, {"update": "heatbath"}, {"update": "overrelax", "repeat": 2}]


def _cfg(shape=(8, 4, 4), seed=7, schedule=MIXED, run=None, **model):
    m = {"kind": "linear", "nf": 1, "mass": 0.0, **model}
    r = {"thermalize": 100, "measurements": 500, "start": "hot", **(run or {})}
    return config_from_dict({"name": "lin", "seed": seed, "lattice": {"shape": list(shape)},
                             "model": m, "updates": {"schedule": schedule}, "run": r})


def _within(samples, exact_value, n_sigma=4.0):
    res = gamma_analysis(np.asarray(samples, dtype=np.float64))
    assert abs(res.value - exact_value) < n_sigma * res.error, (res.value, res.error, exact_value)
    return res


# ---------------------------------------------------------------------------------------------
# (1) free field: every real component is a free scalar of mass^2 = mu2
def test_free_field_correlator_and_phi2():
    # the check lives in sigmasim.validation (shared with 'sigmasim validate')
    checks = validation.free_field()
    bad = [c for c in checks if not c.passed]
    assert not bad, validation.format_table(bad)
    cfg = _cfg(shape=(4, 4), nf=2, mu2=0.5, schedule=[{"update": "heatbath"}, {"update": "overrelax"}],
               run={"thermalize": 5, "measurements": 20})
    r = simulate(cfg)
    assert np.all(r["accept_phase"] == 1.0)  # the Gaussian proposal is the exact conditional
    np.testing.assert_allclose(r["action_mu2"], 0.5 * 0.5 * r["phi2"])
    assert np.all(np.isnan(r["unitarity_drift"]))


# ---------------------------------------------------------------------------------------------
# (2) decoupled sites (kinetic = 0), nf = 1: each site samples the one-site integral
def _one_site_nf1(mu2, lam, c, h, theta_m, theta_a):
    """<Re Phi>, <Im Phi>, <|Phi|^2> of exp(-[mu2/2 |z|^2 + lam |z|^4 - 2c Re(e^{i ta} z)
    - Re(h e^{i tm} z)]) d^2 z, polar coordinates, scipy dblquad."""

    def w(phi, rho):
        z = rho * np.exp(1j * phi)
        s = 0.5 * mu2 * rho**2 + lam * rho**4 - 2 * c * (np.exp(1j * theta_a) * z).real \
            - (h * np.exp(1j * theta_m) * z).real
        return np.exp(-s) * rho

    def avg(f):
        num = integrate.dblquad(lambda p, r: f(p, r) * w(p, r), 0, 6, 0, 2 * np.pi, epsabs=1e-11)[0]
        return num / z0

    z0 = integrate.dblquad(w, 0, 6, 0, 2 * np.pi, epsabs=1e-11)[0]
    return (avg(lambda p, r: r * np.cos(p)), avg(lambda p, r: r * np.sin(p)), avg(lambda p, r: r * r))


@pytest.mark.parametrize("schedule", [MIXED, [{"update": "metropolis"}]], ids=["mixed", "metropolis"])
def test_one_site_integral_nf1(schedule):
    mu2, l1, l2, c, h, theta = -1.0, 0.3, 0.2, 0.4, 0.3, 1.1
    cfg = _cfg(shape=(16, 16), seed=11, schedule=schedule, nf=1, kinetic=0.0, mu2=mu2, lambda1=l1,
               lambda2=l2, c=c, mass=h, theta=theta, theta_placement="split",
               run={"thermalize": 100, "measurements": 1500})
    # split placement, nf = 1: theta_m = theta/2, theta_a = -theta/2
    re_ref, im_ref, r2_ref = _one_site_nf1(mu2, l1 + l2, c, h, theta / 2, -theta / 2)
    r = simulate(cfg)
    _within(r["omega"].real, re_ref)
    _within(r["omega"].imag, im_ref)
    _within(r["phi2"], r2_ref)


# ---------------------------------------------------------------------------------------------
# Schwinger-Dyson (integration by parts, common practice, no source): <x dS/dx> = 1 for every
# real component x, so summing the Euler operator over the homogeneous terms of S gives, per site,
# 2 (kin + mu2) + 4 (lambda1 + lambda2) + 2p stab + nf det + 1 mass = 2 nf^2  (in expectation).
SD_CASES = {
    "nf3-mixed": dict(nf=3, mu2=-1.0, lambda1=0.2, lambda2=0.3, c=0.3, mass=[0.2, 0.1, -0.1], theta=2.0),
    "nf3-metropolis": dict(nf=3, mu2=-1.0, lambda1=0.2, lambda2=0.3, c=0.3, mass=0.1, theta=2.0,
                           schedule=[{"update": "metropolis", "repeat": 2}]),
    "nf2-hb": dict(nf=2, mu2=0.3, lambda1=0.1, lambda2=0.2, c=0.5, mass=0.2, theta=1.0,
                   schedule=[{"update": "heatbath"}, {"update": "overrelax"}]),
    "nf4": dict(nf=4, mu2=-0.5, lambda1=0.1, lambda2=0.3, c=0.8, mass=0.1, theta=3.0),
    "nf5-stab": dict(nf=5, mu2=0.5, lambda1=0.05, lambda2=0.1, c=0.5, mass=0.1, theta=1.0, lambda_s=0.01,
                     stab_power=3),
}


@pytest.mark.parametrize("case", list(SD_CASES))
def test_schwinger_dyson_identity(case):
    model = dict(SD_CASES[case])
    schedule = model.pop("schedule", MIXED)
    cfg = _cfg(shape=(4, 4, 4), seed=5, schedule=schedule, run={"thermalize": 100, "measurements": 800},
               **model)
    r = simulate(cfg)
    nf, p = cfg.nf, cfg.stab_power
    y = (2 * (r["action_kinetic"] + r["action_mu2"]) + 4 * (r["action_lambda1"] + r["action_lambda2"])
         + 2 * p * r["action_stab"] + nf * r["action_det"] + r["action_mass"])
    _within(y, 2 * nf * nf)
    total = (r["action_kinetic"] + r["action_mu2"] + r["action_lambda1"] + r["action_lambda2"]
             + r["action_stab"] + r["action_det"] + r["action_mass"])
    np.testing.assert_allclose(r["action"], total, rtol=1e-12, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# (3) reproducibility: thread count and resume
def _repro_cfg(tmp_path, nf=3, **extra):
    model = {"kind": "linear", "nf": nf, "mu2": -0.5, "lambda1": 0.2, "lambda2": 0.2, "c": 0.3,
             "mass": 0.1, "theta": 2.9, **extra}
    return config_from_dict({
        "name": "repro", "seed": 99, "lattice": {"shape": [8, 4, 4]}, "model": model,
        "updates": {"schedule": MIXED, "tune_every": 5},
        "run": {"thermalize": 20, "measurements": 30, "measure_every": 2, "start": "hot",
                "output": str(tmp_path), "checkpoint_every": 7},
    })


@pytest.mark.parametrize("nf, extra", [(1, {}), (3, {}), (5, {"lambda_s": 0.01, "stab_power": 3})])
def test_thread_count_does_not_change_the_chain(tmp_path, nf, extra):
    assert_thread_independent(_repro_cfg(tmp_path, nf=nf, **extra))


@pytest.mark.parametrize("stop_at", [5, 21, 57])
def test_resumed_run_equals_uninterrupted_run(tmp_path, stop_at):
    full = _repro_cfg(tmp_path / "a")
    assert make_simulation(full).model.KIND == "linear"
    assert run_file(full)
    part = _repro_cfg(tmp_path / "b")
    assert not run_file(part, stop_at=stop_at)
    assert open_run(part.run_file).status == "interrupted"
    resume(part)
    a, b = contents(full.run_file), contents(part.run_file)
    assert_same_contents(a, b)
    assert b["status"] == "complete"
    assert open_run(part.run_file).config.kind == "linear"


# ---------------------------------------------------------------------------------------------
# config: stability conditions and the chiral model's hash
@pytest.mark.parametrize("model, fragment", [
    (dict(nf=3, c=0.1), "unbounded below for nf = 3"),
    (dict(nf=1, lambda1=-0.1), "lambda1 + lambda2 > 0"),
    (dict(nf=2, mu2=0.5, c=0.3), "mu2 > 2|c|"),
    (dict(nf=2, lambda1=0.1, lambda2=-0.25), "nf = 2"),
    (dict(nf=4, lambda1=0.01, lambda2=0.0, c=0.1), "lambda1 + lambda2/4 > |c|/8"),
    (dict(nf=5, lambda1=1.0, c=0.1), "lambda_s"),
    (dict(nf=5, lambda1=1.0, c=0.1, lambda_s=0.1, stab_power=2), "2p > max(4, nf)"),
    (dict(nf=2, lambda_s=-1.0), "lambda_s must be >= 0"),
    (dict(nf=2, kinetic=-1.0), "kinetic must be >= 0"),
    (dict(nf=2, group="SU"), "group = 'U'"),
    (dict(nf=2, kappa=0.5), "model.c"),
])
def test_unbounded_couplings_are_rejected(model, fragment):
    group = model.pop("group", "U")
    with pytest.raises(ConfigError, match=None) as err:
        config_from_dict({"model": {"kind": "linear", "group": group, **model}})
    assert fragment in str(err.value)
    assert "\n" not in str(err.value)


def test_bounded_couplings_are_accepted():
    ok = [dict(nf=1, mu2=1.0, c=5.0), dict(nf=2, mu2=0.7, c=0.3), dict(nf=3, lambda1=0.1, c=10.0),
          dict(nf=4, lambda1=0.02, c=0.1), dict(nf=6, lambda1=0.1, c=1.0, lambda_s=0.01, stab_power=4),
          dict(nf=6, lambda2=0.1), dict(nf=4, mu2=-3.0, lambda2=0.5, lambda1=-0.1)]
    for m in ok:
        assert config_from_dict({"model": {"kind": "linear", **m}}).kind == "linear"


def test_quartic_det_minimum_nf4_against_random_matrices():
    rng = np.random.default_rng(3)
    phi = rng.normal(size=(20000, 4, 4)) + 1j * rng.normal(size=(20000, 4, 4))
    sv = np.linalg.svd(phi, compute_uv=False)
    sv /= np.sqrt((sv**2).sum(axis=1))[:, None]
    for l1, l2, c in [(0.1, 0.3, 0.8), (0.5, -0.4, 0.6), (0.2, -0.1, 2.0)]:
        m = _quartic_det_min(4, l1, l2, c)
        sampled = (l1 + l2 * (sv**4).sum(axis=1) - 2 * abs(c) * sv.prod(axis=1)).min()
        assert m <= sampled + 1e-12
        assert m > sampled - 0.1  # the random matrices come close to the minimum


def test_chiral_hash_ignores_linear_keys():
    base = {"model": {"nf": 2, "beta": 0.3}}
    a = config_from_dict(base)
    b = config_from_dict({"model": {"nf": 2, "beta": 0.3, "mu2": 3.0, "lambda1": 1.0}})
    assert a.physics_hash() == b.physics_hash()
    lin = config_from_dict({"model": {"nf": 2, "beta": 0.3, "kind": "linear"}})
    assert lin.physics_hash() != a.physics_hash()
    assert config_from_dict(lin.to_dict()) == lin


# ---------------------------------------------------------------------------------------------
# (4) tree level: numpy potential = kernel action on constant fields; known minima
def test_tree_level_potential_matches_the_measured_action():
    from sigmasim.models.linear import tree_level_potential

    rng = np.random.default_rng(1)
    for nf, extra in [(1, {}), (2, {}), (3, {}), (5, {"lambda_s": 0.02, "stab_power": 3})]:
        cfg = _cfg(shape=(4, 4), nf=nf, mu2=-0.7, lambda1=0.3, lambda2=0.2, c=0.4, theta=1.3,
                   theta_placement="split", mass=list(np.linspace(0.1, 0.3, nf)), **extra)
        sim = make_simulation(cfg)
        phi = rng.normal(size=(nf, nf)) + 1j * rng.normal(size=(nf, nf))
        sim.state.re[:] = phi.real.ravel()[:, None]
        sim.state.im[:] = phi.imag.ravel()[:, None]
        rec = sim.measure()
        assert rec["action_kinetic"] == 0.0
        np.testing.assert_allclose(rec["action"], tree_level_potential(cfg, phi), rtol=1e-12)
        np.testing.assert_allclose(rec["phi2"], np.sum(np.abs(phi) ** 2), rtol=1e-12)
        np.testing.assert_allclose(rec["det"], np.linalg.det(phi), rtol=1e-10)


def test_tree_level_minimum_nf1_radius():
    from sigmasim.models.linear import tree_level_minimum

    cfg = _cfg(nf=1, mu2=-2.0, lambda1=0.3, lambda2=0.2)
    phi, v = tree_level_minimum(cfg)
    # V = mu2/2 r^2 + lam r^4: minimum at r^2 = -mu2/(4 lam), value -mu2^2/(16 lam)
    np.testing.assert_allclose(abs(phi[0, 0]) ** 2, 2.0 / (4 * 0.5), rtol=1e-6)
    np.testing.assert_allclose(v, -4.0 / (16 * 0.5), rtol=1e-8)


def _tree_im_omega_h(theta, c):
    from sigmasim.models.linear import tree_level_minimum

    cfg = _cfg(nf=3, mu2=-1.0, lambda1=0.05, lambda2=0.25, c=c, mass=0.1, theta=theta)
    phi, _ = tree_level_minimum(cfg)
    return (np.exp(1j * cfg.theta_angles[0]) * np.trace(phi) / 3).imag


def test_tree_level_vacuum_jumps_at_theta_pi_nf3():
    """Degenerate nf = 3: with the anomaly (c > 0) Im(omega_h) of the tree-level vacuum jumps at
    theta = pi (it stays finite as theta -> pi, first order); at c = 0 theta rotates away (Im = 0)."""
    near = [_tree_im_omega_h(np.pi + d, 0.3) for d in (-0.02, 0.02)]
    far = _tree_im_omega_h(np.pi - 0.2, 0.3)
    assert near[0] * near[1] < 0  # CP: theta -> 2 pi - theta flips it
    assert abs(near[0]) > 0.5 * abs(far) > 1e-3  # no linear approach to 0: a jump
    assert abs(_tree_im_omega_h(np.pi - 0.2, 0.0)) < 1e-6


def test_update_kernels_potential_matches_numpy():
    """The V(Phi) the update kernels accept/reject with equals the numpy tree-level potential."""
    from sigmasim.kernels.linear import potential
    from sigmasim.models.linear import tree_level_potential

    rng = np.random.default_rng(2)
    for nf, extra in [(1, {}), (2, {}), (3, {}), (4, {}), (6, {"lambda_s": 0.02, "stab_power": 4})]:
        cfg = _cfg(nf=nf, mu2=-0.7, lambda1=0.3, lambda2=0.2, c=0.4, theta=1.3, theta_placement="split",
                   mass=0.0, **extra)
        phi = rng.normal(size=(nf, nf)) + 1j * rng.normal(size=(nf, nf))
        c2 = 2 * cfg.c * cfg.eta
        scratch = np.empty((nf, nf), np.complex128), np.empty((nf, nf), np.complex128)
        v = potential(phi.real.ravel().copy(), phi.imag.ravel().copy(), nf, cfg.mu2, cfg.lambda1, cfg.lambda2,
                      cfg.lambda_s, cfg.stab_power, c2.real, c2.imag, *scratch)
        np.testing.assert_allclose(v, tree_level_potential(cfg, phi), rtol=1e-12)


def test_hopping_form_is_the_same_action():
    # S_standard(s phi) = S_hopping(phi) for a random field (conversion in linear.from_hopping)
    from sigmasim.models.linear import from_hopping

    nf, shape, hop, l1, l2, c, h, theta = 3, (4, 4, 2), 0.11, 0.3, 0.2, 0.05, 0.4, 1.3
    conv = from_hopping(nf, len(shape), hop, l1, l2, c, h)
    s = conv.pop("scale")
    cfg = _cfg(shape=shape, nf=nf, theta=theta, **{k: v for k, v in conv.items()})
    sim = make_simulation(cfg)
    rng = np.random.default_rng(4)
    phi = rng.normal(size=(cfg.volume, nf, nf)) + 1j * rng.normal(size=(cfg.volume, nf, nf))
    flat = (s * phi).reshape(cfg.volume, nf * nf).T
    sim.state.re[...] = flat.real
    sim.state.im[...] = flat.imag
    standard = sim.measure()["action"] * cfg.volume
    lat = sim.lattice
    u = phi
    hopsum = sum(np.einsum("xab,xab->", u.conj(), u[lat.neighbours[2 * mu]]).real for mu in range(3))
    m = np.einsum("xba,xbc->xac", u.conj(), u)
    r2 = np.einsum("xaa->x", m).real
    tm, ta = cfg.theta_angles
    hopping = (-2 * hop * hopsum + r2.sum() + l1 * (r2**2).sum() + l2 * (np.abs(m) ** 2).sum()
               - 2 * c * (np.exp(1j * ta) * np.linalg.det(u)).real.sum()
               - (h * np.exp(1j * tm) * np.einsum("xaa->x", u)).real.sum())
    assert np.isclose(standard, hopping, rtol=1e-10)


def test_protocol_commands_run_the_linear_model(tmp_path):
    # the hysteresis sweep and analyze work on linear runs like on chiral ones
    from sigmasim.analysis.report import analyze_data
    from sigmasim.cli import hysteresis_command
    from sigmasim.protocols import read_sweep

    cfg = tmp_path / "lin.toml"
    cfg.write_text(f"""
name = "lin"
[lattice]
shape = [4, 4]
[model]
kind = "linear"
nf = 2
mu2 = -1.0
lambda1 = 0.1
lambda2 = 0.1
c = 0.2
mass = 0.1
[run]
thermalize = 10
threads = 1
output = "{tmp_path}"
[hysteresis]
start = 2.5
stop = 3.7
step = 0.6
sweeps_per_step = 10
cycles = 1
""")
    out = tmp_path / "s.h5"
    assert hysteresis_command(str(cfg), plot=False, out=str(out)) == 0
    assert read_sweep(out)["config"]["model"]["kind"] == "linear"
    run = _cfg(shape=(8, 4), nf=2, mu2=-1.0, lambda1=0.1, lambda2=0.1, c=0.2, mass=0.1,
               run={"thermalize": 20, "measurements": 200})
    r = simulate(run)
    ra = analyze_data({k: v for k, v in r.items() if not k.startswith("slices/")},
                      {k[7:]: v for k, v in r.items() if k.startswith("slices/")}, run)
    assert "phi2_susceptibility" in ra.series and ra.series["phi2_susceptibility"].error > 0
