"""The linear sigma model (``model.kind = "linear"``): a general complex nf x nf matrix Phi_x per site.

Action

.. math::

    S = \\sum_x \\Big[ \\frac{k}{2}\\sum_\\mu \\mathrm{Tr}\\big((\\Phi_{x+\\mu}-\\Phi_x)^\\dagger
        (\\Phi_{x+\\mu}-\\Phi_x)\\big) + \\frac{\\mu^2}{2}\\mathrm{Tr}\\,\\Phi_x^\\dagger\\Phi_x
        + \\lambda_1 (\\mathrm{Tr}\\,\\Phi_x^\\dagger\\Phi_x)^2
        + \\lambda_2 \\mathrm{Tr}\\big((\\Phi_x^\\dagger\\Phi_x)^2\\big)
        + \\lambda_s (\\mathrm{Tr}\\,\\Phi_x^\\dagger\\Phi_x)^p
        - c\\,(e^{i\\theta_a}\\det\\Phi_x + \\mathrm{c.c.}) - \\mathrm{Re}\\,\\mathrm{Tr}(H\\Phi_x) \\Big],

``k = model.kinetic`` (default 1), ``H = e^{i theta_m} diag(h_f)``, ``theta = nf theta_m - theta_a``
(placement as for the chiral model).  Each of the 2 nf^2 real components of Phi has, at
lambda = c = h = 0 and k = 1, the free action sum_x [1/2 sum_mu (dx)^2 + mu2/2 x^2].
The contract this module fulfils is in :mod:`sigmasim.models`.

Records (:data:`SERIES`, :data:`SLICES`): ``action`` and its terms per site (``action_kinetic``,
``action_mu2``, ``action_lambda1``, ``action_lambda2``, ``action_stab``, ``action_mass``,
``action_det``), ``omega`` = sum Tr Phi/(nf V), ``omega_h``, ``condensate``, ``det`` (of Phi),
``phi2`` = sum_x Tr(Phi^+Phi)/V (its susceptibility is V * variance of phi2),
``accept_metropolis``, ``accept_phase`` (here: the acceptance of the heatbath and overrelaxation
accept/reject steps), ``unitarity_drift`` (NaN: no projection); per time slice ``slices/Phi`` (sums
of Phi, from which Re Tr(T_a Phi) follows), ``slices/det`` and ``slices/phi2`` (sums of
Tr(Phi^+Phi): sigma-like radial correlators).  Run files of format version 1 named ``slices/Phi``
``slices/U`` and held a copy of ``action_kinetic`` as ``action_beta``.

Heatbath/overrelaxation proposal precision: P = 2 d k + mu2 when mu2 > 0 (the exact Gaussian part),
else P = 2 d k + ``updates.proposal_mu2`` (> 0) with the difference (mu2 - proposal_mu2)/2
Tr(Phi^+Phi) moved into the accept step (exact either way; only the acceptance changes).
"""

from __future__ import annotations

import math

import numpy as np

from sigmasim.config import RunConfig
from sigmasim.kernels.linear import heatbath_linear, metropolis_linear, overrelax_linear, slice_sums_linear
from sigmasim.models.chiral import initial_field  # the same cold/hot/branch starts (unitary fields)
from sigmasim.rng import step_key

__all__ = ["tree_level_potential", "tree_level_minimum", "from_hopping", "initial_field", "measure",
           "project", "UPDATES", "SERIES", "SLICES"]

KIND = "linear"

SERIES = {
    "sweep": ("int", "sweep number after which the measurement was taken (1-based)"),
    "action": ("real", "S / V, the whole action per site"),
    "action_kinetic": ("real", "kinetic term per site, k sum_{x,mu} Tr|Phi_{x+mu} - Phi_x|^2 / (2 V)"),
    "action_mu2": ("real", "(mu2/2) sum_x Tr(Phi^+Phi) / V"),
    "action_lambda1": ("real", "lambda1 sum_x (Tr Phi^+Phi)^2 / V"),
    "action_lambda2": ("real", "lambda2 sum_x Tr((Phi^+Phi)^2) / V"),
    "action_stab": ("real", "lambda_s sum_x (Tr Phi^+Phi)^p / V"),
    "action_mass": ("real", "-sum_x Re Tr(H Phi_x) / V"),
    "action_det": ("real", "-2 c sum_x Re(e^{i theta_a} det Phi_x) / V"),
    "omega": ("complex", "Omega = sum_x Tr Phi_x / (nf V)"),
    "omega_h": ("complex", "e^{i theta_m} Omega: Omega in the frame where the mass term is real"),
    "condensate": ("complex_nf", "per-flavour condensate sum_x (Phi_x)_ff / V"),
    "det": ("complex", "sum_x det Phi_x / V"),
    "phi2": ("real", "sum_x Tr(Phi^+Phi) / V; susceptibility V * var(phi2)"),
    "accept_metropolis": ("real", "Metropolis acceptance since the previous measurement (NaN if none)"),
    "accept_phase": ("real", "acceptance of the heatbath and overrelaxation accept/reject steps since the "
                     "previous measurement"),
    "unitarity_drift": ("real", "NaN (the linear model has no projection)"),
}
SLICES = {
    "Phi": ("matrix", "sum over the sites of time slice t of Phi_x"),
    "det": ("complex", "sum over the sites of time slice t of det Phi_x"),
    "phi2": ("real", "sum over the sites of time slice t of Tr(Phi^+Phi)"),
}
FIELD_SLICE = "Phi"
FIELD_TEX = r"\Phi_x"  # the field in figure labels (matplotlib mathtext)
VERSION1_NAMES = {"slices/U": "slices/Phi"}
VERSION1_DROPPED = ("series/action_beta",)  # a copy of action_kinetic

CONVENTIONS = (
    "S = sum_x [ (k/2) sum_mu Tr|Phi_{x+mu} - Phi_x|^2 + (mu2/2) Tr Phi^+Phi "
    "+ lambda1 (Tr Phi^+Phi)^2 + lambda2 Tr (Phi^+Phi)^2 + lambda_s (Tr Phi^+Phi)^p "
    "- c (e^{i theta_a} det Phi + c.c.) - Re Tr(H Phi) ], H = e^{i theta_m} diag(h), "
    "theta = nf theta_m - theta_a; time is lattice direction 0"
)
CONFIG_KEYS = ("model.kind", "model.group", "model.nf", "model.mass", "model.theta", "model.theta_placement",
               "model.kinetic", "model.mu2", "model.lambda1", "model.lambda2", "model.c", "model.lambda_s",
               "model.stab_power", "updates.proposal_mu2")
ANOMALY = "c"
CHIRAL_POTENTIAL = False
UNITARY = False
STEP_MAX = 1e3  # Metropolis box half-width cap


def describe(config, h: str) -> str:
    """The model and its couplings in one line (``h``: the masses, formatted)."""
    c = config
    return (f"linear {c.nf}x{c.nf} mu2={c.mu2:g} lambda1={c.lambda1:g} lambda2={c.lambda2:g} "
            f"c={c.c:g} h={h} theta={c.theta:.4g}")


def _couplings(cfg):
    d = len(cfg.shape)
    ptrue = 2.0 * d * cfg.kinetic + cfg.mu2
    # mu2 <= 0: the Gaussian part's mean kinetic N / P runs away from the field (P small, or
    # not positive); propose with the positive reference mass proposal_mu2 instead
    pref = ptrue if cfg.mu2 > 0 else 2.0 * d * cfg.kinetic + cfg.proposal_mu2
    c2 = 2.0 * cfg.c * cfg.eta
    return ptrue, pref, c2


def _local(sim, name: str) -> tuple[int, int]:
    """Update ``name`` over both colours (one step key per colour)."""
    st, cfg, lat = sim.state, sim.config, sim.lattice
    nf = cfg.nf
    ptrue, pref, c2 = _couplings(cfg)
    lam1, lam2, lams, p = cfg.lambda1, cfg.lambda2, cfg.lambda_s, cfg.stab_power
    acc = 0
    tried = 0
    re, im, nbr = st.re, st.im, lat.neighbours
    for colour in (0, 1):
        start = colour * lat.half
        stop = start + lat.half
        key = step_key(cfg.seed, st.step)
        if name == "metropolis":
            acc += metropolis_linear(re, im, nbr, start, stop, nf, cfg.kinetic, ptrue, sim.hdiag, lam1,
                                     lam2, lams, p, c2.real, c2.imag, st.step_size, cfg.metropolis_hits,
                                     key, sim.blocks)
            tried += lat.half * cfg.metropolis_hits
        elif name == "heatbath":
            acc += heatbath_linear(re, im, nbr, start, stop, nf, cfg.kinetic, pref, ptrue - pref,
                                   sim.hdiag, lam1, lam2, lams, p, c2.real, c2.imag, key, sim.blocks)
            tried += lat.half
        else:
            acc += overrelax_linear(re, im, nbr, start, stop, nf, cfg.kinetic, pref, ptrue - pref,
                                    sim.hdiag, lam1, lam2, lams, p, c2.real, c2.imag, key, sim.blocks)
            tried += lat.half
        st.step += 1
    return int(acc), int(tried)


def _update(name):
    def fn(sim):
        return _local(sim, name)

    fn.__name__ = name
    return fn


UPDATES = {name: _update(name) for name in ("metropolis", "heatbath", "overrelax")}


def project(sim) -> None:
    """No projection: Phi is any complex matrix."""
    return None


def measure(sim) -> dict:
    """One record of the current field (the SERIES and SLICES keys but those the chain adds)."""
    st, cfg, lat = sim.state, sim.config, sim.lattice
    _, _, umat, dets = sim._buf
    lbuf = getattr(sim, "_lbuf", None)
    if lbuf is None or lbuf[0].shape[0] != cfg.shape[0]:
        lbuf = sim._lbuf = tuple(np.empty(cfg.shape[0]) for _ in range(6))
    kin, phi2, q1, q2, stab, mass = lbuf
    slice_sums_linear(st.re, st.im, lat.neighbours, lat.slice_sites, cfg.nf, sim.hdiag, cfg.stab_power,
                      kin, phi2, q1, q2, stab, mass, umat, dets)
    v = lat.volume
    nf = cfg.nf
    utot = umat.sum(axis=0).reshape(nf, nf)
    dtot = dets.sum()
    a_kin = 0.5 * cfg.kinetic * kin.sum() / v
    a_mu2 = 0.5 * cfg.mu2 * phi2.sum() / v
    a_l1 = cfg.lambda1 * q1.sum() / v
    a_l2 = cfg.lambda2 * q2.sum() / v
    a_stab = cfg.lambda_s * stab.sum() / v
    a_mass = -mass.sum() / v
    a_det = -2.0 * cfg.c * (cfg.eta * dtot).real / v
    trace = np.trace(utot)
    return {
        "action": a_kin + a_mu2 + a_l1 + a_l2 + a_stab + a_mass + a_det,
        "action_kinetic": a_kin,
        "action_mu2": a_mu2,
        "action_lambda1": a_l1,
        "action_lambda2": a_l2,
        "action_stab": a_stab,
        "action_mass": a_mass,
        "action_det": a_det,
        "omega": trace / (nf * v),
        "omega_h": np.exp(1j * cfg.theta_angles[0]) * trace / (nf * v),
        "condensate": np.diagonal(utot).copy() / v,
        "det": dtot / v,
        "phi2": phi2.sum() / v,
        "unitarity_drift": math.nan,
        "slices/Phi": umat.reshape(-1, nf, nf).copy(),
        "slices/det": dets.copy(),
        "slices/phi2": phi2.copy(),
    }


def tree_level_potential(config: RunConfig, phi) -> float:
    """Action per site of the constant field Phi_x = ``phi`` (complex (nf, nf)); kinetic term zero.

    Plain numpy, independent of the kernels (the tests compare the two).
    """
    phi = np.asarray(phi, dtype=np.complex128).reshape(config.nf, config.nf)
    m = phi.conj().T @ phi
    r2 = float(np.trace(m).real)
    h = np.diag(config.hdiag)
    return (0.5 * config.mu2 * r2 + config.lambda1 * r2**2 + config.lambda2 * float(np.sum(np.abs(m) ** 2))
            + config.lambda_s * r2**config.stab_power
            - 2.0 * config.c * (config.eta * np.linalg.det(phi)).real - float(np.trace(h @ phi).real))


def tree_level_minimum(config: RunConfig, n_random: int = 8, seed: int = 0):
    """Global minimum of :func:`tree_level_potential` over complex nf x nf matrices (scipy BFGS).

    Starts: v e^{i (2 pi k - theta_a)/nf} 1 for k = 0..nf-1 and v in (0.5, 1, 2), plus ``n_random``
    Gaussian matrices.  Returns ``(phi, value)``.  A multi-start local search, not a proof.
    """
    from scipy import optimize

    nf = config.nf
    _, theta_a = config.theta_angles

    def f(x):
        return tree_level_potential(config, (x[: nf * nf] + 1j * x[nf * nf:]).reshape(nf, nf))

    starts = []
    for k in range(nf):
        for v in (0.5, 1.0, 2.0):
            z = v * np.exp(1j * (2 * np.pi * k - theta_a) / nf) * np.eye(nf)
            starts.append(z)
    rng = np.random.default_rng(seed)
    starts += [rng.normal(size=(nf, nf)) + 1j * rng.normal(size=(nf, nf)) for _ in range(n_random)]
    best = None
    for z in starts:
        x0 = np.concatenate([z.real.ravel(), z.imag.ravel()])
        res = optimize.minimize(f, x0, method="BFGS", options={"gtol": 1e-10, "maxiter": 10000})
        if best is None or res.fun < best.fun:
            best = res
    x = best.x
    return (x[: nf * nf] + 1j * x[nf * nf:]).reshape(nf, nf), float(best.fun)


def from_hopping(nf: int, ndim: int, hopping: float, lambda1: float = 0.0, lambda2: float = 0.0,
                 c: float = 0.0, h: float = 0.0) -> dict:
    """Couplings of this action (kinetic = 1) for the hopping-parameter form of the same model.

    Hopping form, field phi:
        S = sum_x [ -2 hopping sum_mu Re Tr(phi_x^+ phi_{x+mu}) + Tr phi_x^+ phi_x
                    + lambda1 (Tr phi^+ phi)^2 + lambda2 Tr (phi^+ phi)^2 - c (e^{i theta_a} det phi + c.c.)
                    - Re Tr(H phi) ],  H = e^{i theta_m} h.
    Expanding the kinetic term, (k/2) sum_mu Tr|Phi_{x+mu} - Phi_x|^2 summed over x equals
    sum_x [k d Tr Phi^+ Phi - k sum_mu Re Tr(Phi_x^+ Phi_{x+mu})]; with Phi = s phi, s^2 = 2 hopping
    (k = 1) the two actions agree term by term when
        mu2 = 1 / hopping - 2 d,  lambda_i = lambda_i^hop / s^4,  c = c^hop / s^nf,  h = h^hop / s.
    Observables linear in the field scale as <Phi> = s <phi> (common practice, no source).

    Returns a dict of ``model`` keys: kinetic, mu2, lambda1, lambda2, c, mass, plus ``scale`` = s.
    """
    if not hopping > 0:
        raise ValueError(f"hopping must be > 0, got {hopping}")
    s = math.sqrt(2.0 * hopping)
    return {"kinetic": 1.0, "mu2": 1.0 / hopping - 2.0 * ndim, "lambda1": lambda1 / s**4,
            "lambda2": lambda2 / s**4, "c": c / s**nf, "mass": h / s, "scale": s}
