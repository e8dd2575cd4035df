"""Multicanonical sampling in a collective variable (Berg & Neuhaus, PRL 68 (1992) 9).

The chain samples ``exp(-S - W(x))`` with ``x`` a per-site sum divided by V
(``im_omega_h``: Im omega_h of :data:`sigmasim.models.chiral.SERIES`; ``im_det``:
Im(e^{i theta_a} det U) averaged over the sites).  ``W`` is tabulated on a
histogram grid (:class:`Weight`; kernels in :mod:`sigmasim.kernels.bias`).

Protocol (``sigmasim multicanonical CONFIG``, table ``[multicanonical]``):

1. thermalise with W = 0 (Metropolis step tuned as in an ordinary run);
2. build W by Wang-Landau iterations (Wang & Landau, PRL 86 (2001) 2050):
   after every sweep ``W[bin(x)] += f``, f halved after each iteration
   (a fixed schedule, no flatness criterion: the production run is exact
   whatever W is; a flatter W only makes it faster);
3. freeze W and run the production chain, an exact Markov chain of
   exp(-S - W(x));
4. canonical averages by reweighting with exp(+W(x_i)) (ratio estimator,
   errors from Wolff's Gamma method on the production series, derived
   quantity), -ln P(x) per bin the same way, and the round-trip time
   between the two ends of the grid in the flat ensemble.

The functions :func:`run_biased` (a chain with a GIVEN frozen weight, for
example the harmonic restraint of an umbrella window, :meth:`Weight.harmonic`)
and :func:`reweighted_mean`, :func:`profile`, :func:`round_trips` are the
public API for other protocols.  Results are a research toy, not a physical
prediction.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from sigmasim import models
from sigmasim.models import chiral
from sigmasim.chain import ChainState, Simulation
from sigmasim.config import RunConfig
from sigmasim.errors import ConfigError
from sigmasim.kernels.bias import MODES, biased_sweeps, collective, global_phase_moves, variable_sum
from sigmasim.rng import mix64_int

__all__ = ["Weight", "BiasedChain", "BiasedRun", "run_biased", "wang_landau", "reweighted_mean", "profile",
           "round_trips", "VARIABLES", "MUCA_SCHEMA", "muca_params", "MucaResult", "run_multicanonical"]

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

    def steps(self, n: int, measure_due=None, wl_f: float = 0.0, hist: np.ndarray | None = None):
        """``n`` biased sweeps through :func:`sigmasim.chain.iterate` (finiteness checks, measurement
        after the sweeps ``measure_due`` names); yields iterate's steps.  ``wl_f`` > 0 adds
        ``wl_f`` to W at x's bin after every sweep and counts x in ``hist`` (Wang-Landau)."""
        from sigmasim.chain import iterate

        self._wl_f = float(wl_f)
        self._hist = np.zeros(self.values.size, dtype=np.int64) if hist is None else hist
        yield from iterate(self.sim, until=self.sim.state.sweep + int(n),
                           measure_due=measure_due if measure_due is not None else (lambda sweep: False),
                           checkpoint_every=1 << 62, checkpoint_seconds=float("inf"), sweep=self._sweep)

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
    n = int(sweeps) // int(measure_every)
    xs = np.empty(n)
    records = []
    start, every = chain.state.sweep, int(measure_every)
    for step in chain.steps(n * every, measure_due=lambda sweep: (sweep - start) % every == 0):
        if step.record is not None:
            xs[len(records)] = chain.last_x
            records.append({k: step.record[k] for k in chiral.SERIES})
    series = {k: np.array([r[k] for r in records]) for k in chiral.SERIES} if records else {}
    c = chain.counts
    acc = {"metropolis": c[0] / c[1] if c[1] else float("nan"),
           "overrelax": c[2] / c[3] if c[3] else float("nan")}
    if chain.global_hits:
        g = chain.global_counts
        acc["global_phase"] = g[0] / g[1] if g[1] else float("nan")
    return BiasedRun(xs, weight(xs), series, weight, chain.state, acc, time.process_time() - t0)


def wang_landau(chain: BiasedChain, iterations: int, sweeps: int, f0: float = 1.0, flatness: float = 0.0,
                chunks: int = 1) -> list[dict]:
    """Wang-Landau building of the chain's weight table in place (Wang & Landau, PRL 86 (2001) 2050).

    Iteration k adds ``f0 / 2^k`` to W at the bin of x after every sweep; it runs ``sweeps``
    sweeps at a time until the histogram's flatness (min / mean over the bins) reaches
    ``flatness``, at most ``chunks`` times (``flatness = 0``: one chunk, a fixed schedule).
    Returns per iteration: f, the histogram, its flatness and the sweeps run.  After the last
    iteration the table is shifted to min 0.
    """
    out = []
    for k in range(int(iterations)):
        f = float(f0) / 2.0 ** k
        hist = np.zeros(chain.values.size, dtype=np.int64)
        flat = 0.0
        for c in range(max(1, int(chunks))):
            chain.sweeps(int(sweeps), wl_f=f, hist=hist)
            mean = hist.mean()
            flat = float(hist.min() / mean) if mean > 0 else 0.0
            if flat >= flatness:
                break
        out.append({"f": f, "hist": hist, "flatness": flat, "sweeps": (c + 1) * int(sweeps)})
    chain.values -= chain.values.min()
    return out


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


def profile(x, w, edges) -> dict:
    """-ln P(x) of the canonical ensemble per bin of ``edges`` from a biased chain.

    P_b = sum_i 1[x_i in b] e^{w_i} / sum_i e^{w_i} / width, error of each by the Gamma method (ratio
    estimator); ``minus_ln_p`` is shifted to min 0, ``error`` = err(P)/P.  Bins without a
    sample are NaN.  Returns ``centres``, ``p`` (density), ``p_error``, ``minus_ln_p``, ``error``,
    ``counts``.
    """
    x = np.asarray(x, dtype=np.float64)
    w = np.asarray(w, dtype=np.float64)
    edges = np.asarray(edges, dtype=np.float64)
    e = np.exp(w - w.max())
    nb = edges.size - 1
    idx = np.searchsorted(edges, x, side="right") - 1
    p = np.full(nb, np.nan)
    pe = np.full(nb, np.nan)
    counts = np.bincount(idx[(idx >= 0) & (idx < nb)], minlength=nb)
    for b in range(nb):
        if counts[b] == 0:
            continue
        ind = (idx == b).astype(np.float64)
        if counts[b] == x.size:
            p[b], pe[b] = 1.0, 0.0
        else:
            g = _ratio_gamma(ind * e, e)
            p[b], pe[b] = g.value, g.error
    width = np.diff(edges)
    dens, dens_err = p / width, pe / width
    with np.errstate(divide="ignore", invalid="ignore"):
        mlp = -np.log(dens)
        err = dens_err / dens
    mlp -= np.nanmin(mlp)
    return {"centres": 0.5 * (edges[1:] + edges[:-1]), "p": dens, "p_error": dens_err, "minus_ln_p": mlp,
            "error": err, "counts": counts}


def round_trips(x, left: float, right: float) -> tuple[int, np.ndarray]:
    """Round trips of the series ``x`` between the regions x <= left and x >= right.

    A round trip is left -> right -> left (or right -> left -> right, counted from the first region
    the series reaches).  Returns (number of completed round trips, indices at which each one
    completed).
    """
    x = np.asarray(x, dtype=np.float64)
    state = 0  # 0: not yet in a region, else the region last visited (-1 left, +1 right)
    start = 0
    legs = 0
    done = []
    for i, v in enumerate(x):
        r = -1 if v <= left else (1 if v >= right else 0)
        if r == 0 or r == state:
            continue
        if state == 0:
            start = r
        else:
            legs += 1
            if legs % 2 == 0 and r == start:
                done.append(i)
        state = r
    return len(done), np.asarray(done, dtype=np.int64)


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
                "x <= left (default: the outer quarters of the grid)"),
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
    """What :func:`run_multicanonical` returns (see :func:`multicanonical_command` for the file)."""

    config: RunConfig
    params: dict
    weight: Weight
    wl: list
    run: BiasedRun
    profile: dict
    averages: dict
    round_trips: int
    regions: tuple
    seconds: dict

    @property
    def round_trip_sweeps(self) -> float:
        """Production sweeps per completed round trip (inf without one)."""
        sweeps = self.run.x.size * self.config.measure_every
        return sweeps / self.round_trips if self.round_trips else float("inf")

    @property
    def round_trip_seconds(self) -> float:
        return self.run.seconds / self.round_trips if self.round_trips else float("inf")

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


def run_multicanonical(config: RunConfig, params: dict, progress=None) -> MucaResult:
    """The protocol: thermalise (W = 0, step tuned), Wang-Landau, frozen production, analysis.

    ``progress(stage: str)`` is called at each stage when given.
    """
    check_config(config, params)
    lo, hi = params["range"]
    weight0 = Weight.flat(lo, hi, params["bins"], params["wall"])
    chain = BiasedChain(config, weight0, params["variable"], params["overrelax"])
    t0 = time.process_time()
    if progress:
        progress("thermalisation")
    for _ in range(config.thermalize):
        chain.sweeps(1)
        if chain.state.sweep % config.tune_every == 0:
            chain.tune()
    t1 = time.process_time()
    if progress:
        progress("Wang-Landau")
    wl = wang_landau(chain, params["wl_iterations"], params["wl_sweeps"], params["wl_start"],
                     params["wl_flatness"], params["wl_chunks"])
    weight = chain.frozen_weight()
    t2 = time.process_time()
    if progress:
        progress("production")
    run = run_biased(config, weight, config.measurements * config.measure_every,
                     measure_every=config.measure_every, variable=params["variable"],
                     overrelax=params["overrelax"], state=chain.state)
    if progress:
        progress("analysis")
    regions = tuple(params["regions"]) if params["regions"] else (lo + 0.25 * (hi - lo), hi - 0.25 * (hi - lo))
    n_rt, _ = round_trips(run.x, *regions)
    prof = profile(run.x, run.w, weight.edges)
    averages = _average_observables(run)
    seconds = {"thermalisation": t1 - t0, "wang_landau": t2 - t1, "production": run.seconds}
    return MucaResult(config, params, weight, wl, run, prof, averages, n_rt, regions, seconds)


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


def result_blob(res: MucaResult) -> tuple[dict, dict]:
    """(datasets, attributes) of the multicanonical output file (see :func:`multicanonical_command`)."""
    import json

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
        "profile/centres": res.profile["centres"],
        "profile/minus_ln_p": res.profile["minus_ln_p"],
        "profile/error": res.profile["error"],
        "profile/counts": res.profile["counts"],
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
    }
    return data, attrs
