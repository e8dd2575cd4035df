"""Python side of the update algorithms: keys, proposal tables, kernel choice.

Each update is ``apply(sim, name) -> (accepted, tried)`` over both colours;
``tried`` counts the proposals whose acceptance is recorded (Metropolis hits,
or U(1) phase moves of the U(nf) heatbath/overrelaxation, where the
determinant term is accept/rejected).  Adding an update means a kernel in
``sigmasim/kernels`` and a branch in :func:`apply`.
"""

from __future__ import annotations

import numpy as np

from sigmasim.kernels.general import heatbath, metropolis, overrelax
from sigmasim.kernels.simd import philox_uniform
from sigmasim.kernels.u1 import heatbath_u1, metropolis_u1, overrelax_u1, rows_per_chunk
from sigmasim.kernels.u3 import metropolis_u3, rows_per_chunk3
from sigmasim.rng import step_key

__all__ = ["apply", "proposal_table", "TABLE_SIZE"]

TABLE_SIZE = 16  # 8 rotations near 1 and their inverses
_SALT_TABLE = 0x5EED


def proposal_table(nf: int, special: bool, eps: float, key) -> tuple[np.ndarray, np.ndarray]:
    """A symmetric table of Metropolis rotations: R = exp(i eps X) and R^-1, X Hermitian.

    X has independent Gaussian entries (Gaussian unitary ensemble), traceless
    for SU(nf), so the rotations are isotropic.  Returns ``(table, det)``,
    complex128 arrays (TABLE_SIZE, nf, nf) and (TABLE_SIZE,).
    """
    half = TABLE_SIZE // 2
    if nf == 1:
        rng = np.random.Generator(np.random.Philox(int(key)))
        ang = eps * rng.uniform(-1.0, 1.0, size=half)
        r = np.exp(1j * ang)
        table = np.concatenate([r, r.conj()]).reshape(TABLE_SIZE, 1, 1)
        return table, table[:, 0, 0].copy()
    r, w = _rotations(nf, special, eps, key)
    table = np.concatenate([r, np.conj(np.swapaxes(r, 1, 2))])
    dets = np.exp(1j * eps * w.sum(axis=1))
    if special:
        dets = np.ones(half, dtype=np.complex128)
    return np.ascontiguousarray(table), np.concatenate([dets, dets.conj()])


def _rotations(nf: int, special: bool, eps: float, key):
    """The rotations R = exp(i eps X) (TABLE_SIZE // 2, nf, nf) of :func:`proposal_table` and the eigenvalues of X."""
    rng = np.random.Generator(np.random.Philox(int(key)))
    half = TABLE_SIZE // 2
    g = rng.normal(size=(half, nf, nf)) + 1j * rng.normal(size=(half, nf, nf))
    x = 0.5 * (g + np.conj(np.swapaxes(g, 1, 2))) / np.sqrt(2 * nf)
    if special:
        tr = np.trace(x, axis1=1, axis2=2).real / nf
        x -= tr[:, None, None] * np.eye(nf)
    w, v = np.linalg.eigh(x)
    r = np.einsum("kab,kb,kcb->kac", v, np.exp(1j * eps * w), v.conj())
    return r, w


def table_u1(eps: float, key) -> tuple[np.ndarray, np.ndarray]:
    """cos and sin of the U(1) table of :func:`proposal_table` (the same numbers, less overhead)."""
    # philox_uniform: numpy's Generator(Philox(key)).uniform draws, without the generator's set-up
    r = np.exp(1j * (eps * philox_uniform(np.uint64(key), -1.0, 1.0, TABLE_SIZE // 2)))
    re, im = r.real, r.imag
    return np.concatenate((re, re)), np.concatenate((im, -im))


def table_u3_packed(special: bool, eps: float, key) -> np.ndarray:
    """``pack_table3(*proposal_table(3, special, eps, key))`` built directly (the same numbers)."""
    r, w = _rotations(3, special, eps, key)
    half = TABLE_SIZE // 2
    out = np.empty((20, TABLE_SIZE))
    rt = np.swapaxes(r, 1, 2).reshape(half, 9)
    rf = r.reshape(half, 9)
    out[:9, :half] = rf.real.T
    out[9:18, :half] = rf.imag.T
    out[:9, half:] = rt.real.T
    out[9:18, half:] = -rt.imag.T
    if special:
        out[18] = 1.0
        out[19, :half] = 0.0
        out[19, half:] = -0.0
    else:
        d = np.exp(1j * eps * w.sum(axis=1))
        out[18, :half] = d.real
        out[18, half:] = d.real
        out[19, :half] = d.imag
        out[19, half:] = -d.imag
    return out


def apply(sim, name: str) -> tuple[int, int]:
    """Run update ``name`` over both colours of ``sim``; returns (accepted, tried)."""
    st = sim.state
    cfg = sim.config
    lat = sim.lattice
    nf = cfg.nf
    beta = cfg.beta
    hdiag = sim.hdiag
    kappa = cfg.kappa
    eta = cfg.eta
    seed = cfg.seed
    acc = 0
    tried = 0
    re, im, nbr = st.re, st.im, lat.neighbours
    if name == "metropolis":
        # loop invariants of the colour loop (the same expressions as before, so the same bits)
        if nf == 1:
            const = hdiag[0] + 2.0 * kappa * eta
            c1r, c1i = float(const.real), float(const.imag)
        elif nf == 3:
            k2 = 2.0 * kappa * eta
            k2r, k2i = float(k2.real), float(k2.imag)
    for colour in (0, 1):
        start = colour * lat.half
        stop = start + lat.half
        key = step_key(seed, st.step)
        if name == "metropolis":
            tkey = step_key(seed, st.step, _SALT_TABLE)
            if nf == 1:
                tc, ts = table_u1(st.step_size, tkey)
                acc += metropolis_u1(re[0], im[0], lat.row_neighbours, lat.row_parity, lat.row_len_half,
                                     colour, beta, c1r, c1i, tc, ts, cfg.metropolis_hits, key,
                                     rows_per_chunk(lat.row_len_half))
            elif nf == 3:
                acc += metropolis_u3(re, im, lat.row_neighbours, lat.row_parity, lat.row_len_half, colour,
                                     beta, hdiag, k2r, k2i, table_u3_packed(cfg.special, st.step_size, tkey),
                                     cfg.metropolis_hits, key, rows_per_chunk3(lat.row_len_half))
            else:
                table, tdet = proposal_table(nf, cfg.special, st.step_size, tkey)
                acc += metropolis(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta, table, tdet,
                                  cfg.metropolis_hits, key, sim.blocks)
            tried += lat.half * cfg.metropolis_hits
        elif name == "heatbath":
            if nf == 1:
                const = hdiag[0] + 2.0 * kappa * eta
                heatbath_u1(re[0], im[0], lat.row_neighbours, lat.row_parity, lat.row_len_half, colour,
                            beta, const.real, const.imag, key, rows_per_chunk(lat.row_len_half))
            else:
                a = heatbath(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta, cfg.special, key,
                             sim.blocks)
                if not cfg.special:
                    acc += a
                    tried += lat.half
        elif name == "overrelax":
            if nf == 1:
                const = hdiag[0] + 2.0 * kappa * eta
                overrelax_u1(re[0], im[0], lat.row_neighbours, lat.row_parity, lat.row_len_half, colour,
                             beta, const.real, const.imag, rows_per_chunk(lat.row_len_half))
            else:
                a = overrelax(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta, cfg.special, key,
                              sim.blocks)
                if not cfg.special:
                    acc += a
                    tried += lat.half
        else:  # pragma: no cover - config validation rejects it
            raise ValueError(name)
        st.step += 1
    return int(acc), int(tried)
