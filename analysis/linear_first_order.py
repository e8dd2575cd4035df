"""Study: the theta = pi first-order line of the nf = 3 linear sigma model against the det coupling c.

Scenario (our own): degenerate nf = 3 linear model, d = 3, k = 1, mu2 = -2, lambda1 = 0.02,
lambda2 = 0.1, h = 0.1, theta = pi - delta and pi + delta (delta = 0.3 and 0.1),
c = 0, 0.002, 0.005, 0.02, 0.1.  Every run starts in its own tree-level vacuum
(:func:`sigmasim.models.linear.tree_level_minimum`, constant field) and measures
Im omega_h = Im(e^{i theta_m} Tr Phi / nf).  CP (theta -> 2 pi - theta, Phi -> Phi^*) maps the
two angles onto each other with Im omega_h -> -Im omega_h, so the jump across pi is

    J(c) = Im omega_h(pi - delta) - Im omega_h(pi + delta)    (error: the two Gamma errors in quadrature).

At c = 0 the anomalous rotation Phi -> e^{i alpha} Phi removes theta from the action (the mass term
depends on e^{i theta_m} Phi only), so omega_h has a theta-independent distribution, symmetric under
Phi -> Phi^* in the frame where H is real: Im omega_h = 0 and J(0) = 0.  With c > 0 theta is
physical.  At tree level (column "tree J") a small c (0.002) gives Im omega_h linear in delta (a
smooth crossover through pi, J -> 0 as delta -> 0), while from c of about 0.005 on the det term's
branches give Im omega_h = +-a(c) with a(c) nearly delta-independent: a jump, first order, whose
size grows with c -- the first-order line theta = pi starts at a c-dependent endpoint.  Comparing
delta = 0.3 and 0.1 in the Monte Carlo shows the same.

Writes analysis/output/linear_first_order.md (the folder carries a ``.gitignore`` with ``*``) and
prints the run table.  Usage: ``python analysis/linear_first_order.py [--quick] [--threads N]``
(a few minutes on 2 cores; ``--quick``: small lattice, few samples).  Research toy.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

OUT = Path(__file__).resolve().parent / "output"

MODEL = dict(kind="linear", nf=3, kinetic=1.0, mu2=-2.0, lambda1=0.02, lambda2=0.1, mass=0.1,
             theta_placement="mass")
C_VALUES = (0.0, 0.002, 0.005, 0.02, 0.1)
DELTAS = (0.3, 0.1)
SCHEDULE = [{"update": "metropolis"}, {"update": "overrelax"}]


def output_dir() -> Path:
    OUT.mkdir(parents=True, exist_ok=True)
    ignore = OUT / ".gitignore"
    if not ignore.exists():
        ignore.write_text("*\n")
    return OUT


def make_config(c, theta, shape, n_meas, seed, thermalize=100):
    from sigmasim.config import config_from_dict

    return config_from_dict({
        "name": "first-order", "seed": seed, "lattice": {"shape": list(shape)},
        "model": {**MODEL, "c": c, "theta": theta},
        "updates": {"schedule": SCHEDULE, "metropolis_hits": 2, "proposal_mu2": 0.05},
        "run": {"thermalize": thermalize, "measurements": n_meas, "start": "cold"},
    })


def tree_im_omega_h(cfg):
    from sigmasim.models.linear import tree_level_minimum

    phi, _ = tree_level_minimum(cfg)
    return phi, float((np.exp(1j * cfg.theta_angles[0]) * np.trace(phi) / cfg.nf).imag)


def run_point(c, theta, shape=(8, 8, 8), n_meas=600, seed=21, thermalize=100):
    """One run started in its tree-level vacuum; returns a dict of Gamma-method results."""
    from sigmasim.analysis.gamma import gamma_analysis
    from sigmasim.chain import MemorySink, run_chain
    from sigmasim.chain import Simulation

    cfg = make_config(c, theta, shape, n_meas, seed, thermalize)
    phi, tree = tree_im_omega_h(cfg)
    sim = Simulation(cfg)
    sim.state.re[:] = phi.real.ravel()[:, None]
    sim.state.im[:] = phi.imag.ravel()[:, None]
    sink = MemorySink()
    run_chain(sim, (sink,))
    r = sink.arrays()
    im = gamma_analysis(r["omega_h"].imag)
    re = gamma_analysis(r["omega_h"].real)
    return {"c": c, "theta": theta, "tree_im": tree, "im": im.value, "im_err": im.error, "tau": im.tau_int,
            "re": re.value, "re_err": re.error, "phi2": float(np.mean(r["phi2"])),
            "acc": float(np.mean(r["accept_metropolis"]))}


def jump(c, delta, **kw):
    lo = run_point(c, np.pi - delta, **kw)
    hi = run_point(c, np.pi + delta, **kw)
    j = lo["im"] - hi["im"]
    err = float(np.hypot(lo["im_err"], hi["im_err"]))
    return {"c": c, "delta": delta, "lo": lo, "hi": hi, "jump": j, "jump_err": err,
            "tree_jump": lo["tree_im"] - hi["tree_im"]}


def table(rows, shape, n_meas) -> str:
    lines = [f"nf = 3 linear model, shape {'x'.join(map(str, shape))}, {n_meas} measurements per run, "
             f"mu2 = {MODEL['mu2']}, lambda1 = {MODEL['lambda1']}, lambda2 = {MODEL['lambda2']}, h = {MODEL['mass']}, "
             "k = 1; starts in the tree-level vacua; errors: Gamma method.", "",
             "| c | delta | Im omega_h(pi-delta) | Im omega_h(pi+delta) | jump J | J / err | tree J | tau_int |",
             "| --- | --- | --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        lo, hi = r["lo"], r["hi"]
        lines.append(f"| {r['c']:.3f} | {r['delta']:.2f} | {lo['im']:+.5f}({lo['im_err']:.5f}) | "
                     f"{hi['im']:+.5f}({hi['im_err']:.5f}) | {r['jump']:+.5f}({r['jump_err']:.5f}) | "
                     f"{r['jump'] / r['jump_err']:+.1f} | {r['tree_jump']:+.5f} | {max(lo['tau'], hi['tau']):.1f} |")
    return "\n".join(lines) + "\n"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--threads", type=int, default=0)
    args = ap.parse_args(argv)
    import numba

    if args.threads:
        numba.set_num_threads(args.threads)
    shape = (6, 6, 6) if args.quick else (8, 8, 8)
    n_meas = 200 if args.quick else 1500
    t0 = time.time()
    rows = [jump(c, d, shape=shape, n_meas=n_meas) for c in C_VALUES for d in DELTAS]
    text = table(rows, shape, n_meas)
    print(text)
    name = "linear_first_order_quick.md" if args.quick else "linear_first_order.md"
    (output_dir() / name).write_text("# theta = pi jump of Im omega_h, nf = 3 linear sigma model\n\n" + text)
    print(f"wrote {OUT / name} ({time.time() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
