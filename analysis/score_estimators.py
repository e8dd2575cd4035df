"""Score sigmasim's own estimators on synthetic data with known answers.

Run from the checkout::

    python analysis/score_estimators.py            # about a minute on 2 cores

For every synthetic kind it generates 200 replicas (``sigmasim.synth``), writes the
sidecar and an ESTIMATES.json made with the project's estimators, scores them with
``sigmasim.score`` and draws all pull histograms with the standard normal overlaid
in one figure, ``analysis/output/pulls.png``.  Everything it writes goes to
``analysis/output/`` (kept out of git by a ``.gitignore`` written there).

Estimators scored:

* ``gamma_analysis`` (Wolff's Gamma method): error of the mean and the error of
  ``tau_int`` on AR(1), a sum of AR(1) (one slow, weak mode) and noisy telegraph
  series;
* ``correlator_jackknife`` + ``fit_correlator`` (correlated cosh fit on
  ``[2, T/2]``): mass and amplitude on free-field correlators.
"""

from __future__ import annotations

import json
import math
import os
import sys
import time
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # many tiny LAPACK calls: threads only hurt

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from sigmasim.analysis import correlator_jackknife, fit_correlator, gamma_analysis  # noqa: E402
from sigmasim.score import format_scores, load_estimates, load_truth, score  # noqa: E402
from sigmasim.cli import synth_command  # noqa: E402

OUT = HERE / "output"
REPLICAS = 200

#: (label, synth kind, synth parameters)
CASES = [
    ("AR(1), rho = 0.8, N = 1000", "ar1", {"rho": "0.8", "length": 1000}),
    ("AR(1) sum, rho = 0.97 (weight 0.1) + 0.5, N = 2000", "ar1",
     {"rho": "0.97,0.5", "amplitude": "0.3162,0.9487", "length": 2000}),
    ("telegraph, p01 = 0.02, p10 = 0.05, noise 1, N = 5000", "telegraph",
     {"p01": 0.02, "p10": 0.05, "noise": 1.0, "length": 5000}),
    ("free field 16 x 4^2, m2 = 0.25, 200 configs, fit [2, 8]", "free-field",
     {"shape": "16,4,4", "m2": 0.25, "configs": 200}),
    ("free field 16 x 4^2, m2 = 0.25, 400 configs, fit [2, 6]", "free-field",
     {"shape": "16,4,4", "m2": 0.25, "configs": 400}),
]
#: fit windows of the free-field cases (by case index)
FIT_WINDOWS = {3: (2, 8), 4: (2, 6)}


def _gamma_estimates(x):
    est = {"mean": [], "tau_int": []}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for row in x:
            g = gamma_analysis(row)
            est["mean"].append({"value": g.value, "error": g.error})
            est["tau_int"].append({"value": g.tau_int, "error": g.tau_int_error})
    return est


def _fit_estimates(phi, shape, t_min, t_max):
    vs = int(np.prod(shape[1:]))
    est = {"mass": [], "amplitude": []}
    for row in phi:
        ce = correlator_jackknife(row, spatial_volume=vs, symmetrise_result=True)
        fr = fit_correlator(ce, t_min, t_max)
        est["mass"].append({"value": fr.mass, "error": fr.mass_error})
        est["amplitude"].append({"value": float(fr.params[0]), "error": float(fr.errors[0])})
    return est


def plot_pulls(panels, path):
    """One histogram per (title, ScoreRow) with the standard normal density overlaid."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(panels)
    ncol = 4
    nrow = math.ceil(n / ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(4.2 * ncol, 3.6 * nrow), squeeze=False)
    lim, top = 4.5, 0.62
    z = np.linspace(-lim, lim, 300)
    bins = np.linspace(-lim, lim, 25)
    for k, (ax, (title, row)) in enumerate(zip(axes.flat, panels)):
        low, high = int(np.sum(row.pulls < -lim)), int(np.sum(row.pulls > lim))
        p = row.pulls[np.abs(row.pulls) <= lim]
        bad = row.verdict != "ok"
        colour = "tab:red" if bad else "tab:blue"
        # density of all n pulls, so the bars and the N(0, 1) curve share one scale
        w = np.full(p.size, 1.0 / (row.n * (bins[1] - bins[0])))
        ax.hist(p, bins=bins, weights=w, color=colour, alpha=0.55, edgecolor="white",
                label=f"{row.n} pulls")
        ax.plot(z, np.exp(-z**2 / 2) / math.sqrt(2 * math.pi), "k-", lw=1.5, label="N(0, 1)")
        ax.set_title(title, fontsize=9)
        ax.set_xlim(-lim, lim)
        ax.set_ylim(0, top)
        ax.set_xlabel("pull = (estimate - truth) / error", fontsize=8)
        if k % ncol == 0:
            ax.set_ylabel("density", fontsize=8)
        ax.tick_params(labelsize=7)
        txt = (f"mean {row.mean:+.2f} $\\pm$ {row.mean_error:.2f}\n"
               f"width {row.width:.2f} $\\pm$ {row.width_error:.2f}\n"
               f"KS p = {row.ks_p:.2g}\n{row.verdict}")
        ax.text(0.02, 0.97, txt, transform=ax.transAxes, va="top", fontsize=8,
                color="tab:red" if bad else "black")
        for count, x, ha, side in ((low, 0.02, "left", f"< -{lim:g}"), (high, 0.98, "right",
                                                                         f"> +{lim:g}")):
            if count:
                ax.text(x, 0.5, f"{count} pulls {side}\n(off scale)", transform=ax.transAxes,
                        ha=ha, fontsize=8, color="tab:red")
        ax.legend(fontsize=7, loc="upper right", frameon=False)
    for ax in list(axes.flat)[n:]:
        ax.axis("off")
    if n < nrow * ncol:
        list(axes.flat)[n].text(
            0.0, 0.95,
            "How to read a panel\n\n"
            "pull = (estimate - truth) / error, one per replica\n"
            "mean: mean pull $\\pm$ its error (bias if far from 0)\n"
            "width: standard deviation of the pulls $\\pm$ its error\n"
            "   > 1: errors too small,  < 1: errors too large\n"
            "KS p: Kolmogorov-Smirnov test against N(0, 1)\n\n"
            "truth: exact values from the sidecar of sigmasim synth",
            transform=list(axes.flat)[n].transAxes, va="top", fontsize=9)
    fig.suptitle("sigmasim estimators on synthetic data with known answers "
                 f"({REPLICAS} replicas each). Honest errors and no bias: mean 0, width 1; "
                 "red: verdict not ok (sigmasim.score)", fontsize=11)
    fig.tight_layout(rect=(0, 0, 1, 0.965))
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main() -> int:
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / ".gitignore").write_text("*\n")
    panels, table = [], []
    t0 = time.time()
    for i, (label, kind, params) in enumerate(CASES):
        prefix = OUT / f"synth_{i}_{kind}"
        synth_command(kind, str(prefix), 1000 + i, replicas=REPLICAS, **params)
        arr = np.load(prefix.with_suffix(".npz"))
        if kind == "free-field":
            shape = [int(s) for s in params["shape"].split(",")]
            est = _fit_estimates(arr["phi_t"], shape, *FIT_WINDOWS[i])
            how = "correlator_jackknife + fit_correlator"
        else:
            est = _gamma_estimates(arr["x"])
            how = "gamma_analysis"
        est_path = OUT / f"estimates_{i}_{kind}.json"
        est_path.write_text(json.dumps(est))
        rows = score(load_truth(prefix.with_suffix(".json")), load_estimates(est_path))
        table.append(f"\n{label}  [{how}]\n" + format_scores(rows))
        for r in rows:
            panels.append((f"{label}\n{how}: {r.name}", r))
    print("\n".join(table))
    png = OUT / "pulls.png"
    plot_pulls(panels, png)
    print(f"\nwrote {png} ({time.time() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
