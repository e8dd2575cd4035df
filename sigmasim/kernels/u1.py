"""Update kernels specialised to U(1) (nf = 1), the hot case of the theta studies.

For nf = 1 every term of the action is linear in U = e^{i phi}: the local
action is S_x = -Re(a U) with

    a = beta * conj(N) + h e^{i theta_m} + 2 kappa e^{i theta_a},

so the heatbath is an exact von Mises draw (Best & Fisher, J. R. Stat. Soc. C
28 (1979) 152) and the overrelaxation U -> conj(a)^2 conj(U) / |a|^2 keeps
S exactly.  The field is stored as unit complex numbers (cos phi, sin phi)
in ``re[0], im[0]``; the Metropolis proposals are drawn from a table of
rotations so that the inner loop has no transcendental function but exp.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels.group import von_mises_angle
from sigmasim.kernels.simd import exp_le0, is_shift, u01_from_bits
from sigmasim.rng import SITE_STRIDE, bits

__all__ = ["metropolis_u1", "heatbath_u1", "overrelax_u1"]

_CH = 256  # sites per chunk: the scratch of a chunk stays in L1


@njit(cache=True, inline="always")
def _field(c, s, nbr, x, beta, cr, ci):
    sr = 0.0
    si = 0.0
    for k in range(nbr.shape[0]):
        y = nbr[k, x]
        sr += c[y]
        si += s[y]
    return beta * sr + cr, -beta * si + ci


@njit(cache=True, parallel=True, error_model="numpy")
def metropolis_u1(c, s, nbr, start, stop, beta, cr, ci, tc, ts, nhits, key, nblocks):
    """``nhits`` Metropolis hits per site of [start, stop) with rotations (tc, ts) from a table.

    ``cr + i ci`` is the constant part of ``a``; the table size must be a power
    of two.  Hit ``h`` of site ``x`` uses the single draw ``bits(key, x *
    SITE_STRIDE + h)``: its low bits pick the rotation, its top 53 bits are the
    accept uniform.  The sites of one colour are cut into ``nblocks`` fixed
    blocks (the parallel unit, independent of the thread count) and each block
    into chunks of ``_CH`` sites; every loop over a chunk is branch free and
    call free, so LLVM vectorises it.  Returns the accepted hits.
    """
    nsite = stop - start
    nn = nbr.shape[0]
    mask = np.uint64(tc.shape[0] - 1)
    acc = np.zeros(nblocks, dtype=np.int64)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        ar = np.empty(_CH)
        ai = np.empty(_CH)
        uu = np.empty(_CH)
        rc = np.empty(_CH)
        rs = np.empty(_CH)
        na = 0
        for c0 in range(lo, hi, _CH):
            m = min(_CH, hi - c0)
            _chunk_field(c, s, nbr, nn, c0, m, beta, cr, ci, ar, ai)
            for hit in range(nhits):
                h = np.uint64(hit)
                # gathers only into block scratch: LLVM can prove that these
                # stores alias no argument array, so the loop vectorises
                for j in range(m):
                    b = bits(key, np.uint64(c0 + j) * SITE_STRIDE + h)
                    idx = np.int64(b & mask)
                    uu[j] = u01_from_bits(b)
                    rc[j] = tc[idx]
                    rs[j] = ts[idx]
                for j in range(m):
                    x = c0 + j
                    ur = c[x]
                    ui = s[x]
                    vr = ur * rc[j] - ui * rs[j]
                    vi = ur * rs[j] + ui * rc[j]
                    # -dS = Re(a (V - U))
                    mds = ar[j] * (vr - ur) - ai[j] * (vi - ui)
                    ok = uu[j] < exp_le0(min(mds, 0.0))
                    c[x] = vr if ok else ur
                    s[x] = vi if ok else ui
                    na += np.int64(ok)
        acc[blk] = na
    return acc.sum()


@njit(cache=True, inline="always")
def _chunk_field(c, s, nbr, nn, c0, m, beta, cr, ci, ar, ai):
    """a = beta conj(N) + const for the sites c0 .. c0 + m - 1 (vectorised over sites)."""
    for j in range(m):
        ar[j] = 0.0
        ai[j] = 0.0
    for k in range(nn):
        off = nbr[k, c0] - c0
        if is_shift(nbr, k, c0, m, off):
            # the neighbours of the chunk are one contiguous run: plain vector loads
            for j in range(m):
                ar[j] += c[c0 + off + j]
                ai[j] += s[c0 + off + j]
        else:
            for j in range(m):
                y = nbr[k, c0 + j]
                ar[j] += c[y]
                ai[j] += s[y]
    for j in range(m):
        ar[j] = beta * ar[j] + cr
        ai[j] = -beta * ai[j] + ci


@njit(cache=True, parallel=True)
def heatbath_u1(c, s, nbr, start, stop, beta, cr, ci, key):
    """Exact von Mises heatbath on the sites [start, stop); returns the site count."""
    for x in prange(start, stop):
        ar, ai = _field(c, s, nbr, x, beta, cr, ci)
        k = np.sqrt(ar * ar + ai * ai)
        f, g, _ = von_mises_angle(k, key, np.uint64(x) * SITE_STRIDE)
        if k > 1e-300:
            # U = e^{i psi} conj(a) / |a|
            er = ar / k
            ei = -ai / k
            c[x] = er * f - ei * g
            s[x] = ei * f + er * g
        else:
            c[x] = f
            s[x] = g
    return stop - start


@njit(cache=True, parallel=True)
def overrelax_u1(c, s, nbr, start, stop, beta, cr, ci):
    """Microcanonical reflection U -> conj(a)^2 conj(U) / |a|^2 on [start, stop)."""
    for x in prange(start, stop):
        ar, ai = _field(c, s, nbr, x, beta, cr, ci)
        k2 = ar * ar + ai * ai
        if k2 > 1e-300:
            # conj(a)^2 / |a|^2
            er = (ar * ar - ai * ai) / k2
            ei = -2.0 * ar * ai / k2
            ur = c[x]
            ui = -s[x]
            c[x] = er * ur - ei * ui
            s[x] = er * ui + ei * ur
    return stop - start
