"""Interface tension from the free-energy barrier over volumes (a research toy).

For each L: a multicanonical chain in x = arg omega_h (default) or Im omega_h (Wang-Landau
weight, then a frozen production run; :func:`sigmasim.protocols.multicanonical.run_multicanonical`), the canonical profile F(x) = -ln P(x) by
reweighting with exp(+W) (:func:`sigmasim.analysis.profile.multicanonical_profile`, block-bootstrap
errors), the barrier Delta F(L) = F(saddle) - mean F(minima) with located extrema
(:func:`sigmasim.analysis.profile.barrier`), the round-trip time in the flat ensemble, and finally
the fit Delta F = 2 sigma L^(d-1) [+ const] (K. Binder, Phys. Rev. A 25 (1982) 1699) with chi^2.

Default couplings: U(3), h = 0.5, kappa = 2, d = 3, theta = pi, beta = 0.76.  Default grid:
arg omega_h in [-1.6, 1.6] (the minima sit near -+pi/3; the whole circle lets the walk go round
through the third branch at +-pi), 3 overrelaxation passes per sweep.  In Im omega_h the peaks sit
near +-0.3 and sharpen as 1/sqrt(V) (--range -0.45 0.45 --regions 0.2).

    python analysis/interface_tension.py --L 4 6 8 10 12 --measurements 200000 --wl-sweeps 20000 \
        --out runs/interface-tension

writes <out>/interface_tension.json (per L: grid, Wang-Landau sweeps and flatness, Delta F, minima,
saddle, visited bins beyond each minimum, round trips, CPU seconds by stage; the fit),
<out>/profiles.png (all profiles on one plot) and <out>/fit.png (with --save-series also
<out>/series-L<L>.npz: the production x and the frozen weight).  Results are a research toy, not a
physical prediction.

Grid per volume (--grid L LO HI BINS, repeatable; --schedule L WL_SWEEPS MEASUREMENTS likewise).
The vacuum peaks of arg omega_h narrow as 1/sqrt(V) while their position hardly moves, so one grid
for all L is either too coarse at large L (W is linear between bin centres: a bin wider than the
peak leaves nothing to push x out of it) or wastes the Wang-Landau walk on far tails that nothing
needs (the canonical P falls off steeply beyond the vacua and the walk never gets there).  Rule:
measure the peak position x0 and width w (standard deviation of |x|) with a plain chain that stays
in one vacuum (--vacua SWEEPS: hot start, --thermalize sweeps with the step tuned, then SWEEPS
sweeps; the two vacua are mirror images at theta = pi), then take the grid [-R, R] with
R = x0 + MARGIN w (--margin, default 5; never wider than --range) and at least BINS_PER_WIDTH bins
per w (--bins-per-width, default 3).  --vacua prints the resulting --grid arguments.  Measured at
beta 0.80 (``--beta 0.80 --L 12 10 8 6 4 --vacua 3000 --thermalize 500``, 78 CPU s):

    L    x0 = <|arg omega_h|>   w       passages   grid (margin 5, 3 bins per w)
    12   0.9405(13)             0.0179  0          [-1.030, 1.030], 345 bins
    10   0.9348(19)             0.0279  0          [-1.074, 1.074], 232 bins
     8   0.9392(27)             0.0344  0          [-1.111, 1.111], 194 bins
     6   0.926(6)               0.078   0          [-1.317, 1.317], 101 bins
     4   0.825(9)               0.23    70         [-1.6, 1.6] (capped), 43 bins

(at L = 4 the chain still tunnels, so its width includes barrier traffic: an upper bound).  On
such a fine grid the flat barrier top spans many bins: --saddle-window (in x) widens the saddle's
cubic fit beyond the --half-width bins the narrow minima use (a 3-bin window around the highest,
noisiest bin is biased upward, tests/test_profile.py).  A volume whose located minimum is the
outermost visited bin (sigmasim.analysis.profile.BarrierResult.at_edge) is left out of the fit.

Measured at beta 0.80 (one thread, the other core busy; 16.7 CPU min in all):

    python analysis/interface_tension.py --beta 0.80 --L 12 10 8 6 4 --grid 12 -1.030 1.030 345 \
        --grid 10 -1.074 1.074 232 --grid 8 -1.111 1.111 194 --grid 6 -1.317 1.317 101 \
        --grid 4 -1.600 1.600 43 --wl-iterations 3 --wl-start 1.0 --wl-flatness 0.5 --wl-chunks 3 \
        --schedule 12 4000 40000 --schedule 10 3000 40000 --schedule 8 2500 40000 \
        --schedule 6 2000 40000 --schedule 4 1000 40000 --saddle-window 0.15 --save-series \
        --out runs/it-b080

    L   Delta F     minima (bins beyond)        Wang-Landau flatness   sweeps/round trip   CPU s (WL + prod.)
    4   2.889(60)   -0.935, +0.934 (8, 8)       0.60 0.69 0.56         32                  1 + 17
    6   6.29(43)    -0.968, +0.947 (7, 14)      0.49 0.71 0.58         392                 10 + 37
    8   11.85(13)   -0.949, +0.951 (14, 13)     0.34 0.78 0.34         355                 43 + 91
   10   19.24(33)   -0.945, +0.946 (13, 13)     0.36 0.58 0.58         1480                84 + 163
   12   29.88(32)   -0.944, +0.944 (13, 14)     0.69 0.56 0.14         1398                245 + 299

(40000 production sweeps each; flatness = min / mean of the iteration's histogram after at most 3
chunks; every bin visited except 5 at the left end for L = 6.)  Fits (``--reanalyse --out
runs/it-b080 --saddle-window 0.15 [--L ...]``, 9 CPU s): 2 sigma L^2 + const over L = 4..12:
sigma = 0.1001(9), const = -0.40(8), chi^2 43.5 / 3 (p 2e-9): the form does not describe the data;
over L = 6..12: sigma = 0.1103(19), const = -2.24(31), chi^2 6.35 / 2 (p 0.04); over L = 8..12:
0.1115(21), chi^2 3.97 / 1 (p 0.05); with a ln L term as well over L = 4..12: sigma = 0.122(4),
chi^2 2.51 / 2 (p 0.29).  sigma depends on the fit form far more than on the statistics.

Independent runs: the same command with --seed 101 and --seed 201 (and --out of their own) gave
Delta F = 2.916(57), 6.73(15), 11.81(18), 19.37(21), 29.48(49) and 2.974(51), 6.66(15), 12.10(18),
18.82(81), 29.32(38) at L = 4..12; the three runs agree at every L (chi^2 about their mean 1.3-2.1
for 2 dof), and ``--combine`` gives 2.926(33), 6.56(18), 11.92(12), 19.14(30), 29.56(23) (README).
At L = 12 each production chain holds only about 16 tau_int of arg omega_h (tau_int about 2500
sweeps), so its block length is capped and the profile lists it in ``short`` (errors
underestimated); quote errors from independent runs there.  Two L = 12 runs of
benchmarks/multicanonical_roundtrip.py with other Wang-Landau schedules and production lengths
(its notes) gave 28.32(41) and 27.53(76), 3.0 and 2.7 of their own errors below the combined
29.56(23); not understood: neither the schedule (this script with the first one's six-iteration
Wang-Landau schedule, ``--L 12 --grid 12 -1.030 1.030 344 --wl-iterations 6 --schedule 12 4000 30000
--seed 301``, gave 29.45(35)) nor the saddle window (7-bin windows everywhere: 29.99(36), 29.53(51),
29.38(43) for the three runs above).  Research toy numbers, not
physical predictions.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path

import numpy as np


def config_for(L: int, d: int, beta: float, seed: int, measurements: int, thermalize: int):
    from sigmasim.config import config_from_dict

    return config_from_dict({
        "name": f"sigma-L{L}", "seed": seed + L, "lattice": {"shape": [L] * d},
        "model": {"group": "U", "nf": 3, "beta": beta, "mass": 0.5, "kappa": 2.0, "theta": math.pi},
        "updates": {"metropolis_hits": 4},
        "run": {"start": "hot", "thermalize": thermalize, "measurements": measurements, "threads": 1}})


def vacuum_peak(L, d, beta, sweeps, thermalize=500, seed=1, overrelax=3):
    """Peak position and width of arg omega_h in the vacuum a plain chain (W = 0) falls into at L.

    Hot start, ``thermalize`` sweeps with the Metropolis step tuned, then ``sweeps`` sweeps of the
    biased kernel with a flat weight over the whole circle (bit for bit the plain chain).  Returns
    (mean |x|, error of it from blocks of 1/10 of the series, standard deviation of |x|, passages
    x -> -x through |x| < 0.5 seen, CPU s).  At theta = pi the two vacua are mirror images (x -> -x),
    so |x| folds both; where the chain still tunnels (small L) the width includes a little barrier
    traffic and is an upper bound."""
    from sigmasim.analysis.profile import round_trips
    from sigmasim.protocols.multicanonical import BiasedChain, Weight

    cfg = config_for(L, d, beta, seed, 1, 0)
    chain = BiasedChain(cfg, Weight.flat(-math.pi, math.pi, 2), variable="arg_omega_h", overrelax=overrelax)
    t0 = time.process_time()
    for _ in range(thermalize):
        chain.sweeps(1)
        if chain.state.sweep % cfg.tune_every == 0:
            chain.tune()
    x = chain.sweeps(sweeps)
    cpu = time.process_time() - t0
    a = np.abs(x)
    blocks = a[: a.size // 10 * 10].reshape(10, -1).mean(axis=1)
    return (float(a.mean()), float(blocks.std(ddof=1) / math.sqrt(10)), float(a.std(ddof=1)),
            round_trips(x, -0.5, 0.5).half_trips, cpu)


def draw_fit(points, fit, d, path, note=""):
    """Delta F against L^(d-1) with error bars and the fitted curve, to ``path`` (PNG)."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    from sigmasim.storage import atomic_output

    fig, ax = plt.subplots(figsize=(5.6, 4.0))
    Ls, v, e = (np.array(c, float) for c in zip(*points))
    ax.errorbar(Ls ** (d - 1), v, e, fmt="o", label=r"$\Delta F(L)$" + note)
    if fit is not None:
        grid = np.linspace(Ls.min(), Ls.max(), 100)
        ax.plot(grid ** (d - 1), fit.model(grid), label=fr"fit: $\sigma$ = {fit.sigma:.4g} $\pm$ "
                                                    fr"{fit.sigma_error:.2g}, p = {fit.p_value:.2g}")
    ax.set_xlabel(fr"$L^{{{d - 1}}}$")
    ax.set_ylabel(r"$\Delta F = F_{saddle} - \bar F_{min}$")
    ax.legend(fontsize=8)
    fig.suptitle("barrier vs volume (Binder 1982)\nresearch toy, not a physical prediction", fontsize=9)
    fig.tight_layout()
    atomic_output(path, lambda tmp: fig.savefig(tmp, format="png", dpi=120), what="figure")
    plt.close(fig)


def fit_forms(points, d, log) -> dict:
    """Fit Delta F = 2 sigma L^(d-1) [+ const [+ log]] to ``points`` ((L, Delta F, error) each) in every
    form the number of volumes allows; logs each fit and returns {terms: fit}."""
    from sigmasim.analysis import profile as pr

    fits = {}
    for terms in ((), ("const",), ("const", "log")):
        if len(points) > len(terms) + 1:
            fits[terms] = fit = pr.fit_interface_tension(*zip(*points), d=d, terms=terms)
            log(f"fit Delta F = 2 sigma L^{d - 1}{''.join(' + ' + t for t in terms)} over L = "
                f"{[q[0] for q in points]}: {fit.summary()}")
    return fits


def combine_replicas(values, errors):
    """One volume's Delta F from R >= 2 independent chains (different seeds).

    Returns (mean, error, scatter error, chi^2 of the chains about their mean with their own errors,
    its p-value for R - 1 dof).  The scatter error is the half width of the 68.27 % Student-t
    interval, t_{0.8413}(R - 1) std(ddof=1) / sqrt(R) (1.32 std/sqrt(3) for R = 3: the scatter of
    three chains is itself uncertain by about 50 %); the error is the larger of it and the chains'
    own errors combined, sqrt(sum e^2) / R, because short chains' own errors are too small
    (sigmasim.analysis.profile, module notes, *Errors*) and a lucky small scatter should not beat
    them (common practice, no source)."""
    from scipy import stats

    v, e = np.asarray(values, float), np.asarray(errors, float)
    R = v.size
    if R < 2:
        raise ValueError("combining needs at least two chains")
    mean = float(v.mean())
    scatter = float(stats.t.ppf(0.5 + 0.6827 / 2, R - 1) * v.std(ddof=1) / math.sqrt(R))
    own = float(math.sqrt(np.sum(e ** 2)) / R)
    chi2 = float(np.sum((v - mean) ** 2 / e ** 2))
    return mean, max(scatter, own), scatter, chi2, float(stats.chi2.sf(chi2, R - 1))


def combine(args, log) -> int:
    """--combine DIR...: Delta F(L) from the interface_tension.json of independent runs (other --seed),
    the fits of every --fit-terms form over the volumes all runs have, <out>/combined.json and <out>/fit.png."""
    from sigmasim.storage import atomic_output

    runs = []
    for d in args.combine:
        try:
            runs.append(json.loads((Path(d) / "interface_tension.json").read_text()))
        except (OSError, ValueError) as exc:
            print(f"interface_tension: error: cannot read {Path(d) / 'interface_tension.json'} ({exc})", file=sys.stderr)
            return 2
    seeds = [r["args"].get("seed") for r in runs]
    if len(set(seeds)) != len(seeds):
        print(f"interface_tension: error: --combine wants independent runs, but the seeds repeat: {seeds}",
              file=sys.stderr)
        return 2
    by_L = {}
    for r in runs:
        for row in r["volumes"]:
            if row["L"] in args.L and "barrier_mean" in row and not row.get("minimum_at_edge"):
                by_L.setdefault(row["L"], []).append((row["barrier_mean"]["value"], row["barrier_mean"]["error"],
                                                       bool(row.get("short"))))
    rows, points = [], []
    for L in sorted(by_L):
        reps = by_L[L]
        if len(reps) < 2:
            log(f"L = {L}: only {len(reps)} run(s) with a barrier: left out")
            continue
        v, e, short = zip(*reps)
        mean, err, scatter, chi2, p = combine_replicas(v, e)
        rows.append({"L": L, "runs": len(v), "values": list(v), "errors": list(e), "mean": mean, "error": err,
                     "scatter_error": scatter, "chi2": chi2, "dof": len(v) - 1, "p_value": p})
        points.append((L, mean, err))
        log(f"L = {L}: Delta F = {mean:.4g} +- {err:.2g} from {len(v)} runs ({', '.join(f'{a:.4g}({b:.2g})' for a, b in zip(v, e))}); "
            f"scatter error {scatter:.2g}; chi^2 of the runs about their mean {chi2:.3g} / {len(v) - 1} (p {p:.2g})")
    done = fit_forms(points, args.d, log)
    fits = {" + ".join(("2 sigma L^2",) + t): {"params": f.params, "errors": f.errors, "chi2": f.chi2, "dof": f.dof,
                                               "p_value": f.p_value} for t, f in done.items()}
    chosen = done.get(tuple(args.fit_terms))
    out = Path(args.out)
    text = json.dumps({"note": "research toy, not a physical prediction", "runs": [str(d) for d in args.combine],
                       "seeds": seeds, "volumes": rows, "fits": fits}, indent=1)
    atomic_output(out / "combined.json", lambda tmp: Path(tmp).write_text(text), what="table")
    if points:
        draw_fit(points, chosen, args.d, out / "fit.png", note=f" ({len(runs)} independent runs)")
    log(f"wrote {out / 'combined.json'}" + (f", {out / 'fit.png'}" if points else ""))
    return 0


def reanalyse(args, log) -> int:
    """--reanalyse: the barrier, the fit and the error of Delta F against production CPU time again from
    <out>/interface_tension.json and <out>/series-L<L>.npz for the volumes in --L (no new sweeps,
    nothing written)."""
    from sigmasim.analysis import profile as pr
    from sigmasim.protocols.multicanonical import Weight

    out = Path(args.out)
    try:
        blob = json.loads((out / "interface_tension.json").read_text())
    except (OSError, ValueError) as exc:
        print(f"interface_tension: error: cannot read {out / 'interface_tension.json'} ({exc})", file=sys.stderr)
        return 2
    have = []
    for row in blob["volumes"]:
        L = row["L"]
        if L not in args.L:
            continue
        try:
            with np.load(out / f"series-L{L}.npz") as z:
                x, w = z["x"], Weight(float(z["lo"]), float(z["hi"]), z["values"], float(z["wall"]))
        except OSError:
            log(f"L = {L}: no series-L{L}.npz (run with --save-series)")
            continue
        hws = None if args.saddle_window is None else max(args.half_width, int(round(args.saddle_window / w.dx)))
        prod = row["cpu_seconds_by_stage"]["production"]
        curve = []
        try:
            for frac in (0.125, 0.25, 0.5, 1.0):
                n = int(round(frac * x.size))
                prof = pr.multicanonical_profile(x[:n], w, w.edges, n_boot=args.bootstrap, seed=L)
                br = pr.barrier(prof, split=0.0, half_width=args.half_width, saddle_half_width=hws)
                curve.append((frac * prod, br["barrier_mean"], br.errors["barrier_mean"]))
        except ValueError as exc:
            log(f"L = {L}: no barrier ({exc})")
            continue
        t, v, e = (np.array(c) for c in zip(*curve))
        rel = e / np.abs(v)
        slope = float(np.polyfit(np.log(t), np.log(rel), 1)[0])
        log(f"L = {L}: Delta F = {v[-1]:.4g} +- {e[-1]:.2g} (half width {args.half_width}, saddle {hws or args.half_width} "
            f"bins); minima at edge: {list(br.at_edge) or 'none'}; relative error against production CPU s: "
            + ", ".join(f"{a:.0f} s {b:.3g}" for a, b in zip(t, rel))
            + f"; slope of ln(relative error) on ln t {slope:.2f} (1/sqrt(t): -0.5); extrapolated as 1/sqrt(t) to "
              f"7200 CPU s (1 h on 2 cores): {rel[-1] * math.sqrt(t[-1] / 7200):.2g}")
        if not br.at_edge:
            have.append((L, v[-1], e[-1]))
    fit_forms(have, args.d, log)
    return 0


def one_volume(L, args, log):
    from sigmasim.analysis import profile as pr
    from sigmasim.protocols.multicanonical import muca_params, run_multicanonical

    lo, hi, bins = args.grid_of.get(L, (args.range[0], args.range[1], args.bins))
    wl_sweeps, measurements = args.schedule_of.get(L, (args.wl_sweeps, args.measurements))
    cfg = config_for(L, args.d, args.beta, args.seed, measurements, args.thermalize)
    params = muca_params({"variable": args.variable, "range": [lo, hi], "bins": bins,
                          "wl_iterations": args.wl_iterations, "wl_sweeps": wl_sweeps,
                          "wl_start": args.wl_start, "wl_flatness": args.wl_flatness,
                          "wl_chunks": args.wl_chunks, "overrelax": args.overrelax})
    t0 = time.process_time()
    res = run_multicanonical(cfg, params, progress=lambda s: log(f"  L = {L}: {s}"))
    cpu = time.process_time() - t0
    edges = np.linspace(lo, hi, bins + 1)
    prof = pr.multicanonical_profile(res.run.x, res.weight, edges, n_boot=args.bootstrap, seed=L)
    if args.save_series:
        from sigmasim.storage import atomic_output

        w = res.weight

        def write(tmp):
            with open(tmp, "wb") as fh:
                np.savez_compressed(fh, x=res.run.x, values=w.values, lo=w.lo, hi=w.hi, wall=w.wall)

        Path(args.out).mkdir(parents=True, exist_ok=True)
        atomic_output(Path(args.out) / f"series-L{L}.npz", write, what="series")
    try:
        hws = None if args.saddle_window is None else max(args.half_width,
                                                            int(round(args.saddle_window / prof.widths[0])))
        br = pr.barrier(prof, split=0.0, half_width=args.half_width, saddle_half_width=hws)
    except ValueError as exc:
        br = None
        log(f"  L = {L}: no barrier ({exc})")
    rt = pr.round_trips(res.run.x, -args.regions, args.regions)
    row = {"L": L, "range": [lo, hi], "bins": bins, "cpu_seconds": cpu,
           "cpu_seconds_by_stage": dict(res.seconds), "measurements": int(res.run.x.size),
           "wang_landau": [{"f": w["f"], "sweeps": w["sweeps"], "flatness": w["flatness"]} for w in res.wl],
           "acceptance": res.run.acceptance, "unvisited": [int(b) for b in prof.unvisited],
           "sparse": prof.sparse, "short": prof.short, "round_trip": rt.summary(), "round_trip_sweeps": rt.time,
           "round_trip_sweeps_interval": [rt.time_low, rt.time_high], "half_trips": rt.half_trips}
    if br is not None:
        row.update({k: {"value": br.values[k], "error": br.errors[k]} for k in br.values})
        row["refined"] = br.refined
        row["outer_bins"] = br.outer_bins
        row["minimum_at_edge"] = list(br.at_edge)
    log(f"  L = {L}: grid [{lo:g}, {hi:g}] in {bins} bins; Wang-Landau sweeps {[w['sweeps'] for w in res.wl]}, "
        f"flatness {[round(w['flatness'], 2) for w in res.wl]}; {len(prof.unvisited)} unvisited bins")
    if prof.short:
        log(f"  L = {L}: the production chain is shorter than 100 tau_int: its errors are UNDERESTIMATED "
            f"(run longer, or run other --seed values and --combine them)")
    log(f"  L = {L}: {br.summary() if br is not None else 'no barrier'}; {rt.summary()}; {cpu:.0f} CPU s "
        f"({', '.join(f'{k} {v:.0f}' for k, v in res.seconds.items())}); production "
        f"{res.run.seconds / max(1, res.run.x.size):.3g} CPU s per sweep")
    return row, prof


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--L", type=int, nargs="+", default=[4, 6, 8, 10, 12])
    ap.add_argument("--d", type=int, default=3)
    ap.add_argument("--beta", type=float, default=0.76)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--variable", default="arg_omega_h", choices=["im_omega_h", "arg_omega_h"],
                    help="collective variable (default arg_omega_h, the phase of omega_h: its minima sit "
                         "near -+pi/3 at theta = pi; for im_omega_h pass --range -0.45 0.45 --regions 0.2)")
    ap.add_argument("--range", type=float, nargs=2, default=[-1.6, 1.6],
                    help="grid of W (in arg omega_h keep it away from +-pi, the third branch)")
    ap.add_argument("--bins", type=int, default=24)
    ap.add_argument("--grid", type=float, nargs=4, action="append", default=[], metavar=("L", "LO", "HI", "BINS"),
                    help="the grid of W at this L (repeatable; overrides --range/--bins there; see the module notes "
                         "for the rule and --vacua to measure what it needs)")
    ap.add_argument("--schedule", type=int, nargs=3, action="append", default=[],
                    metavar=("L", "WL_SWEEPS", "MEASUREMENTS"),
                    help="Wang-Landau sweeps per chunk and production measurements at this L (repeatable; "
                         "overrides --wl-sweeps/--measurements there)")
    ap.add_argument("--vacua", type=int, default=0, metavar="SWEEPS",
                    help="instead of the study: run a plain chain of SWEEPS sweeps per L, print where the vacuum "
                         "peak of arg omega_h sits and how wide it is, and the --grid the rule gives, then exit")
    ap.add_argument("--margin", type=float, default=5.0,
                    help="the --vacua rule: the grid ends this many peak widths beyond each peak")
    ap.add_argument("--bins-per-width", type=float, default=3.0,
                    help="the --vacua rule: at least this many bins per peak width")
    ap.add_argument("--reanalyse", action="store_true",
                    help="redo the barrier (--half-width, --saddle-window), both fits and the error of Delta F "
                         "against CPU time from the files a --save-series run left in --out; no sweeps")
    ap.add_argument("--combine", nargs="+", metavar="DIR", default=None,
                    help="instead of the study: Delta F(L) from the --out folders of independent runs (other --seed): "
                         "mean, the larger of the scatter and the runs' own errors, their consistency chi^2, the fits "
                         "and <out>/fit.png, <out>/combined.json")
    ap.add_argument("--save-series", action="store_true",
                    help="also write <out>/series-L<L>.npz (production x and the frozen weight) to redo the analysis")
    ap.add_argument("--half-width", type=int, default=3,
                    help="bins on each side of an extremum in its cubic fit (sigmasim.analysis.profile.barrier)")
    ap.add_argument("--saddle-window", type=float, default=None,
                    help="half width in x of the saddle's cubic fit (default: --half-width bins); on a fine grid "
                         "the flat barrier top needs a wider window than the narrow vacuum peaks")
    ap.add_argument("--regions", type=float, default=0.5, help="round trips between x <= -R and x >= R")
    ap.add_argument("--thermalize", type=int, default=200)
    ap.add_argument("--measurements", type=int, default=10000)
    ap.add_argument("--wl-iterations", type=int, default=8)
    ap.add_argument("--wl-sweeps", type=int, default=500)
    ap.add_argument("--wl-start", type=float, default=0.5)
    ap.add_argument("--wl-flatness", type=float, default=0.3,
                    help="repeat a Wang-Landau iteration until the histogram's min / mean reaches this")
    ap.add_argument("--wl-chunks", type=int, default=3, help="at most this many chunks per iteration")
    ap.add_argument("--overrelax", type=int, default=3,
                    help="overrelaxation passes per sweep (3: the fastest round trips per CPU second "
                         "measured at L = 8, benchmarks/multicanonical_roundtrip.py)")
    ap.add_argument("--bootstrap", type=int, default=200)
    ap.add_argument("--fit-terms", nargs="*", default=["const"], choices=["const", "log"])
    ap.add_argument("--out", default="runs/interface-tension")
    args = ap.parse_args(argv)

    from sigmasim.analysis import profile as pr
    from sigmasim.errors import SigmasimError
    from sigmasim.storage import atomic_output

    out = Path(args.out)

    def log(msg):
        print(msg, flush=True)

    bad = [g for g in args.grid if not (g[0] == int(g[0]) > 0 and g[1] < g[2] and g[3] == int(g[3]) >= 2)]
    if bad:
        print(f"interface_tension: error: --grid {' '.join(f'{v:g}' for v in bad[0])}: want L LO HI BINS with "
              f"LO < HI and integers L > 0, BINS >= 2", file=sys.stderr)
        return 2
    args.grid_of = {int(g[0]): (g[1], g[2], int(g[3])) for g in args.grid}
    bad = [s for s in args.schedule if min(s) <= 0]
    if bad:
        print(f"interface_tension: error: --schedule {' '.join(map(str, bad[0]))}: want positive L WL_SWEEPS "
              f"MEASUREMENTS", file=sys.stderr)
        return 2
    args.schedule_of = {s[0]: (s[1], s[2]) for s in args.schedule}
    if args.reanalyse:
        return reanalyse(args, log)
    if args.combine:
        return combine(args, log)
    if args.vacua:
        spec = []
        for L in args.L:
            x0, e0, w, trips, cpu = vacuum_peak(L, args.d, args.beta, args.vacua, thermalize=args.thermalize,
                                                seed=args.seed)
            half = min(x0 + args.margin * w, max(map(abs, args.range)))  # never wider than --range
            bins = int(math.ceil(2 * half / (w / args.bins_per_width)))
            log(f"L = {L}: vacuum peak |arg omega_h| = {x0:.4f} +- {e0:.4f}, width {w:.4f}, {trips} passages "
                f"through |x| < 0.5 in {args.vacua} sweeps, {cpu:.0f} CPU s -> --grid {L} {-half:.3f} {half:.3f} {bins}")
            spec.append(f"--grid {L} {-half:.3f} {half:.3f} {bins}")
        log(" ".join(spec))
        return 0

    rows, profiles = [], {}
    try:
        for L in args.L:
            row, prof = one_volume(L, args, log)
            rows.append(row)
            profiles[f"L = {L}"] = prof
    except SigmasimError as exc:
        print(f"interface_tension: error: {exc}", file=sys.stderr)
        return 2
    have = [r for r in rows if "barrier_mean" in r and np.isfinite(r["barrier_mean"]["error"])
            and r["barrier_mean"]["error"] > 0 and not r["minimum_at_edge"]]
    for r in rows:
        if r.get("minimum_at_edge"):
            log(f"L = {r['L']} left out of the fit: its minimum on the {' and '.join(r['minimum_at_edge'])} side lies "
                f"at the edge of the visited range (not located)")
    fit = None
    if len(have) > len(args.fit_terms):
        fit = pr.fit_interface_tension([r["L"] for r in have], [r["barrier_mean"]["value"] for r in have],
                                       [r["barrier_mean"]["error"] for r in have], d=args.d,
                                       terms=tuple(args.fit_terms))
        log(fit.summary())
    else:
        log(f"no fit: {len(have)} volumes with a barrier for {1 + len(args.fit_terms)} parameters")
    blob = {"note": "research toy, not a physical prediction", "args": vars(args), "volumes": rows,
            "fit": None if fit is None else {"params": fit.params, "errors": fit.errors, "chi2": fit.chi2,
                                             "dof": fit.dof, "p_value": fit.p_value, "terms": list(fit.terms)}}
    text = json.dumps(blob, indent=1, default=lambda o: None)
    atomic_output(out / "interface_tension.json", lambda tmp: Path(tmp).write_text(text), what="table")
    pr.plot_profiles(profiles, out / "profiles.png",
                     xlabel=r"Im $\omega_h$" if args.variable == "im_omega_h" else r"arg $\omega_h$",
                     title=f"U(3), d = {args.d}, beta {args.beta}, h 0.5, kappa 2, theta = pi: multicanonical")
    if have:
        draw_fit([(r["L"], r["barrier_mean"]["value"], r["barrier_mean"]["error"]) for r in have], fit, args.d,
                 out / "fit.png")
    log(f"wrote {out / 'interface_tension.json'}, {out / 'profiles.png'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
