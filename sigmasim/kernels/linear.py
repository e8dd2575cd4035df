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
    every hit is two Metropolis steps: (a) every real component shifted by ``eps * (2u - 1)``
    (symmetric box), accepted with exp(-dS_x) (here P = 2 d kinetic + mu2, m2x = 0); (b) a
    rotation Phi' = R Phi, R = exp(i Y), Y = a0 1 + sum_k a_k sigma_k in a random flavour
    pair (i, j) (nf = 1: the phase e^{i a0} alone), a0, a_k uniform in [-w, w].  R is unitary,
    so Tr Phi^+Phi, Tr (Phi^+Phi)^2 and |det Phi| are unchanged and only the linear terms and
    the det phase change: dS = -Re Tr(B^+ (R - 1) Phi) - Re(c2 det Phi (e^{i nf a0} - 1)).
    Y -> -Y maps R to R^-1 with the same probability, and the width
    w = min(pi, 1 / sqrt(|B| |Phi| + |c2| |det Phi| + 1e-300)) depends only on quantities
    R leaves unchanged (|B| the Frobenius norm of the neighbour/source term), so the proposal
    is symmetric and (b) is exact.  (b) moves the angular modes at large lambda, where the box
    step is pinned to the narrow radial width.  ``nhits`` hits per visit reuse B.  The count
    returned is the accepted box steps (the ones the step tuning targets).
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
from sigmasim.kernels.serial import total, zeros_int
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
    acc = zeros_int(nblocks)
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
            bnorm = 0.0
            for c in range(nc):
                bnorm += br[c] * br[c] + bi[c] * bi[c]
            bnorm = np.sqrt(bnorm)
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
                # (b) rotation Phi -> R Phi (module docstring)
                ds, n = _rotation(pr, pim, qr, qi, br, bi, nf, bnorm, c2r, c2i, key, n, F, work)
                u = uniform(key, n)
                n += _ONE
                if ds <= 0.0 or u < np.exp(-ds):
                    for c in range(nc):
                        pr[c] = qr[c]
                        pim[c] = qi[c]
                    sold += ds
            for c in range(nc):
                re[c, s] = pr[c]
                im[c, s] = pim[c]
        acc[blk] = na
    return total(acc)


@njit(cache=True)
def _rotation(pr, pi, qr, qi, br, bi, nf, bnorm, c2r, c2i, key, n, F, work):
    """Proposal Phi' = R Phi of the rotation step into ``qr, qi``; returns (dS, next counter).

    Uses 5 counters from ``n`` (pair, a0, a1..a3).
    """
    nc = nf * nf
    r2 = 0.0
    for c in range(nc):
        r2 += pr[c] * pr[c] + pi[c] * pi[c]
    dabs = 0.0
    dcur = complex(0.0, 0.0)
    if c2r != 0.0 or c2i != 0.0:
        for a in range(nf):
            for b in range(nf):
                F[a, b] = complex(pr[a * nf + b], pi[a * nf + b])
        dcur = det(F, nf, work)
        dabs = abs(dcur)
    c2abs = np.sqrt(c2r * c2r + c2i * c2i)
    w = 1.0 / np.sqrt(bnorm * np.sqrt(r2) + c2abs * dabs + 1e-300)
    if w > np.pi:
        w = np.pi
    a0 = w * (2.0 * uniform(key, n + _ONE) - 1.0)
    ph = complex(np.cos(a0), np.sin(a0))
    for c in range(nc):
        z = ph * complex(pr[c], pi[c])
        qr[c] = z.real
        qi[c] = z.imag
    if nf >= 2:
        npair = nf * (nf - 1) // 2
        kp = int(uniform(key, n) * npair)
        if kp >= npair:
            kp = npair - 1
        # pair index kp -> (i, j), i < j
        i = 0
        rem = kp
        while rem >= nf - 1 - i:
            rem -= nf - 1 - i
            i += 1
        j = i + 1 + rem
        x1 = w * (2.0 * uniform(key, n + _TWO) - 1.0)
        x2 = w * (2.0 * uniform(key, n + np.uint64(3)) - 1.0)
        x3 = w * (2.0 * uniform(key, n + np.uint64(4)) - 1.0)
        al = np.sqrt(x1 * x1 + x2 * x2 + x3 * x3)
        # exp(i a.sigma) = cos|a| + i sin|a| (a.sigma)/|a| = [[p, q], [-conj(q), conj(p)]]
        cs = np.cos(al)
        sn = np.sin(al) / al if al > 0.0 else 1.0
        p = complex(cs, sn * x3)
        q = complex(sn * x2, sn * x1)  # i (x1 sigma_1 + x2 sigma_2)_{01} = i x1 + x2
        for b in range(nf):
            zi = complex(qr[i * nf + b], qi[i * nf + b])
            zj = complex(qr[j * nf + b], qi[j * nf + b])
            ni = p * zi + q * zj
            nj = -q.conjugate() * zi + p.conjugate() * zj
            qr[i * nf + b] = ni.real
            qi[i * nf + b] = ni.imag
            qr[j * nf + b] = nj.real
            qi[j * nf + b] = nj.imag
    ds = 0.0
    for c in range(nc):
        ds -= br[c] * (qr[c] - pr[c]) + bi[c] * (qi[c] - pi[c])
    if c2r != 0.0 or c2i != 0.0:
        e = complex(np.cos(nf * a0), np.sin(nf * a0)) - 1.0
        dd = dcur * e
        ds -= c2r * dd.real - c2i * dd.imag
    return ds, n + np.uint64(5)


@njit(cache=True, parallel=True)
def heatbath_linear(re, im, nbr, start, stop, nf, kin, prec, m2x, hdiag, lam1, lam2, lams, p, c2r, c2i,
                    key, nblocks):
    """Gaussian independence proposal + accept/reject of V; returns accepted proposals."""
    nsite = stop - start
    nc = nf * nf
    sd = 1.0 / np.sqrt(prec)
    acc = zeros_int(nblocks)
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
    return total(acc)


@njit(cache=True, parallel=True)
def overrelax_linear(re, im, nbr, start, stop, nf, kin, prec, m2x, hdiag, lam1, lam2, lams, p, c2r, c2i,
                     key, nblocks):
    """Reflection Phi -> 2 B/P - Phi + accept/reject of V; returns accepted reflections."""
    nsite = stop - start
    nc = nf * nf
    acc = zeros_int(nblocks)
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
    return total(acc)


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
