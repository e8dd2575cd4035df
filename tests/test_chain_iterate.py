"""chain.iterate: the one chain loop (measure and checkpoint cadence, stop, finiteness checks)."""

import numpy as np
import pytest

from sigmasim.chain import Interrupted, MemorySink, Simulation, iterate, run_chain, simulate
from sigmasim.config import config_from_dict
from sigmasim.errors import NumericalError


def _cfg(**run):
    return config_from_dict({
        "name": "it", "seed": 9, "lattice": {"shape": [4, 2]},
        "model": {"nf": 1, "beta": 0.5, "mass": 0.2},
        "updates": {"schedule": [{"update": "heatbath"}]},
        "run": {"thermalize": 3, "measurements": 4, "measure_every": 2, "checkpoint_every": 4, **run}})


def test_cadence_of_measurements_and_checkpoints():
    steps = list(iterate(Simulation(_cfg())))
    assert [s.sweep for s in steps] == list(range(1, 12))
    assert [s.sweep for s in steps if s.record is not None] == [5, 7, 9, 11]
    assert [s.sweep for s in steps if s.checkpoint] == [4, 8]
    assert not any(s.stop for s in steps)
    assert all(s.record["sweep"] == s.sweep for s in steps if s.record is not None)


def test_until_and_measure_due_override_the_config():
    sim = Simulation(_cfg())
    steps = list(iterate(sim, until=5, measure_due=lambda sweep: True, checkpoint_every=10**9))
    assert [s.sweep for s in steps] == [1, 2, 3, 4, 5] and all(s.record is not None for s in steps)
    assert not any(s.checkpoint for s in steps) and sim.state.sweep == 5
    # continuing to a later sweep picks up where it stopped
    assert [s.sweep for s in iterate(sim, until=7)] == [6, 7]


def test_stop_gives_a_last_checkpoint_step_and_ends():
    sim = Simulation(_cfg())
    steps = list(iterate(sim, should_stop=lambda: sim.state.sweep == 6))
    assert steps[-1].sweep == 6 and steps[-1].stop and steps[-1].checkpoint
    assert sim.state.sweep == 6
    # a stop request at the last sweep checkpoints but does not stop: the chain is finished
    sim = Simulation(_cfg())
    last = list(iterate(sim, should_stop=lambda: sim.state.sweep == 11))[-1]
    assert last.sweep == 11 and last.checkpoint and not last.stop


def test_run_chain_is_iterate_fed_to_sinks():
    a = MemorySink()
    run_chain(Simulation(_cfg()), (a,))
    b = [s.record for s in iterate(Simulation(_cfg())) if s.record is not None]
    assert len(a.records) == len(b) == 4
    for r, q in zip(a.records, b):
        assert r.keys() == q.keys()
        for k in r:
            np.testing.assert_array_equal(r[k], q[k])
    sim = Simulation(_cfg())
    with pytest.raises(Interrupted):
        run_chain(sim, (), should_stop=lambda: sim.state.sweep == 2)
    assert sim.state.sweep == 2


def test_non_finite_field_is_never_checkpointed():
    sim = Simulation(_cfg())
    seen = []
    with pytest.raises(NumericalError, match="non-finite field after sweep 3 at site"):
        for step in iterate(sim):
            seen.append(step.sweep)
            if step.sweep == 3:
                sim.state.re[0, 5] = np.nan
    assert seen == [1, 2, 3]


def test_simulate_still_matches_a_plain_loop():
    cfg = _cfg()
    d = simulate(cfg)
    sim = Simulation(cfg)
    for _ in range(cfg.thermalize):
        sim.sweep()
    recs = []
    for _ in range(cfg.measurements):
        for _ in range(cfg.measure_every):
            sim.sweep()
        recs.append(sim.measure())
    np.testing.assert_array_equal(d["action"], [r["action"] for r in recs])


def test_state_field_starts_where_the_vector_loads_want_it():
    # re on a 4096-byte boundary, im 2048 bytes past one (chain.field_array): whole-cache-line
    # vector loads and no shared L1 sets between re's and im's rows; always a copy, same values.
    from sigmasim.chain import ChainState
    rng = np.random.default_rng(3)
    re = rng.normal(size=(4, 64))[:, :48]  # not contiguous, and numpy's own placement
    im = rng.normal(size=(4, 48)).astype(np.float32)
    st = ChainState(re, im)
    assert st.re.ctypes.data % 4096 == 0 and st.im.ctypes.data % 4096 == 2048
    assert st.re.flags.c_contiguous and st.im.flags.c_contiguous
    assert st.re.dtype == np.float64 and st.im.dtype == np.float64
    assert np.array_equal(st.re, re) and np.array_equal(st.im, im.astype(np.float64))
    assert not np.shares_memory(st.re, re)
    cfg = config_from_dict({"name": "a", "seed": 1, "lattice": {"shape": [4, 4]},
                            "model": {"nf": 2, "beta": 0.5, "mass": 0.1, "kappa": 0.2, "theta": 1.0},
                            "run": {"thermalize": 0, "measurements": 1, "start": "hot"}})
    sim = Simulation(cfg)
    assert sim.state.re.ctypes.data % 4096 == 0 and sim.state.im.ctypes.data % 4096 == 2048
