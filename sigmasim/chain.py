"""One Monte Carlo chain: state, sweeps, measurements and the run loop.

:class:`Simulation` is a chain of one config; what the field is, how it is updated and measured
comes from its model (:mod:`sigmasim.models`).  :func:`iterate` is the loop: a generator that
sweeps, measures and says when a checkpoint is due, and owns the finiteness checks; it neither
draws nor writes.  :func:`run_chain` feeds its steps to sinks (:class:`Sink`: a progress bar, the
HDF5 writer, :class:`MemorySink`).  All randomness is counter based and keyed by ``state.step``, so
a chain restored from a checkpoint continues exactly.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, replace
from typing import Protocol

import numpy as np

from sigmasim import models
from sigmasim.config import RunConfig
from sigmasim.errors import NumericalError
from sigmasim.kernels.measure import field_is_finite
from sigmasim.lattice import make_lattice

__all__ = ["ChainState", "Simulation", "Step", "Sink", "iterate", "run_chain", "simulate", "make_simulation",
           "MemorySink", "Interrupted"]


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

    def __post_init__(self):
        # the kernels' own copies of the field, placed for the vector loads (see field_array)
        self.re = field_array(self.re, 0)
        self.im = field_array(self.im, _IM_OFFSET)


_PAGE = 4096
_IM_OFFSET = 2048  # im's start half a page after re's (mod 4096 bytes): their rows share no L1 sets


def field_array(a, offset: int = 0) -> np.ndarray:
    """A C-contiguous float64 copy of ``a`` whose data start ``offset`` bytes past a 4096-byte boundary.

    The kernels load 8 consecutive sites of a component as one 64-byte vector; numpy's own
    allocations start at 16- or 32-byte boundaries, so those loads straddled two cache lines.
    With re at a page boundary and im half a page on, every component row starts on a cache
    line (the row length is a multiple of 8 sites in the vector paths) and re's and im's rows
    fall in different L1 sets.  16^3, one thread, AVX-512, same process: U(2) Metropolis 1.06x,
    overrelaxation 1.03x, U(3) overrelaxation 1.16x, heatbath and Metropolis 1.02x.  Same numbers.
    Always a copy: the state never shares memory with what it was built from.
    """
    a = np.asarray(a, dtype=np.float64)
    buf = np.empty(a.size + (_PAGE + offset) // 8)
    start = ((-buf.ctypes.data) % _PAGE + offset) // 8
    out = buf[start:start + a.size].reshape(a.shape)
    out[...] = a
    return out


class Simulation:
    """A chain of one config: lattice, state, and the operations of the config's model on them."""

    def __init__(self, config: RunConfig, state: ChainState | None = None):
        self.config = config
        self.model = models.get(config.kind)
        self.lattice = make_lattice(config.shape)
        self.hdiag = config.hdiag.astype(np.complex128)
        # fixed number of site blocks per colour: independent of the thread count
        self.blocks = max(1, min(64, self.lattice.half // 16))
        if state is None:
            re, im = self.model.initial_field(config, self.lattice)
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
        """One sweep of the schedule, then the model's projection and the step tuning when due."""
        st, cfg, updates = self.state, self.config, self.model.UPDATES
        for name, repeat in cfg.schedule:
            update = updates[name]
            k = 0 if name == "metropolis" else 1
            for _ in range(repeat):
                acc, tried = update(self)
                st.win_acc[k] += acc
                st.win_tried[k] += tried
                if k == 0:
                    st.tune_acc += acc
                    st.tune_tried += tried
        st.sweep += 1
        if st.sweep % cfg.reunitarize_every == 0:
            drift = self.model.project(self)
            if drift is not None:
                st.win_drift = max(st.win_drift, drift)
        if st.sweep <= cfg.thermalize and self.uses_metropolis and st.sweep % cfg.tune_every == 0:
            self._tune()

    def _tune(self) -> None:
        st = self.state
        if st.tune_tried:
            rate = st.tune_acc / st.tune_tried
            # multiplicative step toward the target, bounded so one window cannot overshoot
            factor = min(2.0, max(0.5, math.exp(2.0 * (rate - self.config.target_acceptance))))
            st.step_size = min(self.model.STEP_MAX, st.step_size * factor)
        st.tune_acc = 0
        st.tune_tried = 0

    def measure(self) -> dict:
        """Measure the current configuration; returns one record (the model's SERIES and SLICES)."""
        st = self.state
        rec = self.model.measure(self)
        if not math.isfinite(rec["action"]):
            site = field_is_finite(st.re, st.im)
            where = f" at site {site}" if site >= 0 else ""
            raise NumericalError(f"non-finite action at sweep {st.sweep}{where}")
        rates = np.where(st.win_tried > 0, st.win_acc / np.maximum(st.win_tried, 1), np.nan)
        rec = {"sweep": st.sweep, **rec, "accept_metropolis": float(rates[0]), "accept_phase": float(rates[1])}
        st.win_acc[:] = 0
        st.win_tried[:] = 0
        st.win_drift = 0.0
        st.n_meas += 1
        return rec


@dataclass(frozen=True, slots=True)
class Step:
    """What :func:`iterate` yields after each sweep.

    sweep : int
        ``state.sweep`` after this sweep.
    record : dict or None
        The measurement taken after this sweep (:meth:`Simulation.measure`), or None.
    checkpoint : bool
        A checkpoint is due now (the field has been checked finite): the consumer writes it
        before asking for the next step.
    stop : bool
        ``should_stop()`` turned true before the last sweep: this is the last step
        (``checkpoint`` is true too), the chain is not finished.
    """

    sweep: int
    record: dict | None
    checkpoint: bool
    stop: bool


def _check_finite(sim) -> None:
    # one O(V nf^2) scan, cheap next to a sweep; checked *before* each sweep because
    # the rejection samplers of the kernels do not terminate on NaN input
    st = sim.state
    site = field_is_finite(st.re, st.im)
    if site >= 0:
        coords = tuple(int(c) for c in sim.lattice.coordinates()[site])
        raise NumericalError(f"non-finite field after sweep {st.sweep} at site {site} "
                             f"(coordinates {coords}); the last checkpoint is the last good state")


def iterate(sim: Simulation, *, until: int | None = None,
            measure_due: Callable[[int], bool] | None = None,
            should_stop: Callable[[], bool] | None = None,
            checkpoint_every: int | None = None,
            checkpoint_seconds: float | None = None,
            sweep: Callable[[], None] | None = None) -> Iterator[Step]:
    """Sweep ``sim`` until ``state.sweep == until``, yielding a :class:`Step` after every sweep.

    ``until``: the last sweep (default ``sim.total_sweeps``); ``measure_due(sweep)``: whether to
    measure after that sweep (default: past ``run.thermalize``, every ``run.measure_every``);
    ``should_stop()``: polled after every sweep; a checkpoint is due every ``checkpoint_every``
    sweeps (of ``state.sweep``), every ``checkpoint_seconds`` seconds (defaults: the config's) and
    when ``should_stop()`` turns true.  The consumer writes the checkpoints; the seconds are counted
    from when it asks for the next step.  After a ``stop`` step the generator ends.  ``sweep``: the
    sweep to run (default ``sim.sweep``; a sampler of another weight, such as the multicanonical
    chain's biased sweep, passes its own, which must advance ``state.sweep`` by one).

    The field is checked for NaN/inf before every sweep, before yielding a checkpoint and before
    the generator ends: a non-finite field raises :class:`NumericalError` naming the sweep and the
    site, so it is never written and the last checkpoint on disk stays the last good state.
    Breaking out of the loop is allowed (the state is that of the last step).
    """
    cfg, st = sim.config, sim.state
    total = sim.total_sweeps if until is None else until
    every = cfg.checkpoint_every if checkpoint_every is None else checkpoint_every
    seconds = cfg.checkpoint_seconds if checkpoint_seconds is None else checkpoint_seconds
    if measure_due is None:
        therm, m_every = cfg.thermalize, cfg.measure_every

        def measure_due(sweep):
            past = sweep - therm
            return past > 0 and past % m_every == 0
    one_sweep = sim.sweep if sweep is None else sweep
    last = time.monotonic()
    while st.sweep < total:
        _check_finite(sim)
        one_sweep()
        record = sim.measure() if measure_due(st.sweep) else None
        now = time.monotonic()
        stop = bool(should_stop()) if should_stop is not None else False
        due = st.sweep % every == 0 or now - last >= seconds or stop
        if due:
            _check_finite(sim)
        early = stop and st.sweep < total
        yield Step(st.sweep, record, due, early)
        if due:
            last = time.monotonic()
        if early:
            return
    _check_finite(sim)


class Sink(Protocol):
    """What :func:`run_chain` feeds: the progress bar, the run-file writer, :class:`MemorySink`."""

    def start(self, sim: Simulation) -> None:
        """Before the first sweep."""

    def record(self, sim: Simulation, record: dict | None) -> None:
        """After every sweep, with its measurement or None."""

    def checkpoint(self, sim: Simulation) -> None:
        """When a checkpoint is due (the field is finite)."""

    def finish(self, sim: Simulation) -> None:
        """After the last sweep (the field is finite)."""


def run_chain(sim: Simulation, sinks: tuple[Sink, ...] = (), should_stop=lambda: False) -> None:
    """Run ``sim`` to its last sweep through :func:`iterate`, feeding the sinks.

    A checkpoint is taken every ``checkpoint_every`` sweeps, every ``checkpoint_seconds``
    seconds, at the end, and when ``should_stop()`` turns true (then :class:`Interrupted` is
    raised after the checkpoint).  A non-finite field raises :class:`NumericalError` and is never
    written (see :func:`iterate`).
    """
    for s in sinks:
        s.start(sim)
    for step in iterate(sim, should_stop=should_stop):
        for s in sinks:
            s.record(sim, step.record)
        if step.checkpoint:
            for s in sinks:
                s.checkpoint(sim)
        if step.stop:
            raise Interrupted(step.sweep)
    for s in sinks:
        s.finish(sim)


class MemorySink:
    """Sink that keeps every record in memory (for tests, validation and studies).

    After the run, :meth:`arrays` gives the series as numpy arrays, named as
    in the run file (``slices/<name>`` for the slice sums).
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
    """``Simulation(config, state)`` (kept for callers of the time when each model had its own class)."""
    return Simulation(config, state)


def simulate(config: RunConfig) -> dict:
    """Run ``config`` in memory and return its series (see :class:`MemorySink`)."""
    sink = MemorySink()
    run_chain(Simulation(config), (sink,))
    return sink.arrays()
