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
  run their first attempt for every site as one vector loop (polynomial log, sin and
  cos of :mod:`sigmasim.kernels.simd`), then the rejected sites as a list; each site
  draws from its own counters, so the numbers do not depend on the chunking or the
  thread count.

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
from sigmasim.kernels.group import KP_MIN, det, det_lu_in_place
from sigmasim.kernels.serial import total, zeros_int
from sigmasim.kernels.simd import (avx512_code, exp_le0, load8, log1m, log_pos, lookup16, lookup16_rows, one_minus_exp_neg,
                                   sincos_pm_pi, store8, table_rows, u01_from_bits)
from sigmasim.kernels.u3 import CHUNK_SITES, _chunk_field, _det3, chunk_count, chunk_span
from sigmasim.rng import SITE_STRIDE, bits, uniform

__all__ = ["local_unf", "local_unf_update", "metropolis_u2", "metropolis_u2_update", "pack_table2", "MAX_SUB",
           "SUB_STRIDE"]

MAX_SUB = 28  # subgroups of nf = 8
SUB_STRIDE = np.uint64(1 << 19)  # MAX_SUB + 1 of them fit SITE_STRIDE = 2^24
_ONE = np.uint64(1)
_TWO = np.uint64(2)


# ----------------------------------------------------------------------------- rejection loops
# The x0 draw of the SU(2) heatbath and the von Mises angle of the phase step, as
# :func:`group.sample_su2_x0` and :func:`group.von_mises_angle` (the same algorithms and the
# same counters per attempt), but with the polynomial log, sin and cos of :mod:`simd`, so that
# one attempt is branch-free and vectorises across sites.  The first attempt of every site runs
# as one vector loop; the sites it rejected are compacted into a list, and the next attempt of
# all of them (attempt a of a site uses the counters the a-th pass of the scalar loop would)
# runs as a vector loop over that list, until the list is empty.  A site's numbers therefore
# depend only on its own counters, not on the chunking or the thread count.  The two draws are
# functions of their own (not inlined): one compiled copy serves every caller and the tests.


@njit(cache=True, inline="always", error_model="numpy")
def _x0_attempt(alpha, key, n):
    """One attempt of :func:`group.sample_su2_x0` at counter n: (x0, accepted).  Creutz below
    ``KP_MIN`` (counters n, n + 1), Kennedy-Pendleton above (n .. n + 3); both are evaluated,
    the branch is a select.  alpha > 1e-300."""
    u1 = uniform(key, n)
    u2 = uniform(key, n + _ONE)
    u3 = uniform(key, n + _TWO)
    u4 = uniform(key, n + np.uint64(3))
    ia = 1.0 / alpha
    xc = -log1m(u1 * one_minus_exp_neg(2.0 * alpha)) * ia
    okc = u2 * u2 < xc * (2.0 - xc)
    _, cs = sincos_pm_pi(np.pi * (2.0 * u2 - 1.0))  # -cos(2 pi u2): only its square is used
    xk = -(log_pos(u1) + cs * cs * log_pos(u3)) * ia
    okk = u4 * u4 <= 1.0 - 0.5 * xk
    kp = alpha >= KP_MIN
    return 1.0 - (xk if kp else xc), (okk if kp else okc)


@njit(cache=True, inline="always", error_model="numpy")
def _x0_creutz(alpha, key, n):
    """:func:`_x0_attempt` for alpha < KP_MIN (Creutz's branch alone, the same operations)."""
    u1 = uniform(key, n)
    u2 = uniform(key, n + _ONE)
    xc = -log1m(u1 * one_minus_exp_neg(2.0 * alpha)) * (1.0 / alpha)
    return 1.0 - xc, u2 * u2 < xc * (2.0 - xc)


@njit(cache=True, error_model="numpy")
def _x0_draws(A, X, L, P, Z, OK, key, uc0, base, m):
    """X[s] = x0 for the chunk sites s < m with alpha = A[s] (counters from
    ``(uc0 + s) * SITE_STRIDE + base``); 2.0 where alpha < 2e-300 (no field: r = 1), NaN where
    alpha is not finite.  L, P, Z, OK: scratch of m entries."""
    # first attempts.  Where few sites have alpha >= KP_MIN (at beta = 0.5, 16^3: 0.2-0.4 % of the U(3)
    # sites, 8 % of the U(2) ones) Creutz's attempt for every site in one loop, then Kennedy-Pendleton's
    # for the list of those sites: the same numbers as _x0_attempt's select, without evaluating both
    # branches for every site (U(3) heatbath 1.06-1.09x; with 8 % of the sites on the list 0.97x, so
    # above one site in 16 both branches for all: U(2) heatbath 0.99-1.00x)
    cnt = 0
    for s in range(m):
        a = A[s]
        L[cnt] = s
        cnt += 1 if (a >= KP_MIN and a < np.inf) else 0
    few = cnt * 16 <= m
    for s in range(m):
        a = A[s]
        none = a < 2e-300
        bad = not (a >= 0.0 and a < np.inf)
        aa = 2.0 if (none or bad) else a
        n = (uc0 + np.uint64(s)) * SITE_STRIDE + base
        x0, ok = _x0_creutz(aa, key, n) if few else _x0_attempt(aa, key, n)
        X[s] = 2.0 if none else (np.nan if bad else x0)
        OK[s] = ok or none or bad
    for t in range(cnt if few else 0):
        s = L[t]
        X[s], OK[s] = _x0_attempt(A[s], key, (uc0 + np.uint64(s)) * SITE_STRIDE + base)
    cnt = 0
    for s in range(m):
        L[cnt] = s
        P[cnt] = A[s]
        cnt += 0 if OK[s] else 1
    att = np.uint64(1)
    while cnt > 0:
        for t in range(cnt):
            a = P[t]
            n = (uc0 + np.uint64(L[t])) * SITE_STRIDE + base + (np.uint64(4) if a >= KP_MIN else _TWO) * att
            Z[t], OK[t] = _x0_attempt(a, key, n)
        c2 = 0
        for t in range(cnt):
            s = L[t]
            ok = OK[t]
            X[s] = Z[t] if ok else X[s]
            L[c2] = s
            P[c2] = P[t]
            c2 += 0 if ok else 1
        cnt = c2
        att += _ONE


@njit(cache=True, inline="always", error_model="numpy")
def _vm_attempt(k, key, n):
    """One attempt of :func:`group.von_mises_angle` (Best & Fisher) at counters n .. n + 2 for
    k >= 1e-12: (cos psi, sin psi, accepted)."""
    s4 = np.sqrt(1.0 + 4.0 * k * k)
    tau = 1.0 + s4
    rho = 2.0 * k * tau / ((s4 + 1.0) * (tau + np.sqrt(2.0 * tau)))
    r = (1.0 + rho * rho) / (2.0 * rho)
    u1 = uniform(key, n)
    u2 = uniform(key, n + _ONE)
    u3 = uniform(key, n + _TWO)
    _, z = sincos_pm_pi(np.pi * u1)
    f = (1.0 + r * z) / (r + z)
    c = k * (r - f)
    ok = (c * (2.0 - c) > u2) or (log_pos(c / u2) + 1.0 - c >= 0.0)
    sn = np.sqrt(max(0.0, 1.0 - f * f))
    return f, (sn if u3 >= 0.5 else -sn), ok


@njit(cache=True, error_model="numpy")
def _vm_draws(K, F, G, L, P, Z, Z2, OK, key, uc0, base, m):
    """(F[s], G[s]) = (cos psi, sin psi) of a von Mises angle of concentration K[s] for the chunk
    sites s < m (counters from ``(uc0 + s) * SITE_STRIDE + base``; below k = 1e-12 a uniform
    angle from the first counter, NaN where k is not finite).  L, P, Z, Z2, OK: scratch."""
    for s in range(m):
        k = K[s]
        n = (uc0 + np.uint64(s)) * SITE_STRIDE + base
        tiny = k < 1e-12
        bad = not (k >= 0.0 and k < np.inf)
        f, g, ok = _vm_attempt(1.0 if (tiny or bad) else k, key, n)
        sh, ch = sincos_pm_pi(np.pi * uniform(key, n))  # the uniform angle 2 pi u of k < 1e-12
        F[s] = np.nan if bad else ((ch * ch - sh * sh) if tiny else f)
        G[s] = np.nan if bad else ((2.0 * sh * ch) if tiny else g)
        OK[s] = ok or tiny or bad
    cnt = 0
    for s in range(m):
        L[cnt] = s
        P[cnt] = K[s]
        cnt += 0 if OK[s] else 1
    att = np.uint64(3)
    while cnt > 0:
        for t in range(cnt):
            Z[t], Z2[t], OK[t] = _vm_attempt(P[t], key, (uc0 + np.uint64(L[t])) * SITE_STRIDE + base + att)
        c2 = 0
        for t in range(cnt):
            s = L[t]
            ok = OK[t]
            F[s] = Z[t] if ok else F[s]
            G[s] = Z2[t] if ok else G[s]
            L[c2] = s
            P[c2] = P[t]
            c2 += 0 if ok else 1
        cnt = c2
        att += np.uint64(3)


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


# ----------------------------------------------------------------------------- nf = 2 fast path
# The nf = 2 site update keeps everything of a chunk in one flat scratch array S with rows
# ("slots") of CHUNK_SITES: distinct slots are a compile-time constant distance apart, so LLVM
# sees that the long branch-free loops over the sites carry no dependence and vectorises them
# (with separate 2-d scratch arrays it would need a run-time overlap check for every pair of
# rows and gives up).  Slots: M (re 0..3, im 4..7), U in flavour order (re 8..11, im 12..15),
# the heatbath's W of the subgroup (16..23), direction and x0 (24..29), von Mises angle (30, 31).
S2_M = 0
S2_U = 8
S2_W = 16
S2_V = 24
S2_Q = 30
S2_SLOTS = 32


@njit(cache=True, inline="always")
def _ld(S, slot, us):
    return S[np.uint64(slot * CHUNK_SITES) + us]


@njit(cache=True, inline="always")
def _st(S, slot, us, v):
    S[np.uint64(slot * CHUNK_SITES) + us] = v


@njit(cache=True, inline="always")
def _w2(xr0, xi0, xr1, xi1, mr0, mi0, mr1, mi1):
    """W_ae = sum_c U_ac conj(M_ec) for row x of U and row m of M (nf = 2, the generic kernel's order)."""
    wr = (0.0 + (xr0 * mr0 + xi0 * mi0)) + (xr1 * mr1 + xi1 * mi1)
    wi = (0.0 + (xi0 * mr0 - xr0 * mi0)) + (xi1 * mr1 - xr1 * mi1)
    return wr, wi


@njit(cache=True, inline="always")
def _phase2(er, ei, ur0, ui0, ur1, ui1, ur2, ui2, ur3, ui3, k2r, k2i):
    """-dS of the phase step U -> e U for nf = 2 (det from the rows in flavour order)."""
    e2r = er * er - ei * ei
    e2i = er * ei + ei * er
    dr = (ur0 * ur3 - ui0 * ui3) - (ur1 * ur2 - ui1 * ui2)
    di = (ur0 * ui3 + ui0 * ur3) - (ur1 * ui2 + ui1 * ur2)
    ddr = (e2r * dr - e2i * di) - dr
    ddi = (e2r * di + e2i * dr) - di
    return k2r * ddr - k2i * ddi


@njit(cache=True, inline="always")
def _order_rows(r00, r01, r10, r11, i00, i01, i10, i11, sw):
    """Rows i, j (i = 1 when ``sw``) of a 2x2 matrix given by its entries: (re, im) of row i, then row j."""
    return (r10 if sw else r00, i10 if sw else i00, r11 if sw else r01, i11 if sw else i01,
            r00 if sw else r10, i00 if sw else i10, r01 if sw else r11, i01 if sw else i11)


@njit(cache=True, inline="always")
def _rows_ij(S, base, us, sw):
    """Rows i, j (i = 1 when ``sw``) of the 2x2 matrix in slots base.. (re 0..3, im 4..7)."""
    return _order_rows(_ld(S, base, us), _ld(S, base + 1, us), _ld(S, base + 2, us), _ld(S, base + 3, us),
                       _ld(S, base + 4, us), _ld(S, base + 5, us), _ld(S, base + 6, us), _ld(S, base + 7, us), sw)


@njit(cache=True, inline="always")
def _field_rows_ij(re, im, q, sw):
    """:func:`_rows_ij` of U read from the field at site q."""
    return _order_rows(re[0, q], re[1, q], re[2, q], re[3, q], im[0, q], im[1, q], im[2, q], im[3, q], sw)


@njit(cache=True, inline="always")
def _rot2(r0r, r0i, r1r, r1i, x0r, x0i, x1r, x1i, y0r, y0i, y1r, y1i):
    """Rows x, y -> r (rows x, y), r = [[r0, r1], [-conj r1, conj r0]] (as :func:`_rot_rows`)."""
    n0r = (r0r * x0r - r0i * x0i) + (r1r * y0r - r1i * y0i)
    n0i = (r0r * x0i + r0i * x0r) + (r1r * y0i + r1i * y0r)
    n1r = (r0r * x1r - r0i * x1i) + (r1r * y1r - r1i * y1i)
    n1i = (r0r * x1i + r0i * x1r) + (r1r * y1i + r1i * y1r)
    p0r = (r0r * y0r + r0i * y0i) - (r1r * x0r + r1i * x0i)
    p0i = (r0r * y0i - r0i * y0r) + (r1i * x0r - r1r * x0i)
    p1r = (r0r * y1r + r0i * y1i) - (r1r * x1r + r1i * x1i)
    p1i = (r0r * y1i - r0i * y1r) + (r1i * x1r - r1r * x1i)
    return n0r, n0i, n1r, n1i, p0r, p0i, p1r, p1i


@njit(cache=True, inline="always")
def _trace_rot2(r0r, r0i, r1r, r1i, wiir, wiii, wijr, wiji, wjir, wjii, wjjr, wjji, sw):
    """Tr(r W) from the (i, j) block of W, summed in flavour order as the generic kernel does."""
    tir = (r0r * wiir - r0i * wiii) + (r1r * wjir - r1i * wjii)
    tii = (r0r * wiii + r0i * wiir) + (r1r * wjii + r1i * wjir)
    tjr = (r0r * wjjr + r0i * wjji) - (r1r * wijr + r1i * wiji)
    tji = (r0r * wjji - r0i * wjjr) + (r1i * wijr - r1r * wiji)
    zr = (0.0 + (tjr if sw else tir)) + (tir if sw else tjr)
    zi = (0.0 + (tji if sw else tii)) + (tii if sw else tji)
    return zr, zi


@njit(cache=True, inline="always")
def _store_rows2(S, us, sw, n0r, n0i, n1r, n1i, p0r, p0i, p1r, p1i):
    """Rows i, j back to the U slots in flavour order."""
    _st(S, S2_U, us, p0r if sw else n0r); _st(S, S2_U + 1, us, p1r if sw else n1r)
    _st(S, S2_U + 2, us, n0r if sw else p0r); _st(S, S2_U + 3, us, n1r if sw else p1r)
    _st(S, S2_U + 4, us, p0i if sw else n0i); _st(S, S2_U + 5, us, p1i if sw else n1i)
    _st(S, S2_U + 6, us, n0i if sw else p0i); _st(S, S2_U + 7, us, n1i if sw else p1i)


@njit(cache=True, inline="always", error_model="numpy")
def _or_sites(S, re, im, uc0, m, sw, special, k2r, k2i):
    """The overrelaxation loop of :func:`_chunk_u2`: reflection and rotated rows, and unless
    ``special`` the phase step's proposal and -dS into the V slots.  Called with ``special`` a
    literal, so the loop holds no test of it (with the test inside, LLVM vectorised the slot
    stores under a mask: masked stores, microcoded on AVX2)."""
    for s in range(m):
        us = np.uint64(s)
        x0r, x0i, x1r, x1i, y0r, y0i, y1r, y1i = _field_rows_ij(re, im, uc0 + us, sw)
        a0r, a0i, a1r, a1i, b0r, b0i, b1r, b1i = _rows_ij(S, S2_M, us, sw)
        wiir, wiii = _w2(x0r, x0i, x1r, x1i, a0r, a0i, a1r, a1i)
        wijr, wiji = _w2(x0r, x0i, x1r, x1i, b0r, b0i, b1r, b1i)
        wjir, wjii = _w2(y0r, y0i, y1r, y1i, a0r, a0i, a1r, a1i)
        wjjr, wjji = _w2(y0r, y0i, y1r, y1i, b0r, b0i, b1r, b1i)
        ar = 0.5 * (wiir + wjjr)
        ai = 0.5 * (wiii - wjji)
        br = 0.5 * (wijr - wjir)
        bi = 0.5 * (wiji + wjii)
        k2 = ar * ar + ai * ai + br * br + bi * bi
        tiny = k2 < 1e-300
        f = 0.0 if tiny else (ar + ar) / k2
        r0r = 1.0 if tiny else f * ar - 1.0
        r0i = -f * ai
        r1r = -f * br
        r1i = -f * bi
        n0r, n0i, n1r, n1i, p0r, p0i, p1r, p1i = _rot2(r0r, r0i, r1r, r1i, x0r, x0i, x1r, x1i, y0r, y0i,
                                                       y1r, y1i)
        if not special:
            zr, zi = _trace_rot2(r0r, r0i, r1r, r1i, wiir, wiii, wijr, wiji, wjir, wjii, wjjr, wjji, sw)
            kz = np.sqrt(zr * zr + zi * zi)
            big = kz > 1e-300
            ik = 1.0 / kz if big else 0.0
            cr = zr * ik
            ci = -zi * ik
            er = cr * cr - ci * ci if big else 1.0
            ei = 2.0 * cr * ci if big else 0.0
            mds = _phase2(er, ei, p0r if sw else n0r, p0i if sw else n0i, p1r if sw else n1r,
                          p1i if sw else n1i, n0r if sw else p0r, n0i if sw else p0i, n1r if sw else p1r,
                          n1i if sw else p1i, k2r, k2i)
            _st(S, S2_V, us, er)
            _st(S, S2_V + 1, us, ei)
            _st(S, S2_V + 2, us, mds)
            _st(S, S2_V + 3, us, 1.0 if big else 0.0)
        _store_rows2(S, us, sw, n0r, n0i, n1r, n1i, p0r, p0i, p1r, p1i)


@njit(cache=True, error_model="numpy")
def _chunk_u2(S, re, im, uc0, m, i, hb, special, k2r, k2i, key, phase_base, L, T, OK):
    """The whole site update of one chunk for nf = 2 (the numbers of the generic path).

    ``S``: the slots above, M filled in.  The one subgroup is (i, 1 - i) of the flavour order;
    rows are read in that order by branch-free selects, and the trace and the determinant take
    them back in flavour order, so every sum has the generic kernel's order.  Overrelaxation is
    one vector loop over the sites; the heatbath runs the x0 and von Mises rejection loops
    between its vector loops (:func:`_x0_draws`, :func:`_vm_draws`; L, T, OK their scratch).
    Returns the accepted phase steps.
    """
    sw = i == 1
    na = 0
    for c in range(4 if hb else 0):  # overrelaxation reads U straight from the field
        for s in range(m):
            q = uc0 + np.uint64(s)
            S[(S2_U + c) * CHUNK_SITES + s] = re[c, q]
            S[(S2_U + 4 + c) * CHUNK_SITES + s] = im[c, q]
    if not hb:
        if special:
            _or_sites(S, re, im, uc0, m, sw, True, k2r, k2i)
        else:
            _or_sites(S, re, im, uc0, m, sw, False, k2r, k2i)
        if not special:
            # the phase step's accept test and the phase in a loop of their own: the one loop's
            # chain of dependences (reflection, rotation, trace, square root, division, phase,
            # exp) was too long for the out-of-order window (16^3, AVX-512: 9.7 -> 8.2 ns per site)
            for s in range(m):
                us = np.uint64(s)
                uacc = uniform(key, (uc0 + us) * SITE_STRIDE)
                ok = (uacc < exp_le0(min(_ld(S, S2_V + 2, us), 0.0))) & (_ld(S, S2_V + 3, us) != 0.0)
                na += np.int64(ok)
                fr = _ld(S, S2_V, us) if ok else 1.0
                fi = _ld(S, S2_V + 1, us) if ok else 0.0
                q = uc0 + us
                for c in range(4):
                    xr = _ld(S, S2_U + c, us)
                    xi = _ld(S, S2_U + 4 + c, us)
                    re[c, q] = fr * xr - fi * xi
                    im[c, q] = fr * xi + fi * xr
    else:
        # ---- W and the subgroup direction
        for s in range(m):
            us = np.uint64(s)
            x0r, x0i, x1r, x1i, y0r, y0i, y1r, y1i = _rows_ij(S, S2_U, us, sw)
            a0r, a0i, a1r, a1i, b0r, b0i, b1r, b1i = _rows_ij(S, S2_M, us, sw)
            wiir, wiii = _w2(x0r, x0i, x1r, x1i, a0r, a0i, a1r, a1i)
            wijr, wiji = _w2(x0r, x0i, x1r, x1i, b0r, b0i, b1r, b1i)
            wjir, wjii = _w2(y0r, y0i, y1r, y1i, a0r, a0i, a1r, a1i)
            wjjr, wjji = _w2(y0r, y0i, y1r, y1i, b0r, b0i, b1r, b1i)
            _st(S, S2_W, us, wiir); _st(S, S2_W + 1, us, wiii); _st(S, S2_W + 2, us, wijr)
            _st(S, S2_W + 3, us, wiji); _st(S, S2_W + 4, us, wjir); _st(S, S2_W + 5, us, wjii)
            _st(S, S2_W + 6, us, wjjr); _st(S, S2_W + 7, us, wjji)
            ar = 0.5 * (wiir + wjjr)
            ai = 0.5 * (wiii - wjji)
            br = 0.5 * (wijr - wjir)
            bi = 0.5 * (wiji + wjii)
            k = np.sqrt(ar * ar + ai * ai + br * br + bi * bi)
            ik = 1.0 / k
            _st(S, S2_V, us, ar * ik)
            _st(S, S2_V + 1, us, ai * ik)
            _st(S, S2_V + 2, us, br * ik)
            _st(S, S2_V + 3, us, bi * ik)
            _st(S, S2_V + 4, us, 2.0 * k)
        # ---- x0: every site's first attempt in one vector loop, then the rejected ones
        _x0_draws(S[(S2_V + 4) * CHUNK_SITES:(S2_V + 5) * CHUNK_SITES],
                  S[(S2_V + 5) * CHUNK_SITES:(S2_V + 6) * CHUNK_SITES], L, T[0], T[1], OK, key, uc0, _TWO, m)
        # ---- the point on the sphere, r = X V^dagger, the rotated rows and Tr W
        for s in range(m):
            us = np.uint64(s)
            n = (uc0 + us) * SITE_STRIDE
            u = uniform(key, n)
            v = uniform(key, n + _ONE)
            x0 = _ld(S, S2_V + 5, us)
            one = x0 > 1.5
            x0 = 1.0 if one else x0
            rr2 = max(0.0, 1.0 - x0 * x0)
            rr = np.sqrt(rr2)
            c3 = 2.0 * u - 1.0
            rs = rr * np.sqrt(max(0.0, 1.0 - c3 * c3))
            sp, cp = sincos_pm_pi(np.pi * (2.0 * v - 1.0))
            x1 = rs * cp
            x2 = rs * sp
            x3 = rr * c3
            Ar = 1.0 if one else _ld(S, S2_V, us)
            Ai = 0.0 if one else _ld(S, S2_V + 1, us)
            Br = 0.0 if one else _ld(S, S2_V + 2, us)
            Bi = 0.0 if one else _ld(S, S2_V + 3, us)
            r0r = (x0 * Ar + x3 * Ai) + (x2 * Br + x1 * Bi)
            r0i = (x3 * Ar - x0 * Ai) + (x1 * Br - x2 * Bi)
            r1r = (x2 * Ar - x1 * Ai) + (x3 * Bi - x0 * Br)
            r1i = (x2 * Ai + x1 * Ar) - (x0 * Bi + x3 * Br)
            x0r, x0i, x1r, x1i, y0r, y0i, y1r, y1i = _rows_ij(S, S2_U, us, sw)
            n0r, n0i, n1r, n1i, p0r, p0i, p1r, p1i = _rot2(r0r, r0i, r1r, r1i, x0r, x0i, x1r, x1i, y0r, y0i,
                                                           y1r, y1i)
            _store_rows2(S, us, sw, n0r, n0i, n1r, n1i, p0r, p0i, p1r, p1i)
            zr, zi = _trace_rot2(r0r, r0i, r1r, r1i, _ld(S, S2_W, us), _ld(S, S2_W + 1, us), _ld(S, S2_W + 2, us),
                                 _ld(S, S2_W + 3, us), _ld(S, S2_W + 4, us), _ld(S, S2_W + 5, us),
                                 _ld(S, S2_W + 6, us), _ld(S, S2_W + 7, us), sw)
            _st(S, S2_V, us, zr)
            _st(S, S2_V + 1, us, zi)
            _st(S, S2_V + 2, us, np.sqrt(zr * zr + zi * zi))
        if not special:
            # ---- the von Mises angle: first attempts in one vector loop, then the rejected ones
            F = T[3]
            G = T[4]
            _vm_draws(S[(S2_V + 2) * CHUNK_SITES:(S2_V + 3) * CHUNK_SITES], F, G, L, T[0], T[1], T[2], OK, key, uc0,
                      phase_base + _ONE, m)
            for s in range(m):
                us = np.uint64(s)
                _st(S, S2_Q, us, F[s])
                _st(S, S2_Q + 1, us, G[s])
            # ---- the phase step
            for s in range(m):
                us = np.uint64(s)
                kz = _ld(S, S2_V + 2, us)
                big = kz > 1e-300
                ik = 1.0 / kz if big else 0.0
                cr = _ld(S, S2_V, us) * ik
                ci = -_ld(S, S2_V + 1, us) * ik
                c = _ld(S, S2_Q, us)
                sn = _ld(S, S2_Q + 1, us)
                er = c * cr - sn * ci if big else c
                ei = c * ci + sn * cr if big else sn
                u0r = _ld(S, S2_U, us); u1r = _ld(S, S2_U + 1, us); u2r = _ld(S, S2_U + 2, us)
                u3r = _ld(S, S2_U + 3, us); u0i = _ld(S, S2_U + 4, us); u1i = _ld(S, S2_U + 5, us)
                u2i = _ld(S, S2_U + 6, us); u3i = _ld(S, S2_U + 7, us)
                mds = _phase2(er, ei, u0r, u0i, u1r, u1i, u2r, u2i, u3r, u3i, k2r, k2i)
                uacc = uniform(key, (uc0 + us) * SITE_STRIDE + phase_base)
                ok = uacc < exp_le0(min(mds, 0.0))
                na += np.int64(ok)
                fr = er if ok else 1.0
                fi = ei if ok else 0.0
                _st(S, S2_U, us, fr * u0r - fi * u0i); _st(S, S2_U + 4, us, fr * u0i + fi * u0r)
                _st(S, S2_U + 1, us, fr * u1r - fi * u1i); _st(S, S2_U + 5, us, fr * u1i + fi * u1r)
                _st(S, S2_U + 2, us, fr * u2r - fi * u2i); _st(S, S2_U + 6, us, fr * u2i + fi * u2r)
                _st(S, S2_U + 3, us, fr * u3r - fi * u3i); _st(S, S2_U + 7, us, fr * u3i + fi * u3r)
    for c in range(4 if (hb or special) else 0):  # (the overrelaxation's phase loop stores U itself)
        for s in range(m):
            q = uc0 + np.uint64(s)
            re[c, q] = S[(S2_U + c) * CHUNK_SITES + s]
            im[c, q] = S[(S2_U + 4 + c) * CHUNK_SITES + s]
    return na


@njit(cache=True, parallel=True, error_model="numpy")
def local_unf(re, im, rnbr, rpar, h, colour, nf, beta, hdiag, k2r, k2i, special, hb, key, rows, nblk=0,
              generic=False):
    """One heatbath (``hb``) or overrelaxation update of every site of ``colour``, nf >= 2.

    ``rnbr``, ``rpar``, ``h``: the lattice's row tables; ``hdiag`` complex (nf,);
    ``k2r + i k2i = 2 kappa eta``; ``rows``/``nblk`` as in :func:`u3.metropolis_u3`
    (the numbers depend on neither).  Returns the accepted phase steps (0 for SU(nf)).
    nf = 2 takes :func:`_chunk_u2` (the same numbers) unless ``generic`` (for the tests).
    """
    nc = nf * nf
    half = re.shape[1] // 2
    nrows = rpar.shape[0]
    start = colour * half
    other = (1 - colour) * half
    rows, nseg, nch = chunk_count(nrows, rows, h)  # a chunk must fit the scratch
    perm = np.empty(nf, dtype=np.int64)
    flavour_order(key, nf, perm)
    acc = zeros_int(nch)
    nblk = nch if nblk <= 0 else min(nch, nblk)
    phase_base = np.uint64(MAX_SUB) * SUB_STRIDE
    for blk in prange(nblk):
        S = np.empty(max(2 * nc, S2_SLOTS) * CHUNK_SITES)  # the nf = 2 slots; M its first 2 nc rows
        M = S[: 2 * nc * CHUNK_SITES].reshape((2 * nc, CHUNK_SITES))
        R = np.empty(2 * nc * CHUNK_SITES)  # the slow-direction sums (flat, see _chunk_field)
        U = np.empty((2 * nc, CHUNK_SITES))
        W = np.empty((2 * nc, CHUNK_SITES))
        V = np.empty((6, CHUNK_SITES))  # per-site SU(2) data: A (2), B (2), alpha, x
        Q = np.empty((4, CHUNK_SITES))  # the rotation r0, r1 per site
        fl = np.empty(CHUNK_SITES, dtype=np.int64)  # int64 flags: the select loop vectorises (bool: 1.8x slower)
        work = np.empty((nf, nf), dtype=np.complex128)
        # the rejection loops' list of sites and scratch: separate arrays (LLVM's run-time overlap
        # checks do not cover two rows of one array written in one loop; with them it does not vectorise)
        L = np.empty(CHUNK_SITES, dtype=np.int64)
        OK = np.empty(CHUNK_SITES, dtype=np.bool_)
        T = (np.empty(CHUNK_SITES), np.empty(CHUNK_SITES), np.empty(CHUNK_SITES), np.empty(CHUNK_SITES),
             np.empty(CHUNK_SITES))
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            r0, r1, j0, w = chunk_span(ch, rows, nseg, nrows, h)
            m = (r1 - r0) * w
            c0 = start + r0 * h + j0
            uc0 = np.uint64(c0)
            na = 0
            # ---- neighbour sums -> M = beta N + diag(conj h)
            _chunk_field(S, R, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1, j0, w, m, other)
            if nf == 2 and not generic:
                acc[ch] = _chunk_u2(S, re, im, uc0, m, perm[0], hb, special, k2r, k2i, key, phase_base, L, T, OK)
                continue
            # ---- U and W = U A = U M^dagger
            for comp in range(nc):
                for j in range(m):
                    q = uc0 + np.uint64(j)
                    U[comp, j] = re[comp, q]
                    U[nc + comp, j] = im[comp, q]
            if nf == 3:  # one pass per entry, the sums in locals (the order of the generic loop below)
                for a in range(3):
                    for e in range(3):
                        cw = a * 3 + e
                        for j in range(m):
                            wr = 0.0
                            wi = 0.0
                            for c in range(3):
                                ur = U[a * 3 + c, j]
                                ui = U[9 + a * 3 + c, j]
                                mr = M[e * 3 + c, j]
                                mi = M[9 + e * 3 + c, j]
                                wr += ur * mr + ui * mi
                                wi += ui * mr - ur * mi
                            W[cw, j] = wr
                            W[9 + cw, j] = wi
            for a in range(nf if nf != 3 else 0):
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
                        _x0_draws(V[4], V[5], L, T[0], T[1], OK, key, uc0, gb + _TWO, m)
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
                            sp, cp = sincos_pm_pi(np.pi * (2.0 * v - 1.0))
                            x1 = rs * cp
                            x2 = rs * sp
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
                if nf == 3:  # the loop below with the flavour sum unrolled: a vector loop
                    for s in range(m):
                        zr = ((0.0 + W[0, s]) + W[4, s]) + W[8, s]
                        zi = ((0.0 + W[9, s]) + W[13, s]) + W[17, s]
                        V[0, s] = zr
                        V[1, s] = zi
                        V[2, s] = np.sqrt(zr * zr + zi * zi)
                for s in range(m if nf != 3 else 0):
                    zr = 0.0
                    zi = 0.0
                    for a in range(nf):
                        zr += W[a * nf + a, s]
                        zi += W[nc + a * nf + a, s]
                    V[0, s] = zr
                    V[1, s] = zi
                    V[2, s] = np.sqrt(zr * zr + zi * zi)
                if hb:
                    _vm_draws(V[2], T[3], T[4], L, T[0], T[1], T[2], OK, key, uc0, phase_base + _ONE, m)
                    for s in range(m):
                        Q[0, s] = T[3][s]
                        Q[1, s] = T[4][s]
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
def local_unf_update(re, im, rnbr, rpar, h, nf, beta, hdiag, k2r, k2i, special, hb, seed_hash, step, rows, nblk,
                     generic):
    """One heatbath or overrelaxation update of both colours in one call: colour ``c`` is colour
    update ``step + c`` with key ``step_key(seed, step + c)``.  Returns the accepted phase steps.
    ``generic`` as in :func:`local_unf` (False in runs); an argument from Python, so that
    local_unf is compiled for a plain bool, as when the tests call it (an omitted default or a
    constant False would each be a type of its own and compile the largest kernel twice)."""
    acc = 0
    for colour in range(2):
        key = tables.step_key_nb(seed_hash, step + colour, 0)
        acc += local_unf(re, im, rnbr, rpar, h, colour, nf, beta, hdiag, k2r, k2i, special, hb, key, rows, nblk,
                         generic)
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
def _hit2(W, Wn, M, D, Dn, T, uu, j, k2r, k2i):
    """One Metropolis hit on chunk site j (nf = 2): V = R U, accept test, branch-free select;
    U and det U read from W, D and written to Wn, Dn (see :func:`metropolis_u2`)."""
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
    Wn[0, j] = v0r if ok else u0r
    Wn[1, j] = v1r if ok else u1r
    Wn[2, j] = v2r if ok else u2r
    Wn[3, j] = v3r if ok else u3r
    Wn[4, j] = v0i if ok else u0i
    Wn[5, j] = v1i if ok else u1i
    Wn[6, j] = v2i if ok else u2i
    Wn[7, j] = v3i if ok else u3i
    Dn[0, j] = nr if ok else dr
    Dn[1, j] = ni if ok else di
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
    rows, nseg, nch = chunk_count(nrows, rows, h)  # a chunk must fit the scratch
    acc = zeros_int(nch)
    trows = table_rows(tab)  # the table entry by entry, for the lookups without AVX-512
    nblk = nch if nblk <= 0 else min(nch, nblk)
    for blk in prange(nblk):
        Mf = np.empty(8 * CHUNK_SITES)
        M = Mf.reshape((8, CHUNK_SITES))
        R = np.empty(8 * CHUNK_SITES)
        W = np.empty((8, CHUNK_SITES))
        W2 = np.empty((8, CHUNK_SITES))
        D = np.empty((2, CHUNK_SITES))
        D2 = np.empty((2, CHUNK_SITES))
        avx512 = avx512_code()
        Wn = W if avx512 else W2  # where a hit writes U and det U (the one before reads W, D)
        Dn = D if avx512 else D2
        T = np.empty((12, CHUNK_SITES))  # 10 rows (lookup16_rows writes 12)
        uu = np.empty(CHUNK_SITES)
        ix = np.empty(CHUNK_SITES, dtype=np.int64)
        fl = np.empty(CHUNK_SITES, dtype=np.int64)  # int64 flags: the select loop vectorises (bool: 1.8x slower)
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            r0, r1, j0, w = chunk_span(ch, rows, nseg, nrows, h)
            m = (r1 - r0) * w
            c0 = start + r0 * h + j0
            uc0 = np.uint64(c0)
            _chunk_field(Mf, R, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1, j0, w, m, other)
            load8(W, re, im, c0, m)
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
                    if avx512:
                        lookup16(tab, ix, T, 10, j8)
                    else:
                        lookup16_rows(trows, ix, T, 3, j8)
                # without AVX-512, U and det U go back and forth between (W, D) and (W2, D2): the
                # select written back where its other value was read is a masked store, microcoded
                # on AVX2 (16^3, one thread, same process: AVX2 code 1.28x, AVX-512 code 1.03x; the second
                # buffer with AVX-512 code too: 0.95x)
                if avx512 or hit % 2 == 0:
                    for j in range(m):
                        na += _hit2(W, Wn, M, D, Dn, T, uu, j, k2r, k2i)
                else:
                    for j in range(m):
                        na += _hit2(W2, W, M, D2, D, T, uu, j, k2r, k2i)
            store8(W if avx512 or nhits % 2 == 0 else W2, re, im, c0, m)
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
        tables.rotation_table(np.int64(2), special, eps, tkey, table, dets)  # int64, not a literal: one compile
        pack_table2(table, dets, tab)
        acc += metropolis_u2(re, im, rnbr, rpar, h, colour, beta, hdiag, k2r, k2i, tab, nhits, key, rows, nblk)
    return acc
