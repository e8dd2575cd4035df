r"""Replica exchange over a ladder of (theta, mass scale) slots, and the replicas' branch census.

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
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from sigmasim.config import RunConfig
from sigmasim.errors import ConfigError, RunFileError
from sigmasim import models
from sigmasim.protocols.common import _mean_err, split_protocol, sweeps

__all__ = ["TEMPER_SCHEMA", "CENSUS_MIN_CHANGES", "TemperParams", "TemperResult", "run_tempering",
           "replica_configs", "branch_populations", "branch_census", "BranchCensus", "temper_checkpoint_path",
           "load_tempering", "execute"]

TEMPER_SCHEMA = {
    "thetas": ("thetas", None, "theta of each slot: an increasing list of >= 2 numbers; with mass_scales "
               "one theta per slot (repeats allowed) or a single theta for every slot"),
    "mass_scales": ("scales", None, "optional: one factor >= 0 per slot on model.mass (slot k simulates "
                    "mass_scales[k] * mass); the ladder is then the path of (theta, scale) pairs"),
    "swap_every": ("int:1:1000000", 1, "sweeps between swap attempts"),
    "band": ("real", 0.5, "hysteresis band of the branch classification, 0 <= band < 1"),
    "write": ("choice:yes,no", "yes", "write one run file per theta (no: in memory only)"),
}

#: ``sigmasim temper`` warns when the replicas' branch census changed fewer times than this.
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
    c = getattr(cfg, models.get(cfg.kind).ANOMALY)  # kappa (chiral), c (linear)
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
    from sigmasim.storage import write_tree

    tree = {"@attrs": {"format": TEMPER_CHECKPOINT_FORMAT, "identity": _temper_identity(config, params),
                       "sweep": sweep, "attempt": attempt, "wall_seconds": wall},
            "tried": tried, "accepted": acc, "labels": labels,
            "history": np.array(history, dtype=np.int64),
            "measured": np.array(measured, dtype=np.int64).reshape(-1, len(sims)),
            "attempt_sweeps": np.array(attempt_sweeps, dtype=np.int64)}
    for i, (sim, sk) in enumerate(zip(sims, sinks)):
        recs = sk[0].records
        tree[f"slot{i}"] = {"@state": sim.state, "@attrs": {"n_records": len(recs)},
                            "records": {k.replace("/", "%2F"): np.array([x[k] for x in recs])
                                        for k in (recs[0] if recs else {})}}
    write_tree(path, tree, what="tempering checkpoint")


def _load_temper_checkpoint(path, config, params, configs, total) -> dict:
    from sigmasim.storage import _check_state_ranges, _check_unitary, read_tree

    def damaged(why=""):
        return RunFileError(f"{path} is a damaged tempering checkpoint{why}; remove it and the slot files "
                            "to start again")

    n_rep = len(configs)
    try:
        f = read_tree(path, states=tuple(f"slot{i}" for i in range(n_rep)))
        attrs = f["@attrs"]
        if attrs.get("format") != TEMPER_CHECKPOINT_FORMAT:
            raise RunFileError(f"{path} is not a tempering checkpoint; remove it")
        if attrs.get("identity") != _temper_identity(config, params):
            raise RunFileError(f"{path} belongs to another config or [tempering] table; remove it "
                               "(and the slot files) or restore that config")
        out = {"sweep": int(attrs["sweep"]), "attempt": int(attrs["attempt"]),
               "wall": float(attrs["wall_seconds"]),
               "tried": np.asarray(f["tried"], dtype=np.int64),
               "acc": np.asarray(f["accepted"], dtype=np.int64),
               "labels": np.asarray(f["labels"], dtype=np.int64),
               "history": [np.asarray(h, dtype=np.int64) for h in f["history"]],
               "measured": [np.asarray(m, dtype=np.int64) for m in f["measured"]],
               "attempt_sweeps": [int(x) for x in f["attempt_sweeps"]],
               "states": [], "records": []}
        for i in range(n_rep):
            g = f[f"slot{i}"]
            st = g["@state"]
            n = int(g["@attrs"]["n_records"])
            cols = {k.replace("%2F", "/"): d for k, d in g["records"].items() if k != "@attrs"}
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
        if models.get(c.kind).UNITARY:
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
    from sigmasim.chain import MemorySink, Simulation

    t0 = time.monotonic()
    write = (params.write == "yes") if write is None else write
    configs = replica_configs(config, params.thetas, params.mass_scales)
    sims = [Simulation(c) for c in configs]
    sinks = []
    files = []
    checkpoint = Path(checkpoint) if (checkpoint is not None and write) else None
    n_rep = len(sims)
    total = sims[0].total_sweeps
    resumed = None
    if checkpoint is not None and checkpoint.exists():
        resumed = _load_temper_checkpoint(checkpoint, config, params, configs, total)
        sims = [Simulation(c, st) for c, st in zip(configs, resumed["states"])]
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
    therm, m_every = config.thermalize, config.measure_every

    def measure_due(sweep):  # every slot measures after the same sweeps
        past = sweep - therm
        return past > 0 and past % m_every == 0

    last_saved = time.monotonic()
    for sweep in range(first, total + 1):
        if resumed is None or sweep > first:
            for sim, sk in zip(sims, sinks):
                # one sweep of each slot through chain.iterate: its field is checked finite before
                # and after, so neither a checkpoint nor a slot file ever holds a non-finite field
                for rec in sweeps(sim, 1, measure_due):
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
    at_sweeps = np.array(attempt_sweeps)
    scales = np.ones(n_rep) if params.mass_scales is None else np.array(params.mass_scales)
    return TemperResult(np.array(params.thetas), [sk[0].arrays() for sk in sinks], tried, acc,
                        replica_at, at_sweeps, _round_trips(replica_at, at_sweeps), files,
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


def load_tempering(path) -> tuple[RunConfig, TemperParams]:
    """Read a ``[tempering]`` protocol TOML: (run config, validated params)."""
    from sigmasim.config import config_from_dict, read_toml

    path = Path(path)
    raw = read_toml(path)
    if not isinstance(raw.get("tempering"), dict):
        raise ConfigError(f"{path} has no [tempering] table")
    rest = dict(raw)
    params = TemperParams(**_temper_params(rest.pop("tempering")))
    return config_from_dict(rest), params


def execute(config: RunConfig, params: TemperParams, progress=None) -> TemperResult:
    """Run a tempering protocol (the ``temper`` command without output).

    With ``write = 'yes'`` one process holds the protocol's lock for its whole life and a crashed
    protocol continues from its checkpoint when run again.
    """
    from sigmasim.protocols.common import _set_threads

    _set_threads(config)
    if params.write != "yes":
        return run_tempering(config, params, progress=progress)
    from sigmasim.storage import check_writable, lock_path, release_lock, take_lock

    ckpt = temper_checkpoint_path(config)
    check_writable(ckpt, 1 << 20)
    lock = take_lock(lock_path(ckpt), "sigmasim process", ckpt.parent)
    try:
        return run_tempering(config, params, checkpoint=ckpt, progress=progress)
    finally:
        release_lock(lock)
