"""Tempering at theta = pi: a plain chain, two theta ladders and a mass ladder, side by side.

Usage::

    python analysis/tempering.py [--measurements N] [--ladder-measurements M] [--seeds K] [--out DIR]

The model (also ``runs/temper-u3.toml``): U(3), d = 3, 4^3, beta = 2, h = 0.5, kappa = 2,
theta = pi in the mass phase, heatbath + 2 overrelaxation, cold start (every replica in branch 0),
1000 thermalisation sweeps.  At theta = pi the branches k = 0 and k = 2 are degenerate (CP), so the
exact population of each is 1/2.  Four runs:

1. the plain chain at pi, N measured sweeps, and again for as many sweeps as the whole mass ladder
   (7 (N + 1000)): the same cost;
2. the theta ladder of the earlier example (11 slots, pi - 1.3 .. pi + 1.3), M measured sweeps;
3. a theta ladder over [0, 2 pi], past both tree-level spinodals (1.45 and 4.84 for these
   couplings, ``sigmasim vacua``), dense near pi (17 slots), M measured sweeps;
4. a mass ladder at theta = pi: h = 0.5 * (1, 0.8, 0.6, 0.4, 0.24, 0.12, 0), N measured sweeps.

For each it prints the population of branch 0 at the theta = pi, h = 0.5 slot with its error (Gamma
method with a window of at least the round-trip time, :func:`sigmasim.protocols.branch_populations`),
how often the replicas' branch census changed and where replicas changed branch
(:func:`sigmasim.protocols.branch_census`), round trips and swap acceptances.  ``--seeds K`` adds K
independent mass ladders of N/4 measurements and compares the spread of their populations with their
errors.  Writes ``tempering.json`` and ``tempering.png`` (branch index of the pi slot over the run,
and the census of the ladders) to DIR (default ``analysis/output``).  About three minutes of one core.

This is a research toy, not a physical prediction.
"""

from __future__ import annotations

import argparse
import json
import math
import time
from pathlib import Path

import numpy as np

from sigmasim.analysis.tunnelling import branch_coordinate, branch_index
from sigmasim.chain import simulate
from sigmasim.config import config_from_dict
from sigmasim.protocols.tempering import (TemperParams, _population_error, branch_census, branch_populations,
                                          run_tempering)

PI = math.pi
BASE = {
    "name": "tempering-study",
    "seed": 5,
    "lattice": {"shape": [4, 4, 4]},
    "model": {"group": "U", "nf": 3, "beta": 2.0, "mass": 0.5, "kappa": 2.0, "theta": PI,
              "theta_placement": "mass"},
    "updates": {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}]},
    "run": {"thermalize": 1000, "start": "cold", "threads": 1},
}
OLD_THETAS = tuple(PI + d for d in (-1.3, -0.7, -0.35, -0.15, -0.05, 0.0, 0.05, 0.15, 0.35, 0.7, 1.3))
WIDE_THETAS = tuple(PI + d for d in (-PI, -2.2, -1.5, -0.9, -0.5, -0.25, -0.1, -0.04, 0.0,
                                     0.04, 0.1, 0.25, 0.5, 0.9, 1.5, 2.2, PI))
MASS_SCALES = (1.0, 0.8, 0.6, 0.4, 0.24, 0.12, 0.0)


def config(measurements: int, seed: int = 5, name: str = "tempering-study"):
    d = json.loads(json.dumps(BASE))
    d["run"]["measurements"] = measurements
    d["seed"], d["name"] = seed, name
    return config_from_dict(d)


def plain(n: int, label: str = "plain chain at pi") -> dict:
    cfg = config(n)
    t0 = time.monotonic()
    s = simulate(cfg)
    idx = branch_index(branch_coordinate(s["omega_h"], PI, 3), 3, 0.5)
    m, e, tau = _population_error((idx == 0).astype(float), 0)
    return {"run": label, "slots": 1, "measurements": n, "p0": m, "p0_error": e,
            "tau_int": tau, "events": int(np.count_nonzero(np.diff(idx))), "index": idx,
            "wall_seconds": time.monotonic() - t0}


def ladder(label: str, n: int, params: TemperParams, seed: int = 5) -> dict:
    cfg = config(n, seed)
    res = run_tempering(cfg, params, write=False)
    scales = res.mass_scales
    slot = int(np.argmin(np.abs(res.thetas - PI) + np.abs(scales - 1.0)))   # theta = pi, full mass
    occ, err = branch_populations(res, 3)[slot]
    census = branch_census(res, 3)
    idx = branch_index(branch_coordinate(res.series[slot]["omega_h"], PI, 3), 3, 0.5)
    rt = res.round_trips
    return {"run": label, "slots": len(res.thetas), "measurements": n, "slot": slot,
            "p0": float(occ[0]), "p0_error": float(err[0]), "p2": float(occ[2]),
            "census_changes": census.changes, "slot_changes": census.slot_changes.tolist(),
            "round_trips": len(rt), "round_trip_mean": float(np.mean(rt)) if rt else None,
            "acceptance": [round(float(a), 3) for a in res.acceptance],
            "thetas": [float(t) for t in res.thetas], "mass_scales": [float(s) for s in scales],
            "index": idx, "census": census.counts[:, 0], "wall_seconds": res.wall_seconds}


def show(r: dict) -> None:
    print(f"\n== {r['run']}: {r['slots']} slot(s), {r['measurements']} measured sweeps each, "
          f"{r['wall_seconds']:.0f} s")
    print(f"   branch 0 at theta = pi: {r['p0']:.3f} +- {r['p0_error']:.3f}")
    if "events" in r:
        print(f"   branch changes of the chain: {r['events']}")
        return
    print(f"   census changes {r['census_changes']}; in-slot branch changes per slot {r['slot_changes']}")
    rtm = f", mean {r['round_trip_mean']:.0f} sweeps" if r["round_trips"] else ""
    print(f"   round trips {r['round_trips']}{rtm}")
    print(f"   swap acceptance {r['acceptance']}")


def plot(results, path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(len(results), 1, figsize=(9, 1.9 * len(results)), sharex=False)
    for ax, r in zip(axes, results):
        ax.plot(r["index"], lw=0.6, color="tab:blue", label="branch index of the pi slot")
        if "census" in r:
            ax.plot(r["census"] / r["slots"] * 2, lw=0.8, color="tab:red",
                    label="2 x fraction of replicas in branch 0")
        ax.set_ylim(-0.2, 2.2)
        ax.set_yticks([0, 1, 2])
        ax.set_title(f"{r['run']}: P(k=0) = {r['p0']:.3f} +- {r['p0_error']:.3f}", fontsize=9)
        ax.legend(fontsize=7, loc="center right")
    axes[-1].set_xlabel("measurement")
    fig.suptitle("U(3) 4^3, beta 2, h 0.5, kappa 2, theta = pi (research toy)", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--measurements", type=int, default=20000, help="plain chain and mass ladder")
    ap.add_argument("--ladder-measurements", type=int, default=6000, help="the two theta ladders")
    ap.add_argument("--seeds", type=int, default=0, help="extra independent mass ladders")
    ap.add_argument("--out", default="analysis/output")
    args = ap.parse_args(argv)
    import numba

    numba.set_num_threads(1)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    n, m = args.measurements, args.ladder_measurements
    same_cost = len(MASS_SCALES) * (n + BASE["run"]["thermalize"]) - BASE["run"]["thermalize"]
    results = [plain(n), plain(same_cost, "plain chain at pi, as many sweeps as the mass ladder"),
               ladder("theta ladder pi +- 1.3", m, TemperParams(thetas=OLD_THETAS)),
               ladder("theta ladder 0 .. 2 pi", m, TemperParams(thetas=WIDE_THETAS)),
               ladder("mass ladder at pi, h 0.5 .. 0", n,
                      TemperParams(thetas=(PI,), mass_scales=MASS_SCALES))]
    for r in results:
        show(r)
    summary = {"model": BASE, "runs": [{k: v for k, v in r.items() if k not in ("index", "census")}
                                       for r in results]}
    if args.seeds:
        reps = [ladder(f"mass ladder seed {s}", max(n // 4, 500),
                       TemperParams(thetas=(PI,), mass_scales=MASS_SCALES), seed=s)
                for s in range(100, 100 + args.seeds)]
        p = np.array([r["p0"] for r in reps])
        e = np.array([r["p0_error"] for r in reps])
        print(f"\n== {args.seeds} independent mass ladders of {max(n // 4, 500)} measured sweeps: "
              f"P(k=0) = {' '.join(f'{x:.3f}' for x in p)}")
        print(f"   spread (std) {p.std(ddof=1):.3f}; mean quoted error {e.mean():.3f}; "
              f"mean {p.mean():.3f} +- {p.std(ddof=1) / math.sqrt(len(p)):.3f}")
        summary["seeds"] = {"p0": p.tolist(), "p0_error": e.tolist(), "spread": float(p.std(ddof=1))}
    (out / "tempering.json").write_text(json.dumps(summary, indent=1))
    print(f"\nwrote {out / 'tempering.json'} and {plot(results, out / 'tempering.png')}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
