"""Figures of ``sigmasim analyze --plot`` (matplotlib, Agg backend, imported lazily).

Every figure carries a title line with the run's parameters and
"research toy", labelled axes with their conventions and a legend.

Vacuum directions
-----------------
In the frame ``V = e^{i theta_m} U`` the action reads
``-beta sum Re Tr(V_x^+ V_{x+mu}) - sum Re Tr(diag(h) V_x)
- 2 kappa sum Re(e^{-i theta} det V_x)``, because
``e^{i theta_a} det U = e^{i (theta_a - nf theta_m)} det V = e^{-i theta} det V``.
For degenerate masses the tree-level vacua are ``V = e^{i alpha} 1``; at large
kappa the det term fixes ``nf alpha - theta = 2 pi k``, so branch ``k`` has

    V = e^{i (2 pi k + theta) / nf} 1,    arg Omega_h = (2 pi k + theta) / nf,

``k`` modulo ``nf``, quoted in ``-floor((nf-1)/2) .. floor(nf/2)`` (the branch
convention of :mod:`sigmasim.vacua`), and the mass term ``-h nf cos alpha`` selects the
``k`` with the smallest ``|2 pi k + theta|`` (for SU(nf) the same directions
follow from the centre ``U = e^{2 pi i k / nf}`` and ``theta_m = theta / nf``).
In the U frame this is ``arg Omega = (2 pi k - theta_a) / nf`` (the
``start = "branch"`` field of the config).  Checked numerically: U(2), theta = 2,
kappa = 2, h = 0.3 gives ``arg Omega_h = 0.97`` for every theta placement
(tree level 1.0; the mass term pulls towards 0).

The figures draw the tree-level minima of the run's own potential from the vacuum solver
(:func:`tree_guides`), labelled with their branch number and global/metastable; at small kappa
they differ from the large-kappa directions (U(1), h = -0.2, kappa = 0.3, theta = 0.5: arg 0.72,
not 0.5).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = ["branch_phases", "tree_guides", "plot_phase_history", "plot_omega_plane", "plot_autocorrelation",
           "plot_effective_mass", "plot_dwell_times", "plot_all", "FIGURES", "pi_ticks", "legend_outside"]

FIGURES = ("phase_history", "omega_plane", "dwell_times", "autocorrelation", "effective_mass")
_TOY = "research toy"


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def branch_phases(nf: int, theta: float) -> np.ndarray:
    """``(2 pi k + theta) / nf`` wrapped to ``(-pi, pi]``, ``k = 0..nf-1`` (module docstring)."""
    k = np.arange(nf)
    a = (2 * np.pi * k + theta) / nf
    return np.angle(np.exp(1j * a))


def _branch_k(nf, theta):
    """The branch number of each phase of :func:`branch_phases` (:mod:`sigmasim.vacua` convention)."""
    from sigmasim.vacua import canonical_branch

    return [canonical_branch(k, nf) for k in range(nf)]


def tree_guides(config) -> list:
    """Guide lines for arg Omega_h: ``(k, arg, text)`` per tree-level local minimum of the run.

    The minima come from the vacuum solver (:func:`sigmasim.vacua.find_local_minima`) at the
    run's couplings and theta, so they are right at finite kappa too (the large-kappa phases
    ``(2 pi k + theta)/nf`` of :func:`branch_phases` are only the kappa -> infinity limit);
    ``text`` says global or metastable.  Models without a tree-level potential (linear) get the
    large-kappa directions, marked as such.
    """
    from sigmasim import vacua

    pot = vacua.potential_of_config(config)
    if pot is None:
        return [(k, float(a), "large-kappa direction")
                for k, a in zip(_branch_k(config.nf, config.theta), branch_phases(config.nf, config.theta))]
    out = []
    for v in vacua.find_local_minima(pot):
        k = vacua.branch_label(v.omega_rot, config.theta, config.nf)
        out.append((k, float(np.angle(v.omega_rot)), "global" if v.is_global else "metastable"))
    return out


def pi_ticks(ax, lo: float, hi: float, axis: str = "x") -> None:
    """Ticks at multiples of pi/2 (pi/4 on a short range) labelled in mathtext over [lo, hi]."""
    from fractions import Fraction

    span = hi - lo
    step = 0.25 if span < 2.5 else (0.5 if span < 8 else 1.0)
    k0, k1 = int(np.ceil(lo / np.pi / step - 1e-9)), int(np.floor(hi / np.pi / step + 1e-9))
    ticks, labels = [], []
    for k in range(k0, k1 + 1):
        f = Fraction(k * step).limit_denominator(4)
        if f == 0:
            lab = "0"
        else:
            num = {1: "", -1: "-"}.get(f.numerator, str(f.numerator))
            lab = rf"${num}\pi$" if f.denominator == 1 else rf"${num}\pi/{f.denominator}$"
        ticks.append(float(f) * np.pi)
        labels.append(lab)
    if len(ticks) >= 2:
        (ax.set_xticks if axis == "x" else ax.set_yticks)(ticks, labels)


def legend_outside(ax, **kw):
    """A legend beside the axes (right), so that it never covers data."""
    kw.setdefault("fontsize", 7)
    return ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, **kw)


def _field_tex(config) -> str:
    """The field's symbol of the config's model (U_x, Phi_x)."""
    from sigmasim import models

    return models.get(config.kind).FIELD_TEX


def _title(fig, ra, what):
    fig.suptitle(f"{what}\n{ra.label} -- {_TOY}", fontsize=9)


def _save(fig, out: Path, stem: str, name: str) -> list[Path]:
    paths = []
    for ext in ("png", "pdf"):
        from sigmasim.files import atomic_output  # temporary name, then rename: never truncated

        p = out / f"{stem}.{name}.{ext}"
        atomic_output(p, lambda tmp: fig.savefig(tmp, format=ext, dpi=120 if ext == "png" else None),
                      what="figure")
        paths.append(p)
    _plt().close(fig)
    return paths


def plot_phase_history(ra, ax=None):
    """Time history of ``arg Omega_h`` with the nf tree-level branch directions, and below it the
    vacuum index series with its events (when the run has one: nf >= 2)."""
    plt = _plt()
    fig = None
    t = getattr(ra, "tunnelling", None)
    if ax is None and t is not None:
        fig, (ax, ai) = plt.subplots(2, 1, figsize=(9, 5.6), layout="constrained", sharex=True,
                                     height_ratios=(3, 1.3))
        _plot_index(ra, ai)
    elif ax is None:
        fig, ax = plt.subplots(figsize=(9, 4.2), layout="constrained")
    c = ra.config
    om = ra.data["omega_h"]
    sw = ra.data["sweep"]
    ax.plot(sw, np.angle(om), ".", ms=2, color="C0", label=r"arg $\Omega_h$ per measurement")
    for k, a, what in tree_guides(c):
        ax.axhline(a, color=f"C{k % 10 + 1}", ls="--", lw=1.2,
                   label=f"branch k={k} ({what}, tree level): arg = {a:.3f}")
    if ra.cut:
        ax.axvline(sw[ra.cut], color="k", ls=":", lw=1, label=f"thermalisation cut ({ra.cut} meas.)")
    ax.set_ylim(-np.pi * 1.05, np.pi * 1.05)
    ax.set_yticks(np.linspace(-np.pi, np.pi, 5), [r"$-\pi$", r"$-\pi/2$", "0", r"$\pi/2$", r"$\pi$"])
    ax.set_xlabel("sweep")
    if t is not None and fig is not None:
        ax.set_xlabel("")
    field = _field_tex(c)
    ax.set_ylabel(rf"arg $\Omega_h$,  $\Omega_h = e^{{i\theta_m}}\sum_x \mathrm{{Tr}}\,{field}/(N_f V)$")
    legend_outside(ax)
    b = getattr(ra, "branch", None)
    if b:
        where = f", {b['tree_status']} at tree level" if b.get("tree_status") else ""
        ax.set_title(f"the run sits in branch k = {b['k']} ({b['fraction']:.0%} of the measurements "
                     f"after the cut{where})", fontsize=8)
    if fig is not None:
        _title(fig, ra, "phase of the condensate")
    return fig


def _plot_index(ra, ax):
    """The vacuum index k per measurement (all measurements) with the tunnelling events."""
    from sigmasim.vacua import branch_range, canonical_branch

    t = ra.tunnelling
    nf = ra.config.nf
    sw = np.asarray(ra.data["sweep"])[:len(t.index)]
    idx = canonical_branch(np.asarray(t.index), nf)  # the vacua module's numbering
    ax.step(sw, idx, where="post", color="k", lw=0.9, label="vacuum index k")
    ev = np.asarray(t.events, dtype=int)
    if ev.size:
        ax.plot(sw[ev], idx[ev], "v", color="C3", ms=4, label=f"tunnelling events ({t.n_events})")
    ks = branch_range(nf)
    ax.set_yticks(list(ks))
    ax.set_ylim(ks.start - 0.5, ks.stop - 0.5)
    ax.set_xlabel("sweep")
    ax.set_ylabel("branch k")
    legend_outside(ax)
    ax.set_title(f"vacuum index, hysteresis band {t.band:g} (no thermalisation cut)", fontsize=8)


def plot_dwell_times(ra, ax=None):
    """Histogram of completed dwell times with the censored-exponential fit (sweeps / events)."""
    plt = _plt()
    t = ra.tunnelling
    fig = None
    if ax is None:
        fig, ax = plt.subplots(figsize=(7, 4.2), layout="constrained")
    d = np.array([w for _, w in t.completed], dtype=float)
    if d.size:
        nb = int(max(3, min(30, np.sqrt(d.size))))
        counts, edges, _ = ax.hist(d, bins=nb, range=(0.0, float(d.max()) + 1e-9), color="C0", alpha=0.7,
                                   label=f"completed dwells ({d.size})")
        tau = t.fit.tau_mle
        if np.isfinite(tau) and tau > 0:
            x = np.linspace(0, edges[-1], 200)
            width = edges[1] - edges[0]
            ax.plot(x, d.size * width / tau * np.exp(-x / tau), color="C3",
                    label=fr"$N\,\Delta/\tau\; e^{{-t/\tau}}$, $\tau$ = {tau:.3g} $\pm$ {t.fit.tau_mle_error:.2g}"
                          " (censored: sweeps / events)")
        ax.set_yscale("log")
    else:
        ax.text(0.5, 0.5, "no completed dwell (fewer than two tunnelling events)", ha="center",
                transform=ax.transAxes)
    ax.set_xlabel("dwell time in one branch (sweeps)")
    ax.set_ylabel("dwells per bin")
    if d.size:
        ax.legend(fontsize=7, loc="upper right", framealpha=0.85)
    if fig is not None:
        _title(fig, ra, f"dwell times between index changes; rate: {t.rate_text()}")
    return fig


def plot_omega_plane(ra, ax=None):
    """2-d histogram of ``Omega_h``: the whole disk with the Z_nf directions, and a zoom."""
    plt = _plt()
    c = ra.config
    om = ra.data["omega_h"][ra.cut:]
    fig, (ax, az) = plt.subplots(1, 2, figsize=(11.5, 5.4), layout="constrained")
    # the whole data: |Omega_h| <= 1 for a group field, any size for the linear model's Phi
    r = 1.05 * max(1.0, float(np.max(np.abs(om))) if om.size else 1.0)
    phi = np.linspace(0, 2 * np.pi, 400)
    m = om.mean() if om.size else 0j
    guides = tree_guides(c)
    for a_ in (ax, az):
        a_.plot(np.cos(phi), np.sin(phi), color="0.5", lw=0.8, label=r"$|\Omega_h| = 1$")
        for k, a, what in guides:
            a_.plot([0, np.cos(a)], [0, np.sin(a)], ls="--", color=f"C{k % 10 + 1}", lw=1.2,
                    label=f"branch k={k} ({what}, tree level): arg = {a:.3f}")
        a_.set_xlabel(r"Re $\Omega_h$ ($\sigma$ direction)")
        a_.set_ylabel(r"Im $\Omega_h$ ($\eta'$ direction)")
    ax.hist2d(om.real, om.imag, bins=120, range=[[-r, r], [-r, r]], cmin=1, cmap="viridis")
    ax.plot([m.real], [m.imag], "x", color="r", ms=9, mew=2, label=r"mean $\Omega_h$")
    ax.set_xlim(-r, r)
    ax.set_ylim(-r, r)
    ax.set_aspect("equal")
    ax.set_title("unit disk" if r <= 1.06 else rf"disk $|\Omega_h| \leq$ {r:.2f}", fontsize=8)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(0.0, -0.12), ncol=2)  # below: never on data
    # zoom: a square around the data (at least 0.05 wide)
    lo = np.array([om.real.min(), om.imag.min()]) if om.size else np.zeros(2)
    hi = np.array([om.real.max(), om.imag.max()]) if om.size else np.ones(2)
    cen, half = 0.5 * (lo + hi), max(0.025, 0.55 * float(np.max(hi - lo)))
    h = az.hist2d(om.real, om.imag, bins=60, range=[[cen[0] - half, cen[0] + half],
                                                     [cen[1] - half, cen[1] + half]],
                  cmin=1, cmap="viridis")
    az.plot([m.real], [m.imag], "x", color="r", ms=9, mew=2)
    az.set_xlim(cen[0] - half, cen[0] + half)
    az.set_ylim(cen[1] - half, cen[1] + half)
    az.set_aspect("equal")
    az.set_title("zoom on the measurements", fontsize=8)
    cb = fig.colorbar(h[3], ax=az, shrink=0.8)
    cb.set_label("measurements per bin")
    field = _field_tex(c)
    fig.suptitle(rf"$\Omega_h = e^{{i\theta_m}}\sum_x \mathrm{{Tr}}\,{field}\,/\,(N_f V)$, after the "
                 f"thermalisation cut\n{ra.label} -- {_TOY}", fontsize=9)
    return fig


def plot_autocorrelation(ra, names=("action", "omega_h.re", "omega_h.im", "abs_omega"), ax=None):
    """Normalised autocorrelation functions rho(t) with the Gamma-method window W marked."""
    from .gamma import autocorrelation

    plt = _plt()
    fig = None
    if ax is None:
        fig, ax = plt.subplots(figsize=(8, 4.2), layout="constrained")
    tmax_all = 1
    for i, k in enumerate(names):
        s = ra.series.get(k)
        x = ra.data["series"].get(k)
        if s is None or x is None or not np.isfinite(s.tau_int) or s.n < 8 or s.error == 0:
            continue
        tmax = int(min(x.size // 2, max(10, 3 * s.window)))
        tmax_all = max(tmax_all, tmax)
        rho = autocorrelation(x, tmax)
        ax.plot(np.arange(rho.size), rho, "o-", ms=3, color=f"C{i}", lw=1.3,
                label=fr"{k}: $\tau_{{int}}$ = {s.tau_int:.2f}({s.tau_int_error:.2f}), W = {s.window}")
        ax.axvline(s.window + 0.04 * (i - 1.5), color=f"C{i}", ls="--", lw=1)
    ax.axhline(0, color="0.4", lw=0.7)
    ax.set_xlim(0, tmax_all)
    ax.set_xlabel("lag t (measurements)")
    ax.set_ylabel(r"$\rho(t) = \Gamma(t)/\Gamma(0)$")
    legend_outside(ax, title="dashed: window W\n" + r"$\tau_{int} = 1/2 + \sum_{t\leq W}\rho(t)$",
                   title_fontsize=7)
    if fig is not None:
        _title(fig, ra, "autocorrelation (Wolff Gamma method, S = 1.5)")
    return fig


def plot_effective_mass(ra, channels=None):
    """Cosh effective masses per channel with the fitted mass band over the fit window."""
    plt = _plt()
    chans = [c for c in (channels or ra.masses) if c in ra.masses]
    n = max(1, len(chans))
    cols = min(2, n)
    rows = (n + cols - 1) // cols
    fig, axes = plt.subplots(rows, cols, figsize=(5.2 * cols, 3.6 * rows), layout="constrained",
                             squeeze=False)
    for ax, ch in zip(axes.flat, chans):
        m = ra.masses[ch]
        T = ra.config.shape[0]
        t = np.arange(m.m_eff.size)
        sel = t < T // 2
        y, e = m.m_eff[sel], m.m_eff_error[sel]
        ok = np.isfinite(y)
        ax.errorbar(t[sel][ok] + 0.5, y[ok], yerr=np.where(np.isfinite(e[ok]), e[ok], 0), fmt="o",
                    ms=3.5, capsize=2, color="C0", label=r"$m_{eff}(t)$ (cosh, t+1/2)")
        if m.t_min is not None and np.isfinite(m.mass):
            x = [m.t_min, m.t_max]
            ax.fill_between(x, m.mass - m.error, m.mass + m.error, color="C1", alpha=0.35,
                            label=f"fit [{m.t_min},{m.t_max}]: {m.mass:.4f}({m.error:.4f}), "
                            f"p={m.p_value:.2f}" + ("" if m.acceptable else " (!)"))
            ax.plot(x, [m.mass, m.mass], color="C1")
        if m.tree_level_mass is not None:
            ax.axhline(m.tree_level_mass, color="C2", ls="--", lw=1.2,
                       label=f"tree level (LO 1/beta) {m.tree_level_mass:.4f}")
        shown = y[ok]  # every point is inside the frame (error bars may leave it)
        if shown.size:
            ref = [v for v in (m.mass, m.tree_level_mass) if v is not None and np.isfinite(v)]
            lo, hi = min([np.min(shown)] + ref), max([np.max(shown)] + ref)
            pad = 0.15 * (hi - lo) + 0.02
            ax.set_ylim(max(0.0, lo - pad) if lo >= 0 else lo - pad, hi + pad)
        ax.set_xlabel("t (lattice units, time = direction 0)")
        ax.set_ylabel(r"$a\,m_{eff}$")
        ax.set_title(f"{ch}: {m.operator}", fontsize=8)
        ax.legend(fontsize=7, loc="best")
    for ax in list(axes.flat)[len(chans):]:
        ax.axis("off")
    fig.suptitle("cosh effective masses of zero-momentum correlators; operators of the vacuum-aligned "
                 + r"$W = V = e^{i\theta_m}U$" + f"\n{ra.label} -- {_TOY}",
                 fontsize=9)
    return fig


def plot_all(ra, out_dir) -> list[Path]:
    """Write every figure as PNG and PDF into ``out_dir``; returns the paths."""
    out = Path(out_dir)
    stem = ra.path.with_suffix("").name if ra.path is not None else ra.name
    written = []
    if ra.data.get("omega_h") is not None and ra.n_used > 0:
        written += _save(plot_phase_history(ra), out, stem, "phase_history")
        written += _save(plot_omega_plane(ra), out, stem, "omega_plane")
    if getattr(ra, "tunnelling", None) is not None and len(ra.tunnelling.completed):
        written += _save(plot_dwell_times(ra), out, stem, "dwell_times")  # none without a completed dwell
    if ra.series:
        written += _save(plot_autocorrelation(ra), out, stem, "autocorrelation")
    if ra.masses:
        written += _save(plot_effective_mass(ra), out, stem, "effective_mass")
    return written
