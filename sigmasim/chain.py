"""One Monte Carlo chain: state, sweeps, measurements and the run loop.

The loop neither draws nor writes: it calls ``start``, ``record``,
``checkpoint``, ``finish`` on the sinks it is given (a progress bar and the
HDF5 writer live in the CLI).  All randomness is counter based and keyed by
``state.step``, so a chain restored from a checkpoint continues exactly.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace

import numpy as np

from sigmasim.config import RunConfig
from sigmasim.errors import NumericalError
from sigmasim.kernels.measure import (field_is_finite, lattice_slice_sums, reunitarize, reunitarize3,
                                      reunitarize_u1)
from sigmasim.lattice import Lattice, make_lattice
from sigmasim.updates import apply

__all__ = ["ChainState", "Simulation", "run_chain", "simulate", "make_simulation", "MemorySink", "SERIES", "SLICES",
           "Interrupted"]

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
    "unitarity_drift": ("real", "largest |U^dagger U - 1| found at the re-unitarisations since the previous measurement"),
}
SLICES = {
    "U": ("(T, nf, nf) complex", "sum over the sites of time slice t of U_x"),
    "det": ("(T,) complex", "sum over the sites of time slice t of det U_x"),
}


class Interrupted(Exception):
    """The run was asked to stop (Ctrl-C or SIGTERM); a checkpoint was written."""


@dataclass(slots=True)
class ChainState:
    """Everything that determines the continuation of a chain.

    Attributes
    ----------
    re, im : float64 arrays (nf*nf, V)
        The field, checkerboard site order, component a*nf + b.
    step : int
        Colour updates done so far (the random-number key counter).
    sweep : int
        Sweeps done so far (thermalisation included).
    n_meas : int
        Measurements recorded so far.
    step_size : float
        Metropolis step; tuned during thermalisation, then frozen.
    tune_acc, tune_tried : int
        Metropolis counts since the last step adjustment.
    win_acc, win_tried : int array (2,)
        Counts since the last measurement: [Metropolis, phase moves].
    win_drift : float
        Largest unitarity drift since the last measurement.
    """

    re: np.ndarray
    im: np.ndarray
    step: int = 0
    sweep: int = 0
    n_meas: int = 0
    step_size: float = 0.5
    tune_acc: int = 0
    tune_tried: int = 0
    win_acc: np.ndarray = field(default_factory=lambda: np.zeros(2, dtype=np.int64))
    win_tried: np.ndarray = field(default_factory=lambda: np.zeros(2, dtype=np.int64))
    win_drift: float = 0.0

    SCALARS = ("step", "sweep", "n_meas", "step_size", "tune_acc", "tune_tried", "win_drift")


def initial_field(config: RunConfig, lattice: Lattice) -> tuple[np.ndarray, np.ndarray]:
    """Cold (U = 1) or hot (Haar-random, seeded by the run seed) start."""
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
        rng = np.random.default_rng([config.seed, 0x407])
        # Haar measure via QR with the phase fix (F. Mezzadri, Notices AMS 54 (2007) 592)
        z = (rng.normal(size=(volume, nf, nf)) + 1j * rng.normal(size=(volume, nf, nf))) / np.sqrt(2)
        q, r = np.linalg.qr(z)
        d = np.diagonal(r, axis1=1, axis2=2)
        u = q * (d / np.abs(d))[:, None, :]
        if config.special:
            det = np.linalg.det(u)
            u = u * np.exp(-1j * np.angle(det) / nf)[:, None, None]
    flat = np.ascontiguousarray(u.reshape(volume, nf * nf).T)
    return np.ascontiguousarray(flat.real), np.ascontiguousarray(flat.imag)


class Simulation:
    """A chain of one config: lattice, state and the operations on them."""

    def __init__(self, config: RunConfig, state: ChainState | None = None):
        self.config = config
        self.lattice = make_lattice(config.shape)
        self.hdiag = config.hdiag.astype(np.complex128)
        # fixed number of site blocks per colour: independent of the thread count
        self.blocks = max(1, min(64, self.lattice.half // 16))
        if state is None:
            re, im = initial_field(config, self.lattice)
            state = ChainState(re, im, step_size=config.initial_step)
        self.state = state
        self._fast_args = None  # updates._one_call_update keeps its prepared calls here
        t = config.shape[0]
        self._buf = (np.empty(t), np.empty(t), np.empty((t, config.nf**2), np.complex128),
                     np.empty(t, np.complex128))

    def set_theta(self, theta: float) -> None:
        """Move the chain to another theta without touching the field (hysteresis, tempering).

        The placement stays that of the config.  The chain's state (field, step
        counter) is kept, so a protocol that changes theta stays reproducible.
        """
        self.config = replace(self.config, theta=float(theta))
        self.hdiag = self.config.hdiag.astype(np.complex128)

    @property
    def total_sweeps(self) -> int:
        c = self.config
        return c.thermalize + c.measurements * c.measure_every

    @property
    def uses_metropolis(self) -> bool:
        return any(name == "metropolis" for name, _ in self.config.schedule)

    def sweep(self) -> None:
        """One sweep of the schedule, then re-unitarisation and tuning when due."""
        st, cfg = self.state, self.config
        for name, repeat in cfg.schedule:
            for _ in range(repeat):
                acc, tried = apply(self, name)
                k = 0 if name == "metropolis" else 1
                st.win_acc[k] += acc
                st.win_tried[k] += tried
                if k == 0:
                    st.tune_acc += acc
                    st.tune_tried += tried
        st.sweep += 1
        if st.sweep % cfg.reunitarize_every == 0:
            if cfg.nf == 1:
                drift = reunitarize_u1(st.re[0], st.im[0], self.blocks)
            elif cfg.nf == 3 and not cfg.special:
                drift = reunitarize3(st.re, st.im, self.blocks)
            else:
                drift = reunitarize(st.re, st.im, cfg.nf, cfg.special, self.blocks)
            st.win_drift = max(st.win_drift, drift)
        if st.sweep <= cfg.thermalize and self.uses_metropolis and st.sweep % cfg.tune_every == 0:
            self._tune()

    def _tune(self) -> None:
        st = self.state
        if st.tune_tried:
            rate = st.tune_acc / st.tune_tried
            # multiplicative step toward the target, bounded so one window cannot overshoot
            factor = min(2.0, max(0.5, math.exp(2.0 * (rate - self.config.target_acceptance))))
            st.step_size = min(math.pi, st.step_size * factor)
        st.tune_acc = 0
        st.tune_tried = 0

    def measure(self) -> dict:
        """Measure the current configuration; returns one record (see :data:`SERIES`)."""
        st, cfg, lat = self.state, self.config, self.lattice
        link, mass, umat, dets = self._buf
        lattice_slice_sums(lat, st.re, st.im, cfg.nf, self.hdiag, link, mass, umat, dets)
        v = lat.volume
        nf = cfg.nf
        utot = umat.sum(axis=0).reshape(nf, nf)
        dtot = dets.sum()
        a_beta = -cfg.beta * link.sum() / v
        a_mass = -mass.sum() / v
        a_det = -2.0 * cfg.kappa * (cfg.eta * dtot).real / v
        action = a_beta + a_mass + a_det
        if not math.isfinite(action):
            site = field_is_finite(st.re, st.im)
            where = f" at site {site}" if site >= 0 else ""
            raise NumericalError(f"non-finite action at sweep {st.sweep}{where}")
        rates = np.where(st.win_tried > 0, st.win_acc / np.maximum(st.win_tried, 1), np.nan)
        rec = {
            "sweep": st.sweep,
            "action": action,
            "action_beta": a_beta,
            "action_mass": a_mass,
            "action_det": a_det,
            "omega": np.trace(utot) / (nf * v),
            "omega_h": np.exp(1j * cfg.theta_angles[0]) * np.trace(utot) / (nf * v),
            "condensate": np.diagonal(utot).copy() / v,
            "det": dtot / v,
            "accept_metropolis": float(rates[0]),
            "accept_phase": float(rates[1]),
            "unitarity_drift": st.win_drift,
            "slices/U": umat.reshape(-1, nf, nf).copy(),
            "slices/det": dets.copy(),
        }
        st.win_acc[:] = 0
        st.win_tried[:] = 0
        st.win_drift = 0.0
        st.n_meas += 1
        return rec


def run_chain(sim: Simulation, sinks=(), should_stop=lambda: False) -> None:
    """Run ``sim`` to its last sweep, feeding the sinks.

    A checkpoint is taken every ``checkpoint_every`` sweeps, every
    ``checkpoint_seconds`` seconds, at the end, and when ``should_stop()``
    turns true (then :class:`Interrupted` is raised after the checkpoint).

    The field is checked for NaN/inf before every sweep, before every
    checkpoint and before the end: a non-finite field raises
    :class:`NumericalError` naming the sweep and the site, and is never
    written, so the last checkpoint on disk stays the last good state.
    """
    cfg, st = sim.config, sim.state

    def check_finite() -> None:
        # one O(V nf^2) scan, cheap next to a sweep; checked *before* each sweep because
        # the rejection samplers of the kernels do not terminate on NaN input
        site = field_is_finite(st.re, st.im)
        if site >= 0:
            coords = tuple(int(c) for c in sim.lattice.coordinates()[site])
            raise NumericalError(f"non-finite field after sweep {st.sweep} at site {site} "
                                 f"(coordinates {coords}); the last checkpoint is the last good state")

    for s in sinks:
        s.start(sim)
    last = time.monotonic()
    total = sim.total_sweeps
    while st.sweep < total:
        check_finite()
        sim.sweep()
        past = st.sweep - cfg.thermalize
        record = None
        if past > 0 and past % cfg.measure_every == 0:
            record = sim.measure()
        for s in sinks:
            s.record(sim, record)
        now = time.monotonic()
        stop = should_stop()
        if st.sweep % cfg.checkpoint_every == 0 or now - last >= cfg.checkpoint_seconds or stop:
            check_finite()
            for s in sinks:
                s.checkpoint(sim)
            last = time.monotonic()
        if stop and st.sweep < total:
            raise Interrupted(st.sweep)
    check_finite()
    for s in sinks:
        s.finish(sim)


class MemorySink:
    """Sink that keeps every record in memory (for tests, validation and studies).

    After the run, :meth:`arrays` gives the series as numpy arrays, named as
    in the run file (``slices/U``, ``slices/det`` for the slice sums).
    """

    def __init__(self):
        self.records: list[dict] = []

    def start(self, sim) -> None:
        pass

    def record(self, sim, record) -> None:
        if record is not None:
            self.records.append(record)

    def checkpoint(self, sim) -> None:
        pass

    def finish(self, sim) -> None:
        pass

    def arrays(self) -> dict:
        if not self.records:
            return {}
        return {k: np.array([r[k] for r in self.records]) for k in self.records[0]}


def make_simulation(config: RunConfig, state: ChainState | None = None) -> Simulation:
    """The simulation class for the config's model (the one place models are dispatched)."""
    if config.kind == "linear":
        from sigmasim.linear import LinearSimulation  # imports chain: no module-level import

        return LinearSimulation(config, state)
    return Simulation(config, state)


def simulate(config: RunConfig) -> dict:
    """Run ``config`` in memory and return its series (see :class:`MemorySink`)."""
    sink = MemorySink()
    run_chain(make_simulation(config), (sink,))
    return sink.arrays()
