"""Cost of the chunk neighbour sums (``u3._chunk_field``) per site, nf = 2 and 3.

    python benchmarks/nsum_bench.py [--shape 16 16 16] [--reps 40]

Loops over every chunk of both colours as the nf >= 2 kernels do (scratch once, one thread)
and prints the best of several repetitions in ns per site.  Compare two versions only within
one process (this machine is shared and noisy); a checkout's own numbers from another run are
not comparable.  For AVX2 code on an AVX-512 machine set NUMBA_CPU_NAME=znver3 and
NUMBA_CPU_FEATURES to the host's features with every avx512* off (the name alone keeps the
host's features), with a NUMBA_CACHE_DIR of its own.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from numba import njit

from sigmasim.kernels.u3 import CHUNK_SITES, _chunk_field, chunk_count, chunk_span, rows_per_chunk3
from sigmasim.lattice import make_lattice


@njit(cache=False)
def sweep_sums(re, im, rnbr, rpar, h, nf, beta, hdiag, rows, reps):
    """Neighbour sums of every chunk of both colours, ``reps`` times (the chunking of the kernels)."""
    nc = nf * nf
    half = re.shape[1] // 2
    nrows = rpar.shape[0]
    rows, nseg, nch = chunk_count(nrows, rows, h)  # a chunk must fit the scratch
    M = np.empty(2 * nc * CHUNK_SITES)
    R = np.empty(2 * nc * CHUNK_SITES)
    fl = np.empty(CHUNK_SITES, dtype=np.int64)
    s = 0.0
    for _ in range(reps):
        for colour in range(2):
            other = (1 - colour) * half
            for ch in range(nch):
                r0, r1, j0, w = chunk_span(ch, rows, nseg, nrows, h)
                m = (r1 - r0) * w
                _chunk_field(M, R, fl, re, im, rnbr, rpar, h, colour, nf, beta, hdiag, rows, r0, r1, j0, w, m,
                             other)
                s += M[0]
    return s


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--shape", type=int, nargs="+", default=[16, 16, 16])
    ap.add_argument("--reps", type=int, default=40)
    ap.add_argument("--rounds", type=int, default=7)
    args = ap.parse_args()
    lat = make_lattice(tuple(args.shape))
    rows = rows_per_chunk3(lat.row_len_half)
    for nf in (2, 3):
        rng = np.random.default_rng(1)
        re = rng.normal(size=(nf * nf, lat.volume))
        im = rng.normal(size=(nf * nf, lat.volume))
        hd = 0.1 * np.ones(nf, complex)
        a = (re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, nf, 0.5, hd, rows)
        sweep_sums(*a, 1)
        best = 1e9
        for _ in range(args.rounds):
            t = time.perf_counter()
            sweep_sums(*a, args.reps)
            best = min(best, time.perf_counter() - t)
        print(f"nf {nf}: {best / args.reps / lat.volume * 1e9:.2f} ns per site (shape {tuple(args.shape)})")


if __name__ == "__main__":
    main()
