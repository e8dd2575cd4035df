"""Same config and seed give the same numbers: any thread count, and across a resume."""

import numpy as np
import pytest

from sigmasim.chain import simulate
from sigmasim.config import config_from_dict
from sigmasim.storage import open_run

from runfiles import (assert_same_contents, assert_thread_independent, contents, resume,
                      run_file)

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
    assert_thread_independent(_cfg(tmp_path, nf=nf, group=group))


@pytest.mark.parametrize("stop_at", [5, 20, 21, 33, 57])
def test_resumed_run_equals_uninterrupted_run(tmp_path, stop_at):
    full = _cfg(tmp_path / "a")
    assert run_file(full)
    part = _cfg(tmp_path / "b")
    assert not run_file(part, stop_at=stop_at)
    assert open_run(part.run_file).status == "interrupted"
    resume(part)
    a, b = contents(full.run_file), contents(part.run_file)
    assert_same_contents(a, b)
    assert b["status"] == "complete"


def test_same_seed_same_file_different_seed_differs(tmp_path):
    a = simulate(_cfg(tmp_path))
    b = simulate(_cfg(tmp_path))
    np.testing.assert_array_equal(a["action"], b["action"])
    c = simulate(config_from_dict({**_cfg(tmp_path).to_dict(), "seed": 100}))
    assert not np.array_equal(a["action"], c["action"])
