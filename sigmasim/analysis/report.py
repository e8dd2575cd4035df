"""Back end of ``sigmasim analyze``: one run (or several) -> table, JSON, CSV, figures.

Procedure for one run
---------------------
1. Thermalisation: :func:`sigmasim.analysis.thermalisation.thermalisation_cut`
   on ``action``, ``Re omega_h`` and ``|Omega|``; the largest cut is applied to
   every series and to the slices (the reason of the deciding series is reported).
2. Every series (real and imaginary parts of complex ones, per-flavour
   condensates, ``|Omega|``, acceptances): mean, error, ``tau_int`` and its
   error, ``n_independent = N / (2 tau_int)`` by Wolff's Gamma method
   (:func:`sigmasim.analysis.gamma.gamma_analysis`, ``S = 1.5``).  NaN entries
   (acceptance windows without a proposal) are dropped; series that are
   constant are reported with error 0.
3. Masses: the channel correlators of :mod:`sigmasim.analysis.channels`
   (frame ``V = e^{i theta_m} U``, aligned with the measured vacuum,
   zero momentum, source-time averaged, spatial-volume normalised,
   symmetrised, jackknife over bins), cosh effective masses, and correlated
   single-cosh fits on ``[t_min, t_max]``: ``t_max`` is ``T/2`` or, if earlier,
   the last time slice before the correlator's signal-to-noise falls below 2;
   ``t_min`` is the earliest value with ``p >= 0.05``
   (:func:`sigmasim.analysis.correlators.scan_fit_windows`).  If no window is
   acceptable the fit with the largest ``p`` is reported with a warning; with
   fewer than ``MIN_FIT_BINS`` = 20 jackknife bins no fit is made (warning).
4. Leading order in ``1/beta`` (theta = 0, degenerate h > 0 only): the
   tree-level masses of :func:`sigmasim.analysis.channels.tree_level` are
   reported next to the fits for orientation; they are not a prediction at
   small beta.

Output files (next to the run file ``<dir>/<name>.h5``)
-------------------------------------------------------
``<dir>/<name>.analysis.json`` -- keys:

* ``format`` = ``"sigmasim-analysis"``, ``format_version`` = 1, ``note``;
* ``run`` (path), ``name``, ``status`` (run file status), ``config`` (the
  run's config as a nested dict), ``label`` (one-line parameter summary);
* ``n_measurements`` (records in the file), ``n_used`` (after the cut);
* ``thermalisation``: ``cut``, ``reason``, ``thermalised``, ``series``
  (the series deciding the cut), ``checked`` (series -> cut);
* ``series``: name -> ``mean``, ``error``, ``tau_int``, ``tau_int_error``,
  ``n_independent``, ``window``, ``n``, ``note``; names are the run file's
  series with suffixes ``.re``/``.im`` for complex ones, ``condensate[f].re``,
  ``abs_omega``;
* ``acceptance``: ``metropolis``, ``phase`` (means, or null if not used),
  ``max_unitarity_drift``;
* ``masses``: channel -> ``operator``, ``mass``, ``error``, ``t_min``,
  ``t_max``, ``chi2``, ``dof``, ``chi2_dof``, ``p_value``, ``amplitude`` (A of
  ``A cosh(m (t - T/2))``), ``amplitude_error``,
  ``window_reason``, ``acceptable`` (p >= 0.05), ``tree_level_mass`` (or null),
  ``n_bins``, ``bin_size``, ``m_eff``, ``m_eff_error``, ``correlator``,
  ``correlator_error`` (lists over t), ``warning``;
* ``vacuum_alignment_phases``: ``alpha_f`` of the channel frame;
* ``tunnelling`` (nf >= 2, else null): the vacuum index of every measurement (no thermalisation
  cut: an escape from the start branch counts) by :mod:`sigmasim.analysis.tunnelling` --
  ``band``, ``bimodality`` (``verdict``: "two vacua", "one vacuum" or "no separated vacua";
  ``dip_depth``, ``binder`` = <q^4>/<q^2>^2 of q = Im(omega_h e^{-i phi_m}) with ``binder_error``,
  ``branches``, ``fractions``), ``counted`` (the verdict allows a rate; else every rate is null),
  ``n_events``, ``total_sweeps``, ``rate_per_sweep`` (events / sweeps, the censored maximum
  likelihood) with ``rate_per_sweep_error`` (sqrt(events) / sweeps), ``rate_per_sweep_interval``
  (exact Poisson 68.27 % interval), ``rate_per_sweep_upper_95`` (95 % upper limit; the statement
  when there is no event), ``rate_per_site`` (/ V) and its ``_error``, ``escape`` (per branch:
  events out, sweeps in, rate), ``occupation`` (per branch), ``event_measurements``, ``dwells``
  (completed, per branch), ``censored_first``/``censored_last`` ([branch, sweeps]),
  ``exponential_fit`` (``tau_mle`` = sweeps / events with ``tau_mle_error`` and ``tau_interval``,
  ``tau_hist`` with error (completed dwells only), ``ks_pvalue``, ``n``);
* ``branch``: ``k`` (majority branch number after the cut, :mod:`sigmasim.vacua` convention:
  arg omega_h nearest ``(theta + 2 pi k)/nf``, ``k`` in ``-floor((nf-1)/2) .. floor(nf/2)``),
  ``fraction``, ``tree_status`` (``global``, ``global (degenerate)``, ``metastable``, ``no
  minimum``; null for models without a tree-level potential), ``tree_global`` (branches of the
  tree-level global minimum), ``action_per_site`` with ``_error``, ``measured`` (when several
  runs with the same couplings sit in different branches: global or metastable by their mean
  action per site, with the difference in sigma; else null);
* ``warnings``: list of strings (also printed in the table).

NaN and infinities are written as ``null``.

``<dir>/<name>.analysis.csv`` -- one row per quantity, columns
:data:`CSV_COLUMNS`: ``section`` is ``series``, ``acceptance``, ``mass``,
``tunnelling`` or ``thermalisation``.

Figures (``plot=True``): ``<name>.<figure>.png`` and ``.pdf`` for the figures
of :mod:`sigmasim.analysis.plots` (``phase_history`` with the vacuum index below it,
``omega_plane``, ``dwell_times`` (nf >= 2), ``autocorrelation``, ``effective_mass``), in
``out_dir`` or next to the run.
"""

from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sigmasim.errors import SigmasimError

from .channels import CHANNELS, meson_correlators, tree_level
from .correlators import effective_mass_errors, scan_fit_windows
from .gamma import MIN_SAMPLES, gamma_analysis
from .thermalisation import thermalisation_cut

__all__ = [
    "SeriesSummary",
    "MassSummary",
    "RunAnalysis",
    "analyze_run",
    "analyze_data",
    "format_table",
    "analysis_dict",
    "write_outputs",
    "run_label",
    "CSV_COLUMNS",
    "TOY_NOTE",
]

TOY_NOTE = "Results are a research toy, not a physical prediction."
CSV_COLUMNS = ("run", "section", "name", "value", "error", "tau_int", "tau_int_error",
               "n_independent", "t_min", "t_max", "chi2_dof", "p_value", "note")
P_MIN = 0.05
#: fewest jackknife bins accepted for a correlated fit (common practice, no source: the
#: covariance of up to T/2 + 1 points must be estimated with some accuracy)
MIN_FIT_BINS = 20
#: series whose thermalisation cut is tested (the largest cut is applied)
THERM_SERIES = ("action", "omega_h.re", "abs_omega")
#: series shown in the text table (all are in JSON/CSV)
# radial observables of the linear model, shown when present
LINEAR_TABLE_SERIES = ("phi2", "phi2_susceptibility", "action_kinetic", "action_mu2", "action_lambda1", "action_lambda2",
                       "action_stab")
TABLE_SERIES = ("action", "action_beta", "action_mass", "action_det", "omega_h.re", "omega_h.im",
                "abs_omega", "det.re", "det.im")


@dataclass
class SeriesSummary:
    """Gamma-method summary of one real series."""

    name: str
    mean: float
    error: float
    tau_int: float
    tau_int_error: float
    n_independent: float
    window: int
    n: int
    note: str = ""
    rho: np.ndarray | None = None


@dataclass
class MassSummary:
    """Fit of one channel's correlator."""

    channel: str
    operator: str
    mass: float = math.nan
    error: float = math.nan
    t_min: int | None = None
    t_max: int | None = None
    chi2: float = math.nan
    dof: int | None = None
    p_value: float = math.nan
    amplitude: float = math.nan
    amplitude_error: float = math.nan
    acceptable: bool = False
    window_reason: str = ""
    tree_level_mass: float | None = None
    n_bins: int = 0
    bin_size: int = 0
    m_eff: np.ndarray | None = None
    m_eff_error: np.ndarray | None = None
    correlator: np.ndarray | None = None
    correlator_error: np.ndarray | None = None
    warning: str = ""

    @property
    def chi2_dof(self) -> float:
        return self.chi2 / self.dof if self.dof else math.nan


@dataclass
class RunAnalysis:
    """Everything :func:`analyze_run` found for one run."""

    path: Path | None
    name: str
    config: object
    status: str
    n_measurements: int
    n_used: int = 0
    cut: int = 0
    cut_reason: str = ""
    cut_series: str = ""
    thermalised: bool = True
    cut_checked: dict = field(default_factory=dict)
    series: dict = field(default_factory=dict)
    acceptance: dict = field(default_factory=dict)
    masses: dict = field(default_factory=dict)
    alpha: np.ndarray | None = None
    tunnelling: object | None = None  # TunnellingResult over all measurements (nf >= 2)
    branch: dict | None = None  # branch number and global/metastable (see _branch)
    warnings: list = field(default_factory=list)
    data: dict = field(default_factory=dict)  # the cut series used (for plots), not serialised

    @property
    def label(self) -> str:
        return run_label(self.config, self.name)


def run_label(config, name: str | None = None) -> str:
    """One line with the run's parameters: nf, group, beta, h, kappa, theta, lattice."""
    c = config
    h = c.mass[0] if len(set(c.mass)) == 1 else "[" + ",".join(f"{m:g}" for m in c.mass) + "]"
    lat = "x".join(str(n) for n in c.shape)
    nm = f"{name}: " if name else ""
    hs = h if isinstance(h, str) else f"{h:g}"
    from sigmasim import models

    return f"{nm}{models.get(c.kind).describe(c, hs)} lattice {lat}"


# ----------------------------------------------------------------------------
# pieces
# ----------------------------------------------------------------------------


def _real_series(series: dict, nf: int) -> dict[str, np.ndarray]:
    """Flatten the run's series to real 1-d arrays with JSON-friendly names."""
    out = {}
    for k, v in series.items():
        if k == "sweep":
            continue
        a = np.asarray(v)
        if a.ndim == 2:  # (n, nf) complex per-flavour
            for f in range(a.shape[1]):
                out[f"{k}[{f}].re"] = a[:, f].real.astype(float)
                out[f"{k}[{f}].im"] = a[:, f].imag.astype(float)
        elif np.iscomplexobj(a):
            out[f"{k}.re"] = a.real.astype(float)
            out[f"{k}.im"] = a.imag.astype(float)
        else:
            out[k] = a.astype(float)
        if k == "omega":
            out["abs_omega"] = np.abs(a).astype(float)
    return out


#: relative spread below which a series counts as constant (rounding of an exact identity)
ROUNDING = 1e-12


def summarise_series(name: str, x: np.ndarray) -> SeriesSummary:
    """Gamma-method summary; drops NaN; handles constant and too short series."""
    x = np.asarray(x, dtype=float)
    finite = np.isfinite(x)
    note = ""
    if not finite.all():
        if not finite.any():
            return SeriesSummary(name, math.nan, math.nan, math.nan, math.nan, math.nan, 0, 0,
                                 "not measured (all entries NaN)")
        note = f"{int((~finite).sum())} NaN entries dropped"
        x = x[finite]
    n = x.size
    if n == 0:
        return SeriesSummary(name, math.nan, math.nan, math.nan, math.nan, math.nan, 0, 0, "no data")
    if np.ptp(x) <= ROUNDING * max(1.0, float(np.max(np.abs(x)))):
        # constant, or constant up to rounding (SU(nf): det U = 1, Im Tr U = 0 for nf = 2)
        return SeriesSummary(name, float(np.mean(x)), 0.0, 0.5, 0.0, float(n), 0, n,
                             (note + "; " if note else "") + "constant")
    if n < MIN_SAMPLES:
        err = float(np.std(x, ddof=1) / np.sqrt(n)) if n > 1 else math.nan
        return SeriesSummary(name, float(x.mean()), err, math.nan, math.nan, math.nan, 0, n,
                             f"only {n} samples: naive error, no tau_int")
    g = gamma_analysis(x)
    if g.tau_int < 0.5:
        # anticorrelated (or rounding noise): the Gamma method's error would claim more
        # independent samples than measurements; use the naive error, N_indep = N, and say so
        note = (note + "; " if note else "") + f"tau_int {g.tau_int:.2g} < 1/2 capped: naive error"
        return SeriesSummary(name, g.value, float(g.error * np.sqrt(0.5 / max(g.tau_int, 1e-300))), 0.5,
                             g.tau_int_error, float(n), g.window, n, note, g.rho)
    return SeriesSummary(name, g.value, g.error, g.tau_int, g.tau_int_error, g.n_independent,
                         g.window, n, note, g.rho)


def _thermalisation(reals: dict, n: int) -> tuple[int, str, str, bool, dict]:
    n_blocks = min(20, n // 4)
    # the reference half is split in quarters, each needs MIN_SAMPLES for the Gamma method
    if n_blocks < 2 or n < 4 * MIN_SAMPLES:
        return 0, f"only {n} measurements: too few for a thermalisation check; no cut", "", False, {}
    best = (-1, "", "", True)
    checked = {}
    for name in THERM_SERIES:
        x = reals.get(name)
        if x is None or not np.all(np.isfinite(x)) or np.ptp(x) == 0:
            continue
        try:
            r = thermalisation_cut(x, n_blocks=n_blocks)
        except ValueError as exc:  # pragma: no cover - guarded by the length check above
            checked[name] = f"skipped ({exc})"
            continue
        checked[name] = r.cut
        if r.cut > best[0] or (r.cut == best[0] and not r.thermalised):
            best = (r.cut, r.reason, name, r.thermalised and best[3])
        else:
            best = best[:3] + (best[3] and r.thermalised,)
    if best[0] < 0:
        return 0, "no non-constant series to check; no cut", "", True, checked
    return best[0], best[1], best[2], best[3], checked


def _fit_channel(channel: str, est, tree: float | None) -> MassSummary:
    ms = MassSummary(channel, CHANNELS.get(channel, "Im Tr W_t (SU(nf): no eta', multi-pion)"),
                     tree_level_mass=tree, n_bins=est.n_bins)
    m, me = effective_mass_errors(est, "cosh")
    ms.m_eff, ms.m_eff_error = m, me
    ms.correlator, ms.correlator_error = est.mean, est.error
    T = est.T
    half = T // 2
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = est.mean / est.error
    t_max = half
    for t in range(1, half + 1):
        if not snr[t] >= 2.0:
            t_max = t - 1
            break
    if est.n_bins < MIN_FIT_BINS:
        ms.warning = (f"{channel}: too few samples for a correlated fit (N_bins = {est.n_bins} < "
                      f"{MIN_FIT_BINS}); effective mass only")
        return ms
    if t_max < 3:
        ms.warning = (f"{channel}: signal lost after t = {t_max} (C/err < 2); no fit "
                      f"(N_bins = {est.n_bins})")
        return ms
    scan = scan_fit_windows(est, t_max=t_max, t_min_start=1, p_min=P_MIN)
    fit = scan.best
    if fit is None:
        if not scan.fits:
            ms.warning = (f"{channel}: too few samples for a correlated fit (N_bins = {est.n_bins}, "
                          f"window up to t = {t_max}); effective mass only")
            return ms
        fit = max(scan.fits.values(), key=lambda f: f.p_value)
        ms.warning = (f"{channel}: no fit window with p >= {P_MIN:g}; showing the best one "
                      f"[{fit.t_min}, {fit.t_max}] with p = {fit.p_value:.2g}")
        ms.window_reason = f"largest p among windows [t_min, {t_max}]"
    else:
        ms.acceptable = True
        ms.window_reason = scan.reason
    ms.mass, ms.error = fit.mass, fit.mass_error
    ms.t_min, ms.t_max = fit.t_min, fit.t_max
    ms.chi2, ms.dof, ms.p_value = fit.chi2, fit.dof, fit.p_value
    ms.amplitude = float(fit.params[0])
    ms.amplitude_error = float(fit.errors[0])
    return ms


def _tunnelling(ra: RunAnalysis, series: dict, config, band: float) -> None:
    """Vacuum index over *all* measurements (an escape from the start branch is an event, so no
    thermalisation cut), events, dwell times, rates per sweep and per site, exponential fit."""
    from sigmasim.analysis.tunnelling import tunnelling_analysis

    om = series.get("omega_h")
    if om is None or config.nf < 2 or len(om) < 2:
        return
    om = np.asarray(om)
    ok = np.isfinite(om)
    sweeps = np.asarray(series.get("sweep", np.arange(1, len(om) + 1)))[ok]
    ra.tunnelling = tunnelling_analysis(om[ok], config.theta, config.nf, band=band, sweeps=sweeps,
                                        volume=int(np.prod(config.shape)), seed=0)
    t = ra.tunnelling
    if not t.counted:
        ra.warnings.append(f"tunnelling: {t.bimodality.verdict} in the histogram of omega_h (dip depth "
                           f"{_f(t.bimodality.dip_depth, '.2f')}, <q^4>/<q^2>^2 = {_f(t.bimodality.binder)}): "
                           f"the {t.n_events} index changes are band crossings, not tunnelling; no rate")
    elif 0 < t.n_events < 5:
        ra.warnings.append(f"tunnelling: only {t.n_events} events; the rate is known to a factor "
                           f"(see its exact interval), dwell-time fits are not meaningful")


def analyze_data(series: dict, slices: dict, config, *, status: str = "complete",
                 path=None, name: str | None = None, masses: bool = True,
                 band: float = 0.5) -> RunAnalysis:
    """Analyse in-memory data (``RunData.series``/``.slices`` or :func:`sigmasim.chain.simulate`).

    ``slices`` holds the model's field slice (``"U"``, or ``"Phi"`` for the linear model: the
    model's ``FIELD_SLICE``) and ``"det"`` (for ``simulate`` output pass
    ``{"U": d["slices/U"], "det": d["slices/det"]}``, or the dict itself: keys
    ``slices/<name>`` are recognised).
    """
    from sigmasim import models

    model = models.get(config.kind)
    field = model.FIELD_SLICE
    series = {k: v for k, v in series.items() if not k.startswith("slices/")}
    if any(k.startswith("slices/") for k in slices):
        slices = {k.split("/", 1)[1]: v for k, v in slices.items() if k.startswith("slices/")}
    n = int(len(series.get("sweep", series.get("action", ()))))
    ra = RunAnalysis(Path(path) if path else None, name or config.name, config, status, n)
    if status != "complete":
        ra.warnings.append(
            f"run status is '{status}': the file is still being written or was stopped; "
            f"results use the {n} records of the last checkpoint")
    missing = [k for k in model.SERIES if k not in series]
    if missing:
        ra.warnings.append(f"missing series: {', '.join(missing)}")
    if n == 0:
        ra.warnings.append("no measurements in the run; nothing to analyse")
        return ra
    reals = _real_series(series, config.nf)
    cut, reason, deciding, ok, checked = _thermalisation(reals, n)
    ra.cut, ra.cut_reason, ra.cut_series, ra.thermalised, ra.cut_checked = cut, reason, deciding, ok, checked
    if not ok:
        # the sentence that says why (not the cut's own first sentence, which may say 'no cut')
        why = reason[reason.index("Not trusted:"):] if "Not trusted:" in reason else reason
        ra.warnings.append(f"thermalisation: not established ({deciding or 'check skipped'}): "
                           + why.split("; ")[0].split(". ")[0].rstrip("."))
    ra.n_used = n - cut
    cut_reals = {k: v[cut:] for k, v in reals.items()}
    ra.data = {"series": cut_reals, "sweep": np.asarray(series.get("sweep", np.arange(1, n + 1))),
               "omega_h": np.asarray(series["omega_h"]) if "omega_h" in series else None,
               "cut": cut}
    for k, v in cut_reals.items():
        ra.series[k] = summarise_series(k, v)
    if "phi2" in cut_reals and cut_reals["phi2"].size >= MIN_SAMPLES:
        # linear model: chi = V (<phi2^2> - <phi2>^2), a derived quantity of (phi2, phi2^2)
        p = cut_reals["phi2"]
        vol = float(np.prod(config.shape))
        g = gamma_analysis(np.stack([p, p * p], axis=1), func=lambda a: vol * (a[1] - a[0] ** 2))
        ra.series["phi2_susceptibility"] = SeriesSummary(
            "phi2_susceptibility", float(g.value), float(g.error), float(g.tau_int),
            float(g.tau_int_error), float(g.n_independent), int(g.window), int(g.n),
            "V var(phi2), Gamma method for the derived quantity")
    _tunnelling(ra, series, config, band)
    _branch(ra, series, config)
    acc_m = ra.series.get("accept_metropolis")
    acc_p = ra.series.get("accept_phase")
    drift = reals.get("unitarity_drift")
    ra.acceptance = {
        "metropolis": acc_m.mean if acc_m and math.isfinite(acc_m.mean) else None,
        "phase": acc_p.mean if acc_p and math.isfinite(acc_p.mean) else None,
        "max_unitarity_drift": (float(np.nanmax(drift))
                                if drift is not None and np.isfinite(drift).any() else None),
    }
    if not masses:
        return ra
    if field not in slices or "det" not in slices:
        ra.warnings.append(f"missing slices/{field} or slices/det: no correlators or masses")
        return ra
    su, sd = np.asarray(slices[field])[cut:], np.asarray(slices["det"])[cut:]
    degenerate = len(set(config.mass)) == 1 and config.mass[0] > 0 and config.theta == 0.0
    tree = {}
    if degenerate and config.beta > 0:
        tl = tree_level(config.nf, config.beta, config.mass[0], config.kappa, special=config.special)
        tree = {"pion": tl["mass_pion"], "eta_prime": tl.get("mass_eta_prime"),
                "eta_prime_det": tl.get("mass_eta_prime")}
    try:
        cd = meson_correlators(su, sd, config.shape, theta_m=config.theta_angles[0],
                               special=config.special)
    except ValueError as exc:
        ra.warnings.append(f"masses: too few samples for correlators ({exc})")
        return ra
    ra.alpha = cd.alpha
    for ch, est in cd.correlators.items():
        if ch == "eta_prime_det" and config.nf == 1:
            continue  # for U(1) det W = Tr W: the same operator as eta_prime
        try:
            ms = _fit_channel(ch, est, tree.get(ch))
        except ValueError as exc:  # pragma: no cover - defensive
            ms = MassSummary(ch, CHANNELS.get(ch, ""), warning=f"{ch}: fit failed ({exc})")
        ms.bin_size = cd.bin_size
        ra.masses[ch] = ms
        if ms.warning:
            ra.warnings.append(ms.warning)
    if "sigma" in ra.masses:
        ra.masses["sigma"].window_reason += (" [sigma = Re Tr W is a two-pion state at tree level;"
                                              " its cosh mass includes wrap-around terms]")
    return ra


def _branch(ra: RunAnalysis, series: dict, config) -> None:
    """Branch number of the run (majority after the cut, :mod:`sigmasim.vacua` convention) and its
    tree-level standing; ``measured`` is filled by :func:`compare_branches` when several runs at
    the same couplings are analysed together."""
    from sigmasim import vacua

    om = np.asarray(series["omega_h"])[ra.cut:]
    k, frac = vacua.measured_branch(om, config.theta, config.nf)
    pot = vacua.potential_of_config(config)
    st = vacua.branch_status(pot, k) if pot is not None else None
    act = ra.series.get("action")
    ra.branch = {"k": k, "fraction": frac,
                 "tree_status": st.status if st else None,
                 "tree_global": list(st.global_branches) if st else None,
                 "action_per_site": act.mean if act else None,
                 "action_per_site_error": act.error if act else None,
                 "measured": None}
    if st is not None and st.status in ("metastable", "no minimum"):
        g = ",".join(str(b) for b in st.global_branches)
        ra.warnings.append(f"the run sits in branch {k}, which is {st.status} at tree level "
                           f"(global: {g}); its averages are those of that branch")


def _physics_key(config):
    d = config.physics_dict()
    d.pop("seed", None)
    d.get("run", {}).pop("start", None)
    d.get("run", {}).pop("start_branch", None)
    d.get("run", {}).pop("thermalize", None)
    d.get("run", {}).pop("measure_every", None)
    return json.dumps(d, sort_keys=True)


def compare_branches(analyses) -> None:
    """Runs with the same couplings (theta included) sitting in different branches: the branch with
    the lowest mean action per site is marked measured-global, the others metastable with the
    action difference and its error (errors of independent runs added in quadrature)."""
    groups: dict = {}
    for ra in analyses:
        if ra.branch is not None and ra.branch["action_per_site"] is not None:
            groups.setdefault(_physics_key(ra.config), []).append(ra)
    for runs in groups.values():
        if len({ra.branch["k"] for ra in runs}) < 2:
            continue
        best = min(runs, key=lambda ra: ra.branch["action_per_site"])
        b0 = best.branch
        for ra in runs:
            b = ra.branch
            if b["k"] == b0["k"]:
                b["measured"] = f"global among {len(runs)} runs (lowest action per site)"
                continue
            d = b["action_per_site"] - b0["action_per_site"]
            e = math.hypot(b["action_per_site_error"] or 0.0, b0["action_per_site_error"] or 0.0)
            nsig = d / e if e > 0 else float("inf")
            b["measured"] = (f"metastable among {len(runs)} runs: <S>/V higher by {d:.4g} +- {e:.2g} "
                             f"({nsig:.1f} sigma) than branch {b0['k']} ({best.name})")


def _branch_line(ra: RunAnalysis) -> str | None:
    b = ra.branch
    if b is None:
        return None
    line = f"branch k = {b['k']} ({b['fraction']:.0%} of the measurements after the cut)"
    if b["tree_status"] == "flat":
        line += ": the tree-level potential is flat (no isolated vacuum)"
    elif b["tree_status"] is not None:
        g = ",".join(str(v) for v in b["tree_global"])
        word = "METASTABLE" if b["tree_status"] == "metastable" else b["tree_status"]
        line += f": {word} at tree level (global {g})"
    if b["measured"]:
        line += f"; measured: {b['measured']}"
    return line + "  [k: arg Omega_h nearest (theta + 2 pi k)/nf]"


def analyze_run(path, masses: bool = True, band: float = 0.5) -> RunAnalysis:
    """Open and analyse one run file (raises :class:`RunFileError` for a bad file)."""
    from sigmasim.storage import open_run

    d = open_run(path)
    return analyze_data(d.series, d.slices, d.config, status=d.status, path=path, masses=masses,
                        band=band)


# ----------------------------------------------------------------------------
# output
# ----------------------------------------------------------------------------


def fmt_err(v, e) -> str:
    """``value(error)`` with two significant digits of the error."""
    if v is None or not np.isfinite(v):
        return "-"
    if e is None or not np.isfinite(e):
        return f"{v:.5g}"
    if e == 0:
        return f"{v:.6g}(0)"
    digits = max(0, 1 - int(math.floor(math.log10(abs(e)))))
    if digits > 12:
        return f"{v:.3e}({e:.1e})"
    ee = round(e * 10**digits)
    return f"{v:.{digits}f}({ee})"


def _f(x, spec=".3g"):
    return "-" if x is None or not np.isfinite(x) else format(x, spec)


def format_table(analyses) -> str:
    """Aligned text: one block per run, warnings marked, the research-toy note at the bottom."""
    lines = []
    for ra in analyses:
        bar = "=" * 96
        lines += [bar, ra.label, f"file: {ra.path}  status: {ra.status}  measurements: "
                  f"{ra.n_measurements}  used: {ra.n_used} (thermalisation cut {ra.cut}"
                  f"{', from ' + ra.cut_series if ra.cut_series else ''})"]
        if ra.cut_reason:
            lines.append(f"  cut reason: {ra.cut_reason.split('. ')[0].rstrip('.')}.")
        lines.append(bar)
        if ra.series:
            head = f"{'observable':<22}{'mean(err)':>22}{'tau_int':>16}{'N_indep':>10}  note"
            lines += [head, "-" * len(head)]
            names = [k for k in TABLE_SERIES if k in ra.series]
            names += [k for k in LINEAR_TABLE_SERIES if k in ra.series]
            names += [k for k in ra.series if k.startswith("condensate")]
            constant = []
            for k in names:
                s = ra.series[k]
                if s.note.endswith("constant"):
                    constant.append(f"{k} = {0.0 if abs(s.mean) < ROUNDING else s.mean:.6g}")
                    continue
                tau = fmt_err(s.tau_int, s.tau_int_error) if np.isfinite(s.tau_int) else "-"
                lines.append(f"{k:<22}{fmt_err(s.mean, s.error):>22}{tau:>16}"
                             f"{_f(s.n_independent, '.0f'):>10}  {s.note}")
            if constant:
                lines.append(f"{'constant':<22}{', '.join(constant)}")
            acc = ra.acceptance
            lines.append(f"{'acceptance':<22}metropolis {_f(acc.get('metropolis'))}, phase moves "
                         f"{_f(acc.get('phase'))}, max unitarity drift {_f(acc.get('max_unitarity_drift'))}")
        if ra.masses:
            head = (f"{'channel':<15}{'mass(err)':>16}{'LO 1/beta':>11}{'window':>10}{'chi2/dof':>10}"
                    f"{'p':>8}{'bins':>7}  operator")
            lines += ["", head, "-" * len(head)]
            for ch, m in ra.masses.items():
                win = f"[{m.t_min},{m.t_max}]" if m.t_min is not None else "-"
                flag = "" if m.acceptable or m.t_min is None else " !"
                lines.append(f"{ch:<15}{fmt_err(m.mass, m.error):>16}{_f(m.tree_level_mass, '.4f'):>11}"
                             f"{win:>10}{_f(m.chi2_dof, '.2f'):>10}{_f(m.p_value, '.2f'):>8}"
                             f"{m.n_bins:>7}  {m.operator}{flag}")
            if ra.alpha is not None and np.any(np.abs(ra.alpha) > 1e-3):
                lines.append(f"  (operators in the vacuum-aligned frame, alpha_f = "
                             f"{', '.join(f'{a:.3f}' for a in ra.alpha)})")
        if _branch_line(ra):
            lines += ["", _branch_line(ra)]
        if ra.tunnelling is not None:
            lines += [""] + _tunnelling_lines(ra)
        for w in ra.warnings:
            lines.append(f"  !! WARNING: {w}")
        lines.append("")
    lines.append("Masses in lattice units (cosh fits of zero-momentum correlators, frame V = e^{i theta_m} U); "
                 "LO 1/beta = tree level, theta = 0 only.")
    lines.append(TOY_NOTE)
    return "\n".join(lines)


def _tunnelling_lines(ra: RunAnalysis) -> list[str]:
    t = ra.tunnelling
    nf = ra.config.nf
    lines = [f"vacuum index (branch k of arg Omega_h = (2 pi k + theta)/nf, hysteresis band {t.band:g}, "
             f"all {len(t.index)} measurements):",
             f"  two-peak test: {t.bimodality.summary()}"]
    if t.counted:
        lines.append(f"  tunnelling rate: {t.rate_text()}")
        if t.n_events:
            lines.append(f"  per site {fmt_err(t.rate_per_volume, t.rate_per_volume_error)} "
                         f"(events / sweeps / V; sqrt(events) error, read the interval when events are few)")
    else:
        lines.append(f"  tunnelling rate: {t.rate_text()}")
    head = f"  {'branch':<8}{'occupation':>12}{'dwells':>8}{'mean dwell':>14}{'escapes':>9}{'escape rate':>14}"
    from sigmasim.vacua import branch_range, canonical_branch

    lines += [head]
    # the index series counts k modulo nf from 0; print k in the range of sigmasim.vacua
    for kk in branch_range(nf):
        k = kk % nf
        d = t.dwells_by_branch.get(k, np.array([]))
        md = fmt_err(d.mean(), d.std(ddof=1) / np.sqrt(len(d))) if len(d) > 1 else (
            f"{d[0]:.0f}" if len(d) == 1 else "-")
        ne, _, er = t.escape.get(k, (0, 0.0, float("nan")))
        lines.append(f"  {kk:<8}{t.occupation[k]:>12.3f}{len(d):>8}{md:>14}{ne:>9}{_f(er):>14}")
    f = t.fit
    if f.n and t.counted:
        lines.append(f"  dwell times: censored maximum likelihood tau = sweeps / events = {f.tau_mle:.4g} "
                     f"(68 % interval [{f.tau_low:.3g}, {f.tau_high:.3g}], {f.n} events); histogram fit "
                     f"of completed dwells {fmt_err(f.tau_hist, f.tau_hist_error)}, KS p = "
                     f"{_f(f.ks_pvalue, '.2f')}")
    cens = [c for c in (t.censored_first, t.censored_last) if c is not None]
    if cens:
        lines.append("  first/last dwell (open at the series ends; in the exposure, not in the mean dwell column): "
                     + ", ".join(f"branch {canonical_branch(b, nf)} for {w:.0f} sweeps" for b, w in cens))
    return lines


def _tunnelling_dict(t) -> dict:
    """The tunnelling JSON section; every branch number in the :mod:`sigmasim.vacua` convention
    (the index series counts k modulo nf from 0 internally)."""
    from sigmasim.vacua import branch_range, canonical_branch

    nf = len(t.occupation)

    def k(x):
        return canonical_branch(int(x), nf)

    def cens(c):
        return None if c is None else [k(c[0]), c[1]]

    b = t.bimodality
    return {"band": t.band, "source": t.source,
            "bimodality": {"verdict": b.verdict, "dip_depth": b.dip_depth, "binder": b.binder,
                           "binder_error": b.binder_error, "branches": [k(x) for x in b.branches],
                           "midpoint": b.midpoint, "fractions": list(b.fractions)},
            "counted": t.counted, "n_events": t.n_events, "total_sweeps": t.total_time,
            "rate_per_sweep": t.rate, "rate_per_sweep_error": t.rate_error,
            "rate_per_sweep_interval": [t.rate_low, t.rate_high],
            "rate_per_sweep_upper_95": t.rate_upper_95,
            "rate_per_site": t.rate_per_volume, "rate_per_site_error": t.rate_per_volume_error,
            "escape": {str(k(j)): {"events": v[0], "sweeps": v[1], "rate": v[2]} for j, v in t.escape.items()},
            "occupation": {str(kk): t.occupation[kk % nf] for kk in branch_range(nf)},
            "event_measurements": t.events,
            "dwells": {str(k(j)): v for j, v in t.dwells_by_branch.items()},
            "censored_first": cens(t.censored_first), "censored_last": cens(t.censored_last),
            "exponential_fit": {"tau_mle": t.fit.tau_mle, "tau_mle_error": t.fit.tau_mle_error,
                                "tau_interval": [t.fit.tau_low, t.fit.tau_high],
                                "tau_hist": t.fit.tau_hist, "tau_hist_error": t.fit.tau_hist_error,
                                "ks_pvalue": t.fit.ks_pvalue, "n": t.fit.n}}


def _clean(x):
    """JSON-safe: numpy to Python, NaN/inf to None."""
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, np.ndarray):
        return _clean(x.tolist())
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        return float(x) if math.isfinite(x) else None
    return x


def analysis_dict(ra: RunAnalysis) -> dict:
    """The JSON document (keys in the module docstring)."""
    series = {k: {"mean": s.mean, "error": s.error, "tau_int": s.tau_int,
                  "tau_int_error": s.tau_int_error, "n_independent": s.n_independent,
                  "window": s.window, "n": s.n, "note": s.note} for k, s in ra.series.items()}
    masses = {}
    for ch, m in ra.masses.items():
        masses[ch] = {"operator": m.operator, "mass": m.mass, "error": m.error, "t_min": m.t_min,
                      "t_max": m.t_max, "chi2": m.chi2, "dof": m.dof, "chi2_dof": m.chi2_dof,
                      "p_value": m.p_value, "amplitude": m.amplitude,
                      "amplitude_error": m.amplitude_error, "acceptable": m.acceptable,
                      "window_reason": m.window_reason, "tree_level_mass": m.tree_level_mass,
                      "n_bins": m.n_bins, "bin_size": m.bin_size, "m_eff": m.m_eff,
                      "m_eff_error": m.m_eff_error, "correlator": m.correlator,
                      "correlator_error": m.correlator_error, "warning": m.warning}
    return _clean({
        "format": "sigmasim-analysis", "format_version": 1, "note": TOY_NOTE,
        "run": str(ra.path) if ra.path else None, "name": ra.name, "status": ra.status,
        "label": ra.label, "config": ra.config.to_dict(),
        "n_measurements": ra.n_measurements, "n_used": ra.n_used,
        "thermalisation": {"cut": ra.cut, "reason": ra.cut_reason, "thermalised": ra.thermalised,
                           "series": ra.cut_series, "checked": ra.cut_checked},
        "series": series, "acceptance": ra.acceptance, "masses": masses,
        "vacuum_alignment_phases": ra.alpha,
        "tunnelling": _tunnelling_dict(ra.tunnelling) if ra.tunnelling is not None else None,
        "branch": ra.branch,
        "warnings": ra.warnings,
    })


def _csv_rows(ra: RunAnalysis):
    run = ra.name
    yield dict(run=run, section="thermalisation", name="cut", value=ra.cut, note=ra.cut_reason)
    for k, s in ra.series.items():
        yield dict(run=run, section="series", name=k, value=s.mean, error=s.error, tau_int=s.tau_int,
                   tau_int_error=s.tau_int_error, n_independent=s.n_independent, note=s.note)
    for k, v in ra.acceptance.items():
        yield dict(run=run, section="acceptance", name=k, value=v)
    for ch, m in ra.masses.items():
        yield dict(run=run, section="mass", name=ch, value=m.mass, error=m.error, t_min=m.t_min,
                   t_max=m.t_max, chi2_dof=m.chi2_dof, p_value=m.p_value,
                   note=m.warning or m.window_reason)
    t = ra.tunnelling
    if t is not None:
        yield dict(run=run, section="tunnelling", name="events", value=t.n_events,
                   note=f"band {t.band:g}, {t.total_time:.0f} sweeps, {t.bimodality.verdict}"
                        + ("" if t.counted else ": band crossings, no rate"))
        yield dict(run=run, section="tunnelling", name="binder", value=t.bimodality.binder,
                   error=t.bimodality.binder_error, note=f"dip depth {_f(t.bimodality.dip_depth, '.2f')}")
        yield dict(run=run, section="tunnelling", name="rate_per_sweep", value=t.rate, error=t.rate_error,
                   note=f"{t.n_events} events; 68% interval [{_f(t.rate_low)}, {_f(t.rate_high)}], "
                        f"95% upper limit {_f(t.rate_upper_95)}")
        yield dict(run=run, section="tunnelling", name="rate_per_site", value=t.rate_per_volume,
                   error=t.rate_per_volume_error)
        yield dict(run=run, section="tunnelling", name="dwell_tau_mle", value=t.fit.tau_mle,
                   error=t.fit.tau_mle_error, note="censored: sweeps / events")
        from sigmasim.vacua import branch_range

        nf = len(t.occupation)
        for kk in branch_range(nf):  # the sigmasim.vacua branch numbers
            yield dict(run=run, section="tunnelling", name=f"occupation[{kk}]", value=float(t.occupation[kk % nf]))


def output_paths(run_path) -> tuple[Path, Path]:
    """``(<dir>/<name>.analysis.json, <dir>/<name>.analysis.csv)`` for ``<dir>/<name>.h5``."""
    p = Path(run_path)
    stem = p.with_suffix("") if p.suffix == ".h5" else p
    return stem.with_name(stem.name + ".analysis.json"), stem.with_name(stem.name + ".analysis.csv")


def write_outputs(ra: RunAnalysis, json_path=None, csv_path=None) -> tuple[Path, Path]:
    """Write the JSON and CSV files (default: :func:`output_paths` of the run)."""
    if json_path is None or csv_path is None:
        if ra.path is None:
            raise SigmasimError("in-memory analysis: give json_path and csv_path")
        dj, dc = output_paths(ra.path)
        json_path, csv_path = json_path or dj, csv_path or dc
    json_path, csv_path = Path(json_path), Path(csv_path)
    from sigmasim.files import atomic_output, write_json  # temporary name, fsync, rename: never truncated

    def write_csv(tmp):
        with open(tmp, "w", newline="") as fh:
            w = csv.DictWriter(fh, fieldnames=CSV_COLUMNS)
            w.writeheader()
            for row in _csv_rows(ra):
                w.writerow({k: ("" if v is None or (isinstance(v, float) and not math.isfinite(v))
                                else (f"{v:.10g}" if isinstance(v, float) else v))
                            for k, v in row.items()})

    write_json(json_path, analysis_dict(ra), what="analysis")
    atomic_output(csv_path, write_csv, what="analysis")
    return json_path, csv_path
