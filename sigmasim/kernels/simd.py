"""Helpers that keep numba's site loops vectorisable (no libm call, no branch).

LLVM vectorises a loop over sites only if its body has no call it cannot
widen: ``np.exp`` is a libm call (widened only with Intel's SVML, which
would also make vector lanes and the scalar remainder round differently).
:func:`exp_le0` is a polynomial exp built from IEEE operations alone, so a
site gets the same bits whether it falls in a vector body or a scalar
remainder, on any machine LLVM targets; chains stay independent of the
thread count and the block split.

The random-number draw of one Metropolis hit is split into a table index
(low bits) and a uniform (top 53 bits, as :func:`sigmasim.rng.uniform`), so
one SplitMix64 evaluation serves both (the bit ranges do not overlap).
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

__all__ = ["bits_to_f64", "exp_le0", "u01_from_bits", "is_shift", "LN2_HI", "LN2_LO"]

LN2_HI = 0.6931471803691238  # 0x1.62e42fee00000p-1: n * LN2_HI is exact for |n| < 2^11
LN2_LO = 1.9082149292705877e-10  # 0x1.a39ef35793c76p-33
_INV_LN2 = 1.4426950408889634
_TWO_M53 = 1.1102230246251565e-16


@intrinsic
def bits_to_f64(typingctx, x):
    """Reinterpret the 64 bits of an integer as a float64 (a no-op bit cast)."""
    if not isinstance(x, types.Integer) or x.bitwidth != 64:
        return None

    def codegen(context, builder, sig, args):
        return builder.bitcast(args[0], ir.DoubleType())

    return types.float64(x), codegen


@njit(cache=True, inline="always", error_model="numpy")
def exp_le0(x):
    """exp(x) for x <= 0 (relative error below 5e-16; x < -708 is taken as -708).

    Cody-Waite reduction x = n ln2 + r, |r| <= ln2 / 2, a degree-12 Taylor
    polynomial in Estrin form and 2^n assembled in the exponent bits.  exp(0)
    is exactly 1, so ``u < exp_le0(min(-dS, 0))`` accepts every downhill move.
    Below -708 the result is ~3e-308, far under the smallest uniform (5.5e-17):
    the Metropolis decision is the exact one.
    """
    x = max(x, -708.0)
    n = np.floor(x * _INV_LN2 + 0.5)
    r = x - n * LN2_HI
    r = r - n * LN2_LO
    r2 = r * r
    r4 = r2 * r2
    r8 = r4 * r4
    p0 = 1.0 + r
    p1 = 0.5 + r * (1.0 / 6.0)
    p2 = 1.0 / 24.0 + r * (1.0 / 120.0)
    p3 = 1.0 / 720.0 + r * (1.0 / 5040.0)
    p4 = 1.0 / 40320.0 + r * (1.0 / 362880.0)
    p5 = 1.0 / 3628800.0 + r * (1.0 / 39916800.0)
    p6 = 1.0 / 479001600.0
    q0 = p0 + p1 * r2
    q1 = p2 + p3 * r2
    q2 = p4 + p5 * r2
    p = (q0 + q1 * r4) + (q2 + p6 * r4) * r8
    return p * bits_to_f64((np.int64(n) + np.int64(1023)) << np.int64(52))


@njit(cache=True, inline="always")
def u01_from_bits(b):
    """Uniform double in (0, 1) from the top 53 bits of ``b`` (as :func:`sigmasim.rng.uniform`)."""
    return (np.float64(b >> np.uint64(11)) + 0.5) * _TWO_M53


@njit(cache=True, inline="always")
def is_shift(nbr, k, c0, m, off):
    """True if ``nbr[k, c0 + j] == c0 + off + j`` for j < m (the chunk's neighbours are contiguous).

    In the checkerboard order a chunk of whole rows has contiguous neighbours in
    most directions; the sum then reads plain vector loads instead of gathers
    (the same numbers in the same order, so the result does not change).
    """
    bad = 0
    for j in range(m):
        bad += np.int64(nbr[k, c0 + j] != c0 + off + j)
    return bad == 0
