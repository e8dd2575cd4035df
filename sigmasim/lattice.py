"""Periodic hypercubic lattices in d = 1..4 with a checkerboard site order.

Sites are stored in *checkerboard order*: all even sites (sum of coordinates
even) first, then all odd sites, each colour in natural (lexicographic) order
with direction 0 slowest.  Direction 0 is the time direction used for
per-time-slice sums and correlators.

Every neighbour of an even site is odd and vice versa only when every extent
is even, so odd extents are rejected (the checkerboard update would otherwise
update two neighbours at once).  An extent of 2 is allowed: both neighbours in
that direction are then the same site and both links are counted, as the
action's sum over (x, mu) prescribes.
"""

from __future__ import annotations

from dataclasses import dataclass

import math

import numpy as np

from sigmasim.errors import ConfigError

__all__ = ["Lattice", "make_lattice"]


@dataclass(frozen=True, slots=True, eq=False)
class Lattice:
    """Geometry of one periodic lattice.

    Attributes
    ----------
    shape : tuple of int
        Extents, direction 0 (time) first.
    volume : int
        Number of sites V.
    half : int
        Number of sites of one colour, V / 2; even sites are ``[0, half)``.
    neighbours : int64 array (2 d, V)
        ``neighbours[2 mu]`` is the site ``x + mu``, ``neighbours[2 mu + 1]`` is
        ``x - mu``, both in checkerboard order.
    time : int64 array (V,)
        Time coordinate of each site.
    slice_sites : int64 array (T, V / T)
        The sites of each time slice, sorted.
    natural : int64 array (V,)
        ``natural[i]`` is the lexicographic index of checkerboard site ``i``.
    n_rows : int
        Number of rows: sets of sites with equal coordinates except the last
        (fastest) one, V / L_f.  Row ``r`` is the lexicographic index over
        ``shape[:-1]``.
    row_len_half : int
        H = L_f / 2, the sites of one colour per row.  Row ``r`` of colour ``c``
        is the checkerboard sites ``c V/2 + r H .. c V/2 + r H + H - 1``.
    row_parity : int64 array (n_rows,)
        Sum of the row's coordinates mod 2; site ``j`` of colour ``c`` in row
        ``r`` has fastest coordinate ``2 j + (c + row_parity[r]) % 2``.
    row_neighbours : int64 array (2 (d - 1), n_rows)
        ``row_neighbours[2 mu]`` / ``[2 mu + 1]`` is the row shifted by +1 / -1
        in the slow direction ``mu < d - 1``.  The neighbour of site ``j`` of
        row ``r`` in that direction is site ``j`` of that row, other colour; in
        the fastest direction it is ``j`` and ``j - 1`` (offset 0) or ``j`` and
        ``j + 1`` (offset 1) of the same row, other colour, wrapping in the row.
    """

    shape: tuple
    volume: int
    half: int
    neighbours: np.ndarray
    time: np.ndarray
    slice_sites: np.ndarray
    natural: np.ndarray
    n_rows: int
    row_len_half: int
    row_parity: np.ndarray
    row_neighbours: np.ndarray

    @property
    def ndim(self) -> int:
        return len(self.shape)

    def coordinates(self) -> np.ndarray:
        """Coordinates of every site, int64 array (V, d), checkerboard order."""
        return np.stack(np.unravel_index(self.natural, self.shape), axis=1)


def make_lattice(shape) -> Lattice:
    """Build the geometry for ``shape`` (a sequence of 1 to 4 even extents >= 2)."""
    shape = tuple(int(n) for n in shape)
    if not 1 <= len(shape) <= 4:
        raise ConfigError(f"lattice.shape must have 1 to 4 extents, got {len(shape)}")
    for n in shape:
        if n < 2 or n % 2:
            raise ConfigError(
                f"lattice.shape extents must be even and >= 2 (checkerboard), got {list(shape)}"
            )
    volume = math.prod(shape)
    coords = np.stack(np.unravel_index(np.arange(volume), shape), axis=1)
    colour = coords.sum(axis=1) % 2
    natural = np.argsort(colour, kind="stable").astype(np.int64)
    position = np.empty(volume, dtype=np.int64)
    position[natural] = np.arange(volume)
    d = len(shape)
    neighbours = np.empty((2 * d, volume), dtype=np.int64)
    c = coords[natural]
    for mu in range(d):
        for k, step in enumerate((1, -1)):
            moved = c.copy()
            moved[:, mu] = (moved[:, mu] + step) % shape[mu]
            neighbours[2 * mu + k] = position[np.ravel_multi_index(moved.T, shape)]
    time = c[:, 0].astype(np.int64)
    order = np.argsort(time, kind="stable")
    slice_sites = order.reshape(shape[0], volume // shape[0]).astype(np.int64)
    for row in slice_sites:
        row.sort()
    rows_shape = shape[:-1]
    n_rows = volume // shape[-1]
    if rows_shape:
        rc = np.stack(np.unravel_index(np.arange(n_rows), rows_shape), axis=1)
    else:
        rc = np.zeros((1, 0), dtype=np.int64)
    row_parity = (rc.sum(axis=1) % 2).astype(np.int64)
    row_neighbours = np.empty((2 * (d - 1), n_rows), dtype=np.int64)
    for mu in range(d - 1):
        for k, step in enumerate((1, -1)):
            moved = rc.copy()
            moved[:, mu] = (moved[:, mu] + step) % shape[mu]
            row_neighbours[2 * mu + k] = np.ravel_multi_index(moved.T, rows_shape)
    return Lattice(shape, volume, volume // 2, neighbours, time, slice_sites, natural,
                   n_rows, shape[-1] // 2, row_parity, row_neighbours)
