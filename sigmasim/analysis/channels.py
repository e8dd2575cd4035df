"""Meson channels from the stored time-slice sums, and their correlators.

Input are the run file's ``/slices/U`` (``/slices/Phi`` of a linear run; ``(N, T, nf, nf)`` complex: per time
slice sum of ``U_x``) and ``/slices/det`` (``(N, T)`` complex: per time slice
sum of ``det U_x``), e.g. ``RunData.slices`` or the ``slices/U``,
``slices/det`` arrays of :func:`sigmasim.chain.simulate`.

Frame
-----
Operators are built from the frame-independent field ``V = e^{i theta_m} U``
(the mass term is ``-Re Tr(diag(h) V)`` and the anomaly term
``-2 kappa Re(e^{-i theta} det V)`` whatever the placement of theta), so a
run's channels do not depend on ``model.theta_placement``.

Vacuum alignment
----------------
With ``align=True`` (default) the field is further rotated into the frame of
the measured vacuum: ``W = D^{-1/2} V D^{-1/2}`` with the constant diagonal
``D = diag(e^{i alpha_f})``, ``alpha_f = arg <V_ff>`` (ensemble and volume
mean).  Expanding about the vacuum, ``W = exp(i phi)`` with ``phi`` hermitian,
so ``Im Tr(T_a W) = phi_a / 2 + O(phi^3)`` is a one-pion operator wherever the
vacuum sits.  Without alignment the overlap of ``Im Tr(T_a V)`` with the pion
is ``cos(alpha)`` for a vacuum ``V = e^{i alpha}``, which vanishes at
``alpha = pi/2`` (e.g. nf = 2, theta = pi).  At theta = 0 and h > 0 the
vacuum is ``V = 1`` and both choices agree up to noise.  (A chain that tunnels
between branches has no single vacuum; its alignment is an average.)

Operators (per configuration and time slice, plain sums over the slice)
------------------------------------------------------------------------
* pion ``a = 1..nf^2-1``: ``P_a(t) = Im Tr(T_a W_t)`` with the generalised
  Gell-Mann generators of :func:`gell_mann` (hermitian, traceless,
  ``Tr T_a T_b = delta_ab / 2``);
* eta' (U(nf) only): ``Im Tr W_t`` and, separately, ``Im det W_t``;
* sigma: ``Re Tr W_t`` (at tree level a two-pion state, noisy).

Correlators (module :mod:`sigmasim.analysis.correlators` for the definitions):
``C(t) = 1/V_s 1/T sum_{t0} <O(t0+t) O(t0)>_c``, averaged over the
``nf^2 - 1`` pion components, with the vacuum subtraction redone inside every
jackknife bin (leave-one-bin-out, :func:`sigmasim.analysis.resampling.jackknife`).

Tree level (``phi = sum_a phi_a T_a``, ``T_0 = 1/sqrt(2 nf)`` for U(nf); see
``tests/test_analysis_masses.py`` for the derivation): the quadratic action is
``beta/4 sum_a [sum_mu (Delta_mu phi_a)^2 + m_a^2 phi_a^2]`` with
``m_pi^2 = h / beta`` and ``m_eta'^2 = (h + 2 kappa nf) / beta`` (degenerate
``h``, theta = 0), so ``C_pi(t) = C_free(t; m_pi^2) / (2 beta)`` and
``C_Im Tr(t) = nf C_free(t; m_eta'^2) / beta`` (:func:`tree_level`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .correlators import CorrelatorEstimate, symmetrise
from .resampling import auto_bin_size, bin_data, jackknife

__all__ = [
    "gell_mann",
    "vacuum_phases",
    "frame_field",
    "channel_operators",
    "channel_correlator",
    "ChannelData",
    "meson_correlators",
    "tree_level",
    "CHANNELS",
]

#: channel name -> description (operator, in the aligned frame W)
CHANNELS = {
    "pion": "Im Tr(T_a W_t), averaged over the nf^2 - 1 generators",
    "eta_prime": "Im Tr W_t (U(nf) only)",
    "eta_prime_det": "Im det W_t (U(nf) only)",
    "sigma": "Re Tr W_t (two-pion state at tree level)",
}


def gell_mann(nf: int) -> np.ndarray:
    """Generalised Gell-Mann generators of SU(nf), normalised ``Tr T_a T_b = delta_ab / 2``.

    Returns
    -------
    numpy.ndarray
        complex128, shape ``(nf^2 - 1, nf, nf)``: first the symmetric
        ``(E_jk + E_kj)/2``, then the antisymmetric ``-i (E_jk - E_kj)/2``
        (``j < k``), then the diagonal
        ``(sum_{j<=l} E_jj - l E_{l+1,l+1}) / sqrt(2 l (l + 1))``, ``l = 1..nf-1``.
        For nf = 2 these are the Pauli matrices / 2 (in the order x, y, z).
    """
    nf = int(nf)
    if nf < 1:
        raise ValueError(f"nf must be >= 1, got {nf}")
    out = []
    for j in range(nf):
        for k in range(j + 1, nf):
            m = np.zeros((nf, nf), complex)
            m[j, k] = m[k, j] = 0.5
            out.append(m)
    for j in range(nf):
        for k in range(j + 1, nf):
            m = np.zeros((nf, nf), complex)
            m[j, k], m[k, j] = -0.5j, 0.5j
            out.append(m)
    for l in range(1, nf):
        m = np.zeros((nf, nf), complex)
        m[np.arange(l), np.arange(l)] = 1.0
        m[l, l] = -float(l)
        out.append(m / np.sqrt(2.0 * l * (l + 1)))
    return np.array(out, dtype=complex).reshape(len(out), nf, nf)


def vacuum_phases(slices_u: np.ndarray, theta_m: float = 0.0) -> np.ndarray:
    """``alpha_f = arg <V_ff>`` (ensemble and volume mean), ``V = e^{i theta_m} U``.

    Returns float64, shape ``(nf,)``.
    """
    u = np.asarray(slices_u)
    diag = np.diagonal(u, axis1=-2, axis2=-1).reshape(-1, u.shape[-1]).mean(axis=0)
    return np.angle(np.exp(1j * theta_m) * diag)


def frame_field(slices_u: np.ndarray, slices_det: np.ndarray, theta_m: float = 0.0,
                align: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Slice sums in the analysis frame: ``(W_t, det W_t, alpha)`` (module docstring).

    ``W = D^{-1/2} e^{i theta_m} U D^{-1/2}``, ``det W = e^{i (nf theta_m - sum alpha)} det U``;
    ``alpha`` are the phases of ``D`` (zeros when ``align`` is false).
    """
    u = np.asarray(slices_u)
    nf = u.shape[-1]
    alpha = vacuum_phases(u, theta_m) if align else np.zeros(nf)
    half = np.exp(-0.5j * alpha)
    w = np.exp(1j * theta_m) * u * half[:, None] * half[None, :]
    d = np.exp(1j * (nf * theta_m - alpha.sum())) * np.asarray(slices_det)
    return w, d, alpha


def channel_operators(slices_u: np.ndarray, slices_det: np.ndarray, theta_m: float = 0.0,
                      special: bool = False, align: bool = True) -> dict[str, np.ndarray]:
    """Per-configuration, per-time-slice operator sums of every channel.

    Parameters
    ----------
    slices_u : array_like
        complex, shape ``(N, T, nf, nf)``: run file ``/slices/U``.
    slices_det : array_like
        complex, shape ``(N, T)``: run file ``/slices/det``.
    theta_m : float
        The run's mass phase (``RunConfig.theta_angles[0]``).
    special : bool
        SU(nf) run: no eta' channels (``det U = 1``; ``Im Tr W`` is then a
        multi-pion operator and is still returned as ``"im_tr"``).
    align : bool
        Rotate into the measured vacuum frame (module docstring).

    Returns
    -------
    dict
        ``"pion"``: float64 ``(N, nf^2-1, T)`` (absent for nf = 1);
        ``"eta_prime"`` / ``"im_tr"``, ``"eta_prime_det"`` (U only), ``"sigma"``:
        float64 ``(N, T)``; ``"alpha"``: the alignment phases ``(nf,)``.
    """
    w, d, alpha = frame_field(slices_u, slices_det, theta_m, align)
    if w.ndim != 4 or w.shape[-1] != w.shape[-2]:
        raise ValueError(f"slices_u must have shape (N, T, nf, nf), got {w.shape}")
    nf = w.shape[-1]
    out: dict[str, np.ndarray] = {"alpha": alpha}
    if nf >= 2:
        gens = gell_mann(nf)
        # Tr(T_a W) = sum_ij (T_a)_ij W_ji
        out["pion"] = np.ascontiguousarray(np.einsum("aij,ntji->nat", gens, w).imag)
    tr = np.trace(w, axis1=-2, axis2=-1)
    if special:
        out["im_tr"] = np.ascontiguousarray(tr.imag)
    else:
        out["eta_prime"] = np.ascontiguousarray(tr.imag)
        out["eta_prime_det"] = np.ascontiguousarray(d.imag)
    out["sigma"] = np.ascontiguousarray(tr.real)
    return out


def channel_correlator(
    ops: np.ndarray,
    *,
    bin_size: int | None = None,
    spatial_volume: float | None = None,
    symmetrise_result: bool = True,
    bin_factor: float = 10.0,
    min_bins: int | None = None,
) -> CorrelatorEstimate:
    """Connected correlator of real slice sums, averaged over components, jackknifed.

    ``C(t) = 1/A sum_a 1/V_s 1/T sum_{t0} [<O_a(t0+t) O_a(t0)> - <O_a>^2]``;
    for one component it equals
    :func:`sigmasim.analysis.correlators.correlator_jackknife`.

    Parameters
    ----------
    ops : array_like
        Real, shape ``(N, T)`` or ``(N, A, T)``.
    bin_size : int, optional
        Configurations per jackknife bin.  Default: ``ceil(bin_factor * tau_max)``
        from the Gamma method on the zero-momentum operators and the slice
        products (:func:`sigmasim.analysis.resampling.auto_bin_size`), capped so
        that at least ``min_bins`` bins remain (default ``max(20, 2 T)``: the
        correlated fit needs more bins than points).
    spatial_volume : float, optional
        Divide by ``V_s``.
    symmetrise_result : bool, default True
        Average ``C(t)`` and ``C(T - t)``.

    Returns
    -------
    CorrelatorEstimate
        Jackknife samples over bins; ``n_bins`` is the number of bins.
    """
    a = np.asarray(ops, dtype=float)
    if a.ndim == 2:
        a = a[:, None, :]
    if a.ndim != 3:
        raise ValueError(f"ops must have shape (N, T) or (N, A, T), got {a.shape}")
    n, n_comp, T = a.shape
    if n < 4:
        raise ValueError(f"too few configurations for a correlator: N = {n} < 4")
    # shift by the full-ensemble mean of each component (translation invariance): leaves
    # C invariant and avoids cancellations between <O O> and <O><O>
    a = a - a.mean(axis=(0, 2), keepdims=True)
    f = np.fft.fft(a, axis=2)
    prod = np.fft.ifft(f * np.conj(f), axis=2).real / T  # (N, A, T)
    x = np.concatenate([prod.mean(axis=1), a.mean(axis=2)], axis=1)  # (N, T + A)
    if bin_size is None:
        mb = max(20, 2 * T) if min_bins is None else int(min_bins)
        mb = min(mb, max(2, n // 2))
        bin_size = auto_bin_size(x, factor=bin_factor, min_bins=mb)
    bins = bin_data(x, bin_size) if bin_size != 1 else x
    vs = 1.0 if spatial_volume is None else float(spatial_volume)

    def func(m):
        c = (m[:T] - np.mean(m[T:] ** 2)) / vs
        return symmetrise(c) if symmetrise_result else c

    r = jackknife(bins, func)
    return CorrelatorEstimate(np.asarray(r.value), np.asarray(r.error), r.covariance, r.samples,
                              "jackknife", r.n_bins)


@dataclass(frozen=True, eq=False)
class ChannelData:
    """Correlators of one run (see :func:`meson_correlators`).

    Attributes
    ----------
    correlators : dict of str to CorrelatorEstimate
        Keyed by channel name (:data:`CHANNELS`, ``"im_tr"`` for SU(nf)).
    alpha : numpy.ndarray
        Vacuum alignment phases ``(nf,)``.
    bin_size : int
        Configurations per jackknife bin (common to all channels).
    spatial_volume : int
    """

    correlators: dict
    alpha: np.ndarray
    bin_size: int
    spatial_volume: int


def meson_correlators(
    slices_u: np.ndarray,
    slices_det: np.ndarray,
    shape,
    *,
    theta_m: float = 0.0,
    special: bool = False,
    align: bool = True,
    bin_size: int | None = None,
    channels=None,
) -> ChannelData:
    """Zero-momentum connected correlators of every channel, with jackknife errors.

    Parameters
    ----------
    slices_u, slices_det : array_like
        As in :func:`channel_operators` (thermalisation already cut).
    shape : tuple of int
        Lattice shape (time first); ``V_s = prod(shape[1:])``.
    theta_m, special, align
        As in :func:`channel_operators`.
    bin_size : int, optional
        Common bin size; default: the pion channel's automatic choice
        (:func:`channel_correlator`) or the eta'/sigma one for nf = 1.
    channels : iterable of str, optional
        Subset of channels; default all.

    Returns
    -------
    ChannelData
    """
    vs = int(np.prod(shape[1:])) if len(shape) > 1 else 1
    ops = channel_operators(slices_u, slices_det, theta_m, special, align)
    alpha = ops.pop("alpha")
    names = [k for k in ops if channels is None or k in channels]
    if bin_size is None and names:
        first = names[0]
        a = ops[first]
        est = channel_correlator(a, spatial_volume=vs)
        n = a.shape[0]
        bin_size = max(1, n // est.n_bins)
    out = {k: channel_correlator(ops[k], bin_size=bin_size, spatial_volume=vs) for k in names}
    return ChannelData(out, alpha, int(bin_size or 1), vs)


def tree_level(nf: int, beta: float, h: float, kappa: float = 0.0, nt: int | None = None,
               special: bool = False) -> dict:
    """Leading order in 1/beta, degenerate ``h > 0`` at theta = 0 (module docstring).

    Returns ``{"m2_pion", "m2_eta_prime", "mass_pion", "mass_eta_prime"}`` with
    ``mass = 2 asinh(sqrt(m2)/2)`` (free lattice scalar), and with ``nt`` also the
    correlators ``"C_pion"`` (``(nt,)``, ``C_free / (2 beta)``) and
    ``"C_eta_prime"`` (``nf C_free / beta``; U(nf) only).
    """
    from sigmasim.exact import free_scalar_correlator_closed_form, free_scalar_mass

    m2_pi = h / beta
    out = {"m2_pion": m2_pi, "mass_pion": float(free_scalar_mass(m2_pi))}
    if not special:
        m2_eta = (h + 2.0 * kappa * nf) / beta
        out.update(m2_eta_prime=m2_eta, mass_eta_prime=float(free_scalar_mass(m2_eta)))
    if nt is not None:
        out["C_pion"] = free_scalar_correlator_closed_form(nt, m2_pi) / (2.0 * beta)
        if not special:
            out["C_eta_prime"] = nf * free_scalar_correlator_closed_form(nt, out["m2_eta_prime"]) / beta
    return out
