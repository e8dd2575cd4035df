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
from sigmasim.kernels.serial import total, zeros_bool, zeros_int
from sigmasim.kernels.simd import exp_le0, lookup16, u01_from_bits
from sigmasim.kernels.tables import phase_table, step_key_nb
from sigmasim.rng import SITE_STRIDE, bits

__all__ = ["heatbath_u1", "heatbath_u1_update", "metropolis_u1", "metropolis_u1_update", "overrelax_u1",
           "overrelax_u1_update", "rows_per_chunk"]

CHUNK_SITES = 512  # target sites per chunk: the scratch of a chunk stays in L1
TABLE_ENTRIES = 16  # the Metropolis kernel looks up 16-entry tables (4 bits of the draw)


def rows_per_chunk(h: int, target: int = CHUNK_SITES) -> int:
    """Rows per chunk so that a chunk has about ``target`` sites (at least one row)."""
    return max(1, target // max(1, h))


@njit(cache=True, inline="always")
def _row_sums(c, s, rnbr, rpar, h, colour, other, r0, r1, beta, cr, ci, ar, ai, X, Y, fo, ff, fl):
    """a = beta conj(N) + const for the rows [r0, r1) of ``colour`` into ar, ai (chunk scratch).

    All reads are contiguous runs (no gather): in a slow direction the
    neighbours of a run of consecutive rows are a run of consecutive rows of
    the other colour; in the fastest direction they are the same row shifted
    by 0 and -1 or +1 with one wrapped element, taken in one select pass over
    the whole chunk (:func:`_fast_chunk`; X, Y: scratch of m + 2h, fo: bool
    scratch of m; ff, fl: the row-start and row-end flags of a chunk, the same
    for every chunk, from :func:`_row_flags`).  The neighbours are added in the order of
    ``lattice.neighbours`` (directions 0 .. d-1, + before -), so every sum has
    the bits of the site-by-site one.
    """
    m = (r1 - r0) * h
    for j in range(m):
        ar[j] = 0.0
        ai[j] = 0.0
    for k in range(rnbr.shape[0]):
        g = r0
        while g < r1:
            g2 = g + 1
            while g2 < r1 and rnbr[k, g2] == rnbr[k, g2 - 1] + 1:
                g2 += 1
            src = other + rnbr[k, g] * h
            dst = (g - r0) * h
            n = (g2 - g) * h
            # views indexed from 0: affine addresses, so LLVM can bound the
            # runs, check them for overlap once and vectorise
            _add_run(ar[dst:dst + n], ai[dst:dst + n], c[src:src + n], s[src:src + n])
            g = g2
    for g in range(r0, r1):
        o = (colour + rpar[g]) % 2 == 1
        b = (g - r0) * h
        for j in range(h):  # a constant store: a memset
            fo[b + j] = o
    src = other + r0 * h
    _fast_chunk(ar, c, X, src, m, h, fo, ff, fl, beta, cr)
    _fast_chunk(ai, s, Y, src, m, h, fo, ff, fl, -beta, ci)


@njit(cache=True, inline="always")
def _chunk_plan(c, rpar, h, colour, rows, nblk):
    """The chunking shared by the row kernels: (half, nrows, start, other, nch, nblk, mx, ff, fl).

    ``start``/``other``: first site of ``colour`` and of the other colour; ``nch`` chunks of
    ``rows`` rows dealt out in ``nblk`` blocks (<= 0: one block per chunk); ``mx`` sites per
    full chunk; ``ff``/``fl`` the row-start and row-end flags of a chunk (:func:`_row_flags`).
    """
    half = c.shape[0] // 2
    nrows = rpar.shape[0]
    nch = (nrows + rows - 1) // rows
    ff, fl = _row_flags(h, rows)
    nblk = nch if nblk <= 0 else min(nch, nblk)
    return half, nrows, colour * half, (1 - colour) * half, nch, nblk, rows * h, ff, fl


@njit(cache=True, inline="always")
def _row_flags(h, rows):
    """Flags of the first (ff) and last (fl) site of each row of a chunk of ``rows`` rows."""
    ff = zeros_bool(rows * h)
    fl = zeros_bool(rows * h)
    for g in range(rows):
        ff[g * h] = True
        fl[g * h + h - 1] = True
    return ff, fl


@njit(cache=True, inline="always")
def _fast_chunk(ar, c, X, src, m, h, fo, ff, fl, beta, cr):
    """ar = beta ((ar + plus) + minus) + cr over the m sites of a chunk of whole rows.

    The fastest-direction neighbours (+ before -, as the site-by-site sum) of
    site j of a row: offset 0 (fo false): plus at j, minus at j - 1 (j = 0
    wraps to h - 1, ff); offset 1: plus at j + 1 (j = h - 1 wraps to 0, fl),
    minus at j.  X gets a copy of the chunk's other-colour rows with h
    elements of margin on each side, so every candidate read is in bounds and
    the select is branch free (vectorised across the chunk, not per row).
    """
    us = np.uint64(src)
    uh = np.uint64(h)
    for i in range(m):
        X[uh + np.uint64(i)] = c[us + np.uint64(i)]
    for i in range(m):
        k = uh + np.uint64(i)
        xc = X[k]
        xp = X[k + np.uint64(1)]
        xpw = X[k + np.uint64(1) - uh]
        xm = X[k - np.uint64(1)]
        xmw = X[k - np.uint64(1) + uh]
        a = xpw if fl[i] else xp
        b = xmw if ff[i] else xm
        o = fo[i]
        ar[i] = beta * ((ar[i] + (a if o else xc)) + (xc if o else b)) + cr


@njit(cache=True, inline="always")
def _add_run(ar, ai, c, s):
    for j in range(ar.shape[0]):
        ar[j] += c[j]
        ai[j] += s[j]


@njit(cache=True, parallel=True, error_model="numpy")
def metropolis_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, tc, ts, nhits, key, rows, nblk=0):
    """``nhits`` Metropolis hits on every site of ``colour`` with rotations (tc, ts) from a table.

    ``rnbr``, ``rpar``, ``h`` are the lattice's row tables (``row_neighbours``,
    ``row_parity``, ``row_len_half``); ``cr + i ci`` is the constant part of
    ``a``; the table has ``TABLE_ENTRIES`` entries.  Hit ``hit`` of site ``x``
    uses the single draw ``bits(key, x * SITE_STRIDE + hit)``: its low 4 bits
    pick the rotation, its top 53 bits are the accept uniform, so the chain
    does not depend on the chunking or the thread count.  The rows of the
    colour are cut into chunks of ``rows`` consecutive rows (the parallel
    unit, dealt out in ``nblk`` blocks of consecutive chunks, each block with
    its scratch allocated once: pass the thread count; 0, the default, is one
    block per chunk; the numbers do not depend on it); every loop over a chunk is branch free
    and call free, so LLVM
    vectorises it; the table lookups are 8-site permutes
    (:func:`sigmasim.kernels.simd.lookup16`) into chunk scratch.  Returns the
    accepted hits.
    """
    half, nrows, start, other, nch, nblk, mx, ff, fl = _chunk_plan(c, rpar, h, colour, rows, nblk)
    mask = np.uint64(TABLE_ENTRIES - 1)
    if tc.shape[0] != TABLE_ENTRIES or ts.shape[0] != TABLE_ENTRIES:
        raise ValueError("metropolis_u1 needs a 16-entry table")
    tab = np.empty((2, TABLE_ENTRIES))
    tab[0] = tc
    tab[1] = ts
    acc = zeros_int(nch)
    mp = (mx + 7) // 8 * 8  # the lookups write 8 sites at a time
    for blk in prange(nblk):
        # scratch once per block of chunks (the blocks only share out the work)
        ar = np.empty(mx)
        ai = np.empty(mx)
        uu = np.empty(mx)
        ix = np.empty(mp, dtype=np.int64)
        rcs = np.empty((2, mp))
        X = np.empty(mx + 2 * h)
        Y = np.empty(mx + 2 * h)
        fo = np.empty(mx, dtype=np.bool_)
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            r0 = ch * rows
            r1 = min(nrows, r0 + rows)
            m = (r1 - r0) * h
            c0 = start + r0 * h
            _row_sums(c, s, rnbr, rpar, h, colour, other, r0, r1, beta, cr, ci, ar, ai, X, Y, fo, ff, fl)
            na = 0
            for hit in range(nhits):
                hh = np.uint64(hit)
                for j in range(m):
                    b = bits(key, np.uint64(c0 + j) * SITE_STRIDE + hh)
                    ix[j] = np.int64(b & mask)
                    uu[j] = u01_from_bits(b)
                for j8 in range(0, m, 8):
                    lookup16(tab, ix, rcs, 2, j8)
                na += _hits(c[c0:c0 + m], s[c0:c0 + m], ar, ai, uu, rcs[0], rcs[1])
            acc[ch] = na
    return total(acc)


@njit(cache=True)
def metropolis_u1_update(c, s, rnbr, rpar, h, beta, cr, ci, eps, seed_hash, step, salt, nhits, rows, nblk):
    """One Metropolis update of both colours in one call (keys and tables as
    :func:`sigmasim.kernels.u3.metropolis_u3_update`, the table from :func:`phase_table`);
    the same numbers as :func:`metropolis_u1` per colour.  Returns the accepted hits."""
    acc = 0
    for colour in range(2):
        key = step_key_nb(seed_hash, step + colour, 0)
        tkey = step_key_nb(seed_hash, step + colour, salt)
        tc, ts = phase_table(eps, tkey, TABLE_ENTRIES)
        acc += metropolis_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, tc, ts, nhits, key, rows, nblk)
    return acc


@njit(cache=True)
def heatbath_u1_update(c, s, rnbr, rpar, h, beta, cr, ci, seed_hash, step, rows, nblk):
    """:func:`heatbath_u1` on both colours in one call, colour ``k`` with the key
    ``step_key(seed, step + k)`` (``seed_hash`` as :func:`step_key_nb`); the same numbers."""
    for colour in range(2):
        heatbath_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, step_key_nb(seed_hash, step + colour, 0), rows,
                    nblk)


@njit(cache=True)
def overrelax_u1_update(c, s, rnbr, rpar, h, beta, cr, ci, seed_hash, step, rows, nblk):
    """:func:`overrelax_u1` on both colours in one call (``seed_hash`` and ``step`` unused: the
    reflection draws no random numbers; they keep the call the same as the heatbath's)."""
    for colour in range(2):
        overrelax_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, rows, nblk)


@njit(cache=True, inline="always", error_model="numpy")
def _hits(c, s, ar, ai, uu, rc, rs):
    """One hit on every site of a chunk (views of the chunk's sites); returns the accepted count."""
    na = 0
    for j in range(c.shape[0]):
        ur = c[j]
        ui = s[j]
        vr = ur * rc[j] - ui * rs[j]
        vi = ur * rs[j] + ui * rc[j]
        # -dS = Re(a (V - U))
        mds = ar[j] * (vr - ur) - ai[j] * (vi - ui)
        ok = uu[j] < exp_le0(min(mds, 0.0))
        c[j] = vr if ok else ur
        s[j] = vi if ok else ui
        na += np.int64(ok)
    return na


@njit(cache=True)
def heatbath_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, key, rows, nblk=0):
    """Exact von Mises heatbath on every site of ``colour``; returns the site count.

    Row tables and chunking as :func:`metropolis_u1`: the local fields of a
    chunk come from contiguous runs, then each site draws from its own counters.
    """
    return _local_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, key, rows, nblk, False)


@njit(cache=True)
def overrelax_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, rows, nblk=0):
    """Microcanonical reflection U -> conj(a)^2 conj(U) / |a|^2 on every site of ``colour``.

    Row tables and chunking as :func:`metropolis_u1`.  Returns the site count.
    """
    return _local_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, np.uint64(0), rows, nblk, True)


@njit(cache=True, parallel=True, error_model="numpy")
def _local_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, key, rows, nblk, reflect):
    """The chunk loop of :func:`heatbath_u1` (``reflect`` False) and :func:`overrelax_u1` (True):
    the local fields a of a chunk, then the chunk's sites drawn from the von Mises density or
    reflected (the choice is made per chunk, so the site loops stay branch free)."""
    half, nrows, start, other, nch, nblk, mx, ff, fl = _chunk_plan(c, rpar, h, colour, rows, nblk)
    for blk in prange(nblk):
        ar = np.empty(mx)
        ai = np.empty(mx)
        X = np.empty(mx + 2 * h)
        Y = np.empty(mx + 2 * h)
        fo = np.empty(mx, dtype=np.bool_)
        for ch in range(blk * nch // nblk, (blk + 1) * nch // nblk):
            r0 = ch * rows
            r1 = min(nrows, r0 + rows)
            m = (r1 - r0) * h
            c0 = start + r0 * h
            _row_sums(c, s, rnbr, rpar, h, colour, other, r0, r1, beta, cr, ci, ar, ai, X, Y, fo, ff, fl)
            if reflect:
                _reflect(c[c0:c0 + m], s[c0:c0 + m], ar, ai)
            else:
                _von_mises_sites(c, s, c0, m, ar, ai, key)
    return half


@njit(cache=True, inline="always", error_model="numpy")
def _von_mises_sites(c, s, c0, m, far, fai, key):
    """U = e^{i psi} conj(a) / |a| with psi von Mises of concentration |a|, sites c0 .. c0 + m - 1."""
    for j in range(m):
        x = c0 + j
        ar = far[j]
        ai = fai[j]
        k = np.sqrt(ar * ar + ai * ai)
        f, g, _ = von_mises_angle(k, key, np.uint64(x) * SITE_STRIDE)
        if k > 1e-300:
            er = ar / k
            ei = -ai / k
            c[x] = er * f - ei * g
            s[x] = ei * f + er * g
        else:
            c[x] = f
            s[x] = g


@njit(cache=True, inline="always", error_model="numpy")
def _reflect(c, s, ar, ai):
    for j in range(c.shape[0]):
        a_r = ar[j]
        a_i = ai[j]
        k2 = a_r * a_r + a_i * a_i
        # conj(a)^2 / |a|^2
        er = (a_r * a_r - a_i * a_i) / k2
        ei = -2.0 * a_r * a_i / k2
        ur = c[j]
        ui = -s[j]
        big = k2 > 1e-300
        nr = er * ur - ei * ui
        ni = er * ui + ei * ur
        c[j] = nr if big else c[j]
        s[j] = ni if big else s[j]
