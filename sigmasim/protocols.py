r"""Multi-theta protocols on top of one chain: hysteresis sweeps, tempering (and the commands).

A protocol config is an ordinary run TOML plus one extra table that this module pops and
validates itself; the rest goes to :func:`sigmasim.config.config_from_dict`.

Hysteresis sweep (``[sweep]``)
------------------------------
::

    [sweep]
    start = 0.0                # theta of the first step (model.theta is replaced by it)
    stop = 6.283185307         # turning point
    step = 0.2                 # theta step (> 0); the grid is start, start + step, ..., <= stop
    sweeps_per_step = 100      # measured sweeps per theta step (measure every run.measure_every)
    thermalize_per_step = 0    # unmeasured sweeps after each theta change
    cycles = 1                 # number of up-and-down passes
    band = 0.5                 # hysteresis band of the branch classification (tunnelling module)

The chain is thermalised once (``run.thermalize`` sweeps at ``start``, from ``run.start``), then theta
walks up the grid and back down (``cycles`` times) with :meth:`Simulation.set_theta`; the field is
never reset.  ``run.measurements`` is ignored.  The branch index of every measurement is the
hysteresis classification of :mod:`sigmasim.analysis.tunnelling` applied to the whole protocol in
order; a step's branch is its majority index.

Jump points: on every path (one up or one down pass) the first step whose branch differs from the
path's first step; the jump is put midway between that step and the previous one (resolution
``step / 2``).  Loop area of a cycle: ``int Im omega_h d theta`` over the up path minus the same over
the down path (trapezoid rule on the grid), positive for the usual hysteresis orientation; its error
is the spread over cycles (``std / sqrt(cycles)``, needs cycles >= 2) and, separately, the statistical
error propagated from the per-step Gamma-method errors.

Sweep file layout (HDF5, format ``sigmasim-sweep``, version 1; default
``<output>/<name>/<name>-sweep.h5``)::

    /                  attrs: format, format_version, config (JSON of the run config at start),
                              protocol (JSON of [sweep]), summary (JSON: jumps, areas), conventions
    /provenance        attrs: sigmasim, python, numpy, numba, h5py versions, created, wall_seconds
    /steps/<name>      one entry per theta step, in protocol order:
                       theta, cycle (int), direction (+1 up, -1 down), re_omega_h, re_omega_h_err,
                       im_omega_h, im_omega_h_err, action, action_err, branch (int, majority),
                       branch_fraction (fraction of measurements in the majority branch), n_meas (int),
                       tau_int_im (Gamma tau_int of Im omega_h)
    /series/<name>     one entry per measurement: sweep (int), step (int, index into /steps),
                       theta, omega_h (complex), det (complex), action, action_mass, action_det,
                       branch (int, hysteresis index)
    /tree/theta        (nt,) grid of the tree-level scan (sigmasim.vacua.scan_theta)
    /tree/im_omega_h   (nb, nt) Im e^{i theta_m} Omega of each tree-level branch (NaN where absent)
    /tree/spinodals    (ns, 2) theta and branch of each tree-level spinodal
    /cycles/area       (cycles,) loop area per cycle
    /cycles/jump_up, /cycles/jump_down  (cycles,) jump points per cycle (NaN if none)

Tempering (``[tempering]``)
---------------------------
::

    [tempering]
    thetas = [2.9, 3.0, 3.14159, 3.3]   # theta of each slot, strictly increasing; or, with
    # mass_scales = [1.0, 0.6, 0.3, 0.0] # (optional) slot k at mass_scales[k] * model.mass,
    #                                    # one theta per slot (repeats allowed) or one for all slots
    swap_every = 1                       # sweeps between swap attempts
    band = 0.5                           # hysteresis band of the branch classification
    write = "yes"                        # one ordinary run file per slot

Why a ladder in theta alone does not mix the vacua at a first-order point: a swap exchanges whole
fields, so the multiset of the replicas' branch indices (the *census*) changes only when a replica
tunnels inside a slot.  In the stationary state a slot's field is distributed as the plain chain's at
that slot's couplings and is updated by that chain's sweep, so the expected number of in-slot
tunnellings per sweep is the plain chain's equilibrium tunnelling rate at (theta_k, h_k).  At fixed
masses this rate is largest at the first-order point (seen from the stable branch the barrier grows
with |theta - pi|; past a spinodal the metastable branch is exponentially rare), so a theta ladder
tunnels at most about as often as one plain chain per slot near pi.  The slot at pi then keeps the
population fixed by the starting census (a cold start: every replica in branch 0), with a small
Gamma error that only sees the swaps.  Round trips do not reveal this: on a short ladder replicas
cross pi in their own branch (on a long one, reaching past the spinodals, they cannot).  A ladder
that leaves the theta axis through small masses (``mass_scales`` down to 0) has a slot where the
branches are not separated by a barrier: replicas lose their branch there and come back in either
vacuum, with equal weight at theta = pi by CP.  :func:`branch_census` follows the replicas and
counts census changes and in-slot branch changes per slot; ``sigmasim temper`` warns when the
census changed fewer than :data:`CENSUS_MIN_CHANGES` times.

This is a research toy, not a physical prediction.
"""

from __future__ import annotations

import dataclasses
import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sigmasim.config import RunConfig, _check, _suggest, config_from_dict, read_toml
from sigmasim.errors import ConfigError, RunFileError

__all__ = ["LIFETIME_SCHEMA", "LifetimeResult", "run_lifetimes", "lifetime_estimate",
           "fit_log_lifetimes", "load_lifetimes", "SWEEP_SCHEMA", "TEMPER_SCHEMA", "TemperParams", "TemperResult", "run_tempering",
           "replica_configs", "branch_populations", "branch_census", "BranchCensus",
           "CENSUS_MIN_CHANGES", "SweepParams", "SweepResult", "load_protocol", "split_protocol",
           "run_sweep", "write_sweep", "read_sweep", "plot_sweep", "tree_level", "sweep_command",
           "temper_command", "lifetimes_command", "SWEEP_FORMAT"]

SWEEP_FORMAT = "sigmasim-sweep"

SWEEP_SCHEMA = {
    "start": ("real", 0.0, "theta of the first step (replaces model.theta)"),
    "stop": ("real", 2 * math.pi, "theta of the turning point"),
    "step": ("real>0", 0.2, "theta step"),
    "sweeps_per_step": ("int:1:1000000000", 100, "measured sweeps per theta step"),
    "thermalize_per_step": ("int>=0", 0, "unmeasured sweeps after each theta change"),
    "cycles": ("int:1:10000", 1, "number of up-and-down passes"),
    "band": ("real", 0.5, "hysteresis band of the branch classification, 0 <= band < 1"),
}


# ---------------------------------------------------------------- config handling
def split_protocol(raw: dict, table: str, schema: dict) -> tuple[dict, dict]:
    """Pop ``[table]`` from a parsed TOML dict and validate it; returns (params, rest)."""
    if not isinstance(raw, dict):
        raise ConfigError("the config must be a TOML table")
    rest = dict(raw)
    if table not in rest:
        raise ConfigError(f"the config has no [{table}] table")
    sub = rest.pop(table)
    if not isinstance(sub, dict):
        raise ConfigError(f"[{table}] must be a table")
    params = {}
    for k, v in sub.items():
        if k not in schema:
            raise ConfigError(f"unknown key '{table}.{k}'{_suggest(k, list(schema))}")
        params[k] = _check(schema[k][0], v, f"{table}.{k}")
    for k, (kind, default, _) in schema.items():
        if k not in params:
            params[k] = _check(kind, default, f"{table}.{k}")
    return params, rest


def load_protocol(path, table: str, schema: dict) -> tuple[RunConfig, dict]:
    """Read a protocol TOML: the validated run config and the validated ``[table]`` params."""
    params, rest = split_protocol(read_toml(path), table, schema)
    return config_from_dict(rest), params


@dataclass(frozen=True)
class SweepParams:
    """Validated ``[sweep]`` table (see the module notes)."""

    start: float = 0.0
    stop: float = 2 * math.pi
    step: float = 0.2
    sweeps_per_step: int = 100
    thermalize_per_step: int = 0
    cycles: int = 1
    band: float = 0.5

    @classmethod
    def from_dict(cls, d: dict) -> "SweepParams":
        params, _ = split_protocol({"sweep": d}, "sweep", SWEEP_SCHEMA)
        return cls(**params)

    def __post_init__(self):
        if not self.stop > self.start:
            raise ConfigError(f"sweep.stop must be > sweep.start, got {self.stop} <= {self.start}")
        if self.step > self.stop - self.start:
            raise ConfigError(f"sweep.step = {self.step} is larger than stop - start = {self.stop - self.start}")
        n = self.grid().size
        if n > 100000:
            raise ConfigError(f"sweep has {n} theta steps per pass; at most 100000 allowed")
        if not 0.0 <= self.band < 1.0:
            raise ConfigError(f"sweep.band must be in [0, 1), got {self.band}")

    def grid(self) -> np.ndarray:
        n = int(math.floor((self.stop - self.start) / self.step + 1e-9)) + 1
        return self.start + self.step * np.arange(n)


# ---------------------------------------------------------------- the sweep
@dataclass
class SweepResult:
    """Everything a sweep measured (see the module notes for the file layout)."""

    config: RunConfig
    params: SweepParams
    steps: dict
    series: dict
    area: np.ndarray
    area_stat_error: np.ndarray
    jump_up: np.ndarray
    jump_down: np.ndarray
    wall_seconds: float = 0.0
    tree: dict = field(default_factory=dict)

    @property
    def summary(self) -> dict:
        def mean_err(a):
            a = np.asarray(a, float)
            ok = a[np.isfinite(a)]
            if len(ok) == 0:
                return float("nan"), float("nan")
            err = float(np.std(ok, ddof=1) / np.sqrt(len(ok))) if len(ok) >= 2 else float("nan")
            return float(ok.mean()), err

        a, ae = mean_err(self.area)
        stat = float(np.sqrt(np.sum(self.area_stat_error ** 2)) / len(self.area))
        ju, jue = mean_err(self.jump_up)
        jd, jde = mean_err(self.jump_down)
        return {
            "area": a, "area_error_cycles": ae, "area_error_stat": stat,
            "area_error": ae if math.isfinite(ae) else stat,
            "area_per_cycle": [float(x) for x in self.area],
            "jump_up": ju, "jump_up_error": jue, "jump_down": jd, "jump_down_error": jde,
            "jump_up_per_cycle": [float(x) for x in self.jump_up],
            "jump_down_per_cycle": [float(x) for x in self.jump_down],
            "jump_resolution": self.params.step / 2,
            "cycles": self.params.cycles,
        }


def _mean_err(x):
    from sigmasim.analysis.gamma import gamma_analysis

    x = np.asarray(x, float)
    if len(x) >= 8 and np.ptp(x) > 0:
        try:
            g = gamma_analysis(x)
            return g.value, g.error, g.tau_int
        except Exception:  # degenerate series: fall back to the naive error
            pass
    err = float(np.std(x, ddof=1) / np.sqrt(len(x))) if len(x) >= 2 else float("nan")
    return float(x.mean()), err, 0.5


def run_sweep(config: RunConfig, params: SweepParams, progress=None) -> SweepResult:
    """Run a hysteresis sweep in memory (see the module notes)."""
    from sigmasim.analysis.tunnelling import branch_coordinate, branch_index
    from sigmasim.chain import make_simulation

    t0 = time.monotonic()
    grid = params.grid()
    cfg = dataclasses.replace(config, theta=float(grid[0]))
    sim = make_simulation(cfg)
    for _ in range(cfg.thermalize):
        sim.sweep()
    plan = []  # (theta, cycle, direction)
    for c in range(params.cycles):
        plan += [(float(t), c, +1) for t in grid]
        plan += [(float(t), c, -1) for t in grid[::-1]]
    ser = {k: [] for k in ("sweep", "step", "theta", "omega_h", "det", "action", "action_mass",
                           "action_det")}
    every = cfg.measure_every
    for i, (th, c, d) in enumerate(plan):
        sim.set_theta(th)
        for _ in range(params.thermalize_per_step):
            sim.sweep()
        for s in range(params.sweeps_per_step):
            sim.sweep()
            if (s + 1) % every == 0:
                r = sim.measure()
                ser["sweep"].append(r["sweep"])
                ser["step"].append(i)
                ser["theta"].append(th)
                for k in ("omega_h", "det", "action", "action_mass", "action_det"):
                    ser[k].append(r[k])
        if progress is not None:
            progress(i + 1, len(plan))
    series = {k: np.asarray(v) for k, v in ser.items()}
    if len(series["sweep"]) == 0:
        raise ConfigError("sweep.sweeps_per_step is smaller than run.measure_every: nothing is measured")
    x = branch_coordinate(series["omega_h"], series["theta"], cfg.nf)
    series["branch"] = branch_index(x, cfg.nf, params.band)
    n_steps = len(plan)
    steps = {k: np.empty(n_steps) for k in ("theta", "re_omega_h", "re_omega_h_err", "im_omega_h",
                                             "im_omega_h_err", "action", "action_err",
                                             "branch_fraction", "tau_int_im")}
    for k in ("cycle", "direction", "branch", "n_meas"):
        steps[k] = np.empty(n_steps, dtype=np.int64)
    for i, (th, c, d) in enumerate(plan):
        sel = series["step"] == i
        om = series["omega_h"][sel]
        steps["theta"][i], steps["cycle"][i], steps["direction"][i] = th, c, d
        steps["re_omega_h"][i], steps["re_omega_h_err"][i], _ = _mean_err(om.real)
        steps["im_omega_h"][i], steps["im_omega_h_err"][i], steps["tau_int_im"][i] = _mean_err(om.imag)
        steps["action"][i], steps["action_err"][i], _ = _mean_err(series["action"][sel])
        counts = np.bincount(series["branch"][sel], minlength=cfg.nf)
        steps["branch"][i] = int(np.argmax(counts))
        steps["branch_fraction"][i] = counts.max() / max(1, counts.sum())
        steps["n_meas"][i] = int(sel.sum())
    area, area_err, ju, jd = _loop_observables(steps, params.cycles)
    return SweepResult(cfg, params, steps, series, area, area_err, ju, jd, time.monotonic() - t0)


def _jump(theta, branch):
    change = np.nonzero(branch != branch[0])[0]
    if len(change) == 0:
        return float("nan")
    i = change[0]
    return 0.5 * (theta[i - 1] + theta[i])


def _trapz_weights(t):
    w = np.zeros(len(t))
    dt = np.diff(t)
    w[:-1] += dt / 2
    w[1:] += dt / 2
    return w


def _loop_observables(steps, cycles):
    area, area_err, ju, jd = (np.full(cycles, np.nan) for _ in range(4))
    for c in range(cycles):
        up = (steps["cycle"] == c) & (steps["direction"] == 1)
        dn = (steps["cycle"] == c) & (steps["direction"] == -1)
        tu, td = steps["theta"][up], steps["theta"][dn]
        ju[c] = _jump(tu, steps["branch"][up])
        jd[c] = _jump(td, steps["branch"][dn])
        ou, od = np.argsort(tu), np.argsort(td)
        wu, wd = _trapz_weights(tu[ou]), _trapz_weights(td[od])
        area[c] = np.sum(wu * steps["im_omega_h"][up][ou]) - np.sum(wd * steps["im_omega_h"][dn][od])
        area_err[c] = math.sqrt(np.sum((wu * steps["im_omega_h_err"][up][ou]) ** 2)
                                + np.sum((wd * steps["im_omega_h_err"][dn][od]) ** 2))
    return area, area_err, ju, jd


def tree_level(config: RunConfig, lo: float, hi: float, n: int = 241) -> dict:
    """Tree-level branches (sigmasim.vacua.scan_theta) on [lo, hi]: theta, Im omega_h, spinodals."""
    from sigmasim import vacua

    thetas = np.linspace(lo, hi, n)
    h = list(config.mass) if len(set(config.mass)) > 1 else float(config.mass[0])
    scan = vacua.scan_theta(h, config.kappa, thetas, config.theta_placement, nf=config.nf,
                            group=config.group)
    im = np.where(np.isfinite(scan.energies), scan.omega_rot.imag, np.nan)
    spin = np.array([(p.theta, p.branch) for p in scan.spinodals], dtype=float).reshape(-1, 2)
    first = np.array([p.theta for p in scan.first_order], dtype=float)
    return {"theta": thetas, "im_omega_h": im, "spinodals": spin,
            "spinodal_kinds": [p.kind for p in scan.spinodals], "first_order": first}


# ---------------------------------------------------------------- tempering in theta
TEMPER_SCHEMA = {
    "thetas": ("thetas", None, "theta of each slot: an increasing list of >= 2 numbers; with mass_scales "
               "one theta per slot (repeats allowed) or a single theta for every slot"),
    "mass_scales": ("scales", None, "optional: one factor >= 0 per slot on model.mass (slot k simulates "
                    "mass_scales[k] * mass); the ladder is then the path of (theta, scale) pairs"),
    "swap_every": ("int:1:1000000", 1, "sweeps between swap attempts"),
    "band": ("real", 0.5, "hysteresis band of the branch classification, 0 <= band < 1"),
    "write": ("choice:yes,no", "yes", "write one run file per theta (no: in memory only)"),
}

#: ``temper_command`` warns when the replicas' branch census changed fewer times than this.
CENSUS_MIN_CHANGES = 20


def _check_thetas(v, where="tempering.thetas"):
    if not isinstance(v, list) or len(v) < 2 or not all(
            isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
        raise ConfigError(f"{where} must be a list of at least 2 numbers, got {v!r}")
    t = [float(x) for x in v]
    if not all(math.isfinite(x) and abs(x) <= 1e6 for x in t):
        raise ConfigError(f"{where} must be finite numbers, got {v!r}")
    if any(b <= a for a, b in zip(t, t[1:])):
        raise ConfigError(f"{where} must be strictly increasing, got {v!r}")
    if len(t) > 1000:
        raise ConfigError(f"{where} has {len(t)} entries; at most 1000 allowed")
    return t


def _check_numbers(v, where, lo, hi, at_least=1):
    if not isinstance(v, list) or len(v) < at_least or not all(
            isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
        raise ConfigError(f"{where} must be a list of at least {at_least} number(s), got {v!r}")
    t = [float(x) for x in v]
    if not all(math.isfinite(x) and lo <= x <= hi for x in t):
        raise ConfigError(f"{where} must be finite numbers in [{lo:g}, {hi:g}], got {v!r}")
    if len(t) > 1000:
        raise ConfigError(f"{where} has {len(t)} entries; at most 1000 allowed")
    return t


def _check_ladder(thetas, scales):
    """Validated ``(thetas, scales)`` tuples; ``scales`` stays None for a pure theta ladder."""
    if scales is None:
        return tuple(_check_thetas(thetas)), None
    s = _check_numbers(scales, "tempering.mass_scales", 0.0, 1e6, at_least=2)
    t = _check_numbers(thetas, "tempering.thetas", -1e6, 1e6)
    if len(t) == 1:
        t = t * len(s)
    if len(t) != len(s):
        raise ConfigError(f"tempering.thetas has {len(t)} entries but tempering.mass_scales has {len(s)}; "
                          "give one theta per slot or a single theta")
    if len(set(zip(t, s))) != len(s):
        raise ConfigError("tempering: two slots have the same (theta, mass scale); every slot must differ")
    return tuple(t), tuple(s)


@dataclass(frozen=True)
class TemperParams:
    """Validated ``[tempering]`` table.

    ``thetas`` the theta of each slot; ``mass_scales`` (optional) the factor on ``model.mass`` of each
    slot; ``swap_every`` sweeps between swap attempts (each attempt proposes the even pairs (0,1),
    (2,3), ... and the next attempt the odd pairs (1,2), (3,4), ...); ``band`` the hysteresis band of
    the branch classification; ``write`` 'yes' or 'no'.
    """

    thetas: tuple
    swap_every: int = 1
    band: float = 0.5
    write: str = "yes"
    mass_scales: tuple | None = None

    @classmethod
    def from_dict(cls, d: dict) -> "TemperParams":
        return cls(**_temper_params(d))

    def __post_init__(self):
        if not 0.0 <= self.band < 1.0:
            raise ConfigError(f"tempering.band must be in [0, 1), got {self.band}")

        def as_list(v):
            return list(v) if isinstance(v, (list, tuple, np.ndarray)) else v

        scales = None if self.mass_scales is None else as_list(self.mass_scales)
        thetas, scales = _check_ladder(as_list(self.thetas), scales)
        object.__setattr__(self, "thetas", thetas)
        object.__setattr__(self, "mass_scales", scales)


def _temper_params(sub: dict) -> dict:
    schema = {k: v for k, v in TEMPER_SCHEMA.items() if k not in ("thetas", "mass_scales")}
    rest = dict(sub)
    if "thetas" not in rest:
        raise ConfigError("[tempering] needs thetas = [ ... ] (the theta ladder)")
    thetas = rest.pop("thetas")
    scales = rest.pop("mass_scales", None)
    if scales is None:
        thetas = _check_thetas(thetas)
    params, _ = split_protocol({"tempering": rest}, "tempering", schema)
    params["thetas"] = tuple(thetas) if isinstance(thetas, list) else thetas
    params["mass_scales"] = tuple(scales) if isinstance(scales, list) else scales
    return params


def _slot_action(sim, cfg) -> float:
    """The slot-dependent part of the whole-lattice action of ``sim``'s field under slot config ``cfg``.

    ``-sum_x Re Tr(H U_x) - 2 c sum_x Re(e^{i theta_a} det U_x)`` with ``H = e^{i theta_m} diag(h)`` and
    ``c`` = ``kappa`` (chiral model) or ``c`` (linear model): slots differ only in theta and the
    masses, so every other term of the action is the same in all slots and cancels in a swap.
    """
    nf, v = cfg.nf, sim.lattice.volume
    st = sim.state
    u = (st.re + 1j * st.im).reshape(nf, nf, v)
    cond = np.einsum("aax->a", u)                      # sum_x U_ff
    det = np.linalg.det(np.moveaxis(u, -1, 0)).sum() if nf > 1 else u[0, 0].sum()
    c = cfg.c if getattr(cfg, "kind", "chiral") == "linear" else cfg.kappa
    return float(-(cond @ cfg.hdiag).real - 2.0 * c * (cfg.eta * det).real)


@dataclass
class TemperResult:
    """Result of :func:`run_tempering`.

    Attributes
    ----------
    thetas : float array (R,)
    series : list of dict
        Per slot, the measured series (as :class:`sigmasim.chain.MemorySink` arrays).
    swap_tried, swap_accepted : int array (R-1,)
        Per neighbouring pair (i, i+1).
    acceptance : float array (R-1,)
    replica_at : int array (n_attempts + 1, R)
        Which replica sits at each slot after each swap attempt (row 0: the start).
    attempt_sweeps : int array (n_attempts + 1,)
        Sweep of each row of ``replica_at``.
    round_trips : list of float
        Sweeps of completed round trips (slot 0 -> slot R-1 -> slot 0, or the reverse) of all replicas.
    files : list of Path
    measured_replica : int array (n_meas, R)
        Which replica sat at each slot at each measurement (row t belongs to measurement t).
    mass_scales : float array (R,)
        Factor on ``model.mass`` of each slot (all 1 for a theta ladder).
    """

    thetas: np.ndarray
    series: list
    swap_tried: np.ndarray
    swap_accepted: np.ndarray
    replica_at: np.ndarray
    attempt_sweeps: np.ndarray
    round_trips: list
    files: list
    wall_seconds: float = 0.0
    measured_replica: np.ndarray | None = None
    mass_scales: np.ndarray | None = None

    @property
    def acceptance(self) -> np.ndarray:
        return self.swap_accepted / np.maximum(self.swap_tried, 1)


def _round_trips(replica_at, sweeps):
    """Completed round trips per replica: from one end to the other end and back."""
    n_rep = replica_at.shape[1]
    trips = []
    pos = np.argsort(replica_at, axis=1)      # pos[t, r] = slot of replica r
    last = n_rep - 1
    for r in range(n_rep):
        state, t_start = None, None           # state: end last visited
        for t in range(len(sweeps)):
            p = pos[t, r]
            if p not in (0, last):
                continue
            if state is None:
                state, t_start, origin = p, sweeps[t], p
            elif p != state:
                state = p
                if p == origin:
                    trips.append(float(sweeps[t] - t_start))
                    t_start = sweeps[t]
    return trips


def replica_configs(config: RunConfig, thetas, mass_scales=None) -> list:
    """One config per slot: name suffixed ``-t<i>``, seed ``seed * 1000 + i`` (distinct random
    streams), output folder ``<output>/<name>`` (so each file is ``<output>/<name>/<name>-t<i>/...``),
    theta ``thetas[i]`` and, with ``mass_scales``, masses ``mass_scales[i] * config.mass``."""
    out = []
    for i, t in enumerate(thetas):
        extra = {}
        if mass_scales is not None:
            extra["mass"] = tuple(float(mass_scales[i]) * m for m in config.mass)
        out.append(dataclasses.replace(config, name=f"{config.name}-t{i}", theta=float(t),
                                       seed=config.seed * 1000 + i,
                                       output=str(Path(config.output) / config.name), **extra))
    return out


def run_tempering(config: RunConfig, params: TemperParams, write: bool | None = None,
                  progress=None) -> TemperResult:
    """Replica exchange over a ladder of slots (theta, and optionally a mass scale) in one process.

    Every slot keeps its theta and masses; an accepted swap exchanges the *fields* of neighbouring
    slots, so each slot's measurements form an ordinary chain at fixed couplings (written via
    :class:`sigmasim.storage.RunWriter`, one file per slot).  Swap (i, j) is accepted with
    ``min(1, exp(-Delta))``, ``Delta = S_i(B) + S_j(A) - S_i(A) - S_j(B)`` with A, B the fields at
    slots i, j and ``S_k`` the slot-dependent action (mass + det terms) of slot k.  Swap random
    numbers come from ``numpy.random.default_rng([seed, 0x7E39, attempt])``: reproducible.
    ``config.thermalize + config.measurements * config.measure_every`` sweeps per slot; swaps also
    during thermalisation.  The run files record the slot's seed, theta and masses; the chain in them
    is a tempering chain (fields were exchanged), so ``sigmasim run --resume`` of one of them would not
    continue it.  See the module notes on why a ladder in theta alone cannot mix the branches at a
    first-order point, and :func:`branch_census` for the check.
    """
    from sigmasim.chain import MemorySink, make_simulation

    t0 = time.monotonic()
    write = (params.write == "yes") if write is None else write
    configs = replica_configs(config, params.thetas, params.mass_scales)
    sims = [make_simulation(c) for c in configs]
    sinks = []
    files = []
    for c, sim in zip(configs, sims):
        mem = MemorySink()
        sk = [mem]
        if write:
            from sigmasim.storage import RunWriter, check_writable

            check_writable(c.run_file, 1 << 20)
            if c.run_file.exists():
                raise RunFileError(f"{c.run_file} exists; remove it or choose another name or output")
            w = RunWriter(c, c.run_file)
            sk.append(w)
            files.append(c.run_file)
        for s in sk:
            s.start(sim)
        sinks.append(sk)
    n_rep = len(sims)
    tried = np.zeros(n_rep - 1, dtype=np.int64)
    acc = np.zeros(n_rep - 1, dtype=np.int64)
    labels = np.arange(n_rep)
    history = [labels.copy()]
    measured = []
    attempt_sweeps = [0]
    total = sims[0].total_sweeps
    attempt = 0
    for sweep in range(1, total + 1):
        for sim, sk in zip(sims, sinks):
            sim.sweep()
            past = sim.state.sweep - sim.config.thermalize
            if past > 0 and past % sim.config.measure_every == 0:
                rec = sim.measure()
                for s in sk:
                    s.record(sim, rec)
            if sim.state.sweep % sim.config.checkpoint_every == 0:
                for s in sk[1:]:
                    s.checkpoint(sim)
        past = sweep - config.thermalize
        if past > 0 and past % config.measure_every == 0:
            measured.append(labels.copy())
        if sweep % params.swap_every == 0:
            rng = np.random.default_rng([config.seed, 0x7E39, attempt])
            for i in range(attempt % 2, n_rep - 1, 2):
                a, b = sims[i], sims[i + 1]
                ci, cj = configs[i], configs[i + 1]
                delta = (_slot_action(b, ci) + _slot_action(a, cj)
                         - _slot_action(a, ci) - _slot_action(b, cj))
                tried[i] += 1
                if delta <= 0 or rng.random() < math.exp(-delta):
                    acc[i] += 1
                    a.state.re, b.state.re = b.state.re, a.state.re
                    a.state.im, b.state.im = b.state.im, a.state.im
                    labels[i], labels[i + 1] = labels[i + 1], labels[i]
            attempt += 1
            history.append(labels.copy())
            attempt_sweeps.append(sweep)
        if progress is not None:
            progress(sweep, total)
    for sim, sk in zip(sims, sinks):
        for s in sk[1:]:
            s.finish(sim)
    replica_at = np.array(history)
    sweeps = np.array(attempt_sweeps)
    scales = np.ones(n_rep) if params.mass_scales is None else np.array(params.mass_scales)
    return TemperResult(np.array(params.thetas), [sk[0].arrays() for sk in sinks], tried, acc,
                        replica_at, sweeps, _round_trips(replica_at, sweeps), files,
                        time.monotonic() - t0, np.array(measured, dtype=np.int64).reshape(-1, n_rep),
                        scales)


def _population_error(x, min_window: int) -> tuple[float, float, float]:
    """Mean, error and tau_int of an indicator series (Gamma method, window at least ``min_window``).

    The automatic window (Wolff 2004, S = 1.5) can stop on the fast decay of a slot's indicator (the
    swaps) before the slow tail (the replicas carrying their branch through the ladder); the sum of
    rho is then also taken up to ``min_window`` (the mean round-trip time) and the larger tau_int kept.
    """
    from sigmasim.analysis.gamma import autocorrelation

    m, e, tau = _mean_err(x)
    n = len(x)
    w = min(int(min_window), n // 2)
    if n >= 8 and np.ptp(x) > 0 and w > 1:
        tau_w = max(0.5, 0.5 + float(autocorrelation(x, w)[1:].sum()))
        if tau_w > tau:
            e = float(np.sqrt(2.0 * tau_w * np.var(x) / n))
            tau = tau_w
    return m, e, tau


def branch_populations(result: TemperResult, nf: int, band: float = 0.5):
    """Per slot: branch occupation fractions (nf,) with their errors (list of (occ, err)).

    Errors: Gamma method on the slot's indicator series, with a window of at least the mean
    round-trip time (in measurements) when there are round trips.  They are trustworthy only when
    the replicas' branch census changed many times during the run (:func:`branch_census`): with a
    frozen census the slot's population is conditioned on the starting branches whatever its error
    says.
    """
    from sigmasim.analysis.tunnelling import branch_coordinate, branch_index

    every = 1
    if len(result.series) and len(result.series[0].get("sweep", ())) > 1:
        every = max(1, int(np.median(np.diff(result.series[0]["sweep"]))))
    window = int(np.mean(result.round_trips) / every) if result.round_trips else 0
    out = []
    for t, s in zip(result.thetas, result.series):
        idx = branch_index(branch_coordinate(s["omega_h"], t, nf), nf, band)
        occ, err = [], []
        for k in range(nf):
            m, e, _ = _population_error((idx == k).astype(float), window)
            occ.append(m)
            err.append(e)
        out.append((np.array(occ), np.array(err)))
    return out


@dataclass
class BranchCensus:
    """Branches of the *replicas* (not the slots) over a tempering run (:func:`branch_census`).

    Attributes
    ----------
    replica_branch : int array (R, n)
        Branch index of replica r at measurement t: the hysteresis classification of
        :mod:`sigmasim.analysis.tunnelling` along the replica's own history, each measurement at the
        theta of the slot the replica sat in.
    counts : int array (n, nf)
        Number of replicas in each branch at each measurement (the census).
    changes : int
        Measurements at which the census differs from the one before.
    slot_changes : int array (R,)
        Branch changes of replicas, by the slot they happened in (tunnelling inside a slot).
    """

    replica_branch: np.ndarray
    counts: np.ndarray
    changes: int
    slot_changes: np.ndarray


def branch_census(result: TemperResult, nf: int, band: float = 0.5) -> BranchCensus:
    """Follow the replicas through the ladder and count how often their branch census changed.

    Swaps never change the census; only tunnelling inside a slot does.  A census that (almost) never
    changes means the slot populations are those fixed by the start, whatever their errors say.
    """
    from sigmasim.analysis.tunnelling import branch_coordinate, branch_index

    if result.measured_replica is None:
        raise ValueError("this TemperResult has no measured_replica record")
    om = np.array([s["omega_h"] for s in result.series])          # (R, n)
    n_rep, n = om.shape
    at = result.measured_replica                                  # (n, R): replica at slot
    pos = np.argsort(at, axis=1)                                  # (n, R): slot of replica
    cols = np.arange(n)
    thetas = np.asarray(result.thetas, float)
    rb = np.empty((n_rep, n), dtype=np.int64)
    slot_changes = np.zeros(n_rep, dtype=np.int64)
    for r in range(n_rep):
        p = pos[:, r]
        b = branch_index(branch_coordinate(om[p, cols], thetas[p], nf), nf, band)
        rb[r] = b
        # measurement t follows the swap after t-1, so a change seen at t happened in slot p[t]
        np.add.at(slot_changes, p[np.flatnonzero(b[1:] != b[:-1]) + 1], 1)
    counts = np.zeros((n, nf), dtype=np.int64)
    for k in range(nf):
        counts[:, k] = (rb == k).sum(axis=0)
    changes = int(np.count_nonzero(np.any(counts[1:] != counts[:-1], axis=1))) if n > 1 else 0
    return BranchCensus(rb, counts, changes, slot_changes)


# ---------------------------------------------------------------- finite-volume lifetimes
LIFETIME_SCHEMA = {
    "sizes": ("sizes", None, "list of >= 1 even extents L; the lattice is L^d with d = len(lattice.shape)"),
    "starts": ("int:1:100000", 16, "independent starts (seeds seed*100000 + i) per size"),
    "max_sweeps": ("int:1:1000000000", 10000, "give up (censored) after this many sweeps"),
    "stay": ("int:0:1000000000", 20, "sweeps the new branch must persist for the escape to count"),
    "band": ("real", 0.5, "hysteresis band of the branch classification, 0 <= band < 1"),
    "workers": ("int:0:1024", 0, "worker processes (0: the idle cores); numba uses one thread per worker"),
}


def _lifetime_params(sub: dict) -> dict:
    rest = dict(sub)
    if "sizes" not in rest:
        raise ConfigError("[lifetimes] needs sizes = [L1, L2, ...]")
    sizes = rest.pop("sizes")
    if (not isinstance(sizes, list) or not sizes
            or not all(isinstance(x, int) and not isinstance(x, bool) for x in sizes)):
        raise ConfigError(f"lifetimes.sizes must be a non-empty list of integers, got {sizes!r}")
    if any(x < 2 or x % 2 for x in sizes):
        raise ConfigError(f"lifetimes.sizes must be even and >= 2 (checkerboard), got {sizes}")
    if len(set(sizes)) != len(sizes):
        raise ConfigError(f"lifetimes.sizes has repeated entries: {sizes}")
    schema = {k: v for k, v in LIFETIME_SCHEMA.items() if k != "sizes"}
    params, _ = split_protocol({"lifetimes": rest}, "lifetimes", schema)
    if not 0.0 <= params["band"] < 1.0:
        raise ConfigError(f"lifetimes.band must be in [0, 1), got {params['band']}")
    params["sizes"] = tuple(sorted(int(x) for x in sizes))
    return params


def _escape_time(config_dict: dict, max_sweeps: int, stay: int, band: float) -> tuple[float, bool]:
    """One start: sweeps until the branch index leaves start_branch for good (>= stay sweeps).

    Top level so that it pickles for ProcessPoolExecutor; sets numba to one thread.
    Returns (time, escaped); time = max_sweeps and escaped = False when censored.
    """
    import numba

    from sigmasim.analysis.tunnelling import branch_coordinate
    from sigmasim.chain import make_simulation

    numba.set_num_threads(1)
    cfg = config_from_dict(config_dict)
    sim = make_simulation(cfg)
    nf = cfg.nf
    k0 = cfg.start_branch % nf
    k = k0
    left_at = None
    thr = 0.5 * (1.0 + band)
    every = cfg.measure_every
    for sweep in range(1, max_sweeps + 1):
        sim.sweep()
        if sweep % every:
            continue
        om = sim.measure()["omega_h"]
        x = float(branch_coordinate(np.array([om]), cfg.theta, nf)[0])
        d = x - k
        if abs(d - nf * round(d / nf)) > thr:
            k = int(round(x)) % nf
        if k != k0:
            if left_at is None:
                left_at = sweep
            if sweep - left_at >= stay:
                return float(left_at), True
        else:
            left_at = None
    return float(max_sweeps), False


def lifetime_estimate(times, escaped) -> tuple[float, float, int]:
    """Exponential (censored) maximum-likelihood mean lifetime: total exposure / escapes, error tau/sqrt(n)."""
    times = np.asarray(times, float)
    escaped = np.asarray(escaped, bool)
    n = int(escaped.sum())
    if n == 0:
        return float("nan"), float("nan"), 0
    tau = times.sum() / n
    return float(tau), float(tau / math.sqrt(n)), n


def fit_log_lifetimes(sizes, tau, tau_err, d: int) -> dict:
    """Weighted straight-line fits of ln tau against L^(d-1) (surface) and L^d (volume).

    Returns {'surface': fit, 'volume': fit}, each fit a dict: slope, slope_error, intercept,
    intercept_error, chi2, dof (fits with fewer than 2 finite points are NaN).
    """
    sizes = np.asarray(sizes, float)
    tau, tau_err = np.asarray(tau, float), np.asarray(tau_err, float)
    ok = np.isfinite(tau) & np.isfinite(tau_err) & (tau > 0) & (tau_err > 0)
    y, sy = np.log(tau[ok]), tau_err[ok] / tau[ok]
    out = {}
    for name, power in (("surface", d - 1), ("volume", d)):
        x = sizes[ok] ** power
        if len(x) < 2:
            nan = float("nan")
            out[name] = dict(slope=nan, slope_error=nan, intercept=nan, intercept_error=nan, chi2=nan,
                             dof=0, power=power)
            continue
        w = 1.0 / sy ** 2
        a = np.vstack([x, np.ones_like(x)]).T
        cov = np.linalg.inv(a.T @ (a * w[:, None]))
        p = cov @ (a.T @ (w * y))
        chi2 = float(np.sum(w * (y - a @ p) ** 2))
        out[name] = dict(slope=float(p[0]), slope_error=float(math.sqrt(cov[0, 0])),
                         intercept=float(p[1]), intercept_error=float(math.sqrt(cov[1, 1])),
                         chi2=chi2, dof=len(x) - 2, power=power)
    return out


@dataclass
class LifetimeResult:
    """Result of :func:`run_lifetimes`: per size the escape times of every start and the fits."""

    sizes: tuple
    d: int
    times: dict
    escaped: dict
    tau: np.ndarray
    tau_error: np.ndarray
    n_escaped: np.ndarray
    fits: dict
    wall_seconds: float = 0.0

    def table(self) -> str:
        lines = ["   L      V  starts  escaped        tau     error"]
        for i, L in enumerate(self.sizes):
            lines.append(f"{L:4d} {L ** self.d:6d} {len(self.times[L]):7d} {self.n_escaped[i]:8d} "
                         f"{self.tau[i]:10.4g} {self.tau_error[i]:9.3g}")
        for name, f in self.fits.items():
            if f["dof"] > 0:
                quality = f"chi2/dof = {f['chi2']:.3g}/{f['dof']}"
            else:  # two sizes: the line goes through both points, chi2 is rounding noise
                quality = "no chi2 test (0 dof: the line passes through the points; use >= 3 sizes)"
            lines.append(f"ln tau = a + b L^{f['power']} ({name}): b = {f['slope']:.4g} +- {f['slope_error']:.2g}, "
                         f"a = {f['intercept']:.4g} +- {f['intercept_error']:.2g}, {quality}")
        return "\n".join(lines)


def run_lifetimes(config: RunConfig, params: dict, progress=None) -> LifetimeResult:
    """Escape times from the metastable branch (``run.start = 'branch'``) for every size and start.

    Starts run in parallel (``concurrent.futures.ProcessPoolExecutor``, numba one thread per
    worker; ``workers = 1`` runs in this process).  Start i of size L uses seed
    ``config.seed * 100000 + i`` and the lattice ``[L] * d``.
    """
    from concurrent.futures import ProcessPoolExecutor, as_completed

    from sigmasim.threads import idle_cores

    if config.start != "branch":
        raise ConfigError("lifetimes need run.start = 'branch' (and run.start_branch: the metastable branch)")
    t0 = time.monotonic()
    d = len(config.shape)
    jobs = []
    for L in params["sizes"]:
        for i in range(params["starts"]):
            c = dataclasses.replace(config, shape=(L,) * d, seed=config.seed * 100000 + i)
            raw = c.to_dict()
            config_from_dict(raw)  # memory guard per size
            jobs.append((L, raw))
    args = (params["max_sweeps"], params["stay"], params["band"])
    workers = params.get("workers", 0) or idle_cores()
    tick = progress or (lambda done, total: None)
    if workers == 1:
        results = []
        for _, raw in jobs:
            results.append(_escape_time(raw, *args))
            tick(len(results), len(jobs))
    else:
        import multiprocessing

        # spawn, not fork: numba's OpenMP/TBB layer may already run threads in this process
        ctx = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as ex:
            futs = [ex.submit(_escape_time, raw, *args) for _, raw in jobs]
            for done, _ in enumerate(as_completed(futs), 1):
                tick(done, len(jobs))
            results = [f.result() for f in futs]
    times = {L: [] for L in params["sizes"]}
    escaped = {L: [] for L in params["sizes"]}
    for (L, _), (t, e) in zip(jobs, results):
        times[L].append(t)
        escaped[L].append(e)
    est = [lifetime_estimate(times[L], escaped[L]) for L in params["sizes"]]
    tau = np.array([e[0] for e in est])
    err = np.array([e[1] for e in est])
    n_esc = np.array([e[2] for e in est])
    fits = fit_log_lifetimes(params["sizes"], tau, err, d)
    return LifetimeResult(tuple(params["sizes"]), d, {L: np.array(v) for L, v in times.items()},
                          {L: np.array(v) for L, v in escaped.items()}, tau, err, n_esc, fits,
                          time.monotonic() - t0)


# ---------------------------------------------------------------- file and plot
def _provenance() -> dict:
    import platform

    import h5py
    import numba

    from sigmasim import __version__

    return {"sigmasim": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "numba": numba.__version__, "h5py": h5py.__version__}


def write_sweep(path, result: SweepResult) -> Path:
    """Write the whole sweep protocol into one HDF5 file (atomically: temporary file, rename)."""
    import datetime as _dt
    import os

    import h5py

    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {path.parent}: {exc.strerror}") from None
    tmp = path.with_name(path.name + ".tmp")
    try:
        with h5py.File(tmp, "w") as f:
            f.attrs["format"] = SWEEP_FORMAT
            f.attrs["format_version"] = 1
            f.attrs["config"] = json.dumps(result.config.to_dict(), sort_keys=True)
            f.attrs["protocol"] = json.dumps(dataclasses.asdict(result.params), sort_keys=True)
            f.attrs["summary"] = json.dumps(result.summary, sort_keys=True)
            f.attrs["conventions"] = ("omega_h = e^{i theta_m} Omega; branch k: x = (nf arg omega_h - "
                                      "theta)/(2 pi) nearest k with a hysteresis band; research toy")
            p = f.create_group("provenance")
            for k, v in _provenance().items():
                p.attrs[k] = v
            p.attrs["created"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
            p.attrs["wall_seconds"] = result.wall_seconds
            g = f.create_group("steps")
            for k, v in result.steps.items():
                g.create_dataset(k, data=v)
            g = f.create_group("series")
            for k, v in result.series.items():
                g.create_dataset(k, data=v)
            g = f.create_group("cycles")
            g.create_dataset("area", data=result.area)
            g.create_dataset("area_stat_error", data=result.area_stat_error)
            g.create_dataset("jump_up", data=result.jump_up)
            g.create_dataset("jump_down", data=result.jump_down)
            if result.tree:
                g = f.create_group("tree")
                g.create_dataset("theta", data=result.tree["theta"])
                g.create_dataset("im_omega_h", data=result.tree["im_omega_h"])
                g.create_dataset("spinodals", data=result.tree["spinodals"])
                g.create_dataset("first_order", data=result.tree["first_order"])
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise RunFileError(f"could not write {path} ({exc})") from None
    return path


def read_sweep(path) -> dict:
    """Read a sweep file: {'config', 'protocol', 'summary', 'steps', 'series', 'cycles', 'tree'}."""
    import h5py

    path = Path(path)
    if not path.exists():
        raise RunFileError(f"{path} does not exist")
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != SWEEP_FORMAT:
                raise RunFileError(f"{path} is not a sigmasim sweep file")
            out = {k: json.loads(f.attrs[k]) for k in ("config", "protocol", "summary")}
            for g in ("steps", "series", "cycles", "tree"):
                out[g] = {k: f[g][k][...] for k in f[g]} if g in f else {}
    except OSError:
        raise RunFileError(f"{path} is not a readable HDF5 file") from None
    return out


def plot_sweep(result: SweepResult, path) -> Path:
    """Plot Im omega_h along the up and down paths with the tree-level branches; writes a PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from sigmasim.analysis.plots import legend_outside, pi_ticks

    cfg, p, st = result.config, result.params, result.steps
    fig, ax = plt.subplots(figsize=(10.0, 5.2))
    tree = result.tree
    if tree:
        # tree level has |Omega| = 1; fluctuations shrink the measured |Omega|, so the curves are
        # drawn at the measured median |omega_h| to compare shapes and jump points
        mod = np.hypot(np.asarray(st["re_omega_h"]), np.asarray(st["im_omega_h"]))
        mod = mod[np.isfinite(mod)]
        scale = float(np.median(mod)) if mod.size else 1.0
        for b in range(tree["im_omega_h"].shape[0]):
            ax.plot(tree["theta"], scale * np.asarray(tree["im_omega_h"][b]), color="0.6", lw=1.2, ls="--",
                    label=(rf"tree-level branches $\times$ median $|\Omega|$ = {scale:.2f}") if b == 0 else None,
                    zorder=1)
        for j, (t, b) in enumerate(tree["spinodals"]):
            ax.axvline(t, color="0.6", lw=0.8, ls=":", zorder=0,
                       label="tree-level spinodals" if j == 0 else None)
        for j, t in enumerate(tree["first_order"]):
            ax.axvline(t, color="tab:green", lw=0.8, ls="-.", zorder=0,
                       label="tree-level first-order point" if j == 0 else None)
    colours = {1: "tab:red", -1: "tab:blue"}
    for c in range(p.cycles):
        for d, name in ((1, "up"), (-1, "down")):
            sel = (st["cycle"] == c) & (st["direction"] == d)
            ax.errorbar(st["theta"][sel], st["im_omega_h"][sel], yerr=st["im_omega_h_err"][sel],
                        color=colours[d], marker="o" if d == 1 else "s", ms=3, lw=1, capsize=2,
                        alpha=1.0 if c == 0 else 0.5,
                        label=rf"$\theta$ {name}" if c == 0 else None)
    s = result.summary
    ax.set_xlabel(r"vacuum angle $\theta$")
    pi_ticks(ax, float(np.min(st["theta"])), float(np.max(st["theta"])))
    ax.set_ylabel(r"Im $\omega_h$ = Im $e^{i\theta_m}\Omega$")
    legend_outside(ax, fontsize=8)  # beside the loop: never on the data
    ax.set_title(rf"hysteresis sweep, loop area {s['area']:.3g} $\pm$ {s['area_error']:.2g}", fontsize=10)
    from sigmasim.analysis.report import run_label

    cap = f"{run_label(cfg)}; dtheta={p.step:g}, {p.sweeps_per_step}+{p.thermalize_per_step} sweeps/step, " \
        f"{p.cycles} cycle(s); jumps up {s['jump_up']:.3f}, down {s['jump_down']:.3f}. research toy"
    fig.text(0.01, 0.01, cap, fontsize=7, wrap=True)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    path = Path(path)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


# ---------------------------------------------------------------- commands
def _set_threads(config: RunConfig) -> None:
    from sigmasim.threads import set_threads

    set_threads(config.threads, config.volume // 2, config.nf)


def sweep_command(config_path: str, plot: bool = False, out: str | None = None, quiet: bool = False) -> int:
    """``sigmasim sweep CONFIG [--plot] [--out FILE] [--quiet]``: run a hysteresis sweep, write, print summary."""
    from sigmasim.progress import Steps

    config, raw = load_protocol(config_path, "sweep", SWEEP_SCHEMA)
    params = SweepParams(**raw)
    path = Path(out) if out else config.run_dir / f"{config.name}-sweep.h5"
    if path.suffix != ".h5":
        raise ConfigError(f"--out must end in .h5, got {path}")
    _set_threads(config)
    with Steps("sweep", quiet, "theta step") as progress:
        result = run_sweep(config, params, progress=progress)
    grid = params.grid()
    try:
        # the tree-level branches of sigmasim.vacua are those of the chiral potential only
        result.tree = (tree_level(config, float(grid[0]), float(grid[-1]))
                       if getattr(config, "kind", "chiral") == "chiral" else {})
    except Exception:  # tree-level scan is decoration only
        result.tree = {}
    write_sweep(path, result)
    s = result.summary
    print(f"wrote {path}")
    print(f"jump up   {s['jump_up']:.4f} +- {s['jump_up_error']:.2g} (resolution {s['jump_resolution']:.3g})")
    print(f"jump down {s['jump_down']:.4f} +- {s['jump_down_error']:.2g}")
    print(f"loop area {s['area']:.4g} +- {s['area_error']:.2g} (cycles) / {s['area_error_stat']:.2g} (stat)")
    if plot:
        png = plot_sweep(result, path.with_suffix(".png"))
        print(f"wrote {png}")
    return 0


def temper_command(config_path: str, out: str | None = None, quiet: bool = False) -> int:
    """``sigmasim temper CONFIG [--out FOLDER]``: replica exchange over the [tempering] ladder.

    Writes ``<out or run.output>/<name>/<name>-t<i>/<name>-t<i>.h5`` (ordinary run files, one per
    slot) and prints swap acceptances, round trips, the replicas' branch census (how often it
    changed, where replicas tunnelled) and the branch populations of every slot.
    """
    path = Path(config_path)
    raw = read_toml(path)
    if not isinstance(raw.get("tempering"), dict):
        raise ConfigError(f"{path} has no [tempering] table")
    rest = dict(raw)
    params = TemperParams(**_temper_params(rest.pop("tempering")))
    config = config_from_dict(rest)
    if out:
        config = dataclasses.replace(config, output=str(out))
    _set_threads(config)
    from sigmasim.progress import Steps

    with Steps("temper", quiet, "sweep") as progress:
        res = run_tempering(config, params, progress=progress)
    for f in res.files:
        print(f"wrote {f}")
    scales = res.mass_scales
    print("pair  theta_i  theta_j  scale_i  scale_j  acceptance")
    for i, a in enumerate(res.acceptance):
        print(f"{i:4d}  {res.thetas[i]:7.4f}  {res.thetas[i + 1]:7.4f}  {scales[i]:7.4f}  "
              f"{scales[i + 1]:7.4f}  {a:.3f}")
    rt = res.round_trips
    print(f"round trips: {len(rt)}" + (f", mean {np.mean(rt):.1f} sweeps" if rt else ""))
    census = branch_census(res, config.nf, params.band)
    print(f"branch census of the replicas changed {census.changes} times; in-slot branch changes per slot: "
          + " ".join(str(int(c)) for c in census.slot_changes))
    for i, (t, (occ, err)) in enumerate(zip(res.thetas, branch_populations(res, config.nf, params.band))):
        print(f"slot {i:2d} theta {t:7.4f} scale {scales[i]:.4f}  branch occupation "
              + "  ".join(f"{o:.3f}+-{e:.3f}" for o, e in zip(occ, err)))
    if config.nf > 1 and census.changes < CENSUS_MIN_CHANGES:
        print(f"warning: the branch census changed only {census.changes} times (< {CENSUS_MIN_CHANGES}): the "
              "populations are fixed by the starting branches and their errors are not trustworthy; "
              "a ladder in theta alone cannot fix this at a first-order point (add mass_scales down to 0)")
    return 0


def load_lifetimes(config_path) -> tuple[RunConfig, dict]:
    """Read a ``[lifetimes]`` protocol TOML: (run config, validated params)."""
    raw = read_toml(config_path)
    if not isinstance(raw.get("lifetimes"), dict):
        raise ConfigError(f"{config_path} has no [lifetimes] table")
    rest = dict(raw)
    params = _lifetime_params(rest.pop("lifetimes"))
    return config_from_dict(rest), params


def lifetimes_command(config_path: str, out: str | None = None, workers: int = 0, quiet: bool = False) -> int:
    """``sigmasim lifetimes CONFIG [--out FILE.json] [--workers N] [--quiet]``: escape times per volume and fits.

    Prints the table and both fits and writes them as JSON to ``--out`` (default
    ``<run.output>/<name>/<name>-lifetimes.json``; an existing file there is replaced only if
    this command wrote it).
    """
    from sigmasim.progress import Steps

    config, params = load_lifetimes(config_path)
    if workers:
        params["workers"] = int(workers)
    if out is not None and not str(out).endswith(".json"):
        raise ConfigError(f"--out must end in .json, got {out}")
    out = Path(out) if out is not None else config.run_dir / f"{config.name}-lifetimes.json"
    if out.exists():
        try:
            ours = "fits" in json.loads(out.read_text()) and "protocol" in json.loads(out.read_text())
        except (OSError, ValueError, TypeError):
            ours = False
        if not ours:
            raise RunFileError(f"refusing to overwrite {out}: it is not a lifetimes file of sigmasim")
    with Steps("lifetimes", quiet, "start") as progress:
        res = run_lifetimes(config, params, progress=progress)
    print(res.table())
    if out:
        blob = {"sizes": list(res.sizes), "d": res.d, "tau": res.tau.tolist(), "tau_error": res.tau_error.tolist(),
                "n_escaped": res.n_escaped.tolist(), "fits": res.fits,
                "times": {str(L): v.tolist() for L, v in res.times.items()},
                "escaped": {str(L): v.tolist() for L, v in res.escaped.items()},
                "config": config.to_dict(), "protocol": params}
        try:
            Path(out).parent.mkdir(parents=True, exist_ok=True)
            Path(out).write_text(json.dumps(blob, indent=1, default=list))
        except OSError as exc:
            raise RunFileError(f"cannot write {out}: {exc.strerror}") from None
        print(f"wrote {out}")
    return 0
