"""Metropolis specialised to nf = 3 (U(3) and SU(3)), vectorised across sites.

Same algorithm and local action as :func:`sigmasim.kernels.general.metropolis`:
U' = R U with R from a symmetric table, ``nhits`` hits per visit reusing the
local field, weight exp(-S_x) with

    -dS = Re Tr(A (U' - U)) + 2 kappa Re(eta (det U' - det U)),  det U' = det R det U.

Re Tr(A V) = sum_{ab} (M_r V_r + M_i V_i)[a, b] with M = A^dagger = beta N +
diag(conj h), so the field enters as the 18 real components of M.

Layout of the work: the sites of one colour are cut into ``nblocks`` fixed
blocks (the parallel unit; independent of the thread count) and each block
into chunks of ``_CH`` sites whose U, M and det U live in block scratch
(structure of arrays, sites innermost, in L1).  Every loop over a chunk is
branch free and call free, the 3x3 complex arithmetic fully unrolled in
scalar locals, so LLVM vectorises it across sites; the table lookups (a
gather) go to scratch first, which lets LLVM prove that no store of the
update loop aliases an argument.  Hit ``h`` of site ``x`` uses the single
draw ``bits(key, x * SITE_STRIDE + h)``: low bits pick the table entry, the
top 53 bits are the accept uniform.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels.simd import exp_le0, is_shift, u01_from_bits
from sigmasim.rng import SITE_STRIDE, bits

__all__ = ["metropolis_u3", "pack_table3"]

_CH = 64  # sites per chunk: U, M, det and the looked-up table (58 x 64 doubles) stay in L1


def pack_table3(table: np.ndarray, tdet: np.ndarray) -> np.ndarray:
    """(NT, 3, 3) complex table and its dets -> float64 (20, NT): re R[a,b] at 3a+b, im at 9+3a+b, det at 18, 19."""
    nt = table.shape[0]
    out = np.empty((20, nt))
    flat = table.reshape(nt, 9).T
    out[:9] = flat.real
    out[9:18] = flat.imag
    out[18] = tdet.real
    out[19] = tdet.imag
    return out


@njit(cache=True, parallel=True, error_model="numpy")
def metropolis_u3(re, im, nbr, start, stop, beta, hdiag, k2r, k2i, tab, nhits, key, nblocks):
    """Metropolis for nf = 3 on the sites [start, stop); returns the accepted hits.

    ``hdiag`` complex (3,), ``k2r + i k2i = 2 kappa eta``, ``tab`` from
    :func:`pack_table3` (size a power of two).
    """
    nsite = stop - start
    nn = nbr.shape[0]
    mask = np.uint64(tab.shape[1] - 1)
    acc = np.zeros(nblocks, dtype=np.int64)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        M = np.empty((18, _CH))
        W = np.empty((18, _CH))  # U of the chunk
        D = np.empty((2, _CH))
        R = np.empty((20, _CH))
        uu = np.empty(_CH)
        shift = np.empty(nn, dtype=np.bool_)
        na = 0
        for c0 in range(lo, hi, _CH):
            m = min(_CH, hi - c0)
            # neighbours of the chunk in direction k one contiguous run? (then vector loads)
            for k in range(nn):
                shift[k] = is_shift(nbr, k, c0, m, nbr[k, c0] - c0)
            # M = beta N + diag(conj h), component 3a+b (re) and 9+3a+b (im)
            for comp in range(9):
                for j in range(m):
                    M[comp, j] = 0.0
                    M[9 + comp, j] = 0.0
                for k in range(nn):
                    off = nbr[k, c0] - c0
                    if shift[k]:
                        for j in range(m):
                            M[comp, j] += re[comp, c0 + off + j]
                            M[9 + comp, j] += im[comp, c0 + off + j]
                    else:
                        for j in range(m):
                            y = nbr[k, c0 + j]
                            M[comp, j] += re[comp, y]
                            M[9 + comp, j] += im[comp, y]
                for j in range(m):
                    M[comp, j] *= beta
                    M[9 + comp, j] *= beta
            for a in range(3):
                hr = hdiag[a].real
                hi_ = -hdiag[a].imag
                for j in range(m):
                    M[4 * a, j] += hr
                    M[9 + 4 * a, j] += hi_
            for comp in range(9):
                for j in range(m):
                    W[comp, j] = re[comp, c0 + j]
                    W[9 + comp, j] = im[comp, c0 + j]
            for j in range(m):
                dr, di = _det3(W[0, j], W[9, j], W[1, j], W[10, j], W[2, j], W[11, j],
                               W[3, j], W[12, j], W[4, j], W[13, j], W[5, j], W[14, j],
                               W[6, j], W[15, j], W[7, j], W[16, j], W[8, j], W[17, j])
                D[0, j] = dr
                D[1, j] = di
            for hit in range(nhits):
                h = np.uint64(hit)
                for j in range(m):
                    b = bits(key, np.uint64(c0 + j) * SITE_STRIDE + h)
                    idx = np.int64(b & mask)
                    uu[j] = u01_from_bits(b)
                    for comp in range(20):
                        R[comp, j] = tab[comp, idx]
                for j in range(m):
                    na += _hit(W, M, D, R, uu, j, k2r, k2i)
            for comp in range(9):
                for j in range(m):
                    re[comp, c0 + j] = W[comp, j]
                    im[comp, c0 + j] = W[9 + comp, j]
        acc[blk] = na
    return acc.sum()


@njit(cache=True, inline="always")
def _det3(a0r, a0i, a1r, a1i, a2r, a2i, a3r, a3i, a4r, a4i, a5r, a5i, a6r, a6i, a7r, a7i,
          a8r, a8i):
    """det of [[a0, a1, a2], [a3, a4, a5], [a6, a7, a8]] (cofactors of the first row)."""
    m0r = (a4r * a8r - a4i * a8i) - (a5r * a7r - a5i * a7i)
    m0i = (a4r * a8i + a4i * a8r) - (a5r * a7i + a5i * a7r)
    m1r = (a3r * a8r - a3i * a8i) - (a5r * a6r - a5i * a6i)
    m1i = (a3r * a8i + a3i * a8r) - (a5r * a6i + a5i * a6r)
    m2r = (a3r * a7r - a3i * a7i) - (a4r * a6r - a4i * a6i)
    m2i = (a3r * a7i + a3i * a7r) - (a4r * a6i + a4i * a6r)
    dr = (a0r * m0r - a0i * m0i) - (a1r * m1r - a1i * m1i) + (a2r * m2r - a2i * m2i)
    di = (a0r * m0i + a0i * m0r) - (a1r * m1i + a1i * m1r) + (a2r * m2i + a2i * m2r)
    return dr, di


@njit(cache=True, inline="always", error_model="numpy")
def _hit(W, M, D, R, uu, j, k2r, k2i):
    """One hit on lane j of the chunk: V = R U, accept test, branch-free select; returns 0 or 1."""
    u0r = W[0, j]; u1r = W[1, j]; u2r = W[2, j]; u3r = W[3, j]; u4r = W[4, j]
    u5r = W[5, j]; u6r = W[6, j]; u7r = W[7, j]; u8r = W[8, j]
    u0i = W[9, j]; u1i = W[10, j]; u2i = W[11, j]; u3i = W[12, j]; u4i = W[13, j]
    u5i = W[14, j]; u6i = W[15, j]; u7i = W[16, j]; u8i = W[17, j]
    r0r = R[0, j]; r1r = R[1, j]; r2r = R[2, j]; r3r = R[3, j]; r4r = R[4, j]
    r5r = R[5, j]; r6r = R[6, j]; r7r = R[7, j]; r8r = R[8, j]
    r0i = R[9, j]; r1i = R[10, j]; r2i = R[11, j]; r3i = R[12, j]; r4i = R[13, j]
    r5i = R[14, j]; r6i = R[15, j]; r7i = R[16, j]; r8i = R[17, j]
    # V[a, b] = sum_k R[a, k] U[k, b]
    v0r = (r0r * u0r - r0i * u0i) + (r1r * u3r - r1i * u3i) + (r2r * u6r - r2i * u6i)
    v0i = (r0r * u0i + r0i * u0r) + (r1r * u3i + r1i * u3r) + (r2r * u6i + r2i * u6r)
    v1r = (r0r * u1r - r0i * u1i) + (r1r * u4r - r1i * u4i) + (r2r * u7r - r2i * u7i)
    v1i = (r0r * u1i + r0i * u1r) + (r1r * u4i + r1i * u4r) + (r2r * u7i + r2i * u7r)
    v2r = (r0r * u2r - r0i * u2i) + (r1r * u5r - r1i * u5i) + (r2r * u8r - r2i * u8i)
    v2i = (r0r * u2i + r0i * u2r) + (r1r * u5i + r1i * u5r) + (r2r * u8i + r2i * u8r)
    v3r = (r3r * u0r - r3i * u0i) + (r4r * u3r - r4i * u3i) + (r5r * u6r - r5i * u6i)
    v3i = (r3r * u0i + r3i * u0r) + (r4r * u3i + r4i * u3r) + (r5r * u6i + r5i * u6r)
    v4r = (r3r * u1r - r3i * u1i) + (r4r * u4r - r4i * u4i) + (r5r * u7r - r5i * u7i)
    v4i = (r3r * u1i + r3i * u1r) + (r4r * u4i + r4i * u4r) + (r5r * u7i + r5i * u7r)
    v5r = (r3r * u2r - r3i * u2i) + (r4r * u5r - r4i * u5i) + (r5r * u8r - r5i * u8i)
    v5i = (r3r * u2i + r3i * u2r) + (r4r * u5i + r4i * u5r) + (r5r * u8i + r5i * u8r)
    v6r = (r6r * u0r - r6i * u0i) + (r7r * u3r - r7i * u3i) + (r8r * u6r - r8i * u6i)
    v6i = (r6r * u0i + r6i * u0r) + (r7r * u3i + r7i * u3r) + (r8r * u6i + r8i * u6r)
    v7r = (r6r * u1r - r6i * u1i) + (r7r * u4r - r7i * u4i) + (r8r * u7r - r8i * u7i)
    v7i = (r6r * u1i + r6i * u1r) + (r7r * u4i + r7i * u4r) + (r8r * u7i + r8i * u7r)
    v8r = (r6r * u2r - r6i * u2i) + (r7r * u5r - r7i * u5i) + (r8r * u8r - r8i * u8i)
    v8i = (r6r * u2i + r6i * u2r) + (r7r * u5i + r7i * u5r) + (r8r * u8i + r8i * u8r)
    # Re Tr(A (V - U)) as a balanced sum
    e0 = (v0r - u0r) * M[0, j] + (v0i - u0i) * M[9, j]
    e1 = (v1r - u1r) * M[1, j] + (v1i - u1i) * M[10, j]
    e2 = (v2r - u2r) * M[2, j] + (v2i - u2i) * M[11, j]
    e3 = (v3r - u3r) * M[3, j] + (v3i - u3i) * M[12, j]
    e4 = (v4r - u4r) * M[4, j] + (v4i - u4i) * M[13, j]
    e5 = (v5r - u5r) * M[5, j] + (v5i - u5i) * M[14, j]
    e6 = (v6r - u6r) * M[6, j] + (v6i - u6i) * M[15, j]
    e7 = (v7r - u7r) * M[7, j] + (v7i - u7i) * M[16, j]
    e8 = (v8r - u8r) * M[8, j] + (v8i - u8i) * M[17, j]
    dtr = ((e0 + e1) + (e2 + e3)) + ((e4 + e5) + (e6 + e7)) + e8
    dr = D[0, j]
    di = D[1, j]
    tr = R[18, j]
    ti = R[19, j]
    nr = tr * dr - ti * di
    ni = tr * di + ti * dr
    mds = dtr + (k2r * (nr - dr) - k2i * (ni - di))
    ok = uu[j] < exp_le0(min(mds, 0.0))
    W[0, j] = v0r if ok else u0r
    W[1, j] = v1r if ok else u1r
    W[2, j] = v2r if ok else u2r
    W[3, j] = v3r if ok else u3r
    W[4, j] = v4r if ok else u4r
    W[5, j] = v5r if ok else u5r
    W[6, j] = v6r if ok else u6r
    W[7, j] = v7r if ok else u7r
    W[8, j] = v8r if ok else u8r
    W[9, j] = v0i if ok else u0i
    W[10, j] = v1i if ok else u1i
    W[11, j] = v2i if ok else u2i
    W[12, j] = v3i if ok else u3i
    W[13, j] = v4i if ok else u4i
    W[14, j] = v5i if ok else u5i
    W[15, j] = v6i if ok else u6i
    W[16, j] = v7i if ok else u7i
    W[17, j] = v8i if ok else u8i
    D[0, j] = nr if ok else dr
    D[1, j] = ni if ok else di
    return np.int64(ok)
