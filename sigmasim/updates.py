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
from sigmasim.kernels.u1 import (
    heatbath_u1_update,
    metropolis_u1_update,
    overrelax_u1_update,
    rows_per_chunk,
)
from sigmasim.kernels.u3 import metropolis_u3_update, pack_table3, rows_per_chunk3
from sigmasim.kernels.unf import local_unf_update, metropolis_u2_update
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


def _one_call_update(sim, name):
    """A function ``state -> (accepted, tried)`` that runs update ``name`` on both colours in one
    numba call (keys and proposal tables built inside), or None where there is no such kernel
    (nf = 1, the heatbath and overrelaxation for nf >= 2, and Metropolis for nf = 2, 3 have one).

    Its fixed arguments depend on the config, the lattice and the field arrays only, so it is
    built again only when one of those objects changes (:meth:`Simulation.set_theta` makes a new
    config object, replica exchange swaps the field arrays) instead of once per sweep: on a
    sweep of 100 microseconds the Python work of assembling them, done serially between the
    parallel regions, cost as much as a tenth of the sweep.  The step size, the step counter
    and the thread count (the kernel's block count; it may change between sweeps) are read at
    each call.  The numbers are those of the per-colour kernels with keys and tables built in
    Python (``tests/test_rows.py``).
    """
    cfg, lat, st = sim.config, sim.lattice, sim.state
    re, im = st.re, st.im
    key = (cfg, sim.hdiag, lat, re, im)
    cached = getattr(sim, "_fast_args", None)
    if cached is None or not all(a is b for a, b in zip(cached[0], key)):
        cached = sim._fast_args = (key, {})
    made = cached[1]
    if name in made:
        return made[name]
    nf = cfg.nf
    h = lat.row_len_half
    seed_hash = np.uint64(mix64_int(cfg.seed))
    k2 = 2.0 * cfg.kappa * cfg.eta
    nbr = (lat.row_neighbours, lat.row_parity, h)
    fn = None
    if nf == 1:
        const = sim.hdiag[0] + k2
        head = (re[0], im[0], *nbr, float(cfg.beta), float(const.real), float(const.imag))
        rows = rows_per_chunk(h)
        if name == "metropolis":
            hits = cfg.metropolis_hits
            tried = 2 * lat.half * hits

            def fn(st):
                acc = metropolis_u1_update(*head, float(st.step_size), seed_hash, st.step, _SALT_TABLE, hits,
                                           rows, get_num_threads())
                st.step += 2
                return int(acc), tried
        elif name in ("heatbath", "overrelax"):
            kernel = heatbath_u1_update if name == "heatbath" else overrelax_u1_update

            def fn(st):
                kernel(*head, seed_hash, st.step, rows, get_num_threads())
                st.step += 2
                return 0, 0
    elif nf == 3 and name == "metropolis":
        head = (re, im, *nbr, float(cfg.beta), sim.hdiag, float(k2.real), float(k2.imag), bool(cfg.special))
        hits = cfg.metropolis_hits
        rows = rows_per_chunk3(h)
        tried = 2 * lat.half * hits

        def fn(st):
            acc = metropolis_u3_update(*head, float(st.step_size), seed_hash, st.step, _SALT_TABLE, hits, rows,
                                       get_num_threads())
            st.step += 2
            return int(acc), tried
    elif nf == 2 and name == "metropolis":
        head = (re, im, *nbr, float(cfg.beta), sim.hdiag, float(k2.real), float(k2.imag), bool(cfg.special))
        hits = cfg.metropolis_hits
        rows = rows_per_chunk3(h)
        tried = 2 * lat.half * hits

        def fn(st):
            acc = metropolis_u2_update(*head, float(st.step_size), seed_hash, st.step, _SALT_TABLE, hits, rows,
                                       get_num_threads())
            st.step += 2
            return int(acc), tried
    elif nf >= 2 and name in ("heatbath", "overrelax"):
        head = (re, im, *nbr, nf, float(cfg.beta), sim.hdiag, float(k2.real), float(k2.imag), bool(cfg.special),
                name == "heatbath")
        rows = rows_per_chunk3(h)
        tried = 0 if cfg.special else 2 * lat.half

        def fn(st):
            acc = local_unf_update(*head, seed_hash, st.step, rows, get_num_threads(), False)
            st.step += 2
            return int(acc), tried
    made[name] = fn
    return fn


def apply(sim, name: str) -> tuple[int, int]:
    """Run update ``name`` over both colours of ``sim``; returns (accepted, tried)."""
    fast = _one_call_update(sim, name)
    if fast is not None:
        return fast(sim.state)
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
        elif name in ("heatbath", "overrelax"):  # nf >= 2 (nf = 1 takes the one-call kernels above)
            kernel = heatbath if name == "heatbath" else overrelax
            a = kernel(re, im, lat.neighbours, start, stop, nf, beta, hdiag, kappa, eta, cfg.special, key,
                       sim.blocks)
            if not cfg.special:
                acc += a
                tried += lat.half
        else:  # pragma: no cover - config validation rejects it
            raise ValueError(name)
        st.step += 1
    return int(acc), int(tried)
