#!/usr/bin/env python3
"""CPU cost of one statistically independent measurement of |Omega|, per update schedule.

    python benchmarks/independent_cost.py [--quick] [--budget SECONDS] [--rel-error R]
                                          [--size L] [--models U1_d3,U3_d3] [--schedules ...]
                                          [--results DIR]

A faster sweep with a longer autocorrelation gains nothing: what a user pays for is
CPU time per *independent* sample.  For the two benchmark models of benchmarks/bench.py

  (a) U1_d3: U(1), d = 3, L = 32, beta = 0.45, h = 0.05, theta = 3.0;
  (b) U3_d3: U(3), d = 3, L = 16, beta = 0.5, h = 0.1, kappa = 0.2, theta = 3.0;
  (c) U2_d3: U(2), the couplings of (b);

and each update schedule (tuned Metropolis with bench.py's hits per visit; 1 heatbath +
3 overrelaxation; 1 heatbath + 1 overrelaxation) this script runs one thermalised chain
through the public Simulation API, measures |Omega| = |sum_x Tr U_x| / (Nf V) after every
sweep, and reports

  * CPU seconds per sweep (time.process_time around Simulation.sweep only, one numba
    thread; the measurement is timed separately and shown in its own column),
  * tau_int of |Omega| in sweeps, with its error, from sigmasim.analysis.gamma_analysis,
  * the cost of one independent measurement, 2 tau_int x seconds per sweep, with its error;
  * the tunnelling time: sweeps per change of the branch of omega_h (the slow mode of a
    theta run; sigmasim.analysis.tunnelling_analysis with the hysteresis band 0.5, total
    sweeps / number of events) with its exact 68 % interval (the Garwood interval of the
    Poisson rate, sigmasim.analysis.tunnelling.poisson_interval, inverted), and its cost in
    CPU seconds.  It is the slow mode: in the nf = 2, 3 benchmark models a chain of a few
    thousand sweeps sees 0-6 changes, so the column is a rough figure; without a change it is
    the 95 % lower limit ("> T": T = sweeps / 3.0, poisson_upper_limit inverted; no change in
    N sweeps alone does not bound the mean time by N).  A row is marked "not separated" when
    the analysis' bimodality test finds no separated vacua in the histogram of omega_h (the
    band crossings are then not tunnelling events); nf = 1 has one branch ("-").

Convention: gamma_analysis defines tau_int = 1/2 + sum_{t>=1} rho(t), so that
var(mean) = 2 tau_int var / N (uncorrelated data: tau_int = 1/2).  N samples are then worth
N / (2 tau_int) independent ones, and one independent sample costs 2 tau_int sweeps.

Chain length: each chain runs until the Gamma-method error of tau_int is below --rel-error
(default 10 %, which takes N of order 1000-2000 tau_int) or its share of the CPU budget
(--budget: a chain may use what is left of it minus half a fair share for each chain still
to come) is spent; a chain that stops on the budget is flagged.  The leading part of each
chain is checked with sigmasim.analysis.thermalisation_cut and dropped if it drifts.

CPU seconds (not wall time) are quoted because the machines are shared: process time does
not count the time the process waits for a core, though it still moves with cache and
memory-bandwidth contention.  NUMBA_NUM_THREADS is set to 1 before numba is imported, so
no idle worker threads add to the process time.  One JSON line per chain goes to
benchmarks/results/independent-cost-<time>.jsonl.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
import warnings
from pathlib import Path

os.environ["NUMBA_NUM_THREADS"] = "1"  # before numba is imported anywhere (see the docstring)

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.bench import (  # noqa: E402
    MODELS,
    RESULTS,
    blocked_mean,
    config,
    contended,
    foreign_load,
)

#: update schedules compared (one sweep each); names as printed
SCHEDULES = {
    "metropolis": [{"update": "metropolis", "repeat": 1}],
    "hb1+or3": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 3}],
    "hb1+or1": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 1}],
}

#: thermalisation sweeps (Metropolis: its step is tuned every 10 of them, then frozen)
THERMALIZE = {"U1_d3": 1000, "U3_d3": 300, "U2_d3": 300}


def make_config(model: str, schedule: str, thermalize: int, size: int | None = None,
                seed: int = 11):
    """bench.py's config of ``model`` with the sweep ``schedule`` (optionally extent ``size``)."""
    from sigmasim.config import config_from_dict

    d = config(model, "metropolis", thermalize, seed).to_dict()
    d["name"] = "independent-cost"
    d["updates"]["schedule"] = [dict(s) for s in SCHEDULES[schedule]]
    if size is not None:
        d["lattice"]["shape"] = [size] * len(d["lattice"]["shape"])
    return config_from_dict(d)


def _tau(series: np.ndarray):
    """Gamma analysis of ``series``; also says whether the automatic window was found."""
    from sigmasim.analysis import gamma_analysis

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        g = gamma_analysis(series)
    return g, not any(issubclass(w.category, RuntimeWarning) for w in caught)


def tunnelling_times(omega_h, theta: float, nf: int) -> dict:
    """Sweeps per change of the branch of ``omega_h`` (one measurement per sweep) with its errors.

    sigmasim.analysis.tunnelling_analysis (hysteresis band 0.5) counts the events; the mean time
    between them is total sweeps / events, its 68 % interval the exact (Garwood) Poisson interval
    of the rate inverted, and without an event the 95 % lower limit is the inverted upper limit of
    the rate (sweeps / 3.0).  Computed also where the package's bimodality test finds the vacua not
    separated (``tunnelling_vacua_separated`` False: the band crossings are then not tunnelling),
    so that the row shows what was counted.  NaN for nf = 1 (one branch).
    """
    from sigmasim.analysis.tunnelling import poisson_interval, poisson_upper_limit, tunnelling_analysis

    tun = tunnelling_analysis(np.asarray(omega_h), theta, nf, band=0.5)
    n, total = tun.n_events, tun.total_time
    per = total / n if n else float("inf")
    rate_lo, rate_hi = poisson_interval(n, total)
    rate_up95 = poisson_upper_limit(n, total)
    low = 1.0 / rate_hi if rate_hi > 0 else float("nan")
    high = 1.0 / rate_lo if rate_lo > 0 else float("inf")
    lower95 = 1.0 / rate_up95 if rate_up95 > 0 else float("nan")
    if nf == 1:
        per = low = high = lower95 = float("nan")  # one branch: nothing to tunnel to
    return {"tunnelling_events": n, "sweeps_per_tunnelling": per, "sweeps_per_tunnelling_low": low,
            "sweeps_per_tunnelling_high": high, "sweeps_per_tunnelling_lower_95": lower95,
            "tunnelling_vacua_separated": bool(tun.counted)}


def measure_cost(model: str, schedule: str, budget: float, rel_error: float, thermalize: int,
                 size: int | None = None, min_sweeps: int = 500) -> dict:
    """One chain of ``model`` with ``schedule``: CPU time per sweep and tau_int of |Omega|.

    Thermalises, then sweeps and measures after every sweep, in chunks, until the relative
    error of tau_int is at most ``rel_error`` (and at least ``min_sweeps`` sweeps ran) or
    ``budget`` CPU seconds (thermalisation included) are spent.
    """
    from sigmasim.analysis import thermalisation_cut
    from sigmasim.chain import make_simulation

    cfg = make_config(model, schedule, thermalize, size)
    sim = make_simulation(cfg)
    load = foreign_load()
    c0 = time.process_time()
    for _ in range(thermalize):
        sim.sweep()
    t_therm = time.process_time() - c0
    sim.measure()  # empties the acceptance windows of the thermalisation
    absomega, omega_h, t_sweep, t_meas, acc = [], [], [], 0.0, []
    acc_key = "accept_metropolis" if schedule == "metropolis" else "accept_phase"
    done_reason = "budget"
    chunk = 100
    while True:
        for _ in range(chunk):
            a = time.process_time()
            sim.sweep()
            b = time.process_time()
            rec = sim.measure()
            t_meas += time.process_time() - b
            t_sweep.append(b - a)
            absomega.append(abs(rec["omega"]))
            omega_h.append(rec["omega_h"])
            acc.append(rec[acc_key])
        n = len(absomega)
        g, window_ok = _tau(np.asarray(absomega))
        if n >= min_sweeps and window_ok and g.tau_int_error <= rel_error * g.tau_int:
            done_reason = "target"
            break
        if t_therm + sum(t_sweep) + t_meas >= budget:
            break
        chunk = max(100, n // 5)

    x = np.asarray(absomega)
    ts = np.asarray(t_sweep)
    th = thermalisation_cut(x)
    cut = th.cut
    if cut:
        x, ts = x[cut:], ts[cut:]
        g, window_ok = _tau(x)
    tun = tunnelling_times(np.asarray(omega_h[cut:]), cfg.theta, cfg.nf)
    s_sweep, s_sweep_err = blocked_mean(ts)
    s_meas = t_meas / len(absomega)
    cost = 2.0 * g.tau_int * s_sweep
    rel = math.hypot(g.tau_int_error / g.tau_int, s_sweep_err / s_sweep)
    acc = np.asarray(acc, dtype=float)
    return {
        "model": model, "schedule": schedule, "lattice": "x".join(map(str, cfg.shape)),
        "threads": 1, "thermalize": thermalize, "thermalize_cpu_seconds": t_therm,
        "sweeps": int(x.size), "cut": int(cut), "thermalised": bool(th.thermalised),
        "stopped_on": done_reason, "window_found": window_ok,
        "cpu_seconds_per_sweep": s_sweep, "cpu_seconds_per_sweep_err": s_sweep_err,
        "cpu_seconds_measure": s_meas,
        "abs_omega": g.value, "abs_omega_err": g.error,
        "tau_int": g.tau_int, "tau_int_err": g.tau_int_error, "window": g.window,
        "cpu_seconds_per_independent": cost, "cpu_seconds_per_independent_err": cost * rel,
        "cpu_seconds_per_independent_measuring_every_sweep": 2.0 * g.tau_int * (s_sweep + s_meas),
        **tun, "cpu_seconds_per_tunnelling": tun["sweeps_per_tunnelling"] * s_sweep,
        "acceptance": float(np.nanmean(acc)) if np.isfinite(acc).any() else float("nan"),
        "step": sim.state.step_size, "foreign_load_before": load,
        "contended": contended(load, 1),
    }


def _tunnel_text(d) -> str:
    """The two tunnelling columns of the table: '-' for one branch; without an event the 95 % lower
    limit ('> T'); else sweeps / events [68 % interval] (events), 'not separated' where the
    bimodality test finds no separated vacua."""
    per = d["sweeps_per_tunnelling"]
    if math.isnan(per):
        return "- | -"
    sep = "" if d.get("tunnelling_vacua_separated", True) else ", not separated"
    if math.isinf(per):
        low = d["sweeps_per_tunnelling_lower_95"]
        return f"> {low:.3g} (0 in {d['sweeps']}{sep}) | > {low * d['cpu_seconds_per_sweep']:.2e}"
    return (f"{per:.3g} [{d['sweeps_per_tunnelling_low']:.2g}, {d['sweeps_per_tunnelling_high']:.2g}] "
            f"({d['tunnelling_events']}{sep}) | {d['cpu_seconds_per_tunnelling']:.2e}")


def warm_jit(models, schedules) -> None:
    """Load (or compile) every kernel on a tiny lattice, so no compile lands in a timed sweep."""
    from sigmasim.chain import make_simulation

    for model in models:
        for schedule in schedules:
            sim = make_simulation(make_config(model, schedule, 0, size=4))
            sim.sweep()
            sim.measure()


class _BadArgument(Exception):
    pass


def _names(text: str, valid, what: str) -> list:
    names = [s.strip() for s in text.split(",") if s.strip()]
    for s in names:
        if s not in valid:
            raise _BadArgument(f"unknown {what} {s!r}; choose from {', '.join(valid)}")
    if not names:
        raise _BadArgument(f"no {what} given")
    return names


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true",
                    help="about half a minute: 25 %% target error of tau_int, "
                         "a quarter of the thermalisation")
    ap.add_argument("--budget", type=float, default=None,
                    help="CPU seconds for all chains together (default 260, --quick 40)")
    ap.add_argument("--rel-error", type=float, default=None,
                    help="target relative error of tau_int (default 0.10, --quick 0.25)")
    ap.add_argument("--size", type=int, default=None,
                    help="override the lattice extent (all directions)")
    ap.add_argument("--models", default="U1_d3,U3_d3",
                    help=f"comma-separated subset of the models {', '.join(MODELS)} (default U1_d3,U3_d3)")
    ap.add_argument("--schedules", default=",".join(SCHEDULES),
                    help="comma-separated subset of the schedules")
    ap.add_argument("--results", type=Path, default=RESULTS,
                    help="folder for the JSON lines (default benchmarks/results)")
    args = ap.parse_args(argv)
    budget = args.budget if args.budget is not None else (40.0 if args.quick else 260.0)
    rel_error = args.rel_error if args.rel_error is not None else (0.25 if args.quick else 0.10)
    try:
        models = _names(args.models, MODELS, "model")
        schedules = _names(args.schedules, SCHEDULES, "schedule")
        if not (budget > 0 and math.isfinite(budget)):
            raise _BadArgument(f"--budget must be a positive number of seconds, got {budget}")
        if not 0 < rel_error < 1:
            raise _BadArgument(f"--rel-error must be between 0 and 1, got {rel_error}")
        if args.size is not None and (args.size < 4 or args.size % 2):
            raise _BadArgument(f"--size must be even and >= 4, got {args.size}")
    except _BadArgument as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2

    import numba

    numba.set_num_threads(1)
    print(f"cost of one independent |Omega| measurement  (numba {numba.__version__}, 1 thread, "
          f"CPU seconds from time.process_time; target error of tau_int {rel_error:.0%}, "
          f"budget {budget:.0f} CPU s)")
    print("convention: tau_int = 1/2 + sum_t rho(t) (var(mean) = 2 tau_int var / N); "
          "one independent sample costs 2 tau_int sweeps")
    warm_jit(models, schedules)

    try:
        args.results.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        print(f"error: cannot create the results folder {args.results}: {exc.strerror}",
              file=sys.stderr)
        return 2
    out_path = args.results / time.strftime("independent-cost-%Y%m%d-%H%M%S.jsonl")
    rows = []
    jobs = [(m, s) for m in models for s in schedules]
    spent = 0.0
    reserve = budget / (2 * len(jobs))
    for i, (model, schedule) in enumerate(jobs):
        # this chain may use what is left minus a reserve for each chain still to come, so the
        # total stays within the budget and time a quick chain leaves over goes to a slow one
        share = budget - spent - reserve * (len(jobs) - i - 1)
        therm = THERMALIZE[model] // (4 if args.quick else 1)
        c0 = time.process_time()
        d = measure_cost(model, schedule, share, rel_error, therm, args.size)
        spent += time.process_time() - c0
        rows.append(d)
        with open(out_path, "a") as f:
            f.write(json.dumps(d) + "\n")
        notes = []
        if d["stopped_on"] == "budget":
            notes.append("budget spent before the target error")
        if not d["window_found"]:
            notes.append("Gamma window not found: chain too short")
        if d["cut"]:
            notes.append(f"dropped {d['cut']} drifting sweeps")
        if not d["thermalised"]:
            notes.append("NOT THERMALISED")
        if d["contended"]:
            notes.append("contended")
        acc = "-" if math.isnan(d["acceptance"]) else f"{d['acceptance']:.3f}"
        note = f"  [{'; '.join(notes)}]" if notes else ""
        print(f"  {model} {schedule:10s} {d['lattice']:9s} {d['sweeps']:7d} sweeps  "
              f"|Omega| {d['abs_omega']:.5f}+-{d['abs_omega_err']:.5f}  acc {acc}  "
              f"load {d['foreign_load_before']:.2f}{note}", flush=True)

    print()
    print("| model | update | CPU s / sweep | tau_int of abs(Omega) (sweeps) "
          "| CPU s / independent sample | same, measuring every sweep | sweeps "
          "| sweeps per tunnelling [68 % interval] (events) | CPU s per tunnelling |")
    print("| --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for d in rows:
        flag = "" if d["stopped_on"] == "target" and d["window_found"] else " *"
        print(f"| {d['model']} {d['lattice']} | {d['schedule']} "
              f"| {d['cpu_seconds_per_sweep']:.2e} "
              f"| {d['tau_int']:.2f} +- {d['tau_int_err']:.2f} "
              f"| {d['cpu_seconds_per_independent']:.2e} "
              f"+- {d['cpu_seconds_per_independent_err']:.1e}{flag} "
              f"| {d['cpu_seconds_per_independent_measuring_every_sweep']:.2e} | {d['sweeps']} "
              f"| {_tunnel_text(d)} |")
    meas = ", ".join(
        f"{m} {np.mean([d['cpu_seconds_measure'] for d in rows if d['model'] == m]):.1e} s"
        for m in models)
    print("(CPU s / independent sample = 2 tau_int x CPU s per sweep of the updates alone; the "
          f"next column adds one Simulation.measure per sweep, which costs {meas}.  * stopped on "
          "the CPU budget before the target error of tau_int.  Tunnelling: changes of the branch of "
          "omega_h, hysteresis band 0.5; sweeps per tunnelling = sweeps / events, its exact 68 % "
          "Poisson interval; '> T': no change, 95 % lower limit T = sweeps / 3.0.)")
    # physics sanity: every schedule samples the same distribution
    for m in models:
        same = [d for d in rows if d["model"] == m]
        ref = same[0]
        parts = []
        for d in same[1:]:
            z = ((d["abs_omega"] - ref["abs_omega"])
                 / math.hypot(d["abs_omega_err"], ref["abs_omega_err"]))
            parts.append(f"{d['schedule']} {z:+.1f}" + ("  <-- CHECK" if abs(z) > 4 else ""))
        if parts:
            print(f"{m}: |Omega| against {ref['schedule']}, z = {', '.join(parts)}")
    print(f"CPU seconds spent on the chains: {spent:.0f}; results: {out_path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
