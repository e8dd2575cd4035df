"""Same config and seed give the same numbers: any thread count, and across a resume."""

import numpy as np
import pytest

from sigmasim.chain import simulate
from sigmasim.config import config_from_dict
from sigmasim.storage import open_run

from sigmasim import models

from runfiles import (assert_same_contents, assert_thread_independent, contents, resume,
                      run_file, tiny_config_dict)

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


@pytest.mark.parametrize("kind", models.kinds())
def test_every_model_is_thread_independent(tmp_path, kind, tiny_config):
    assert_thread_independent(tiny_config(kind, nf=3, shape=(8, 4), output=str(tmp_path)))


@pytest.mark.parametrize("stop_at", [3, 11])
@pytest.mark.parametrize("kind", models.kinds())
def test_every_model_resumes_bit_identically(tmp_path, kind, stop_at):
    def cfg(sub):
        return config_from_dict(tiny_config_dict(kind, output=str(tmp_path / sub), checkpoint_every=3))

    full, part = cfg("a"), cfg("b")
    assert run_file(full)
    assert not run_file(part, stop_at=stop_at)
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


# ----------------------------------------------------------------------------- prepared one-call updates
def _sim(nf, algo, theta, kappa=0.3):
    from sigmasim.chain import make_simulation

    return make_simulation(config_from_dict({
        "name": "prep", "seed": 21, "lattice": {"shape": [4, 6, 4]},
        "model": {"nf": nf, "beta": 0.6, "mass": 0.4, "kappa": kappa, "theta": theta,
                  "theta_placement": "split"},
        "updates": {"schedule": [{"update": algo}]},
        "run": {"thermalize": 0, "measurements": 1, "start": "hot"}}))


@pytest.mark.parametrize("nf, algo", [(1, "metropolis"), (1, "heatbath"), (1, "overrelax"), (3, "metropolis")])
def test_prepared_update_follows_set_theta(nf, algo):
    """updates._one_call_update keeps its arguments between sweeps: after set_theta the chain must
    continue exactly as a simulation built at the new theta from the same state."""
    from dataclasses import replace

    a = _sim(nf, algo, 1.0)
    for _ in range(5):
        a.sweep()
    b = _sim(nf, algo, 2.5)
    b.state = replace(a.state, re=a.state.re.copy(), im=a.state.im.copy())
    a.set_theta(2.5)
    for _ in range(5):
        a.sweep()
        b.sweep()
    assert a.state.re.tobytes() == b.state.re.tobytes() and a.state.im.tobytes() == b.state.im.tobytes()
    # and the theta did act: the same 5 sweeps at the old theta give another field
    c = _sim(nf, algo, 1.0)
    for _ in range(10):
        c.sweep()
    assert c.state.re.tobytes() != a.state.re.tobytes()


@pytest.mark.parametrize("nf", [1, 3])
def test_prepared_update_follows_swapped_field_arrays(nf):
    """Replica exchange swaps the field arrays of two simulations: each sweep must then update the
    arrays its simulation holds now, and leave the other simulation's alone."""
    a, b = _sim(nf, "metropolis", 1.0), _sim(nf, "metropolis", 2.0)
    a.sweep()
    b.sweep()
    a.state.re, b.state.re = b.state.re, a.state.re
    a.state.im, b.state.im = b.state.im, a.state.im
    held_by_b = b.state.re.copy()
    before = a.state.re.copy()
    a.sweep()
    assert not np.array_equal(a.state.re, before)
    assert np.array_equal(b.state.re, held_by_b)
