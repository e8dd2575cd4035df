r"""Hysteresis: theta walked up and down one chain without re-thermalising; jumps and loop areas.

The ``[hysteresis]`` table (read under its old name ``[sweep]`` for one more release)
-----------------------------------------------------------------------------------
::

    [hysteresis]
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
                              protocol (JSON of [hysteresis]), summary (JSON: jumps, areas), conventions
    /provenance        attrs: sigmasim, git_commit, python, numpy, numba, h5py, seed (as a run file), created,
                       wall_seconds
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

from sigmasim.config import RunConfig
from sigmasim.errors import ConfigError, RunFileError
from sigmasim import models
from sigmasim.protocols.common import _mean_err, h5_output, split_protocol, sweeps

__all__ = ["SWEEP_FORMAT", "SWEEP_SCHEMA", "SweepParams", "SweepResult", "run_sweep", "theta_derivative",
           "tree_level", "write_sweep", "read_sweep", "plot_sweep", "sweep_checkpoint_path", "load_hysteresis",
           "default_path", "execute"]

SWEEP_FORMAT = "sigmasim-sweep"
#: the table's name before it became ``[hysteresis]`` (read for one more release)
OLD_TABLE = "sweep"

SWEEP_SCHEMA = {
    "start": ("real", 0.0, "theta of the first step (replaces model.theta)"),
    "stop": ("real", 2 * math.pi, "theta of the turning point"),
    "step": ("real>0", 0.2, "theta step"),
    "sweeps_per_step": ("int:1:1000000000", 100, "measured sweeps per theta step"),
    "thermalize_per_step": ("int>=0", 0, "unmeasured sweeps after each theta change"),
    "cycles": ("int:1:10000", 1, "number of up-and-down passes"),
    "band": ("real", 0.5, "hysteresis band of the branch classification, 0 <= band < 1"),
}


@dataclass(frozen=True)
class SweepParams:
    """Validated ``[hysteresis]`` table (see the module notes)."""

    start: float = 0.0
    stop: float = 2 * math.pi
    step: float = 0.2
    sweeps_per_step: int = 100
    thermalize_per_step: int = 0
    cycles: int = 1
    band: float = 0.5

    @classmethod
    def from_dict(cls, d: dict) -> "SweepParams":
        params, _ = split_protocol({"hysteresis": d}, "hysteresis", SWEEP_SCHEMA)
        return cls(**params)

    def __post_init__(self):
        if not self.stop > self.start:
            raise ConfigError(f"hysteresis.stop must be > hysteresis.start, got {self.stop} <= {self.start}")
        if self.step > self.stop - self.start:
            raise ConfigError(f"hysteresis.step = {self.step} is larger than stop - start = {self.stop - self.start}")
        n = self.grid().size
        if n > 100000:
            raise ConfigError(f"the hysteresis protocol has {n} theta steps per pass; at most 100000 allowed")
        if not 0.0 <= self.band < 1.0:
            raise ConfigError(f"hysteresis.band must be in [0, 1), got {self.band}")

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
    from sigmasim.storage import write_tree

    def column(k, v):
        return np.asarray(v, dtype=np.complex128 if k in ("omega_h", "det")
                          else np.float64 if k in ("theta", "action", "action_mass", "action_det", "ds_dtheta")
                          else np.int64)

    write_tree(path, {"@attrs": {"format": SWEEP_CHECKPOINT_FORMAT, "identity": _sweep_identity(config, params),
                                 "next_step": next_step, "wall_seconds": wall},
                      "state": {"@state": sim.state},
                      "series": {k: column(k, v) for k, v in ser.items()}}, what="sweep checkpoint")


def _load_sweep_checkpoint(path: Path, config, params, last_sweep: int, n_plan: int):
    """(state, next_step, series lists, wall seconds) of a checkpoint; one-line errors when damaged."""
    from sigmasim.storage import _check_state_ranges, _check_unitary, read_tree

    try:
        f = read_tree(path, states=("state",))
        attrs = f["@attrs"]
        if attrs.get("format") != SWEEP_CHECKPOINT_FORMAT:
            raise RunFileError(f"{path} is not a sweep checkpoint; remove it")
        if attrs.get("identity") != _sweep_identity(config, params):
            raise RunFileError(f"{path} belongs to another config or [hysteresis] table; remove it or "
                               "restore that config")
        nxt = attrs["next_step"]
        wall = float(attrs["wall_seconds"])
        st = f["state"]["@state"]
        ser = {k: list(f["series"][k]) for k in _SWEEP_KEYS}
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
    if models.get(config.kind).UNITARY:
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
    from sigmasim.chain import Simulation

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
        sim = Simulation(cfg, state)
    else:
        sim = Simulation(cfg)
        for _ in sweeps(sim, cfg.thermalize):
            pass
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
        for _ in sweeps(sim, params.thermalize_per_step):
            pass
        begin = sim.state.sweep
        for r in sweeps(sim, params.sweeps_per_step, lambda sweep: (sweep - begin) % every == 0):
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
        raise ConfigError("hysteresis.sweeps_per_step is smaller than run.measure_every: nothing is measured")
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
        k = getattr(config, models.get(config.kind).ANOMALY)  # kappa (chiral), c (linear)
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


# ---------------------------------------------------------------- file and plot
def write_sweep(path, result: SweepResult) -> Path:
    """Write the whole sweep protocol into one HDF5 file (atomically: temporary file, rename)."""
    import datetime as _dt

    from sigmasim.storage import _provenance, write_tree

    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {path.parent}: {exc.strerror}") from None
    prov = dict(_provenance(result.config))
    prov["created"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    prov["wall_seconds"] = result.wall_seconds
    tree = {"@attrs": {"format": SWEEP_FORMAT, "format_version": 1,
                       "config": json.dumps(result.config.to_dict(), sort_keys=True),
                       "protocol": json.dumps(dataclasses.asdict(result.params), sort_keys=True),
                       "summary": json.dumps(result.summary, sort_keys=True),
                       "conventions": ("omega_h = e^{i theta_m} Omega; branch k: x = (nf arg omega_h - "
                                       "theta)/(2 pi) nearest k with a hysteresis band; research toy")},
            "provenance": {"@attrs": prov},
            "steps": dict(result.steps),
            "series": dict(result.series),
            "cycles": {"area": result.area, "area_im_omega_h": result.area_im_omega_h,
                       "area_stat_error": result.area_stat_error, "jump_up": result.jump_up,
                       "jump_down": result.jump_down}}
    if result.tree:
        tree["tree"] = {k: result.tree[k] for k in ("theta", "im_omega_h", "spinodals", "first_order")}
    # temporary name unique to this process, fsync, rename: never a truncated sweep file
    return write_tree(path, tree, what="sweep file")


def read_sweep(path) -> dict:
    """Read a sweep file: {'config', 'protocol', 'summary', 'steps', 'series', 'cycles', 'tree'}."""
    from sigmasim.storage import read_tree

    path = Path(path)
    if not path.exists():
        raise RunFileError(f"{path} does not exist")
    try:
        f = read_tree(path)
    except OSError:
        raise RunFileError(f"{path} is not a readable HDF5 file") from None
    if f["@attrs"].get("format") != SWEEP_FORMAT:
        raise RunFileError(f"{path} is not a sigmasim sweep file")
    out = {k: json.loads(f["@attrs"][k]) for k in ("config", "protocol", "summary")}
    for g in ("steps", "series", "cycles", "tree"):
        out[g] = {k: v for k, v in f[g].items() if k != "@attrs"} if g in f else {}
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
    from sigmasim.files import atomic_output

    try:  # temporary name, fsync, rename: never a truncated figure
        return atomic_output(Path(path), lambda tmp: fig.savefig(tmp, dpi=110, format="png"), what="figure")
    finally:
        plt.close(fig)


def _jump_text(v) -> str:
    return "no jump" if not math.isfinite(v) else f"{v:.3f}"


def load_hysteresis(path) -> tuple[RunConfig, SweepParams, str]:
    """Read a hysteresis protocol TOML: (run config, params, the table's name in the file).

    The table is ``[hysteresis]``; its old name ``[sweep]`` is still read for one release (the name
    is returned so that the command can say so).
    """
    from sigmasim.config import config_from_dict, read_toml

    raw = read_toml(path)
    table = "hysteresis"
    if isinstance(raw, dict) and OLD_TABLE in raw:
        if "hysteresis" in raw:
            raise ConfigError(f"{path} has both [hysteresis] and its old name [{OLD_TABLE}]; keep [hysteresis]")
        table = OLD_TABLE
    params, rest = split_protocol(raw, table, SWEEP_SCHEMA)
    return config_from_dict(rest), SweepParams(**params), table


def default_path(config: RunConfig) -> Path:
    """Where a hysteresis protocol writes its sweep file by default: ``<output>/<name>/<name>-sweep.h5``."""
    return config.run_dir / f"{config.name}-sweep.h5"


def execute(config: RunConfig, params: SweepParams, path, overwrite: bool = False, progress=None) -> SweepResult:
    """Run a hysteresis protocol into its sweep file ``path`` (the ``hysteresis`` command without output).

    Holds the file's lock for the whole protocol, refuses to replace an existing sweep file unless
    ``overwrite`` (an unfinished one, i.e. with its checkpoint beside it, is continued), keeps the
    checkpoint ``<file>.checkpoint`` while running, adds the tree-level branches (chiral model only)
    and writes the file atomically.
    """
    from sigmasim.protocols.common import _set_threads
    from sigmasim.storage import lock_path, release_lock, take_lock

    path = h5_output(path)
    ckpt = sweep_checkpoint_path(path)
    lock = take_lock(lock_path(path), "sigmasim process", path)
    try:
        if overwrite:
            ckpt.unlink(missing_ok=True)  # start again
        elif path.exists() and not ckpt.exists():
            raise RunFileError(f"refusing to overwrite {path}: it exists (use --overwrite to replace it)")
        _set_threads(config)
        result = run_sweep(config, params, checkpoint=ckpt, progress=progress)
        grid = params.grid()
        try:
            # the tree-level branches of sigmasim.vacua are those of the chiral potential only
            result.tree = (tree_level(config, float(grid[0]), float(grid[-1]))
                           if models.get(config.kind).CHIRAL_POTENTIAL else {})
        except Exception:  # tree-level scan is decoration only
            result.tree = {}
        write_sweep(path, result)
        ckpt.unlink(missing_ok=True)
    finally:
        release_lock(lock)
    return result
