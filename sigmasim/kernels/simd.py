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
from numba.core import cgutils
from numba.extending import intrinsic

__all__ = ["bits_to_f64", "f64_to_bits", "exp_le0", "log_pos", "log1m", "one_minus_exp_neg", "sincos_pm_pi",
           "u01_from_bits", "is_shift", "load18", "lookup16", "lookup16_generic", "lookup16_rows", "table_rows", "avx512_code", "nsum8", "nsum8x3", "nsum8x4", "store18", "LN2_HI", "LN2_LO"]

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


@intrinsic
def f64_to_bits(typingctx, x):
    """The 64 bits of a float64 as an int64 (a no-op bit cast)."""
    if not isinstance(x, types.Float) or x.bitwidth != 64:
        return None

    def codegen(context, builder, sig, args):
        return builder.bitcast(args[0], ir.IntType(64))

    return types.int64(x), codegen


def _c_arrays(*specs) -> bool:
    """True if every (numba type, ndim, dtype) is a C-contiguous array of that ndim and dtype (the
    intrinsics below type only for those; anything else is no match)."""
    return all(isinstance(a, types.Array) and a.ndim == nd and a.layout == "C" and a.dtype == dt
               for a, nd, dt in specs)


def _has_avx512(context) -> bool:
    # the features the code is compiled for (numba's cache is keyed by them too)
    feats = getattr(context.codegen(), "_tm_features", "") or ""
    return "+avx512f" in feats.split(",")


@intrinsic
def avx512_code(typingctx):
    """True where the code is compiled for AVX-512 (a compile-time constant LLVM folds away).

    Kernels pick their form by it where the two instruction sets differ by much: a site loop
    that writes ``x if ok else y`` back where it read ``y`` is vectorised with masked stores,
    one cheap instruction with AVX-512 and a microcoded one with AVX2 (AMD: tens of cycles),
    so without AVX-512 such loops write to a second buffer; a 16-entry table lookup is one
    two-register permute with AVX-512 (:func:`lookup16`) and a load and transpose of whole
    entries without it (:func:`lookup16_rows`).  Every form gives the same numbers.
    """
    def codegen(context, builder, sig, args):
        return ir.Constant(ir.IntType(1), int(_has_avx512(context)))

    return types.boolean(), codegen


def _make_lookup16(allow_avx512: bool):
    @intrinsic
    def lookup(typingctx, tab, idx, out, ncomp, j):
        """``out[c, j + l] = tab[c, idx[j + l] & 15]`` for ``c < ncomp``, ``l < 8``.

        tab: C-contiguous float64 (>= ncomp, 16); idx: int64 (>= j + 8); out: C-contiguous
        float64 (>= ncomp, >= j + 8).  One permute of a two-register table per component
        and 8 sites (vpermi2pd) where the target has AVX-512, else 8 scalar loads: a
        per-site table lookup that costs about what a vector load does.  The values
        moved are the table's, so both forms give the same bits.
        """
        if not _c_arrays((tab, 2, types.float64), (out, 2, types.float64), (idx, 1, types.int64)):
            return None

        def codegen(context, builder, sig, args):
            tab_v, idx_v, out_v, nc_v, j_v = args
            ta = context.make_array(sig.args[0])(context, builder, tab_v)
            ia = context.make_array(sig.args[1])(context, builder, idx_v)
            oa = context.make_array(sig.args[2])(context, builder, out_v)
            f64 = ir.DoubleType()
            i64 = ir.IntType(64)
            v8d = ir.VectorType(f64, 8)
            v8i = ir.VectorType(i64, 8)
            j = context.cast(builder, j_v, sig.args[4], types.intp)
            nc = context.cast(builder, nc_v, sig.args[3], types.intp)
            iv = builder.load(builder.bitcast(builder.gep(ia.data, [j]), v8i.as_pointer()), align=8)
            iv = builder.and_(iv, ir.Constant(v8i, [15] * 8))
            tw = builder.extract_value(ta.shape, 1)
            ow = builder.extract_value(oa.shape, 1)
            avx = allow_avx512 and _has_avx512(context)
            if avx:
                fnty = ir.FunctionType(v8d, [v8d, v8i, v8d])
                perm = cgutils.get_or_insert_function(builder.module, fnty,
                                                      "llvm.x86.avx512.vpermi2var.pd.512")
            with cgutils.for_range(builder, nc) as loop:
                c = loop.index
                tp = builder.gep(ta.data, [builder.mul(c, tw)])
                op = builder.gep(oa.data, [builder.add(builder.mul(c, ow), j)])
                if avx:
                    lo = builder.load(builder.bitcast(tp, v8d.as_pointer()), align=8)
                    hi = builder.load(builder.bitcast(builder.gep(tp, [ir.Constant(i64, 8)]),
                                                      v8d.as_pointer()), align=8)
                    r = builder.call(perm, [lo, iv, hi])
                else:
                    r = ir.Constant(v8d, None)
                    for lane in range(8):
                        li = ir.Constant(ir.IntType(32), lane)
                        v = builder.load(builder.gep(tp, [builder.extract_element(iv, li)]))
                        r = builder.insert_element(r, v, li)
                builder.store(r, builder.bitcast(op, v8d.as_pointer()), align=8)
            return context.get_dummy_value()

        return types.void(tab, idx, out, ncomp, j), codegen

    return lookup


lookup16 = _make_lookup16(True)
lookup16_generic = _make_lookup16(False)  # the portable form, for tests on any machine


@intrinsic
def lookup16_rows(typingctx, rows, idx, out, nblk, j):
    """``out[c, j + l] = rows[idx[j + l] & 15, c]`` for ``c < 4 nblk``, ``l < 8``: the lookup of
    :func:`lookup16` from the table stored entry by entry (``rows``: C-contiguous float64 (16,
    >= 4 nblk), each entry's components padded to a multiple of 4).

    Per 4 sites and 4 components: one 4-wide load of each site's entry and a 4x4 transpose
    (eight shuffles), instead of 16 scalar loads put together lane by lane: the form for code
    without AVX-512 (no two-register permute there).  Moves the table's values: same bits.
    """
    if not _c_arrays((rows, 2, types.float64), (out, 2, types.float64), (idx, 1, types.int64)):
        return None

    def codegen(context, builder, sig, args):
        ra, ia, oa = (context.make_array(sig.args[k])(context, builder, args[k]) for k in (0, 1, 2))
        i32 = ir.IntType(32)
        i64 = ir.IntType(64)
        v4d = ir.VectorType(ir.DoubleType(), 4)
        j = context.cast(builder, args[4], sig.args[4], types.intp)
        nb = context.cast(builder, args[3], sig.args[3], types.intp)
        rw = builder.extract_value(ra.shape, 1)
        ow = builder.extract_value(oa.shape, 1)

        def shuf(a, b, mask):
            return builder.shuffle_vector(a, b, ir.Constant(ir.VectorType(i32, 4), mask))

        with cgutils.for_range(builder, nb) as loop:
            c0 = builder.mul(loop.index, ir.Constant(i64, 4))
            for half in (0, 4):
                vs = []
                for lane in range(4):
                    pos = builder.add(j, ir.Constant(i64, half + lane))
                    k = builder.and_(builder.load(builder.gep(ia.data, [pos])), ir.Constant(i64, 15))
                    src = builder.gep(ra.data, [builder.add(builder.mul(k, rw), c0)])
                    vs.append(builder.load(builder.bitcast(src, v4d.as_pointer()), align=8))
                t0 = shuf(vs[0], vs[1], [0, 4, 2, 6])
                t1 = shuf(vs[0], vs[1], [1, 5, 3, 7])
                t2 = shuf(vs[2], vs[3], [0, 4, 2, 6])
                t3 = shuf(vs[2], vs[3], [1, 5, 3, 7])
                cols = (shuf(t0, t2, [0, 1, 4, 5]), shuf(t1, t3, [0, 1, 4, 5]),
                        shuf(t0, t2, [2, 3, 6, 7]), shuf(t1, t3, [2, 3, 6, 7]))
                for c in range(4):
                    row = builder.add(c0, ir.Constant(i64, c))
                    dst = builder.gep(oa.data, [builder.add(builder.mul(row, ow),
                                                            builder.add(j, ir.Constant(i64, half)))])
                    builder.store(cols[c], builder.bitcast(dst, v4d.as_pointer()), align=8)
        return context.get_dummy_value()

    return types.void(rows, idx, out, nblk, j), codegen


@njit(cache=True)
def table_rows(tab):
    """``rows[k, c] = tab[c, k]`` (float64 (entries, 4 ceil(components / 4)), zero padded): the
    table of :func:`lookup16_rows`."""
    nc = tab.shape[0]
    w = 4 * ((nc + 3) // 4)
    rows = np.empty((tab.shape[1], w))
    for k in range(tab.shape[1]):
        for c in range(w):
            rows[k, c] = tab[c, k] if c < nc else 0.0
    return rows



def _make_nsum8(K: int):
    @intrinsic
    def nsum(typingctx, M, mo, ms, X, c, offs, nk, fb, jn, jp, o, beta):
        """The neighbour sums of 8 consecutive sites of one row, components c .. c + K - 1, in
        registers: for i < K and l < 8,

            M[mo + i ms + l] = (((0 + X[c + i, offs[0] + l]) + ...) + X[c + i, offs[nk - 1] + l]
                                + plus_l) + minus_l) * beta,

        the slow directions first (``offs[:nk]``: the nk neighbour rows' element offsets of the 8
        sites), then the fastest direction's pair from the 8 entries at ``fb`` of the other
        colour's row and its two wrapped ends ``jn`` (the entry after them) and ``jp`` (the one
        before): ``o`` = 1: plus = the entry after the site, minus = the site's own; ``o`` = 0:
        plus = its own, minus = the one before.  The order of additions of ``u3._chunk_field``,
        so the same bits; one vector load per direction and two lane shifts instead of a select
        per site.  The K components' sums are built side by side (K independent chains of
        additions, one offset load per direction for all of them).  M: flat C-contiguous
        float64; X: C-contiguous float64 (components, sites); offs: int64.
        """
        if not _c_arrays((M, 1, types.float64), (X, 2, types.float64), (offs, 1, types.int64)):
            return None

        def codegen(context, builder, sig, args):
            ma, xa, oa = (context.make_array(sig.args[k])(context, builder, args[k]) for k in (0, 3, 5))
            i32 = ir.IntType(32)
            v8d = ir.VectorType(ir.DoubleType(), 8)

            def ix(k):
                return context.cast(builder, args[k], sig.args[k], types.intp)

            width = builder.extract_value(xa.shape, 1)
            rows = [builder.gep(xa.data, [builder.mul(builder.add(ix(4), ir.Constant(width.type, i)), width)])
                    for i in range(K)]
            accs = [cgutils.alloca_once_value(builder, ir.Constant(v8d, [0.0] * 8)) for _ in range(K)]
            with cgutils.for_range(builder, ix(6)) as loop:
                off = builder.load(builder.gep(oa.data, [loop.index]))
                for i in range(K):
                    v = builder.load(builder.bitcast(builder.gep(rows[i], [off]), v8d.as_pointer()), align=8)
                    builder.store(builder.fadd(builder.load(accs[i]), v), accs[i])
            on = builder.icmp_unsigned("!=", ix(10), ir.Constant(ir.IntType(64), 0))
            bv = context.cast(builder, args[11], sig.args[11], types.float64)
            bvec = builder.insert_element(ir.Constant(v8d, None), bv, ir.Constant(i32, 0))
            bvec = builder.shuffle_vector(bvec, ir.Constant(v8d, None), ir.Constant(ir.VectorType(i32, 8), [0] * 8))
            for i in range(K):
                row = rows[i]
                f = builder.load(builder.bitcast(builder.gep(row, [ix(7)]), v8d.as_pointer()), align=8)
                fn = builder.insert_element(ir.Constant(v8d, None), builder.load(builder.gep(row, [ix(8)])),
                                            ir.Constant(i32, 0))
                fp = builder.insert_element(ir.Constant(v8d, None), builder.load(builder.gep(row, [ix(9)])),
                                            ir.Constant(i32, 7))
                after = builder.shuffle_vector(f, fn, ir.Constant(ir.VectorType(i32, 8), list(range(1, 9))))
                before = builder.shuffle_vector(fp, f, ir.Constant(ir.VectorType(i32, 8), list(range(7, 15))))
                plus = builder.select(on, after, f)
                minus = builder.select(on, f, before)
                r = builder.fmul(builder.fadd(builder.fadd(builder.load(accs[i]), plus), minus), bvec)
                mo = builder.add(ix(1), builder.mul(ir.Constant(width.type, i), ix(2)))
                builder.store(r, builder.bitcast(builder.gep(ma.data, [mo]), v8d.as_pointer()), align=8)
            return context.get_dummy_value()

        return types.void(M, mo, ms, X, c, offs, nk, fb, jn, jp, o, beta), codegen

    return nsum


nsum8 = _make_nsum8(1)
nsum8x3 = _make_nsum8(3)
nsum8x4 = _make_nsum8(4)


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


_MANT = np.int64(0x000FFFFFFFFFFFFF)
_ONE_BITS = np.int64(0x3FF0000000000000)
_EXP_BIAS_BITS = np.int64(0x4330000000000000)  # 2^52: its low mantissa bits hold a small integer
_SQRT2 = 1.4142135623730951


@njit(cache=True, inline="always", error_model="numpy")
def one_minus_exp_neg(y):
    """1 - exp(-y) for y >= 0 without cancellation at small y (relative error below 1e-15, tested
    against numpy): the reduction of :func:`exp_le0`, (e^r - 1) / r as a degree-12 Taylor
    polynomial, then (1 - 2^n) - 2^n (e^r - 1).  y > 708 is taken as 708."""
    x = max(-y, -708.0)
    n = np.floor(x * _INV_LN2 + 0.5)
    r = x - n * LN2_HI
    r = r - n * LN2_LO
    r2 = r * r
    r4 = r2 * r2
    r8 = r4 * r4
    p0 = 1.0 + r * 0.5
    p1 = 1.0 / 6.0 + r * (1.0 / 24.0)
    p2 = 1.0 / 120.0 + r * (1.0 / 720.0)
    p3 = 1.0 / 5040.0 + r * (1.0 / 40320.0)
    p4 = 1.0 / 362880.0 + r * (1.0 / 3628800.0)
    p5 = 1.0 / 39916800.0 + r * (1.0 / 479001600.0)
    p6 = 1.0 / 6227020800.0
    q0 = p0 + p1 * r2
    q1 = p2 + p3 * r2
    q2 = p4 + p5 * r2
    em1 = r * ((q0 + q1 * r4) + (q2 + p6 * r4) * r8)
    sc = bits_to_f64((np.int64(n) + np.int64(1023)) << np.int64(52))
    return (1.0 - sc) - sc * em1


@njit(cache=True, inline="always", error_model="numpy")
def _log_fe(f, e):
    """log(2^e (1 + f)) for f in [sqrt(1/2) - 1, sqrt(2) - 1]: log(1 + f) = 2 atanh(s),
    s = f / (2 + f), |s| <= 0.1716, the odd Taylor series of atanh to s^19 (truncation below
    3e-17 relative); e ln2 in the two parts of :func:`exp_le0`."""
    s = f / (2.0 + f)
    z = s * s
    z2 = z * z
    z4 = z2 * z2
    z8 = z4 * z4
    q0 = 1.0 + z * (1.0 / 3.0)
    q1 = 1.0 / 5.0 + z * (1.0 / 7.0)
    q2 = 1.0 / 9.0 + z * (1.0 / 11.0)
    q3 = 1.0 / 13.0 + z * (1.0 / 15.0)
    q4 = 1.0 / 17.0 + z * (1.0 / 19.0)
    p = ((q0 + q1 * z2) + (q2 + q3 * z2) * z4) + q4 * z8
    return e * LN2_HI + (e * LN2_LO + (s + s) * p)


@njit(cache=True, inline="always", error_model="numpy")
def _split(x):
    """x = 2^e (1 + f) with 1 + f in [sqrt(1/2), sqrt(2)) for a positive normal x: (f, e), f exact,
    e a float (the exponent read from the bits; no int-to-float conversion, which AVX2 lacks)."""
    b = f64_to_bits(x)
    m = bits_to_f64((b & _MANT) | _ONE_BITS)
    big = m > _SQRT2
    m = 0.5 * m if big else m
    ex = bits_to_f64(_EXP_BIAS_BITS | (b >> np.int64(52))) - (4503599627370496.0 + 1023.0)
    return m - 1.0, ex + (1.0 if big else 0.0)


@njit(cache=True, inline="always", error_model="numpy")
def log_pos(x):
    """log(x) for a positive normal float64 x, from IEEE operations alone (vectorisable; relative
    error below 1e-15, tested against numpy).  0 gives -1023 ln2 (not -inf): callers compare
    the result with a bound far above that."""
    f, e = _split(x)
    return _log_fe(f, e)


@njit(cache=True, inline="always", error_model="numpy")
def log1m(y):
    """log(1 - y) for 0 <= y < 1, relative error below 1e-15 also for small y (1 - y = 1 + f with
    f = -y exact when 1 - y lies in [sqrt(1/2), sqrt(2)))."""
    f, e = _split(1.0 - y)
    f = -y if e == 0.0 else f
    return _log_fe(f, e)


@njit(cache=True, inline="always", error_model="numpy")
def sincos_pm_pi(x):
    """(sin x, cos x) for |x| <= pi (absolute error below 1e-15, tested against numpy): Taylor
    series of sin and cos of t = x / 2 to degree 21 and 22 in Estrin form, then the double angle."""
    t = 0.5 * x
    x1 = t * t
    x2 = x1 * x1
    x4 = x2 * x2
    x8 = x4 * x4
    sp0 = 1.0 - x1 * (1.0 / 6.0)
    sp1 = 1.0 / 120.0 - x1 * (1.0 / 5040.0)
    sp2 = 1.0 / 362880.0 - x1 * (1.0 / 39916800.0)
    sp3 = 1.0 / 6227020800.0 - x1 * (1.0 / 1307674368000.0)
    sp4 = 1.0 / 355687428096000.0 - x1 * (1.0 / 121645100408832000.0)
    sp5 = 1.0 / 51090942171709440000.0
    s = t * (((sp0 + sp1 * x2) + (sp2 + sp3 * x2) * x4) + (sp4 + sp5 * x2) * x8)
    cp0 = 1.0 - x1 * 0.5
    cp1 = 1.0 / 24.0 - x1 * (1.0 / 720.0)
    cp2 = 1.0 / 40320.0 - x1 * (1.0 / 3628800.0)
    cp3 = 1.0 / 479001600.0 - x1 * (1.0 / 87178291200.0)
    cp4 = 1.0 / 20922789888000.0 - x1 * (1.0 / 6402373705728000.0)
    cp5 = 1.0 / 2432902008176640000.0 - x1 * (1.0 / 1124000727777607680000.0)
    c = ((cp0 + cp1 * x2) + (cp2 + cp3 * x2) * x4) + (cp4 + cp5 * x2) * x8
    small = x1 < 0.6168502750680849  # |x| < pi / 2: 1 - 2 sin^2 t, else 2 cos^2 t - 1 (no cancellation near +-1)
    return 2.0 * s * c, 1.0 - 2.0 * (s * s) if small else 2.0 * (c * c) - 1.0


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


@njit(cache=True, inline="always")
def load8(W, re, im, first, n):
    """W[0..3, j] = re[0..3, first + j], W[4..7, j] = im[0..3, first + j] for j < n (a 2x2 field
    into chunk scratch)."""
    uf = np.uint64(first)
    for c in range(4):
        for j in range(n):
            q = uf + np.uint64(j)
            W[c, j] = re[c, q]
            W[4 + c, j] = im[c, q]


@njit(cache=True, inline="always")
def store8(W, re, im, first, n):
    """The inverse of :func:`load8`: chunk scratch back into the field."""
    uf = np.uint64(first)
    for c in range(4):
        for j in range(n):
            q = uf + np.uint64(j)
            re[c, q] = W[c, j]
            im[c, q] = W[4 + c, j]


@njit(cache=True, inline="always")
def load18(W, re, im, first, n):
    """W[0..8, j] = re[0..8, first + j], W[9..17, j] = im[0..8, first + j] for j < n (a 3x3 field
    into chunk scratch, six component streams per pass: see ``u3``'s notes on L1 sets)."""
    uf = np.uint64(first)
    for c in range(0, 9, 3):
        for j in range(n):
            q = uf + np.uint64(j)
            W[c, j] = re[c, q]
            W[c + 1, j] = re[c + 1, q]
            W[c + 2, j] = re[c + 2, q]
            W[9 + c, j] = im[c, q]
            W[10 + c, j] = im[c + 1, q]
            W[11 + c, j] = im[c + 2, q]


@njit(cache=True, inline="always")
def store18(W, re, im, first, n):
    """The inverse of :func:`load18`: chunk scratch back into the field."""
    uf = np.uint64(first)
    for c in range(0, 9, 3):
        for j in range(n):
            q = uf + np.uint64(j)
            re[c, q] = W[c, j]
            re[c + 1, q] = W[c + 1, j]
            re[c + 2, q] = W[c + 2, j]
            im[c, q] = W[9 + c, j]
            im[c + 1, q] = W[10 + c, j]
            im[c + 2, q] = W[11 + c, j]


# ----------------------------------------------------------------------------- Philox uniforms
# numpy's ``Generator(Philox(seed)).uniform(lo, hi, n)`` rebuilt draw for draw
# (SeedSequence entropy pool -> Philox4x64-10 key, counter from 0), so that a
# per-step proposal table costs a microsecond instead of numpy's generator
# construction.  Checked bit for bit against numpy in tests/test_rows.py.

_U32 = np.uint64(0xFFFFFFFF)
_INIT_A = np.uint64(0x43B0D7E5)
_MULT_A = np.uint64(0x931E8875)
_INIT_B = np.uint64(0x8B51F9DD)
_MULT_B = np.uint64(0x58F38DED)
_MIX_L = np.uint64(0xCA01F9DD)
_MIX_R = np.uint64(0x4973F715)
_XS = np.uint64(16)
_PM0 = np.uint64(0xD2E7470EE14C6C93)
_PM1 = np.uint64(0xCA5A826395121157)
_PW0 = np.uint64(0x9E3779B97F4A7C15)
_PW1 = np.uint64(0xBB67AE8584CAA73B)
_S32 = np.uint64(32)


@njit(cache=True, inline="always")
def _hashmix(value, hc):
    value = (value ^ hc) & _U32
    hc = (hc * _MULT_A) & _U32
    value = (value * hc) & _U32
    return value ^ (value >> _XS), hc


@njit(cache=True, inline="always")
def _mulhilo(a, b):
    a0 = a & _U32
    a1 = a >> _S32
    b0 = b & _U32
    b1 = b >> _S32
    p00 = a0 * b0
    p01 = a0 * b1
    p10 = a1 * b0
    p11 = a1 * b1
    mid = (p00 >> _S32) + (p01 & _U32) + (p10 & _U32)
    hi = p11 + (p01 >> _S32) + (p10 >> _S32) + (mid >> _S32)
    return hi, a * b


@njit(cache=True)
def philox_uniform(seed, lo, hi, n):
    """``numpy.random.Generator(numpy.random.Philox(seed)).uniform(lo, hi, n)`` for 0 <= seed < 2**64."""
    seed = np.uint64(seed)
    ent = np.zeros(4, dtype=np.uint64)
    ent[0] = seed & _U32
    ent[1] = seed >> _S32
    nent = 2 if ent[1] != 0 else 1
    pool = np.zeros(4, dtype=np.uint64)
    hc = _INIT_A
    for i in range(4):
        v = ent[i] if i < nent else np.uint64(0)
        pool[i], hc = _hashmix(v, hc)
    for i_src in range(4):
        for i_dst in range(4):
            if i_src != i_dst:
                h, hc = _hashmix(pool[i_src], hc)
                r = (_MIX_L * pool[i_dst] - _MIX_R * h) & _U32
                pool[i_dst] = r ^ (r >> _XS)
    words = np.empty(4, dtype=np.uint64)
    hb = _INIT_B
    for i in range(4):
        v = pool[i] ^ hb
        hb = (hb * _MULT_B) & _U32
        v = (v * hb) & _U32
        words[i] = v ^ (v >> _XS)
    k0 = words[0] | (words[1] << _S32)
    k1 = words[2] | (words[3] << _S32)
    out = np.empty(n)
    ctr0 = np.uint64(0)
    i = 0
    while i < n:
        ctr0 += np.uint64(1)  # n < 2**64 draws: no carry into the higher counter words
        x0 = ctr0
        x1 = np.uint64(0)
        x2 = np.uint64(0)
        x3 = np.uint64(0)
        q0 = k0
        q1 = k1
        for rnd in range(10):
            if rnd > 0:
                q0 += _PW0
                q1 += _PW1
            h0, l0 = _mulhilo(_PM0, x0)
            h1, l1 = _mulhilo(_PM1, x2)
            x0, x1, x2, x3 = h1 ^ x1 ^ q0, l1, h0 ^ x3 ^ q1, l0
        for v in (x0, x1, x2, x3):
            if i < n:
                out[i] = lo + (hi - lo) * (np.float64(v >> np.uint64(11)) * (1.0 / 9007199254740992.0))
                i += 1
    return out
