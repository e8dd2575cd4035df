"""Every parallel kernel forks the thread team once per call.

Inside ``parallel=True`` numba turns ``np.zeros``, ``a.sum()``, ``a.max()`` and array
expressions into parallel loops of their own; each is one more fork and join of the
thread team.  On the benchmark's U(1) 32^3 Metropolis sweep (about 140 microseconds on
one thread) five regions per colour update instead of one cost the 2-thread speed-up
1.59x -> 1.72x (measured with the interleaved timing of ``benchmarks/bench.py``).  The
check runs numba's front end up to its parfor passes (no LLVM code generation, about a
second per kernel) on the argument types of real calls, and counts the parallel loops
left at the top level of each kernel.  Common practice, no source.
"""

from __future__ import annotations

import importlib

import numpy as np
import pytest
from numba import typeof
from numba.core import types
from numba.core.compiler import CompilerBase, DefaultPassBuilder, Flags
from numba.core.compiler_lock import global_compiler_lock
from numba.core.cpu import ParallelOptions
from numba.core.registry import CPUDispatcher, cpu_target
from numba.parfors.parfor import Parfor

from sigmasim.chain import make_simulation
from sigmasim.config import config_from_dict

MODULES = ["sigmasim.kernels.u1", "sigmasim.kernels.u3", "sigmasim.kernels.unf", "sigmasim.kernels.general",
           "sigmasim.kernels.measure", "sigmasim.kernels.linear"]


class _UpToParfors(CompilerBase):
    """numba's nopython pipeline cut after its last parfor pass (before lowering)."""

    def define_pipelines(self):
        pm = DefaultPassBuilder.define_nopython_pipeline(self.state)
        names = [p[0].__name__ for p in pm.passes]
        cut = max(i for i, n in enumerate(names) if n.startswith("Parfor") and "Lowering" not in n)
        pm.passes = pm.passes[:cut + 1]
        pm.finalize()
        return [pm]


def _parallel_regions(disp, argtypes) -> list[int]:
    """Source lines of the top-level parallel loops of ``disp`` compiled for ``argtypes``."""
    flags = Flags()
    flags.auto_parallel = ParallelOptions(True)
    flags.nrt = True
    flags.error_model = disp.targetoptions.get("error_model", "python")
    with global_compiler_lock:
        pipe = _UpToParfors(cpu_target.typing_context, cpu_target.target_context, None,
                            tuple(argtypes), None, flags, {})
        try:
            pipe.compile_extra(disp.py_func)
        except Exception:  # the cut pipeline has no lowering to finish with; the IR is what we need
            pass
    ir = pipe.state.func_ir
    return sorted(s.loc.line for blk in ir.blocks.values() for s in blk.body if isinstance(s, Parfor))


def _parallel_kernels():
    out = {}
    for name in MODULES:
        mod = importlib.import_module(name)
        for attr, obj in vars(mod).items():
            if isinstance(obj, CPUDispatcher) and obj.targetoptions.get("parallel") and obj.__module__ == name:
                out[f"{name.rsplit('.', 1)[1]}.{attr}"] = obj
    return out


def _exercise_all_kernels():
    """Call every parallel kernel once on a small lattice, so each has the argument types of a real call."""
    base = {"name": "regions", "seed": 3, "run": {"thermalize": 10, "measurements": 1}}
    algos = {"schedule": [{"update": "metropolis"}, {"update": "heatbath"}, {"update": "overrelax"}]}
    cases = [
        ({"nf": 1, "beta": 0.5, "mass": 0.1}, [4, 4, 4]),
        ({"nf": 1, "beta": 0.5, "mass": 0.1}, [8]),  # d = 1 measures through the neighbour table
        ({"nf": 3, "beta": 0.5, "mass": 0.1, "kappa": 0.2}, [4, 4, 4]),
        ({"nf": 2, "beta": 0.5, "mass": 0.1, "kappa": 0.2}, [4, 4]),
        ({"nf": 4, "beta": 0.5, "mass": 0.1, "kappa": 0.2}, [4, 4]),  # the generic Metropolis
        ({"kind": "linear", "nf": 2, "beta": 0.5, "mass": 0.1}, [4, 4]),
    ]
    for model, shape in cases:
        sim = make_simulation(config_from_dict(dict(base, model=model, lattice={"shape": shape},
                                                    updates=algos)))
        for _ in range(10):
            sim.sweep()
        sim.measure()
    # the nf = 1 kernels and the nf = 3 Metropolis are called from numba code (one call per
    # update), which does not record their signatures on the dispatcher: call each once directly
    from sigmasim.kernels.tables import phase_table
    from sigmasim.kernels.u1 import _local_u1, metropolis_u1, rows_per_chunk
    from sigmasim.kernels.u3 import metropolis_u3, rotation_tables3, rows_per_chunk3
    from sigmasim.updates import table_u3_packed

    for nf, k in ((1, metropolis_u1), (3, metropolis_u3)):
        sim = make_simulation(config_from_dict(dict(base, model={"nf": nf, "beta": 0.5, "mass": 0.1},
                                                    lattice={"shape": [4, 4, 4]})))
        st, lat = sim.state, sim.lattice
        h = lat.row_len_half
        if nf == 1:
            tc, ts = phase_table(0.5, np.uint64(5), 16)
            k(st.re[0], st.im[0], lat.row_neighbours, lat.row_parity, h, 0, 0.5, 0.1, 0.0, tc, ts, 1,
              np.uint64(3), rows_per_chunk(h), 2)
            # heatbath_u1/overrelax_u1 pass a constant flag, so numba compiles _local_u1 for the
            # literals True and False; a call from Python (flag typed bool) would compile a third
            # variant that no run uses: record (or load from the cache) the two the runs compile
            args = (st.re[0], st.im[0], lat.row_neighbours, lat.row_parity, h, 0, 0.5, 0.1, 0.0,
                    np.uint64(3), rows_per_chunk(h), 2)
            for reflect in (False, True):
                _local_u1.compile(tuple(typeof(a) for a in args) + (types.literal(reflect),))
        else:
            k(st.re, st.im, lat.row_neighbours, lat.row_parity, h, 0, 0.5, sim.hdiag, 0.0, 0.0,
              table_u3_packed(False, 0.3, 5), 2, np.uint64(3), rows_per_chunk3(h), 2)
            tabs = np.empty((2, 20, 16))
            rotation_tables3(False, 0.3, np.array([5, 6], dtype=np.uint64), tabs, 2)
            assert np.array_equal(tabs[0], table_u3_packed(False, 0.3, 5))
    # the nf >= 2 heatbath/overrelaxation run as unf.local_unf (called from numba); the per-site
    # kernels of general.py stay as the reference
    from sigmasim.kernels.general import heatbath, overrelax
    from sigmasim.kernels.unf import local_unf

    sim = make_simulation(config_from_dict(dict(base, model={"nf": 3, "beta": 0.5, "mass": 0.1},
                                                lattice={"shape": [4, 4, 4]})))
    st, lat = sim.state, sim.lattice
    for hb in (False, True):
        local_unf(st.re, st.im, lat.row_neighbours, lat.row_parity, lat.row_len_half, 0, 3, 0.5, sim.hdiag,
                  0.1, 0.0, False, hb, np.uint64(3), rows_per_chunk3(lat.row_len_half), 2, False)
    for k in (heatbath, overrelax):
        k(st.re, st.im, lat.neighbours, 0, lat.half, 3, 0.5, sim.hdiag, 0.2, 1.0 + 0j, False, np.uint64(4), 2)
    from sigmasim.kernels.unf import metropolis_u2

    sim = make_simulation(config_from_dict(dict(base, model={"nf": 2, "beta": 0.5, "mass": 0.1},
                                                lattice={"shape": [4, 4, 4]})))
    st, lat = sim.state, sim.lattice
    metropolis_u2(st.re, st.im, lat.row_neighbours, lat.row_parity, lat.row_len_half, 0, 0.5, sim.hdiag, 0.0, 0.0,
                  np.zeros((10, 16)), 2, np.uint64(3), rows_per_chunk3(lat.row_len_half), 2)


_exercised = False


@pytest.fixture(scope="module")
def kernels():
    global _exercised
    if not _exercised:
        _exercise_all_kernels()
        _exercised = True
    return _parallel_kernels()


def test_every_parallel_kernel_is_exercised(kernels):
    missing = [name for name, k in kernels.items() if not k.signatures]
    assert not missing, f"no call recorded for {missing}: extend _exercise_all_kernels"
    assert len(kernels) >= 14


def _general_signature(disp) -> list:
    """The recorded signature with the fewest constant (literal or omitted) arguments, literals widened
    to their types: numba prunes the branches a constant rules out, which could hide a region."""
    sig = min(disp.signatures, key=lambda s: sum(isinstance(t, (types.Literal, types.Omitted)) for t in s))
    return [types.unliteral(t) for t in sig]


@pytest.mark.parametrize("name", sorted(_parallel_kernels()))
def test_one_parallel_region_per_kernel(kernels, name):
    disp = kernels[name]
    lines = _parallel_regions(disp, _general_signature(disp))
    assert len(lines) == 1, (f"{name} forks the thread team {len(lines)} times per call (parallel loops "
                             f"at lines {lines}); use sigmasim.kernels.serial for allocations and reductions")


def test_the_check_sees_hidden_regions():
    """The counter itself: a reduction and a zeros array beside the prange are two more regions."""
    from numba import njit, prange

    @njit(parallel=True)
    def three(a, nblk):
        acc = np.zeros(nblk, dtype=np.int64)
        for blk in prange(nblk):
            n = 0
            for i in range(blk, a.shape[0], nblk):
                n += a[i] > 0.0
            acc[blk] = n
        return acc.sum()

    assert len(_parallel_regions(three, (types.float64[::1], types.int64))) == 3
