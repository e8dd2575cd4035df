"""Study: the pion mass squared against the mass parameter h (GMOR).

Scenario (our own): U(2), beta = 12, kappa = 0.24, theta = 0, lattice 16 x 6^2,
h = 0.12, 0.24, 0.48, 0.96; heatbath + 3 overrelaxation sweeps.  At leading
order in 1/beta the lattice pion obeys cosh E = 1 + M^2 / 2 with M^2 = h / beta
(derivation in tests/test_analysis_masses.py), so M^2 = 4 sinh^2(E/2) should be a line
through the origin; its slope times beta is 1 + O(1/beta).

Writes into analysis/output/ (ignored by git: the folder carries its own
``.gitignore`` with ``*``, created here):

* gmor.csv, gmor.md  -- h, fitted pion and eta' masses, M^2, tree level;
* gmor.png, gmor.pdf -- M^2 against h with the weighted line through the origin.

Usage: ``python analysis/gmor.py [--quick] [--threads N]`` (about a minute on
2 cores; ``--quick``: a few seconds, small lattice, too few samples for
physics).  Uses only public functions of sigmasim.  Research toy, not a
physical prediction.

``--quick`` writes ``gmor_quick.*`` instead, so it never overwrites the
real results.
"""

from __future__ import annotations

import argparse
import csv
import time
from pathlib import Path

import numpy as np

OUT = Path(__file__).resolve().parent / "output"


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
        "name": f"gmor-h{h:g}", "seed": seed, "lattice": {"shape": list(shape)},
        "model": {"group": "U", "nf": 2, "beta": beta, "mass": h, "kappa": kappa},
        "updates": {"schedule": [{"update": "heatbath", "repeat": 1},
                                 {"update": "overrelax", "repeat": 3}]},
        "run": {"thermalize": 100, "measurements": n_meas, "start": "cold"},
    })
    d = simulate(cfg)
    return cfg, analyze_data(d, d, cfg)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="seconds: small lattice, few samples")
    ap.add_argument("--threads", type=int, default=1, help="numba threads (default 1)")
    args = ap.parse_args(argv)
    import numba

    numba.set_num_threads(max(1, min(args.threads, numba.config.NUMBA_NUM_THREADS)))
    from sigmasim.analysis.channels import tree_level
    from sigmasim.analysis.report import TOY_NOTE, run_label

    beta, kappa = 12.0, 0.24
    if args.quick:
        hs, shape, n_meas = (0.24, 0.48, 0.96), (12, 4, 4), 400
    else:
        hs, shape, n_meas = (0.12, 0.24, 0.48, 0.96), (16, 6, 6), 4000
    rows = []
    t0 = time.time()
    label = ""
    for i, h in enumerate(hs):
        cfg, ra = measure(beta, h, kappa, shape, n_meas, seed=700 + i)
        label = run_label(cfg).replace(f"h={h:g}", "h=scan")
        tl = tree_level(2, beta, h, kappa)
        pi, eta = ra.masses.get("pion"), ra.masses.get("eta_prime")
        m, dm = (pi.mass, pi.error) if pi else (np.nan, np.nan)
        rows.append({
            "h": h, "m_pi": m, "m_pi_err": dm, "M2": 4 * np.sinh(m / 2) ** 2,
            "M2_err": 2 * np.sinh(m) * dm, "M2_tree": h / beta, "m_pi_tree": tl["mass_pion"],
            "window": f"[{pi.t_min},{pi.t_max}]" if pi and pi.t_min is not None else "-",
            "p": pi.p_value if pi else np.nan,
            "m_eta": eta.mass if eta else np.nan, "m_eta_err": eta.error if eta else np.nan,
            "m_eta_tree": tl["mass_eta_prime"], "warning": "; ".join(ra.warnings),
        })
        print(f"h={h:g}: m_pi = {m:.4f} +- {dm:.4f} (tree {tl['mass_pion']:.4f}), "
              f"{time.time() - t0:.0f} s", flush=True)
    h = np.array([r["h"] for r in rows])
    M2 = np.array([r["M2"] for r in rows])
    dM2 = np.array([r["M2_err"] for r in rows])
    ok = np.isfinite(M2) & np.isfinite(dM2) & (dM2 > 0)
    w = 1 / dM2[ok] ** 2
    c = float(np.sum(w * h[ok] * M2[ok]) / np.sum(w * h[ok] ** 2)) if ok.any() else np.nan
    sc = float(1 / np.sqrt(np.sum(w * h[ok] ** 2))) if ok.any() else np.nan
    chi2 = float(np.sum(w * (M2[ok] - c * h[ok]) ** 2)) if ok.any() else np.nan
    dof = int(ok.sum()) - 1
    import scipy.stats

    p = float(scipy.stats.chi2.sf(chi2, dof)) if dof > 0 else np.nan
    summary = (f"M^2 = c h through the origin: c beta = {c * beta:.4f} +- {sc * beta:.4f} "
               f"(tree level 1), chi2/dof = {chi2:.2f}/{dof}, p = {p:.2f}")
    print(summary)

    out = output_dir()
    tag = "_quick" if args.quick else ""  # --quick never overwrites the real results
    with open(out / f"gmor{tag}.csv", "w", newline="") as fh:
        wr = csv.DictWriter(fh, fieldnames=list(rows[0]))
        wr.writeheader()
        wr.writerows(rows)
    md = [f"# GMOR scan: {label}", "", f"{n_meas} measurements per h{' (--quick)' if args.quick else ''}.",
          "", "| h | m_pi | tree | M^2 = 4 sinh^2(m/2) | h/beta | window | p | m_eta' | tree |",
          "| --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        md.append(f"| {r['h']:g} | {r['m_pi']:.4f}({r['m_pi_err']:.4f}) | {r['m_pi_tree']:.4f} | "
                  f"{r['M2']:.5f}({r['M2_err']:.5f}) | {r['M2_tree']:.5f} | {r['window']} | "
                  f"{r['p']:.2f} | {r['m_eta']:.4f}({r['m_eta_err']:.4f}) | {r['m_eta_tree']:.4f} |")
    md += ["", summary, "", TOY_NOTE, ""]
    (out / f"gmor{tag}.md").write_text("\n".join(md))

    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    fig, (ax, ar) = plt.subplots(2, 1, figsize=(7, 6.4), layout="constrained", sharex=True,
                                 height_ratios=(2, 1))
    ax.errorbar(h, M2, yerr=dM2, fmt="o", capsize=3, label=r"pion: $M^2 = 4\sinh^2(a m_\pi/2)$ (fit)")
    hh = np.linspace(0, h.max() * 1.05, 50)
    ax.plot(hh, c * hh, "-", color="C1", label=fr"weighted fit $M^2 = c\,h$: $c\beta$ = {c * beta:.3f}({sc * beta:.3f}), p = {p:.2f}")
    ax.plot(hh, hh / beta, "--", color="C2", label=r"tree level $M^2 = h/\beta$")
    ax.set_ylabel(r"$M^2 = 4\sinh^2(a m_\pi / 2)$ (lattice units)")
    ax.set_xlim(0, None)
    ax.set_ylim(0, None)
    ax.legend(fontsize=8)
    # lower panel: M^2 beta / h, where a line through the origin is a constant
    ar.errorbar(h, M2 * beta / h, yerr=dM2 * beta / h, fmt="o", capsize=3, label=r"$M^2\beta/h$")
    ar.axhspan(beta * (c - sc), beta * (c + sc), color="C1", alpha=0.3, label=r"fit $c\beta$")
    ar.axhline(1.0, color="C2", ls="--", label="tree level 1")
    ar.set_xlabel(r"$h$ (mass term $-\sum_x \mathrm{Re\,Tr}(h\,U_x)$)")
    ar.set_ylabel(r"$M^2 \beta / h$")
    ar.legend(fontsize=8, ncol=3)
    fig.suptitle(f"GMOR: pion mass squared against h\n{label} -- research toy", fontsize=9)
    for ext in ("png", "pdf"):
        fig.savefig(out / f"gmor{tag}.{ext}", dpi=120 if ext == "png" else None)
    plt.close(fig)
    print(f"wrote {out}/gmor{tag}.csv, .md, .png, .pdf ({time.time() - t0:.0f} s)")
    print(TOY_NOTE)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
