"""Row tables of the lattice reproduce the neighbour table exactly (no statistics)."""

import numpy as np
import pytest

from sigmasim.lattice import make_lattice

SHAPES = [(2,), (8,), (2, 2), (4, 6), (2, 8), (6, 2), (2, 2, 2), (4, 2, 6), (6, 4, 8),
          (2, 4, 2, 2), (4, 4, 2, 6), (2, 2, 2, 2)]


def row_neighbours_of_sites(lat):
    """(2 d, V) neighbour table rebuilt from the row tables alone."""
    d = lat.ndim
    v2, h = lat.half, lat.row_len_half
    out = np.empty((2 * d, lat.volume), dtype=np.int64)
    s = np.arange(lat.volume)
    colour = s // v2
    pos = s % v2
    r, j = pos // h, pos % h
    base = (1 - colour) * v2
    for k in range(2 * (d - 1)):
        out[k] = base + lat.row_neighbours[k, r] * h + j
    o = (colour + lat.row_parity[r]) % 2
    plus = np.where(o == 0, j, (j + 1) % h)
    minus = np.where(o == 0, (j - 1) % h, j)
    out[2 * (d - 1)] = base + r * h + plus
    out[2 * d - 1] = base + r * h + minus
    return out


@pytest.mark.parametrize("shape", SHAPES)
def test_row_tables_give_the_neighbours(shape):
    lat = make_lattice(shape)
    assert lat.n_rows * 2 * lat.row_len_half == lat.volume
    assert lat.row_neighbours.shape == (2 * (len(shape) - 1), lat.n_rows)
    np.testing.assert_array_equal(row_neighbours_of_sites(lat), lat.neighbours)


@pytest.mark.parametrize("shape", SHAPES)
def test_row_layout(shape):
    lat = make_lattice(shape)
    coords = lat.coordinates()
    h = lat.row_len_half
    for c in (0, 1):
        for r in range(lat.n_rows):
            sites = c * lat.half + r * h + np.arange(h)
            cs = coords[sites]
            # one row: equal slow coordinates, lexicographic row index r
            assert (cs[:, :-1] == cs[0, :-1]).all()
            if len(shape) > 1:
                assert np.ravel_multi_index(cs[0, :-1], shape[:-1]) == r
                assert cs[0, :-1].sum() % 2 == lat.row_parity[r]
            np.testing.assert_array_equal(cs[:, -1], 2 * np.arange(h) + (c + lat.row_parity[r]) % 2)


# ---------------------------------------------------------------------------- kernels
# Site-by-site references with gathers through lattice.neighbours (the layout
# the row kernels avoid): same draws, same summation order, so the fields must
# agree bit for bit.

from numba import njit  # noqa: E402

from sigmasim.kernels.group import von_mises_angle  # noqa: E402
from sigmasim.kernels.simd import exp_le0, u01_from_bits  # noqa: E402
from sigmasim.kernels.u1 import metropolis_u1, rows_per_chunk  # noqa: E402
from sigmasim.kernels.u3 import _det3, _hit, metropolis_u3, pack_table3, rows_per_chunk3  # noqa: E402
from sigmasim.rng import SITE_STRIDE, bits  # noqa: E402


@njit(cache=True, error_model="numpy")
def _ref_metropolis_u1(c, s, nbr, start, stop, beta, cr, ci, tc, ts, nhits, key):
    mask = np.uint64(tc.shape[0] - 1)
    na = 0
    for x in range(start, stop):
        sr = 0.0
        si = 0.0
        for k in range(nbr.shape[0]):
            sr += c[nbr[k, x]]
            si += s[nbr[k, x]]
        ar = beta * sr + cr
        ai = -beta * si + ci
        for hit in range(nhits):
            b = bits(key, np.uint64(x) * SITE_STRIDE + np.uint64(hit))
            idx = np.int64(b & mask)
            ur, ui = c[x], s[x]
            vr = ur * tc[idx] - ui * ts[idx]
            vi = ur * ts[idx] + ui * tc[idx]
            mds = ar * (vr - ur) - ai * (vi - ui)
            ok = u01_from_bits(b) < exp_le0(min(mds, 0.0))
            c[x] = vr if ok else ur
            s[x] = vi if ok else ui
            na += np.int64(ok)
    return na


@njit(cache=True, error_model="numpy")
def _ref_metropolis_u3(re, im, nbr, start, stop, beta, hdiag, k2r, k2i, tab, nhits, key):
    mask = np.uint64(tab.shape[1] - 1)
    M = np.empty((18, 1))
    W = np.empty((18, 1))
    D = np.empty((2, 1))
    R = np.empty((20, 1))
    uu = np.empty(1)
    na = 0
    for x in range(start, stop):
        for comp in range(9):
            sr = 0.0
            si = 0.0
            for k in range(nbr.shape[0]):
                sr += re[comp, nbr[k, x]]
                si += im[comp, nbr[k, x]]
            M[comp, 0] = sr * beta
            M[9 + comp, 0] = si * beta
            W[comp, 0] = re[comp, x]
            W[9 + comp, 0] = im[comp, x]
        for a in range(3):
            M[4 * a, 0] += hdiag[a].real
            M[9 + 4 * a, 0] += -hdiag[a].imag
        dr, di = _det3(W[0, 0], W[9, 0], W[1, 0], W[10, 0], W[2, 0], W[11, 0],
                       W[3, 0], W[12, 0], W[4, 0], W[13, 0], W[5, 0], W[14, 0],
                       W[6, 0], W[15, 0], W[7, 0], W[16, 0], W[8, 0], W[17, 0])
        D[0, 0] = dr
        D[1, 0] = di
        for hit in range(nhits):
            b = bits(key, np.uint64(x) * SITE_STRIDE + np.uint64(hit))
            idx = np.int64(b & mask)
            uu[0] = u01_from_bits(b)
            for comp in range(20):
                R[comp, 0] = tab[comp, idx]
            na += _hit(W, W, M, D, D, R, uu, 0, k2r, k2i)
        for comp in range(9):
            re[comp, x] = W[comp, 0]
            im[comp, x] = W[9 + comp, 0]
    return na


KERNEL_SHAPES = [(2,), (16,), (2, 2), (6, 4), (4, 2, 6), (8, 8, 8), (6, 4, 16), (2, 2, 2, 2), (2, 2, 300),
                 (4, 6, 2, 4), (2, 4, 4, 40)]


def _random_unitary(rng, n, v):
    z = rng.normal(size=(v, n, n)) + 1j * rng.normal(size=(v, n, n))
    q, r = np.linalg.qr(z)
    d = np.diagonal(r, axis1=1, axis2=2)
    return q * (d / abs(d))[:, None, :]


@pytest.mark.parametrize("shape", KERNEL_SHAPES)
@pytest.mark.parametrize("rows", [None, 1, 3])
def test_metropolis_u1_rows_match_site_reference(shape, rows):
    from sigmasim.updates import proposal_table

    lat = make_lattice(shape)
    rng = np.random.default_rng(7)
    phi = rng.uniform(-np.pi, np.pi, lat.volume)
    c, s = np.cos(phi), np.sin(phi)
    c_ref, s_ref = c.copy(), s.copy()
    g = rows_per_chunk(lat.row_len_half) if rows is None else rows
    for step in range(6):
        table, _ = proposal_table(1, False, 1.5, 100 + step)
        tc, ts = table[:, 0, 0].real.copy(), table[:, 0, 0].imag.copy()
        key = np.uint64(0x1234567 + 7919 * step)
        colour = step % 2
        nhits = 1 + step % 3
        a = metropolis_u1(c, s, lat.row_neighbours, lat.row_parity, lat.row_len_half, colour,
                          0.7, 0.1, -0.05, tc, ts, nhits, key, g, 0)
        b = _ref_metropolis_u1(c_ref, s_ref, lat.neighbours, colour * lat.half,
                               (colour + 1) * lat.half, 0.7, 0.1, -0.05, tc, ts, nhits, key)
        assert a == b
        np.testing.assert_array_equal(c, c_ref)
        np.testing.assert_array_equal(s, s_ref)


@pytest.mark.parametrize("shape", KERNEL_SHAPES)
@pytest.mark.parametrize("rows", [None, 1, 3])
def test_metropolis_u3_rows_match_site_reference(shape, rows):
    from sigmasim.updates import proposal_table

    lat = make_lattice(shape)
    rng = np.random.default_rng(11)
    u = _random_unitary(rng, 3, lat.volume).reshape(lat.volume, 9).T
    re, im = np.ascontiguousarray(u.real), np.ascontiguousarray(u.imag)
    re_ref, im_ref = re.copy(), im.copy()
    hdiag = np.array([0.1 + 0.02j, -0.05 + 0.1j, 0.2 - 0.03j])
    g = rows_per_chunk3(lat.row_len_half) if rows is None else rows
    for step in range(4):
        table, tdet = proposal_table(3, False, 0.8, 200 + step)
        tab = pack_table3(table, tdet)
        key = np.uint64(0xABCDEF + 104729 * step)
        colour = step % 2
        a = metropolis_u3(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, colour,
                          0.6, hdiag, 0.3, -0.1, tab, 4, key, g, 0)
        b = _ref_metropolis_u3(re_ref, im_ref, lat.neighbours, colour * lat.half,
                               (colour + 1) * lat.half, 0.6, hdiag, 0.3, -0.1, tab, 4, key)
        assert a == b
        np.testing.assert_array_equal(re, re_ref)
        np.testing.assert_array_equal(im, im_ref)


@njit(cache=True)
def _ref_field(c, s, nbr, x, beta, cr, ci):
    sr = 0.0
    si = 0.0
    for k in range(nbr.shape[0]):
        sr += c[nbr[k, x]]
        si += s[nbr[k, x]]
    return beta * sr + cr, -beta * si + ci


@njit(cache=True)
def _ref_heatbath_u1(c, s, nbr, start, stop, beta, cr, ci, key):
    for x in range(start, stop):
        ar, ai = _ref_field(c, s, nbr, x, beta, cr, ci)
        k = np.sqrt(ar * ar + ai * ai)
        f, g, _ = von_mises_angle(k, key, np.uint64(x) * SITE_STRIDE)
        if k > 1e-300:
            er = ar / k
            ei = -ai / k
            c[x] = er * f - ei * g
            s[x] = ei * f + er * g
        else:
            c[x] = f
            s[x] = g


@njit(cache=True)
def _ref_overrelax_u1(c, s, nbr, start, stop, beta, cr, ci):
    for x in range(start, stop):
        ar, ai = _ref_field(c, s, nbr, x, beta, cr, ci)
        k2 = ar * ar + ai * ai
        if k2 > 1e-300:
            er = (ar * ar - ai * ai) / k2
            ei = -2.0 * ar * ai / k2
            ur = c[x]
            ui = -s[x]
            c[x] = er * ur - ei * ui
            s[x] = er * ui + ei * ur


@pytest.mark.parametrize("shape", KERNEL_SHAPES)
@pytest.mark.parametrize("rows", [None, 1, 3])
def test_heatbath_overrelax_u1_rows_match_site_reference(shape, rows):
    from sigmasim.kernels.u1 import heatbath_u1, overrelax_u1

    lat = make_lattice(shape)
    rng = np.random.default_rng(13)
    phi = rng.uniform(-np.pi, np.pi, lat.volume)
    c, s = np.cos(phi), np.sin(phi)
    c_ref, s_ref = c.copy(), s.copy()
    g = rows_per_chunk(lat.row_len_half) if rows is None else rows
    rt = (lat.row_neighbours, lat.row_parity, lat.row_len_half)
    for step in range(6):
        colour = step % 2
        lo, hi = colour * lat.half, (colour + 1) * lat.half
        key = np.uint64(0x5151 + 31337 * step)
        if step % 3 == 0:
            heatbath_u1(c, s, *rt, colour, 0.9, 0.1, 0.05, key, g, 0)
            _ref_heatbath_u1(c_ref, s_ref, lat.neighbours, lo, hi, 0.9, 0.1, 0.05, key)
        else:
            overrelax_u1(c, s, *rt, colour, 0.9, 0.1, 0.05, g, 0)
            _ref_overrelax_u1(c_ref, s_ref, lat.neighbours, lo, hi, 0.9, 0.1, 0.05)
        np.testing.assert_array_equal(c, c_ref)
        np.testing.assert_array_equal(s, s_ref)


# ---------------------------------------------------------------------------- proposal tables
def test_philox_uniform_is_numpys():
    from sigmasim.kernels.simd import philox_uniform

    rng = np.random.default_rng(17)
    keys = [0, 1, 2**32 - 1, 2**32, 2**63, 2**64 - 1] + [int(k) for k in rng.integers(0, 2**63, 300)]
    for k in keys:
        for n in (1, 8, 13):
            want = np.random.Generator(np.random.Philox(k)).uniform(-1.0, 1.0, size=n)
            np.testing.assert_array_equal(philox_uniform(np.uint64(k), -1.0, 1.0, n), want)


def test_fast_tables_equal_proposal_table():
    from sigmasim.updates import proposal_table, table_u1, table_u3_packed

    rng = np.random.default_rng(19)
    for _ in range(200):
        key = np.uint64(int(rng.integers(0, 2**63)) * 2 + int(rng.integers(0, 2)))
        eps = float(rng.uniform(0.01, 3.0))
        t, _ = proposal_table(1, False, eps, key)
        tc, ts = table_u1(eps, key)
        np.testing.assert_array_equal(tc, t[:, 0, 0].real)
        np.testing.assert_array_equal(np.signbit(ts), np.signbit(t[:, 0, 0].imag))
        np.testing.assert_array_equal(ts, t[:, 0, 0].imag)
        for special in (False, True):
            p = pack_table3(*proposal_table(3, special, eps, key))
            q = table_u3_packed(special, eps, key)
            np.testing.assert_array_equal(q, p)
            np.testing.assert_array_equal(np.signbit(q), np.signbit(p))


from sigmasim.kernels.simd import lookup16, lookup16_generic, lookup16_rows, table_rows  # noqa: E402


@njit(cache=True)
def _lookup_all(tab, idx, out, form):
    rows = table_rows(tab)
    for j in range(0, idx.shape[0], 8):
        if form == 1:
            lookup16_generic(tab, idx, out, tab.shape[0], j)
        elif form == 2:
            lookup16_rows(rows, idx, out, rows.shape[1] // 4, j)
        else:
            lookup16(tab, idx, out, tab.shape[0], j)


@pytest.mark.parametrize("ncomp", [20, 10, 2])
def test_lookup16_is_a_table_lookup(ncomp):
    # every form (AVX-512 permute where compiled for it, scalar loads otherwise, whole entries
    # and a transpose) moves the table's values; the entry-by-entry form pads to 4 components
    rng = np.random.default_rng(23)
    tab = rng.normal(size=(ncomp, 16))
    tab[0, 3] = -0.0
    idx = rng.integers(-2**62, 2**62, 64).astype(np.int64)  # only the low 4 bits count
    assert np.array_equal(table_rows(tab)[:, :ncomp], tab.T) and not table_rows(tab)[:, ncomp:].any()
    for form in (0, 1, 2):
        out = np.full((4 * ((ncomp + 3) // 4), 72), np.nan)
        _lookup_all(tab, idx, out, form)
        np.testing.assert_array_equal(out[:ncomp, :64], tab[:, idx & 15])
        np.testing.assert_array_equal(np.signbit(out[:ncomp, :64]), np.signbit(tab[:, idx & 15]))
        assert np.isnan(out[:, 64:]).all()


# ---------------------------------------------------------------------------- re-unitarisation
@pytest.mark.parametrize("nf", [2, 3])
def test_reunitarize_rows_is_the_generic_projection(nf):
    from sigmasim.kernels.measure import reunitarize, reunitarize_rows

    rng = np.random.default_rng(29)
    for v, nblocks in ((2, 1), (10, 3), (300, 7), (4096, 64)):
        u = _random_unitary(rng, nf, v)
        u = u * (1 + 1e-7 * rng.normal(size=(v, 1, 1))) + 1e-6 * rng.normal(size=u.shape)
        flat = u.reshape(v, nf * nf).T
        a = (np.ascontiguousarray(flat.real), np.ascontiguousarray(flat.imag))
        b = (a[0].copy(), a[1].copy())
        da = reunitarize(*a, nf, False, nblocks)
        db = reunitarize_rows(*b, nf, nblocks)
        np.testing.assert_array_equal(b[0], a[0])
        np.testing.assert_array_equal(b[1], a[1])
        # the drift is the same entry, taken as sqrt of its squared modulus instead of hypot
        assert abs(db - da) <= 4e-16 * da


@pytest.mark.parametrize("shape", [s for s in SHAPES if len(s) >= 2])
@pytest.mark.parametrize("nf", [1, 2, 3, 4])
def test_slice_sums_from_rows_have_the_bits_of_the_gather(shape, nf):
    from sigmasim.kernels.measure import slice_sums, slice_sums_rows

    lat = make_lattice(shape)
    rng = np.random.default_rng(nf * 100 + len(shape))
    re = rng.normal(size=(nf * nf, lat.volume))
    im = rng.normal(size=(nf * nf, lat.volume))
    hd = rng.normal(size=nf) + 1j * rng.normal(size=nf)
    t = shape[0]
    out = []
    for f, tables in ((slice_sums, (lat.neighbours, lat.slice_sites)),
                      (slice_sums_rows, (lat.row_neighbours, lat.row_parity, lat.row_len_half, t))):
        bufs = (np.empty(t), np.empty(t), np.empty((t, nf * nf), np.complex128), np.empty(t, np.complex128))
        f(re, im, *tables, nf, hd, *bufs)
        out.append(bufs)
    for a, b in zip(*out):
        assert a.tobytes() == b.tobytes()


def test_numba_step_keys_are_the_python_ones():
    from numba import njit

    from sigmasim.kernels.tables import step_key_nb
    from sigmasim.rng import mix64_int, step_key

    key_nb = njit(lambda sh, step, salt: step_key_nb(sh, step, salt))
    for seed in (0, 1, 11, 2**40 + 5, 2**63 + 17, 2**64 - 1):
        for step in (0, 1, 2, 999, 2**31 + 3, 2**62):
            for salt in (0, 0x5EED):
                assert int(key_nb(np.uint64(mix64_int(seed)), step, salt)) == int(step_key(seed, step, salt))


@pytest.mark.parametrize("nblk", [1, 3])
@pytest.mark.parametrize("nf, special", [(1, False), (3, False), (3, True)])
def test_one_call_metropolis_update_is_the_per_colour_path(nf, special, nblk):
    """Keys and tables built inside numba: the fields of the per-colour Python path (scratch per
    chunk), bit for bit, with the chunks dealt out in blocks."""
    from sigmasim.kernels.u1 import metropolis_u1_update
    from sigmasim.kernels.u3 import metropolis_u3_update
    from sigmasim.rng import mix64_int, step_key
    from sigmasim.updates import table_u1, table_u3_packed

    lat = make_lattice((4, 6, 8))
    rng = np.random.default_rng(5)
    re = rng.normal(size=(nf * nf, lat.volume))
    im = rng.normal(size=(nf * nf, lat.volume))
    re2, im2 = re.copy(), im.copy()
    seed, step, salt, eps, hits, h = 2**63 + 9, 12345, 0x5EED, 0.4, 3, lat.row_len_half
    hdiag = np.array([0.3 + 0.1j, 0.2 - 0.05j, 0.1 + 0.2j])[:nf]
    acc_ref = 0
    for colour in (0, 1):
        key, tkey = step_key(seed, step + colour), step_key(seed, step + colour, salt)
        if nf == 1:
            tc, ts = table_u1(eps, tkey)
            acc_ref += metropolis_u1(re[0], im[0], lat.row_neighbours, lat.row_parity, h, colour, 0.7, 0.3, 0.1,
                                     tc, ts, hits, key, rows_per_chunk(h), 0)
        else:
            acc_ref += metropolis_u3(re, im, lat.row_neighbours, lat.row_parity, h, colour, 0.7, hdiag, 0.2, -0.1,
                                     table_u3_packed(special, eps, tkey), hits, key, rows_per_chunk3(h),
                                     0)
    sh = np.uint64(mix64_int(seed))
    if nf == 1:
        acc = metropolis_u1_update(re2[0], im2[0], lat.row_neighbours, lat.row_parity, h, 0.7, 0.3, 0.1, eps, sh,
                                   step, salt, hits, rows_per_chunk(h), nblk)
    else:
        acc = metropolis_u3_update(re2, im2, lat.row_neighbours, lat.row_parity, h, 0.7, hdiag, 0.2, -0.1, special,
                                   eps, sh, step, salt, hits, rows_per_chunk3(h), nblk)
    assert acc == acc_ref > 0
    assert re.tobytes() == re2.tobytes() and im.tobytes() == im2.tobytes()


@pytest.mark.parametrize("nblk", [1, 3])
@pytest.mark.parametrize("update", ["heatbath", "overrelax"])
def test_one_call_u1_heatbath_overrelax_are_the_per_colour_kernels(update, nblk):
    """heatbath_u1_update / overrelax_u1_update: the fields of the per-colour kernels with the
    Python step keys, bit for bit."""
    from sigmasim.kernels.u1 import heatbath_u1, heatbath_u1_update, overrelax_u1, overrelax_u1_update
    from sigmasim.rng import mix64_int, step_key

    lat = make_lattice((6, 4, 8))
    rng = np.random.default_rng(8)
    phi = rng.uniform(-np.pi, np.pi, lat.volume)
    c, s = np.cos(phi), np.sin(phi)
    c2, s2 = c.copy(), s.copy()
    seed, step, h = 77, 4242, lat.row_len_half
    rt = (lat.row_neighbours, lat.row_parity, h)
    for colour in (0, 1):
        if update == "heatbath":
            heatbath_u1(c, s, *rt, colour, 0.8, 0.2, -0.1, step_key(seed, step + colour), rows_per_chunk(h),
                        0)
        else:
            overrelax_u1(c, s, *rt, colour, 0.8, 0.2, -0.1, rows_per_chunk(h), 0)
    kernel = heatbath_u1_update if update == "heatbath" else overrelax_u1_update
    kernel(c2, s2, *rt, 0.8, 0.2, -0.1, np.uint64(mix64_int(seed)), step, rows_per_chunk(h), nblk)
    assert not np.array_equal(c, np.cos(phi))
    assert c.tobytes() == c2.tobytes() and s.tobytes() == s2.tobytes()
