#!/usr/bin/env python3
"""Speed benchmark of the linear sigma model kernels (model.kind = "linear").

    python benchmarks/bench_linear.py [--quick] [--threads N]

Measures, through the public path (config_from_dict + Simulation.sweep, after
thermalisation and Metropolis step tuning), site-hits per second of

  linear model, nf = 3, d = 3, L = 16, k = 1, mu2 = -5, lambda1 = 0.05, lambda2 = 0.25, c = 0.3,
  h = 0.1, theta = 3.0 in the mass phase (the couplings of runs/example-linear-nf3.toml):
  Metropolis (2 hits per visit; each hit is a box step plus a rotation step), heatbath
  (Gaussian independence proposal + accept/reject), overrelaxation (reflection + accept/reject);

on 1 thread and on all threads, in the output style of benchmarks/bench.py (whose helpers
for the foreign load and the blocked errors it reuses).  A site-hit is one visit of one site
times the hits per visit (Metropolis: 2, the others: 1).  One JSON line per measurement goes to
benchmarks/results/bench-linear-<time>.jsonl.  Only ratios measured in one run mean anything.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results"
sys.path.insert(0, str(ROOT))

from benchmarks.bench import foreign_load, time_sweeps  # noqa: E402

MODEL = dict(kind="linear", nf=3, kinetic=1.0, mu2=-5.0, lambda1=0.05, lambda2=0.25, c=0.3, mass=0.1,
             theta=3.0, theta_placement="mass")
NAME = "lin3_d3"
SHAPE = [16, 16, 16]
HITS = 2


def config(algo: str, thermalize: int, seed: int = 11):
    from sigmasim.config import config_from_dict

    return config_from_dict({
        "name": "bench-linear", "seed": seed, "lattice": {"shape": SHAPE}, "model": dict(MODEL),
        "updates": {"schedule": [{"update": algo}], "metropolis_hits": HITS, "initial_step": 0.3,
                    "tune_every": 10, "target_acceptance": 0.5, "proposal_mu2": 0.5},
        "run": {"thermalize": thermalize, "measurements": 1, "start": "cold"},
    })


def run_linear(algo: str, threads: int, seconds: float, thermalize: int) -> dict:
    return time_sweeps(config(algo, thermalize), NAME, algo, algo, threads, seconds, thermalize,
                       min_sweeps=10)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="shorter runs")
    ap.add_argument("--threads", type=int, default=0, help="the 'all threads' count (default: all cores)")
    args = ap.parse_args(argv)

    import numba

    nall = args.threads or numba.config.NUMBA_NUM_THREADS
    secs = 1.0 if args.quick else 3.0
    therm = 30 if args.quick else 60
    RESULTS.mkdir(parents=True, exist_ok=True)
    out_path = RESULTS / time.strftime("bench-linear-%Y%m%d-%H%M%S.jsonl")

    def emit(d):
        with open(out_path, "a") as f:
            f.write(json.dumps(d) + "\n")

    def show(d):
        flag = "  [contended]" if d.get("contended") else ""
        print(f"  {d['model']:7s} {d['algorithm']:11s} {d['implementation']:16s} th={d['threads']} "
              f"{d['site_hits_per_second']:10.3e} hits/s  acc {d['acceptance']:.3f}  "
              f"S/V {d['action_per_site']:.5f}+-{d['action_per_site_err']:.5f}  "
              f"RePhi/nf {d['retr_over_nf']:.5f}+-{d['retr_over_nf_err']:.5f}  "
              f"load {d['foreign_load_before']:.2f}{flag}", flush=True)

    print(f"sigmasim linear-model benchmark  (numba {numba.__version__}, {os.cpu_count()} cpus, "
          f"threading layer {numba.config.THREADING_LAYER}, all threads = {nall})")
    print(f"foreign load now: {foreign_load(1.0):.2f} (busy fraction of all cores)")
    # warm the JIT cache so that no compile lands in a timed run
    for algo in ("metropolis", "heatbath", "overrelax"):
        from sigmasim.chain import Simulation

        sim = Simulation(config(algo, 0))
        sim.sweep()
        sim.measure()
    res = {}
    print(f"== {NAME} (L = 16, d = 3, nf = 3; Metropolis {HITS} hits per visit)")
    for algo in ("metropolis", "heatbath", "overrelax"):
        for th in sorted({1, nall}):
            d = run_linear(algo, th, secs, therm)
            emit(d)
            show(d)
            res[(algo, th)] = d
    print("== ratios (same run)")
    for algo in ("metropolis", "heatbath", "overrelax"):
        one = res[(algo, 1)]["site_hits_per_second"]
        if nall > 1:
            many = res[(algo, nall)]["site_hits_per_second"]
            print(f"  {NAME} {algo:11s} numba {nall} threads / 1 thread: {many / one:5.2f}x")
    print("== physics sanity (S/V of the three updates, 1 thread; the same distribution: z = difference / error)")
    m = res[("metropolis", 1)]
    for algo in ("heatbath", "overrelax"):
        o = res[(algo, 1)]
        err = (m["action_per_site_err"] ** 2 + o["action_per_site_err"] ** 2) ** 0.5
        z = (o["action_per_site"] - m["action_per_site"]) / err if err > 0 else float("nan")
        print(f"  {algo:10s} - metropolis: {o['action_per_site'] - m['action_per_site']:+.5f} (z = {z:+.1f}; "
              "short runs, overrelaxation alone is not ergodic)")
    print(f"results: {out_path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
