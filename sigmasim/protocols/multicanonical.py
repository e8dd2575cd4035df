"""Multicanonical sampling in a collective variable (Berg & Neuhaus, PRL 68 (1992) 9).

The chain samples ``exp(-S - W(x))`` with ``x`` a per-site sum divided by V
(``im_omega_h``: Im omega_h of :data:`sigmasim.models.chiral.SERIES`; ``im_det``:
Im(e^{i theta_a} det U) averaged over the sites).  ``W`` is tabulated on a
histogram grid (:class:`Weight`; kernels in :mod:`sigmasim.kernels.bias`).

Protocol (``sigmasim multicanonical CONFIG``, table ``[multicanonical]``):

1. thermalise with W = 0 (Metropolis step tuned as in an ordinary run);
2. build W by Wang-Landau iterations (Wang & Landau, PRL 86 (2001) 2050):
   after every sweep ``W[bin(x)] += f``, f halved after each iteration
   (an iteration repeats its sweeps until the histogram is flat enough,
   ``wl_flatness``, at most ``wl_chunks`` times: the production run is exact
   whatever W is; a flatter W only makes it faster);
3. freeze W and run the production chain, an exact Markov chain of
   exp(-S - W(x));
4. canonical averages by reweighting with exp(+W(x_i)) (ratio estimator,
   errors from Wolff's Gamma method on the production series, derived
   quantity); -ln P(x), the barrier and the round trips in the flat
   ensemble from :mod:`sigmasim.analysis.profile`
   (:func:`~sigmasim.analysis.profile.multicanonical_profile`: block
   bootstrap, the estimator whose coverage test passes on a correlated
   chain; :func:`~sigmasim.analysis.profile.barrier`,
   :func:`~sigmasim.analysis.profile.round_trips`).

The whole protocol checkpoints (:func:`run_multicanonical` with ``checkpoint``,
:func:`execute`): a rerun continues and ends with the numbers of an
uninterrupted run, bit for bit.

The functions :func:`run_biased` (a chain with a GIVEN frozen weight, for
example the harmonic restraint of an umbrella window, :meth:`Weight.harmonic`)
and :func:`reweighted_mean` are the public API for other protocols.  Results
are a research toy, not a physical prediction.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sigmasim import models
from sigmasim.models import chiral
from sigmasim.chain import ChainState, Simulation
from sigmasim.config import RunConfig
from sigmasim.errors import ConfigError
from sigmasim.kernels.bias import MODES, biased_sweeps, collective, global_phase_moves, variable_sum
from sigmasim.rng import mix64_int
from sigmasim.protocols.common import h5_output

__all__ = ["Weight", "BiasedChain", "BiasedRun", "run_biased", "wang_landau", "reweighted_mean", "VARIABLES",
           "MUCA_SCHEMA", "muca_params", "MucaResult", "run_multicanonical", "analyse", "execute",
           "checkpoint_path", "default_path", "run_identity"]

#: variable name -> meaning
VARIABLES = {
    "im_omega_h": "Im omega_h = Im(e^{i theta_m} sum_x Tr U_x) / (nf V)",
    "im_det": "Im(e^{i theta_a} sum_x det U_x) / V (U(nf) only)",
    "arg_omega_h": "arg omega_h in (-pi, pi], the phase of omega_h (the branch angle)",
}


@dataclass(frozen=True)
class Weight:
    """W(x) on ``bins`` equal bins over [lo, hi]: values at the bin centres, linear in between,
    constant in the outer half bins, and outside the grid a linear wall of ``wall`` per bin width.

    ``weight(x)`` evaluates exactly the function the kernel uses (use it, not the formula that
    built the table, for reweighting and WHAM).
    """

    lo: float
    hi: float
    values: np.ndarray
    wall: float = 10.0

    def __post_init__(self):
        v = np.ascontiguousarray(np.asarray(self.values, dtype=np.float64))
        object.__setattr__(self, "values", v)
        if v.ndim != 1 or v.size < 2:
            raise ConfigError(f"a weight needs at least 2 bins, got {v.size}")
        if not (math.isfinite(self.lo) and math.isfinite(self.hi) and self.lo < self.hi):
            raise ConfigError(f"the weight's grid needs lo < hi, got [{self.lo}, {self.hi}]")
        if not np.all(np.isfinite(v)):
            raise ConfigError("the weight has non-finite values")
        if not (math.isfinite(self.wall) and self.wall >= 0):
            raise ConfigError(f"the weight's wall must be finite and >= 0, got {self.wall}")

    @property
    def bins(self) -> int:
        return self.values.size

    @property
    def dx(self) -> float:
        return (self.hi - self.lo) / self.bins

    @property
    def edges(self) -> np.ndarray:
        return np.linspace(self.lo, self.hi, self.bins + 1)

    @property
    def centres(self) -> np.ndarray:
        return self.lo + (np.arange(self.bins) + 0.5) * self.dx

    def __call__(self, x) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        w = np.interp(x, self.centres, self.values)
        w = np.where(x < self.lo, self.values[0] + self.wall * (self.lo - x) / self.dx, w)
        return np.where(x > self.hi, self.values[-1] + self.wall * (x - self.hi) / self.dx, w)

    @classmethod
    def flat(cls, lo: float, hi: float, bins: int, wall: float = 10.0) -> "Weight":
        return cls(float(lo), float(hi), np.zeros(int(bins)), float(wall))

    @classmethod
    def harmonic(cls, k: float, x0: float, lo: float, hi: float, bins: int, wall: float = 10.0) -> "Weight":
        """The restraint k/2 (x - x0)^2 tabulated at the bin centres (an umbrella window)."""
        c = float(lo) + (np.arange(int(bins)) + 0.5) * (float(hi) - float(lo)) / int(bins)
        return cls(float(lo), float(hi), 0.5 * float(k) * (c - float(x0)) ** 2, float(wall))


def _variable_constant(config: RunConfig, variable: str) -> tuple[int, complex]:
    if variable not in MODES:
        raise ConfigError(f"unknown collective variable {variable!r}; choose one of {sorted(MODES)}")
    theta_m, theta_a = config.theta_angles
    if variable == "im_det" and config.special:
        raise ConfigError("variable 'im_det' needs group U (det U = 1 for SU(nf))")
    return MODES[variable], complex(np.exp(1j * (theta_a if variable == "im_det" else theta_m)))


class BiasedChain:
    """A chain of exp(-S - W(x)): a :class:`~sigmasim.chain.Simulation` (state, measure,
    re-unitarisation) swept by :func:`sigmasim.kernels.bias.biased_sweeps`.

    The chain model only: nf >= 1 chiral model, any group; Metropolis (``metropolis_hits`` of the
    config, step ``state.step_size``) plus ``overrelax`` overrelaxation passes per sweep.
    ``global_hits`` > 0 (U(nf) only) starts every sweep with that many hits of the global phase move
    U_x -> e^{i alpha} U_x, alpha uniform in [-global_step, global_step]
    (:func:`sigmasim.kernels.bias.global_phase_moves`); 0 (default) leaves the chain unchanged.
    """

    def __init__(self, config: RunConfig, weight: Weight, variable: str = "im_omega_h", overrelax: int = 1,
                 state: ChainState | None = None, global_hits: int = 0, global_step: float = 0.5):
        if not models.get(config.kind).UNITARY:
            raise ConfigError("multicanonical sampling supports models with a unitary field only (model.kind = 'chiral')")
        if global_hits and config.special:
            raise ConfigError("the global phase move needs model.group = 'U' (SU(nf) has no U(1) phase)")
        if not (global_hits >= 0 and math.isfinite(global_step) and global_step > 0):
            raise ConfigError(f"the global phase move needs hits >= 0 and a step > 0, got {global_hits}, {global_step}")
        self.sim = Simulation(config, state)
        self.config = config
        self.weight = weight
        self.variable = variable
        self.mode, self.cvar = _variable_constant(config, variable)
        self.overrelax = int(overrelax)
        self.seed_hash = np.uint64(mix64_int(config.seed))
        self.counts = np.zeros(4, dtype=np.int64)
        self.global_hits = int(global_hits)
        self.global_step = float(global_step)
        self.global_counts = np.zeros(2, dtype=np.int64)  # global phase move: accepted, tried
        self.values = np.array(weight.values, dtype=np.float64)  # the kernel's (Wang-Landau: mutable) table
        self._x = np.empty(1, dtype=np.float64)  # x after the kernel's sweep
        self._wl_f = 0.0
        self._hist = np.zeros(self.values.size, dtype=np.int64)
        self.last_x = float("nan")

    @property
    def state(self) -> ChainState:
        return self.sim.state

    def x(self) -> float:
        st = self.sim.state
        return float(collective(variable_sum(st.re, st.im, self.config.nf, self.mode, self.cvar), st.re.shape[1],
                                self.mode))

    def frozen_weight(self) -> Weight:
        return Weight(self.weight.lo, self.weight.hi, self.values.copy(), self.weight.wall)

    def _sweep(self) -> None:
        """One biased sweep (the ``sweep`` that :func:`sigmasim.chain.iterate` runs), then the model's
        re-unitarisation when due; x after it in ``self.last_x``."""
        cfg, st, lat = self.config, self.sim.state, self.sim.lattice
        w = self.weight
        before = self.counts.copy()
        if self.global_hits:
            global_phase_moves(st.re, st.im, cfg.nf, self.sim.hdiag, float(cfg.kappa), complex(cfg.eta), self.mode,
                               self.cvar, float(w.lo), float(w.dx), self.values, float(w.wall), self.global_hits,
                               self.global_step, self.seed_hash, st.step, self.global_counts)
        st.step = int(biased_sweeps(st.re, st.im, lat.neighbours, cfg.nf, cfg.special, float(cfg.beta),
                                    self.sim.hdiag, float(cfg.kappa), complex(cfg.eta), int(cfg.metropolis_hits),
                                    self.overrelax, float(st.step_size), self.seed_hash, st.step, 1,
                                    self.mode, self.cvar, float(w.lo), float(w.dx), self.values,
                                    float(w.wall), float(self._wl_f), self._hist, self._x, self.counts))
        diff = self.counts - before
        st.win_acc += diff[0::2]
        st.win_tried += diff[1::2]
        st.tune_acc += int(diff[0])
        st.tune_tried += int(diff[1])
        st.sweep += 1
        if st.sweep % cfg.reunitarize_every == 0:
            drift = self.sim.model.project(self.sim)
            if drift is not None:
                st.win_drift = max(st.win_drift, drift)
        self.last_x = float(self._x[0])

    def steps(self, n: int, measure_due=None, wl_f: float = 0.0, hist: np.ndarray | None = None, *,
              should_stop=None, checkpoint_every: int | None = None, checkpoint_seconds: float | None = None):
        """``n`` biased sweeps through :func:`sigmasim.chain.iterate` (finiteness checks, measurement
        after the sweeps ``measure_due`` names); yields iterate's steps.  ``wl_f`` > 0 adds
        ``wl_f`` to W at x's bin after every sweep and counts x in ``hist`` (Wang-Landau).
        ``should_stop``, ``checkpoint_every`` and ``checkpoint_seconds`` go to iterate (default:
        no checkpoint is ever due)."""
        from sigmasim.chain import iterate

        self._wl_f = float(wl_f)
        self._hist = np.zeros(self.values.size, dtype=np.int64) if hist is None else hist
        yield from iterate(self.sim, until=self.sim.state.sweep + int(n),
                           measure_due=measure_due if measure_due is not None else (lambda sweep: False),
                           should_stop=should_stop,
                           checkpoint_every=1 << 62 if checkpoint_every is None else int(checkpoint_every),
                           checkpoint_seconds=float("inf") if checkpoint_seconds is None else checkpoint_seconds,
                           sweep=self._sweep)

    def sweeps(self, n: int, wl_f: float = 0.0, hist: np.ndarray | None = None) -> np.ndarray:
        """``n`` sweeps (:meth:`steps`, no measurements); returns x after each, (n,)."""
        out = np.empty(int(n), dtype=np.float64)
        for i, _ in enumerate(self.steps(n, wl_f=wl_f, hist=hist)):
            out[i] = self.last_x
        return out

    def tune(self) -> None:
        """One step-size adjustment toward ``run.target_acceptance`` (as the plain chain tunes)."""
        self.sim._tune()


@dataclass
class BiasedRun:
    """What :func:`run_biased` returns.

    Attributes
    ----------
    x : float64 (n,)
        The collective variable at each measurement.
    w : float64 (n,)
        ``weight(x)`` at each measurement (the bias that was sampled; reweight with exp(+w)).
    series : dict
        The run's :data:`sigmasim.models.chiral.SERIES` observables at the same measurements (numpy arrays,
        as :class:`sigmasim.chain.MemorySink` gives them; ``slices/*`` left out).
    weight : Weight
        The frozen weight.
    state : ChainState
        The chain's state after the run (pass it back as ``state`` to continue exactly).
    acceptance : dict
        ``metropolis`` and ``overrelax`` acceptance rates of the run.
    seconds : float
        CPU (process) time of the run.
    """

    x: np.ndarray
    w: np.ndarray
    series: dict
    weight: Weight
    state: ChainState
    acceptance: dict = field(default_factory=dict)
    seconds: float = 0.0


def _production_steps(chain: BiasedChain, sweeps: int, every: int, pos: dict, **iterate_kw):
    """The measured sweeps of a frozen-weight chain: ``pos`` holds ``start`` (the sweep before the
    first of them), ``x`` and ``records`` (lists, appended in place), so that a checkpoint written
    at any yielded step continues exactly.  Yields iterate's steps (``iterate_kw`` go to it)."""
    start = int(pos["start"])
    left = start + int(sweeps) - chain.state.sweep
    for step in chain.steps(left, measure_due=lambda sweep: (sweep - start) % every == 0, **iterate_kw):
        if step.record is not None:
            pos["x"].append(chain.last_x)
            pos["records"].append({k: step.record[k] for k in chiral.SERIES})
        yield step


def _biased_run(chain: BiasedChain, weight: Weight, pos: dict, seconds: float) -> BiasedRun:
    xs = np.asarray(pos["x"], dtype=np.float64)
    records = pos["records"]
    series = {k: np.array([r[k] for r in records]) for k in chiral.SERIES} if records else {}
    c = chain.counts
    acc = {"metropolis": c[0] / c[1] if c[1] else float("nan"),
           "overrelax": c[2] / c[3] if c[3] else float("nan")}
    if chain.global_hits:
        g = chain.global_counts
        acc["global_phase"] = g[0] / g[1] if g[1] else float("nan")
    return BiasedRun(xs, weight(xs), series, weight, chain.state, acc, seconds)


def run_biased(config: RunConfig, weight: Weight, sweeps: int, *, measure_every: int = 1, thermalize: int = 0,
               variable: str = "im_omega_h", overrelax: int = 1, state: ChainState | None = None,
               global_hits: int = 0, global_step: float = 0.5) -> BiasedRun:
    """Run an exact Markov chain of exp(-S - W(x)) with a frozen ``weight``.

    ``thermalize`` sweeps come first (with the same weight; the Metropolis step is tuned toward
    ``run.target_acceptance`` every ``run.tune_every`` sweeps there, and frozen after), then
    ``sweeps`` sweeps with a measurement every ``measure_every``.  Seeded by ``config.seed``;
    with ``state`` given the chain continues from it (same numbers as one longer run).
    ``global_hits``, ``global_step``: the global phase move (:class:`BiasedChain`).
    """
    chain = BiasedChain(config, weight, variable, overrelax, state, global_hits, global_step)
    t0 = time.process_time()
    for _ in range(int(thermalize)):
        chain.sweeps(1)
        if chain.state.sweep % config.tune_every == 0:
            chain.tune()
    chain.counts[:] = 0
    chain.global_counts[:] = 0
    every = int(measure_every)
    pos = {"start": chain.state.sweep, "x": [], "records": []}
    for _ in _production_steps(chain, (int(sweeps) // every) * every, every, pos):
        pass
    return _biased_run(chain, weight, pos, time.process_time() - t0)


def _wl_position() -> dict:
    """Where a Wang-Landau build stands: iteration ``k``, chunk ``c`` of it, the sweep its chunk
    started at, its histogram (None between iterations) and the finished iterations."""
    return {"k": 0, "c": 0, "chunk_start": 0, "hist": None, "done": []}


def _wang_landau_steps(chain: BiasedChain, iterations: int, sweeps: int, f0: float, flatness: float, chunks: int,
                       pos: dict, **iterate_kw):
    """The Wang-Landau sweeps (see :func:`wang_landau`), yielding iterate's steps; ``pos``
    (:func:`_wl_position`) is kept up to date, so that a checkpoint written at any yielded step
    continues exactly.  A consumer that gets a ``stop`` step must not ask for more."""
    while pos["k"] < int(iterations):
        f = float(f0) / 2.0 ** pos["k"]
        if pos["hist"] is None:
            pos.update(c=0, chunk_start=chain.state.sweep, hist=np.zeros(chain.values.size, dtype=np.int64))
        hist = pos["hist"]
        yield from chain.steps(pos["chunk_start"] + int(sweeps) - chain.state.sweep, wl_f=f, hist=hist,
                               **iterate_kw)
        mean = hist.mean()
        flat = float(hist.min() / mean) if mean > 0 else 0.0
        if flat >= flatness or pos["c"] + 1 >= max(1, int(chunks)):
            pos["done"].append({"f": f, "hist": hist, "flatness": flat, "sweeps": (pos["c"] + 1) * int(sweeps)})
            pos.update(k=pos["k"] + 1, hist=None)
        else:
            pos.update(c=pos["c"] + 1, chunk_start=chain.state.sweep)


def wang_landau(chain: BiasedChain, iterations: int, sweeps: int, f0: float = 1.0, flatness: float = 0.0,
                chunks: int = 1) -> list[dict]:
    """Wang-Landau building of the chain's weight table in place (Wang & Landau, PRL 86 (2001) 2050).

    Iteration k adds ``f0 / 2^k`` to W at the bin of x after every sweep; it runs ``sweeps``
    sweeps at a time until the histogram's flatness (min / mean over the bins) reaches
    ``flatness``, at most ``chunks`` times (``flatness = 0``: one chunk, a fixed schedule).
    Returns per iteration: f, the histogram, its flatness and the sweeps run.  After the last
    iteration the table is shifted to min 0.
    """
    pos = _wl_position()
    for _ in _wang_landau_steps(chain, iterations, sweeps, f0, flatness, chunks, pos):
        pass
    chain.values -= chain.values.min()
    return pos["done"]


def _ratio_gamma(num: np.ndarray, den: np.ndarray):
    from sigmasim.analysis.gamma import gamma_analysis

    data = np.column_stack([num, den])
    return gamma_analysis(data, func=lambda m: m[0] / m[1])


def reweighted_mean(obs, w) -> tuple[float, float, float]:
    """Canonical <O> from a biased chain: sum O e^{w} / sum e^{w} with ``w = weight(x_i)``.

    Error by Wolff's Gamma method on the production series (ratio of two primary means as a
    derived quantity). Returns (value, error, tau_int).
    """
    obs = np.asarray(obs, dtype=np.float64)
    w = np.asarray(w, dtype=np.float64)
    e = np.exp(w - w.max())
    g = _ratio_gamma(obs * e, e)
    return float(g.value), float(g.error), float(g.tau_int)


# ---------------------------------------------------------------------------
# the protocol: [multicanonical] table, weight building, production, analysis
# ---------------------------------------------------------------------------

#: key -> (kind, default, meaning) of the [multicanonical] table
MUCA_SCHEMA = {
    "variable": ("choice", "im_omega_h", "collective variable: im_omega_h (Im omega_h, the per-site mean of "
                 "Im(e^{i theta_m} Tr U) / nf), im_det (per-site mean of Im(e^{i theta_a} det U), U(nf) "
                 "only) or arg_omega_h (the phase of omega_h in (-pi, pi], the branch angle)"),
    "range": ("range", [-0.6, 0.6], "[lo, hi] of the weight's histogram grid in the variable"),
    "bins": ("int:2:100000", 24, "bins of the grid"),
    "wall": ("real>=0", 10.0, "slope of the weight outside the grid, per bin width (a steep finite wall)"),
    "wl_iterations": ("int:0:64", 8, "Wang-Landau iterations building the weight (0: W = 0, a plain run)"),
    "wl_sweeps": ("int:1:1000000000", 500, "sweeps per Wang-Landau iteration"),
    "wl_start": ("real>0", 0.5, "Wang-Landau increment of the first iteration, halved after each"),
    "wl_flatness": ("real:0:1", 0.0, "an iteration repeats its wl_sweeps until the histogram's min / mean "
                    "reaches this (0: a fixed schedule of one chunk per iteration)"),
    "wl_chunks": ("int:1:1000000", 1, "at most this many chunks of wl_sweeps per iteration"),
    "overrelax": ("int:0:100", 1, "overrelaxation passes per sweep (after the Metropolis pass)"),
    "regions": ("regions", None, "optional [left, right]: a round trip goes x <= left -> x >= right -> "
                "x <= left (default: the outer quarters of the grid); the barrier's saddle is sought between "
                "the minima on either side of their midpoint"),
}


def _num(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def muca_params(sub: dict) -> dict:
    """Validate a ``[multicanonical]`` table; returns every key with its default filled in.

    Raises :class:`ConfigError` with one line naming the key and what is wrong.
    """
    if not isinstance(sub, dict):
        raise ConfigError("[multicanonical] must be a table")
    unknown = sorted(set(sub) - set(MUCA_SCHEMA))
    if unknown:
        raise ConfigError(f"unknown key multicanonical.{unknown[0]}; valid keys: {', '.join(MUCA_SCHEMA)}")
    out = {}
    for key, (kind, default, _) in MUCA_SCHEMA.items():
        v = sub.get(key, default)
        where = f"multicanonical.{key}"
        if kind == "choice":
            if v not in VARIABLES:
                raise ConfigError(f"{where} must be one of {', '.join(VARIABLES)}, got {v!r}")
        elif kind in ("range", "regions"):
            if v is None and kind == "regions":
                out[key] = None
                continue
            if not (isinstance(v, list) and len(v) == 2 and all(_num(t) for t in v) and v[0] < v[1]):
                raise ConfigError(f"{where} must be two numbers [low, high] with low < high, got {v!r}")
            v = [float(v[0]), float(v[1])]
        elif kind.startswith("int:"):
            lo, hi = (int(t) for t in kind[4:].split(":"))
            if not (isinstance(v, int) and not isinstance(v, bool) and lo <= v <= hi):
                raise ConfigError(f"{where} must be an integer in [{lo}, {hi}], got {v!r}")
        elif kind == "real:0:1":
            if not (_num(v) and 0.0 <= v < 1.0):
                raise ConfigError(f"{where} must be a number in [0, 1), got {v!r}")
            v = float(v)
        elif kind in ("real>0", "real>=0"):
            ok = _num(v) and (v > 0 if kind == "real>0" else v >= 0)
            if not ok:
                raise ConfigError(f"{where} must be a finite number {kind[4:]}, got {v!r}")
            v = float(v)
        out[key] = v
    lo, hi = out["range"]
    if out["regions"] is not None and not (lo <= out["regions"][0] and out["regions"][1] <= hi):
        raise ConfigError(f"multicanonical.regions {out['regions']} must lie inside "
                          f"multicanonical.range {out['range']}")
    if out["variable"] != "arg_omega_h" and (lo < -1.0 or hi > 1.0):
        raise ConfigError(f"multicanonical.range {out['range']} must lie inside [-1, 1] (|x| <= 1)")
    if out["variable"] == "arg_omega_h" and (lo < -math.pi or hi > math.pi):
        raise ConfigError(f"multicanonical.range {out['range']} must lie inside [-pi, pi] (a phase)")
    return out


def check_config(config: RunConfig, params: dict) -> None:
    """Refuse configs the multicanonical chain cannot run (one line)."""
    if not models.get(config.kind).UNITARY:
        raise ConfigError("multicanonical sampling supports models with a unitary field only (model.kind = 'chiral')")
    if params["variable"] == "im_det" and config.special:
        raise ConfigError("multicanonical.variable = 'im_det' needs model.group = 'U' (det U = 1 for SU(nf))")


@dataclass
class MucaResult:
    """What :func:`run_multicanonical` returns (see :func:`result_blob` for the file).

    ``profile`` is the block-bootstrap -ln P(x) of :func:`sigmasim.analysis.profile.multicanonical_profile`,
    ``barrier`` its :class:`~sigmasim.analysis.profile.BarrierResult` (None when one side of the
    split was never visited; ``notes`` says so), ``trips`` the
    :class:`~sigmasim.analysis.profile.RoundTrips` between the two regions.
    """

    config: RunConfig
    params: dict
    weight: Weight
    wl: list
    run: BiasedRun
    profile: object
    barrier: object
    averages: dict
    trips: object
    regions: tuple
    seconds: dict
    notes: list = field(default_factory=list)

    @property
    def round_trips(self) -> int:
        """Completed round trips (half trips // 2)."""
        return int(self.trips.round_trips)

    @property
    def round_trip_sweeps(self) -> float:
        """Sweeps per round trip, 2 exposure / half trips (inf without a passage)."""
        t = self.trips.time
        return float(t) if np.isfinite(t) else float("inf")

    @property
    def round_trip_seconds(self) -> float:
        """Production CPU seconds per round trip."""
        sweeps = self.run.x.size * self.config.measure_every
        if not (sweeps and np.isfinite(self.round_trip_sweeps)):
            return float("inf")
        return self.run.seconds / sweeps * self.round_trip_sweeps

    def summary(self) -> str:
        c, p = self.config, self.params
        lines = [f"multicanonical {c.name}: U({c.nf})" if not c.special else f"multicanonical {c.name}: SU({c.nf})",
                 f"  lattice {list(c.shape)}, beta {c.beta}, theta {c.theta:.6g}; variable {p['variable']} on "
                 f"{p['range']} in {p['bins']} bins",
                 f"  Wang-Landau: {len(self.wl)} iterations, {sum(w['sweeps'] for w in self.wl)} sweeps, last flatness "
                 + (f"{self.wl[-1]['flatness']:.2f}" if self.wl else "n/a"),
                 f"  production: {self.run.x.size} measurements every {c.measure_every} sweeps, acceptance "
                 f"Metropolis {self.run.acceptance['metropolis']:.3f}, overrelaxation "
                 f"{self.run.acceptance['overrelax']:.3f}",
                 f"  round trips between x <= {self.regions[0]:.4g} and x >= {self.regions[1]:.4g}: "
                 f"{self.round_trips} ({self.round_trip_sweeps:.4g} sweeps, {self.round_trip_seconds:.4g} CPU s each)",
                 "  canonical averages (reweighted, Gamma-method errors):"]
        for k, (v, e, tau) in self.averages.items():
            lines.append(f"    {k:22s} {v: .6f} +- {e:.6f}  (tau_int {tau:.3g})")
        blk = self.profile.windows[0]["block"] if self.profile.windows else "?"
        lines.append(f"  -ln P(x): block bootstrap ({self.profile.replicas.shape[0]} replicas, blocks of {blk} "
                     f"measurements), {len(self.profile.unvisited)} unvisited bins" + _SHORT * bool(self.profile.short))
        if self.barrier is not None:
            lines.append(f"  barrier Delta F: {self.barrier.summary()}")
        lines += [f"  {n}" for n in self.notes]
        lines.append("  (a research toy, not a physical prediction)")
        return "\n".join(lines)


def _average_observables(run: BiasedRun) -> dict:
    s = run.series
    obs = {
        "x": run.x,
        "abs_x": np.abs(run.x),
        "x_squared": run.x ** 2,
        "action": s["action"],
        "re_omega_h": s["omega_h"].real,
        "im_omega_h": s["omega_h"].imag,
    }
    return {k: reweighted_mean(v, run.w) for k, v in obs.items()}


#: the warning of a production chain shorter than 100 tau_int (sigmasim.analysis.profile, module notes)
_SHORT = ("; WARNING: the production chain is shorter than 100 tau_int (blocks capped at a tenth of it): the "
          "errors are UNDERESTIMATED, run longer or compare independent chains")

#: bootstrap replicas of the profile and the barrier (seeded by the config's seed)
PROFILE_BOOTSTRAP = 200


def analyse(config: RunConfig, params: dict, weight: Weight, wl: list, run: BiasedRun, seconds: dict) -> MucaResult:
    """Averages, -ln P(x) (block bootstrap), the barrier and the round trips of a production run."""
    from sigmasim.analysis import profile as pr

    lo, hi = params["range"]
    regions = tuple(params["regions"]) if params["regions"] else (lo + 0.25 * (hi - lo), hi - 0.25 * (hi - lo))
    notes = []
    prof = pr.multicanonical_profile(run.x, weight, weight.edges, n_boot=PROFILE_BOOTSTRAP, seed=config.seed)
    try:
        br = pr.barrier(prof, split=0.5 * (regions[0] + regions[1]), half_width=min(4, max(2, weight.bins // 6)))
    except ValueError as exc:
        br = None
        notes.append(f"no barrier: {exc}")
    sweeps = run.series["sweep"] if run.series else None
    trips = pr.round_trips(run.x, *regions, sweeps=sweeps)
    return MucaResult(config, params, weight, wl, run, prof, br, _average_observables(run), trips, regions,
                      seconds, notes)


# ---------------------------------------------------------------------------
# checkpoint and resume of the whole protocol
# ---------------------------------------------------------------------------

CHECKPOINT_FORMAT = "sigmasim-multicanonical-checkpoint"
STAGES = ("thermalisation", "wang_landau", "production")


def checkpoint_path(path) -> Path:
    """The checkpoint of an unfinished run that writes ``path`` (``<file>.checkpoint``)."""
    path = Path(path)
    return path.with_name(path.name + ".checkpoint")


def default_path(config: RunConfig) -> Path:
    """The output of ``sigmasim multicanonical`` by default: ``<output>/<name>/<name>-multicanonical.h5``."""
    return config.run_dir / f"{config.name}-multicanonical.h5"


def run_identity(config: RunConfig, params: dict) -> str:
    """Everything that fixes the numbers of a run: the chain's physics hash, the measurements and the
    [multicanonical] table (a checkpoint or an output of another identity is never continued)."""
    return json.dumps({"physics": config.physics_hash(), "measurements": config.measurements,
                       "multicanonical": params}, sort_keys=True)


def _last_sweep(config: RunConfig, params: dict) -> int:
    return (config.thermalize + params["wl_iterations"] * max(1, params["wl_chunks"]) * params["wl_sweeps"]
            + config.measurements * config.measure_every)


def _save_checkpoint(path: Path, config, params, stage: str, chain: BiasedChain, wl: dict, prod, seconds) -> None:
    """Everything a resumed run needs, written atomically (storage.write_tree)."""
    from sigmasim.storage import write_tree

    bins = chain.values.size
    done = wl["done"]
    recs = prod["records"] if prod else []
    tree = {
        "@attrs": {"format": CHECKPOINT_FORMAT, "identity": run_identity(config, params), "stage": stage,
                   "wl_k": int(wl["k"]), "wl_c": int(wl["c"]), "wl_chunk_start": int(wl["chunk_start"]),
                   "wl_open": int(wl["hist"] is not None),
                   "production_start": int(prod["start"]) if prod else -1, "seconds": json.dumps(seconds)},
        "state": {"@state": chain.state},
        "chain": {"values": chain.values, "counts": chain.counts},
        "wang_landau": {
            "hist": wl["hist"] if wl["hist"] is not None else np.zeros(bins, dtype=np.int64),
            "f": np.array([w["f"] for w in done], dtype=np.float64),
            "flatness": np.array([w["flatness"] for w in done], dtype=np.float64),
            "sweeps": np.array([w["sweeps"] for w in done], dtype=np.int64),
            "hists": (np.array([w["hist"] for w in done], dtype=np.int64) if done
                      else np.zeros((0, bins), dtype=np.int64))},
        "production": {"x": np.asarray(prod["x"] if prod else [], dtype=np.float64),
                       "series": {k: np.array([r[k] for r in recs]) for k in chiral.SERIES}},
    }
    write_tree(path, tree, what="multicanonical checkpoint")


def _load_checkpoint(path: Path, config: RunConfig, params: dict) -> dict:
    """(stage, state, weight table, counts, Wang-Landau position, production position, seconds) of a
    checkpoint, every value checked; one-line :class:`RunFileError` when foreign, of another run
    or damaged."""
    from sigmasim.errors import RunFileError
    from sigmasim.storage import _check_state_ranges, _check_unitary, read_tree

    def damaged(why):
        return RunFileError(f"{path} is a damaged multicanonical checkpoint ({why}); remove it to start the run "
                            "again")

    try:
        f = read_tree(path, states=("state",))
    except (KeyError, TypeError, ValueError, OverflowError) as exc:
        raise damaged(" ".join(str(exc).split()) or type(exc).__name__) from None
    except OSError:
        raise RunFileError(f"{path} is not a multicanonical checkpoint of sigmasim (not a readable HDF5 file); "
                           "remove it or give another --out") from None
    attrs = f["@attrs"]
    if attrs.get("format") != CHECKPOINT_FORMAT:
        raise RunFileError(f"{path} is not a multicanonical checkpoint of sigmasim; remove it or give another --out")
    if attrs.get("identity") != run_identity(config, params):
        raise RunFileError(f"{path} belongs to another config or [multicanonical] table; restore that config, "
                           "or remove it to start this one")
    bins, every = params["bins"], config.measure_every
    try:
        stage = attrs["stage"]
        k, c, chunk_start, wl_open, start = (int(attrs[a]) for a in ("wl_k", "wl_c", "wl_chunk_start", "wl_open",
                                                                      "production_start"))
        seconds = {s: float(v) for s, v in json.loads(attrs["seconds"]).items()}
        st = f["state"]["@state"]
        values = np.asarray(f["chain"]["values"], dtype=np.float64)
        counts = np.asarray(f["chain"]["counts"])
        g = f["wang_landau"]
        hist, hists = np.asarray(g["hist"]), np.asarray(g["hists"])
        fs, flats, wsweeps = (np.asarray(g[n]) for n in ("f", "flatness", "sweeps"))
        x = np.asarray(f["production"]["x"], dtype=np.float64)
        series = {key: f["production"]["series"][key] for key in chiral.SERIES}
    except (KeyError, TypeError, ValueError, OverflowError) as exc:
        raise damaged(" ".join(str(exc).split()) or type(exc).__name__) from None
    nf, v = config.nf, config.volume
    sweep = st.sweep
    checks = [
        (stage in STAGES, f"stage {stage!r}"),
        (set(seconds) == set(STAGES), "timings"),
        (st.re.shape == (nf * nf, v) and st.im.shape == (nf * nf, v), f"field of shape {st.re.shape}"),
        (np.isfinite(st.re).all() and np.isfinite(st.im).all(), "non-finite field"),
        (values.shape == (bins,) and np.isfinite(values).all(), "weight table"),
        (counts.shape == (4,) and counts.dtype.kind in "iu" and (counts >= 0).all()
         and counts[0] <= counts[1] and counts[2] <= counts[3], "acceptance counts"),
        (0 <= k <= params["wl_iterations"] and 0 <= c < max(1, params["wl_chunks"]) and wl_open in (0, 1),
         "Wang-Landau position"),
        (hist.shape == (bins,) and hist.dtype.kind in "iu" and (hist >= 0).all()
         and hists.shape == (k, bins) and fs.shape == flats.shape == wsweeps.shape == (k,), "Wang-Landau histograms"),
        (not wl_open or 0 <= sweep - chunk_start <= params["wl_sweeps"], "Wang-Landau chunk"),
        (stage != "thermalisation" or sweep <= config.thermalize, "thermalisation sweep"),
        (stage != "production" or (k == params["wl_iterations"] and 0 <= start <= sweep
                                   and sweep - start <= config.measurements * every
                                   and x.size == (sweep - start) // every and np.isfinite(x).all()
                                   and all(len(a) == x.size for a in series.values())), "production records"),
    ]
    for ok, what in checks:
        if not ok:
            raise damaged(what)
    _check_state_ranges(st, config, path, last_sweep=_last_sweep(config, params))
    _check_unitary(st, config, path)
    wl = {"k": k, "c": c, "chunk_start": chunk_start, "hist": hist.astype(np.int64) if wl_open else None,
          "done": [{"f": float(fs[i]), "hist": hists[i].astype(np.int64), "flatness": float(flats[i]),
                    "sweeps": int(wsweeps[i])} for i in range(k)]}
    prod = None
    if stage == "production":
        recs = [{key: series[key][i] for key in chiral.SERIES} for i in range(x.size)]
        prod = {"start": start, "x": list(x), "records": recs}
    return {"stage": stage, "state": st, "values": values, "counts": counts.astype(np.int64), "wl": wl,
            "prod": prod, "seconds": seconds}


def run_multicanonical(config: RunConfig, params: dict, progress=None, checkpoint=None,
                       should_stop=None) -> MucaResult:
    """The protocol: thermalise (W = 0, step tuned), Wang-Landau, frozen production, analysis.

    ``progress(stage: str)`` is called at each stage when given.  With ``checkpoint`` (a path)
    the whole state (chain, weight table, Wang-Landau position and histograms, production records)
    is saved there every ``run.checkpoint_every`` sweeps or ``run.checkpoint_seconds`` (chain.iterate's
    cadence, in every stage), when the production starts and when ``should_stop()`` turns true
    (then :class:`sigmasim.chain.Interrupted` is raised); an existing checkpoint of the same run
    (:func:`run_identity`) is continued, and the result is that of an uninterrupted run bit for bit.
    """
    from sigmasim.chain import Interrupted

    check_config(config, params)
    lo, hi = params["range"]
    ck = Path(checkpoint) if checkpoint is not None else None
    got = _load_checkpoint(ck, config, params) if ck is not None and ck.exists() else None
    stage = got["stage"] if got else "thermalisation"
    wl = got["wl"] if got else _wl_position()
    seconds = got["seconds"] if got else {s: 0.0 for s in STAGES}
    chain = BiasedChain(config, Weight.flat(lo, hi, params["bins"], params["wall"]), params["variable"],
                        params["overrelax"], got["state"] if got else None)
    if got:
        chain.values[:] = got["values"]
        chain.counts[:] = got["counts"]
    kw = {"should_stop": should_stop}
    if ck is not None:
        kw.update(checkpoint_every=config.checkpoint_every, checkpoint_seconds=config.checkpoint_seconds)
    now = {"stage": stage, "t": time.process_time(), "chain": chain, "prod": got["prod"] if got else None}

    def tick(next_stage=None):
        t = time.process_time()
        seconds[now["stage"]] += t - now["t"]
        now["t"] = t
        if next_stage is not None:
            now["stage"] = next_stage

    def save():
        tick()
        _save_checkpoint(ck, config, params, now["stage"], now["chain"], wl, now["prod"], seconds)

    def consume(steps, each=None):
        for step in steps:
            if each is not None:
                each()
            if step.checkpoint and ck is not None:
                save()
            # a stop asked for at the last sweep of a stage or chunk is not iterate's early stop
            if step.stop or (step.checkpoint and should_stop is not None and should_stop()):
                raise Interrupted(step.sweep)

    if stage == "thermalisation":
        if progress:
            progress("thermalisation")

        def tune():
            if chain.state.sweep % config.tune_every == 0:
                chain.tune()

        consume(chain.steps(config.thermalize - chain.state.sweep, **kw), tune)
        tick("wang_landau")
        stage = "wang_landau"
    if stage == "wang_landau":
        if progress:
            progress("Wang-Landau")
        consume(_wang_landau_steps(chain, params["wl_iterations"], params["wl_sweeps"], params["wl_start"],
                                   params["wl_flatness"], params["wl_chunks"], wl, **kw))
        chain.values -= chain.values.min()
        tick("production")
        weight = chain.frozen_weight()
        prod_chain = BiasedChain(config, weight, params["variable"], params["overrelax"], chain.state)
        now.update(chain=prod_chain, prod={"start": chain.state.sweep, "x": [], "records": []})
        if ck is not None:
            save()
    else:
        weight = chain.frozen_weight()
        prod_chain = BiasedChain(config, weight, params["variable"], params["overrelax"], chain.state)
        prod_chain.counts[:] = chain.counts
        now["chain"] = prod_chain
    if progress:
        progress("production")
    every = config.measure_every
    consume(_production_steps(prod_chain, config.measurements * every, every, now["prod"], **kw))
    tick()
    run = _biased_run(prod_chain, weight, now["prod"], seconds["production"])
    if progress:
        progress("analysis")
    return analyse(config, params, weight, wl["done"], run, {
        "thermalisation": seconds["thermalisation"], "wang_landau": seconds["wang_landau"],
        "production": seconds["production"]})


def execute(config: RunConfig, params: dict, path, overwrite: bool = False, progress=None, note=None):
    """Run (or continue) the protocol into its output ``path`` (the command without the printing).

    Holds ``<path>.lock`` for the whole run; never replaces a file that is not a multicanonical
    file of sigmasim; refuses an output of another config or table unless ``overwrite``; continues
    the checkpoint ``<path>.checkpoint`` when there is one; an output of this run without a
    checkpoint is complete (``note`` says so, None is returned).  SIGINT/SIGTERM write a
    checkpoint and raise :class:`sigmasim.chain.Interrupted`.
    """
    from sigmasim.errors import RunFileError
    from sigmasim.run import StopFlag
    from sigmasim.storage import (check_multicanonical_target, hdf5_root_attrs, lock_path, release_lock, take_lock,
                                  write_multicanonical)

    path = h5_output(path)
    ckpt = checkpoint_path(path)
    lock = take_lock(lock_path(path), "sigmasim process", path)
    try:
        check_multicanonical_target(path)
        if overwrite:
            ckpt.unlink(missing_ok=True)
        elif path.exists():
            try:
                stored = hdf5_root_attrs(path, ("identity",)).get("identity")
            except OSError:
                stored = None
            if stored != run_identity(config, params):
                raise RunFileError(f"refusing to overwrite {path}: it was written by another config or "
                                   "[multicanonical] table, or by an earlier sigmasim (use --overwrite to replace it)")
            if not ckpt.exists():
                if note is not None:
                    note(f"{path} already holds the finished run of this config: nothing to run "
                         "(--overwrite runs it again)")
                return None
        if ckpt.exists() and note is not None:
            note(f"continuing from the checkpoint {ckpt}")
        flag = StopFlag().install()
        try:
            res = run_multicanonical(config, params, progress=progress, checkpoint=ckpt, should_stop=flag)
        finally:
            flag.restore()
        data, attrs = result_blob(res)
        write_multicanonical(path, data, attrs)
        ckpt.unlink(missing_ok=True)
    finally:
        release_lock(lock)
    return res


def load_multicanonical(config_path) -> tuple[RunConfig, dict]:
    """Read a ``[multicanonical]`` protocol TOML: (run config, validated params)."""
    from sigmasim.config import config_from_dict, read_toml

    raw = read_toml(config_path)
    if not isinstance(raw.get("multicanonical"), dict):
        raise ConfigError(f"{config_path} has no [multicanonical] table")
    rest = dict(raw)
    params = muca_params(rest.pop("multicanonical"))
    config = config_from_dict(rest)
    check_config(config, params)
    return config, params


def plot_profile(res: MucaResult, path) -> Path:
    """The figure of the run's -ln P(x) with its bootstrap band (analysis.profile.plot_profiles)."""
    from sigmasim.analysis.profile import plot_profiles

    c = res.config
    label = f"L = {list(c.shape)}, beta {c.beta:g}, theta {c.theta:.4g}"
    return plot_profiles({label: res.profile}, path, title=f"multicanonical {c.name}: -ln P({res.params['variable']})",
                         xlabel=res.params["variable"])


def result_blob(res: MucaResult) -> tuple[dict, dict]:
    """(datasets, attributes) of the multicanonical output file (see :func:`multicanonical_command`)."""
    fin = np.isfinite(res.profile.F)
    shift = float(np.min(res.profile.F[fin])) if fin.any() else 0.0
    data = {
        "weight/values": res.weight.values,
        "weight/edges": res.weight.edges,
        "wang_landau/f": np.array([w["f"] for w in res.wl], dtype=np.float64),
        "wang_landau/flatness": np.array([w["flatness"] for w in res.wl], dtype=np.float64),
        "wang_landau/sweeps": np.array([w["sweeps"] for w in res.wl], dtype=np.int64),
        "wang_landau/hist": (np.array([w["hist"] for w in res.wl], dtype=np.int64) if res.wl
                             else np.zeros((0, res.weight.bins), dtype=np.int64)),
        "production/x": res.run.x,
        "production/w": res.run.w,
        "profile/edges": res.profile.edges,
        "profile/centres": res.profile.centres,
        "profile/minus_ln_p": res.profile.F - shift,
        "profile/error": res.profile.error,
        "profile/interval": res.profile.interval - shift,
        "profile/counts": res.profile.counts.astype(np.int64),
    }
    for k, v in res.run.series.items():
        data[f"production/{k}"] = v
    attrs = {
        "config": json.dumps(res.config.to_dict()),
        "protocol": json.dumps(res.params),
        "round_trips": int(res.round_trips),
        "round_trip_sweeps": float(res.round_trip_sweeps),
        "round_trip_seconds": float(res.round_trip_seconds),
        "regions": np.asarray(res.regions, dtype=np.float64),
        "wall": float(res.weight.wall),
        "averages": json.dumps({k: list(v) for k, v in res.averages.items()}),
        "acceptance": json.dumps({k: float(v) for k, v in res.run.acceptance.items()}),
        "seconds": json.dumps(res.seconds),
        "identity": run_identity(res.config, res.params),
        "profile_method": (f"block bootstrap, {res.profile.replicas.shape[0]} replicas, blocks of "
                           f"{res.profile.windows[0]['block']} measurements" + _SHORT * bool(res.profile.short)),
        "barrier": json.dumps({"values": res.barrier.values, "errors": res.barrier.errors,
                               "refined": res.barrier.refined, "failed_replicas": res.barrier.failed_replicas}
                              if res.barrier is not None else {}),
        "notes": json.dumps(res.notes),
    }
    return data, attrs
