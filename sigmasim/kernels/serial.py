"""Small serial helpers for the parallel kernels: allocation, fill and reductions.

Inside a function compiled with ``parallel=True``, numba turns ``np.zeros``,
``np.ones``, ``a.sum()`` and ``a.max()`` into parallel loops of their own, and
every such loop is one more fork and join of the thread team.  On a sweep of a
few hundred microseconds split over two threads those extra regions cost as
much as the work they do (measured: five regions per colour update where one
was intended, and the thread team woken for each).  These helpers are compiled
without ``parallel`` and are not inlined, so a kernel that calls them keeps a
single parallel region: its ``prange`` over blocks.  ``tests/test_kernel_regions.py``
counts the regions of every parallel kernel.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["largest", "total", "zeros_bool", "zeros_float", "zeros_int"]


@njit(cache=True)
def zeros_int(n):
    """An int64 array of ``n`` zeros (serial)."""
    a = np.empty(n, dtype=np.int64)
    for i in range(n):
        a[i] = 0
    return a


@njit(cache=True)
def zeros_float(n):
    """A float64 array of ``n`` zeros (serial)."""
    a = np.empty(n)
    for i in range(n):
        a[i] = 0.0
    return a


@njit(cache=True)
def zeros_bool(n):
    """A bool array of ``n`` False (serial)."""
    a = np.empty(n, dtype=np.bool_)
    for i in range(n):
        a[i] = False
    return a


@njit(cache=True)
def total(a):
    """Sum of a 1-d integer array (serial, exact)."""
    t = 0
    for i in range(a.shape[0]):
        t += a[i]
    return t


@njit(cache=True)
def largest(a):
    """Largest entry of a non-empty 1-d float array (serial; NaN propagates as in ``a.max()``)."""
    m = a[0]
    for i in range(1, a.shape[0]):
        if np.isnan(m):
            break
        v = a[i]
        if v > m or np.isnan(v):
            m = v
    return m
