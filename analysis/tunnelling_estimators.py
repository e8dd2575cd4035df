"""Bias and coverage of the tunnelling-rate estimators on two-state series with a known rate.

Usage::

    python analysis/tunnelling_estimators.py [--reps 2000] [--length 1000]

For expected event counts mu = 2, 3, 6, 20, 100 it draws ``reps`` telegraph omega_h series (U(2) at
theta = pi, switching with probability p = mu / (length - 1) per sweep) and prints, per mu: the mean
of ``1 / mean(completed dwell)`` over p and how often it is undefined (the former headline), the mean
of ``events / exposure`` over p (the headline), the coverage of its exact 68.27 % interval, the mean
and width of the asymmetric pulls (error on the side of the truth), the coverage of the 95 % upper
limit, and the pooled censored dwell estimate against the mean of completed dwells, both over 1/p.
This is a research toy, not a physical prediction.
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

from sigmasim.analysis.tunnelling import tunnelling_analysis


def replicas(reps, n, p, rng, noise=0.1):
    switch = rng.random((reps, n)) < p
    switch[:, 0] = False
    k = np.cumsum(switch, axis=1) % 2
    return 0.8 * np.exp(1j * ((np.pi + 2 * np.pi * k) / 2 + rng.normal(0.0, noise, (reps, n))))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=2000)
    ap.add_argument("--length", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=1)
    a = ap.parse_args(argv)
    rng = np.random.default_rng(a.seed)
    print(f"{a.reps} replicas of {a.length} sweeps per row")
    print(f"{'mu':>5} {'old <r>/p':>10} {'undef':>6} {'new <r>/p':>10} {'cover68':>8} {'pull mean':>10} "
          f"{'pull sd':>8} {'cover95UL':>10} {'tau cens/true':>14} {'tau compl/true':>15}")
    for mu in (2, 3, 6, 20, 100):
        p = mu / (a.length - 1)
        res = [tunnelling_analysis(om, np.pi, 2) for om in replicas(a.reps, a.length, p, rng)]
        old = np.array([1 / np.mean([w for _, w in r.completed]) if r.completed else np.nan for r in res])
        r = np.array([x.rate for x in res])
        lo = np.array([x.rate_low for x in res])
        hi = np.array([x.rate_high for x in res])
        up = np.array([x.rate_upper_95 for x in res])
        pull = (r - p) / np.where(r < p, hi - r, r - lo)
        n = np.array([x.fit.n for x in res])
        expo = np.array([x.fit.tau_mle * x.fit.n if x.fit.n else x.total_time for x in res])
        comp = np.concatenate([[w for _, w in x.completed] for x in res] + [[]])
        print(f"{mu:>5} {np.nanmean(old) / p:>10.3f} {np.mean(np.isnan(old)):>6.3f} {r.mean() / p:>10.3f} "
              f"{np.mean((lo <= p) & (p <= hi)):>8.3f} {pull.mean():>10.3f} {pull.std(ddof=1):>8.3f} "
              f"{np.mean(p <= up):>10.3f} {expo.sum() / n.sum() * p:>14.3f} "
              f"{(comp.mean() * p if comp.size else np.nan):>15.3f}", flush=True)
    print("old: 1 / mean completed dwell (undefined without two events); new: events / exposure with the "
          "Garwood interval. Research toy, not a physical prediction.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
