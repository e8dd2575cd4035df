"""Geometry: neighbours, checkerboard, slices (exact checks, no statistics)."""

import numpy as np
import pytest

from sigmasim.errors import ConfigError
from sigmasim.lattice import make_lattice


@pytest.mark.parametrize("shape", [(4,), (6, 4), (4, 2, 6), (2, 4, 4, 2), (16, 8, 8, 8)])
def test_neighbours_are_periodic_shifts(shape):
    lat = make_lattice(shape)
    coords = lat.coordinates()
    for mu in range(len(shape)):
        for k, step in enumerate((1, -1)):
            moved = coords.copy()
            moved[:, mu] = (moved[:, mu] + step) % shape[mu]
            np.testing.assert_array_equal(coords[lat.neighbours[2 * mu + k]], moved)


@pytest.mark.parametrize("shape", [(4,), (6, 4), (4, 2, 6), (2, 4, 4, 2)])
def test_checkerboard_colours_alternate(shape):
    lat = make_lattice(shape)
    colour = lat.coordinates().sum(axis=1) % 2
    assert (colour[: lat.half] == 0).all() and (colour[lat.half:] == 1).all()
    for k in range(lat.neighbours.shape[0]):
        assert (colour[lat.neighbours[k]] != colour).all()


def test_time_slices_partition_the_lattice():
    lat = make_lattice((6, 4, 2))
    assert lat.slice_sites.shape == (6, 8)
    assert sorted(lat.slice_sites.ravel()) == list(range(lat.volume))
    for t in range(6):
        assert (lat.time[lat.slice_sites[t]] == t).all()


@pytest.mark.parametrize("shape", [(3,), (4, 5), (1, 4), (0, 4), (-2,), (), (2, 2, 2, 2, 2)])
def test_bad_shapes_are_rejected(shape):
    with pytest.raises(ConfigError):
        make_lattice(shape)
