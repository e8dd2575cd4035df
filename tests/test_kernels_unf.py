"""The chunked nf >= 2 heatbath/overrelaxation (kernels/unf.py): invariants, layout independence,
agreement with Metropolis."""

import numpy as np
import pytest

from sigmasim.analysis.gamma import gamma_analysis
from sigmasim.chain import make_simulation
from sigmasim.config import config_from_dict
from sigmasim.kernels.u3 import rows_per_chunk3
from sigmasim.kernels.unf import local_unf
from sigmasim.lattice import make_lattice


def _random_field(lat, nf, seed):
    rng = np.random.default_rng(seed)
    z = (rng.normal(size=(lat.volume, nf, nf)) + 1j * rng.normal(size=(lat.volume, nf, nf))) / np.sqrt(2)
    q, r = np.linalg.qr(z)
    d = np.diagonal(r, axis1=1, axis2=2)
    u = q * (d / np.abs(d))[:, None, :]
    flat = u.reshape(lat.volume, nf * nf).T
    return np.ascontiguousarray(flat.real), np.ascontiguousarray(flat.imag)


def _linear_action(re, im, lat, nf, beta, hdiag):
    """sum_x [ beta/2 Re Tr(N_x^dagger U_x) + Re sum_a h_a U_x,aa ] (each link once)."""
    u = (re + 1j * im).T.reshape(lat.volume, nf, nf)
    nsum = u[lat.neighbours].sum(axis=0)
    link = np.einsum("xab,xab->", nsum.conj(), u).real
    mass = sum((hdiag[a] * u[:, a, a]).real.sum() for a in range(nf))
    return 0.5 * beta * link + mass


CASES = [((4, 4, 4), 2), ((4, 4, 4), 3), ((6, 4, 8), 3), ((8,), 3), ((2, 4, 2, 2), 4), ((2, 260), 2)]


@pytest.mark.parametrize("shape, nf", CASES)
@pytest.mark.parametrize("rows", [None, 0, 1])
def test_overrelaxation_keeps_the_linear_action(shape, nf, rows):
    # every colour update reflects each site within its surface Re Tr(A U) = const (SU(2)
    # subgroups and phase): the lattice's linear action stays put to rounding, while the field
    # moves.  A wrong neighbour sum or reflection breaks it.
    lat = make_lattice(shape)
    re, im = _random_field(lat, nf, 3)
    hdiag = (0.3 + 0.2j) * np.exp(1j * np.arange(nf))
    beta = 0.7
    g = rows_per_chunk3(lat.row_len_half) if rows is None else rows
    s0 = _linear_action(re, im, lat, nf, beta, hdiag)
    re0 = re.copy()
    for step in range(4):
        local_unf(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, step % 2, nf, beta, hdiag,
                  0.4, -0.2, False, False, np.uint64(77 + step), g, 2, False)
        s1 = _linear_action(re, im, lat, nf, beta, hdiag)
        assert abs(s1 - s0) < 1e-11 * lat.volume, (s0, s1)
    assert np.abs(re - re0).max() > 0.1


@pytest.mark.parametrize("hb", [True, False])
@pytest.mark.parametrize("shape, nf", CASES)
def test_chunking_and_blocks_do_not_change_the_numbers(shape, nf, hb):
    lat = make_lattice(shape)
    hdiag = 0.2 * np.exp(1j * np.arange(nf))
    out = []
    for rows, nblk in ((rows_per_chunk3(lat.row_len_half), 1), (0, 3), (1, 2)):
        re, im = _random_field(lat, nf, 5)
        for step in range(3):
            local_unf(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, step % 2, nf, 0.6, hdiag,
                      0.3, 0.1, False, hb, np.uint64(9 + step), rows, nblk, False)
        out.append((re, im))
    for re, im in out[1:]:
        np.testing.assert_array_equal(re, out[0][0])
        np.testing.assert_array_equal(im, out[0][1])


def _series(nf, group, schedule, n, seed):
    cfg = config_from_dict({
        "seed": seed, "lattice": {"shape": [4, 4, 4]},
        "model": {"nf": nf, "group": group, "beta": 0.5, "mass": [0.3, 0.1, -0.2][:nf], "kappa": 0.4,
                  "theta": 2.0},
        "updates": {"schedule": schedule, "metropolis_hits": 4},
        "run": {"thermalize": 100, "measurements": n, "threads": 1, "start": "hot"},
    })
    sim = make_simulation(cfg)
    for _ in range(cfg.thermalize):
        sim.sweep()
    rec = []
    for _ in range(n):
        sim.sweep()
        r = sim.measure()
        rec.append([r["action_beta"], r["action_mass"], r["action_det"], r["condensate"][0].real,
                    r["condensate"][nf - 1].imag])
    return np.array(rec)


@pytest.mark.parametrize("nf, group", [(2, "U"), (3, "U"), (3, "SU")])
def test_heatbath_overrelaxation_agree_with_metropolis(nf, group):
    # beta != 0 (the one-site checks have beta = 0): the default schedule and Metropolis sample
    # the same distribution; 4 sigma of the Gamma-method errors of both
    a = _series(nf, group, [{"update": "heatbath"}, {"update": "overrelax", "repeat": 3}], 1500, 21)
    b = _series(nf, group, [{"update": "metropolis"}], 3000, 22)
    for k in range(a.shape[1]):
        if group == "SU" and k == 2:
            continue
        ga, gb = gamma_analysis(a[:, k]), gamma_analysis(b[:, k])
        assert abs(ga.value - gb.value) < 4 * np.hypot(ga.error, gb.error), (k, ga, gb)


@pytest.mark.parametrize("shape", [(4, 4, 4), (8,), (2, 260), (2, 4, 2, 2)])
def test_metropolis_u2_chunking_and_blocks_do_not_change_the_numbers(shape):
    from sigmasim.kernels.unf import metropolis_u2, pack_table2
    from sigmasim.updates import proposal_table

    lat = make_lattice(shape)
    hdiag = np.array([0.2 + 0.1j, -0.1 + 0.05j])
    table, tdet = proposal_table(2, False, 0.8, 123)
    tab = np.empty((10, 16))
    pack_table2(table, tdet, tab)
    out = []
    for rows, nblk in ((rows_per_chunk3(lat.row_len_half), 1), (0, 3), (1, 2)):
        re, im = _random_field(lat, 2, 5)
        acc = [metropolis_u2(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, step % 2, 0.6, hdiag,
                             0.3, 0.1, tab, 4, np.uint64(9 + step), rows, nblk) for step in range(3)]
        out.append((re, im, acc))
    for re, im, acc in out[1:]:
        np.testing.assert_array_equal(re, out[0][0])
        np.testing.assert_array_equal(im, out[0][1])
        assert acc == out[0][2]
    assert 0 < sum(out[0][2]) < 3 * 4 * lat.half


@pytest.mark.parametrize("special", [False, True])
@pytest.mark.parametrize("hb", [True, False])
@pytest.mark.parametrize("shape, rows", [((4, 6, 4), None), ((2, 260), None), ((6, 4, 2), 0)])
def test_nf2_fast_path_has_the_generic_numbers(shape, rows, hb, special):
    # the nf = 2 site update (unf._chunk_u2: one subgroup read in flavour order by selects, flat
    # scratch) must give the generic kernel's bits, for both flavour orders (the keys below
    # draw both), U(2) and SU(2), whole-row chunks and row segments, weak and strong fields
    lat = make_lattice(shape)
    hdiag = 0.25 * np.exp(1j * np.arange(2))
    g = rows_per_chunk3(lat.row_len_half) if rows is None else rows
    out = []
    for generic in (False, True):
        re, im = _random_field(lat, 2, 8)
        acc = 0
        for step in range(8):
            beta = 0.4 if step < 4 else 3.0
            acc += local_unf(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, step % 2, 2, beta,
                             hdiag, 0.3, -0.2, special, hb, np.uint64(31 + step), g, 2, generic)
        out.append((re, im, acc))
    np.testing.assert_array_equal(out[0][0], out[1][0])
    np.testing.assert_array_equal(out[0][1], out[1][1])
    assert out[0][2] == out[1][2]
    assert np.abs(out[0][0] - _random_field(lat, 2, 8)[0]).max() > 0.1
