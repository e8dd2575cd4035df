"""Zero-momentum time-slice correlators on a periodic lattice of time extent T.

Input are per-configuration *time-slice sums* ``S(t) = sum_{x in slice t} O(x)``
as arrays of shape ``(N_conf, T)`` (real or complex).

Definitions
-----------
Connected correlator, averaged over all source times ``t0`` (periodic)::

    C(t) = 1/V_s * 1/T sum_{t0} Re < (S_a(t0+t) - <S_a>) conj(S_b(t0) - <S_b>) >

where ``<S>`` is the ensemble mean over all configurations and time slices
(translation invariance) and ``V_s`` the optional ``spatial_volume``.  For
real operators ``conj`` is the identity; for complex ones the source is
conjugated, and only the real part is kept (for hermitian-conjugate pairs
the imaginary part vanishes in expectation).  Subtracting the fluctuation
about the ensemble mean per configuration has the same expectation as
``<S_a S_b> - <S_a><S_b>`` but less variance.

Honest errors
-------------
The vacuum subtraction uses the ensemble mean, which is itself a
fluctuating estimate.  :func:`correlator_jackknife` and
:func:`correlator_bootstrap` therefore recompute ``<S_a>``, ``<S_b>`` for every
resample (leave-one-bin-out / bootstrap) instead of resampling the already
subtracted per-configuration samples of :func:`connected_correlator`.

Model
-----
Fits use ``C(t) = A cosh(m (t - T/2)) [+ A2 cosh(m2 (t - T/2))]``, the exact
form of a single state propagating forward and backward on a periodic lattice
(common practice; exact for the free field).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.stats

from .resampling import (
    bin_data,
    bootstrap,
    bootstrap_covariance,
    jackknife,
    jackknife_covariance,
)

__all__ = [
    "CorrelatorEstimate",
    "FitResult",
    "WindowScanResult",
    "connected_correlator",
    "correlator_jackknife",
    "correlator_bootstrap",
    "symmetrise",
    "effective_mass",
    "effective_mass_errors",
    "cosh_model",
    "fit_cosh",
    "fit_correlator",
    "scan_fit_windows",
]


# --------------------------------------------------------------------------
# correlators
# --------------------------------------------------------------------------


def _check_slices(a, name):
    a = np.asarray(a)
    if a.ndim != 2:
        raise ValueError(f"{name} must have shape (N_conf, T), got {a.shape}")
    if a.shape[0] < 2 or a.shape[1] < 2:
        raise ValueError(f"{name} needs N_conf >= 2 and T >= 2, got shape {a.shape}")
    return a


def _circular_product(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``1/T sum_{t0} a(t0+t) conj(b(t0))`` per row, via FFT along time."""
    T = a.shape[1]
    p = np.fft.ifft(np.fft.fft(a, axis=1) * np.conj(np.fft.fft(b, axis=1)), axis=1) / T
    if not (np.iscomplexobj(a) or np.iscomplexobj(b)):
        p = p.real
    return p


def connected_correlator(
    slice_sums_a: np.ndarray,
    slice_sums_b: np.ndarray | None = None,
    *,
    spatial_volume: float | None = None,
) -> np.ndarray:
    """Per-configuration connected correlator averaged over source times.

    Parameters
    ----------
    slice_sums_a : array_like
        Real or complex, shape ``(N_conf, T)``: sink operator slice sums.
    slice_sums_b : array_like, optional
        Same shape: source operator; default ``slice_sums_a``.
    spatial_volume : float, optional
        ``V_s``; the result is divided by it if given.

    Returns
    -------
    numpy.ndarray
        ``float64``, shape ``(N_conf, T)``: samples whose mean over
        configurations is ``C(t)`` (module docstring).  For errors use
        :func:`correlator_jackknife`, which redoes the subtraction per sample.
    """
    a = _check_slices(slice_sums_a, "slice_sums_a")
    b = a if slice_sums_b is None else _check_slices(slice_sums_b, "slice_sums_b")
    if a.shape != b.shape:
        raise ValueError(f"shape mismatch {a.shape} vs {b.shape}")
    c = _circular_product(a - a.mean(), b - b.mean()).real
    if spatial_volume is not None:
        c = c / float(spatial_volume)
    return np.ascontiguousarray(c, dtype=float)


@dataclass(frozen=True, eq=False)
class CorrelatorEstimate:
    """Correlator with resampling errors.

    Attributes
    ----------
    mean : numpy.ndarray
        ``float64``, shape ``(T,)``: ``C(t)`` on the full ensemble.
    error : numpy.ndarray
        ``float64``, shape ``(T,)``.
    covariance : numpy.ndarray
        ``float64``, shape ``(T, T)``: covariance of ``mean``.
    samples : numpy.ndarray
        ``float64``, shape ``(n_samples, T)``: jackknife or bootstrap samples.
    method : str
        ``"jackknife"`` or ``"bootstrap"``.
    n_bins : int
        Number of independent bins behind the samples.
    """

    mean: np.ndarray
    error: np.ndarray
    covariance: np.ndarray
    samples: np.ndarray
    method: str
    n_bins: int

    @property
    def T(self) -> int:
        """Time extent."""
        return int(self.mean.shape[0])


def _resample_input(a, b, bin_size):
    """Per-config vectors ``[P(t), abar, bbar]`` whose means determine C(t)."""
    a = _check_slices(a, "slice_sums_a")
    b = a if b is None else _check_slices(b, "slice_sums_b")
    if a.shape != b.shape:
        raise ValueError(f"shape mismatch {a.shape} vs {b.shape}")
    # shifting by the full-ensemble mean leaves C(t) invariant but avoids
    # cancellations between <S S> and <S><S> when <O> is large
    a = a - a.mean()
    b = b - b.mean()
    p = _circular_product(a, b)
    x = np.concatenate([p, a.mean(axis=1)[:, None], b.mean(axis=1)[:, None]], axis=1)
    return bin_data(x, bin_size) if bin_size != 1 else x


def _corr_func(T, spatial_volume, sym):
    vs = 1.0 if spatial_volume is None else float(spatial_volume)

    def f(m):
        c = np.real(m[:T] - m[T] * np.conj(m[T + 1])) / vs
        return symmetrise(c) if sym else c

    return f


def correlator_jackknife(
    slice_sums_a: np.ndarray,
    slice_sums_b: np.ndarray | None = None,
    *,
    bin_size: int | None = 1,
    spatial_volume: float | None = None,
    symmetrise_result: bool = False,
) -> CorrelatorEstimate:
    """Connected correlator with leave-one-bin-out jackknife errors.

    The vacuum subtraction ``<S_a><S_b>`` is recomputed on every jackknife
    sample (see module docstring).

    Parameters
    ----------
    slice_sums_a, slice_sums_b : array_like
        Shape ``(N_conf, T)``, as in :func:`connected_correlator`.
    bin_size : int or None, default 1
        Configurations per bin; ``None`` picks
        :func:`sigmasim.analysis.resampling.auto_bin_size`.
    spatial_volume : float, optional
        Divide by ``V_s``.
    symmetrise_result : bool, default False
        Apply :func:`symmetrise` to every sample.

    Returns
    -------
    CorrelatorEstimate
    """
    x = _resample_input(slice_sums_a, slice_sums_b, bin_size)
    T = x.shape[1] - 2
    r = jackknife(x, _corr_func(T, spatial_volume, symmetrise_result))
    return CorrelatorEstimate(r.value, r.error, r.covariance, r.samples, "jackknife", r.n_bins)


def correlator_bootstrap(
    slice_sums_a: np.ndarray,
    slice_sums_b: np.ndarray | None = None,
    *,
    bin_size: int | None = 1,
    spatial_volume: float | None = None,
    symmetrise_result: bool = False,
    n_boot: int = 1000,
    rng: np.random.Generator | int | None = 0,
) -> CorrelatorEstimate:
    """Connected correlator with bootstrap errors (bins resampled).

    Parameters are as for :func:`correlator_jackknife`, plus ``n_boot`` and
    ``rng`` (seed or :class:`numpy.random.Generator`).

    Returns
    -------
    CorrelatorEstimate
    """
    x = _resample_input(slice_sums_a, slice_sums_b, bin_size)
    T = x.shape[1] - 2
    r = bootstrap(x, _corr_func(T, spatial_volume, symmetrise_result), n_boot=n_boot, rng=rng)
    return CorrelatorEstimate(r.value, r.error, r.covariance, r.samples, "bootstrap", r.n_bins)


def symmetrise(c: np.ndarray, axis: int = -1) -> np.ndarray:
    """Average ``C(t)`` and ``C(T - t)`` (indices mod T).

    Parameters
    ----------
    c : array_like
        Shape ``(..., T, ...)``.
    axis : int, default -1
        Time axis.

    Returns
    -------
    numpy.ndarray
        Same shape; ``out[t] = (c[t] + c[(T - t) % T]) / 2``.
    """
    c = np.asarray(c)
    T = c.shape[axis]
    idx = (-np.arange(T)) % T
    return 0.5 * (c + np.take(c, idx, axis=axis))


# --------------------------------------------------------------------------
# effective masses
# --------------------------------------------------------------------------


def _logcosh(x: float) -> float:
    """Overflow-free ``log cosh x``."""
    ax = abs(x)
    return ax + np.log1p(np.exp(-2.0 * ax)) - np.log(2.0)


def _cosh_mass_single(r: float, a: float) -> float:
    """Solve ``cosh(m a) / cosh(m (a - 1)) = r`` for ``m >= 0``, ``a = T/2 - t``."""
    if not np.isfinite(r) or r <= 0.0:
        return np.nan
    if a <= 0.0:
        # mirror: cosh(m a)/cosh(m(a-1)) = 1 / f_{1-a}(m)
        a, r = 1.0 - a, 1.0 / r
    if a < 1.0:
        return np.nan  # t = (T-1)/2 for odd T: ratio is 1 for every m
    if r == 1.0:
        return 0.0
    if r < 1.0:
        return np.nan  # no decaying solution
    lr = np.log(r)

    def g(m):
        return _logcosh(m * a) - _logcosh(m * (a - 1.0)) - lr

    # f(m) >= exp(m)/2, hence f(log 2r) >= r: a valid bracket
    return scipy.optimize.brentq(
        g, 0.0, np.log(2.0 * r), xtol=1e-15, rtol=4.0 * np.finfo(float).eps, maxiter=200
    )


def effective_mass(
    c: np.ndarray,
    kind: Literal["cosh", "log"] = "cosh",
    T: int | None = None,
) -> np.ndarray:
    """Effective mass ``m_eff(t)`` for ``t = 0..T-2``.

    ``kind="log"``: ``m = log(C(t) / C(t+1))``.
    ``kind="cosh"``: solves ``C(t)/C(t+1) = cosh(m (t - T/2)) / cosh(m (t+1 - T/2))``
    with :func:`scipy.optimize.brentq` (periodic lattice, forward+backward).

    Parameters
    ----------
    c : array_like
        Real, shape ``(..., T)``: correlator over the full periodic extent.
    kind : {"cosh", "log"}
    T : int, optional
        Time extent; default ``c.shape[-1]``.

    Returns
    -------
    numpy.ndarray
        ``float64``, shape ``(..., T - 1)``; NaN where no (real, positive)
        solution exists, e.g. a non-positive ratio or noise making the ratio
        fall on the wrong side of 1, and at ``t = (T-1)/2`` for odd ``T``.
    """
    c = np.asarray(c, dtype=float)
    n = c.shape[-1]
    T = n if T is None else int(T)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = c[..., :-1] / c[..., 1:]
    if kind == "log":
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(ratio > 0, np.log(np.where(ratio > 0, ratio, 1.0)), np.nan)
    if kind != "cosh":
        raise ValueError(f"kind must be 'cosh' or 'log', got {kind!r}")
    out = np.empty_like(ratio)
    a = 0.5 * T - np.arange(n - 1)
    flat_r = ratio.reshape(-1, n - 1)
    flat_o = out.reshape(-1, n - 1)
    for i in range(flat_r.shape[0]):
        for t in range(n - 1):
            flat_o[i, t] = _cosh_mass_single(flat_r[i, t], a[t])
    return out


def effective_mass_errors(
    estimate: CorrelatorEstimate, kind: Literal["cosh", "log"] = "cosh"
) -> tuple[np.ndarray, np.ndarray]:
    """Effective mass and its resampling error.

    Parameters
    ----------
    estimate : CorrelatorEstimate
        From :func:`correlator_jackknife` or :func:`correlator_bootstrap`.
    kind : {"cosh", "log"}

    Returns
    -------
    m_eff : numpy.ndarray
        ``float64``, shape ``(T - 1,)``, from the full-ensemble correlator.
    error : numpy.ndarray
        ``float64``, shape ``(T - 1,)``; NaN where any sample has no solution.
    """
    m = effective_mass(estimate.mean, kind)
    s = effective_mass(estimate.samples, kind)
    cov = jackknife_covariance(s) if estimate.method == "jackknife" else bootstrap_covariance(s)
    return m, np.sqrt(np.diag(cov))


# --------------------------------------------------------------------------
# fits
# --------------------------------------------------------------------------


def cosh_model(t: np.ndarray, params: np.ndarray, T: int) -> np.ndarray:
    """``sum_k A_k cosh(m_k (t - T/2))`` for ``params = (A_1, m_1, A_2, m_2, ...)``.

    Parameters
    ----------
    t : array_like
        Times, shape ``(n,)``.
    params : array_like
        ``float64``, shape ``(2 * n_states,)``.
    T : int
        Time extent.

    Returns
    -------
    numpy.ndarray
        ``float64``, shape ``(n,)``.
    """
    tau = np.asarray(t, dtype=float) - 0.5 * T
    p = np.asarray(params, dtype=float)
    return sum(p[2 * k] * np.cosh(p[2 * k + 1] * tau) for k in range(p.size // 2))


def _cosh_jac(t, params, T):
    tau = np.asarray(t, dtype=float) - 0.5 * T
    p = np.asarray(params, dtype=float)
    cols = []
    for k in range(p.size // 2):
        cols.append(np.cosh(p[2 * k + 1] * tau))
        cols.append(p[2 * k] * tau * np.sinh(p[2 * k + 1] * tau))
    return np.stack(cols, axis=1)


@dataclass(frozen=True, eq=False)
class FitResult:
    """Correlated fit of ``sum_k A_k cosh(m_k (t - T/2))``.

    Attributes
    ----------
    params : numpy.ndarray
        ``float64``, shape ``(2 n_states,)``: ``(A_1, m_1, A_2, m_2, ...)``,
        states ordered by increasing mass.
    errors : numpy.ndarray
        ``float64``, same shape: ``sqrt(diag(covariance))``.
    covariance : numpy.ndarray
        ``float64``, shape ``(2 n_states, 2 n_states)``: ``(J^T C^-1 J)^-1``.
    chi2 : float
        ``r^T C^-1 r`` at the minimum.
    dof : int
        Number of points minus number of parameters.
    p_value : float
        ``scipy.stats.chi2.sf(chi2, dof)``.
    t_min, t_max : int
        Fit window (inclusive).
    T : int
        Time extent.
    n_states : int
        Number of cosh terms.
    """

    params: np.ndarray
    errors: np.ndarray
    covariance: np.ndarray
    chi2: float
    dof: int
    p_value: float
    t_min: int
    t_max: int
    T: int
    n_states: int

    @property
    def mass(self) -> float:
        """Ground-state mass ``m_1``."""
        return float(self.params[1])

    @property
    def mass_error(self) -> float:
        """Error of ``m_1``."""
        return float(self.errors[1])


def _initial_guess(t, y, T, n_states):
    m0 = _cosh_mass_single(y[0] / y[1], 0.5 * T - t[0]) if y[1] != 0 else np.nan
    if not np.isfinite(m0) or m0 <= 0:
        with np.errstate(divide="ignore", invalid="ignore"):
            m0 = abs(np.log(abs(y[0] / y[1]))) if y[1] != 0 else 0.5
        if not np.isfinite(m0) or m0 <= 0:
            m0 = 0.5
    A0 = y[0] / np.cosh(m0 * (t[0] - 0.5 * T))
    p0 = [A0, m0]
    for k in range(1, n_states):
        p0 += [0.1 * A0, (2.0 * k) * m0 + 0.5]
    return np.array(p0, dtype=float)


def fit_cosh(
    c: np.ndarray,
    covariance: np.ndarray,
    T: int,
    t_min: int,
    t_max: int,
    *,
    n_states: int = 1,
    p0: np.ndarray | None = None,
    n_samples: int | None = None,
) -> FitResult:
    """Correlated least-squares fit of ``cosh_model`` on ``[t_min, t_max]``.

    Minimises ``chi2 = r^T C^-1 r`` with ``r = model - c`` restricted to the
    window, using a Cholesky whitening of ``C`` and
    :func:`scipy.optimize.least_squares` with the analytic Jacobian.

    Parameters
    ----------
    c : array_like
        Real, shape ``(T,)``: correlator (mean).
    covariance : array_like
        Real, shape ``(T, T)``: covariance of ``c``.
    T : int
        Time extent (defines ``t - T/2``).
    t_min, t_max : int
        Inclusive window, ``0 <= t_min < t_max < len(c)``.
    n_states : int, default 1
        1 or more cosh terms.
    p0 : array_like, optional
        Start ``(A_1, m_1, ...)``; default from the effective mass at ``t_min``.
    n_samples : int, optional
        Number of independent bins the covariance was estimated from; if
        given, ``n_samples <= n_points`` raises (singular sample covariance).

    Returns
    -------
    FitResult

    Raises
    ------
    ValueError
        Too few points (``n_points <= 2 n_states``, no degrees of freedom),
        too few samples for the covariance, or a covariance that is not
        positive definite.
    """
    c = np.asarray(c, dtype=float)
    cov = np.asarray(covariance, dtype=float)
    if not (0 <= t_min < t_max < c.shape[0]):
        raise ValueError(f"invalid fit window [{t_min}, {t_max}] for {c.shape[0]} points")
    t = np.arange(t_min, t_max + 1)
    n_pts, n_par = t.size, 2 * n_states
    # need dof >= 1 for a chi2 test (common practice, no source)
    if n_pts <= n_par:
        raise ValueError(
            f"too few points for the fit: {n_pts} points in [{t_min}, {t_max}] for "
            f"{n_par} parameters (need at least {n_par + 1} for dof >= 1)"
        )
    # a sample covariance of n samples has rank <= n - 1, so it is singular
    # unless n > n_pts (linear algebra; common practice, no source)
    if n_samples is not None and n_samples <= n_pts:
        raise ValueError(
            f"too few samples for the covariance: N_bins = {n_samples} <= {n_pts} fit "
            "points; the sample covariance matrix would be singular"
        )
    y = c[t]
    C = cov[np.ix_(t, t)]
    try:
        # Cholesky fails exactly when C is not positive definite (common practice)
        L = np.linalg.cholesky(0.5 * (C + C.T))
    except np.linalg.LinAlgError as exc:
        raise ValueError("covariance matrix in the fit window is not positive definite") from exc

    def resid(p):
        return scipy.linalg.solve_triangular(L, cosh_model(t, p, T) - y, lower=True)

    def jac(p):
        return scipy.linalg.solve_triangular(L, _cosh_jac(t, p, T), lower=True)

    start = _initial_guess(t, y, T, n_states) if p0 is None else np.asarray(p0, dtype=float)
    if start.shape != (n_par,):
        raise ValueError(f"p0 must have shape ({n_par},), got {start.shape}")
    # cosh is even in m, so the fit needs no bounds (Levenberg-Marquardt,
    # fast for these small problems); masses are made positive afterwards
    res = scipy.optimize.least_squares(
        resid, start, jac=jac, method="lm",
        x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15, max_nfev=10000,
    )
    p = res.x.copy()
    p[1::2] = np.abs(p[1::2])
    # order states by mass so that params[1] is the ground state
    order = np.argsort(p[1::2])
    p = np.concatenate([p[2 * k : 2 * k + 2] for k in order])
    Jw = jac(p)
    pcov = np.linalg.pinv(Jw.T @ Jw)
    r = resid(p)
    chi2 = float(r @ r)
    dof = n_pts - n_par
    return FitResult(
        params=p,
        errors=np.sqrt(np.abs(np.diag(pcov))),
        covariance=pcov,
        chi2=chi2,
        dof=dof,
        p_value=float(scipy.stats.chi2.sf(chi2, dof)),
        t_min=int(t_min),
        t_max=int(t_max),
        T=int(T),
        n_states=n_states,
    )


def fit_correlator(
    estimate: CorrelatorEstimate,
    t_min: int,
    t_max: int,
    *,
    n_states: int = 1,
    p0: np.ndarray | None = None,
) -> FitResult:
    """:func:`fit_cosh` with mean, covariance and ``n_bins`` of an estimate.

    Parameters
    ----------
    estimate : CorrelatorEstimate
        From :func:`correlator_jackknife` / :func:`correlator_bootstrap`.
    t_min, t_max : int
        Inclusive fit window.
    n_states : int, default 1
    p0 : array_like, optional

    Returns
    -------
    FitResult
    """
    return fit_cosh(
        estimate.mean, estimate.covariance, estimate.T, t_min, t_max,
        n_states=n_states, p0=p0, n_samples=estimate.n_bins,
    )


@dataclass(frozen=True, eq=False)
class WindowScanResult:
    """Outcome of :func:`scan_fit_windows`.

    Attributes
    ----------
    best : FitResult or None
        Earliest acceptable window, None if none qualifies.
    fits : dict of int to FitResult
        All successful fits keyed by ``t_min``.
    reason : str
        Human-readable description of the choice.
    """

    best: FitResult | None
    fits: dict = field(default_factory=dict)
    reason: str = ""


def scan_fit_windows(
    estimate: CorrelatorEstimate,
    *,
    t_max: int | None = None,
    t_min_start: int = 1,
    n_states: int = 1,
    p_min: float = 0.05,
) -> WindowScanResult:
    """Scan ``t_min`` at fixed ``t_max`` and pick the earliest acceptable window.

    Rule (common practice, no source): ``t_max`` defaults to ``T // 2`` (the
    points beyond are redundant for a symmetric correlator and would make
    the covariance singular after :func:`symmetrise`).  ``t_min`` runs from
    ``t_min_start`` upwards while at least one degree of freedom remains;
    windows with more points than the covariance supports are skipped.  The
    chosen window is the first one with ``p_value >= p_min``: later windows
    trade excited-state contamination for statistical error, so the earliest
    statistically acceptable one is taken.

    Parameters
    ----------
    estimate : CorrelatorEstimate
    t_max : int, optional
        Default ``T // 2``.
    t_min_start : int, default 1
        ``t = 0`` is skipped by default (contact terms in interacting theories).
    n_states : int, default 1
    p_min : float, default 0.05

    Returns
    -------
    WindowScanResult
    """
    T = estimate.T
    t_max = T // 2 if t_max is None else int(t_max)
    n_par = 2 * n_states
    fits = {}
    for t_min in range(t_min_start, t_max - n_par + 1):
        if estimate.n_bins <= t_max - t_min + 1:
            continue
        try:
            fits[t_min] = fit_correlator(estimate, t_min, t_max, n_states=n_states)
        except ValueError:
            continue
        if fits[t_min].p_value >= p_min:
            f = fits[t_min]
            return WindowScanResult(
                f, fits,
                f"earliest window [{t_min}, {t_max}] with p = {f.p_value:.3g} >= {p_min:g}",
            )
    return WindowScanResult(
        None, fits, f"no window [t_min, {t_max}] with t_min >= {t_min_start} has p >= {p_min:g}"
    )
