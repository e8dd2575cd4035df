"""Study: pion and eta' effective masses in three spatial volumes.

Scenario (our own): U(2), beta = 4, h = 0.2, kappa = 0.1, theta = 0, time
extent 16, spatial volumes 4^2, 6^2, 8^2; heatbath + 3 overrelaxation sweeps.
At this coupling the tree-level pion (m^2 = h/beta = 0.05, a m ~ 0.22) has
m L ~ 0.9 .. 1.8, so finite-volume effects of the interacting theory may be
visible; at tree level (free field) the zero-momentum correlator does not
depend on L at all, so any L dependence is an interaction effect.

Writes into analysis/output/ (ignored by git: the folder carries its own
``.gitignore`` with ``*``, created if missing):

* volumes.csv, volumes.md  -- fitted masses per volume and channel;
* volumes.png, volumes.pdf -- cosh effective masses with the fitted bands.

Usage: ``python analysis/volumes.py [--quick] [--threads N]`` (about a
minute on 2 cores; ``--quick``: seconds, too few samples for physics).  Uses
only public functions of sigmasim.  Research toy, not a physical prediction.

``--quick`` writes ``volumes_quick.*`` instead, so it never overwrites the
real results.
"""

from __future__ import annotations

import argparse
import csv
import time
from pathlib import Path

import numpy as np

OUT = Path(__file__).resolve().parent / "output"
CHANNELS = ("pion", "eta_prime")


def output_dir() -> Path:
    OUT.mkdir(parents=True, exist_ok=True)
    ignore = OUT / ".gitignore"
    if not ignore.exists():
        ignore.write_text("*\n")
    return OUT


def measure(beta, h, kappa, shape, n_meas, seed):
    from sigmasim.analysis.report import analyze_data
    from sigmasim.chain import simulate
    from sigmasim.config import config_from_dict

    cfg = config_from_dict({
        "name": "volumes-" + "x".join(map(str, shape)), "seed": seed,
        "lattice": {"shape": list(shape)},
        "model": {"group": "U", "nf": 2, "beta": beta, "mass": h, "kappa": kappa},
        "updates": {"schedule": [{"update": "heatbath", "repeat": 1},
                                 {"update": "overrelax", "repeat": 3}]},
        "run": {"thermalize": 50 if n_meas < 1000 else 200, "measurements": n_meas,
                "start": "cold"},
    })
    d = simulate(cfg)
    return cfg, analyze_data(d, d, cfg)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="seconds: short runs, few samples")
    ap.add_argument("--threads", type=int, default=1, help="numba threads (default 1)")
    args = ap.parse_args(argv)
    import numba

    numba.set_num_threads(max(1, min(args.threads, numba.config.NUMBA_NUM_THREADS)))
    from sigmasim.analysis.channels import tree_level
    from sigmasim.analysis.report import TOY_NOTE, run_label

    beta, h, kappa, nt = 4.0, 0.2, 0.1, 16
    sizes = (4, 6, 8)
    n_meas = 300 if args.quick else 4000
    tl = tree_level(2, beta, h, kappa)
    t0 = time.time()
    results = []
    for i, L in enumerate(sizes):
        cfg, ra = measure(beta, h, kappa, (nt, L, L), n_meas, seed=800 + i)
        results.append((L, cfg, ra))
        msg = ", ".join(f"{ch} {ra.masses[ch].mass:.4f}({ra.masses[ch].error:.4f})"
                        for ch in CHANNELS if ch in ra.masses)
        print(f"L={L}: {msg}  ({time.time() - t0:.0f} s)", flush=True)

    out = output_dir()
    tag = "_quick" if args.quick else ""  # --quick never overwrites the real results
    rows = []
    for L, cfg, ra in results:
        for ch in CHANNELS:
            m = ra.masses.get(ch)
            if m is None:
                continue
            rows.append({"L": L, "spatial_volume": L * L, "channel": ch, "mass": m.mass,
                         "error": m.error, "t_min": m.t_min, "t_max": m.t_max,
                         "chi2_dof": m.chi2_dof, "p_value": m.p_value, "m_L": m.mass * L,
                         "tree_level": tl["mass_" + ch], "warning": m.warning})
    with open(out / f"volumes{tag}.csv", "w", newline="") as fh:
        wr = csv.DictWriter(fh, fieldnames=list(rows[0]))
        wr.writeheader()
        wr.writerows(rows)
    label = run_label(results[0][1]).replace(f"lattice {nt}x4x4", f"lattice {nt}xL^2")
    md = [f"# Volume comparison: {label}", "",
          f"{n_meas} measurements per volume{' (--quick)' if args.quick else ''}; tree level "
          f"(L-independent): m_pi = {tl['mass_pion']:.4f}, m_eta' = {tl['mass_eta_prime']:.4f}.", "",
          "| L | channel | mass | m L | window | chi2/dof | p |", "| --- | --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        win = f"[{r['t_min']},{r['t_max']}]" if r["t_min"] is not None else "-"
        md.append(f"| {r['L']} | {r['channel']} | {r['mass']:.4f}({r['error']:.4f}) | {r['m_L']:.2f} | "
                  f"{win} | {r['chi2_dof']:.2f} | {r['p_value']:.2f} |")
    md += ["", TOY_NOTE, ""]
    (out / f"volumes{tag}.md").write_text("\n".join(md))

    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(11, 4.4), layout="constrained")
    for ax, ch in zip(axes, CHANNELS):
        for k, (L, cfg, ra) in enumerate(results):
            m = ra.masses.get(ch)
            if m is None:
                continue
            t = np.arange(nt // 2) + 0.5 + 0.08 * (k - 1)
            y, e = m.m_eff[: nt // 2], m.m_eff_error[: nt // 2]
            good = np.isfinite(y) & np.isfinite(e)
            ax.errorbar(t[good], y[good], yerr=e[good], fmt="o", ms=3.5, capsize=2, color=f"C{k}",
                        label=fr"$L$ = {L}: fit {m.mass:.4f}({m.error:.4f})")
            if m.t_min is not None:
                ax.fill_between([m.t_min, m.t_max], m.mass - m.error, m.mass + m.error,
                                color=f"C{k}", alpha=0.25)
        ax.axhline(tl["mass_" + ch], color="k", ls="--", lw=1,
                   label=f"tree level (any L) {tl['mass_' + ch]:.4f}")
        ref = tl["mass_" + ch]
        ax.set_ylim(0.6 * ref, 1.5 * ref)
        ax.set_xlabel("t (lattice units, time = direction 0)")
        ax.set_ylabel(r"cosh effective mass $a\,m_{eff}(t + 1/2)$")
        ax.set_title({"pion": r"pion: Im Tr$(T_a V_t)$, averaged over $a$",
                      "eta_prime": r"$\eta'$: Im Tr $V_t$"}[ch], fontsize=9)
        ax.legend(fontsize=7)
    fig.suptitle(f"effective masses in three spatial volumes (bands: correlated cosh fits)\n"
                 f"{label} -- research toy", fontsize=9)
    for ext in ("png", "pdf"):
        fig.savefig(out / f"volumes{tag}.{ext}", dpi=120 if ext == "png" else None)
    plt.close(fig)
    print(f"wrote {out}/volumes{tag}.csv, .md, .png, .pdf ({time.time() - t0:.0f} s)")
    print(TOY_NOTE)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
