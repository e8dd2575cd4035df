"""The chunk neighbour sums of the nf >= 2 kernels (``u3._chunk_field``) against the site-by-site sum
in the order of ``lattice.neighbours``, bit for bit (no statistics).

Both ways of forming them are covered: rows of whole 8-site vectors (the fastest extent a multiple
of 16: per row and 8 sites one :func:`simd.nsum8x4`, ``nsum8x3`` or ``nsum8`` call for four, three or
one component, as nf = 2, 3 or more) and any other row length (passes over the chunk with a select
per site), whole-row chunks and long rows cut into segments, d = 1..4."""

import numpy as np
import pytest
from numba import njit

from sigmasim.kernels.u3 import CHUNK_SITES, _chunk_field, chunk_count, chunk_span, rows_per_chunk3
from sigmasim.lattice import make_lattice

# (shape, rows per chunk or None for the kernels' choice); h = shape[-1] // 2
CASES = [((4, 6, 16), None), ((16,), None), ((2, 32), None), ((2, 2, 4, 16), None), ((6, 2, 16), 1),
         ((2, 272), None), ((2, 272), 0), ((4, 6, 4), None), ((2, 260), None), ((6, 4, 2), 0), ((8,), None),
         ((4, 2, 2, 6), None)]


@njit(cache=False)
def _all_chunks(re, im, rnbr, rpar, h, nf, beta, hdiag, rows, out):
    """out[:, site] = M of every site, chunk by chunk as the kernels form it."""
    nc = nf * nf
    half = re.shape[1] // 2
    nrows = rpar.shape[0]
    rows, nseg, nch = chunk_count(nrows, rows, h)
    M = np.full(2 * nc * CHUNK_SITES, np.nan)
    R = np.empty(2 * nc * CHUNK_SITES)
    fl = np.empty(CHUNK_SITES, dtype=np.int64)
    for colour in range(2):
        other = (1 - colour) * half
        for ch in range(nch):
            r0, r1, j0, w = chunk_span(ch, rows, nseg, nrows, h)
            m = (r1 - r0) * w
            _chunk_field(M, R, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1, j0, w, m, other)
            for i in range(m):
                x = colour * half + (r0 + i // w) * h + j0 + i % w
                for c in range(2 * nc):
                    out[c, x] = M[c * CHUNK_SITES + i]


@pytest.mark.parametrize("nf", [2, 3, 4])  # nf = 2, 3: components 4 / 3 at a time; 4: one at a time
@pytest.mark.parametrize("shape, rows", CASES)
def test_chunk_sums_are_the_site_by_site_sums(shape, rows, nf):
    lat = make_lattice(shape)
    nc = nf * nf
    rng = np.random.default_rng(7)
    re = rng.normal(size=(nc, lat.volume))
    im = rng.normal(size=(nc, lat.volume))
    re[0, ::5] = -0.0  # signed zeros: 0 + (-0) must stay +0 as in the site-by-site sum
    im[1, ::7] = 0.0
    beta = 0.7
    hdiag = np.array([0.3 - 0.2j, -0.1 + 0.05j, 0.25 + 0.0j, -0.15 + 0.1j])[:nf]
    nbr = lat.neighbours
    want = np.zeros((2 * nc, lat.volume))
    for k in range(nbr.shape[0]):  # (0 + n_0) + n_1 + ..., the order of lattice.neighbours
        want[:nc] = want[:nc] + re[:, nbr[k]]
        want[nc:] = want[nc:] + im[:, nbr[k]]
    want *= beta
    for a in range(nf):
        want[a * nf + a] += hdiag[a].real
        want[nc + a * nf + a] += -hdiag[a].imag
    got = np.full((2 * nc, lat.volume), np.nan)
    g = rows_per_chunk3(lat.row_len_half) if rows is None else rows
    _all_chunks(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, nf, beta, hdiag, g, got)
    np.testing.assert_array_equal(got.view(np.int64), want.view(np.int64))  # every bit, signed zeros too
