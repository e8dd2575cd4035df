"""Metropolis proposal tables built in numba from counter-based random numbers.

Each colour update draws ``TABLE_SIZE / 2`` rotations R near 1 and stores them
with their inverses R^dagger, so the proposal is symmetric whatever the rotations
are.  R is the Cayley transform of a Gaussian Hermitian matrix X (Gaussian
unitary ensemble, traceless for SU(nf)):

    R = (1 - i (eps/2) X)^{-1} (1 + i (eps/2) X),

which is exactly unitary (eigenvalue phases 2 atan(eps lambda / 2)) and needs
only a small linear solve instead of an eigendecomposition; rounding is removed
by the Gram-Schmidt projection of :func:`group.reunitarize_site`.  For SU(nf)
the determinant phase is divided out.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sigmasim.kernels.group import det, reunitarize_site
from sigmasim.kernels.simd import philox_uniform
from sigmasim.rng import mix64, uniform

__all__ = ["pack_entry3", "pack_table3_into", "phase_table", "rotation_entry", "rotation_table",
           "step_key_nb"]

_STEP_MUL = np.uint64(0x632BE59BD9B4E019)  # the multiplier of rng.step_key


@njit(cache=True)
def _gauss_pair(key, n):
    # Box-Muller from two counter uniforms
    r = np.sqrt(-2.0 * np.log(uniform(key, n)))
    a = 2.0 * np.pi * uniform(key, n + np.uint64(1))
    return r * np.cos(a), r * np.sin(a)


@njit(cache=True)
def rotation_table(nf, special, eps, key, table, dets):
    """Fill ``table`` (complex128 (16, nf, nf)) and ``dets`` ((16,)) with 8 rotations and inverses."""
    half = table.shape[0] // 2
    x = np.empty((nf, nf), dtype=np.complex128)
    a = np.empty((nf, nf), dtype=np.complex128)
    r = np.empty((nf, nf), dtype=np.complex128)
    work = np.empty((nf, nf), dtype=np.complex128)
    for k in range(half):
        rotation_entry(nf, special, eps, key, k, table, dets, x, a, r, work)


@njit(cache=True)
def rotation_entry(nf, special, eps, key, k, table, dets, x, a, r, work):
    """Entry ``k < half`` of :func:`rotation_table` and its inverse at ``k + half``.

    Entry k draws its Gaussians from the counters ``k nf (nf + 1)`` on (nf (nf + 1) / 2
    pairs per entry), so the entries can be built in any order or in parallel with the
    same bits.  x, a, r, work: (nf, nf) complex scratch.
    """
    half = table.shape[0] // 2
    n = np.uint64(k * nf * (nf + 1))
    sd = 1.0 / np.sqrt(2.0 * nf)  # diagonal N(0, 1/(2 nf)); off-diagonal re, im N(0, 1/(4 nf))
    for i in range(nf):
        g0, g1 = _gauss_pair(key, n)
        n += np.uint64(2)
        x[i, i] = g0 * sd
        for j in range(i + 1, nf):
            g0, g1 = _gauss_pair(key, n)
            n += np.uint64(2)
            z = complex(g0, g1) * (sd / np.sqrt(2.0))
            x[i, j] = z
            x[j, i] = z.conjugate()
    if special:
        tr = 0.0
        for i in range(nf):
            tr += x[i, i].real
        for i in range(nf):
            x[i, i] -= tr / nf
    # solve (1 - i e X) R = (1 + i e X), e = eps / 2, by Gauss-Jordan with partial pivoting
    e = 0.5 * eps
    for i in range(nf):
        for j in range(nf):
            d = 1.0 if i == j else 0.0
            a[i, j] = d - 1j * e * x[i, j]
            r[i, j] = d + 1j * e * x[i, j]
    for col in range(nf):
        p = col
        big = abs(a[col, col])
        for i in range(col + 1, nf):
            if abs(a[i, col]) > big:
                big = abs(a[i, col])
                p = i
        if p != col:
            for j in range(nf):
                t = a[col, j]
                a[col, j] = a[p, j]
                a[p, j] = t
                t = r[col, j]
                r[col, j] = r[p, j]
                r[p, j] = t
        piv = a[col, col]
        for j in range(nf):
            a[col, j] /= piv
            r[col, j] /= piv
        for i in range(nf):
            if i != col:
                f = a[i, col]
                if f != 0:
                    for j in range(nf):
                        a[i, j] -= f * a[col, j]
                        r[i, j] -= f * r[col, j]
    reunitarize_site(r, nf, special, work)
    dr = det(r, nf, work)
    if special:
        dr = complex(1.0, 0.0)
    for i in range(nf):
        for j in range(nf):
            table[k, i, j] = r[i, j]
            table[k + half, i, j] = r[j, i].conjugate()
    dets[k] = dr
    dets[k + half] = dr.conjugate()


@njit(cache=True)
def phase_table(eps, key, size):
    """cos and sin of the U(1) table: ``size / 2`` phases ``eps u`` (u from numpy's Philox
    uniforms in (-1, 1), as ``updates.proposal_table``) followed by their inverses.

    The same numbers as numpy's ``exp(1j * eps * u)`` (cos and sin of the angle, times
    exp(0) = 1), without the Python-level array work; checked bit for bit in the tests.
    """
    half = size // 2
    u = philox_uniform(key, -1.0, 1.0, half)
    tc = np.empty(size)
    ts = np.empty(size)
    for k in range(half):
        a = eps * u[k]
        tc[k] = np.cos(a)
        ts[k] = np.sin(a)
        tc[k + half] = tc[k]
        ts[k + half] = -ts[k]
    return tc, ts


@njit(cache=True, inline="always")
def step_key_nb(seed_hash, step, salt):
    """:func:`sigmasim.rng.step_key` inside numba: ``seed_hash = mix64_int(seed & (2^64 - 1))``.

    uint64 arithmetic wraps modulo 2^64 exactly as the Python version masks, so the keys are
    the same numbers (checked in the tests).
    """
    z = np.uint64(step) * _STEP_MUL + np.uint64(salt)
    return mix64(np.uint64(seed_hash) ^ mix64(z))


@njit(cache=True)
def pack_table3_into(table, dets, out):
    """(16, 3, 3) table and dets -> ``out`` float64 (20, 16): the layout of ``u3.pack_table3``."""
    for k in range(table.shape[0]):
        pack_entry3(table, dets, k, out)


@njit(cache=True, inline="always")
def pack_entry3(table, dets, k, out):
    """Entry k of :func:`pack_table3_into`."""
    for a in range(3):
        for b in range(3):
            out[3 * a + b, k] = table[k, a, b].real
            out[9 + 3 * a + b, k] = table[k, a, b].imag
    out[18, k] = dets[k].real
    out[19, k] = dets[k].imag
