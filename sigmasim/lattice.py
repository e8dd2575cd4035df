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

import math

import numpy as np

from sigmasim.errors import ConfigError

__all__ = ["Lattice", "make_lattice"]


class Lattice:
    """Geometry of one periodic lattice.

    Only the row tables (size V / L_f) are built with the lattice; the
    site-indexed tables (``neighbours``, ``time``, ``slice_sites``,
    ``natural``, each O(V)) are built from them on first use and then kept,
    so a run whose kernels all work from the rows (U(1), the nf = 3
    Metropolis, the measurements) never holds them.

    Attributes
    ----------
    shape : tuple of int
        Extents, direction 0 (time) first.
    volume : int
        Number of sites V.
    half : int
        Number of sites of one colour, V / 2; even sites are ``[0, half)``.
    neighbours : int64 array (2 d, V), built on first use
        ``neighbours[2 mu]`` is the site ``x + mu``, ``neighbours[2 mu + 1]`` is
        ``x - mu``, both in checkerboard order.
    time : int64 array (V,), built on first use
        Time coordinate of each site.
    slice_sites : int64 array (T, V / T), built on first use
        The sites of each time slice, sorted.
    natural : int64 array (V,), built on first use
        ``natural[i]`` is the lexicographic index of checkerboard site ``i``.
    n_rows : int
        Number of rows: sets of sites with equal coordinates except the last
        (fastest) one, V / L_f.  Row ``r`` is the lexicographic index over
        ``shape[:-1]``; the rows of time slice ``t`` are
        ``t R_t .. (t + 1) R_t - 1`` with ``R_t = n_rows / T`` (d >= 2).
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

    __slots__ = ("shape", "volume", "half", "n_rows", "row_len_half", "row_parity", "row_neighbours",
                 "_site_tables")

    def __init__(self, shape, volume, half, n_rows, row_len_half, row_parity, row_neighbours):
        self.shape = shape
        self.volume = volume
        self.half = half
        self.n_rows = n_rows
        self.row_len_half = row_len_half
        self.row_parity = row_parity
        self.row_neighbours = row_neighbours
        self._site_tables = {}

    @property
    def ndim(self) -> int:
        return len(self.shape)

    def _table(self, name: str) -> np.ndarray:
        t = self._site_tables.get(name)
        if t is None:
            t = _BUILDERS[name](self)
            self._site_tables[name] = t
        return t

    @property
    def neighbours(self) -> np.ndarray:
        return self._table("neighbours")

    @property
    def time(self) -> np.ndarray:
        return self._table("time")

    @property
    def slice_sites(self) -> np.ndarray:
        return self._table("slice_sites")

    @property
    def natural(self) -> np.ndarray:
        return self._table("natural")

    @property
    def table_bytes(self) -> int:
        """Bytes held by the lattice's tables now (row tables and the site tables built so far)."""
        return (self.row_parity.nbytes + self.row_neighbours.nbytes
                + sum(t.nbytes for t in self._site_tables.values()))

    def coordinates(self) -> np.ndarray:
        """Coordinates of every site, int64 array (V, d), checkerboard order."""
        return np.stack(np.unravel_index(self.natural, self.shape), axis=1)


def _site_rows(lat: Lattice):
    """Colour, row and position in the row of every checkerboard site (int64 arrays (V,))."""
    s = np.arange(lat.volume, dtype=np.int64)
    colour = s // lat.half
    pos = s - colour * lat.half
    return colour, pos // lat.row_len_half, pos % lat.row_len_half


def _build_neighbours(lat: Lattice) -> np.ndarray:
    d, h = lat.ndim, lat.row_len_half
    colour, r, j = _site_rows(lat)
    out = np.empty((2 * d, lat.volume), dtype=np.int64)
    base = (1 - colour) * lat.half
    for k in range(2 * (d - 1)):
        np.add(base, lat.row_neighbours[k, r] * h + j, out=out[k])
    own = base + r * h
    odd = (colour + lat.row_parity[r]) % 2 == 1
    np.add(own, np.where(odd, (j + 1) % h, j), out=out[2 * d - 2])
    np.add(own, np.where(odd, j, (j - 1) % h), out=out[2 * d - 1])
    return out


def _build_natural(lat: Lattice) -> np.ndarray:
    colour, r, j = _site_rows(lat)
    return r * lat.shape[-1] + 2 * j + (colour + lat.row_parity[r]) % 2


def _build_time(lat: Lattice) -> np.ndarray:
    return lat.natural // (lat.volume // lat.shape[0])


def _build_slice_sites(lat: Lattice) -> np.ndarray:
    order = np.argsort(lat.time, kind="stable")  # stable: each slice in increasing site order
    return order.reshape(lat.shape[0], lat.volume // lat.shape[0]).astype(np.int64)


_BUILDERS = {"neighbours": _build_neighbours, "natural": _build_natural, "time": _build_time,
             "slice_sites": _build_slice_sites}


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
    d = len(shape)
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
    return Lattice(shape, volume, volume // 2, n_rows, shape[-1] // 2, row_parity, row_neighbours)
