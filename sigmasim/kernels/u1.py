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
from sigmasim.kernels.simd import exp_le0, lookup16, u01_from_bits
from sigmasim.kernels.tables import phase_table, step_key_nb
from sigmasim.rng import SITE_STRIDE, bits

__all__ = ["metropolis_u1", "metropolis_u1_update", "heatbath_u1", "overrelax_u1", "rows_per_chunk"]

CHUNK_SITES = 512  # target sites per chunk: the scratch of a chunk stays in L1
TABLE_ENTRIES = 16  # the Metropolis kernel looks up 16-entry tables (4 bits of the draw)


def rows_per_chunk(h: int, target: int = CHUNK_SITES) -> int:
    """Rows per chunk so that a chunk has about ``target`` sites (at least one row)."""
    return max(1, target // max(1, h))


@njit(cache=True, inline="always")
def _row_sums(c, s, rnbr, rpar, h, colour, other, r0, r1, beta, cr, ci, ar, ai):
    """a = beta conj(N) + const for the rows [r0, r1) of ``colour`` into ar, ai (chunk scratch).

    All reads are contiguous runs (no gather): in a slow direction the
    neighbours of a run of consecutive rows are a run of consecutive rows of
    the other colour; in the fastest direction they are the same row shifted
    by 0 and -1 or +1 with one wrapped element.  The neighbours are added in
    the order of ``lattice.neighbours`` (directions 0 .. d-1, + before -), so
    every sum has the bits of the site-by-site one.
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
        src = other + g * h
        b = (g - r0) * h
        _fast_row(ar[b:b + h], ai[b:b + h], c[src:src + h], s[src:src + h], h,
                  (colour + rpar[g]) % 2, beta, cr, ci)


@njit(cache=True, inline="always")
def _add_run(ar, ai, c, s):
    for j in range(ar.shape[0]):
        ar[j] += c[j]
        ai[j] += s[j]


@njit(cache=True, inline="always")
def _fast_row(ar, ai, c, s, h, o, beta, cr, ci):
    """Add the two fastest-direction neighbours (+ then -) of one row, then a = beta conj(N) + const."""
    if o == 0:
        # + neighbour at j, - neighbour at j - 1 (j = 0 wraps to h - 1)
        ar[0] = beta * ((ar[0] + c[0]) + c[h - 1]) + cr
        ai[0] = -beta * ((ai[0] + s[0]) + s[h - 1]) + ci
        for j in range(1, h):
            ar[j] = beta * ((ar[j] + c[j]) + c[j - 1]) + cr
            ai[j] = -beta * ((ai[j] + s[j]) + s[j - 1]) + ci
    else:
        # + neighbour at j + 1 (j = h - 1 wraps to 0), - neighbour at j
        for j in range(h - 1):
            ar[j] = beta * ((ar[j] + c[j + 1]) + c[j]) + cr
            ai[j] = -beta * ((ai[j] + s[j + 1]) + s[j]) + ci
        e = h - 1
        ar[e] = beta * ((ar[e] + c[0]) + c[e]) + cr
        ai[e] = -beta * ((ai[e] + s[0]) + s[e]) + ci


@njit(cache=True, parallel=True, error_model="numpy")
def metropolis_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, tc, ts, nhits, key, rows):
    """``nhits`` Metropolis hits on every site of ``colour`` with rotations (tc, ts) from a table.

    ``rnbr``, ``rpar``, ``h`` are the lattice's row tables (``row_neighbours``,
    ``row_parity``, ``row_len_half``); ``cr + i ci`` is the constant part of
    ``a``; the table has ``TABLE_ENTRIES`` entries.  Hit ``hit`` of site ``x``
    uses the single draw ``bits(key, x * SITE_STRIDE + hit)``: its low 4 bits
    pick the rotation, its top 53 bits are the accept uniform, so the chain
    does not depend on the chunking or the thread count.  The rows of the
    colour are cut into chunks of ``rows`` consecutive rows (the parallel
    unit); every loop over a chunk is branch free and call free, so LLVM
    vectorises it; the table lookups are 8-site permutes
    (:func:`sigmasim.kernels.simd.lookup16`) into chunk scratch.  Returns the
    accepted hits.
    """
    half = c.shape[0] // 2
    nrows = rpar.shape[0]
    start = colour * half
    other = (1 - colour) * half
    mask = np.uint64(TABLE_ENTRIES - 1)
    if tc.shape[0] != TABLE_ENTRIES or ts.shape[0] != TABLE_ENTRIES:
        raise ValueError("metropolis_u1 needs a 16-entry table")
    tab = np.empty((2, TABLE_ENTRIES))
    tab[0] = tc
    tab[1] = ts
    nch = (nrows + rows - 1) // rows
    acc = np.zeros(nch, dtype=np.int64)
    for ch in prange(nch):
        r0 = ch * rows
        r1 = min(nrows, r0 + rows)
        m = (r1 - r0) * h
        c0 = start + r0 * h
        mp = (m + 7) // 8 * 8  # the lookups write 8 sites at a time
        ar = np.empty(m)
        ai = np.empty(m)
        uu = np.empty(m)
        ix = np.empty(mp, dtype=np.int64)
        rcs = np.empty((2, mp))
        _row_sums(c, s, rnbr, rpar, h, colour, other, r0, r1, beta, cr, ci, ar, ai)
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
    return acc.sum()


@njit(cache=True)
def metropolis_u1_update(c, s, rnbr, rpar, h, beta, cr, ci, eps, seed_hash, step, salt, nhits, rows):
    """One Metropolis update of both colours in one call (keys and tables as
    :func:`sigmasim.kernels.u3.metropolis_u3_update`, the table from :func:`phase_table`);
    the same numbers as :func:`metropolis_u1` per colour.  Returns the accepted hits."""
    acc = 0
    for colour in range(2):
        key = step_key_nb(seed_hash, step + colour, 0)
        tkey = step_key_nb(seed_hash, step + colour, salt)
        tc, ts = phase_table(eps, tkey, TABLE_ENTRIES)
        acc += metropolis_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, tc, ts, nhits, key, rows)
    return acc


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


@njit(cache=True, parallel=True)
def heatbath_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, key, rows):
    """Exact von Mises heatbath on every site of ``colour``; returns the site count.

    Row tables and chunking as :func:`metropolis_u1`: the local fields of a
    chunk come from contiguous runs, then each site draws from its own counters.
    """
    half = c.shape[0] // 2
    nrows = rpar.shape[0]
    start = colour * half
    other = (1 - colour) * half
    nch = (nrows + rows - 1) // rows
    for ch in prange(nch):
        r0 = ch * rows
        r1 = min(nrows, r0 + rows)
        m = (r1 - r0) * h
        c0 = start + r0 * h
        far = np.empty(m)
        fai = np.empty(m)
        _row_sums(c, s, rnbr, rpar, h, colour, other, r0, r1, beta, cr, ci, far, fai)
        for j in range(m):
            x = c0 + j
            ar = far[j]
            ai = fai[j]
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
    return half


@njit(cache=True, parallel=True, error_model="numpy")
def overrelax_u1(c, s, rnbr, rpar, h, colour, beta, cr, ci, rows):
    """Microcanonical reflection U -> conj(a)^2 conj(U) / |a|^2 on every site of ``colour``.

    Row tables and chunking as :func:`metropolis_u1`.  Returns the site count.
    """
    half = c.shape[0] // 2
    nrows = rpar.shape[0]
    start = colour * half
    other = (1 - colour) * half
    nch = (nrows + rows - 1) // rows
    for ch in prange(nch):
        r0 = ch * rows
        r1 = min(nrows, r0 + rows)
        m = (r1 - r0) * h
        c0 = start + r0 * h
        ar = np.empty(m)
        ai = np.empty(m)
        _row_sums(c, s, rnbr, rpar, h, colour, other, r0, r1, beta, cr, ci, ar, ai)
        _reflect(c[c0:c0 + m], s[c0:c0 + m], ar, ai)
    return half


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
