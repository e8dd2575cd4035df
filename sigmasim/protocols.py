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
``step / 2``); a path without a change has no jump (NaN in the file, "no jump" in the output).

Loop area of a cycle = dissipated work per site ``W = oint <dS/dtheta> d theta / V``: the integral of
``<dS/dtheta>/V`` over the up path minus the same over the down path (trapezoid rule on the grid).
With ``theta_m = c_m theta`` and ``theta_a = -c_a theta`` (``c_m = 1/nf, c_a = 0`` for the ``mass``
placement, ``0, 1`` for ``anomaly``, ``1/(2 nf), 1/2`` for ``split``; SU(nf): mass),

.. math:: \frac{1}{V}\frac{\partial S}{\partial\theta} = c_m \sum_f h_f\,\mathrm{Im}(e^{i\theta_m}
          \bar U_{ff}) - 2 \kappa c_a\,\mathrm{Im}(e^{i\theta_a}\,\overline{\det U})

(``kappa`` -> ``c`` for the linear model; bars are site averages: the ``condensate`` and ``det``
series), measured at every measurement.  Its expectation does not depend on the placement
(``<dS/dtheta> = -d ln Z/d theta``).  ``W >= 0`` for a cycle (the work a cyclic protocol dissipates,
common practice, no source), and holds for non-degenerate masses too.  For degenerate masses ``h`` in
the ``mass`` placement ``dS/dtheta / V = h Im omega_h``, so the former ``int Im omega_h d theta`` loop
area (kept as ``area_im_omega_h``) is the special case ``W / h``.  Errors: the spread over cycles
(``std / sqrt(cycles)``, needs cycles >= 2) and, separately, the statistical error propagated from the
per-step Gamma-method errors.

Sweep file layout (HDF5, format ``sigmasim-sweep``, version 1; default
``<output>/<name>/<name>-sweep.h5``)::

    /                  attrs: format, format_version, config (JSON of the run config at start),
                              protocol (JSON of [sweep]), summary (JSON: jumps, areas), conventions
    /provenance        attrs: sigmasim, python, numpy, numba, h5py versions, created, wall_seconds
    /steps/<name>      one entry per theta step, in protocol order:
                       theta, cycle (int), direction (+1 up, -1 down), re_omega_h, re_omega_h_err,
                       im_omega_h, im_omega_h_err, action, action_err, ds_dtheta, ds_dtheta_err
                       (<dS/dtheta>/V), branch (int, majority, numbered as in sigmasim.vacua),
                       branch_fraction (fraction of measurements in the majority branch), n_meas (int),
                       tau_int_im (Gamma tau_int of Im omega_h)
    /series/<name>     one entry per measurement: sweep (int), step (int, index into /steps),
                       theta, omega_h (complex), det (complex), action, action_mass, action_det,
                       ds_dtheta (dS/dtheta / V), branch (int, hysteresis index, numbered as in sigmasim.vacua)
    /tree/theta        (nt,) grid of the tree-level scan (sigmasim.vacua.scan_theta)
    /tree/im_omega_h   (nb, nt) Im e^{i theta_m} Omega of each tree-level branch (NaN where absent)
    /tree/spinodals    (ns, 2) theta and branch of each tree-level spinodal
    /cycles/area       (cycles,) loop area per cycle: dissipated work per site oint <dS/dtheta>/V
    /cycles/area_im_omega_h  (cycles,) oint Im omega_h d theta (= area / h: degenerate, mass placement)
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

__all__ = ["LIFETIME_SCHEMA", "LifetimeResult", "run_lifetimes", "lifetime_estimate", "escape_time_fit",
           "plot_escape_times",
           "fit_log_lifetimes", "load_lifetimes", "SWEEP_SCHEMA", "TEMPER_SCHEMA", "TemperParams", "TemperResult", "run_tempering",
           "replica_configs", "branch_populations", "branch_census", "BranchCensus",
           "CENSUS_MIN_CHANGES", "SweepParams", "SweepResult", "load_protocol", "split_protocol",
           "run_sweep", "write_sweep", "read_sweep", "plot_sweep", "tree_level", "sweep_command",
           "temper_command", "lifetimes_command", "SWEEP_FORMAT", "sweep_checkpoint_path",
           "temper_checkpoint_path"]

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
    area_im_omega_h: np.ndarray = field(default_factory=lambda: np.zeros(0))

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
        ai, aie = mean_err(self.area_im_omega_h)
        stat = float(np.sqrt(np.sum(self.area_stat_error ** 2)) / len(self.area))
        ju, jue = mean_err(self.jump_up)
        jd, jde = mean_err(self.jump_down)
        return {
            "area": a, "area_error_cycles": ae, "area_error_stat": stat,
            "area_error": ae if math.isfinite(ae) else stat,
            "area_per_cycle": [float(x) for x in self.area],
            "area_im_omega_h": ai, "area_im_omega_h_error": aie,
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


_SWEEP_KEYS = ("sweep", "step", "theta", "omega_h", "det", "action", "action_mass", "action_det",
               "ds_dtheta")
SWEEP_CHECKPOINT_FORMAT = "sigmasim-sweep-checkpoint"


def sweep_checkpoint_path(path) -> Path:
    """The checkpoint of an unfinished sweep that writes ``path``."""
    path = Path(path)
    return path.with_name(path.name + ".checkpoint")


def _sweep_identity(config: RunConfig, params: SweepParams) -> str:
    return json.dumps({"physics": config.physics_hash(), "protocol": dataclasses.asdict(params)},
                      sort_keys=True)


def _save_sweep_checkpoint(path: Path, config, params, sim, next_step: int, ser: dict, wall: float) -> None:
    """Everything a resumed sweep needs, written atomically (temporary name, fsync, rename)."""
    from sigmasim.storage import atomic_hdf5, write_state_group

    st = sim.state

    def write(f):
        f.attrs["format"] = SWEEP_CHECKPOINT_FORMAT
        f.attrs["identity"] = _sweep_identity(config, params)
        f.attrs["next_step"] = next_step
        f.attrs["wall_seconds"] = wall
        write_state_group(f.create_group("state"), st)
        h = f.create_group("series")
        for k, v in ser.items():
            h.create_dataset(k, data=np.asarray(v, dtype=np.complex128 if k in ("omega_h", "det")
                                                else np.float64 if k in ("theta", "action", "action_mass",
                                                                         "action_det", "ds_dtheta")
                                                else np.int64))

    atomic_hdf5(path, write, what="sweep checkpoint")


def _load_sweep_checkpoint(path: Path, config, params, last_sweep: int, n_plan: int):
    """(state, next_step, series lists, wall seconds) of a checkpoint; one-line errors when damaged."""
    import h5py

    from sigmasim.storage import _check_state_ranges, _check_unitary, read_state_group

    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != SWEEP_CHECKPOINT_FORMAT:
                raise RunFileError(f"{path} is not a sweep checkpoint; remove it")
            if f.attrs.get("identity") != _sweep_identity(config, params):
                raise RunFileError(f"{path} belongs to another config or [sweep] table; remove it or "
                                   "restore that config")
            nxt = f.attrs["next_step"]
            wall = float(f.attrs["wall_seconds"])
            st = read_state_group(f["state"])
            ser = {k: list(f["series"][k][...]) for k in _SWEEP_KEYS}
    except RunFileError:
        raise
    except (OSError, KeyError, TypeError, ValueError, OverflowError) as exc:
        raise RunFileError(f"{path} is a damaged sweep checkpoint ({' '.join(str(exc).split())}); "
                           "remove it to start the sweep again") from None
    nf, v = config.nf, config.volume
    if st.re.shape != (nf * nf, v) or st.im.shape != (nf * nf, v) or not (
            isinstance(nxt, (int, np.integer)) and 0 <= int(nxt) <= n_plan) or not (
            np.isfinite(st.re).all() and np.isfinite(st.im).all()) or len({len(x) for x in ser.values()}) != 1:
        raise RunFileError(f"{path} is a damaged sweep checkpoint; remove it to start the sweep again")
    _check_state_ranges(st, config, path, last_sweep=last_sweep)
    if getattr(config, "kind", "chiral") != "linear":
        _check_unitary(st, config, path)
    return st, int(nxt), ser, wall


def run_sweep(config: RunConfig, params: SweepParams, progress=None, checkpoint=None) -> SweepResult:
    """Run a hysteresis sweep in memory (see the module notes).

    With ``checkpoint`` (a path) the chain state and the measurements so far are saved there after
    the thermalisation and after every theta step once ``run.checkpoint_every`` sweeps or
    ``run.checkpoint_seconds`` have passed; an existing checkpoint of the same config and protocol
    is continued, and the result equals that of an uninterrupted sweep bit for bit.
    """
    from sigmasim.analysis.tunnelling import branch_coordinate, branch_index
    from sigmasim.chain import make_simulation

    t0 = time.monotonic()
    grid = params.grid()
    cfg = dataclasses.replace(config, theta=float(grid[0]))
    plan = []  # (theta, cycle, direction)
    for c in range(params.cycles):
        plan += [(float(t), c, +1) for t in grid]
        plan += [(float(t), c, -1) for t in grid[::-1]]
    last_sweep = cfg.thermalize + len(plan) * (params.thermalize_per_step + params.sweeps_per_step)
    ser = {k: [] for k in _SWEEP_KEYS}
    first, wall_before = 0, 0.0
    checkpoint = Path(checkpoint) if checkpoint is not None else None
    if checkpoint is not None and checkpoint.exists():
        state, first, ser, wall_before = _load_sweep_checkpoint(checkpoint, config, params, last_sweep,
                                                                len(plan))
        sim = make_simulation(cfg, state)
    else:
        sim = make_simulation(cfg)
        for _ in range(cfg.thermalize):
            sim.sweep()
    saved = [sim.state.sweep, time.monotonic()]

    def save(next_step, force=False):
        if checkpoint is None:
            return
        if (force or sim.state.sweep - saved[0] >= cfg.checkpoint_every
                or time.monotonic() - saved[1] >= cfg.checkpoint_seconds):
            _save_sweep_checkpoint(checkpoint, config, params, sim, next_step, ser,
                                   wall_before + time.monotonic() - t0)
            saved[:] = [sim.state.sweep, time.monotonic()]

    if first == 0:
        save(0, force=True)
    every = cfg.measure_every
    for i, (th, c, d) in enumerate(plan):
        if i < first:
            continue
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
                ser["ds_dtheta"].append(theta_derivative(sim.config, r))
        save(i + 1)
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
                                             "ds_dtheta", "ds_dtheta_err",
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
        steps["ds_dtheta"][i], steps["ds_dtheta_err"][i], _ = _mean_err(series["ds_dtheta"][sel])
        counts = np.bincount(series["branch"][sel], minlength=cfg.nf)
        steps["branch"][i] = int(np.argmax(counts))
        steps["branch_fraction"][i] = counts.max() / max(1, counts.sum())
        steps["n_meas"][i] = int(sel.sum())
    # stored and reported in the branch numbers of sigmasim.vacua (counted from 0 modulo nf above)
    from sigmasim.vacua import canonical_branch

    series["branch"] = np.asarray(canonical_branch(series["branch"], cfg.nf), dtype=np.int64).reshape(-1)
    steps["branch"] = np.asarray(canonical_branch(steps["branch"], cfg.nf), dtype=np.int64).reshape(-1)
    area, area_err, ju, jd = _loop_observables(steps, params.cycles)
    area_im, _, _, _ = _loop_observables(steps, params.cycles, "im_omega_h")
    return SweepResult(cfg, params, steps, series, area, area_err, ju, jd, wall_before + time.monotonic() - t0,
                       area_im_omega_h=area_im)


def theta_derivative(config: RunConfig, rec: dict) -> float:
    """``dS/dtheta / V`` of one measurement record (``condensate`` and ``det``; see the module notes)."""
    nf = config.nf
    if config.special or config.theta_placement == "mass":
        cm, ca = 1.0 / nf, 0.0
    elif config.theta_placement == "anomaly":
        cm, ca = 0.0, 1.0
    else:
        cm, ca = 1.0 / (2 * nf), 0.5
    tm, ta = config.theta_angles
    h = np.broadcast_to(np.asarray(config.mass, dtype=float), (nf,))
    cond = np.asarray(rec["condensate"], dtype=np.complex128).ravel()
    out = cm * float(np.sum(h * (np.exp(1j * tm) * cond).imag))
    if ca:
        k = config.c if getattr(config, "kind", "chiral") == "linear" else config.kappa
        out -= 2.0 * k * ca * float((np.exp(1j * ta) * complex(rec["det"])).imag)
    return out


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


def _loop_observables(steps, cycles, what="ds_dtheta"):
    area, area_err, ju, jd = (np.full(cycles, np.nan) for _ in range(4))
    for c in range(cycles):
        up = (steps["cycle"] == c) & (steps["direction"] == 1)
        dn = (steps["cycle"] == c) & (steps["direction"] == -1)
        tu, td = steps["theta"][up], steps["theta"][dn]
        ju[c] = _jump(tu, steps["branch"][up])
        jd[c] = _jump(td, steps["branch"][dn])
        ou, od = np.argsort(tu), np.argsort(td)
        wu, wd = _trapz_weights(tu[ou]), _trapz_weights(td[od])
        area[c] = np.sum(wu * steps[what][up][ou]) - np.sum(wd * steps[what][dn][od])
        area_err[c] = math.sqrt(np.sum((wu * steps[what + "_err"][up][ou]) ** 2)
                                + np.sum((wd * steps[what + "_err"][dn][od]) ** 2))
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


TEMPER_CHECKPOINT_FORMAT = "sigmasim-temper-checkpoint"


def temper_checkpoint_path(config: RunConfig) -> Path:
    """The checkpoint of an unfinished tempering protocol: ``<output>/<name>/<name>-temper.checkpoint``."""
    return Path(config.output) / config.name / f"{config.name}-temper.checkpoint"


def _temper_identity(config, params) -> str:
    return json.dumps({"physics": config.physics_hash(), "protocol": dataclasses.asdict(params)},
                      sort_keys=True, default=list)


def _save_temper_checkpoint(path, config, params, sims, sinks, sweep, attempt, tried, acc, labels,
                            history, measured, attempt_sweeps, wall) -> None:
    """The whole protocol state, written atomically (temporary name, fsync, rename)."""
    from sigmasim.storage import atomic_hdf5, write_state_group

    def write(f):
        f.attrs["format"] = TEMPER_CHECKPOINT_FORMAT
        f.attrs["identity"] = _temper_identity(config, params)
        f.attrs["sweep"] = sweep
        f.attrs["attempt"] = attempt
        f.attrs["wall_seconds"] = wall
        f.create_dataset("tried", data=tried)
        f.create_dataset("accepted", data=acc)
        f.create_dataset("labels", data=labels)
        f.create_dataset("history", data=np.array(history, dtype=np.int64))
        f.create_dataset("measured", data=np.array(measured, dtype=np.int64).reshape(-1, len(sims)))
        f.create_dataset("attempt_sweeps", data=np.array(attempt_sweeps, dtype=np.int64))
        for i, (sim, sk) in enumerate(zip(sims, sinks)):
            g = f.create_group(f"slot{i}")
            write_state_group(g, sim.state)
            recs = sk[0].records
            g.attrs["n_records"] = len(recs)
            r = g.create_group("records")
            for k in (recs[0] if recs else {}):
                r.create_dataset(k.replace("/", "%2F"), data=np.array([x[k] for x in recs]))

    atomic_hdf5(path, write, what="tempering checkpoint")


def _load_temper_checkpoint(path, config, params, configs, total) -> dict:
    import h5py

    from sigmasim.storage import _check_state_ranges, _check_unitary, read_state_group

    def damaged(why=""):
        return RunFileError(f"{path} is a damaged tempering checkpoint{why}; remove it and the slot files "
                            "to start again")

    n_rep = len(configs)
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != TEMPER_CHECKPOINT_FORMAT:
                raise RunFileError(f"{path} is not a tempering checkpoint; remove it")
            if f.attrs.get("identity") != _temper_identity(config, params):
                raise RunFileError(f"{path} belongs to another config or [tempering] table; remove it "
                                   "(and the slot files) or restore that config")
            out = {"sweep": int(f.attrs["sweep"]), "attempt": int(f.attrs["attempt"]),
                   "wall": float(f.attrs["wall_seconds"]),
                   "tried": np.asarray(f["tried"][...], dtype=np.int64),
                   "acc": np.asarray(f["accepted"][...], dtype=np.int64),
                   "labels": np.asarray(f["labels"][...], dtype=np.int64),
                   "history": [np.asarray(h, dtype=np.int64) for h in f["history"][...]],
                   "measured": [np.asarray(m, dtype=np.int64) for m in f["measured"][...]],
                   "attempt_sweeps": [int(x) for x in f["attempt_sweeps"][...]],
                   "states": [], "records": []}
            for i in range(n_rep):
                g = f[f"slot{i}"]
                st = read_state_group(g)
                n = int(g.attrs["n_records"])
                cols = {k.replace("%2F", "/"): d[...] for k, d in g["records"].items()}
                if any(len(v) != n for v in cols.values()) or (n and not cols):
                    raise ValueError("records of unequal length")
                out["states"].append(st)
                out["records"].append([{k: cols[k][j] for k in cols} for j in range(n)])
    except RunFileError:
        raise
    except (OSError, KeyError, TypeError, ValueError, OverflowError) as exc:
        raise damaged(f" ({' '.join(str(exc).split())})") from None
    if not (0 < out["sweep"] <= total and out["tried"].shape == (n_rep - 1,) and out["acc"].shape == (n_rep - 1,)
            and sorted(out["labels"].tolist()) == list(range(n_rep))
            and all(sorted(h.tolist()) == list(range(n_rep)) for h in out["history"])
            and len(out["history"]) == len(out["attempt_sweeps"]) == out["attempt"] + 1
            and (out["acc"] <= out["tried"]).all() and (out["acc"] >= 0).all()):
        raise damaged()
    nf, v = config.nf, config.volume
    for c, st in zip(configs, out["states"]):
        if st.re.shape != (nf * nf, v) or st.im.shape != (nf * nf, v) or st.sweep != out["sweep"] or not (
                np.isfinite(st.re).all() and np.isfinite(st.im).all()):
            raise damaged()
        _check_state_ranges(st, c, path, last_sweep=total)
        if getattr(c, "kind", "chiral") != "linear":
            _check_unitary(st, c, path)
    return out


def run_tempering(config: RunConfig, params: TemperParams, write: bool | None = None,
                  checkpoint=None, progress=None) -> TemperResult:
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

    With ``checkpoint`` (a path; needs ``write``) the whole protocol state (every slot's chain and
    records, swap counts, replica positions) is saved there every ``run.checkpoint_every`` sweeps,
    just before the slot files are committed; when the checkpoint exists the protocol continues from
    it (the slot files are rebuilt from it) and ends bit-identical to an uninterrupted one.
    """
    from sigmasim.chain import MemorySink, make_simulation

    t0 = time.monotonic()
    write = (params.write == "yes") if write is None else write
    configs = replica_configs(config, params.thetas, params.mass_scales)
    sims = [make_simulation(c) for c in configs]
    sinks = []
    files = []
    checkpoint = Path(checkpoint) if (checkpoint is not None and write) else None
    n_rep = len(sims)
    total = sims[0].total_sweeps
    resumed = None
    if checkpoint is not None and checkpoint.exists():
        resumed = _load_temper_checkpoint(checkpoint, config, params, configs, total)
        sims = [make_simulation(c, st) for c, st in zip(configs, resumed["states"])]
    for i, (c, sim) in enumerate(zip(configs, sims)):
        mem = MemorySink()
        sk = [mem]
        if write:
            from sigmasim.storage import RunWriter, check_writable

            check_writable(c.run_file, 1 << 20)
            if c.run_file.exists() and resumed is None:
                raise RunFileError(f"{c.run_file} exists; remove it or choose another name or output")
            w = RunWriter(c, c.run_file)
            sk.append(w)
            files.append(c.run_file)
        if resumed is not None:
            # the slot file is rebuilt from the checkpoint: it may be ahead of it after a crash
            mem.records = list(resumed["records"][i])
            for s in sk[1:]:
                s.start(sim)
                s.buffer = list(resumed["records"][i])
                s.checkpoint(sim)
        else:
            for s in sk:
                s.start(sim)
        sinks.append(sk)
    if resumed is None:
        tried = np.zeros(n_rep - 1, dtype=np.int64)
        acc = np.zeros(n_rep - 1, dtype=np.int64)
        labels = np.arange(n_rep)
        history = [labels.copy()]
        measured = []
        attempt_sweeps = [0]
        attempt = 0
        first = 1
    else:
        tried, acc, labels = resumed["tried"], resumed["acc"], resumed["labels"]
        history, measured = resumed["history"], resumed["measured"]
        attempt_sweeps, attempt = resumed["attempt_sweeps"], resumed["attempt"]
        first = resumed["sweep"]  # its sweeps are done; its swap step is not
        t0 -= resumed["wall"]
    last_saved = time.monotonic()
    for sweep in range(first, total + 1):
        if resumed is None or sweep > first:
            for sim, sk in zip(sims, sinks):
                sim.sweep()
                past = sim.state.sweep - sim.config.thermalize
                if past > 0 and past % sim.config.measure_every == 0:
                    rec = sim.measure()
                    for s in sk:
                        s.record(sim, rec)
            if (sweep % config.checkpoint_every == 0
                    or time.monotonic() - last_saved >= config.checkpoint_seconds):
                last_saved = time.monotonic()
                if checkpoint is not None:
                    _save_temper_checkpoint(checkpoint, config, params, sims, sinks, sweep, attempt, tried,
                                            acc, labels, history, measured, attempt_sweeps,
                                            time.monotonic() - t0)
                for sim, sk in zip(sims, sinks):
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
    if checkpoint is not None:
        checkpoint.unlink(missing_ok=True)
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
# Escape from a metastable branch at theta != pi goes by nucleation: a bubble of the stable branch
# has to form and grow past a critical size, so escape times are a relaxation dead time (the start
# leaving its initial configuration and the bubble growing across the lattice) plus a waiting time
# that is close to exponential.  escape_time_fit separates the two (shifted exponential); the
# dead time does not scale like a barrier and must not enter the ln tau fits.
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


def escape_time_fit(times, escaped, n_boot: int = 1000, seed: int = 0) -> dict:
    """Shifted-exponential law ``P(t) = exp(-(t - t0) / tau) / tau`` (t >= t0) of escape times.

    An escape from a branch start needs the start to relax first: no start escapes before a dead
    time ``t0``, after which escape is (close to) a Poisson process of mean ``tau``.  With ``N`` starts,
    ``n`` escaped (the others censored at their time), ``t_min`` the smallest time and
    ``S = sum_i (t_i - t_min)`` over all starts:

    * ``tau = S / (n - 1)`` (unbiased without censoring; for a shifted exponential ``2 S / tau`` is
      chi^2 with ``2 (n - 1)`` degrees of freedom, independent of ``t_min``), its exact central 68.27 %
      interval from that law, and ``ln_tau = ln S - digamma(n - 1)`` (unbiased for ``ln tau``);
    * ``dead_time = t_min - tau / N`` (the minimum of N starts exceeds t0 by tau / N on average);
    * errors from the sample itself: bootstrap over starts (``n_boot`` resamples, seeded) of
      ``ln_tau`` (``ln_tau_error``; ``tau_error = tau * ln_tau_error``), of ``dead_time`` and of the
      mean escape time ``sum t / n`` (the censored exponential estimate without a dead time: what
      the lifetime was taken to be before; its ``tau / sqrt(n)`` error assumes std = mean);
    * ``cv``: std / mean of the escaped times (1 for a pure exponential), and Kolmogorov-Smirnov
      p-values of the escaped times against the fitted shifted law and against the pure exponential
      of the same mean (approximate: fitted parameters, censoring ignored).

    NaNs where fewer than two starts escaped.
    """
    from scipy import stats
    from scipy.special import digamma, gammaincinv

    t = np.asarray(times, float).ravel()
    e = np.asarray(escaped, bool).ravel()
    big_n, n = len(t), int(e.sum())
    nan = float("nan")
    out = dict(starts=big_n, escaped=n, t_min=float(t.min()) if big_n else nan, tau=nan,
               tau_interval=[nan, nan], tau_error=nan, ln_tau=nan, ln_tau_error=nan, dead_time=nan,
               dead_time_error=nan, mean_escape=nan, mean_escape_error=nan, cv=nan,
               ks_shifted=nan, ks_exponential=nan)
    if n >= 1:
        out["mean_escape"] = float(t.sum() / n)
    if n < 2:
        return out
    tmin = float(t.min())
    big_s = float(np.sum(t - tmin))
    k = n - 1
    tau = big_s / k
    a = 0.5 * (1.0 - 0.6826894921370859)
    out.update(tau=tau, tau_interval=[big_s / float(gammaincinv(k, 1 - a)), big_s / float(gammaincinv(k, a))],
               ln_tau=float(np.log(big_s) - digamma(k)) if big_s > 0 else nan,
               dead_time=tmin - tau / big_n)
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, big_n, size=(n_boot, big_n))
    tb, eb = t[idx], e[idx]
    nb = eb.sum(axis=1)
    ok = nb >= 2
    tb, nb = tb[ok], nb[ok]
    mb = tb.min(axis=1)
    sb = np.sum(tb - mb[:, None], axis=1)
    good = sb > 0
    if good.sum() >= 10:
        ln_b = np.log(sb[good]) - digamma(nb[good] - 1)
        out["ln_tau_error"] = float(np.std(ln_b, ddof=1))
        out["tau_error"] = tau * out["ln_tau_error"]
        out["dead_time_error"] = float(np.std(mb - sb / (nb - 1) / big_n, ddof=1))
        out["mean_escape_error"] = float(np.std(tb.sum(axis=1) / nb, ddof=1))
    te = t[e]
    out["cv"] = float(te.std(ddof=1) / te.mean()) if te.mean() > 0 else nan
    if tau > 0:
        out["ks_shifted"] = float(stats.kstest(te, "expon", args=(out["dead_time"], tau)).pvalue)
        out["ks_exponential"] = float(stats.kstest(te, "expon", args=(0.0, out["mean_escape"])).pvalue)
    return out


def lifetime_estimate(times, escaped) -> tuple[float, float, int]:
    """Pure exponential (censored) maximum-likelihood mean lifetime: total exposure / escapes, error
    tau/sqrt(n).  Right only without a dead time (see :func:`escape_time_fit`, which the lifetime
    study uses)."""
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
    escape: dict = field(default_factory=dict)

    def table(self) -> str:
        lines = ["   L      V  starts  escaped  dead time(err)      tau(err)   68% interval       "
                 "mean escape(err)  std/mean  KS p shifted/exp"]
        for i, L in enumerate(self.sizes):
            f = self.escape.get(L, {})
            iv = f.get("tau_interval", [float("nan")] * 2)
            lines.append(f"{L:4d} {L ** self.d:6d} {len(self.times[L]):7d} {self.n_escaped[i]:8d} "
                         f"{f.get('dead_time', float('nan')):8.4g}({f.get('dead_time_error', float('nan')):.2g}) "
                         f"{self.tau[i]:8.4g}({self.tau_error[i]:.2g}) [{iv[0]:.3g}, {iv[1]:.3g}]  "
                         f"{f.get('mean_escape', float('nan')):9.4g}({f.get('mean_escape_error', float('nan')):.2g})"
                         f"  {f.get('cv', float('nan')):8.2f}  {f.get('ks_shifted', float('nan')):.2f}/"
                         f"{f.get('ks_exponential', float('nan')):.2f}")
        lines.append("tau: mean escape time after the dead time (shifted exponential); errors: bootstrap over "
                     "starts; fits use ln tau with its bootstrap error")
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
    esc = {L: escape_time_fit(times[L], escaped[L], seed=i) for i, L in enumerate(params["sizes"])}
    tau = np.array([esc[L]["tau"] for L in params["sizes"]])
    err = np.array([esc[L]["tau_error"] for L in params["sizes"]])
    n_esc = np.array([esc[L]["escaped"] for L in params["sizes"]])
    # fit ln tau (digamma-corrected, unbiased) with its bootstrap error: pass tau = e^{ln tau} and
    # err = tau * error so that fit_log_lifetimes sees exactly (ln_tau, ln_tau_error)
    ln_tau = np.array([esc[L]["ln_tau"] for L in params["sizes"]])
    ln_err = np.array([esc[L]["ln_tau_error"] for L in params["sizes"]])
    fits = fit_log_lifetimes(params["sizes"], np.exp(ln_tau), np.exp(ln_tau) * ln_err, d)
    return LifetimeResult(tuple(params["sizes"]), d, {L: np.array(v) for L, v in times.items()},
                          {L: np.array(v) for L, v in escaped.items()}, tau, err, n_esc, fits,
                          time.monotonic() - t0, esc)


def plot_escape_times(result: LifetimeResult, path) -> Path:
    """Survival function of the escape times per size (fraction of starts not yet escaped) against
    the fitted shifted exponential and the pure exponential of the same mean; writes a PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(result.sizes)
    fig, axes = plt.subplots(1, n, figsize=(3.4 * n, 3.4), squeeze=False)
    for ax, L in zip(axes[0], result.sizes):
        t, e = np.asarray(result.times[L], float), np.asarray(result.escaped[L], bool)
        f = result.escape.get(L, {})
        ts = np.sort(t[e])
        surv = 1.0 - np.arange(1, len(ts) + 1) / len(t)
        ax.step(np.concatenate([[0.0], ts]), np.concatenate([[1.0], surv]), where="post", color="k",
                label=f"{len(t)} starts ({len(ts)} escaped)")
        x = np.linspace(0.0, max(float(t.max()), 1.0), 200)
        if np.isfinite(f.get("tau", np.nan)):
            t0, tau = f["dead_time"], f["tau"]
            ax.plot(x, np.where(x < t0, 1.0, np.exp(-(x - t0) / tau)), color="tab:red",
                    label=f"t0 {t0:.3g} + exp(tau {tau:.3g}), KS p {f['ks_shifted']:.2f}")
        if np.isfinite(f.get("mean_escape", np.nan)):
            m = f["mean_escape"]
            ax.plot(x, np.exp(-x / m), color="tab:blue", ls="--",
                    label=f"exp(mean {m:.3g}), KS p {f['ks_exponential']:.2f}")
        ax.set_yscale("log")
        ax.set_ylim(max(0.5 / len(t), 1e-3), 1.1)
        ax.set_xlabel("escape time (sweeps)")
        ax.set_title(f"L = {L}", fontsize=9)
        ax.legend(fontsize=6)
    axes[0][0].set_ylabel("fraction not yet escaped")
    fig.text(0.01, 0.01, "escape-time distributions against the fitted laws. research toy", fontsize=7)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    path = Path(path)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


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

    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {path.parent}: {exc.strerror}") from None
    from sigmasim.storage import atomic_hdf5

    def write(f):
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
        g.create_dataset("area_im_omega_h", data=result.area_im_omega_h)
        g.create_dataset("area_stat_error", data=result.area_stat_error)
        g.create_dataset("jump_up", data=result.jump_up)
        g.create_dataset("jump_down", data=result.jump_down)
        if result.tree:
            g = f.create_group("tree")
            g.create_dataset("theta", data=result.tree["theta"])
            g.create_dataset("im_omega_h", data=result.tree["im_omega_h"])
            g.create_dataset("spinodals", data=result.tree["spinodals"])
            g.create_dataset("first_order", data=result.tree["first_order"])

    # temporary name unique to this process, fsync, rename: never a truncated sweep file
    return atomic_hdf5(path, write, what="sweep file")


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
    ax.set_title(rf"hysteresis sweep, dissipated work per site {s['area']:.3g} $\pm$ {s['area_error']:.2g}",
                 fontsize=10)
    from sigmasim.analysis.report import run_label

    cap = f"{run_label(cfg)}; dtheta={p.step:g}, {p.sweeps_per_step}+{p.thermalize_per_step} sweeps/step, " \
        f"{p.cycles} cycle(s); jumps up {_jump_text(s['jump_up'])}, down {_jump_text(s['jump_down'])}. " \
        "research toy"
    fig.text(0.01, 0.01, cap, fontsize=7, wrap=True)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    path = Path(path)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def _jump_text(v) -> str:
    return "no jump" if not math.isfinite(v) else f"{v:.3f}"


# ---------------------------------------------------------------- commands
def _set_threads(config: RunConfig) -> None:
    from sigmasim.threads import set_threads

    set_threads(config.threads, config.volume // 2, config.nf)


def sweep_command(config_path: str, plot: bool = False, out: str | None = None, overwrite: bool = False,
                  quiet: bool = False) -> int:
    """``sigmasim sweep CONFIG [--plot] [--out FILE] [--overwrite] [--quiet]``: run a hysteresis sweep, write,
    print summary.

    The sweep keeps a checkpoint beside its file (``<file>.checkpoint``) and continues it when run
    again after a crash; an existing sweep file is replaced only with ``overwrite``.
    """
    from sigmasim.progress import Steps
    from sigmasim.storage import lock_path, release_lock, take_lock

    config, raw = load_protocol(config_path, "sweep", SWEEP_SCHEMA)
    params = SweepParams(**raw)
    path = Path(out) if out else config.run_dir / f"{config.name}-sweep.h5"
    if path.suffix != ".h5":
        raise ConfigError(f"--out must end in .h5, got {path}")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {path.parent}: {exc.strerror}") from None
    ckpt = sweep_checkpoint_path(path)
    lock = take_lock(lock_path(path), "sigmasim process", path)
    try:
        if overwrite:
            ckpt.unlink(missing_ok=True)  # start again
        elif path.exists() and not ckpt.exists():
            raise RunFileError(f"refusing to overwrite {path}: it exists (use --overwrite to replace it)")
        _set_threads(config)
        with Steps("sweep", quiet, "theta step") as progress:
            result = run_sweep(config, params, checkpoint=ckpt, progress=progress)
        _finish_sweep(path, result, config, params, plot)
        ckpt.unlink(missing_ok=True)
    finally:
        release_lock(lock)
    return 0


def _finish_sweep(path, result, config, params, plot) -> None:
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
    for d in ("up", "down"):
        v, e = s[f"jump_{d}"], s[f"jump_{d}_error"]
        n = sum(math.isfinite(x) for x in s[f"jump_{d}_per_cycle"])
        txt = (_jump_text(v) if not math.isfinite(v) else
               f"{v:.4f}" + (f" +- {e:.2g}" if math.isfinite(e) else "")
               + f" ({n} of {s['cycles']} cycles; resolution {s['jump_resolution']:.3g})")
        print(f"jump {d:<5}{txt}")
    stat = f" +- {s['area_error_stat']:.2g} (stat)" if math.isfinite(s["area_error_stat"]) else ""
    cyc = f" +- {s['area_error_cycles']:.2g} (cycles)" if math.isfinite(s["area_error_cycles"]) else ""
    print(f"loop area = dissipated work per site, oint <dS/dtheta>/V dtheta: {s['area']:.4g}{cyc}{stat}")
    print(f"  (oint Im omega_h dtheta = {s['area_im_omega_h']:.4g}; equals the work / h for degenerate "
          f"masses h)")
    if plot:
        png = plot_sweep(result, path.with_suffix(".png"))
        print(f"wrote {png}")


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

    if params.write == "yes":
        # one process per protocol; a crashed one continues from its checkpoint when run again
        from sigmasim.storage import check_writable, lock_path, release_lock, take_lock

        ckpt = temper_checkpoint_path(config)
        check_writable(ckpt, 1 << 20)
        lock = take_lock(lock_path(ckpt), "sigmasim process", ckpt.parent)
        try:
            with Steps("temper", quiet, "sweep") as progress:
                res = run_tempering(config, params, checkpoint=ckpt, progress=progress)
        finally:
            release_lock(lock)
    else:
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
    from sigmasim.vacua import branch_range

    census = branch_census(res, config.nf, params.band)
    print(f"branch census of the replicas changed {census.changes} times; in-slot branch changes per slot: "
          + " ".join(str(int(c)) for c in census.slot_changes))
    for i, (t, (occ, err)) in enumerate(zip(res.thetas, branch_populations(res, config.nf, params.band))):
        # branch numbers of sigmasim.vacua (the populations count k modulo nf from 0)
        print(f"slot {i:2d} theta {t:7.4f} scale {scales[i]:.4f}  branch occupation "
              + "  ".join(f"k={kk}: {occ[kk % config.nf]:.3f}+-{err[kk % config.nf]:.3f}"
                          for kk in branch_range(config.nf)))
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

    Prints the table (per size: dead time, tau after it with its bootstrap error and exact interval,
    the mean escape time, std/mean and KS p-values against the shifted and the pure exponential) and
    both fits of ln tau, and writes them as JSON to ``--out`` (default
    ``<run.output>/<name>/<name>-lifetimes.json``; an existing file there is replaced only if this
    command wrote it) with the escape-time distributions against the fitted laws as a PNG beside it
    (needs matplotlib).
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
                "escape": {str(L): v for L, v in res.escape.items()},
                "times": {str(L): v.tolist() for L, v in res.times.items()},
                "escaped": {str(L): v.tolist() for L, v in res.escaped.items()},
                "config": config.to_dict(), "protocol": params}
        try:
            Path(out).parent.mkdir(parents=True, exist_ok=True)
            Path(out).write_text(json.dumps(blob, indent=1, default=list))
        except OSError as exc:
            raise RunFileError(f"cannot write {out}: {exc.strerror}") from None
        print(f"wrote {out}")
        try:
            png = plot_escape_times(res, Path(out).with_suffix(".png"))
            print(f"wrote {png} (escape-time distributions against the fitted laws)")
        except ImportError:
            print("matplotlib is not installed: no escape-time figure (install the plot extra)")
    return 0
