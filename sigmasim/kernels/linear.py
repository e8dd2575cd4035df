"""Update and measurement kernels of the linear sigma model (numba), any nf in 1..8.

Field: general complex nf x nf matrices Phi_x, stored as ``re, im`` of shape
``(nf*nf, V)``, component ``a*nf + b`` is ``Phi[a, b]`` (as for the chiral model).

Local action of the site x (everything in S that contains Phi_x), split as

    S_x(Phi) = P/2 Tr(Phi^+ Phi) - Re Tr(B^+ Phi) + V(Phi),
    B = kinetic * N + diag(conj(hdiag)),    N = sum of the 2 d neighbours,
    V(Phi) = m2x/2 Tr(Phi^+Phi) + lambda1 (Tr Phi^+Phi)^2 + lambda2 Tr((Phi^+Phi)^2)
             + lambda_s (Tr Phi^+Phi)^p - Re(c2 det Phi),   c2 = 2 c e^{i theta_a},

with ``P + m2x = 2 d kinetic + mu2``.  ``Re Tr(B^+ Phi) = sum_ab Re(conj(B_ab) Phi_ab)`` holds
the neighbour coupling and the source ``Re Tr(H Phi) = sum_a Re(hdiag_a Phi_aa)``.  With
``P > 0`` the first two terms are a Gaussian of precision P and mean B/P in every real
component.

Algorithms (all exact for exp(-S); each site owns the counters ``site * SITE_STRIDE + draw``)
----------------------------------------------------------------------------------------------
metropolis
    every real component shifted by ``eps * (2u - 1)`` (symmetric box), ``nhits`` hits per
    visit reusing B, accepted with exp(-dS_x) (here P = 2 d kinetic + mu2, m2x = 0).
heatbath
    independence Metropolis-Hastings: Phi' drawn exactly from the Gaussian (Box-Muller from
    counter uniforms), accepted with exp(-(V(Phi') - V(Phi))) (the Gaussian factors cancel
    against the proposal density; Hastings 1970).
overrelax
    Phi' = 2 B/P - Phi, an involution that keeps the Gaussian part, accepted with
    exp(-(V(Phi') - V(Phi))).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels.group import det
from sigmasim.rng import SITE_STRIDE, uniform

__all__ = ["metropolis_linear", "heatbath_linear", "overrelax_linear", "slice_sums_linear",
           "potential"]

_ONE = np.uint64(1)
_TWO = np.uint64(2)


@njit(cache=True, inline="always")
def _coeffs(re, im, nbr, s, nf, kin, hdiag, br, bi):
    """B = kinetic * N + diag(conj(hdiag)) of site ``s`` into ``br, bi`` (nf*nf,)."""
    nn = nbr.shape[0]
    for c in range(nf * nf):
        sr = 0.0
        si = 0.0
        for k in range(nn):
            y = nbr[k, s]
            sr += re[c, y]
            si += im[c, y]
        br[c] = kin * sr
        bi[c] = kin * si
    for a in range(nf):
        c = a * nf + a
        br[c] += hdiag[a].real
        bi[c] -= hdiag[a].imag


@njit(cache=True)
def potential(pr, pi, nf, m2x, lam1, lam2, lams, p, c2r, c2i, F, work):
    """V(Phi) of the module docstring for one site, Phi given as ``pr, pi`` (nf*nf,).

    ``F`` and ``work`` are complex scratch (nf, nf).
    """
    r2 = 0.0
    for c in range(nf * nf):
        r2 += pr[c] * pr[c] + pi[c] * pi[c]
    v = 0.5 * m2x * r2 + lam1 * r2 * r2
    if lams != 0.0:
        v += lams * r2 ** p
    if lam2 != 0.0:
        # Tr((Phi^+Phi)^2) = sum_ab |M_ab|^2, M = Phi^+ Phi
        q = 0.0
        for a in range(nf):
            for b in range(nf):
                mr = 0.0
                mi = 0.0
                for k in range(nf):
                    xr = pr[k * nf + a]
                    xi = -pi[k * nf + a]
                    yr = pr[k * nf + b]
                    yi = pi[k * nf + b]
                    mr += xr * yr - xi * yi
                    mi += xr * yi + xi * yr
                q += mr * mr + mi * mi
        v += lam2 * q
    if c2r != 0.0 or c2i != 0.0:
        for a in range(nf):
            for b in range(nf):
                F[a, b] = complex(pr[a * nf + b], pi[a * nf + b])
        d = det(F, nf, work)
        v -= c2r * d.real - c2i * d.imag
    return v


@njit(cache=True, inline="always")
def _gauss_part(pr, pi, br, bi, nc, prec):
    g = 0.0
    for c in range(nc):
        g += 0.5 * prec * (pr[c] * pr[c] + pi[c] * pi[c]) - br[c] * pr[c] - bi[c] * pi[c]
    return g


@njit(cache=True, parallel=True)
def metropolis_linear(re, im, nbr, start, stop, nf, kin, prec, hdiag, lam1, lam2, lams, p, c2r, c2i,
                      eps, nhits, key, nblocks):
    """Box Metropolis on sites [start, stop) (prec = 2 d kinetic + mu2); returns accepted hits."""
    nsite = stop - start
    nc = nf * nf
    acc = np.zeros(nblocks, dtype=np.int64)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        br = np.empty(nc)
        bi = np.empty(nc)
        pr = np.empty(nc)
        pim = np.empty(nc)
        qr = np.empty(nc)
        qi = np.empty(nc)
        F = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        na = 0
        for s in range(lo, hi):
            _coeffs(re, im, nbr, s, nf, kin, hdiag, br, bi)
            for c in range(nc):
                pr[c] = re[c, s]
                pim[c] = im[c, s]
            sold = _gauss_part(pr, pim, br, bi, nc, prec) + potential(
                pr, pim, nf, 0.0, lam1, lam2, lams, p, c2r, c2i, F, work)
            n = np.uint64(s) * SITE_STRIDE
            for hit in range(nhits):
                for c in range(nc):
                    qr[c] = pr[c] + eps * (2.0 * uniform(key, n) - 1.0)
                    qi[c] = pim[c] + eps * (2.0 * uniform(key, n + _ONE) - 1.0)
                    n += _TWO
                u = uniform(key, n)
                n += _ONE
                snew = _gauss_part(qr, qi, br, bi, nc, prec) + potential(
                    qr, qi, nf, 0.0, lam1, lam2, lams, p, c2r, c2i, F, work)
                ds = snew - sold
                if ds <= 0.0 or u < np.exp(-ds):
                    for c in range(nc):
                        pr[c] = qr[c]
                        pim[c] = qi[c]
                    sold = snew
                    na += 1
            for c in range(nc):
                re[c, s] = pr[c]
                im[c, s] = pim[c]
        acc[blk] = na
    return acc.sum()


@njit(cache=True, parallel=True)
def heatbath_linear(re, im, nbr, start, stop, nf, kin, prec, m2x, hdiag, lam1, lam2, lams, p, c2r, c2i,
                    key, nblocks):
    """Gaussian independence proposal + accept/reject of V; returns accepted proposals."""
    nsite = stop - start
    nc = nf * nf
    sd = 1.0 / np.sqrt(prec)
    acc = np.zeros(nblocks, dtype=np.int64)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        br = np.empty(nc)
        bi = np.empty(nc)
        pr = np.empty(nc)
        pim = np.empty(nc)
        qr = np.empty(nc)
        qi = np.empty(nc)
        F = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        na = 0
        for s in range(lo, hi):
            _coeffs(re, im, nbr, s, nf, kin, hdiag, br, bi)
            n = np.uint64(s) * SITE_STRIDE
            for c in range(nc):
                pr[c] = re[c, s]
                pim[c] = im[c, s]
                # Box-Muller: two independent standard normals from two uniforms
                rad = np.sqrt(-2.0 * np.log(uniform(key, n)))
                ang = 2.0 * np.pi * uniform(key, n + _ONE)
                n += _TWO
                qr[c] = br[c] / prec + sd * rad * np.cos(ang)
                qi[c] = bi[c] / prec + sd * rad * np.sin(ang)
            u = uniform(key, n)
            dv = potential(qr, qi, nf, m2x, lam1, lam2, lams, p, c2r, c2i, F, work) - potential(
                pr, pim, nf, m2x, lam1, lam2, lams, p, c2r, c2i, F, work)
            if dv <= 0.0 or u < np.exp(-dv):
                for c in range(nc):
                    re[c, s] = qr[c]
                    im[c, s] = qi[c]
                na += 1
        acc[blk] = na
    return acc.sum()


@njit(cache=True, parallel=True)
def overrelax_linear(re, im, nbr, start, stop, nf, kin, prec, m2x, hdiag, lam1, lam2, lams, p, c2r, c2i,
                     key, nblocks):
    """Reflection Phi -> 2 B/P - Phi + accept/reject of V; returns accepted reflections."""
    nsite = stop - start
    nc = nf * nf
    acc = np.zeros(nblocks, dtype=np.int64)
    for blk in prange(nblocks):
        lo = start + blk * nsite // nblocks
        hi = start + (blk + 1) * nsite // nblocks
        br = np.empty(nc)
        bi = np.empty(nc)
        pr = np.empty(nc)
        pim = np.empty(nc)
        qr = np.empty(nc)
        qi = np.empty(nc)
        F = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        na = 0
        for s in range(lo, hi):
            _coeffs(re, im, nbr, s, nf, kin, hdiag, br, bi)
            for c in range(nc):
                pr[c] = re[c, s]
                pim[c] = im[c, s]
                qr[c] = 2.0 * br[c] / prec - pr[c]
                qi[c] = 2.0 * bi[c] / prec - pim[c]
            u = uniform(key, np.uint64(s) * SITE_STRIDE)
            dv = potential(qr, qi, nf, m2x, lam1, lam2, lams, p, c2r, c2i, F, work) - potential(
                pr, pim, nf, m2x, lam1, lam2, lams, p, c2r, c2i, F, work)
            if dv <= 0.0 or u < np.exp(-dv):
                for c in range(nc):
                    re[c, s] = qr[c]
                    im[c, s] = qi[c]
                na += 1
        acc[blk] = na
    return acc.sum()


@njit(cache=True, parallel=True)
def slice_sums_linear(re, im, nbr, slice_sites, nf, hdiag, p, kin, phi2, quart1, quart2, stab, mass,
                      umat, dets):
    """Per-time-slice sums of one configuration of the linear model.

    Fills (all float64 (T,) unless said): ``kin`` sum_{x in t, mu} Tr|Phi_{x+mu} - Phi_x|^2,
    ``phi2`` sum Tr(Phi^+Phi), ``quart1`` sum (Tr Phi^+Phi)^2, ``quart2`` sum Tr((Phi^+Phi)^2),
    ``stab`` sum (Tr Phi^+Phi)^p, ``mass`` sum Re Tr(H Phi), ``umat`` complex (T, nf*nf) sum Phi,
    ``dets`` complex (T,) sum det Phi.  Each slice is summed serially in site order.
    """
    nt = slice_sites.shape[0]
    ns = slice_sites.shape[1]
    nd = nbr.shape[0] // 2
    nc = nf * nf
    for t in prange(nt):
        F = np.empty((nf, nf), dtype=np.complex128)
        work = np.empty((nf, nf), dtype=np.complex128)
        lk = 0.0
        r2s = 0.0
        q1 = 0.0
        q2 = 0.0
        sb = 0.0
        ms = 0.0
        dsum = complex(0.0, 0.0)
        for c in range(nc):
            umat[t, c] = 0.0
        for i in range(ns):
            x = slice_sites[t, i]
            for mu in range(nd):
                y = nbr[2 * mu, x]
                for c in range(nc):
                    dr = re[c, y] - re[c, x]
                    di = im[c, y] - im[c, x]
                    lk += dr * dr + di * di
            r2 = 0.0
            for c in range(nc):
                umat[t, c] += complex(re[c, x], im[c, x])
                r2 += re[c, x] * re[c, x] + im[c, x] * im[c, x]
            r2s += r2
            q1 += r2 * r2
            sb += r2 ** p
            for a in range(nf):
                cc = a * nf + a
                ms += (hdiag[a] * complex(re[cc, x], im[cc, x])).real
            for a in range(nf):
                for b in range(nf):
                    F[a, b] = complex(re[a * nf + b, x], im[a * nf + b, x])
            for a in range(nf):
                for b in range(nf):
                    m = complex(0.0, 0.0)
                    for k in range(nf):
                        m += F[k, a].conjugate() * F[k, b]
                    q2 += m.real * m.real + m.imag * m.imag
            dsum += det(F, nf, work)
        kin[t] = lk
        phi2[t] = r2s
        quart1[t] = q1
        quart2[t] = q2
        stab[t] = sb
        mass[t] = ms
        dets[t] = dsum
