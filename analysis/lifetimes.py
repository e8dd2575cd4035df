"""Finite-volume lifetimes of the metastable theta branch: ln tau against L^(d-1) and L^d.

Usage::

    python analysis/lifetimes.py [CONFIG.toml] [--out DIR] [--workers N]

CONFIG is a run TOML with a ``[lifetimes]`` table (see :mod:`sigmasim.protocols`); without one the
built-in study below runs (U(3), d = 3, beta = 1, h = 0.5, kappa = 2, theta = 4.0, started in branch
0, which is metastable past theta = pi; L = 4, 6, 8, 10; 64 starts per size).  Escape times are
fitted by a shifted exponential (a relaxation dead time, then exponential escape by nucleation; see
:func:`sigmasim.protocols.escape_time_fit`); tau is the mean escape time after the dead time, with
bootstrap errors over the starts.  Writes ``lifetimes.json``, ``lifetimes.png`` (ln tau with errors
against both powers of L, with the two straight-line fits) and ``lifetimes-escape.png`` (the
escape-time distribution of every size against the fitted shifted exponential and the pure
exponential) to DIR (default ``analysis/out``) and prints the table.  This is a research toy, not a physical
prediction.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

from sigmasim.config import config_from_dict
from sigmasim.cli import format_lifetimes
from sigmasim.protocols.lifetimes import _lifetime_params, load_lifetimes, plot_escape_times, run_lifetimes

DEFAULT = {
    "name": "lifetimes-u3",
    "seed": 2,
    "lattice": {"shape": [4, 4, 4]},
    "model": {"group": "U", "nf": 3, "beta": 1.0, "mass": 0.5, "kappa": 2.0, "theta": 4.0},
    "updates": {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}]},
    "run": {"thermalize": 0, "start": "branch", "start_branch": 0},
    "lifetimes": {"sizes": [4, 6, 8, 10], "starts": 64, "max_sweeps": 20000, "stay": 10},
}


def plot(res, config, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(10, 4.3))
    sizes = np.array(res.sizes, float)
    y = np.array([res.escape[L]["ln_tau"] for L in res.sizes])          # digamma-corrected ln tau
    sy = np.array([res.escape[L]["ln_tau_error"] for L in res.sizes])   # bootstrap
    for ax, name in zip(axes, ("surface", "volume")):
        f = res.fits[name]
        x = sizes ** f["power"]
        ax.errorbar(x, y, yerr=sy, fmt="o", color="tab:blue", capsize=3,
                    label="Monte Carlo (tau after the dead time, bootstrap)")
        xx = np.linspace(0, x.max() * 1.05, 50)
        ax.plot(xx, f["intercept"] + f["slope"] * xx, color="tab:red",
                label=f"fit b = {f['slope']:.3g} +- {f['slope_error']:.2g}, chi2/dof = {f['chi2']:.2g}/{f['dof']}")
        ax.set_xlabel(f"$L^{f['power']}$")
        ax.set_ylabel(r"$\ln \tau$ (sweeps)")
        ax.legend(fontsize=8)
        ax.set_title(f"ln tau vs L^{f['power']} ({name})", fontsize=10)
    cap = (f"U({config.nf}) d={res.d}, beta={config.beta:g}, h={config.mass[0]:g}, kappa={config.kappa:g}, "
           f"theta={config.theta:g}, start branch {config.start_branch}; escape = branch index leaves for good. "
           "research toy")
    fig.text(0.01, 0.01, cap, fontsize=7)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("config", nargs="?")
    ap.add_argument("--out", default="analysis/out")
    ap.add_argument("--workers", type=int, default=0)
    a = ap.parse_args(argv)
    if a.config:
        config, params = load_lifetimes(a.config)
    else:
        raw = dict(DEFAULT)
        params = _lifetime_params(raw.pop("lifetimes"))
        config = config_from_dict(raw)
    if a.workers:
        params["workers"] = a.workers
    res = run_lifetimes(config, params)
    print(format_lifetimes(res))
    print(f"{res.wall_seconds:.1f} s")
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "lifetimes.json").write_text(json.dumps({
        "sizes": list(res.sizes), "d": res.d, "tau": res.tau.tolist(), "tau_error": res.tau_error.tolist(),
        "n_escaped": res.n_escaped.tolist(), "fits": res.fits, "config": config.to_dict(),
        "escape": {str(L): v for L, v in res.escape.items()},
        "times": {str(L): v.tolist() for L, v in res.times.items()},
        "escaped": {str(L): v.tolist() for L, v in res.escaped.items()},
        "protocol": {k: (list(v) if isinstance(v, tuple) else v) for k, v in params.items()}}, indent=1))
    plot(res, config, out / "lifetimes.png")
    plot_escape_times(res, out / "lifetimes-escape.png")
    print(f"wrote {out / 'lifetimes.json'}, {out / 'lifetimes.png'} and {out / 'lifetimes-escape.png'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
