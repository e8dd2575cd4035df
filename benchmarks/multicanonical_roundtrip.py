"""CPU time per round trip between the two theta = pi vacua: multicanonical vs the plain chain.

U(3), d = 3, h 0.5, kappa 2, theta pi, beta 0.76 (the tunnelling study's couplings).  For each L:

* plain chain: CPU seconds per sweep measured here (Metropolis + one overrelaxation pass, the
  same sweep as the biased chain), times the expected sweeps per round trip 2 / rate(L) with
  rate(L) = A exp(-b L^2) fitted to the measured tunnelling rates 0.038, 0.005, 0.0004 per sweep
  at L = 4, 6, 8 (b = 0.098; these rates are quoted from the tunnelling study, not re-measured
  here);
* multicanonical: Wang-Landau weight building, then a frozen production run of exp(-S - W(x)) in
  x = Im omega_h (or, --variable arg_omega_h, the phase of omega_h); CPU seconds of the
  production run per completed round trip x <= -c -> x >= c -> x <= -c (c = --cut).

Prints one table row per L.  Single thread; run it on an idle machine for clean numbers:

    NUMBA_NUM_THREADS=1 python benchmarks/multicanonical_roundtrip.py --sizes 8 --production 20000
    NUMBA_NUM_THREADS=1 python benchmarks/multicanonical_roundtrip.py --sizes 8 --variable arg_omega_h \
        --range -3.14159 3.14159 --bins 36 --wl-flatness 0.3 --wl-chunks 3 --wl-sweeps 1000 --cut 0.5

Research toy numbers, not physical predictions.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from sigmasim.chain import Simulation
from sigmasim.config import config_from_dict
from sigmasim.analysis.profile import round_trips
from sigmasim.protocols.multicanonical import BiasedChain, Weight, run_biased, wang_landau

RATES = {4: 0.038, 6: 0.005, 8: 0.0004}  # tunnelling events per sweep of the plain chain (quoted)


def plain_rate_fit():
    """(A, b) of rate = A exp(-b L^2), least squares in ln rate over RATES."""
    L = np.array(sorted(RATES), dtype=float)
    y = np.log([RATES[int(v)] for v in L])
    b, lna = np.polyfit(L ** 2, y, 1)
    return math.exp(lna), -b


def config(L, seed=1):
    return config_from_dict({
        "name": f"muca-bench-{L}", "seed": seed, "lattice": {"shape": [L, L, L]},
        "model": {"group": "U", "nf": 3, "beta": 0.76, "mass": 0.5, "kappa": 2.0, "theta": math.pi},
        "updates": {"schedule": [{"update": "metropolis", "repeat": 1}, {"update": "overrelax", "repeat": 1}]},
        "run": {"start": "hot", "thermalize": 0, "measurements": 1, "threads": 1}})


def plain_seconds_per_sweep(cfg, sweeps):
    sim = Simulation(cfg)
    sim.sweep()  # compile
    t = time.process_time()
    for _ in range(sweeps):
        sim.sweep()
    return (time.process_time() - t) / sweeps


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[8])
    ap.add_argument("--variable", default="im_omega_h", choices=["im_omega_h", "arg_omega_h"])
    ap.add_argument("--range", type=float, nargs=2, default=[-0.6, 0.6])
    ap.add_argument("--bins", type=int, default=40)
    ap.add_argument("--cut", type=float, default=0.2, help="round-trip regions x <= -cut and x >= cut")
    ap.add_argument("--thermalize", type=int, default=200)
    ap.add_argument("--wl-iterations", type=int, default=8)
    ap.add_argument("--wl-sweeps", type=int, default=2000)
    ap.add_argument("--wl-start", type=float, default=1.0)
    ap.add_argument("--wl-flatness", type=float, default=0.0, help="repeat an iteration until min/mean reaches it")
    ap.add_argument("--wl-chunks", type=int, default=1, help="at most this many chunks per iteration")
    ap.add_argument("--production", type=int, default=20000)
    ap.add_argument("--plain-sweeps", type=int, default=50)
    args = ap.parse_args(argv)
    a, b = plain_rate_fit()
    print(f"plain tunnelling rate fit: {a:.4g} exp(-{b:.4f} L^2) per sweep (rates quoted at L = 4, 6, 8)")
    print(f"{'L':>3} {'plain s/sweep':>13} {'plain s/round trip':>18} {'muca s/sweep':>12} {'WL s':>7} "
          f"{'round trips':>11} {'muca s/round trip':>17} {'speed-up':>9} {'tau_rt sweeps':>13}")
    for L in args.sizes:
        cfg = config(L)
        plain = plain_seconds_per_sweep(cfg, args.plain_sweeps)
        plain_rt = plain * 2.0 / (a * math.exp(-b * L * L))
        chain = BiasedChain(cfg, Weight.flat(*args.range, args.bins), variable=args.variable, overrelax=1)
        t = time.process_time()
        for _ in range(args.thermalize):
            chain.sweeps(1)
            if chain.state.sweep % cfg.tune_every == 0:
                chain.tune()
        wl = wang_landau(chain, args.wl_iterations, args.wl_sweeps, args.wl_start, args.wl_flatness,
                         args.wl_chunks)
        wl_seconds = time.process_time() - t
        run = run_biased(cfg, chain.frozen_weight(), args.production, variable=args.variable, state=chain.state)
        n = round_trips(run.x, -args.cut, args.cut).round_trips
        muca_sweep = run.seconds / args.production
        muca_rt = run.seconds / n if n else float("inf")
        tau = args.production / n if n else float("inf")
        print(f"{L:3d} {plain:13.4g} {plain_rt:18.4g} {muca_sweep:12.4g} {wl_seconds:7.1f} {n:11d} "
              f"{muca_rt:17.4g} {plain_rt / muca_rt:9.3g} {tau:13.4g}", flush=True)
        hist = np.histogram(run.x, bins=args.bins, range=tuple(args.range))[0]
        print(f"    Wang-Landau sweeps {[w['sweeps'] for w in wl]}, flatness "
              f"{[round(w['flatness'], 2) for w in wl]}")
        print(f"    production histogram of x over {args.range}: {hist.tolist()}")


if __name__ == "__main__":
    main()
