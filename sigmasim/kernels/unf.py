"""Heatbath and overrelaxation for nf >= 2 (U(nf) and SU(nf)), vectorised across sites.

The algorithms of :func:`sigmasim.kernels.general.heatbath` and
:func:`~sigmasim.kernels.general.overrelax` (Cabibbo-Marinari SU(2) subgroups in the
flavour order of :func:`~sigmasim.kernels.general.flavour_order`, then for U(nf) the
U(1) phase step accepted with the determinant's Metropolis ratio), laid out as the
nf = 3 Metropolis of :mod:`sigmasim.kernels.u3`: the rows of one colour are cut into
chunks, the neighbour sums, U and W = U A of a chunk live in scratch with the sites
innermost, and each step of the site update is one pass over the chunk's sites:

- the neighbour sums (same order of additions as ``lattice.neighbours``), W = U A,
  the SU(2) direction of a subgroup and the rotation of two rows of U and W are
  branch-free loops over the sites, which LLVM vectorises;
- the rejection loops (x0 of the SU(2) heatbath, the von Mises angle of the phase)
  run site by site, each site from its own counters, so the numbers do not depend on
  the chunking or the thread count.

Local action as in :mod:`sigmasim.kernels.general`: ``A = M^dagger`` with
``M = beta N + diag(conj hdiag)`` stored as its real parts (components ``a nf + b``)
and imaginary parts (``nf^2 + a nf + b``).

Counters of site x (``n0 = x * SITE_STRIDE``): subgroup number g of the order uses
``n0 + g * SUB_STRIDE`` (+0, +1 the direction on the sphere, x0 attempts from +2),
the phase step ``n0 + MAX_SUB * SUB_STRIDE`` (+0 the accept draw, von Mises attempts
from +1); the overrelaxation draws only the phase step's accept at ``n0``.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels import tables
from sigmasim.kernels.general import flavour_order
from sigmasim.kernels.group import det, det_lu_in_place, sample_su2_x0, von_mises_angle
from sigmasim.kernels.serial import total, zeros_bool, zeros_int
from sigmasim.kernels.simd import exp_le0, lookup16, u01_from_bits
from sigmasim.kernels.u3 import CHUNK_SITES, _det3, _fast_rows
from sigmasim.rng import SITE_STRIDE, bits, uniform

__all__ = ["local_unf", "local_unf_update", "metropolis_u2", "metropolis_u2_update", "pack_table2", "MAX_SUB",
           "SUB_STRIDE"]

MAX_SUB = 28  # subgroups of nf = 8
SUB_STRIDE = np.uint64(1 << 19)  # MAX_SUB + 1 of them fit SITE_STRIDE = 2^24
_ONE = np.uint64(1)
_TWO = np.uint64(2)


@njit(cache=True, inline="always")
def _add_run(M, nc, dst, re, im, src, n, c):
    """M[(c, nc + c), dst + i] += (re, im)[c, src + i] for i < n (unsigned indices: affine)."""
    s = np.uint64(src)
    d = np.uint64(dst)
    for i in range(n):
        q = s + np.uint64(i)
        p = d + np.uint64(i)
        M[c, p] += re[c, q]
        M[nc + c, p] += im[c, q]


@njit(cache=True, inline="always")
def _fast_row(M, nc, b, re, im, rs, h, o, j0, w):
    """The fastest-direction neighbours (+ before -) of the sites j0 .. j0 + w - 1 of one row
    (chunk offset b, other colour's row at rs): :func:`u3._fast_row18` for nc components."""
    ub = np.uint64(b)
    urs = np.uint64(rs)
    uh = np.uint64(h)
    if o == 0:
        i0 = 0
        if j0 == 0:
            for comp in range(nc):
                M[comp, ub] = (M[comp, ub] + re[comp, urs]) + re[comp, urs + uh - _ONE]
                M[nc + comp, ub] = (M[nc + comp, ub] + im[comp, urs]) + im[comp, urs + uh - _ONE]
            i0 = 1
        q0 = urs + np.uint64(j0)
        for comp in range(nc):
            for i in range(i0, w):
                p = ub + np.uint64(i)
                q = q0 + np.uint64(i)
                M[comp, p] = (M[comp, p] + re[comp, q]) + re[comp, q - _ONE]
                M[nc + comp, p] = (M[nc + comp, p] + im[comp, q]) + im[comp, q - _ONE]
    else:
        n1 = w
        if j0 + w == h:
            p = ub + np.uint64(w - 1)
            for comp in range(nc):
                M[comp, p] = (M[comp, p] + re[comp, urs]) + re[comp, urs + uh - _ONE]
                M[nc + comp, p] = (M[nc + comp, p] + im[comp, urs]) + im[comp, urs + uh - _ONE]
            n1 = w - 1
        q0 = urs + np.uint64(j0)
        for comp in range(nc):
            for i in range(n1):
                p = ub + np.uint64(i)
                q = q0 + np.uint64(i)
                M[comp, p] = (M[comp, p] + re[comp, q + _ONE]) + re[comp, q]
                M[nc + comp, p] = (M[nc + comp, p] + im[comp, q + _ONE]) + im[comp, q]


@njit(cache=True, inline="always")
def _rot_rows(X, nf, nc, i, j, r0r, r0i, r1r, r1i, m):
    """Rows i, j of X -> r (rows i, j), r = [[r0, r1], [-conj r1, conj r0]] per site."""
    for b in range(nf):
        ci = i * nf + b
        cj = j * nf + b
        for s in range(m):
            xr = X[ci, s]
            xi = X[nc + ci, s]
            yr = X[cj, s]
            yi = X[nc + cj, s]
            ar = r0r[s]
            ai = r0i[s]
            br = r1r[s]
            bi = r1i[s]
            X[ci, s] = (ar * xr - ai * xi) + (br * yr - bi * yi)
            X[nc + ci, s] = (ar * xi + ai * xr) + (br * yi + bi * yr)
            X[cj, s] = (ar * yr + ai * yi) - (br * xr + bi * xi)
            X[nc + cj, s] = (ar * yi - ai * yr) + (bi * xr - br * xi)


@njit(cache=True, inline="always")
def _det_rows(U, nf, nc, V, m):
    """V[3] + i V[4] = det of every chunk site, nf = 2 or 3 (closed forms, vectorised)."""
    if nf == 2:
        for s in range(m):
            ar = U[0, s]; ai = U[nc, s]; br = U[1, s]; bi = U[nc + 1, s]
            cr = U[2, s]; ci = U[nc + 2, s]; dr = U[3, s]; di = U[nc + 3, s]
            V[3, s] = (ar * dr - ai * di) - (br * cr - bi * ci)
            V[4, s] = (ar * di + ai * dr) - (br * ci + bi * cr)
    else:
        for s in range(m):
            dr, di = _det3(U[0, s], U[9, s], U[1, s], U[10, s], U[2, s], U[11, s],
                           U[3, s], U[12, s], U[4, s], U[13, s], U[5, s], U[14, s],
                           U[6, s], U[15, s], U[7, s], U[16, s], U[8, s], U[17, s])
            V[3, s] = dr
            V[4, s] = di


@njit(cache=True)
def _det_site(U, nf, nc, s, work):
    """det of the nf x nf matrix of chunk site s (closed forms for nf = 2, 3; LU above)."""
    if nf == 2:
        ar = U[0, s]; ai = U[nc, s]; br = U[1, s]; bi = U[nc + 1, s]
        cr = U[2, s]; ci = U[nc + 2, s]; dr = U[3, s]; di = U[nc + 3, s]
        return complex((ar * dr - ai * di) - (br * cr - bi * ci), (ar * di + ai * dr) - (br * ci + bi * cr))
    for a in range(nf):
        for b in range(nf):
            work[a, b] = complex(U[a * nf + b, s], U[nc + a * nf + b, s])
    if nf == 3:
        return det(work, nf, work)  # the closed form only reads its matrix
    return det_lu_in_place(work, nf)


@njit(cache=True, inline="always")
def _chunk_field(M, R, X, fo, ff, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1, j0, w, m,
                 other):
    """M[:, :m] = beta N + diag(conj hdiag) of the chunk's sites (rows r0..r1, sites j0..j0+w of
    each), components a nf + b (real) and nf^2 + a nf + b (imaginary); R, X, fo: scratch."""
    nc = nf * nf
    for comp in range(2 * nc):
        for j in range(m):
            R[comp, j] = 0.0
    for k in range(rnbr.shape[0]):
        g = r0
        while g < r1:
            g2 = g + 1
            while g2 < r1 and rnbr[k, g2] == rnbr[k, g2 - 1] + 1:
                g2 += 1
            for c in range(nc):
                _add_run(R, nc, (g - r0) * w, re, im, other + rnbr[k, g] * h + j0, (g2 - g) * w, c)
            g = g2
    if rows > 0:
        for g in range(r0, r1):
            o = (colour + rpar[g]) % 2 == 1
            b = (g - r0) * h
            for j in range(h):
                fo[b + j] = o
        src = other + r0 * h
        for comp in range(nc):
            _fast_rows(R[comp], M[comp], X, re[comp], src, m, h, fo, ff, fl)
            _fast_rows(R[nc + comp], M[nc + comp], X, im[comp], src, m, h, fo, ff, fl)
    else:
        for g in range(r0, r1):
            _fast_row(R, nc, (g - r0) * w, re, im, other + g * h, h, (colour + rpar[g]) % 2, j0, w)
        for comp in range(2 * nc):
            for j in range(m):
                M[comp, j] = R[comp, j]
    for comp in range(2 * nc):
        for j in range(m):
            M[comp, j] *= beta
    for a in range(nf):
        hr = hdiag[a].real
        hi = -hdiag[a].imag
        for j in range(m):
            M[a * nf + a, j] += hr
            M[nc + a * nf + a, j] += hi


@njit(cache=True, parallel=True, error_model="numpy")
def local_unf(re, im, rnbr, rpar, h, colour, nf, beta, hdiag, k2r, k2i, special, hb, key, rows, nblk=0):
    """One heatbath (``hb``) or overrelaxation update of every site of ``colour``, nf >= 2.

    ``rnbr``, ``rpar``, ``h``: the lattice's row tables; ``hdiag`` complex (nf,);
    ``k2r + i k2i = 2 kappa eta``; ``rows``/``nblk`` as in :func:`u3.metropolis_u3`
    (the numbers depend on neither).  Returns the accepted phase steps (0 for SU(nf)).
    """
    nc = nf * nf
    half = re.shape[1] // 2
    nrows = rpar.shape[0]
    start = colour * half
    other = (1 - colour) * half
    rows = min(rows, CHUNK_SITES // h)
    if rows > 0:
        nseg = 1
        nch = (nrows + rows - 1) // rows
    else:
        nseg = (h + CHUNK_SITES - 1) // CHUNK_SITES
        nch = nrows * nseg
    perm = np.empty(nf, dtype=np.int64)
    flavour_order(key, nf, perm)
    acc = zeros_int(nch)
    nblk = nch if nblk <= 0 else min(nch, nblk)
    ff = zeros_bool(CHUNK_SITES)
    fl = zeros_bool(CHUNK_SITES)
    if rows > 0:
        for g in range(rows):
            ff[g * h] = True
            fl[g * h + h - 1] = True
    phase_base = np.uint64(MAX_SUB) * SUB_STRIDE
    for blk in prange(nblk):
        M = np.empty((2 * nc, CHUNK_SITES))
        R = np.empty((2 * nc, CHUNK_SITES))
        U = np.empty((2 * nc, CHUNK_SITES))
        W = np.empty((2 * nc, CHUNK_SITES))
        V = np.empty((6, CHUNK_SITES))  # per-site SU(2) data: A (2), B (2), alpha, x
        Q = np.empty((4, CHUNK_SITES))  # the rotation r0, r1 per site
        X = np.empty(CHUNK_SITES + 2 * h if rows > 0 else 1)
        fo = np.empty(CHUNK_SITES, dtype=np.bool_)
        work = np.empty((nf, nf), dtype=np.complex128)
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            if rows > 0:
                r0 = ch * rows
                r1 = min(nrows, r0 + rows)
                j0 = 0
                w = h
            else:
                r0 = ch // nseg
                r1 = r0 + 1
                j0 = (ch % nseg) * CHUNK_SITES
                w = min(CHUNK_SITES, h - j0)
            m = (r1 - r0) * w
            c0 = start + r0 * h + j0
            uc0 = np.uint64(c0)
            na = 0
            # ---- neighbour sums -> M = beta N + diag(conj h)
            _chunk_field(M, R, X, fo, ff, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1,
                         j0, w, m, other)
            # ---- U and W = U A = U M^dagger
            for comp in range(nc):
                for j in range(m):
                    q = uc0 + np.uint64(j)
                    U[comp, j] = re[comp, q]
                    U[nc + comp, j] = im[comp, q]
            for a in range(nf):
                for e in range(nf):
                    cw = a * nf + e
                    for j in range(m):
                        W[cw, j] = 0.0
                        W[nc + cw, j] = 0.0
                    for c in range(nf):
                        cu = a * nf + c
                        cm = e * nf + c
                        for j in range(m):
                            ur = U[cu, j]
                            ui = U[nc + cu, j]
                            mr = M[cm, j]
                            mi = M[nc + cm, j]
                            W[cw, j] += ur * mr + ui * mi
                            W[nc + cw, j] += ui * mr - ur * mi
            # ---- SU(2) subgroups in the order of perm
            g = 0
            for pi in range(nf):
                for pj in range(pi + 1, nf):
                    i = perm[pi]
                    jj = perm[pj]
                    cii = i * nf + i
                    cjj = jj * nf + jj
                    cij = i * nf + jj
                    cji = jj * nf + i
                    if hb:
                        for s in range(m):
                            ar = 0.5 * (W[cii, s] + W[cjj, s])
                            ai = 0.5 * (W[nc + cii, s] - W[nc + cjj, s])
                            br = 0.5 * (W[cij, s] - W[cji, s])
                            bi = 0.5 * (W[nc + cij, s] + W[nc + cji, s])
                            k = np.sqrt(ar * ar + ai * ai + br * br + bi * bi)
                            ik = 1.0 / k
                            V[0, s] = ar * ik
                            V[1, s] = ai * ik
                            V[2, s] = br * ik
                            V[3, s] = bi * ik
                            V[4, s] = 2.0 * k
                        gb = np.uint64(g) * SUB_STRIDE
                        for s in range(m):
                            n = (uc0 + np.uint64(s)) * SITE_STRIDE + gb
                            if V[4, s] < 2e-300:
                                V[5, s] = 2.0  # no field in this subgroup: r = 1 below
                            else:
                                x0, _ = sample_su2_x0(V[4, s], key, n + _TWO)
                                V[5, s] = x0
                        for s in range(m):
                            n = (uc0 + np.uint64(s)) * SITE_STRIDE + gb
                            u = uniform(key, n)
                            v = uniform(key, n + _ONE)
                            x0 = V[5, s]
                            one = x0 > 1.5
                            x0 = 1.0 if one else x0
                            rr2 = max(0.0, 1.0 - x0 * x0)
                            rr = np.sqrt(rr2)
                            c3 = 2.0 * u - 1.0
                            rs = rr * np.sqrt(max(0.0, 1.0 - c3 * c3))
                            ph = np.pi * (2.0 * v - 1.0)
                            x1 = rs * np.cos(ph)
                            x2 = rs * np.sin(ph)
                            x3 = rr * c3
                            Ar = 1.0 if one else V[0, s]
                            Ai = 0.0 if one else V[1, s]
                            Br = 0.0 if one else V[2, s]
                            Bi = 0.0 if one else V[3, s]
                            # r = X V^dagger, X = [[p, q], [-conj q, conj p]], p = x0 + i x3, q = x2 + i x1
                            Q[0, s] = (x0 * Ar + x3 * Ai) + (x2 * Br + x1 * Bi)
                            Q[1, s] = (x3 * Ar - x0 * Ai) + (x1 * Br - x2 * Bi)
                            Q[2, s] = (x2 * Ar - x1 * Ai) + (x3 * Bi - x0 * Br)
                            Q[3, s] = (x2 * Ai + x1 * Ar) - (x0 * Bi + x3 * Br)
                    else:
                        for s in range(m):
                            ar = 0.5 * (W[cii, s] + W[cjj, s])
                            ai = 0.5 * (W[nc + cii, s] - W[nc + cjj, s])
                            br = 0.5 * (W[cij, s] - W[cji, s])
                            bi = 0.5 * (W[nc + cij, s] + W[nc + cji, s])
                            k2 = ar * ar + ai * ai + br * br + bi * bi
                            tiny = k2 < 1e-300
                            # r = (V^dagger)^2 = [[f conj a / ... ]]: r0 = f a* - 1, r1 = -f b, f = 2 Re a / k^2
                            f = 0.0 if tiny else (ar + ar) / k2
                            Q[0, s] = 1.0 if tiny else f * ar - 1.0
                            Q[1, s] = -f * ai
                            Q[2, s] = -f * br
                            Q[3, s] = -f * bi
                    _rot_rows(U, nf, nc, i, jj, Q[0], Q[1], Q[2], Q[3], m)
                    _rot_rows(W, nf, nc, i, jj, Q[0], Q[1], Q[2], Q[3], m)
                    g += 1
            # ---- U(nf): the phase step, accepted with the determinant's Metropolis ratio
            if not special:
                # z = Tr W; the proposal e (hb: von Mises around conj z, or: (conj z / |z|)^2)
                for s in range(m):
                    zr = 0.0
                    zi = 0.0
                    for a in range(nf):
                        zr += W[a * nf + a, s]
                        zi += W[nc + a * nf + a, s]
                    V[0, s] = zr
                    V[1, s] = zi
                    V[2, s] = np.sqrt(zr * zr + zi * zi)
                if hb:
                    for s in range(m):
                        n = (uc0 + np.uint64(s)) * SITE_STRIDE + phase_base
                        c, sn, _ = von_mises_angle(V[2, s], key, n + _ONE)
                        Q[0, s] = c
                        Q[1, s] = sn
                for s in range(m):
                    kz = V[2, s]
                    big = kz > 1e-300
                    ik = 1.0 / kz if big else 0.0
                    cr = V[0, s] * ik
                    ci = -V[1, s] * ik
                    if hb:
                        c = Q[0, s]
                        sn = Q[1, s]
                        er = c * cr - sn * ci if big else c
                        ei = c * ci + sn * cr if big else sn
                    else:
                        er = cr * cr - ci * ci if big else 1.0
                        ei = 2.0 * cr * ci if big else 0.0
                    Q[0, s] = er
                    Q[1, s] = ei
                    Q[2, s] = er
                    Q[3, s] = ei
                for t in range(nf - 1):  # Q[2] + i Q[3] = e^nf
                    for s in range(m):
                        pr = Q[2, s]
                        pi_ = Q[3, s]
                        Q[2, s] = pr * Q[0, s] - pi_ * Q[1, s]
                        Q[3, s] = pr * Q[1, s] + pi_ * Q[0, s]
                if nf == 2 or nf == 3:
                    _det_rows(U, nf, nc, V, m)
                else:
                    for s in range(m):
                        d = _det_site(U, nf, nc, s, work)
                        V[3, s] = d.real
                        V[4, s] = d.imag
                pb = phase_base if hb else np.uint64(0)
                for s in range(m):
                    dr = V[3, s]
                    di = V[4, s]
                    ddr = (Q[2, s] * dr - Q[3, s] * di) - dr
                    ddi = (Q[2, s] * di + Q[3, s] * dr) - di
                    mds = k2r * ddr - k2i * ddi  # -dS
                    uacc = uniform(key, (uc0 + np.uint64(s)) * SITE_STRIDE + pb)
                    ok = uacc < exp_le0(min(mds, 0.0))
                    if not hb:
                        ok = ok and V[2, s] > 1e-300
                    V[5, s] = 1.0 if ok else 0.0
                    na += np.int64(ok)
                for comp in range(nc):
                    for s in range(m):
                        ok = V[5, s] != 0.0
                        er = Q[0, s] if ok else 1.0
                        ei = Q[1, s] if ok else 0.0
                        xr = U[comp, s]
                        xi = U[nc + comp, s]
                        U[comp, s] = er * xr - ei * xi
                        U[nc + comp, s] = er * xi + ei * xr
            for comp in range(nc):
                for j in range(m):
                    q = uc0 + np.uint64(j)
                    re[comp, q] = U[comp, j]
                    im[comp, q] = U[nc + comp, j]
            acc[ch] = na
    return total(acc)


@njit(cache=True)
def local_unf_update(re, im, rnbr, rpar, h, nf, beta, hdiag, k2r, k2i, special, hb, seed_hash, step, rows, nblk):
    """One heatbath or overrelaxation update of both colours in one call: colour ``c`` is colour
    update ``step + c`` with key ``step_key(seed, step + c)``.  Returns the accepted phase steps."""
    acc = 0
    for colour in range(2):
        key = tables.step_key_nb(seed_hash, step + colour, 0)
        acc += local_unf(re, im, rnbr, rpar, h, colour, nf, beta, hdiag, k2r, k2i, special, hb, key, rows, nblk)
    return acc


# ----------------------------------------------------------------------------- nf = 2 Metropolis
TABLE_ENTRIES = 16


@njit(cache=True)
def pack_table2(table, tdet, out):
    """(16, 2, 2) complex table and its dets -> ``out`` float64 (10, 16): re R[a, b] at 2a + b,
    im at 4 + 2a + b, det at 8, 9."""
    for k in range(table.shape[0]):
        for a in range(2):
            for b in range(2):
                out[2 * a + b, k] = table[k, a, b].real
                out[4 + 2 * a + b, k] = table[k, a, b].imag
        out[8, k] = tdet[k].real
        out[9, k] = tdet[k].imag


@njit(cache=True, inline="always", error_model="numpy")
def _hit2(W, M, D, T, uu, j, k2r, k2i):
    """One Metropolis hit on chunk site j (nf = 2): V = R U, accept test, branch-free select."""
    u0r = W[0, j]; u1r = W[1, j]; u2r = W[2, j]; u3r = W[3, j]
    u0i = W[4, j]; u1i = W[5, j]; u2i = W[6, j]; u3i = W[7, j]
    r0r = T[0, j]; r1r = T[1, j]; r2r = T[2, j]; r3r = T[3, j]
    r0i = T[4, j]; r1i = T[5, j]; r2i = T[6, j]; r3i = T[7, j]
    v0r = (r0r * u0r - r0i * u0i) + (r1r * u2r - r1i * u2i)
    v0i = (r0r * u0i + r0i * u0r) + (r1r * u2i + r1i * u2r)
    v1r = (r0r * u1r - r0i * u1i) + (r1r * u3r - r1i * u3i)
    v1i = (r0r * u1i + r0i * u1r) + (r1r * u3i + r1i * u3r)
    v2r = (r2r * u0r - r2i * u0i) + (r3r * u2r - r3i * u2i)
    v2i = (r2r * u0i + r2i * u0r) + (r3r * u2i + r3i * u2r)
    v3r = (r2r * u1r - r2i * u1i) + (r3r * u3r - r3i * u3i)
    v3i = (r2r * u1i + r2i * u1r) + (r3r * u3i + r3i * u3r)
    e0 = (v0r - u0r) * M[0, j] + (v0i - u0i) * M[4, j]
    e1 = (v1r - u1r) * M[1, j] + (v1i - u1i) * M[5, j]
    e2 = (v2r - u2r) * M[2, j] + (v2i - u2i) * M[6, j]
    e3 = (v3r - u3r) * M[3, j] + (v3i - u3i) * M[7, j]
    dtr = (e0 + e1) + (e2 + e3)
    dr = D[0, j]
    di = D[1, j]
    tr = T[8, j]
    ti = T[9, j]
    nr = tr * dr - ti * di
    ni = tr * di + ti * dr
    mds = dtr + (k2r * (nr - dr) - k2i * (ni - di))
    ok = uu[j] < exp_le0(min(mds, 0.0))
    W[0, j] = v0r if ok else u0r
    W[1, j] = v1r if ok else u1r
    W[2, j] = v2r if ok else u2r
    W[3, j] = v3r if ok else u3r
    W[4, j] = v0i if ok else u0i
    W[5, j] = v1i if ok else u1i
    W[6, j] = v2i if ok else u2i
    W[7, j] = v3i if ok else u3i
    D[0, j] = nr if ok else dr
    D[1, j] = ni if ok else di
    return np.int64(ok)


@njit(cache=True, parallel=True, error_model="numpy")
def metropolis_u2(re, im, rnbr, rpar, h, colour, beta, hdiag, k2r, k2i, tab, nhits, key, rows, nblk=0):
    """Metropolis for nf = 2 on every site of ``colour`` (the algorithm and draws of
    :func:`u3.metropolis_u3`: hit h of site x uses ``bits(key, x * SITE_STRIDE + h)``, low 4 bits
    the entry of ``tab`` (:func:`pack_table2`), top 53 bits the accept uniform); returns the
    accepted hits."""
    nf = 2
    half = re.shape[1] // 2
    nrows = rpar.shape[0]
    start = colour * half
    other = (1 - colour) * half
    mask = np.uint64(TABLE_ENTRIES - 1)
    rows = min(rows, CHUNK_SITES // h)
    if rows > 0:
        nseg = 1
        nch = (nrows + rows - 1) // rows
    else:
        nseg = (h + CHUNK_SITES - 1) // CHUNK_SITES
        nch = nrows * nseg
    acc = zeros_int(nch)
    nblk = nch if nblk <= 0 else min(nch, nblk)
    ff = zeros_bool(CHUNK_SITES)
    fl = zeros_bool(CHUNK_SITES)
    if rows > 0:
        for g in range(rows):
            ff[g * h] = True
            fl[g * h + h - 1] = True
    for blk in prange(nblk):
        M = np.empty((8, CHUNK_SITES))
        R = np.empty((8, CHUNK_SITES))
        W = np.empty((8, CHUNK_SITES))
        D = np.empty((2, CHUNK_SITES))
        T = np.empty((10, CHUNK_SITES))
        uu = np.empty(CHUNK_SITES)
        ix = np.empty(CHUNK_SITES, dtype=np.int64)
        X = np.empty(CHUNK_SITES + 2 * h if rows > 0 else 1)
        fo = np.empty(CHUNK_SITES, dtype=np.bool_)
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            if rows > 0:
                r0 = ch * rows
                r1 = min(nrows, r0 + rows)
                j0 = 0
                w = h
            else:
                r0 = ch // nseg
                r1 = r0 + 1
                j0 = (ch % nseg) * CHUNK_SITES
                w = min(CHUNK_SITES, h - j0)
            m = (r1 - r0) * w
            c0 = start + r0 * h + j0
            uc0 = np.uint64(c0)
            _chunk_field(M, R, X, fo, ff, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1,
                         j0, w, m, other)
            for comp in range(4):
                for j in range(m):
                    q = uc0 + np.uint64(j)
                    W[comp, j] = re[comp, q]
                    W[4 + comp, j] = im[comp, q]
            for j in range(m):
                ar = W[0, j]; ai = W[4, j]; br = W[1, j]; bi = W[5, j]
                cr = W[2, j]; ci = W[6, j]; dr = W[3, j]; di = W[7, j]
                D[0, j] = (ar * dr - ai * di) - (br * cr - bi * ci)
                D[1, j] = (ar * di + ai * dr) - (br * ci + bi * cr)
            na = 0
            for hit in range(nhits):
                hh = np.uint64(hit)
                for j in range(m):
                    bb = bits(key, (uc0 + np.uint64(j)) * SITE_STRIDE + hh)
                    ix[j] = np.int64(bb & mask)
                    uu[j] = u01_from_bits(bb)
                for j8 in range(0, m, 8):
                    lookup16(tab, ix, T, 10, j8)
                for j in range(m):
                    na += _hit2(W, M, D, T, uu, j, k2r, k2i)
            for comp in range(4):
                for j in range(m):
                    q = uc0 + np.uint64(j)
                    re[comp, q] = W[comp, j]
                    im[comp, q] = W[4 + comp, j]
            acc[ch] = na
    return total(acc)


@njit(cache=True)
def metropolis_u2_update(re, im, rnbr, rpar, h, beta, hdiag, k2r, k2i, special, eps, seed_hash, step, salt,
                         nhits, rows, nblk):
    """One nf = 2 Metropolis update of both colours in one call (keys and proposal tables as
    :func:`u3.metropolis_u3_update`: the table of colour c from ``step_key(seed, step + c, salt)``)."""
    table = np.empty((TABLE_ENTRIES, 2, 2), dtype=np.complex128)
    dets = np.empty(TABLE_ENTRIES, dtype=np.complex128)
    tab = np.empty((10, TABLE_ENTRIES))
    acc = 0
    for colour in range(2):
        key = tables.step_key_nb(seed_hash, step + colour, 0)
        tkey = tables.step_key_nb(seed_hash, step + colour, salt)
        tables.rotation_table(2, special, eps, tkey, table, dets)
        pack_table2(table, dets, tab)
        acc += metropolis_u2(re, im, rnbr, rpar, h, colour, beta, hdiag, k2r, k2i, tab, nhits, key, rows, nblk)
    return acc
