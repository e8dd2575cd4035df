"""Python side of the update algorithms: keys, proposal tables, kernel choice.

Each update is ``apply(sim, name) -> (accepted, tried)`` over both colours;
``tried`` counts the proposals whose acceptance is recorded (Metropolis hits,
or U(1) phase moves of the U(nf) heatbath/overrelaxation, where the
determinant term is accept/rejected).  Adding an update means a kernel in
``sigmasim/kernels`` and a branch in :func:`apply`.
"""

from __future__ import annotations

import numpy as np
from numba import get_num_threads

from sigmasim.kernels.general import heatbath, metropolis, overrelax
from sigmasim.kernels.tables import phase_table, rotation_table
from sigmasim.kernels.u1 import heatbath_u1, metropolis_u1_update, overrelax_u1, rows_per_chunk
from sigmasim.kernels.u3 import metropolis_u3_update, pack_table3, rows_per_chunk3
from sigmasim.rng import mix64_int, step_key

__all__ = ["apply", "proposal_table", "TABLE_SIZE"]

TABLE_SIZE = 16  # 8 rotations near 1 and their inverses
_SALT_TABLE = 0x5EED


def proposal_table(nf: int, special: bool, eps: float, key) -> tuple[np.ndarray, np.ndarray]:
    """A symmetric table of Metropolis rotations near 1 and their inverses.

    nf = 1: phases e^{i eps u}, u uniform in (-1, 1); nf >= 2: Cayley transforms of
    Gaussian Hermitian matrices (traceless for SU(nf)), see :mod:`sigmasim.kernels.tables`.  Returns ``(table, det)``,
    complex128 arrays (TABLE_SIZE, nf, nf) and (TABLE_SIZE,).
    """
    half = TABLE_SIZE // 2
    if nf == 1:
        rng = np.random.Generator(np.random.Philox(int(key)))
        ang = eps * rng.uniform(-1.0, 1.0, size=half)
        r = np.exp(1j * ang)
        table = np.concatenate([r, r.conj()]).reshape(TABLE_SIZE, 1, 1)
        return table, table[:, 0, 0].copy()
    table = np.empty((TABLE_SIZE, nf, nf), dtype=np.complex128)
    dets = np.empty(TABLE_SIZE, dtype=np.complex128)
    rotation_table(nf, special, float(eps), np.uint64(key), table, dets)
    return table, dets


def table_u1(eps: float, key) -> tuple[np.ndarray, np.ndarray]:
    """cos and sin of the U(1) table of :func:`proposal_table` (the same numbers, less overhead)."""
    # philox_uniform inside: numpy's Generator(Philox(key)).uniform draws, without its set-up
    return phase_table(float(eps), np.uint64(key), TABLE_SIZE)


def table_u3_packed(special: bool, eps: float, key) -> np.ndarray:
    """``pack_table3(*proposal_table(3, special, eps, key))``: the layout the nf = 3 kernel reads."""
    return pack_table3(*proposal_table(3, special, eps, key))


def _fast_metropolis_args(sim):
    """(kernel, arguments before the step size, arguments after it but the step counter and the
    thread count) of the one-call nf = 1, 3 Metropolis update.

    They depend on the config, the lattice and the field arrays only, so they are built again only
    when one of those objects changes (:meth:`Simulation.set_theta` makes a new config object,
    replica exchange swaps the field arrays) instead of once per sweep: on a sweep of 100
    microseconds the Python work of assembling them, done serially between the parallel
    regions, cost as much as a tenth of the sweep.  The thread count (the block count of the
    kernel) is read at each call, it may change between sweeps.
    """
    cfg, lat, st = sim.config, sim.lattice, sim.state
    re, im = st.re, st.im
    key = (cfg, sim.hdiag, lat, re, im)
    cached = getattr(sim, "_fast_args", None)
    if cached is not None and all(a is b for a, b in zip(cached[0], key)):
        return cached[1]
    h = lat.row_len_half
    seed_hash = np.uint64(mix64_int(cfg.seed))
    k2 = 2.0 * cfg.kappa * cfg.eta
    if cfg.nf == 1:
        const = sim.hdiag[0] + k2
        args = (metropolis_u1_update,
                (re[0], im[0], lat.row_neighbours, lat.row_parity, h, float(cfg.beta), float(const.real),
                 float(const.imag)),
                (seed_hash, _SALT_TABLE, cfg.metropolis_hits, rows_per_chunk(h)))
    else:
        args = (metropolis_u3_update,
                (re, im, lat.row_neighbours, lat.row_parity, h, float(cfg.beta), sim.hdiag, float(k2.real),
                 float(k2.imag), bool(cfg.special)),
                (seed_hash, _SALT_TABLE, cfg.metropolis_hits, rows_per_chunk3(h)))
    sim._fast_args = (key, args)
    return args


def apply(sim, name: str) -> tuple[int, int]:
    """Run update ``name`` over both colours of ``sim``; returns (accepted, tried)."""
    st = sim.state
    cfg = sim.config
    lat = sim.lattice
    nf = cfg.nf
    if name == "metropolis" and nf in (1, 3):
        # both colours, their keys and proposal tables in one numba call: no serial Python work
        # between the parallel regions (the same numbers as the per-colour path below)
        kernel, head, tail = _fast_metropolis_args(sim)
        acc = kernel(*head, float(st.step_size), tail[0], st.step, *tail[1:], get_num_threads())
        st.step += 2
        return int(acc), 2 * lat.half * cfg.metropolis_hits
    beta = cfg.beta
    hdiag = sim.hdiag
    kappa = cfg.kappa
    eta = cfg.eta
    seed = cfg.seed
    acc = 0
    tried = 0
    re, im = st.re, st.im
    for colour in (0, 1):
        start = colour * lat.half
        stop = start + lat.half
        key = step_key(seed, st.step)
        if name == "metropolis":
            tkey = step_key(seed, st.step, _SALT_TABLE)
            table, tdet = proposal_table(nf, cfg.special, st.step_size, tkey)
            acc += metropolis(re, im, lat.neighbours, start, stop, nf, beta, hdiag, kappa, eta, table, tdet,
                              cfg.metropolis_hits, key, sim.blocks)
            tried += lat.half * cfg.metropolis_hits
        elif name == "heatbath":
            if nf == 1:
                const = hdiag[0] + 2.0 * kappa * eta
                heatbath_u1(re[0], im[0], lat.row_neighbours, lat.row_parity, lat.row_len_half, colour,
                            beta, const.real, const.imag, key, rows_per_chunk(lat.row_len_half),
                            get_num_threads())
            else:
                a = heatbath(re, im, lat.neighbours, start, stop, nf, beta, hdiag, kappa, eta, cfg.special, key,
                             sim.blocks)
                if not cfg.special:
                    acc += a
                    tried += lat.half
        elif name == "overrelax":
            if nf == 1:
                const = hdiag[0] + 2.0 * kappa * eta
                overrelax_u1(re[0], im[0], lat.row_neighbours, lat.row_parity, lat.row_len_half, colour,
                             beta, const.real, const.imag, rows_per_chunk(lat.row_len_half),
                             get_num_threads())
            else:
                a = overrelax(re, im, lat.neighbours, start, stop, nf, beta, hdiag, kappa, eta, cfg.special, key,
                              sim.blocks)
                if not cfg.special:
                    acc += a
                    tried += lat.half
        else:  # pragma: no cover - config validation rejects it
            raise ValueError(name)
        st.step += 1
    return int(acc), int(tried)
