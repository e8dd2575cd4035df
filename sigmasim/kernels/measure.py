"""Measurement and re-unitarisation kernels (numba).

Sums run per time slice, each slice serially in site order, and totals are
sums of the slice sums in slice order, so every measured number is the same
for any thread count.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels.group import det, load, reunitarize_site, store
from sigmasim.kernels.serial import largest, zeros_float
from sigmasim.kernels.simd import load8, load18, store8, store18

__all__ = ["slice_sums", "slice_sums_rows", "lattice_slice_sums", "reunitarize", "reunitarize_rows", "reunitarize_u1", "field_is_finite"]


@njit(cache=True, inline="always")
def _add_link(lk, re, im, x, y, nc):
    """``lk`` plus Re Tr(U_x^dagger U_y), added component by component (the order fixes the bits)."""
    for c in range(nc):
        lk += re[c, x] * re[c, y] + im[c, x] * im[c, y]
    return lk


@njit(cache=True, inline="always")
def _add_site(ms, dsum, re, im, x, nf, hdiag, urow, U, work):
    """One site's share of the slice sums: U_x into ``urow``, Re Tr(H U_x) flavour by flavour into
    ``ms`` and det U_x into ``dsum`` (returned), in the order that fixes the bits."""
    for c in range(nf * nf):
        urow[c] += complex(re[c, x], im[c, x])
    for a in range(nf):
        cc = a * nf + a
        ms += (hdiag[a] * complex(re[cc, x], im[cc, x])).real
    load(re, im, x, nf, U)
    return ms, dsum + det(U, nf, work)


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
                lk = _add_link(lk, re, im, x, nbr[2 * mu, x], nc)
            ms, dsum = _add_site(ms, dsum, re, im, x, nf, hdiag, umat[t], U, work)
        link[t] = lk
        mass[t] = ms
        dets[t] = dsum


@njit(cache=True, parallel=True)
def slice_sums_rows(re, im, rnbr, rpar, h, nt, nf, hdiag, link, mass, umat, dets):
    """:func:`slice_sums` from the lattice's row tables (d >= 2): the same sums, the same bits.

    ``rnbr``, ``rpar``, ``h`` are ``row_neighbours``, ``row_parity``, ``row_len_half``; ``nt``
    the time extent.  Time is a slow direction, so the sorted sites of slice ``t`` are the rows
    ``t R .. t R + R - 1`` (R = n_rows / nt) of colour 0, then the same rows of colour 1: two
    contiguous runs of sites, walked in that order.  The forward neighbour of each site comes
    from the row tables (as in the row kernels), so no (2 d, V) table is needed.
    """
    nrows = rpar.shape[0]
    half = re.shape[1] // 2
    nslow = rnbr.shape[0] // 2
    rt = nrows // nt
    nc = nf * nf
    for t in prange(nt):
        U = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        lk = 0.0
        ms = 0.0
        dsum = complex(0.0, 0.0)
        for c in range(nc):
            umat[t, c] = 0.0
        for colour in range(2):
            base = (1 - colour) * half
            for r in range(t * rt, (t + 1) * rt):
                odd = (colour + rpar[r]) % 2 == 1
                for j in range(h):
                    x = colour * half + r * h + j
                    for mu in range(nslow):
                        lk = _add_link(lk, re, im, x, base + rnbr[2 * mu, r] * h + j, nc)
                    jp = (j + 1) % h if odd else j
                    lk = _add_link(lk, re, im, x, base + r * h + jp, nc)
                    ms, dsum = _add_site(ms, dsum, re, im, x, nf, hdiag, umat[t], U, work)
        link[t] = lk
        mass[t] = ms
        dets[t] = dsum


def lattice_slice_sums(lat, re, im, nf, hdiag, link, mass, umat, dets):
    """:func:`slice_sums` of the field on ``lat``: from the row tables for d >= 2, else from the
    neighbour table (d = 1, where every slice is one site and the tables are tiny)."""
    if lat.ndim >= 2:
        slice_sums_rows(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, lat.shape[0], nf,
                        hdiag, link, mass, umat, dets)
    else:
        slice_sums(re, im, lat.neighbours, lat.slice_sites, nf, hdiag, link, mass, umat, dets)


@njit(cache=True, parallel=True)
def reunitarize(re, im, nf, special, nblocks):
    """Project every site back onto the group; returns the largest drift |U^dagger U - 1| seen."""
    nsite = re.shape[1]
    drift = zeros_float(nblocks)
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
    return largest(drift)


@njit(cache=True)
def field_is_finite(re, im):
    """Index of the first site with a NaN or inf entry, or -1."""
    nc, nsite = re.shape
    for s in range(nsite):
        for c in range(nc):
            if not (np.isfinite(re[c, s]) and np.isfinite(im[c, s])):
                return s
    return -1


@njit(cache=True, parallel=True, error_model="numpy")
def reunitarize_u1(c, s, nblocks):
    """U(1) fast path of :func:`reunitarize`: rescale (cos, sin) to unit length.

    Returns the largest | |U|^2 - 1 | found, which is |U^dagger U - 1| for nf = 1.
    The per-site drifts go to scratch first and their maximum is taken in a second
    loop, so the update loop has no float reduction and vectorises.
    """
    nsite = c.shape[0]
    drift = zeros_float(nblocks)
    for blk in prange(nblocks):
        lo = blk * nsite // nblocks
        hi = (blk + 1) * nsite // nblocks
        dv = np.empty(hi - lo)
        cb = c[lo:hi]
        sb = s[lo:hi]
        for j in range(hi - lo):
            r2 = cb[j] * cb[j] + sb[j] * sb[j]
            dv[j] = abs(r2 - 1.0)
            inv = 1.0 / np.sqrt(r2)
            cb[j] *= inv
            sb[j] *= inv
        dmax = 0.0
        for j in range(hi - lo):
            dmax = dv[j] if dv[j] > dmax else dmax
        drift[blk] = dmax
    return largest(drift)


_W3 = 128  # sites per scratch chunk of reunitarize_rows


@njit(cache=True, parallel=True, error_model="numpy")
def reunitarize_rows(re, im, nf, nblocks):
    """U(2) and U(3) fast path of :func:`reunitarize` (Gram-Schmidt on the rows, the same arithmetic,
    so the same bits; nf must be 2 or 3).

    The 2x2 or 3x3 complex algebra is unrolled into real locals and the sites of a block are
    copied to scratch a few components at a time (the components of a site lie V doubles apart),
    so the loop vectorises across sites.  Returns the largest ``|U^dagger U - 1|`` entry found, as
    sqrt of the largest squared modulus.  The generic projection (complex scratch matrices per
    site) took about 90 ns per site for nf = 2, this one 6: at the default
    ``reunitarize_every = 10`` that was about a quarter of a U(2) overrelaxation sweep.
    """
    nsite = re.shape[1]
    drift = zeros_float(nblocks)
    for blk in prange(nblocks):
        lo = blk * nsite // nblocks
        hi = (blk + 1) * nsite // nblocks
        # scratch of compile-time width: LLVM then sees that its rows do not overlap
        W = np.empty((18, _W3))
        dv = np.empty(_W3)
        dmax = 0.0
        for c0 in range(lo, hi, _W3):
            n = min(_W3, hi - c0)
            if nf == 2:
                load8(W, re, im, c0, n)
                for j in range(n):
                    dv[j] = _gram_schmidt2(W, j)
                store8(W, re, im, c0, n)
            else:
                load18(W, re, im, c0, n)
                for j in range(n):
                    dv[j] = _gram_schmidt3(W, j)
                store18(W, re, im, c0, n)
            for j in range(n):
                dmax = dv[j] if dv[j] > dmax else dmax
        drift[blk] = np.sqrt(dmax)
    return largest(drift)


@njit(cache=True, inline="always")
def _dev22(x0r, x0i, x1r, x1i, y0r, y0i, y1r, y1i, one):
    """|sum_r conj(x_r) y_r - one|^2 for two rows."""
    sr = (x0r * y0r + x0i * y0i) + (x1r * y1r + x1i * y1i)
    si = (x0r * y0i - x0i * y0r) + (x1r * y1i - x1i * y1r)
    sr -= one
    return sr * sr + si * si


@njit(cache=True, inline="always", error_model="numpy")
def _gram_schmidt2(W, j):
    """Site j of W (re at 2a+b, im at 4+2a+b): returns max |(U^dagger U - 1)_ab|^2, then projects
    (:func:`_gram_schmidt3` for nf = 2: the operations of ``group.reunitarize_site`` term by term)."""
    u0r = W[0, j]; u1r = W[1, j]; u2r = W[2, j]; u3r = W[3, j]
    u0i = W[4, j]; u1i = W[5, j]; u2i = W[6, j]; u3i = W[7, j]
    # drift: columns p = (u_p, u_{2+p})
    d2 = _dev22(u0r, u0i, u2r, u2i, u0r, u0i, u2r, u2i, 1.0)
    d2 = max(d2, _dev22(u0r, u0i, u2r, u2i, u1r, u1i, u3r, u3i, 0.0))
    d2 = max(d2, _dev22(u1r, u1i, u3r, u3i, u0r, u0i, u2r, u2i, 0.0))
    d2 = max(d2, _dev22(u1r, u1i, u3r, u3i, u1r, u1i, u3r, u3i, 1.0))
    # row 0
    nn = (u0r * u0r + u0i * u0i) + (u1r * u1r + u1i * u1i)
    nn = 1.0 / np.sqrt(nn)
    a0r = u0r * nn; a1r = u1r * nn
    a0i = u0i * nn; a1i = u1i * nn
    # row 1 -= <row 0, row 1> row 0
    sr = (a0r * u2r + a0i * u2i) + (a1r * u3r + a1i * u3i)
    si = (a0r * u2i - a0i * u2r) + (a1r * u3i - a1i * u3r)
    b0r = u2r - (sr * a0r - si * a0i); b0i = u2i - (sr * a0i + si * a0r)
    b1r = u3r - (sr * a1r - si * a1i); b1i = u3i - (sr * a1i + si * a1r)
    nn = (b0r * b0r + b0i * b0i) + (b1r * b1r + b1i * b1i)
    nn = 1.0 / np.sqrt(nn)
    W[0, j] = a0r; W[1, j] = a1r; W[4, j] = a0i; W[5, j] = a1i
    W[2, j] = b0r * nn; W[3, j] = b1r * nn; W[6, j] = b0i * nn; W[7, j] = b1i * nn
    return d2


@njit(cache=True, inline="always")
def _dev2(x0r, x0i, x1r, x1i, x2r, x2i, y0r, y0i, y1r, y1i, y2r, y2i, one):
    """|sum_r conj(x_r) y_r - one|^2."""
    sr = ((x0r * y0r + x0i * y0i) + (x1r * y1r + x1i * y1i)) + (x2r * y2r + x2i * y2i)
    si = ((x0r * y0i - x0i * y0r) + (x1r * y1i - x1i * y1r)) + (x2r * y2i - x2i * y2r)
    sr -= one
    return sr * sr + si * si


@njit(cache=True, inline="always", error_model="numpy")
def _gram_schmidt3(W, j):
    """Site j of W (re at 3a+b, im at 9+3a+b): returns max |(U^dagger U - 1)_ab|^2, then projects.

    Term by term the operations of ``group.reunitarize_site`` for nf = 3 (complex
    products written out as numba evaluates them), so the projected field has its bits.
    """
    u0r = W[0, j]; u1r = W[1, j]; u2r = W[2, j]; u3r = W[3, j]; u4r = W[4, j]
    u5r = W[5, j]; u6r = W[6, j]; u7r = W[7, j]; u8r = W[8, j]
    u0i = W[9, j]; u1i = W[10, j]; u2i = W[11, j]; u3i = W[12, j]; u4i = W[13, j]
    u5i = W[14, j]; u6i = W[15, j]; u7i = W[16, j]; u8i = W[17, j]
    # drift: (U^dagger U)_{pq} = sum_r conj(U_rp) U_rq, columns p = (u_p, u_{3+p}, u_{6+p})
    d2 = _dev2(u0r, u0i, u3r, u3i, u6r, u6i, u0r, u0i, u3r, u3i, u6r, u6i, 1.0)
    d2 = max(d2, _dev2(u0r, u0i, u3r, u3i, u6r, u6i, u1r, u1i, u4r, u4i, u7r, u7i, 0.0))
    d2 = max(d2, _dev2(u0r, u0i, u3r, u3i, u6r, u6i, u2r, u2i, u5r, u5i, u8r, u8i, 0.0))
    d2 = max(d2, _dev2(u1r, u1i, u4r, u4i, u7r, u7i, u0r, u0i, u3r, u3i, u6r, u6i, 0.0))
    d2 = max(d2, _dev2(u1r, u1i, u4r, u4i, u7r, u7i, u1r, u1i, u4r, u4i, u7r, u7i, 1.0))
    d2 = max(d2, _dev2(u1r, u1i, u4r, u4i, u7r, u7i, u2r, u2i, u5r, u5i, u8r, u8i, 0.0))
    d2 = max(d2, _dev2(u2r, u2i, u5r, u5i, u8r, u8i, u0r, u0i, u3r, u3i, u6r, u6i, 0.0))
    d2 = max(d2, _dev2(u2r, u2i, u5r, u5i, u8r, u8i, u1r, u1i, u4r, u4i, u7r, u7i, 0.0))
    d2 = max(d2, _dev2(u2r, u2i, u5r, u5i, u8r, u8i, u2r, u2i, u5r, u5i, u8r, u8i, 1.0))
    ar = (u0r, u1r, u2r)
    ai = (u0i, u1i, u2i)
    br = (u3r, u4r, u5r)
    bi = (u3i, u4i, u5i)
    cr = (u6r, u7r, u8r)
    ci = (u6i, u7i, u8i)
    # row 0
    nn = ((ar[0] * ar[0] + ai[0] * ai[0]) + (ar[1] * ar[1] + ai[1] * ai[1])) + (ar[2] * ar[2] + ai[2] * ai[2])
    nn = 1.0 / np.sqrt(nn)
    a0r = ar[0] * nn; a1r = ar[1] * nn; a2r = ar[2] * nn
    a0i = ai[0] * nn; a1i = ai[1] * nn; a2i = ai[2] * nn
    # row 1 -= <row 0, row 1> row 0
    sr = (a0r * br[0] + a0i * bi[0]) + (a1r * br[1] + a1i * bi[1]) + (a2r * br[2] + a2i * bi[2])
    si = (a0r * bi[0] - a0i * br[0]) + (a1r * bi[1] - a1i * br[1]) + (a2r * bi[2] - a2i * br[2])
    b0r = br[0] - (sr * a0r - si * a0i); b0i = bi[0] - (sr * a0i + si * a0r)
    b1r = br[1] - (sr * a1r - si * a1i); b1i = bi[1] - (sr * a1i + si * a1r)
    b2r = br[2] - (sr * a2r - si * a2i); b2i = bi[2] - (sr * a2i + si * a2r)
    nn = ((b0r * b0r + b0i * b0i) + (b1r * b1r + b1i * b1i)) + (b2r * b2r + b2i * b2i)
    nn = 1.0 / np.sqrt(nn)
    b0r *= nn; b1r *= nn; b2r *= nn
    b0i *= nn; b1i *= nn; b2i *= nn
    # row 2 -= <row 0, row 2> row 0, then -= <row 1, row 2> row 1
    sr = (a0r * cr[0] + a0i * ci[0]) + (a1r * cr[1] + a1i * ci[1]) + (a2r * cr[2] + a2i * ci[2])
    si = (a0r * ci[0] - a0i * cr[0]) + (a1r * ci[1] - a1i * cr[1]) + (a2r * ci[2] - a2i * cr[2])
    c0r = cr[0] - (sr * a0r - si * a0i); c0i = ci[0] - (sr * a0i + si * a0r)
    c1r = cr[1] - (sr * a1r - si * a1i); c1i = ci[1] - (sr * a1i + si * a1r)
    c2r = cr[2] - (sr * a2r - si * a2i); c2i = ci[2] - (sr * a2i + si * a2r)
    sr = (b0r * c0r + b0i * c0i) + (b1r * c1r + b1i * c1i) + (b2r * c2r + b2i * c2i)
    si = (b0r * c0i - b0i * c0r) + (b1r * c1i - b1i * c1r) + (b2r * c2i - b2i * c2r)
    c0r = c0r - (sr * b0r - si * b0i); c0i = c0i - (sr * b0i + si * b0r)
    c1r = c1r - (sr * b1r - si * b1i); c1i = c1i - (sr * b1i + si * b1r)
    c2r = c2r - (sr * b2r - si * b2i); c2i = c2i - (sr * b2i + si * b2r)
    nn = ((c0r * c0r + c0i * c0i) + (c1r * c1r + c1i * c1i)) + (c2r * c2r + c2i * c2i)
    nn = 1.0 / np.sqrt(nn)
    W[0, j] = a0r; W[1, j] = a1r; W[2, j] = a2r
    W[9, j] = a0i; W[10, j] = a1i; W[11, j] = a2i
    W[3, j] = b0r; W[4, j] = b1r; W[5, j] = b2r
    W[12, j] = b0i; W[13, j] = b1i; W[14, j] = b2i
    W[6, j] = c0r * nn; W[7, j] = c1r * nn; W[8, j] = c2r * nn
    W[15, j] = c0i * nn; W[16, j] = c1i * nn; W[17, j] = c2i * nn
    return d2
