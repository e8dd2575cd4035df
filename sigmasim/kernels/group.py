"""Small complex-matrix helpers for the kernels (numba, nf x nf, nf <= 8).

Fields are kept as two float64 arrays ``re, im`` of shape ``(nf * nf, V)``:
component ``a * nf + b`` holds ``U[a, b]`` of every site, sites innermost, so a
kernel that walks the sites of one colour reads unit-stride memory.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sigmasim.rng import uniform

__all__ = ["load", "store", "det", "det_lu_in_place", "reunitarize_site", "sample_su2_x0", "von_mises_angle"]


@njit(cache=True, inline="always")
def load(re, im, s, nf, out):
    for a in range(nf):
        for b in range(nf):
            c = a * nf + b
            out[a, b] = complex(re[c, s], im[c, s])


@njit(cache=True, inline="always")
def store(re, im, s, nf, m):
    for a in range(nf):
        for b in range(nf):
            c = a * nf + b
            re[c, s] = m[a, b].real
            im[c, s] = m[a, b].imag


@njit(cache=True)
def det(m, nf, work):
    """Determinant of the complex nf x nf matrix ``m`` (``work`` is scratch of the same shape).

    Closed forms for nf <= 3; LU with partial pivoting above, which stays
    accurate for unitary matrices of any size (common practice, no source).
    """
    if nf == 1:
        return m[0, 0]
    if nf == 2:
        return m[0, 0] * m[1, 1] - m[0, 1] * m[1, 0]
    if nf == 3:
        return (
            m[0, 0] * (m[1, 1] * m[2, 2] - m[1, 2] * m[2, 1])
            - m[0, 1] * (m[1, 0] * m[2, 2] - m[1, 2] * m[2, 0])
            + m[0, 2] * (m[1, 0] * m[2, 1] - m[1, 1] * m[2, 0])
        )
    for a in range(nf):
        for b in range(nf):
            work[a, b] = m[a, b]
    return det_lu_in_place(work, nf)


@njit(cache=True)
def det_lu_in_place(work, nf):
    """Determinant by LU with partial pivoting of the matrix held in ``work``, which it overwrites
    (the nf > 3 branch of :func:`det`, for callers that load their matrix into scratch anyway)."""
    d = complex(1.0, 0.0)
    for k in range(nf):
        p = k
        big = abs(work[k, k])
        for r in range(k + 1, nf):
            v = abs(work[r, k])
            if v > big:
                big = v
                p = r
        if big == 0.0:
            return complex(0.0, 0.0)
        if p != k:
            for b in range(nf):
                t = work[k, b]
                work[k, b] = work[p, b]
                work[p, b] = t
            d = -d
        piv = work[k, k]
        d *= piv
        for r in range(k + 1, nf):
            f = work[r, k] / piv
            for b in range(k + 1, nf):
                work[r, b] -= f * work[k, b]
    return d


@njit(cache=True)
def reunitarize_site(m, nf, special, work):
    """Project ``m`` back onto U(nf) (SU(nf) if ``special``) by Gram-Schmidt on the rows.

    Returns the largest entry of ``|m^dagger m - 1|`` before the projection,
    the measured unitarity drift.
    """
    drift = 0.0
    for a in range(nf):
        for b in range(nf):
            s = complex(0.0, 0.0)
            for c in range(nf):
                s += m[c, a].conjugate() * m[c, b]
            if a == b:
                s -= 1.0
            v = abs(s)
            if v > drift:
                drift = v
    for a in range(nf):
        for p in range(a):
            s = complex(0.0, 0.0)
            for b in range(nf):
                s += m[p, b].conjugate() * m[a, b]
            for b in range(nf):
                m[a, b] -= s * m[p, b]
        n = 0.0
        for b in range(nf):
            n += m[a, b].real ** 2 + m[a, b].imag ** 2
        n = 1.0 / np.sqrt(n)
        for b in range(nf):
            m[a, b] *= n
    if special and nf > 1:
        d = det(m, nf, work)
        ph = np.exp(-1j * np.arctan2(d.imag, d.real) / nf)
        for a in range(nf):
            for b in range(nf):
                m[a, b] *= ph
    return drift


KP_MIN = 3.0  # Kennedy-Pendleton for alpha >= KP_MIN, Creutz below


@njit(cache=True)
def sample_su2_x0(alpha, key, n):
    """Draw x0 in [-1, 1] with density ~ sqrt(1 - x0^2) exp(alpha x0), alpha >= 0.

    For alpha < ``KP_MIN``: M. Creutz, Phys. Rev. D 21 (1980) 2308: x = 1 - x0 from the
    exponential density exp(-alpha x) truncated to (0, 2) (inverse CDF, two counters per
    attempt), accepted with probability sqrt(x (2 - x)); about 1.3 attempts at small alpha and
    1.6 at alpha = 3.  Above: A. D. Kennedy & B. J. Pendleton, Phys. Lett. B 156 (1985) 393
    (four counters per attempt).  The switch point is common practice, no source.
    Returns ``(x0, next counter)``.
    """
    if not (alpha >= 0.0 and alpha < np.inf):
        # a NaN or inf field must reach the finiteness guard, not hang the rejection loop
        return np.nan, n
    if alpha >= KP_MIN:
        while True:
            r1 = uniform(key, n)
            r2 = uniform(key, n + np.uint64(1))
            r3 = uniform(key, n + np.uint64(2))
            r4 = uniform(key, n + np.uint64(3))
            n += np.uint64(4)
            c = np.cos(2.0 * np.pi * r2)
            x = -(np.log(r1) + c * c * np.log(r3)) / alpha
            if r4 * r4 <= 1.0 - 0.5 * x:
                return 1.0 - x, n
    em = -np.expm1(-2.0 * alpha)  # 1 - exp(-2 alpha), the truncated exponential's mass
    while True:
        u1 = uniform(key, n)
        u2 = uniform(key, n + np.uint64(1))
        n += np.uint64(2)
        if alpha > 1e-300:
            x = -np.log1p(-u1 * em) / alpha
        else:
            x = 2.0 * u1
        if u2 * u2 < x * (2.0 - x):
            return 1.0 - x, n


@njit(cache=True)
def von_mises_angle(k, key, n):
    """Draw psi from the von Mises density ~ exp(k cos psi), k >= 0.

    Best & Fisher, J. R. Stat. Soc. C 28 (1979) 152.  Returns
    ``(cos psi, sin psi, next counter)``.
    """
    if not (k >= 0.0 and k < np.inf):
        return np.nan, np.nan, n
    if k < 1e-12:
        u = uniform(key, n)
        return np.cos(2.0 * np.pi * u), np.sin(2.0 * np.pi * u), n + np.uint64(1)
    s4 = np.sqrt(1.0 + 4.0 * k * k)
    tau = 1.0 + s4
    # rho = (tau - sqrt(2 tau)) / (2 k), written without cancellation at small k
    rho = 2.0 * k * tau / ((s4 + 1.0) * (tau + np.sqrt(2.0 * tau)))
    r = (1.0 + rho * rho) / (2.0 * rho)
    while True:
        u1 = uniform(key, n)
        u2 = uniform(key, n + np.uint64(1))
        u3 = uniform(key, n + np.uint64(2))
        n += np.uint64(3)
        z = np.cos(np.pi * u1)
        f = (1.0 + r * z) / (r + z)
        c = k * (r - f)
        if c * (2.0 - c) > u2 or np.log(c / u2) + 1.0 - c >= 0.0:
            sn = np.sqrt(max(0.0, 1.0 - f * f))
            return f, (sn if u3 >= 0.5 else -sn), n
