"""Multicanonical sampling in a collective variable (Berg & Neuhaus, PRL 68 (1992) 9).

The chain samples ``exp(-S - W(x))`` with ``x`` a per-site sum divided by V
(``im_omega_h``: Im omega_h of :data:`sigmasim.chain.SERIES`; ``im_det``:
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

from sigmasim.chain import SERIES, ChainState, Simulation
from sigmasim.config import RunConfig
from sigmasim.errors import ConfigError
from sigmasim.kernels.bias import MODES, biased_sweeps, variable_sum
from sigmasim.kernels.measure import reunitarize, reunitarize3, reunitarize_u1
from sigmasim.rng import mix64_int

__all__ = ["Weight", "BiasedChain", "BiasedRun", "run_biased", "wang_landau", "reweighted_mean", "profile",
           "round_trips", "VARIABLES", "MUCA_SCHEMA", "muca_params", "MucaResult", "run_multicanonical",
           "multicanonical_command"]

#: variable name -> meaning
VARIABLES = {
    "im_omega_h": "Im omega_h = Im(e^{i theta_m} sum_x Tr U_x) / (nf V)",
    "im_det": "Im(e^{i theta_a} sum_x det U_x) / V (U(nf) only)",
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
    return MODES[variable], complex(np.exp(1j * (theta_m if variable == "im_omega_h" else theta_a)))


class BiasedChain:
    """A chain of exp(-S - W(x)): a :class:`~sigmasim.chain.Simulation` (state, measure,
    re-unitarisation) swept by :func:`sigmasim.kernels.bias.biased_sweeps`.

    The chain model only: nf >= 1 chiral model, any group; Metropolis (``metropolis_hits`` of the
    config, step ``state.step_size``) plus ``overrelax`` overrelaxation passes per sweep.
    """

    def __init__(self, config: RunConfig, weight: Weight, variable: str = "im_omega_h", overrelax: int = 1,
                 state: ChainState | None = None):
        if config.kind != "chiral":
            raise ConfigError("multicanonical sampling supports the chiral model only (model.kind = 'chiral')")
        self.sim = Simulation(config, state)
        self.config = config
        self.weight = weight
        self.variable = variable
        self.mode, self.cvar = _variable_constant(config, variable)
        self.overrelax = int(overrelax)
        self.seed_hash = np.uint64(mix64_int(config.seed))
        self.counts = np.zeros(4, dtype=np.int64)
        self.values = np.array(weight.values, dtype=np.float64)  # the kernel's (Wang-Landau: mutable) table

    @property
    def state(self) -> ChainState:
        return self.sim.state

    def x(self) -> float:
        st = self.sim.state
        return variable_sum(st.re, st.im, self.config.nf, self.mode, self.cvar) / st.re.shape[1]

    def frozen_weight(self) -> Weight:
        return Weight(self.weight.lo, self.weight.hi, self.values.copy(), self.weight.wall)

    def sweeps(self, n: int, wl_f: float = 0.0, hist: np.ndarray | None = None) -> np.ndarray:
        """``n`` sweeps (re-unitarising every ``run.reunitarize_every``); returns x after each, (n,)."""
        cfg, st, lat = self.config, self.sim.state, self.sim.lattice
        out = np.empty(n, dtype=np.float64)
        if hist is None:
            hist = np.zeros(self.values.size, dtype=np.int64)
        w = self.weight
        done = 0
        while done < n:
            every = cfg.reunitarize_every
            chunk = min(n - done, every - st.sweep % every)
            before = self.counts.copy()
            st.step = int(biased_sweeps(st.re, st.im, lat.neighbours, cfg.nf, cfg.special, float(cfg.beta),
                                        self.sim.hdiag, float(cfg.kappa), complex(cfg.eta), int(cfg.metropolis_hits),
                                        self.overrelax, float(st.step_size), self.seed_hash, st.step, chunk,
                                        self.mode, self.cvar, float(w.lo), float(w.dx), self.values,
                                        float(w.wall), float(wl_f), hist, out[done:], self.counts))
            diff = self.counts - before
            st.win_acc += diff[0::2]
            st.win_tried += diff[1::2]
            st.tune_acc += int(diff[0])
            st.tune_tried += int(diff[1])
            st.sweep += chunk
            done += chunk
            if st.sweep % every == 0:
                if cfg.nf == 1:
                    drift = reunitarize_u1(st.re[0], st.im[0], self.sim.blocks)
                elif cfg.nf == 3 and not cfg.special:
                    drift = reunitarize3(st.re, st.im, self.sim.blocks)
                else:
                    drift = reunitarize(st.re, st.im, cfg.nf, cfg.special, self.sim.blocks)
                st.win_drift = max(st.win_drift, drift)
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
        The run's :data:`sigmasim.chain.SERIES` observables at the same measurements (numpy arrays,
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
               variable: str = "im_omega_h", overrelax: int = 1, state: ChainState | None = None) -> BiasedRun:
    """Run an exact Markov chain of exp(-S - W(x)) with a frozen ``weight``.

    ``thermalize`` sweeps come first (with the same weight; the Metropolis step is tuned toward
    ``run.target_acceptance`` every ``run.tune_every`` sweeps there, and frozen after), then
    ``sweeps`` sweeps with a measurement every ``measure_every``.  Seeded by ``config.seed``;
    with ``state`` given the chain continues from it (same numbers as one longer run).
    """
    chain = BiasedChain(config, weight, variable, overrelax, state)
    t0 = time.process_time()
    for _ in range(int(thermalize)):
        chain.sweeps(1)
        if chain.state.sweep % config.tune_every == 0:
            chain.tune()
    chain.counts[:] = 0
    n = int(sweeps) // int(measure_every)
    xs = np.empty(n)
    records = []
    for i in range(n):
        xs[i] = chain.sweeps(int(measure_every))[-1]
        rec = chain.sim.measure()
        records.append({k: rec[k] for k in SERIES})
    series = {k: np.array([r[k] for r in records]) for k in SERIES} if records else {}
    c = chain.counts
    acc = {"metropolis": c[0] / c[1] if c[1] else float("nan"),
           "overrelax": c[2] / c[3] if c[3] else float("nan")}
    return BiasedRun(xs, weight(xs), series, weight, chain.state, acc, time.process_time() - t0)


def wang_landau(chain: BiasedChain, iterations: int, sweeps: int, f0: float = 1.0) -> list[dict]:
    """Wang-Landau building of the chain's weight table in place (Wang & Landau, PRL 86 (2001) 2050).

    Iteration k runs ``sweeps`` sweeps adding ``f0 / 2^k`` to W at the bin of x after every
    sweep.  Returns per iteration: f, the histogram and its flatness (min / mean over the bins).
    After the last iteration the table is shifted to min 0.
    """
    out = []
    for k in range(int(iterations)):
        f = float(f0) / 2.0 ** k
        hist = np.zeros(chain.values.size, dtype=np.int64)
        chain.sweeps(int(sweeps), wl_f=f, hist=hist)
        mean = hist.mean()
        out.append({"f": f, "hist": hist, "flatness": float(hist.min() / mean) if mean > 0 else 0.0})
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
