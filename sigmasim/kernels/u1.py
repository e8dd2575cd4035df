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
from sigmasim.rng import SITE_STRIDE, bits, uniform

__all__ = ["metropolis_u1", "heatbath_u1", "overrelax_u1"]

_ONE = np.uint64(1)


@njit(cache=True, inline="always")
def _field(c, s, nbr, x, beta, cr, ci):
    sr = 0.0
    si = 0.0
    for k in range(nbr.shape[0]):
        y = nbr[k, x]
        sr += c[y]
        si += s[y]
    return beta * sr + cr, -beta * si + ci


@njit(cache=True, parallel=True)
def metropolis_u1(c, s, nbr, start, stop, beta, cr, ci, tc, ts, nhits, key):
    """``nhits`` Metropolis hits per site of [start, stop) with rotations (tc, ts) from a table.

    ``cr + i ci`` is the constant part of ``a``; returns accepted hits.
    """
    nt = tc.shape[0]
    acc = 0
    for x in prange(start, stop):
        ar, ai = _field(c, s, nbr, x, beta, cr, ci)
        u_r = c[x]
        u_i = s[x]
        n = np.uint64(x) * SITE_STRIDE
        na = 0
        for hit in range(nhits):
            b = bits(key, n)
            u = uniform(key, n + _ONE)
            n += np.uint64(2)
            idx = np.int64(b >> np.uint64(40)) % nt
            vr = u_r * tc[idx] - u_i * ts[idx]
            vi = u_r * ts[idx] + u_i * tc[idx]
            # -dS = Re(a (V - U))
            mds = ar * (vr - u_r) - ai * (vi - u_i)
            if mds >= 0.0 or u < np.exp(mds):
                u_r = vr
                u_i = vi
                na += 1
        c[x] = u_r
        s[x] = u_i
        acc += na
    return acc


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
