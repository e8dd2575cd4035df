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
    """

    shape: tuple
    volume: int
    half: int
    neighbours: np.ndarray
    time: np.ndarray
    slice_sites: np.ndarray
    natural: np.ndarray

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
    volume = int(np.prod(shape))
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
    return Lattice(shape, volume, volume // 2, neighbours, time, slice_sites, natural)
