"""Measurement and re-unitarisation kernels (numba).

Sums run per time slice, each slice serially in site order, and totals are
sums of the slice sums in slice order, so every measured number is the same
for any thread count.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels.group import det, load, reunitarize_site, store

__all__ = ["slice_sums", "reunitarize", "field_is_finite"]


@njit(cache=True, parallel=True)
def slice_sums(re, im, nbr, slice_sites, nf, hdiag, link, mass, umat, dets):
    """Per-time-slice sums of one configuration.

    Parameters
    ----------
    re, im : float64 arrays (nf*nf, V)
    nbr : int64 array (2 d, V)
    slice_sites : int64 array (T, V / T)
    hdiag : complex128 array (nf,)
        h_f e^{i theta_m}.
    link : float64 array (T,)
        Filled with sum_{x in t, mu} Re Tr(U_x^dagger U_{x+mu}).
    mass : float64 array (T,)
        Filled with sum_{x in t} Re Tr(H U_x).
    umat : complex128 array (T, nf*nf)
        Filled with sum_{x in t} U_x (component a*nf + b).
    dets : complex128 array (T,)
        Filled with sum_{x in t} det U_x.
    """
    nt = slice_sites.shape[0]
    ns = slice_sites.shape[1]
    nd = nbr.shape[0] // 2
    nc = nf * nf
    for t in prange(nt):
        U = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        lk = 0.0
        ms = 0.0
        dsum = complex(0.0, 0.0)
        for c in range(nc):
            umat[t, c] = 0.0
        for i in range(ns):
            x = slice_sites[t, i]
            for mu in range(nd):
                y = nbr[2 * mu, x]
                for c in range(nc):
                    lk += re[c, x] * re[c, y] + im[c, x] * im[c, y]
            for c in range(nc):
                umat[t, c] += complex(re[c, x], im[c, x])
            for a in range(nf):
                cc = a * nf + a
                ms += (hdiag[a] * complex(re[cc, x], im[cc, x])).real
            load(re, im, x, nf, U)
            dsum += det(U, nf, work)
        link[t] = lk
        mass[t] = ms
        dets[t] = dsum


@njit(cache=True, parallel=True)
def reunitarize(re, im, nf, special, nblocks):
    """Project every site back onto the group; returns the largest drift |U^dagger U - 1| seen."""
    nsite = re.shape[1]
    drift = np.zeros(nblocks)
    for blk in prange(nblocks):
        lo = blk * nsite // nblocks
        hi = (blk + 1) * nsite // nblocks
        U = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        dmax = 0.0
        for s in range(lo, hi):
            load(re, im, s, nf, U)
            dv = reunitarize_site(U, nf, special, work)
            if dv > dmax:
                dmax = dv
            store(re, im, s, nf, U)
        drift[blk] = dmax
    return drift.max()


@njit(cache=True)
def field_is_finite(re, im):
    """Index of the first site with a NaN or inf entry, or -1."""
    nc, nsite = re.shape
    for s in range(nsite):
        for c in range(nc):
            if not (np.isfinite(re[c, s]) and np.isfinite(im[c, s])):
                return s
    return -1


@njit(cache=True, parallel=True)
def reunitarize_u1(c, s, nblocks):
    """U(1) fast path of :func:`reunitarize`: rescale (cos, sin) to unit length.

    Returns the largest | |U|^2 - 1 | found, which is |U^dagger U - 1| for nf = 1.
    """
    nsite = c.shape[0]
    drift = np.zeros(nblocks)
    for blk in prange(nblocks):
        lo = blk * nsite // nblocks
        hi = (blk + 1) * nsite // nblocks
        dmax = 0.0
        for x in range(lo, hi):
            r2 = c[x] * c[x] + s[x] * s[x]
            dv = abs(r2 - 1.0)
            dmax = dv if dv > dmax else dmax
            inv = 1.0 / np.sqrt(r2)
            c[x] *= inv
            s[x] *= inv
        drift[blk] = dmax
    return drift.max()
