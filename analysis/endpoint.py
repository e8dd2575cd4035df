"""Endpoint in beta of the first-order line at theta = pi, from <q^4>/<q^2>^2 of q = Im omega_h over volumes.

Usage::

    python analysis/endpoint.py RUN.h5 [RUN.h5 ...]      # runs at theta = pi, several L and beta
    python analysis/endpoint.py [--sizes 4 6 8] [--betas 0.70 0.73 ...] [--quick] [--out DIR]

With run files it reads them (same model except L and beta) and prints the cumulant of every run,
the two-peak verdict, the crossing of every pair of sizes and the endpoint estimate (see
:mod:`sigmasim.analysis.endpoint`).  Without, it runs the built-in study first (U(3), d = 3, h = 0.5,
kappa = 2, theta = pi, heatbath + 2 overrelaxation, hot start; run files in DIR/endpoint-runs, an
existing complete file is reused, never overwritten) and then analyses it.  Writes
``endpoint.json`` and ``endpoint.png`` (B against beta per L) to DIR (default ``analysis/output``).
This is a research toy, not a physical prediction.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

from sigmasim.analysis.endpoint import cumulant_crossing, cumulant_points, format_endpoint

MODEL = {"group": "U", "nf": 3, "mass": 0.5, "kappa": 2.0, "theta": float(np.pi)}
UPDATES = {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}]}


def run_study(sizes, betas, measurements, every, thermalize, folder: Path) -> list:
    from sigmasim.chain import Simulation, run_chain
    from sigmasim.config import config_from_dict
    from sigmasim.storage import RunWriter, open_run

    paths = []
    for L in sizes:
        for b in betas:
            cfg = config_from_dict({
                "name": f"endpoint-L{L}-b{b:.4f}", "seed": 11 + L, "lattice": {"shape": [L, L, L]},
                "model": dict(MODEL, beta=float(b)), "updates": UPDATES,
                "run": {"thermalize": thermalize, "measurements": measurements, "measure_every": every,
                        "start": "hot", "output": str(folder), "threads": 1},
            })
            path = cfg.run_file
            if path.exists():
                if open_run(path).status != "complete":
                    raise SystemExit(f"{path} exists and is not complete: remove it or finish it")
            else:
                t0 = time.monotonic()
                cfg.run_dir.mkdir(parents=True, exist_ok=True)
                run_chain(Simulation(cfg), (RunWriter(cfg, path),))
                print(f"L = {L}, beta = {b:.4f}: {time.monotonic() - t0:.0f} s", flush=True)
            paths.append(path)
    return paths


def plot(res, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.5, 4.3))
    for L in sorted({p.L for p in res.points}):
        pts = sorted((p for p in res.points if p.L == L), key=lambda p: p.beta)
        ax.errorbar([p.beta for p in pts], [p.binder for p in pts], yerr=[p.binder_error for p in pts],
                    fmt="o-", capsize=3, label=f"L = {L}")
    if np.isfinite(res.beta_c):
        ax.axvspan(res.beta_c - res.beta_c_error, res.beta_c + res.beta_c_error, color="0.85",
                   label=f"crossing {res.beta_c:.3f} +- {res.beta_c_error:.2g}")
    ax.axhline(1, color="0.5", lw=0.8, ls=":")
    ax.axhline(3, color="0.5", lw=0.8, ls=":")
    ax.set_xlabel(r"$\beta$")
    ax.set_ylabel(r"$\langle q^4\rangle / \langle q^2\rangle^2$, $q = \mathrm{Im}\,\omega_h$")
    ax.legend(fontsize=8)
    ax.set_title("theta = pi: 1 = two vacua, 3 = one (crossover). research toy", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("runs", nargs="*")
    ap.add_argument("--sizes", type=int, nargs="+", default=[4, 6, 8, 10])
    ap.add_argument("--betas", type=float, nargs="+", default=[0.70, 0.73, 0.76, 0.79, 0.82, 0.85])
    ap.add_argument("--measurements", type=int, default=3000)
    ap.add_argument("--every", type=int, default=5)
    ap.add_argument("--thermalize", type=int, default=2000)
    ap.add_argument("--discard", type=float, default=0.1)
    ap.add_argument("--quick", action="store_true", help="L = 4, 6 and 500 measurements (a minute)")
    ap.add_argument("--out", default="analysis/output")
    a = ap.parse_args(argv)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    if a.runs:
        paths = a.runs
    else:
        if a.quick:
            a.sizes, a.measurements, a.thermalize = [4, 6], 500, 500
        paths = run_study(a.sizes, a.betas, a.measurements, a.every, a.thermalize, out / "endpoint-runs")
    res = cumulant_crossing(cumulant_points(paths, discard=a.discard))
    print(format_endpoint(res))
    (out / "endpoint.json").write_text(json.dumps({
        "points": [vars(p) for p in res.points], "crossings": [vars(c) for c in res.crossings],
        "beta_c": res.beta_c, "beta_c_error": res.beta_c_error, "note": res.note,
        "model": MODEL}, indent=1, default=float))
    plot(res, out / "endpoint.png")
    print(f"wrote {out / 'endpoint.json'} and {out / 'endpoint.png'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
