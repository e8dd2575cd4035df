"""Counter-based random numbers.

A draw is ``mix64(key + n * GOLDEN)``: the SplitMix64 finaliser applied to a
Weyl sequence (G. Steele, D. Lea & C. Flood, OOPSLA 2014).  Every colour
update of every sweep gets its own ``key`` (a hash of the run seed and a
global step counter) and every site owns the counters
``n = site * SITE_STRIDE + draw``.  The numbers a site sees therefore do not
depend on the thread count, the loop order or the vector width, so chains are
bit-identical for any number of threads, and a resumed chain only needs the
step counter to continue exactly.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["GOLDEN", "SITE_STRIDE", "mix64", "bits", "uniform", "step_key", "mix64_int"]

GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S30 = np.uint64(30)
_S27 = np.uint64(27)
_S31 = np.uint64(31)
_S11 = np.uint64(11)
# counters reserved per site and colour update; rejection loops never get near it
SITE_STRIDE = np.uint64(1 << 24)
_MASK = (1 << 64) - 1


@njit(cache=True, inline="always")
def mix64(z):
    z = (z ^ (z >> _S30)) * _M1
    z = (z ^ (z >> _S27)) * _M2
    return z ^ (z >> _S31)


@njit(cache=True, inline="always")
def bits(key, n):
    """64 random bits (uint64) for counter ``n`` under ``key``."""
    return mix64(key + n * GOLDEN)


@njit(cache=True, inline="always")
def uniform(key, n):
    """Uniform double in the open interval (0, 1) for counter ``n``."""
    return (np.float64(bits(key, n) >> _S11) + 0.5) * 1.1102230246251565e-16


def mix64_int(z: int) -> int:
    """Python-integer SplitMix64 finaliser (same numbers as :func:`mix64`)."""
    z &= _MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK
    return z ^ (z >> 31)


def step_key(seed: int, step: int, salt: int = 0) -> np.uint64:
    """Key of colour update number ``step`` of the run with ``seed``.

    ``salt`` separates independent uses within one step (for example the
    Metropolis proposal table and the site draws).
    """
    k = mix64_int(mix64_int(seed & _MASK) ^ mix64_int((step * 0x632BE59BD9B4E019 + salt) & _MASK))
    return np.uint64(k)
