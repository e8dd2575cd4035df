"""Binning, jackknife and bootstrap for (derived) Monte Carlo quantities.

All functions work on plain numpy arrays whose first axis is Monte Carlo time
(or the bin index after :func:`bin_data`).  Any trailing shape is allowed,
e.g. ``(N, T)`` for correlators.

Binning rule
------------
With ``bin_size=None`` the bin size is ``B = ceil(factor * tau_int)`` with
``factor = 10`` and ``tau_int`` the largest Gamma-method integrated
autocorrelation time (convention ``1/2 + sum rho``) over all observables.
Why 10: for an exponentially decaying autocorrelation with time ``tau``,
the variance of bin means underestimates the true one by a relative amount
of about ``tau / B`` (common practice, no source; follows from summing
``(1 - |t|/B) rho(t)``), i.e. about 10 % in the variance / 5 % in the error.
``B`` is capped so that at least ``min_bins`` (default 20) bins remain.
A trailing remainder of fewer than ``B`` samples is dropped.

Jackknife (leave-one-bin-out) and bootstrap (resampling bins with
replacement) follow the standard textbook definitions, e.g. B. Efron,
"The Jackknife, the Bootstrap and Other Resampling Plans", SIAM (1982).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .gamma import gamma_analysis

__all__ = [
    "DEFAULT_BIN_FACTOR",
    "ResamplingResult",
    "auto_bin_size",
    "bin_data",
    "jackknife_means",
    "jackknife_covariance",
    "bootstrap_covariance",
    "jackknife",
    "bootstrap",
]

#: default multiple of tau_int used for the automatic bin size (see module doc)
DEFAULT_BIN_FACTOR = 10.0


@dataclass(frozen=True, eq=False)
class ResamplingResult:
    """Result of a jackknife or bootstrap analysis.

    Attributes
    ----------
    value : float or numpy.ndarray
        ``func`` of the mean over all bins; ``float64`` of the output shape.
    error : float or numpy.ndarray
        Standard error, same shape as ``value``.
    covariance : numpy.ndarray
        ``float64``, shape ``(k, k)`` with ``k = value.size``: covariance of
        the (flattened) estimate.
    samples : numpy.ndarray
        ``float64``, shape ``(n_samples,) + value.shape``: jackknife
        (leave-one-out) or bootstrap replicas of ``func``.
    method : str
        ``"jackknife"`` or ``"bootstrap"``.
    n_bins : int
        Number of bins the samples were built from (relevant for the rank of
        the covariance).
    bias_corrected_value : float or numpy.ndarray or None
        Jackknife bias-corrected estimate ``n f - (n-1) mean(f_k)``
        (jackknife only).
    """

    value: float | np.ndarray
    error: float | np.ndarray
    covariance: np.ndarray
    samples: np.ndarray
    method: str
    n_bins: int
    bias_corrected_value: float | np.ndarray | None = None


def auto_bin_size(
    data: np.ndarray,
    factor: float = DEFAULT_BIN_FACTOR,
    min_bins: int = 20,
    S: float = 1.5,
) -> int:
    """Bin size ``ceil(factor * max tau_int)`` from the Gamma method.

    Parameters
    ----------
    data : array_like
        Real, shape ``(N, ...)``; every trailing component is analysed.
        Complex data are analysed through their real and imaginary parts.
    factor : float, default 10
        Multiple of ``tau_int`` (see module docstring for the reason).
    min_bins : int, default 20
        The bin size is capped at ``N // min_bins`` (at least 1).
    S : float, default 1.5
        Gamma-method windowing parameter.

    Returns
    -------
    int
        Bin size ``>= 1``.
    """
    a = np.asarray(data)
    n = a.shape[0]
    flat = a.reshape(n, -1)
    if np.iscomplexobj(flat):
        flat = np.concatenate([flat.real, flat.imag], axis=1)
    res = gamma_analysis(flat.astype(float), S=S)
    if not isinstance(res, list):
        res = [res]
    tau = max(r.tau_int for r in res)
    b = max(1, math.ceil(factor * tau))
    return int(max(1, min(b, n // max(min_bins, 1))))


def bin_data(data: np.ndarray, bin_size: int | None = None, **auto_kwargs) -> np.ndarray:
    """Average consecutive samples into bins.

    Parameters
    ----------
    data : array_like
        Shape ``(N, ...)``, real or complex.
    bin_size : int, optional
        Samples per bin; ``None`` chooses :func:`auto_bin_size`.
    **auto_kwargs
        Passed to :func:`auto_bin_size`.

    Returns
    -------
    numpy.ndarray
        Shape ``(N // bin_size, ...)``; the trailing remainder is dropped.

    Raises
    ------
    ValueError
        If ``bin_size < 1`` or fewer than 2 bins result.
    """
    a = np.asarray(data)
    if bin_size is None:
        bin_size = auto_bin_size(a, **auto_kwargs)
    bin_size = int(bin_size)
    if bin_size < 1:
        raise ValueError(f"bin_size must be >= 1, got {bin_size}")
    nb = a.shape[0] // bin_size
    if nb < 2:  # a spread needs two bins (common practice, no source)
        raise ValueError(f"too few samples ({a.shape[0]}) for 2 bins of size {bin_size}")
    return a[: nb * bin_size].reshape((nb, bin_size) + a.shape[1:]).mean(axis=1)


def jackknife_means(bins: np.ndarray) -> np.ndarray:
    """Leave-one-out means of bins.

    Parameters
    ----------
    bins : array_like
        Shape ``(n, ...)``, ``n >= 2``.

    Returns
    -------
    numpy.ndarray
        Shape ``(n, ...)``; entry ``k`` is the mean of all bins except ``k``.
    """
    b = np.asarray(bins)
    n = b.shape[0]
    if n < 2:
        raise ValueError(f"jackknife needs at least 2 bins, got {n}")
    return (b.sum(axis=0)[None, ...] - b) / (n - 1)


def jackknife_covariance(samples: np.ndarray) -> np.ndarray:
    """Covariance ``(n-1)/n sum_k (s_k - sbar)(s_k - sbar)^T`` of jackknife samples.

    Parameters
    ----------
    samples : array_like
        Real, shape ``(n,)`` or ``(n, k)``.

    Returns
    -------
    numpy.ndarray
        ``float64``, shape ``(k, k)`` (``(1, 1)`` for 1-d input).
    """
    s = np.asarray(samples, dtype=float)
    n = s.shape[0]
    s = s.reshape(n, -1)
    d = s - s.mean(axis=0)
    return (n - 1) / n * (d.T @ d)


def bootstrap_covariance(samples: np.ndarray) -> np.ndarray:
    """Covariance ``1/(n-1) sum_k (s_k - sbar)(s_k - sbar)^T`` of bootstrap samples.

    Parameters
    ----------
    samples : array_like
        Real, shape ``(n_boot,)`` or ``(n_boot, k)``.

    Returns
    -------
    numpy.ndarray
        ``float64``, shape ``(k, k)``.
    """
    s = np.asarray(samples, dtype=float)
    n = s.shape[0]
    s = s.reshape(n, -1)
    d = s - s.mean(axis=0)
    return (d.T @ d) / (n - 1)


def _apply(func, means: np.ndarray) -> np.ndarray:
    """Apply ``func`` to each leading-axis entry; result ``(n,) + out_shape``."""
    return np.array([np.asarray(func(m), dtype=float) for m in means])


def _prepare(data, bin_size):
    a = np.asarray(data)
    if a.ndim == 0:
        raise ValueError("data must have a leading sample axis")
    if bin_size == 1:
        if a.shape[0] < 2:
            raise ValueError(f"need at least 2 bins, got {a.shape[0]}")
        return a
    return bin_data(a, bin_size)


def jackknife(
    data: np.ndarray,
    func: Callable[[np.ndarray], float | np.ndarray] | None = None,
    bin_size: int | None = 1,
) -> ResamplingResult:
    """Leave-one-bin-out jackknife of ``func(bin means)``.

    Parameters
    ----------
    data : array_like
        Shape ``(N, ...)``; with the default ``bin_size=1`` the rows are taken
        to be (already binned, independent) bins.
    func : callable, optional
        ``func(mean) -> float or ndarray`` where ``mean`` has shape
        ``data.shape[1:]``; default identity (the mean itself).
    bin_size : int or None, default 1
        Bin size; ``None`` chooses :func:`auto_bin_size`.

    Returns
    -------
    ResamplingResult
        ``error**2 = (n-1)/n sum_k (f_k - fbar)^2`` with ``f_k`` the
        leave-one-out samples (stored in ``samples``).
    """
    bins = _prepare(data, bin_size)
    if func is None:
        func = lambda m: m  # noqa: E731
    n = bins.shape[0]
    value = np.asarray(func(bins.mean(axis=0)), dtype=float)
    samples = _apply(func, jackknife_means(bins))
    cov = jackknife_covariance(samples)
    err = np.sqrt(np.diag(cov)).reshape(value.shape)
    bias = n * value - (n - 1) * samples.mean(axis=0)
    if value.ndim == 0:
        value, err, bias = float(value), float(err), float(bias)
    return ResamplingResult(value, err, cov, samples, "jackknife", n, bias)


def bootstrap(
    data: np.ndarray,
    func: Callable[[np.ndarray], float | np.ndarray] | None = None,
    n_boot: int = 1000,
    rng: np.random.Generator | int | None = 0,
    bin_size: int | None = 1,
) -> ResamplingResult:
    """Bootstrap of ``func(bin means)`` resampling bins with replacement.

    Parameters
    ----------
    data : array_like
        Shape ``(N, ...)``; rows are bins for ``bin_size=1``.
    func : callable, optional
        ``func(mean) -> float or ndarray``; default identity.
    n_boot : int, default 1000
        Number of bootstrap samples.
    rng : numpy.random.Generator or int or None, default 0
        Generator or seed for :func:`numpy.random.default_rng` (seeded by
        default so results are reproducible).
    bin_size : int or None, default 1
        Bin size; ``None`` chooses :func:`auto_bin_size`.

    Returns
    -------
    ResamplingResult
        ``error`` is the sample standard deviation (``ddof=1``) of the
        bootstrap replicas stored in ``samples``.
    """
    bins = _prepare(data, bin_size)
    if n_boot < 2:
        raise ValueError(f"n_boot must be >= 2, got {n_boot}")
    if func is None:
        func = lambda m: m  # noqa: E731
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    n = bins.shape[0]
    # multinomial counts avoid materialising an (n_boot, n, ...) index array
    counts = gen.multinomial(n, np.full(n, 1.0 / n), size=n_boot)
    flat = bins.reshape(n, -1)
    means = (counts @ flat / n).reshape((n_boot,) + bins.shape[1:])
    value = np.asarray(func(bins.mean(axis=0)), dtype=float)
    samples = _apply(func, means)
    cov = bootstrap_covariance(samples)
    err = np.sqrt(np.diag(cov)).reshape(value.shape)
    if value.ndim == 0:
        value, err = float(value), float(err)
    return ResamplingResult(value, err, cov, samples, "bootstrap", n, None)
