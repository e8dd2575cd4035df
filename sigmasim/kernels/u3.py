"""Metropolis specialised to nf = 3 (U(3) and SU(3)), vectorised across sites.

Same algorithm and local action as :func:`sigmasim.kernels.general.metropolis`:
U' = R U with R from a symmetric table, ``nhits`` hits per visit reusing the
local field, weight exp(-S_x) with

    -dS = Re Tr(A (U' - U)) + 2 kappa Re(eta (det U' - det U)),  det U' = det R det U.

Re Tr(A V) = sum_{ab} (M_r V_r + M_i V_i)[a, b] with M = A^dagger = beta N +
diag(conj h), so the field enters as the 18 real components of M.

Layout of the work: the rows of one colour (sites with equal coordinates
but the fastest, see :class:`sigmasim.lattice.Lattice`) are cut into chunks
of whole rows, or of row segments for rows longer than ``CHUNK_SITES`` (the
parallel unit; fixed by the geometry, not the thread count).  U, M and det U
of a chunk live in chunk scratch (structure of arrays, sites innermost, of
the compile-time width ``CHUNK_SITES``).  Every loop over a chunk is branch
free and call free, the 3x3 complex arithmetic fully unrolled in scalar
locals, so LLVM vectorises it across sites:

- where rows are whole 8-site vectors (fastest extent a multiple of 16), the
  neighbour sum of 8 sites and one component is one :func:`simd.nsum8`: a
  vector load per direction, the fastest direction's pair by lane shifts;
- else the sums in the slow directions are contiguous runs of rows
  (:func:`_chunk_field`: one loop per run, component and two directions), and
  the fastest direction is one pass per component over the chunk that
  selects, per site, the neighbour at j, j - 1 or j + 1 (or the wrapped end
  of the row), read from the field itself;
- the neighbours are added in the order of ``lattice.neighbours``, so every
  sum has the bits of the site-by-site one;
- field arrays are indexed with unsigned integers, whose addresses numba
  computes without the negative-index fix-up, so they stay affine;
- the table lookups of a hit are 8-site permutes (:func:`simd.lookup16`)
  into scratch, which the update loop then reads like any other array.

Hit ``h`` of site ``x`` uses the single draw ``bits(key, x * SITE_STRIDE + h)``:
the low 4 bits pick the table entry, the top 53 bits are the accept uniform.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from sigmasim.kernels import tables
from sigmasim.kernels.serial import total, zeros_int
from sigmasim.kernels.simd import (avx512_code, exp_le0, load18, lookup16, lookup16_rows, nsum8, nsum8x3, nsum8x4,
                                   store18, table_rows, u01_from_bits)
from sigmasim.rng import SITE_STRIDE, bits

__all__ = ["metropolis_u3", "metropolis_u3_update", "pack_table3", "rotation_tables3", "rows_per_chunk3"]

CHUNK_SITES = 128  # target sites per chunk and the scratch width (a multiple of 8)
TABLE_ENTRIES = 16  # the kernel looks up 16-entry tables (4 bits of the draw)


def pack_table3(table: np.ndarray, tdet: np.ndarray) -> np.ndarray:
    """(NT, 3, 3) complex table and its dets -> float64 (20, NT): re R[a,b] at 3a+b, im at 9+3a+b, det at 18, 19."""
    nt = table.shape[0]
    out = np.empty((20, nt))
    flat = table.reshape(nt, 9).T
    out[:9] = flat.real
    out[9:18] = flat.imag
    out[18] = tdet.real
    out[19] = tdet.imag
    return out


def rows_per_chunk3(h: int, target: int = CHUNK_SITES) -> int:
    """Rows per chunk (0: a row is longer than a chunk and is cut into segments)."""
    return target // max(1, h)


@njit(cache=True, inline="always")
def chunk_count(nrows, rows, h):
    """(rows per chunk, segments per row, chunks) for ``nrows`` rows of ``h`` sites: ``rows`` capped so
    that a chunk fits CHUNK_SITES; 0 rows means rows longer than a chunk, cut into segments."""
    rows = min(rows, CHUNK_SITES // h)
    if rows > 0:
        return rows, 1, (nrows + rows - 1) // rows
    nseg = (h + CHUNK_SITES - 1) // CHUNK_SITES
    return rows, nseg, nrows * nseg


@njit(cache=True, inline="always")
def chunk_span(ch, rows, nseg, nrows, h):
    """Rows r0..r1 and sites j0..j0 + w of each row that chunk ``ch`` covers: ``rows`` whole rows per
    chunk, or (``rows`` = 0) rows longer than a chunk cut into ``nseg`` segments of CHUNK_SITES."""
    if rows > 0:
        r0 = ch * rows
        return r0, min(nrows, r0 + rows), 0, h
    r0 = ch // nseg
    j0 = (ch % nseg) * CHUNK_SITES
    return r0, r0 + 1, j0, min(CHUNK_SITES, h - j0)


# ----------------------------------------------------------------------------- neighbour sums
# M = beta N + diag(conj hdiag) of a chunk, N the sum of the neighbours in the order of
# ``lattice.neighbours`` (the slow directions, then + and - of the fastest), so every sum has the
# bits of the site-by-site one (tests/test_neighbour_sums.py).  Rows of whole 8-site vectors take
# :func:`simd.nsum8` (below in _chunk_field); for other row lengths the chunk's rows are cut where any slow direction's neighbour
# rows stop being consecutive (one to three runs of rows; on a run every neighbour is affine in
# the site).  Per run and component (re and im together) one loop adds two slow directions into
# R; then per component one loop over the chunk adds the fastest direction's pair, read from the
# field itself (no scratch copy), and stores M = R * beta; the few sites whose candidates would
# lie outside the field are done one by one, and the diagonal mass terms are added last.
# 16^3, nf = 2 / 3, AVX-512, one thread, same process: 12.3 -> 9.1 / 29 -> 21 ns per site against
# one loop per direction and component plus a scratch copy and a select pass per component.
# Tried and not kept: loops over two to four components at once (slower, 1.1-1.7x), adding the
# last two slow directions in the fastest direction's pass (1.15x slower), four slow directions
# per loop (4 % faster), re and im in separate passes (no gain).
#
# R is flat, the real and imaginary part of component c in slots 2 c and 2 c + 1 of CHUNK_SITES:
# slots a compile-time distance apart, so LLVM's run-time overlap checks stay few.


@njit(cache=True, inline="always")
def _sum2(R, re, im, c, dst, n, s0, s1, first):
    """R = (R + a) + b for component c, chunk sites dst..dst+n-1 (``first``: (0 + a) + b), a and
    b the field at s0 + i and s1 + i."""
    ud = np.uint64(dst)
    u0 = np.uint64(s0)
    u1 = np.uint64(s1)
    pr0 = np.uint64(2 * c * CHUNK_SITES) + ud
    pi0 = pr0 + np.uint64(CHUNK_SITES)
    for i in range(n):
        ui = np.uint64(i)
        vr = 0.0 if first else R[pr0 + ui]
        vi = 0.0 if first else R[pi0 + ui]
        R[pr0 + ui] = (vr + re[c, u0 + ui]) + re[c, u1 + ui]
        R[pi0 + ui] = (vi + im[c, u0 + ui]) + im[c, u1 + ui]


@njit(cache=True, inline="always")
def _fast1(x, k, uh, o, wl, wf):
    """The fastest direction's (plus, minus) of one site of a chunk of whole rows, from field
    row x at k (the site's other-colour partner): plus at j + 1 and minus at j (o) or plus at j
    and minus at j - 1, wrapping at the row's ends (wl: j = h - 1, wf: j = 0).  Every candidate
    is loaded and then selected (a conditional load would not vectorise)."""
    xc = x[k]
    xpw = x[k + np.uint64(1) - uh]
    xp = x[k + np.uint64(1)]
    xmw = x[k - np.uint64(1) + uh]
    xm = x[k - np.uint64(1)]
    xp = xpw if wl else xp
    xm = xmw if wf else xm
    return (xp if o else xc), (xc if o else xm)


@njit(cache=True, inline="always")
def _fast_pass(M, R, re, im, nc, c, src, i0, i1, uh, fl, beta):
    """M = ((R + plus) + minus) * beta for component c and chunk sites i0..i1-1, the fastest
    direction as :func:`_fast1` (src: the chunk's first other-colour site; fl: per site 1 for
    the offset o, + 2 at j = h - 1 and + 4 at j = 0 where the row wraps)."""
    us = np.uint64(src)
    pr0 = np.uint64(2 * c * CHUNK_SITES)
    pi0 = pr0 + np.uint64(CHUNK_SITES)
    mr0 = np.uint64(c * CHUNK_SITES)
    mi0 = np.uint64((nc + c) * CHUNK_SITES)
    xr = re[c]
    xi = im[c]
    for i in range(i0, i1):
        ui = np.uint64(i)
        k = us + ui
        f = fl[ui]
        o = (f & 1) != 0
        wl = (f & 2) != 0
        wf = (f & 4) != 0
        p, q = _fast1(xr, k, uh, o, wl, wf)
        M[mr0 + ui] = ((R[pr0 + ui] + p) + q) * beta
        p, q = _fast1(xi, k, uh, o, wl, wf)
        M[mi0 + ui] = ((R[pi0 + ui] + p) + q) * beta


@njit(cache=True, inline="always")
def _fast_site(M, R, re, im, rs, nf, i, j, h, o, beta):
    """Every component of M at chunk site i (site j of its row; rs: the other colour's row) from
    the complete slow-direction sums in R: ((R + plus) + minus) * beta (scalar: the sites at the
    ends of the field and of long rows)."""
    nc = nf * nf
    jp = j + 1 if o else j
    jm = j if o else j - 1
    if jp == h:
        jp = 0
    if jm < 0:
        jm = h - 1
    up = np.uint64(rs + jp)
    um = np.uint64(rs + jm)
    ui = np.uint64(i)
    for cc in range(nc):
        pr = np.uint64(2 * cc * CHUNK_SITES) + ui
        M[np.uint64(cc * CHUNK_SITES) + ui] = ((R[pr] + re[cc, up]) + re[cc, um]) * beta
        M[np.uint64((nc + cc) * CHUNK_SITES) + ui] = ((R[pr + np.uint64(CHUNK_SITES)] + im[cc, up])
                                                      + im[cc, um]) * beta


@njit(cache=True, inline="always")
def _chunk_field(M, R, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1, j0, w, m, other):
    """M = beta N + diag(conj hdiag) of the chunk's sites (rows r0..r1, sites j0..j0+w of each):
    flat, slot a nf + b (real) and nf^2 + a nf + b (imaginary) of CHUNK_SITES sites each.
    R (flat, 2 nf^2 slots) and fl (int64, CHUNK_SITES): scratch."""
    nc = nf * nf
    nk = rnbr.shape[0]
    if h % 8 == 0:
        # rows of whole 8-site vectors: per row, 8 sites and component one :func:`simd.nsum8`
        # (every neighbour one vector load, the fastest direction's pair two lane shifts, no
        # select per site): 16^3, AVX-512, one thread, same process, nf = 2 / 3: 9.9 -> 5.0 /
        # 20 -> 12.9 ns per site.  Components outer (each component's rows in turn): 1.3-1.7x
        # slower; the row ends by selects, not by % h (an integer division per call: 1.5x slower).
        # Four (nf = 2) or three (nf = 3) components per call, their chains of additions side by
        # side and one offset load per direction for all: 1.08-1.11x / 1.04-1.10x (same process).
        nv = w // 8
        for g in range(r0, r1):
            o = (colour + rpar[g]) % 2
            rs = other + g * h
            for t in range(nv):
                jv = j0 + 8 * t
                for k in range(nk):
                    fl[k] = other + rnbr[k, g] * h + jv  # fl: the neighbour rows' offsets of the 8 sites
                jn = rs + jv + 8 if jv + 8 < h else rs  # the row's entries after and before the 8
                jp = rs + jv - 1 if jv > 0 else rs + h - 1
                dst = (g - r0) * w + 8 * t
                if nc == 4:
                    nsum8x4(M, dst, CHUNK_SITES, re, 0, fl, nk, rs + jv, jn, jp, o, beta)
                    nsum8x4(M, nc * CHUNK_SITES + dst, CHUNK_SITES, im, 0, fl, nk, rs + jv, jn, jp, o, beta)
                elif nc == 9:
                    for c in range(0, 9, 3):
                        nsum8x3(M, c * CHUNK_SITES + dst, CHUNK_SITES, re, c, fl, nk, rs + jv, jn, jp, o, beta)
                        nsum8x3(M, (nc + c) * CHUNK_SITES + dst, CHUNK_SITES, im, c, fl, nk, rs + jv, jn, jp, o,
                                beta)
                else:
                    for c in range(nc):
                        nsum8(M, c * CHUNK_SITES + dst, CHUNK_SITES, re, c, fl, nk, rs + jv, jn, jp, o, beta)
                        nsum8(M, (nc + c) * CHUNK_SITES + dst, CHUNK_SITES, im, c, fl, nk, rs + jv, jn, jp, o, beta)
    else:
        # the fastest direction's flags per site (one int64 array: one load per site in the pass)
        for g in range(r0, r1):
            o = (colour + rpar[g]) % 2
            b = (g - r0) * w
            for j in range(w):
                fl[b + j] = o
            if rows > 0:  # whole rows: the wrap at their ends (a segment of a long row: one by one)
                fl[b + h - 1] += 2
                fl[b] += 4
        src = other + r0 * h + j0
        uh = np.uint64(h)
        # the last pass reads the field from src + i - max(h - 1, 1) to src + i + max(h - 1, 1): the
        # sites i < i0 and i >= i1 would read outside it (chunks at the ends of the field)
        reach = max(h - 1, 1)
        i0 = min(m, max(0, reach - src))
        i1 = max(i0, min(m, re.shape[1] - reach - src))
        if rows == 0:  # a segment of a long row: its wrapped end, if any, one by one too
            if fl[0] == 1 and j0 + w == h:
                i1 = min(i1, m - 1)
            if fl[0] == 0 and j0 == 0:
                i0 = max(i0, 1)
            i1 = max(i0, i1)
        if nk == 0:
            for j in range(2 * nc * CHUNK_SITES):
                R[j] = 0.0
        g = r0
        while g < r1:
            g2 = g + 1
            while g2 < r1:
                cont = True
                for k in range(nk):
                    if rnbr[k, g2] != rnbr[k, g2 - 1] + 1:
                        cont = False
                if not cont:
                    break
                g2 += 1
            dst = (g - r0) * w
            n = (g2 - g) * w
            for k in range(0, nk, 2):
                for c in range(nc):
                    _sum2(R, re, im, c, dst, n, other + rnbr[k, g] * h + j0, other + rnbr[k + 1, g] * h + j0, k == 0)
            g = g2
        for c in range(nc):
            _fast_pass(M, R, re, im, nc, c, src, i0, i1, uh, fl, beta)
        for i in range(i0):
            _fast_site(M, R, re, im, other + (r0 + i // w) * h, nf, i, j0 + i % w, h, (fl[i] & 1) != 0, beta)
        for i in range(i1, m):
            _fast_site(M, R, re, im, other + (r0 + i // w) * h, nf, i, j0 + i % w, h, (fl[i] & 1) != 0, beta)
    # + diag(conj hdiag) after the scaling, as a separate add (+ 0.0 on the other components
    # would turn their -0.0 into +0.0)
    for a in range(nf):
        hr = hdiag[a].real
        hi = -hdiag[a].imag
        ur = np.uint64((a * nf + a) * CHUNK_SITES)
        ui = np.uint64((nc + a * nf + a) * CHUNK_SITES)
        for j in range(m):
            uj = np.uint64(j)
            M[ur + uj] += hr
            M[ui + uj] += hi


@njit(cache=True, parallel=True, error_model="numpy")
def metropolis_u3(re, im, rnbr, rpar, h, colour, beta, hdiag, k2r, k2i, tab, nhits, key, rows, nblk=0):
    """Metropolis for nf = 3 on every site of ``colour``; returns the accepted hits.

    ``rnbr``, ``rpar``, ``h`` are the lattice's row tables (``row_neighbours``,
    ``row_parity``, ``row_len_half``); ``hdiag`` complex (3,), ``k2r + i k2i =
    2 kappa eta``, ``tab`` from :func:`pack_table3` with ``TABLE_ENTRIES``
    entries.  The parallel unit is a chunk of ``rows`` consecutive rows
    (``rows * h <= CHUNK_SITES``), or for ``rows == 0`` a segment of at most
    ``CHUNK_SITES`` sites of one row.  The chunks are dealt out in ``nblk`` blocks of
    consecutive chunks, each with its scratch allocated once (pass the thread count; 0, the
    default, is one block per chunk); the numbers do not depend on it.
    """
    half = re.shape[1] // 2
    nrows = rpar.shape[0]
    start = colour * half
    other = (1 - colour) * half
    mask = np.uint64(TABLE_ENTRIES - 1)
    if tab.shape[1] != TABLE_ENTRIES:
        raise ValueError("metropolis_u3 needs a 16-entry table")
    rows, nseg, nch = chunk_count(nrows, rows, h)  # a chunk must fit the scratch
    acc = zeros_int(nch)
    trows = table_rows(tab)  # the table entry by entry, for the lookups without AVX-512
    nblk = nch if nblk <= 0 else min(nch, nblk)
    for blk in prange(nblk):
        # scratch once per block of chunks (the blocks only share out the work)
        Mf = np.empty(18 * CHUNK_SITES)  # M flat for _chunk_field, 2-d for the hits
        M = Mf.reshape((18, CHUNK_SITES))
        S = np.empty(18 * CHUNK_SITES)  # the slow-direction sums
        W = np.empty((18, CHUNK_SITES))
        W2 = np.empty((18, CHUNK_SITES))
        D = np.empty((2, CHUNK_SITES))
        D2 = np.empty((2, CHUNK_SITES))
        avx512 = avx512_code()
        Wn = W if avx512 else W2  # where a hit writes U and det U (the one before reads W, D)
        Dn = D if avx512 else D2
        R = np.empty((20, CHUNK_SITES))  # the looked-up R
        uu = np.empty(CHUNK_SITES)
        ix = np.empty(CHUNK_SITES, dtype=np.int64)
        fl = np.empty(CHUNK_SITES, dtype=np.int64)
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            r0, r1, j0, w = chunk_span(ch, rows, nseg, nrows, h)
            m = (r1 - r0) * w
            c0 = start + r0 * h + j0
            na = 0
            # M = beta N + diag(conj h), component 3a+b (re) and 9+3a+b (im)
            _chunk_field(Mf, S, fl, re, im, rnbr, rpar, h, colour, 3, beta, hdiag, rows, r0, r1, j0, w, m, other)
            uc0 = np.uint64(c0)
            load18(W, re, im, c0, m)
            for j in range(m):
                dr, di = _det3(W[0, j], W[9, j], W[1, j], W[10, j], W[2, j], W[11, j],
                               W[3, j], W[12, j], W[4, j], W[13, j], W[5, j], W[14, j],
                               W[6, j], W[15, j], W[7, j], W[16, j], W[8, j], W[17, j])
                D[0, j] = dr
                D[1, j] = di
            for hit in range(nhits):
                hh = np.uint64(hit)
                for j in range(m):
                    bb = bits(key, (uc0 + np.uint64(j)) * SITE_STRIDE + hh)
                    ix[j] = np.int64(bb & mask)
                    uu[j] = u01_from_bits(bb)
                for j8 in range(0, m, 8):
                    if avx512:
                        lookup16(tab, ix, R, 20, j8)
                    else:
                        lookup16_rows(trows, ix, R, 5, j8)
                # without AVX-512, U and det U go back and forth between (W, D) and (W2, D2): the
                # select written back where its other value was read is a masked store, microcoded
                # on AVX2 (16^3, one thread, same process: AVX2 code 1.29x, AVX-512 code 1.00-1.07x)
                if avx512 or hit % 2 == 0:
                    for j in range(m):
                        na += _hit(W, Wn, M, D, Dn, R, uu, j, k2r, k2i)
                else:
                    for j in range(m):
                        na += _hit(W2, W, M, D2, D, R, uu, j, k2r, k2i)
            store18(W if avx512 or nhits % 2 == 0 else W2, re, im, c0, m)
            acc[ch] = na
    return total(acc)


@njit(cache=True)
def metropolis_u3_update(re, im, rnbr, rpar, h, beta, hdiag, k2r, k2i, special, eps, seed_hash, step,
                         salt, nhits, rows, nblk):
    """One Metropolis update of both colours in one call: colour ``c`` is colour update number
    ``step + c`` of the run, with the site key ``step_key(seed, step + c)`` and the proposal
    table of ``step_key(seed, step + c, salt)`` (``seed_hash`` as :func:`tables.step_key_nb`).

    The same numbers as building the tables and keys in Python and calling
    :func:`metropolis_u3` per colour, without the serial Python work between the
    parallel regions; both colours' tables are built first, in one parallel region of
    their own (:func:`rotation_tables3`).  Returns the accepted hits.
    """
    keys = np.empty(2, dtype=np.uint64)
    tkeys = np.empty(2, dtype=np.uint64)
    for colour in range(2):
        keys[colour] = tables.step_key_nb(seed_hash, step + colour, 0)
        tkeys[colour] = tables.step_key_nb(seed_hash, step + colour, salt)
    tabs = np.empty((2, 20, TABLE_ENTRIES))
    rotation_tables3(special, eps, tkeys, tabs, nblk)
    acc = 0
    for colour in range(2):
        acc += metropolis_u3(re, im, rnbr, rpar, h, colour, beta, hdiag, k2r, k2i, tabs[colour], nhits,
                             keys[colour], rows, nblk)
    return acc


@njit(cache=True, parallel=True)
def rotation_tables3(special, eps, tkeys, out, nblk):
    """``out[t]`` = the packed nf = 3 proposal table of key ``tkeys[t]`` (``pack_table3`` layout).

    The ``len(tkeys) * TABLE_ENTRIES / 2`` rotations (each with its inverse) are shared out
    over ``nblk`` blocks: building one costs about half a microsecond (Gaussians, a 3x3
    complex solve, a projection), so the two tables of an update done serially were about
    a tenth of a 16^3 sweep's time on 2 threads.  Every entry has the bits of
    :func:`tables.rotation_table`, whatever the order.
    """
    half = TABLE_ENTRIES // 2
    ntot = tkeys.shape[0] * half
    nblk = max(1, min(nblk, ntot))
    for blk in prange(nblk):
        table = np.empty((TABLE_ENTRIES, 3, 3), dtype=np.complex128)
        dets = np.empty(TABLE_ENTRIES, dtype=np.complex128)
        x = np.empty((3, 3), dtype=np.complex128)
        a = np.empty((3, 3), dtype=np.complex128)
        r = np.empty((3, 3), dtype=np.complex128)
        work = np.empty((3, 3), dtype=np.complex128)
        for q in range(blk * ntot // nblk, (blk + 1) * ntot // nblk):
            t = q // half
            k = q % half
            tables.rotation_entry(3, special, eps, tkeys[t], k, table, dets, x, a, r, work)
            tables.pack_entry3(table, dets, k, out[t])
            tables.pack_entry3(table, dets, k + half, out[t])


@njit(cache=True, inline="always")
def _det3(a0r, a0i, a1r, a1i, a2r, a2i, a3r, a3i, a4r, a4i, a5r, a5i, a6r, a6i, a7r, a7i,
          a8r, a8i):
    """det of [[a0, a1, a2], [a3, a4, a5], [a6, a7, a8]] (cofactors of the first row)."""
    m0r = (a4r * a8r - a4i * a8i) - (a5r * a7r - a5i * a7i)
    m0i = (a4r * a8i + a4i * a8r) - (a5r * a7i + a5i * a7r)
    m1r = (a3r * a8r - a3i * a8i) - (a5r * a6r - a5i * a6i)
    m1i = (a3r * a8i + a3i * a8r) - (a5r * a6i + a5i * a6r)
    m2r = (a3r * a7r - a3i * a7i) - (a4r * a6r - a4i * a6i)
    m2i = (a3r * a7i + a3i * a7r) - (a4r * a6i + a4i * a6r)
    dr = (a0r * m0r - a0i * m0i) - (a1r * m1r - a1i * m1i) + (a2r * m2r - a2i * m2i)
    di = (a0r * m0i + a0i * m0r) - (a1r * m1i + a1i * m1r) + (a2r * m2i + a2i * m2r)
    return dr, di


@njit(cache=True, inline="always", error_model="numpy")
def _hit(W, Wn, M, D, Dn, R, uu, j, k2r, k2i):
    """One hit on lane j of the chunk: V = R U, accept test, branch-free select; returns 0 or 1.
    U and det U read from W, D and written to Wn, Dn (see :func:`metropolis_u3`)."""
    u0r = W[0, j]; u1r = W[1, j]; u2r = W[2, j]; u3r = W[3, j]; u4r = W[4, j]
    u5r = W[5, j]; u6r = W[6, j]; u7r = W[7, j]; u8r = W[8, j]
    u0i = W[9, j]; u1i = W[10, j]; u2i = W[11, j]; u3i = W[12, j]; u4i = W[13, j]
    u5i = W[14, j]; u6i = W[15, j]; u7i = W[16, j]; u8i = W[17, j]
    r0r = R[0, j]; r1r = R[1, j]; r2r = R[2, j]; r3r = R[3, j]; r4r = R[4, j]
    r5r = R[5, j]; r6r = R[6, j]; r7r = R[7, j]; r8r = R[8, j]
    r0i = R[9, j]; r1i = R[10, j]; r2i = R[11, j]; r3i = R[12, j]; r4i = R[13, j]
    r5i = R[14, j]; r6i = R[15, j]; r7i = R[16, j]; r8i = R[17, j]
    # V[a, b] = sum_k R[a, k] U[k, b]
    v0r = (r0r * u0r - r0i * u0i) + (r1r * u3r - r1i * u3i) + (r2r * u6r - r2i * u6i)
    v0i = (r0r * u0i + r0i * u0r) + (r1r * u3i + r1i * u3r) + (r2r * u6i + r2i * u6r)
    v1r = (r0r * u1r - r0i * u1i) + (r1r * u4r - r1i * u4i) + (r2r * u7r - r2i * u7i)
    v1i = (r0r * u1i + r0i * u1r) + (r1r * u4i + r1i * u4r) + (r2r * u7i + r2i * u7r)
    v2r = (r0r * u2r - r0i * u2i) + (r1r * u5r - r1i * u5i) + (r2r * u8r - r2i * u8i)
    v2i = (r0r * u2i + r0i * u2r) + (r1r * u5i + r1i * u5r) + (r2r * u8i + r2i * u8r)
    v3r = (r3r * u0r - r3i * u0i) + (r4r * u3r - r4i * u3i) + (r5r * u6r - r5i * u6i)
    v3i = (r3r * u0i + r3i * u0r) + (r4r * u3i + r4i * u3r) + (r5r * u6i + r5i * u6r)
    v4r = (r3r * u1r - r3i * u1i) + (r4r * u4r - r4i * u4i) + (r5r * u7r - r5i * u7i)
    v4i = (r3r * u1i + r3i * u1r) + (r4r * u4i + r4i * u4r) + (r5r * u7i + r5i * u7r)
    v5r = (r3r * u2r - r3i * u2i) + (r4r * u5r - r4i * u5i) + (r5r * u8r - r5i * u8i)
    v5i = (r3r * u2i + r3i * u2r) + (r4r * u5i + r4i * u5r) + (r5r * u8i + r5i * u8r)
    v6r = (r6r * u0r - r6i * u0i) + (r7r * u3r - r7i * u3i) + (r8r * u6r - r8i * u6i)
    v6i = (r6r * u0i + r6i * u0r) + (r7r * u3i + r7i * u3r) + (r8r * u6i + r8i * u6r)
    v7r = (r6r * u1r - r6i * u1i) + (r7r * u4r - r7i * u4i) + (r8r * u7r - r8i * u7i)
    v7i = (r6r * u1i + r6i * u1r) + (r7r * u4i + r7i * u4r) + (r8r * u7i + r8i * u7r)
    v8r = (r6r * u2r - r6i * u2i) + (r7r * u5r - r7i * u5i) + (r8r * u8r - r8i * u8i)
    v8i = (r6r * u2i + r6i * u2r) + (r7r * u5i + r7i * u5r) + (r8r * u8i + r8i * u8r)
    # Re Tr(A (V - U)) as a balanced sum
    e0 = (v0r - u0r) * M[0, j] + (v0i - u0i) * M[9, j]
    e1 = (v1r - u1r) * M[1, j] + (v1i - u1i) * M[10, j]
    e2 = (v2r - u2r) * M[2, j] + (v2i - u2i) * M[11, j]
    e3 = (v3r - u3r) * M[3, j] + (v3i - u3i) * M[12, j]
    e4 = (v4r - u4r) * M[4, j] + (v4i - u4i) * M[13, j]
    e5 = (v5r - u5r) * M[5, j] + (v5i - u5i) * M[14, j]
    e6 = (v6r - u6r) * M[6, j] + (v6i - u6i) * M[15, j]
    e7 = (v7r - u7r) * M[7, j] + (v7i - u7i) * M[16, j]
    e8 = (v8r - u8r) * M[8, j] + (v8i - u8i) * M[17, j]
    dtr = ((e0 + e1) + (e2 + e3)) + ((e4 + e5) + (e6 + e7)) + e8
    dr = D[0, j]
    di = D[1, j]
    tr = R[18, j]
    ti = R[19, j]
    nr = tr * dr - ti * di
    ni = tr * di + ti * dr
    mds = dtr + (k2r * (nr - dr) - k2i * (ni - di))
    ok = uu[j] < exp_le0(min(mds, 0.0))
    Wn[0, j] = v0r if ok else u0r
    Wn[1, j] = v1r if ok else u1r
    Wn[2, j] = v2r if ok else u2r
    Wn[3, j] = v3r if ok else u3r
    Wn[4, j] = v4r if ok else u4r
    Wn[5, j] = v5r if ok else u5r
    Wn[6, j] = v6r if ok else u6r
    Wn[7, j] = v7r if ok else u7r
    Wn[8, j] = v8r if ok else u8r
    Wn[9, j] = v0i if ok else u0i
    Wn[10, j] = v1i if ok else u1i
    Wn[11, j] = v2i if ok else u2i
    Wn[12, j] = v3i if ok else u3i
    Wn[13, j] = v4i if ok else u4i
    Wn[14, j] = v5i if ok else u5i
    Wn[15, j] = v6i if ok else u6i
    Wn[16, j] = v7i if ok else u7i
    Wn[17, j] = v8i if ok else u8i
    Dn[0, j] = nr if ok else dr
    Dn[1, j] = ni if ok else di
    return np.int64(ok)
