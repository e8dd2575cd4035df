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
event to the last measurement are *censored* and reported separately (also, if there is no event,
the whole series is one censored dwell).  The tunnelling rate per sweep is
``1 / mean(completed dwell)`` with a seeded bootstrap error over the completed dwells; the censored
maximum-likelihood rate ``n_events / total time`` (exponential dwells, all exposure counted) is given
too.  Rates per unit volume divide by the lattice volume.  This is a research toy, not a physical
prediction.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["branch_coordinate", "branch_index", "TunnellingResult", "ExponentialFit",
           "tunnelling_analysis", "fit_exponential", "dwell_times"]


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
    for i, xi in enumerate(x):
        if abs(_circ(xi - k, nf)) > thr:
            k = int(np.round(xi)) % nf
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


@dataclass
class ExponentialFit:
    """Exponential fit of the dwell-time distribution.

    Attributes
    ----------
    tau_mle, tau_mle_error : float
        Maximum-likelihood mean dwell (scipy.stats.expon.fit with location 0) and its error
        ``tau / sqrt(n)``.
    tau_hist, tau_hist_error : float
        Fit of ``N0 exp(-t / tau)`` to the histogram of dwells (scipy.optimize.curve_fit, Poisson
        weights); NaN when fewer than 3 non-empty bins.
    ks_pvalue : float
        Kolmogorov-Smirnov p-value of the dwells against the fitted exponential (approximate, the
        scale was fitted; discretisation of dwells to the measurement spacing lowers it).
    n : int
    """

    tau_mle: float
    tau_mle_error: float
    tau_hist: float
    tau_hist_error: float
    ks_pvalue: float
    n: int


def fit_exponential(dwells, bins: int | None = None) -> ExponentialFit:
    """Fit an exponential to dwell times (float array (n,), n >= 1)."""
    from scipy import optimize, stats

    d = np.asarray(dwells, dtype=float)
    n = len(d)
    if n == 0:
        nan = float("nan")
        return ExponentialFit(nan, nan, nan, nan, nan, 0)
    _, scale = stats.expon.fit(d, floc=0.0)
    tau = float(scale)
    tau_err = tau / np.sqrt(n)
    ks = float(stats.kstest(d, "expon", args=(0.0, tau)).pvalue) if n >= 2 and tau > 0 else float("nan")
    th, the = float("nan"), float("nan")
    if n >= 5 and tau > 0:
        nb = bins or int(max(3, min(30, np.sqrt(n))))
        counts, edges = np.histogram(d, bins=nb, range=(0.0, float(d.max()) + 1e-12))
        mid = 0.5 * (edges[1:] + edges[:-1])
        ok = counts > 0
        if ok.sum() >= 3:
            def model(t, a, tt):
                return a * np.exp(-t / tt)
            try:
                p, cov = optimize.curve_fit(model, mid[ok], counts[ok], p0=(counts[0], tau),
                                            sigma=np.sqrt(counts[ok]), absolute_sigma=True,
                                            maxfev=10000)
                th, the = float(p[1]), float(np.sqrt(cov[1, 1]))
            except (RuntimeError, ValueError):
                pass
    return ExponentialFit(tau, float(tau_err), th, the, ks, n)


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
    completed : list of (branch, dwell)
    censored_first, censored_last : (branch, dwell) or None
    dwells_by_branch : dict int -> float array
        Completed dwells per branch.
    occupation : float array (nf,)
        Fraction of measurements in each branch.
    total_time : float
        Sweeps covered by the series.
    rate, rate_error : float
        ``1 / mean(completed dwell)`` per sweep and its bootstrap error (NaN without completed dwells).
    rate_mle, rate_mle_error : float
        ``n_events / total_time`` and ``sqrt(n_events) / total_time``.
    rate_per_volume, rate_per_volume_error : float
        ``rate / volume`` (NaN if no volume given).
    fit : ExponentialFit
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
    rate: float
    rate_error: float
    rate_mle: float
    rate_mle_error: float
    rate_per_volume: float
    rate_per_volume_error: float
    fit: ExponentialFit
    band: float
    source: str
    extra: dict = field(default_factory=dict)

    def summary(self) -> str:
        return (f"{self.n_events} events, rate {self.rate:.4g} +- {self.rate_error:.2g} /sweep "
                f"(censored MLE {self.rate_mle:.4g} +- {self.rate_mle_error:.2g}), occupation "
                + " ".join(f"{o:.3f}" for o in self.occupation))


def tunnelling_analysis(values, theta, nf: int, *, source: str = "omega_h", band: float = 0.5,
                        sweeps=None, volume: int | None = None, n_boot: int = 1000, seed: int = 0,
                        theta_m=None) -> TunnellingResult:
    """Classify a series into branches and measure tunnelling.

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
    n_boot : int
        Bootstrap samples over completed dwells.
    seed : int
        Bootstrap seed.
    """
    x = branch_coordinate(values, theta, nf, source, theta_m)
    idx = branch_index(x, nf, band)
    t = np.arange(len(x), dtype=float) if sweeps is None else np.asarray(sweeps, dtype=float)
    events, completed, first, last = dwell_times(idx, t)
    d = np.array([w for _, w in completed], dtype=float)
    by = {k: np.array([w for b, w in completed if b == k], dtype=float) for k in range(nf)}
    occ = np.bincount(idx, minlength=nf)[:nf] / max(1, len(idx))
    total = float(t[-1] - t[0]) if len(t) else 0.0
    nan = float("nan")
    rate = rate_err = nan
    if len(d) and d.mean() > 0:
        rate = 1.0 / d.mean()
        rng = np.random.default_rng(seed)
        means = d[rng.integers(0, len(d), size=(n_boot, len(d)))].mean(axis=1)
        means = means[means > 0]
        rate_err = float(np.std(1.0 / means, ddof=1)) if len(means) > 1 else nan
    n_ev = int(len(events))
    rate_mle = n_ev / total if total > 0 else nan
    rate_mle_err = np.sqrt(max(n_ev, 1)) / total if total > 0 else nan
    vol = float(volume) if volume else nan
    return TunnellingResult(idx, x, events, n_ev, completed, first, last, by, occ, total, rate,
                            rate_err, rate_mle, rate_mle_err, rate / vol, rate_err / vol,
                            fit_exponential(d), band, source)
