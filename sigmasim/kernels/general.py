"""Update kernels for U(nf) and SU(nf), any nf in 1..8 (numba).

Local action of the site x (everything in S that contains U_x):

    S_x(U) = - Re Tr(A U) - 2 kappa Re(eta det U),
    A = beta * N^dagger + diag(hdiag),  N = sum of the 2 d neighbours,

with ``hdiag[f] = h_f e^{i theta_m}`` and ``eta = e^{i theta_a}``.  Every
kernel updates the sites ``[start, stop)`` of one colour; sites of one colour
do not interact, so the loop is parallel (``prange`` over a fixed number of
site blocks, each with its own scratch matrices).  Random numbers come from
per-site counters (:mod:`sigmasim.rng`), so the result is independent of the
number of threads.

Algorithms
----------
metropolis
    U' = R U with R from a table of ``NT`` matrices near 1 holding R and R^-1
    with equal weight (symmetric proposal), ``nhits`` hits per visit reusing A.
heatbath
    Cabibbo & Marinari, Phys. Lett. B 119 (1982) 387: for every SU(2)
    subgroup (i, j), in an order drawn per colour update (:func:`flavour_order`),
    an exact heatbath of the linear part (Creutz 1980 / Kennedy & Pendleton
    1985, see :func:`group.sample_su2_x0`); the determinant
    is invariant under these steps.  For U(nf) then a U(1) phase U -> e^{i phi}
    U drawn from the von Mises density of the linear part (Best & Fisher 1979)
    and accepted with the Metropolis ratio of the determinant term.  This is
    Metropolis-Hastings with a heatbath proposal, exact for exp(-S).
overrelax
    The microcanonical reflection of the linear part in every SU(2) subgroup,
    in an order drawn per colour update as for the heatbath
    (R = (v^2)^dagger with v the SU(2) direction of the subgroup's local
    field, an involution that keeps Re Tr(A U)) and of the phase (e^{i phi}
    z -> conj(z)), the phase move accepted with the determinant's Metropolis
    ratio.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels.group import det, load, sample_su2_x0, store, von_mises_angle
from sigmasim.kernels.serial import total, zeros_int
from sigmasim.rng import SITE_STRIDE, bits, uniform

__all__ = ["metropolis", "heatbath", "overrelax", "local_field", "rotation_action_change",
           "site_action_change"]

_ONE = np.uint64(1)


@njit(cache=True, inline="always")
def local_field(re, im, nbr, s, nf, beta, hdiag, A):
    """A = beta N^dagger + diag(hdiag) for site ``s`` (written into ``A``)."""
    nn = nbr.shape[0]
    for a in range(nf):
        for b in range(nf):
            c = b * nf + a
            sr = 0.0
            si = 0.0
            for k in range(nn):
                y = nbr[k, s]
                sr += re[c, y]
                si += im[c, y]
            A[a, b] = complex(beta * sr, -beta * si)
        A[a, a] += hdiag[a]


@njit(cache=True, inline="always")
def _matmul(X, Y, nf, out):
    for a in range(nf):
        for b in range(nf):
            s = complex(0.0, 0.0)
            for c in range(nf):
                s += X[a, c] * Y[c, b]
            out[a, b] = s


@njit(cache=True, inline="always")
def _retrace(W, nf):
    s = 0.0
    for a in range(nf):
        s += W[a, a].real
    return s


@njit(cache=True, inline="always")
def _rotate_rows(M, i, j, r00, r01, r10, r11, nf):
    for b in range(nf):
        x = M[i, b]
        y = M[j, b]
        M[i, b] = r00 * x + r01 * y
        M[j, b] = r10 * x + r11 * y


@njit(cache=True, inline="always")
def rotation_action_change(W, trw, R, det_r, d, nf, kappa, eta):
    """S(R U) - S(U) for the site whose W = U A (``trw`` = Re Tr W, ``d`` = det U).

    Returns ``(dS, det(R U))``.  -Re Tr(A R U) = -Re Tr(R W) and det(R U) = det R det U.
    """
    trnew = 0.0
    for a in range(nf):
        for c in range(nf):
            trnew += (R[a, c] * W[c, a]).real
    dnew = det_r * d
    return -(trnew - trw) - 2.0 * kappa * (eta * (dnew - d)).real, dnew


@njit(cache=True)
def site_action_change(re, im, nbr, s, nf, beta, hdiag, kappa, eta, R):
    """S(R U_s) - S(U_s) as the Metropolis kernel computes it (for tests of the local action)."""
    U = np.empty((nf, nf), dtype=np.complex128)
    A = np.empty((nf, nf), dtype=np.complex128)
    W = np.empty((nf, nf), dtype=np.complex128)
    work = np.empty((nf, nf), dtype=np.complex128)
    load(re, im, s, nf, U)
    local_field(re, im, nbr, s, nf, beta, hdiag, A)
    _matmul(U, A, nf, W)
    return rotation_action_change(W, _retrace(W, nf), R, det(R, nf, work), det(U, nf, work), nf,
                                  kappa, eta)[0]


@njit(cache=True, parallel=True)
def metropolis(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta, table, tdet, nhits, key,
               nblocks):
    """Metropolis on sites [start, stop); returns the number of accepted hits."""
    nsite = stop - start
    nt = table.shape[0]
    acc = zeros_int(nblocks)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        U = np.empty((nf, nf), dtype=np.complex128)
        A = np.empty((nf, nf), dtype=np.complex128)
        W = np.empty((nf, nf), dtype=np.complex128)
        T = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        na = 0
        for s in range(lo, hi):
            load(re, im, s, nf, U)
            local_field(re, im, nbr, s, nf, beta, hdiag, A)
            _matmul(U, A, nf, W)
            trw = _retrace(W, nf)
            d = det(U, nf, work)
            n = np.uint64(s) * SITE_STRIDE
            for hit in range(nhits):
                idx = np.int64(bits(key, n) >> np.uint64(40)) % nt
                u = uniform(key, n + _ONE)
                n += np.uint64(2)
                R = table[idx]
                dS, dnew = rotation_action_change(W, trw, R, tdet[idx], d, nf, kappa, eta)
                if dS <= 0.0 or u < np.exp(-dS):
                    _matmul(R, U, nf, T)
                    U[:, :] = T
                    _matmul(R, W, nf, T)
                    W[:, :] = T
                    trw = _retrace(W, nf)
                    d = dnew
                    na += 1
            store(re, im, s, nf, U)
        acc[blk] = na
    return total(acc)


@njit(cache=True, inline="always")
def _su2_direction(W, i, j):
    """SU(2) part of the (i, j) block of W: returns (k, alpha, beta), v = [[a, b], [-b*, a*]]/k."""
    al = 0.5 * (W[i, i] + W[j, j].conjugate())
    be = 0.5 * (W[i, j] - W[j, i].conjugate())
    k = np.sqrt(al.real ** 2 + al.imag ** 2 + be.real ** 2 + be.imag ** 2)
    return k, al, be


ORDER_COUNTER = np.uint64(1 << 63)  # the draw of the subgroup order (no site counter reaches it)


@njit(cache=True, inline="always")
def reflection(al, be, k):
    """The overrelaxation rotation of one SU(2) subgroup: with v = [[al, be], [-be*, al*]] / k the
    subgroup direction, r = (v^dagger)^2 (rows r00 r01 / r10 r11), which maps the local action to
    itself (an involution of the site's matrix)."""
    a_ = al.conjugate() / k
    b_ = -be / k
    c_ = be.conjugate() / k
    d_ = al / k
    return a_ * a_ + b_ * c_, a_ * b_ + b_ * d_, c_ * a_ + d_ * c_, c_ * b_ + d_ * d_


@njit(cache=True)
def flavour_order(key, nf, perm):
    """Fill ``perm`` with the flavour permutation of the colour update with ``key``.

    The SU(2) subgroups are visited in the order (p0, p1), (p0, p2), ..., (p1, p2), ... of this
    permutation, the same for every site of one colour update (so a vectorised kernel does one
    subgroup at a time) and drawn anew for each.  A fixed order (0, 1), (0, 2), (1, 2) treats
    the flavours unequally: with the overrelaxation repeated in the same order, flavour 1
    (first and last pair) decorrelated about twice as slowly as flavours 0 and 2 at equal
    masses.  The order does not depend on the field, so each update stays a mixture of exact
    moves.  Fisher-Yates on the top 53 bits of ``bits(key, ORDER_COUNTER)`` (nf! <= 40320:
    uniform to about 1e-11).
    """
    for a in range(nf):
        perm[a] = a
    r = bits(key, ORDER_COUNTER) >> np.uint64(11)
    for a in range(nf - 1, 0, -1):
        m = np.uint64(a + 1)
        b = np.int64(r % m)
        r = r // m
        t = perm[a]
        perm[a] = perm[b]
        perm[b] = t


@njit(cache=True, inline="always")
def _phase_step(U, W, nf, kappa, eta, d, e, key, n):
    """Propose U -> e U (|e| = 1) and accept with the determinant's Metropolis ratio.

    Returns (accepted, new det).
    """
    en = e ** nf
    dnew = en * d
    dS = -2.0 * kappa * (eta * (dnew - d)).real
    u = uniform(key, n)
    if dS <= 0.0 or u < np.exp(-dS):
        for a in range(nf):
            for b in range(nf):
                U[a, b] *= e
                W[a, b] *= e
        return True, dnew
    return False, d


@njit(cache=True, parallel=True)
def heatbath(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta, special, key, nblocks):
    """Cabibbo-Marinari heatbath (+ phase step for U(nf)); returns accepted phase steps."""
    nsite = stop - start
    acc = zeros_int(nblocks)
    perm = np.empty(nf, dtype=np.int64)
    flavour_order(key, nf, perm)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        U = np.empty((nf, nf), dtype=np.complex128)
        A = np.empty((nf, nf), dtype=np.complex128)
        W = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        na = 0
        for s in range(lo, hi):
            load(re, im, s, nf, U)
            local_field(re, im, nbr, s, nf, beta, hdiag, A)
            _matmul(U, A, nf, W)
            n = np.uint64(s) * SITE_STRIDE
            for pi in range(nf):
                for pj in range(pi + 1, nf):
                    i = perm[pi]
                    j = perm[pj]
                    k, al, be = _su2_direction(W, i, j)
                    if k < 1e-300:
                        continue
                    x0, n = sample_su2_x0(2.0 * k, key, n)
                    c3 = 2.0 * uniform(key, n) - 1.0
                    ph = 2.0 * np.pi * uniform(key, n + _ONE)
                    n += np.uint64(2)
                    rr = np.sqrt(max(0.0, 1.0 - x0 * x0))
                    st = np.sqrt(max(0.0, 1.0 - c3 * c3))
                    x1 = rr * st * np.cos(ph)
                    x2 = rr * st * np.sin(ph)
                    x3 = rr * c3
                    # x = [[x0 + i x3, x2 + i x1], [-x2 + i x1, x0 - i x3]]; r = x v^dagger
                    p = complex(x0, x3)
                    q = complex(x2, x1)
                    a_ = al.conjugate() / k
                    b_ = be / k
                    # v^dagger = [[a*, -b], [b*, a]] / k
                    r00 = p * a_ + q * b_.conjugate()
                    r01 = -p * b_ + q * al / k
                    r10 = -q.conjugate() * a_ + p.conjugate() * b_.conjugate()
                    r11 = q.conjugate() * b_ + p.conjugate() * al / k
                    _rotate_rows(U, i, j, r00, r01, r10, r11, nf)
                    _rotate_rows(W, i, j, r00, r01, r10, r11, nf)
            if not special:
                z = complex(0.0, 0.0)
                for a in range(nf):
                    z += W[a, a]
                kz = abs(z)
                c, sn, n = von_mises_angle(kz, key, n)
                e = complex(c, sn)
                if kz > 1e-300:
                    e = e * z.conjugate() / kz
                d = det(U, nf, work)
                ok, d = _phase_step(U, W, nf, kappa, eta, d, e, key, n)
                n += _ONE
                if ok:
                    na += 1
            store(re, im, s, nf, U)
        acc[blk] = na
    return total(acc)


@njit(cache=True, parallel=True)
def overrelax(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta, special, key, nblocks):
    """SU(2)-subgroup and phase reflections; returns accepted phase reflections."""
    nsite = stop - start
    acc = zeros_int(nblocks)
    perm = np.empty(nf, dtype=np.int64)
    flavour_order(key, nf, perm)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        U = np.empty((nf, nf), dtype=np.complex128)
        A = np.empty((nf, nf), dtype=np.complex128)
        W = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        na = 0
        for s in range(lo, hi):
            load(re, im, s, nf, U)
            local_field(re, im, nbr, s, nf, beta, hdiag, A)
            _matmul(U, A, nf, W)
            for pi in range(nf):
                for pj in range(pi + 1, nf):
                    i = perm[pi]
                    j = perm[pj]
                    k, al, be = _su2_direction(W, i, j)
                    if k < 1e-300:
                        continue
                    r00, r01, r10, r11 = reflection(al, be, k)
                    _rotate_rows(U, i, j, r00, r01, r10, r11, nf)
                    _rotate_rows(W, i, j, r00, r01, r10, r11, nf)
            if not special:
                z = complex(0.0, 0.0)
                for a in range(nf):
                    z += W[a, a]
                kz = abs(z)
                if kz > 1e-300:
                    e = (z.conjugate() / kz) ** 2
                    d = det(U, nf, work)
                    ok, d = _phase_step(U, W, nf, kappa, eta, d, e, key,
                                        np.uint64(s) * SITE_STRIDE)
                    if ok:
                        na += 1
            store(re, im, s, nf, U)
        acc[blk] = na
    return total(acc)
