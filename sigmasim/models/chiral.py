"""The chiral model: a U(nf) or SU(nf) matrix U_x per site (``model.kind = "chiral"``).

Action::

    S = -beta sum_{x,mu} Re Tr(U_x^+ U_{x+mu}) - sum_x Re Tr(H U_x)
        - kappa sum_x 2 Re(e^{i theta_a} det U_x),   H = e^{i theta_m} diag(h),

theta = nf theta_m - theta_a.  Updates: Metropolis, heatbath, overrelaxation
(:mod:`sigmasim.updates`); the field is projected back onto the group every
``reunitarize_every`` sweeps.  The contract this module fulfils is in :mod:`sigmasim.models`.
"""

from __future__ import annotations

import math

import numpy as np

from sigmasim.kernels.measure import lattice_slice_sums, reunitarize, reunitarize_rows, reunitarize_u1
from sigmasim.updates import apply

KIND = "chiral"

# name -> (kind, description); kind: real, complex, complex_nf, int
SERIES = {
    "sweep": ("int", "sweep number after which the measurement was taken (1-based)"),
    "action": ("real", "S / V, the whole action per site"),
    "action_beta": ("real", "-beta sum_{x,mu} Re Tr(U_x^dagger U_{x+mu}) / V"),
    "action_mass": ("real", "-sum_x Re Tr(H U_x) / V"),
    "action_det": ("real", "-2 kappa sum_x Re(e^{i theta_a} det U_x) / V"),
    "omega": ("complex", "Omega = sum_x Tr U_x / (nf V); Re: sigma direction, Im: eta' direction"),
    "omega_h": ("complex", "e^{i theta_m} Omega: Omega in the frame where the mass term is real; "
                "does not depend on where theta sits"),
    "condensate": ("complex_nf", "per-flavour condensate sum_x (U_x)_ff / V"),
    "det": ("complex", "sum_x det U_x / V"),
    "accept_metropolis": ("real", "Metropolis acceptance since the previous measurement (NaN if none)"),
    "accept_phase": ("real", "acceptance of the U(1) phase moves (det term) since the previous measurement"),
    "unitarity_drift": ("real", "largest |U^dagger U - 1| found at the re-unitarisations since the previous "
                        "measurement"),
}
SLICES = {
    "U": ("matrix", "sum over the sites of time slice t of U_x"),
    "det": ("complex", "sum over the sites of time slice t of det U_x"),
}
FIELD_SLICE = "U"
FIELD_TEX = "U_x"  # the field in figure labels (matplotlib mathtext)
VERSION1_NAMES: dict = {}
VERSION1_DROPPED: tuple = ()

CONVENTIONS = (
    "S = -beta sum_{x,mu} Re Tr(U_x^+ U_{x+mu}) - sum_x Re Tr(H U_x) "
    "- kappa sum_x 2 Re(e^{i theta_a} det U_x), H = e^{i theta_m} diag(h), "
    "theta = nf theta_m - theta_a; time is lattice direction 0"
)
CONFIG_KEYS = ("model.group", "model.nf", "model.beta", "model.mass", "model.kappa", "model.theta",
               "model.theta_placement")
ANOMALY = "kappa"
CHIRAL_POTENTIAL = True
UNITARY = True
STEP_MAX = math.pi  # a rotation angle


def describe(config, h: str) -> str:
    """The model and its couplings in one line (``h``: the masses, formatted)."""
    c = config
    return f"{c.group}({c.nf}) beta={c.beta:g} h={h} kappa={c.kappa:g} theta={c.theta:.4g}"


def _update(name):
    def fn(sim):
        return apply(sim, name)

    fn.__name__ = name
    return fn


UPDATES = {name: _update(name) for name in ("metropolis", "heatbath", "overrelax")}


def initial_field(config, lattice) -> tuple[np.ndarray, np.ndarray]:
    """Cold (U = 1), branch (U = e^{i (2 pi k - theta_a)/nf} 1) or hot (Haar-random, seeded by the run
    seed) start."""
    nf, volume = config.nf, lattice.volume
    if config.start == "cold":
        u = np.broadcast_to(np.eye(nf, dtype=np.complex128), (volume, nf, nf))
    elif config.start == "branch":
        _, theta_a = config.theta_angles
        phase = np.exp(1j * (2 * np.pi * config.start_branch - theta_a) / nf)
        if config.special:
            phase = np.exp(2j * np.pi * config.start_branch / nf)
        u = np.broadcast_to(phase * np.eye(nf, dtype=np.complex128), (volume, nf, nf))
    else:
        # Haar measure: Gram-Schmidt on the rows of a complex Gaussian matrix (the QR construction
        # with R's diagonal made positive, F. Mezzadri, Notices AMS 54 (2007) 592); for SU(nf) the
        # det phase divided out.  Done by the kernels' own projection, not LAPACK: numpy's QR runs
        # CPU-dependent BLAS code, so its last bits (and then the whole chain) differed between machines.
        rng = np.random.default_rng([config.seed, 0x407])
        z = rng.normal(size=(volume, nf, nf)) + 1j * rng.normal(size=(volume, nf, nf))
        flat = z.reshape(volume, nf * nf).T
        re, im = np.ascontiguousarray(flat.real), np.ascontiguousarray(flat.imag)
        reunitarize(re, im, nf, bool(config.special), 1)
        return re, im
    flat = np.ascontiguousarray(u.reshape(volume, nf * nf).T)
    return np.ascontiguousarray(flat.real), np.ascontiguousarray(flat.imag)


def project(sim) -> float:
    """Re-unitarise the field (and fix det = 1 for SU); returns the largest drift corrected."""
    st, cfg = sim.state, sim.config
    if cfg.nf == 1:
        return reunitarize_u1(st.re[0], st.im[0], sim.blocks)
    if cfg.nf in (2, 3) and not cfg.special:
        return reunitarize_rows(st.re, st.im, cfg.nf, sim.blocks)
    return reunitarize(st.re, st.im, cfg.nf, cfg.special, sim.blocks)


def measure(sim) -> dict:
    """One record of the current field (the SERIES and SLICES keys but those the chain adds)."""
    st, cfg, lat = sim.state, sim.config, sim.lattice
    link, mass, umat, dets = sim._buf
    lattice_slice_sums(lat, st.re, st.im, cfg.nf, sim.hdiag, link, mass, umat, dets)
    v = lat.volume
    nf = cfg.nf
    utot = umat.sum(axis=0).reshape(nf, nf)
    dtot = dets.sum()
    a_beta = -cfg.beta * link.sum() / v
    a_mass = -mass.sum() / v
    a_det = -2.0 * cfg.kappa * (cfg.eta * dtot).real / v
    return {
        "action": a_beta + a_mass + a_det,
        "action_beta": a_beta,
        "action_mass": a_mass,
        "action_det": a_det,
        "omega": np.trace(utot) / (nf * v),
        "omega_h": np.exp(1j * cfg.theta_angles[0]) * np.trace(utot) / (nf * v),
        "condensate": np.diagonal(utot).copy() / v,
        "det": dtot / v,
        "unitarity_drift": st.win_drift,
        "slices/U": umat.reshape(-1, nf, nf).copy(),
        "slices/det": dets.copy(),
    }
