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

- neighbour sums in the slow directions are contiguous runs of rows, read a
  few components at a time (the components of one site lie V doubles apart,
  a multiple of 4 KiB for the usual extents: reading all 18 at once would
  overflow the L1 ways of one cache set);
- the fastest direction is one pass over the chunk that selects, per site,
  the neighbour at j, j - 1 or j + 1 (or the wrapped end of the row) from a
  scratch copy of the chunk's rows of the other colour;
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
from sigmasim.kernels.simd import exp_le0, load18, lookup16, store18, u01_from_bits
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
def _add_run6(M, dst, re, im, src, n, c):
    """M[(c..c+2, 9+c..11+c), dst + i] += (re, im)[c..c+2, src + i] for i < n (unsigned
    indices: affine addresses, so LLVM vectorises across sites; six field streams at a time)."""
    s = np.uint64(src)
    d = np.uint64(dst)
    for i in range(n):
        q = s + np.uint64(i)
        p = d + np.uint64(i)
        M[c, p] += re[c, q]
        M[c + 1, p] += re[c + 1, q]
        M[c + 2, p] += re[c + 2, q]
        M[9 + c, p] += im[c, q]
        M[10 + c, p] += im[c + 1, q]
        M[11 + c, p] += im[c + 2, q]


@njit(cache=True, inline="always")
def _fast_rows(Mc, Tc, X, x, src, m, h, fo, ff, fl):
    """Tc = (Mc + plus) + minus for the m sites of a chunk of whole rows (one component).

    x is the component's field row, src the first other-colour site of the chunk; X is scratch
    of m + 2h.  Per site: fo = row offset (plus at j + 1, minus at j), else plus at j, minus
    at j - 1; ff / fl mark j = 0 / j = h - 1, where the row wraps.
    """
    us = np.uint64(src)
    uh = np.uint64(h)
    for i in range(m):
        X[uh + np.uint64(i)] = x[us + np.uint64(i)]
    for i in range(m):
        k = uh + np.uint64(i)
        xc = X[k]
        xp = X[k + np.uint64(1)]
        xpw = X[k + np.uint64(1) - uh]
        xm = X[k - np.uint64(1)]
        xmw = X[k - np.uint64(1) + uh]
        a = xpw if fl[i] != 0 else xp
        b = xmw if ff[i] != 0 else xm
        o = fo[i] != 0
        Tc[i] = (Mc[i] + (a if o else xc)) + (xc if o else b)


@njit(cache=True, inline="always")
def _fast_row18(M, b, re, im, rs, h, o, j0, w):
    """Add the fastest-direction neighbours (+ before -) to the sites j0 .. j0 + w - 1 of one row
    (chunk offset b); the row of the other colour starts at rs."""
    ub = np.uint64(b)
    urs = np.uint64(rs)
    uh = np.uint64(h)
    if o == 0:
        # + neighbour at j, - neighbour at j - 1 (j = 0 wraps to h - 1)
        i0 = 0
        if j0 == 0:
            for comp in range(9):
                M[comp, ub] = (M[comp, ub] + re[comp, urs]) + re[comp, urs + uh - np.uint64(1)]
                M[9 + comp, ub] = (M[9 + comp, ub] + im[comp, urs]) + im[comp, urs + uh - np.uint64(1)]
            i0 = 1
        q0 = urs + np.uint64(j0)
        for i in range(i0, w):
            p = ub + np.uint64(i)
            q = q0 + np.uint64(i)
            for comp in range(9):
                M[comp, p] = (M[comp, p] + re[comp, q]) + re[comp, q - np.uint64(1)]
                M[9 + comp, p] = (M[9 + comp, p] + im[comp, q]) + im[comp, q - np.uint64(1)]
    else:
        # + neighbour at j + 1 (j = h - 1 wraps to 0), - neighbour at j
        n1 = w
        if j0 + w == h:
            p = ub + np.uint64(w - 1)
            for comp in range(9):
                M[comp, p] = (M[comp, p] + re[comp, urs]) + re[comp, urs + uh - np.uint64(1)]
                M[9 + comp, p] = (M[9 + comp, p] + im[comp, urs]) + im[comp, urs + uh - np.uint64(1)]
            n1 = w - 1
        q0 = urs + np.uint64(j0)
        for i in range(n1):
            p = ub + np.uint64(i)
            q = q0 + np.uint64(i)
            for comp in range(9):
                M[comp, p] = (M[comp, p] + re[comp, q + np.uint64(1)]) + re[comp, q]
                M[9 + comp, p] = (M[9 + comp, p] + im[comp, q + np.uint64(1)]) + im[comp, q]


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
    rows = min(rows, CHUNK_SITES // h)  # a chunk must fit the scratch
    if rows > 0:
        nseg = 1
        nch = (nrows + rows - 1) // rows
    else:
        nseg = (h + CHUNK_SITES - 1) // CHUNK_SITES
        nch = nrows * nseg
    h0r = hdiag[0].real
    h0i = -hdiag[0].imag
    h1r = hdiag[1].real
    h1i = -hdiag[1].imag
    h2r = hdiag[2].real
    h2i = -hdiag[2].imag
    acc = zeros_int(nch)
    nblk = nch if nblk <= 0 else min(nch, nblk)
    # row-start / row-end flags of a chunk of whole rows: the same for every chunk
    ff = zeros_int(CHUNK_SITES)  # int64 masks: the select loop vectorises (bool: 1.8x slower)
    fl = zeros_int(CHUNK_SITES)
    if rows > 0:
        for g in range(rows):
            ff[g * h] = 1
            fl[g * h + h - 1] = 1
    for blk in prange(nblk):
        # scratch once per block of chunks (the blocks only share out the work)
        M = np.empty((18, CHUNK_SITES))
        W = np.empty((18, CHUNK_SITES))
        D = np.empty((2, CHUNK_SITES))
        R = np.empty((20, CHUNK_SITES))  # first the slow-direction sums, then the looked-up R
        uu = np.empty(CHUNK_SITES)
        ix = np.empty(CHUNK_SITES, dtype=np.int64)
        X = np.empty(CHUNK_SITES + 2 * h if rows > 0 else 1)
        fo = np.empty(CHUNK_SITES, dtype=np.int64)
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            if rows > 0:
                r0 = ch * rows
                r1 = min(nrows, r0 + rows)
                j0 = 0
                w = h
            else:
                r0 = ch // nseg
                r1 = r0 + 1
                j0 = (ch % nseg) * CHUNK_SITES
                w = min(CHUNK_SITES, h - j0)
            m = (r1 - r0) * w
            c0 = start + r0 * h + j0
            na = 0
            for comp in range(18):
                for j in range(m):
                    R[comp, j] = 0.0
            for k in range(rnbr.shape[0]):
                g = r0
                while g < r1:
                    g2 = g + 1
                    while g2 < r1 and rnbr[k, g2] == rnbr[k, g2 - 1] + 1:
                        g2 += 1
                    for c in range(0, 9, 3):
                        _add_run6(R, (g - r0) * w, re, im, other + rnbr[k, g] * h + j0, (g2 - g) * w, c)
                    g = g2
            if rows > 0:
                for g in range(r0, r1):
                    o = (colour + rpar[g]) % 2 == 1
                    b = (g - r0) * h
                    for j in range(h):  # a constant store: a memset
                        fo[b + j] = o
                src = other + r0 * h
                for comp in range(9):
                    _fast_rows(R[comp], M[comp], X, re[comp], src, m, h, fo, ff, fl)
                    _fast_rows(R[9 + comp], M[9 + comp], X, im[comp], src, m, h, fo, ff, fl)
            else:
                for g in range(r0, r1):
                    _fast_row18(R, (g - r0) * w, re, im, other + g * h, h, (colour + rpar[g]) % 2, j0, w)
                for comp in range(18):
                    for j in range(m):
                        M[comp, j] = R[comp, j]
            # M = beta N + diag(conj h), component 3a+b (re) and 9+3a+b (im)
            for j in range(m):
                for comp in range(18):
                    M[comp, j] *= beta
                M[0, j] += h0r
                M[4, j] += h1r
                M[8, j] += h2r
                M[9, j] += h0i
                M[13, j] += h1i
                M[17, j] += h2i
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
                    lookup16(tab, ix, R, 20, j8)
                for j in range(m):
                    na += _hit(W, M, D, R, uu, j, k2r, k2i)
            store18(W, re, im, c0, m)
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
def _hit(W, M, D, R, uu, j, k2r, k2i):
    """One hit on lane j of the chunk: V = R U, accept test, branch-free select; returns 0 or 1."""
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
    W[0, j] = v0r if ok else u0r
    W[1, j] = v1r if ok else u1r
    W[2, j] = v2r if ok else u2r
    W[3, j] = v3r if ok else u3r
    W[4, j] = v4r if ok else u4r
    W[5, j] = v5r if ok else u5r
    W[6, j] = v6r if ok else u6r
    W[7, j] = v7r if ok else u7r
    W[8, j] = v8r if ok else u8r
    W[9, j] = v0i if ok else u0i
    W[10, j] = v1i if ok else u1i
    W[11, j] = v2i if ok else u2i
    W[12, j] = v3i if ok else u3i
    W[13, j] = v4i if ok else u4i
    W[14, j] = v5i if ok else u5i
    W[15, j] = v6i if ok else u6i
    W[16, j] = v7i if ok else u7i
    W[17, j] = v8i if ok else u8i
    D[0, j] = nr if ok else dr
    D[1, j] = ni if ok else di
    return np.int64(ok)
