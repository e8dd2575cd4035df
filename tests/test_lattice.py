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


def _direct_tables(shape):
    """The site tables built directly from the coordinates (no row tables): the reference."""
    volume = int(np.prod(shape))
    coords = np.stack(np.unravel_index(np.arange(volume), shape), axis=1)
    natural = np.argsort(coords.sum(axis=1) % 2, kind="stable")
    position = np.empty(volume, dtype=np.int64)
    position[natural] = np.arange(volume)
    c = coords[natural]
    nbr = np.empty((2 * len(shape), volume), dtype=np.int64)
    for mu in range(len(shape)):
        for k, step in enumerate((1, -1)):
            moved = c.copy()
            moved[:, mu] = (moved[:, mu] + step) % shape[mu]
            nbr[2 * mu + k] = position[np.ravel_multi_index(moved.T, shape)]
    time = c[:, 0]
    slices = np.argsort(time, kind="stable").reshape(shape[0], -1)
    slices.sort(axis=1)
    return {"neighbours": nbr, "natural": natural, "time": time, "slice_sites": slices}


@pytest.mark.parametrize("shape", [(2,), (8,), (2, 2), (6, 4), (2, 8), (4, 2, 6), (6, 4, 8), (2, 4, 2, 2),
                                   (4, 4, 2, 6), (16, 8, 8, 8)])
def test_lazy_site_tables_match_direct_construction(shape):
    lat = make_lattice(shape)
    assert lat.table_bytes == lat.row_parity.nbytes + lat.row_neighbours.nbytes  # nothing O(V) yet
    for name, ref in _direct_tables(shape).items():
        got = getattr(lat, name)
        assert got.dtype == np.int64
        np.testing.assert_array_equal(got, ref)
        assert getattr(lat, name) is got  # built once, then kept


@pytest.mark.parametrize("nf, schedule", [(1, ["metropolis", "heatbath", "overrelax"]), (3, ["metropolis"])])
def test_row_kernel_runs_build_no_site_table(nf, schedule):
    """U(1) and the nf = 3 Metropolis run and measure from the row tables alone (memory)."""
    from sigmasim.chain import Simulation
    from sigmasim.config import config_from_dict

    cfg = config_from_dict({"name": "t", "seed": 3, "lattice": {"shape": [4, 6, 4]},
                            "model": {"nf": nf, "beta": 0.5, "mass": 0.1, "kappa": 0.1, "theta": 1.0},
                            "updates": {"schedule": [{"update": u} for u in schedule]},
                            "run": {"thermalize": 12, "measurements": 1}})
    sim = Simulation(cfg)
    for _ in range(12):
        sim.sweep()
    sim.measure()
    assert sim.lattice._site_tables == {}


@pytest.mark.parametrize("shape", [(3,), (4, 5), (1, 4), (0, 4), (-2,), (), (2, 2, 2, 2, 2)])
def test_bad_shapes_are_rejected(shape):
    with pytest.raises(ConfigError):
        make_lattice(shape)
