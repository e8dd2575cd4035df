"""Same config and seed give the same numbers: any thread count, and across a resume."""

import h5py
import numba
import numpy as np
import pytest

from sigmasim.chain import Interrupted, Simulation, run_chain, simulate
from sigmasim.config import config_from_dict
from sigmasim.storage import RunWriter, open_run, read_state

SCHEDULES = {
    "mixed": [{"update": "metropolis"}, {"update": "heatbath"}, {"update": "overrelax", "repeat": 2}],
}


def _cfg(tmp_path, nf=3, group="U", shape=(8, 4, 4), **run):
    return config_from_dict({
        "name": "repro",
        "seed": 99,
        "lattice": {"shape": list(shape)},
        "model": {"nf": nf, "group": group, "beta": 0.5, "mass": [0.2, 0.1, -0.1][:nf] if nf <= 3 else 0.2,
                  "kappa": 0.4, "theta": 2.9},
        "updates": {"schedule": SCHEDULES["mixed"], "reunitarize_every": 3, "tune_every": 5},
        "run": {"thermalize": 20, "measurements": 30, "measure_every": 2, "start": "hot",
                "output": str(tmp_path), "checkpoint_every": 7, **run},
    })


@pytest.mark.parametrize("nf, group", [(1, "U"), (3, "U"), (2, "SU"), (5, "U")])
def test_thread_count_does_not_change_the_chain(tmp_path, nf, group):
    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.skip("needs at least 2 threads")
    cfg = _cfg(tmp_path, nf=nf, group=group)
    old = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = simulate(cfg)
        numba.set_num_threads(2)
        two = simulate(cfg)
    finally:
        numba.set_num_threads(old)
    assert one.keys() == two.keys()
    for k in one:
        np.testing.assert_array_equal(one[k], two[k], err_msg=k)


def _run_file(cfg, stop_at=None):
    sim = Simulation(cfg)
    writer = RunWriter(cfg, cfg.run_file)
    cfg.run_dir.mkdir(parents=True, exist_ok=True)
    try:
        run_chain(sim, (writer,), should_stop=lambda: stop_at is not None and sim.state.sweep == stop_at)
    except Interrupted:
        writer.interrupted(sim)
        return False
    return True


def _resume(cfg):
    sim = Simulation(cfg, read_state(cfg.run_file, cfg))
    run_chain(sim, (RunWriter(cfg, cfg.run_file, resume=True),))


def _contents(path):
    out = {}
    with h5py.File(path, "r") as f:
        for group in ("series", "slices", "state"):
            for k, d in f[group].items():
                out[f"{group}/{k}"] = d[...]
        for k, v in f["state"].attrs.items():
            out[f"state@{k}"] = v
        out["status"] = f.attrs["status"]
    return out


@pytest.mark.parametrize("stop_at", [5, 20, 21, 33, 57])
def test_resumed_run_equals_uninterrupted_run(tmp_path, stop_at):
    full = _cfg(tmp_path / "a")
    assert _run_file(full)
    part = _cfg(tmp_path / "b")
    assert not _run_file(part, stop_at=stop_at)
    assert open_run(part.run_file).status == "interrupted"
    _resume(part)
    a, b = _contents(full.run_file), _contents(part.run_file)
    assert a.keys() == b.keys()
    for k in a:
        np.testing.assert_array_equal(a[k], b[k], err_msg=k)
    assert b["status"] == "complete"


def test_same_seed_same_file_different_seed_differs(tmp_path):
    a = simulate(_cfg(tmp_path))
    b = simulate(_cfg(tmp_path))
    np.testing.assert_array_equal(a["action"], b["action"])
    c = simulate(config_from_dict({**_cfg(tmp_path).to_dict(), "seed": 100}))
    assert not np.array_equal(a["action"], c["action"])
