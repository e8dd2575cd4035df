r"""Branch classification, tunnelling events and dwell times (numpy, scipy for the fit).

Branches
--------
At large kappa the degenerate tree-level vacua are ``V = e^{i theta_m} U = e^{i (theta + 2 pi k)/Nf} 1``,
``k = 0..Nf-1`` (see :mod:`sigmasim.vacua` and the README), so the phase of the placement-independent
order parameter ``omega_h = e^{i theta_m} Omega`` labels the branch.  We use the *branch coordinate*

.. math:: x = \frac{N_f \arg(\omega_h) - \theta}{2\pi}

in units of branches: branch ``k`` sits at ``x = k (mod Nf)`` and the midpoint between two
neighbouring branches (phase of ``omega_h`` ``pi/Nf`` away from both) at half-integer ``x``.

``source='det'`` uses the mean determinant instead: ``det V = e^{i Nf theta_m} det U`` has the phase
``theta + 2 pi k`` on every branch, so its phase alone cannot tell branches apart, but its phase
*unwrapped in Monte Carlo time* advances by ``2 pi`` per step ``k -> k + 1`` of the common phase;
``x = (unwrap(arg det V - theta))/(2 pi)``.  This needs measurements dense enough that ``arg det V``
moves by less than ``pi`` between two of them; the ``omega_h`` source has no such requirement.

Hysteresis band
---------------
The first measurement gets the nearest branch ``round(x) mod Nf``.  Afterwards the index changes only
when ``x`` has moved more than ``(1 + band) / 2`` (circular distance modulo ``Nf``) away from the
current branch, i.e. past the midpoint by ``band`` times half the branch spacing (``band * pi/Nf`` in
the phase of ``omega_h``); the new index is then the nearest branch.  ``band = 0`` is plain nearest
branch classification; noise of amplitude below ``band/2`` (in ``x``) around a midpoint creates no
events.  ``0 <= band < 1``.

Dwell times and rates
---------------------
An *event* is a change of the index.  Dwell times are the times (in sweeps) between consecutive
events (completed dwells); the time from the first measurement to the first event and from the last
event to the last measurement are reported separately (also, if there is no event, the whole series
is one censored dwell).

The headline rate per sweep is ``n_events / exposure`` (``exposure`` = sweeps covered by the
series): for exponential (memoryless) dwells it is the maximum-likelihood rate that counts all the
exposure, including the open dwell at the end, and it is unbiased at fixed exposure.  Its interval is
the exact Poisson (Garwood) central 68.27 % interval from chi^2 quantiles,
``[chi2(0.1587; 2n) / 2, chi2(0.8413; 2n + 2) / 2] / exposure``; with no event the result is an
upper limit ``chi2(0.95; 2) / 2 / exposure = 3.0 / exposure`` (95 %).  The exact interval covers the
true rate in at least 68.27 % of repetitions (more for few events: the counts are discrete), so with
few events read the interval, not a Gaussian error; ``rate_error = sqrt(n) / exposure`` is given for
large counts.  The mean dwell is estimated by the censored-exponential maximum likelihood
``tau = exposure / n_events`` (the open dwell at the end enters the exposure but not the count; the
dwell before the first event is, for memoryless dwells, an ordinary exponential time), with the
inverted Garwood interval.  ``1 / mean(completed dwell)`` is *not* used: it drops the long dwells that
the censoring cuts off and the first and last dwell, and is biased upward by factors 1.4 to 10 when
only a few events are seen.  Per-branch escape rates are the events out of a branch over the time
spent in it.  Rates per unit volume divide by the lattice volume.

Bimodality gate
---------------
A rate means something only when the branches are separated vacua.  :func:`bimodality` takes the
most occupied branch ``k1`` and its more occupied neighbour ``k2``, the midpoint ``m`` between them and

* the histogram of ``y = x - m`` (branch units, ``|y| <= 1``): two peaks near ``y = -1/2`` and
  ``+1/2``; the *dip depth* is ``1 - h_min / min(h_left, h_right)`` with ``h_min`` the lowest bin
  between the two peak bins (1: empty midpoint, 0: no dip);
* the Binder-type cumulant ``B = <q^4> / <q^2>^2`` of ``q = Im(omega_h e^{-i phi_m})``,
  ``phi_m = (theta + 2 pi m) / Nf`` (at theta = pi, between the two degenerate branches, ``q`` is
  ``Im omega_h``): ``B = 1`` for two sharp symmetric peaks, ``B = 3`` for one Gaussian peak.

The verdict is ``two vacua`` when both sides hold at least 1 % of the measurements and 20 counts in
their peak bins, the dip depth is at least 0.5 and ``B`` lies clearly below 2 (``B + 2 err < 2``):
the phase histogram alone is blind where ``|omega_h|`` is small, e.g. a real ``Omega`` fluctuating
about 0 (SU(2) at h = 0) has its phase only at 0 and pi, an empty midpoint and ``B = 3``; ``one vacuum`` when one side is (nearly) empty and
the occupied peak lies away from the midpoint; otherwise ``no separated vacua`` (a crossover, or a
lattice too small or too hot for the branches to be distinct).  :func:`tunnelling_analysis` leaves
the rates NaN (``counted = False``) unless the verdict is ``two vacua`` or ``one vacuum`` (then a
rate, or with no event an upper limit, is honest); the index changes are still listed as crossings.
This is a research toy, not a physical prediction.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

__all__ = ["branch_coordinate", "branch_index", "TunnellingResult", "ExponentialFit",
           "tunnelling_analysis", "fit_exponential", "dwell_times", "poisson_interval",
           "poisson_upper_limit", "Bimodality", "bimodality", "binder_ratio", "order_parameter"]


def branch_coordinate(values, theta, nf: int, source: str = "omega_h", theta_m=None) -> np.ndarray:
    """Branch coordinate ``x`` (float64, shape (n,)) of a series; branch k sits at x = k mod nf.

    Parameters
    ----------
    values : complex array (n,)
        ``omega_h`` (``source='omega_h'``) or the mean determinant ``det`` (``source='det'``, the
        run-file series, i.e. ``det U``; it is rotated with ``theta_m`` to ``det V``).
    theta : float or float array (n,)
        The physical angle of each measurement.
    nf : int
    source : {'omega_h', 'det'}
    theta_m : float or array (n,), optional
        Mass phase of each measurement (needed for ``source='det'``; default ``theta / nf``, the
        ``mass`` placement).
    """
    values = np.asarray(values, dtype=np.complex128).ravel()
    theta = np.broadcast_to(np.asarray(theta, dtype=float), values.shape)
    if source == "omega_h":
        return (nf * np.angle(values) - theta) / (2 * np.pi)
    if source == "det":
        tm = theta / nf if theta_m is None else np.broadcast_to(np.asarray(theta_m, float), values.shape)
        phase = np.angle(values * np.exp(1j * nf * tm) * np.exp(-1j * theta))
        return np.unwrap(phase) / (2 * np.pi)
    raise ValueError(f"source must be 'omega_h' or 'det', got {source!r}")


def _circ(d, nf):
    """Circular difference in (-nf/2, nf/2]."""
    return d - nf * np.round(d / nf)


def branch_index(x, nf: int, band: float = 0.5, initial: int | None = None) -> np.ndarray:
    """Branch index series (int64, shape (n,)) of branch coordinates ``x`` with a hysteresis band.

    ``initial`` fixes the index before the first measurement (then the first measurement is tested
    against it like any other); by default it is the nearest branch of ``x[0]``.
    """
    if not 0.0 <= band < 1.0:
        raise ValueError(f"band must be in [0, 1), got {band}")
    x = np.asarray(x, dtype=float).ravel()
    out = np.empty(len(x), dtype=np.int64)
    if len(x) == 0:
        return out
    if nf == 1:
        out[:] = 0
        return out
    thr = 0.5 * (1.0 + band)
    k = int(np.round(x[0])) % nf if initial is None else int(initial) % nf
    near = np.round(x).astype(np.int64) % nf
    # distance to the current branch, circular in (-nf/2, nf/2] (Python scalars: the loop is serial)
    for i, xi in enumerate(x.tolist()):
        d = xi - k
        if abs(d - nf * round(d / nf)) > thr:
            k = int(near[i])
        out[i] = k
    return out


def dwell_times(index, times=None):
    """Events and dwells of an index series.

    Returns
    -------
    events : int array (m,)
        Positions i where ``index[i] != index[i-1]``.
    completed : list of (branch, dwell) tuples
    censored_first, censored_last : (branch, dwell) or None
        ``censored_last`` is None when there is no event (the whole series is ``censored_first``).
    """
    index = np.asarray(index)
    n = len(index)
    t = np.arange(n, dtype=float) if times is None else np.asarray(times, dtype=float)
    events = np.nonzero(index[1:] != index[:-1])[0] + 1
    if n == 0:
        return events, [], None, None
    # an event happens between measurements i-1 and i: put it at the later time (the first time the
    # new branch is seen), so dwells are differences of first-seen times
    if len(events) == 0:
        return events, [], (int(index[0]), float(t[-1] - t[0])), None
    first = (int(index[0]), float(t[events[0]] - t[0]))
    completed = [(int(index[a]), float(t[b] - t[a])) for a, b in zip(events[:-1], events[1:])]
    last = (int(index[events[-1]]), float(t[-1] - t[events[-1]]))
    return events, completed, first, last


ONE_SIGMA = 0.6826894921370859  # central probability of +-1 sigma of a Gaussian


def poisson_interval(n: int, exposure: float, cl: float = ONE_SIGMA) -> tuple[float, float]:
    """Exact (Garwood) central interval ``(low, high)`` of a Poisson rate: ``n`` events in ``exposure``.

    ``low = chi2.ppf((1 - cl)/2, 2n) / 2 / exposure`` (0 for n = 0) and
    ``high = chi2.ppf((1 + cl)/2, 2n + 2) / 2 / exposure`` (Garwood, Biometrika 1936); coverage is at
    least ``cl`` for every true rate.  NaNs for a non-positive exposure.
    """
    from scipy.special import gammaincinv   # chi2.ppf(q, 2k) / 2 = gammaincinv(k, q)

    if not exposure > 0:
        return float("nan"), float("nan")
    a = 0.5 * (1.0 - cl)
    lo = 0.0 if n == 0 else float(gammaincinv(n, a))
    hi = float(gammaincinv(n + 1, 1.0 - a))
    return lo / exposure, hi / exposure


def poisson_upper_limit(n: int, exposure: float, cl: float = 0.95) -> float:
    """One-sided upper limit ``chi2.ppf(cl, 2n + 2) / 2 / exposure`` of a Poisson rate (3.0/exposure at n=0)."""
    from scipy.special import gammaincinv

    if not exposure > 0:
        return float("nan")
    return float(gammaincinv(n + 1, cl)) / exposure


@dataclass
class ExponentialFit:
    """Exponential fit of the dwell-time distribution.

    Attributes
    ----------
    tau_mle, tau_mle_error : float
        Censored-exponential maximum-likelihood mean dwell ``(sum of dwells + sum of censored
        times) / n`` and ``tau / sqrt(n)``.
    tau_low, tau_high : float
        Its exact central 68.27 % interval (the Garwood interval of the rate, inverted).
    tau_hist, tau_hist_error : float
        Fit of ``N0 exp(-t / tau)`` to the histogram of the uncensored dwells
        (scipy.optimize.curve_fit, Poisson weights); NaN when fewer than 3 non-empty bins.  Ignores
        the censored times, so it is biased low when they are long: a cross-check only.
    ks_pvalue : float
        Kolmogorov-Smirnov p-value of the uncensored dwells against the fitted exponential
        (approximate: the scale was fitted, censoring is ignored, and the discretisation of dwells to
        the measurement spacing lowers it).
    n : int
        Uncensored dwells (events).
    censored_time : float
        Total censored time that entered the likelihood.
    """

    tau_mle: float
    tau_mle_error: float
    tau_hist: float
    tau_hist_error: float
    ks_pvalue: float
    n: int
    tau_low: float = float("nan")
    tau_high: float = float("nan")
    censored_time: float = 0.0


def fit_exponential(dwells, bins: int | None = None, censored=()) -> ExponentialFit:
    """Fit an exponential to dwell times ``dwells`` (float array (n,)) with right-censored times.

    ``censored`` are times known only to be shorter than the dwell they belong to (the open dwell
    at the end of a series); the maximum-likelihood mean of an exponential with censoring is
    ``(sum(dwells) + sum(censored)) / len(dwells)``.  Leaving the censored times out biases the mean
    low (long dwells are the ones the end of the series cuts).
    """
    from scipy import optimize, stats

    d = np.asarray(dwells, dtype=float).ravel()
    c = np.asarray(censored, dtype=float).ravel()
    n = len(d)
    nan = float("nan")
    if n == 0:
        return ExponentialFit(nan, nan, nan, nan, nan, 0, nan, nan, float(c.sum()))
    exposure = float(d.sum() + c.sum())
    tau = exposure / n
    tau_err = tau / np.sqrt(n)
    lo_rate, hi_rate = poisson_interval(n, exposure)
    tau_lo = 1.0 / hi_rate if hi_rate > 0 else nan
    tau_hi = 1.0 / lo_rate if lo_rate > 0 else float("inf")
    ks = float(stats.kstest(d, "expon", args=(0.0, tau)).pvalue) if n >= 2 and tau > 0 else nan
    th, the = nan, nan
    if n >= 5 and tau > 0:
        nb = bins or int(max(3, min(30, np.sqrt(n))))
        counts, edges = np.histogram(d, bins=nb, range=(0.0, float(d.max()) + 1e-12))
        mid = 0.5 * (edges[1:] + edges[:-1])
        ok = counts > 0
        if ok.sum() >= 3:
            def model(t, a, tt):
                return a * np.exp(-t / tt)
            try:
                with warnings.catch_warnings():   # few bins: no covariance (then th_err is inf)
                    warnings.simplefilter("ignore", optimize.OptimizeWarning)
                    p, cov = optimize.curve_fit(model, mid[ok], counts[ok], p0=(counts[0], tau),
                                                sigma=np.sqrt(counts[ok]), absolute_sigma=True,
                                                maxfev=10000)
                th, the = float(p[1]), float(np.sqrt(cov[1, 1]))
            except (RuntimeError, ValueError):
                pass
    return ExponentialFit(float(tau), float(tau_err), th, the, ks, n, float(tau_lo), float(tau_hi),
                          float(c.sum()))


VERDICTS = ("two vacua", "one vacuum", "no separated vacua")


@dataclass
class Bimodality:
    """Result of :func:`bimodality` (see the module notes).

    Attributes
    ----------
    verdict : str
        One of :data:`VERDICTS`.
    dip_depth : float
        ``1 - h_min / min(h_left, h_right)`` of the histogram of ``y`` (NaN when one side is empty).
    binder, binder_error : float
        ``<q^4> / <q^2>^2`` of ``q = Im(omega_h e^{-i phi_m})`` and its binned-jackknife error.
    branches : tuple (k1, k2)
        The most occupied branch and its more occupied neighbour.
    midpoint : float
        Branch coordinate ``m`` of the midpoint between them.
    fractions : tuple (f1, f2)
        Fractions of all measurements on the side of k1 and of k2 of the midpoint (within one
        branch spacing of it).
    counts, edges : arrays
        The histogram of ``y`` (``bins`` bins on [-1, 1]).
    n : int
    """

    verdict: str
    dip_depth: float
    binder: float
    binder_error: float
    branches: tuple
    midpoint: float
    fractions: tuple
    counts: np.ndarray
    edges: np.ndarray
    n: int
    nf: int = 0

    @property
    def separated(self) -> bool:
        """True when a tunnelling rate is meaningful (two vacua, or one vacuum: a rate or a limit)."""
        return self.verdict in ("two vacua", "one vacuum")

    def summary(self) -> str:
        from sigmasim.vacua import canonical_branch

        k1, k2 = (canonical_branch(k, self.nf) for k in self.branches) if self.nf else self.branches
        depth = "-" if not np.isfinite(self.dip_depth) else f"{self.dip_depth:.2f}"
        return (f"{self.verdict} (branches {k1}/{k2}: fractions {self.fractions[0]:.3f}/"
                f"{self.fractions[1]:.3f}, dip depth {depth}, <q^4>/<q^2>^2 = "
                f"{self.binder:.3f} +- {self.binder_error:.2g}; 1 for two peaks, 3 for one Gaussian)")


def binder_ratio(q, bin_size: int | None = None) -> tuple[float, float]:
    """``<q^4> / <q^2>^2`` of a real series and its binned-jackknife error (auto bin size by default)."""
    from sigmasim.analysis.resampling import jackknife

    q = np.asarray(q, dtype=float).ravel()
    nan = float("nan")
    if len(q) < 4 or not np.any(q != 0):
        return nan, nan
    cols = np.column_stack([q ** 2, q ** 4])

    def ratio(m):
        return m[1] / m[0] ** 2

    try:
        r = jackknife(cols, ratio, bin_size=bin_size)
        return float(ratio(cols.mean(axis=0))), float(r.error)
    except (ValueError, ZeroDivisionError):
        return float(ratio(cols.mean(axis=0))), nan


def order_parameter(values, theta, nf: int, midpoint: float) -> np.ndarray:
    """``q = Im(omega_h e^{-i phi_m})``, ``phi_m = (theta + 2 pi m) / nf``: the component of omega_h
    across the midpoint ``m`` between two branches (``Im omega_h`` at theta = pi, m = -1/2)."""
    values = np.asarray(values, dtype=np.complex128).ravel()
    theta = np.broadcast_to(np.asarray(theta, dtype=float), values.shape)
    return (values * np.exp(-1j * (theta + 2 * np.pi * midpoint) / nf)).imag


def bimodality(values, theta, nf: int, *, bins: int = 40, min_depth: float = 0.5,
               min_fraction: float = 0.01, min_peak: int = 20, bin_size: int | None = None,
               max_binder: float = 2.0) -> Bimodality:
    """Two-peak test of an ``omega_h`` series (see the module notes); ``values`` complex (n,)."""
    values = np.asarray(values, dtype=np.complex128).ravel()
    n = len(values)
    edges = np.linspace(-1.0, 1.0, bins + 1)
    nan = float("nan")
    if nf < 2 or n == 0:
        return Bimodality("one vacuum", nan, nan, nan, (0, 0), nan, (1.0, 0.0), np.zeros(bins, int), edges, n,
                          max(nf, 1))
    x = branch_coordinate(values, theta, nf)
    near = np.round(x).astype(np.int64) % nf
    occ = np.bincount(near, minlength=nf)
    k1 = int(np.argmax(occ))
    cand = []
    for s in (+1, -1):
        m = k1 + 0.5 * s
        k2 = (k1 + s) % nf
        close = np.count_nonzero(np.abs(_circ(x - m, nf)) < 0.25)
        cand.append((occ[k2], close, -s, m, k2))   # ties: more samples near the midpoint, then upward
    _, _, sgn, m, k2 = max(cand)     # sgn = -s: k1 sits at y = -s/2
    y = _circ(x - m, nf)
    counts, _ = np.histogram(y[np.abs(y) <= 1.0], bins=edges)
    left, right = float(np.mean((y < 0) & (y >= -1))), float(np.mean((y > 0) & (y <= 1)))
    half = bins // 2
    pl, pr = int(np.argmax(counts[:half])), half + int(np.argmax(counts[half:]))
    hl, hr = counts[pl], counts[pr]
    q = order_parameter(values, theta, nf, m)
    b, be = binder_ratio(q, bin_size)
    if min(left, right) < min_fraction or min(hl, hr) < min_peak:
        # one side (nearly) empty: a vacuum if the occupied peak sits away from the midpoint
        big = pl if hl >= hr else pr
        centre = 0.5 * (edges[big] + edges[big + 1])
        verdict = "one vacuum" if abs(centre) >= 0.25 else "no separated vacua"
        depth = nan
    else:
        depth = float(1.0 - counts[pl:pr + 1].min() / min(hl, hr))
        # the cumulant must agree: two peaks in the phase with q Gaussian about 0 are no two vacua
        two_peaked_q = np.isfinite(b) and b + 2.0 * (be if np.isfinite(be) else 0.0) < max_binder
        verdict = "two vacua" if depth >= min_depth and two_peaked_q else "no separated vacua"
    fr = (left, right) if sgn < 0 else (right, left)
    return Bimodality(verdict, depth, b, be, (k1, int(k2)), float(m), fr, counts, edges, n, nf)


@dataclass
class TunnellingResult:
    """Result of :func:`tunnelling_analysis` (times in sweeps).

    Attributes
    ----------
    index : int array (n,)
        Branch index per measurement.
    x : float array (n,)
        Branch coordinate.
    events : int array (m,)
        Measurement positions where the index changed.
    n_events : int
        Number of index changes (tunnelling events when ``counted``, else mere band crossings).
    completed : list of (branch, dwell)
    censored_first, censored_last : (branch, dwell) or None
    dwells_by_branch : dict int -> float array
        Completed dwells per branch.
    occupation : float array (nf,)
        Fraction of measurements in each branch.
    total_time : float
        Sweeps covered by the series (the exposure).
    counted : bool
        The bimodality gate passed (``bimodality.separated``); otherwise all rates are NaN.
    rate, rate_error : float
        ``n_events / total_time`` per sweep and ``sqrt(n_events) / total_time`` (NaN without events).
    rate_low, rate_high : float
        Exact Poisson (Garwood) central 68.27 % interval of the rate.
    rate_upper_95 : float
        One-sided 95 % upper limit (the statement to make when there is no event).
    rate_per_volume, rate_per_volume_error : float
        ``rate / volume`` (NaN if no volume given).
    escape : dict int -> (events, time, rate)
        Events out of each branch, sweeps spent in it (as seen by the measurements) and their ratio.
    fit : ExponentialFit
        Censored-exponential fit of the dwells.
    bimodality : Bimodality
    band : float
    source : str
    """

    index: np.ndarray
    x: np.ndarray
    events: np.ndarray
    n_events: int
    completed: list
    censored_first: tuple | None
    censored_last: tuple | None
    dwells_by_branch: dict
    occupation: np.ndarray
    total_time: float
    counted: bool
    rate: float
    rate_error: float
    rate_low: float
    rate_high: float
    rate_upper_95: float
    rate_per_volume: float
    rate_per_volume_error: float
    escape: dict
    fit: ExponentialFit
    bimodality: Bimodality
    band: float
    source: str
    extra: dict = field(default_factory=dict)

    def rate_text(self, per: str = "sweep") -> str:
        """The headline: rate with its exact interval and the number of events, or a limit, or why not."""
        if not self.counted:
            return (f"no rate: {self.bimodality.verdict} in the histogram of omega_h "
                    f"({self.n_events} band crossings are not tunnelling events)")
        if self.n_events == 0:
            return f"no events in {self.total_time:.0f} sweeps: rate < {self.rate_upper_95:.3g} per {per} (95 % upper limit)"
        return (f"{self.rate:.4g} per {per} (68 % interval [{self.rate_low:.3g}, {self.rate_high:.3g}], "
                f"{self.n_events} events / {self.total_time:.0f} sweeps)")

    def summary(self) -> str:
        from sigmasim.vacua import branch_range

        nf = len(self.occupation)
        return (self.rate_text() + "; occupation " + " ".join(f"k={k}: {self.occupation[k % nf]:.3f}"
                                                             for k in branch_range(nf))
                + "; " + self.bimodality.summary())


def tunnelling_analysis(values, theta, nf: int, *, source: str = "omega_h", band: float = 0.5,
                        sweeps=None, volume: int | None = None, n_boot: int = 1000, seed: int = 0,
                        theta_m=None, gate: bool = True) -> TunnellingResult:
    """Classify a series into branches, test for separated vacua and measure tunnelling.

    Parameters
    ----------
    values : complex array (n,)
        ``omega_h`` or ``det`` series (see :func:`branch_coordinate`).
    theta : float or array (n,)
    nf : int
    source : {'omega_h', 'det'}
    band : float
        Hysteresis band in [0, 1) (see the module notes).
    sweeps : int array (n,), optional
        Sweep of each measurement (the run file's ``series/sweep``); default 0, 1, 2, ...
    volume : int, optional
        Lattice volume for the rate per unit volume.
    n_boot, seed : int
        Unused (kept for callers of the former bootstrap estimate).
    gate : bool
        Leave the rates NaN unless :func:`bimodality` finds separated vacua (default).  The gate
        needs the ``omega_h`` series; with ``source='det'`` it is skipped.
    """
    x = branch_coordinate(values, theta, nf, source, theta_m)
    idx = branch_index(x, nf, band)
    t = np.arange(len(x), dtype=float) if sweeps is None else np.asarray(sweeps, dtype=float)
    events, completed, first, last = dwell_times(idx, t)
    by = {k: np.array([w for b, w in completed if b == k], dtype=float) for k in range(nf)}
    occ = np.bincount(idx, minlength=nf)[:nf] / max(1, len(idx))
    total = float(t[-1] - t[0]) if len(t) else 0.0
    nan = float("nan")
    if source == "omega_h":
        bim = bimodality(values, theta, nf)
    else:
        bim = Bimodality("not tested", nan, nan, nan, (0, 0), nan, (nan, nan), np.zeros(0, int),
                         np.zeros(1), len(x))
    counted = bool(bim.separated or not gate or source != "omega_h")
    n_ev = int(len(events))
    # uncensored dwells: the completed ones and (memoryless dwells) the time to the first event;
    # censored: the open dwell at the end, or the whole series without an event
    unc = ([first[1]] if len(events) else []) + [w for _, w in completed]
    cens = [last[1]] if last is not None else ([first[1]] if first is not None else [])
    fit = fit_exponential(unc, censored=cens)
    # time spent in each branch, as seen at the measurements (each interval to the branch of its start)
    spent = np.zeros(nf)
    if len(t) > 1:
        np.add.at(spent, idx[:-1], np.diff(t))
    out = np.bincount(idx[events - 1], minlength=nf)[:nf] if n_ev else np.zeros(nf, int)
    escape = {k: (int(out[k]), float(spent[k]), float(out[k] / spent[k]) if spent[k] > 0 and counted else nan)
              for k in range(nf)}
    if counted and total > 0:
        rate = n_ev / total
        rate_err = np.sqrt(n_ev) / total if n_ev else nan
        lo, hi = poisson_interval(n_ev, total)
        up95 = poisson_upper_limit(n_ev, total)
    else:
        rate = rate_err = lo = hi = up95 = nan
    vol = float(volume) if volume else nan
    return TunnellingResult(idx, x, events, n_ev, completed, first, last, by, occ, total, counted,
                            float(rate), float(rate_err), float(lo), float(hi), float(up95),
                            rate / vol, rate_err / vol, escape, fit, bim, band, source)
