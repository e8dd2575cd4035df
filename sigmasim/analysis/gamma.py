"""Wolff's Gamma method for autocorrelated Monte Carlo data.

Implements the error analysis of

    U. Wolff, "Monte Carlo errors with less errors",
    Comput. Phys. Commun. 156 (2004) 143.

for primary observables and for derived quantities ``F = f(<a_1>, ..., <a_n>)``
(gradient projection, Wolff 2004 Sec. 3), with several replica (independent
Markov chains of one ensemble, possibly of different length) and the
automatic windowing procedure with parameter ``S`` (default 1.5).

Conventions
-----------
The normalised autocorrelation function is ``rho(t) = Gamma(t) / Gamma(0)``
and the integrated autocorrelation time is

    tau_int = 1/2 + sum_{t=1}^{W} rho(t),

so that uncorrelated data have ``tau_int = 1/2`` and the squared error of the
mean is ``sigma^2 = 2 tau_int Gamma(0) / N``.  (Note: ``emcee`` and many
statistics texts use ``tau = 1 + 2 sum rho``, which is twice ours.)

Replica
-------
With replica ``r = 1..R`` of lengths ``N_r`` and ``N = sum_r N_r``, the mean is
over all ``N`` samples and the autocorrelation function is summed over
replica (Wolff 2004 Sec. 3.3)::

    Gamma(t) = sum_r sum_{i=1}^{N_r - t} d_i^r d_{i+t}^r / sum_r max(N_r - t, 0)

where ``d`` are the (projected) fluctuations about the global mean.  The
denominator reduces to Wolff's ``N - R t`` when all replica are longer than
``t``.

Bias
----
The value of a derived quantity, ``f(abar)``, has a bias of order ``1/N``.
It is *not* corrected by default; with ``R >= 2`` replica the replica-based
estimate of Wolff 2004 Sec. 3.3 can be requested with ``bias_correct=True``.
The bias of ``Gamma(t)`` caused by subtracting the estimated mean *is*
corrected as in Wolff 2004 (``Gamma(t) += C(W)/N``).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
import scipy.fft

__all__ = [
    "GammaResult",
    "autocorrelation",
    "gamma_analysis",
    "DEFAULT_S",
    "MIN_SAMPLES",
]

#: Default automatic-windowing parameter (Wolff 2004, Sec. 3.3 recommends 1-2).
DEFAULT_S = 1.5

#: Minimum total number of samples accepted by :func:`gamma_analysis`.
#: Common practice, no source: fewer samples do not allow even a window W=1
#: estimate with a meaningful error.
MIN_SAMPLES = 8


@dataclass(frozen=True, eq=False)
class GammaResult:
    """Result of a Gamma-method analysis of one (primary or derived) quantity.

    Attributes
    ----------
    value : float
        Estimate ``f(abar)`` (the plain mean for a primary observable).
    error : float
        Statistical error ``sqrt(2 tau_int Gamma(0) / N)``.
    error_of_error : float
        Error of ``error`` (Wolff 2004, from Madras & Sokal,
        J. Stat. Phys. 50 (1988) 109): ``error * sqrt((W + 1/2) / N)``.
    tau_int : float
        Integrated autocorrelation time, ``1/2 + sum_{t=1}^W rho(t)``.
    tau_int_error : float
        Error of ``tau_int``, ``2 tau_int sqrt((W + 1/2 - tau_int) / N)``
        (Wolff 2004, Madras-Sokal approximation).
    window : int
        Summation window ``W`` chosen by the automatic procedure.
    n : int
        Total number of samples (summed over replica).
    n_independent : float
        Effective number of independent samples ``N / (2 tau_int)``.
    rho : numpy.ndarray
        ``float64``, shape ``(W + 1,)``: normalised autocorrelation function
        ``rho(0..W)`` (``rho[0] == 1``) after the bias correction.
    n_replicas : int
        Number of replica ``R``.
    S : float
        Windowing parameter used.
    bias_corrected_value : float or None
        Replica-based bias-corrected value (only with ``bias_correct=True``).
    """

    value: float
    error: float
    error_of_error: float
    tau_int: float
    tau_int_error: float
    window: int
    n: int
    n_independent: float
    rho: np.ndarray
    n_replicas: int = 1
    S: float = DEFAULT_S
    bias_corrected_value: float | None = None

    def __repr__(self) -> str:  # compact, rho omitted on purpose (can be long)
        return (
            f"GammaResult(value={self.value:.8g}, error={self.error:.3g}, "
            f"tau_int={self.tau_int:.3g}+-{self.tau_int_error:.2g}, W={self.window}, "
            f"n={self.n}, R={self.n_replicas})"
        )


def _autocov_sums(series: Sequence[np.ndarray], t_max: int) -> np.ndarray:
    """Sum over replica of ``sum_i d_i d_{i+t}`` for ``t = 0..t_max`` via FFT.

    Parameters
    ----------
    series : sequence of numpy.ndarray
        Each ``float64``, shape ``(N_r,)``, already centred.
    t_max : int
        Largest lag.

    Returns
    -------
    numpy.ndarray
        ``float64``, shape ``(t_max + 1,)``; *not* normalised by the number
        of pairs.
    """
    out = np.zeros(t_max + 1)
    for d in series:
        n = d.shape[0]
        # zero padding to >= 2n avoids wrap-around of the circular correlation
        nfft = scipy.fft.next_fast_len(2 * n, real=True)
        f = scipy.fft.rfft(d, nfft)
        acf = scipy.fft.irfft(f * np.conj(f), nfft)
        k = min(t_max, n - 1) + 1
        out[:k] += acf[:k]
    return out


def _n_pairs(lengths: Sequence[int], t_max: int) -> np.ndarray:
    """Number of pairs ``sum_r max(N_r - t, 0)`` for ``t = 0..t_max``."""
    t = np.arange(t_max + 1)
    return np.sum(np.maximum(np.asarray(lengths)[:, None] - t[None, :], 0), axis=0)


def autocorrelation(x: np.ndarray, t_max: int | None = None) -> np.ndarray:
    """Normalised autocorrelation function ``rho(t) = Gamma(t)/Gamma(0)``.

    ``Gamma(t) = 1/(N - t) sum_{i=1}^{N-t} (x_i - xbar)(x_{i+t} - xbar)``,
    computed with an FFT (no windowing, no bias correction).

    Parameters
    ----------
    x : array_like
        Real, shape ``(N,)``, ``N >= 2``.
    t_max : int, optional
        Largest lag; default ``N // 2``.

    Returns
    -------
    numpy.ndarray
        ``float64``, shape ``(t_max + 1,)``, ``rho[0] == 1``.  For a constant
        series ``rho = [1, 0, 0, ...]`` by convention.
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"autocorrelation needs a 1-d series, got shape {x.shape}")
    n = x.shape[0]
    if n < 2:
        raise ValueError(f"series too short for an autocorrelation function: N={n} < 2")
    if t_max is None:
        t_max = n // 2
    t_max = int(min(t_max, n - 1))
    d = x - x.mean()
    if np.ptp(x) == 0.0:
        d = np.zeros_like(d)
    gam = _autocov_sums([d], t_max) / _n_pairs([n], t_max)
    rho = np.zeros(t_max + 1)
    rho[0] = 1.0
    if gam[0] > 0.0:
        rho = gam / gam[0]
    return rho


def _as_replicas(data, replicas) -> list[np.ndarray]:
    """Normalise the input to a list of 2-d ``(N_r, n_obs)`` float arrays."""
    if isinstance(data, (list, tuple)):
        if replicas is not None:
            raise ValueError("give either a list of replica arrays or `replicas`, not both")
        reps = [np.asarray(r, dtype=float) for r in data]
    else:
        arr = np.asarray(data, dtype=float)
        if replicas is None:
            reps = [arr]
        else:
            lengths = [int(n) for n in replicas]
            if any(n < 0 for n in lengths) or sum(lengths) != arr.shape[0]:
                raise ValueError(
                    f"replica lengths {lengths} do not add up to the number of samples "
                    f"{arr.shape[0]}"
                )
            reps = np.split(arr, np.cumsum(lengths)[:-1])
    if not reps:
        raise ValueError("no data given")
    out = []
    for r in reps:
        if r.ndim == 1:
            r = r[:, None]
        if r.ndim != 2:
            raise ValueError(f"replica data must have shape (N,) or (N, n_obs), got {r.shape}")
        out.append(r)
    n_obs = {r.shape[1] for r in out}
    if len(n_obs) != 1:
        raise ValueError(f"replica have different numbers of observables: {sorted(n_obs)}")
    if not all(np.all(np.isfinite(r)) for r in out):
        raise ValueError("data contain NaN or inf")
    return out


def gamma_analysis(
    data,
    func: Callable[[np.ndarray], float] | None = None,
    *,
    replicas: Sequence[int] | None = None,
    S: float = DEFAULT_S,
    bias_correct: bool = False,
) -> GammaResult | list[GammaResult]:
    """Gamma-method error analysis (Wolff 2004).

    Parameters
    ----------
    data : array_like or list of array_like
        Real ``float64`` samples of shape ``(N,)`` (one observable) or
        ``(N, n_obs)`` (several primary observables, measured on the same
        configurations), ordered in Monte Carlo time.  A ``list``/``tuple`` of
        such arrays is read as independent replica (lengths may differ).
    func : callable, optional
        Derived quantity ``func(means) -> float`` where ``means`` is a
        ``float64`` array of shape ``(n_obs,)`` (also for 1-d data, then
        ``n_obs = 1``).  Its gradient is taken by central differences with a
        step equal to the naive statistical error ``sqrt(Gamma_aa(0)/N)`` of
        each primary mean: the linearisation of Wolff 2004 (Sec. 3) only has
        to hold on the scale of the errors.
    replicas : sequence of int, optional
        Lengths of consecutive replica inside a single ``data`` array.
    S : float, default 1.5
        Windowing parameter: ``W`` is the first ``W`` with
        ``exp(-W/tau) - tau/sqrt(W N) < 0``,
        ``tau = S / ln((2 tau_int(W) + 1) / (2 tau_int(W) - 1))``.
    bias_correct : bool, default False
        Also compute the replica-based bias correction of the derived value
        (needs ``R >= 2``), stored in ``bias_corrected_value``.

    Returns
    -------
    GammaResult or list of GammaResult
        One result if ``func`` is given or the data are one observable;
        otherwise a list with one result per column.

    Raises
    ------
    ValueError
        If there are fewer than ``MIN_SAMPLES`` samples in total, a replica
        with fewer than 2 samples, inconsistent shapes or non-finite data.
    """
    if S <= 0:
        raise ValueError(f"S must be positive, got {S}")
    reps = _as_replicas(data, replicas)
    lengths = [r.shape[0] for r in reps]
    n_tot = int(sum(lengths))
    if min(lengths) < 2:
        raise ValueError(f"series too short: a replica has {min(lengths)} < 2 samples")
    if n_tot < MIN_SAMPLES:
        raise ValueError(
            f"series too short for the Gamma method: N={n_tot} < {MIN_SAMPLES} samples"
        )
    n_obs = reps[0].shape[1]
    if func is None and n_obs > 1:
        return [
            gamma_analysis([r[:, k] for r in reps], None, S=S, bias_correct=bias_correct)
            for k in range(n_obs)
        ]

    allc = np.concatenate(reps, axis=0)
    abar = allc.mean(axis=0)
    # exactly constant columns get exactly zero fluctuations, so rounding of
    # the mean cannot fake a tiny non-zero variance
    const = np.ptp(allc, axis=0) == 0.0
    devs = [np.where(const, 0.0, r - abar) for r in reps]

    if func is None:
        value = float(abar[0])
        grad = np.ones(1)
        proj = [d[:, 0] for d in devs]
    else:
        value = float(func(abar.copy()))
        var0 = sum(np.sum(d**2, axis=0) for d in devs) / n_tot
        h = np.sqrt(var0 / n_tot)
        # fallback step for constant columns (their gradient is irrelevant
        # because their fluctuations vanish, but func must still be finite)
        h = np.where(h > 0, h, np.sqrt(np.finfo(float).eps) * np.maximum(1.0, np.abs(abar)))
        grad = np.empty(n_obs)
        for k in range(n_obs):
            ap, am = abar.copy(), abar.copy()
            ap[k] += h[k]
            am[k] -= h[k]
            grad[k] = (float(func(ap)) - float(func(am))) / (2.0 * h[k])
        if not np.all(np.isfinite(grad)):
            raise ValueError("gradient of func is not finite at the mean")
        proj = [d @ grad for d in devs]

    bias_value = None
    if bias_correct:
        if func is None or len(reps) < 2:
            bias_value = value  # primary means are unbiased
        else:
            # Wolff 2004 Sec. 3.3: (R f(abar) - sum_r N_r f(abar_r) / N) / (R - 1)
            rep_vals = np.array([float(func(r.mean(axis=0))) for r in reps])
            fbar_r = np.sum(np.asarray(lengths) * rep_vals) / n_tot
            R = len(reps)
            bias_value = float((R * value - fbar_r) / (R - 1))

    t_max = max(lengths) // 2
    t_max = max(t_max, 1)
    gam = _autocov_sums(proj, t_max) / np.maximum(_n_pairs(lengths, t_max), 1)

    if not gam[0] > 0.0:
        # zero variance (constant data or zero gradient): nothing fluctuates
        return GammaResult(
            value=value, error=0.0, error_of_error=0.0, tau_int=0.5, tau_int_error=0.0,
            window=0, n=n_tot, n_independent=float(n_tot), rho=np.ones(1),
            n_replicas=len(reps), S=S, bias_corrected_value=bias_value,
        )

    # automatic windowing, Wolff 2004 Sec. 3.3 (eqs. for tau(W) and g(W))
    tau_w = 0.5 + np.cumsum(gam[1:]) / gam[0]  # tau_int(W), W = 1..t_max
    W_arr = np.arange(1, t_max + 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        tau_exp = np.where(
            tau_w > 0.5, S / np.log((2.0 * tau_w + 1.0) / (2.0 * tau_w - 1.0)), 1e-300
        )
        g = np.exp(-W_arr / tau_exp) - tau_exp / np.sqrt(W_arr * n_tot)
    neg = np.nonzero(g < 0)[0]
    if neg.size:
        W = int(W_arr[neg[0]])
    else:
        W = t_max
        warnings.warn(
            f"Gamma method: windowing condition not met up to W={t_max}; "
            "the series is probably too short for its autocorrelation time",
            RuntimeWarning,
            stacklevel=2,
        )

    CW = gam[0] + 2.0 * np.sum(gam[1 : W + 1])
    # bias correction of Gamma due to the estimated mean (Wolff 2004 Sec. 3.3)
    gam_c = gam[: W + 1] + CW / n_tot
    CW_c = gam_c[0] + 2.0 * np.sum(gam_c[1:])
    if not CW_c > 0.0:
        # can only happen for pathological anticorrelated data; fall back to W=0
        W, gam_c, CW_c = 0, gam[:1] * (1.0 + 1.0 / n_tot), gam[0] * (1.0 + 1.0 / n_tot)
    tau = CW_c / (2.0 * gam_c[0])
    err = np.sqrt(CW_c / n_tot)
    err_err = err * np.sqrt((W + 0.5) / n_tot)
    tau_err = 2.0 * tau * np.sqrt(max(W + 0.5 - tau, 0.0) / n_tot)
    return GammaResult(
        value=value,
        error=float(err),
        error_of_error=float(err_err),
        tau_int=float(tau),
        tau_int_error=float(tau_err),
        window=W,
        n=n_tot,
        n_independent=float(n_tot / (2.0 * tau)),
        rho=gam_c / gam_c[0],
        n_replicas=len(reps),
        S=S,
        bias_corrected_value=bias_value,
    )
