#!/usr/bin/env python3
"""Where a second numba thread starts to pay: 1 vs 2 threads over lattice sizes, U(1) and U(3).

    python benchmarks/threads_crossover.py [--seconds S] [--models U1,U3] [--results DIR]

For each model (d = 3, the default update schedule, the mass phase) and lattice size the
script times one chain in alternating blocks of sweeps on 1 and on 2 threads (ABBA order, the
chain does not depend on the thread count, so both see the same configurations and, block by
block, the same machine) and prints the speed-up t(1)/t(2) against the sites per colour.
The default ``run.threads = 0`` uses one thread below ``sigmasim.threads.CROSSOVER_SITES``
sites per colour; this script is how that number was chosen.  The load average before and
after is printed: on a machine whose other core is busy the 2-thread time is meaningless
(a parallel region waits for a descheduled thread), so measure on an idle machine.
One JSON line per point goes to benchmarks/results/.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results"
sys.path.insert(0, str(ROOT))

MODELS = {  # the default schedule (heatbath + overrelaxation) on the benchmark couplings
    "U1": dict(nf=1, beta=0.45, mass=0.05, kappa=0.0, theta=3.0, sizes=[8, 12, 16, 20, 24, 32, 40]),
    "U3": dict(nf=3, beta=0.5, mass=0.1, kappa=0.2, theta=3.0, sizes=[4, 6, 8, 12, 16, 20]),
}


def _config(model: str, L: int):
    from sigmasim.config import config_from_dict

    m = MODELS[model]
    return config_from_dict({
        "name": "crossover", "seed": 5, "lattice": {"shape": [L, L, L]},
        "model": {k: m[k] for k in ("nf", "beta", "mass", "kappa", "theta")},
        "run": {"thermalize": 20, "measurements": 1, "start": "cold"},
    })


def speedup(model: str, L: int, seconds: float, block_seconds: float = 0.05) -> dict:
    import numba

    from sigmasim.chain import make_simulation

    cfg = _config(model, L)
    sim = make_simulation(cfg)
    for _ in range(5):
        numba.set_num_threads(2)
        sim.sweep()
        numba.set_num_threads(1)
        sim.sweep()
    t0 = time.perf_counter()
    for _ in range(5):
        sim.sweep()
    per_block = max(3, int(block_seconds / ((time.perf_counter() - t0) / 5)))
    res = {1: [], 2: []}
    t_start = time.perf_counter()
    k = 0
    while k < 8 or time.perf_counter() - t_start < seconds:
        for th in ((1, 2) if k % 2 == 0 else (2, 1)):
            numba.set_num_threads(th)
            sim.sweep()  # the first sweep after a switch is not timed
            t0 = time.perf_counter()
            for _ in range(per_block):
                sim.sweep()
            res[th].append((time.perf_counter() - t0) / per_block)
        k += 1
    one, two = float(np.median(res[1])), float(np.median(res[2]))
    return {"measurement": "threads_crossover", "model": model, "lattice": f"{L}^3",
            "sites_per_colour": cfg.volume // 2, "us_per_sweep_1": one * 1e6, "us_per_sweep_2": two * 1e6,
            "speedup": one / two, "blocks": len(res[1])}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seconds", type=float, default=2.0, help="seconds per lattice size (default 2)")
    ap.add_argument("--models", default="U1,U3", help="comma-separated: U1, U3 (default both)")
    ap.add_argument("--results", type=Path, default=RESULTS, help="folder for the JSON lines")
    args = ap.parse_args(argv)
    models = args.models.split(",")
    bad = [m for m in models if m not in MODELS]
    if bad:
        print(f"threads_crossover: unknown model {bad[0]!r} (choose from {', '.join(MODELS)})", file=sys.stderr)
        return 2
    import numba

    if numba.config.NUMBA_NUM_THREADS < 2:
        print("threads_crossover: needs at least 2 CPUs (and NUMBA_NUM_THREADS unset or >= 2)")
        return 1
    args.results.mkdir(parents=True, exist_ok=True)
    out_path = args.results / time.strftime("threads-crossover-%Y%m%d-%H%M%S.jsonl")
    load0 = os.getloadavg()
    print(f"load average before: {load0[0]:.2f} {load0[1]:.2f} {load0[2]:.2f} on {os.cpu_count()} CPUs")
    print(f"{'model':<6}{'lattice':>8}{'sites/colour':>14}{'us/sweep 1':>12}{'us/sweep 2':>12}{'speed-up':>10}")
    for model in models:
        for L in MODELS[model]["sizes"]:
            d = speedup(model, L, args.seconds)
            d["loadavg_1min"] = os.getloadavg()[0]
            with open(out_path, "a") as f:
                f.write(json.dumps(d) + "\n")
            print(f"{model:<6}{d['lattice']:>8}{d['sites_per_colour']:>14}{d['us_per_sweep_1']:>12.0f}"
                  f"{d['us_per_sweep_2']:>12.0f}{d['speedup']:>10.2f}", flush=True)
    load1 = os.getloadavg()
    print(f"load average after: {load1[0]:.2f} {load1[1]:.2f} {load1[2]:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
