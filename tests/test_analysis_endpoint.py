"""Endpoint of the first-order line from cumulant crossings: synthetic curves with a known crossing,
and a tiny real smoke run through run files."""

import numpy as np
import pytest

from sigmasim.analysis.endpoint import (CumulantPoint, cumulant_crossing, cumulant_points,
                                        format_endpoint)
from sigmasim.chain import Simulation, run_chain
from sigmasim.config import config_from_dict
from sigmasim.errors import ConfigError
from sigmasim.storage import RunWriter

BETAS = np.round(np.arange(0.70, 0.851, 0.025), 4)


def synthetic(beta_c, err, rng, sizes=(4, 6, 8)):
    """B_L(beta) = 2 - tanh(4 L (beta - beta_c)): 3 on the crossover side, 1 on the first-order side,
    every pair crossing exactly at beta_c; Gaussian noise of the stated error."""
    return [CumulantPoint(L, float(b), 2 - np.tanh(4 * L * (b - beta_c)) + err * rng.normal(), err, 1000)
            for L in sizes for b in BETAS]


def test_crossing_recovers_a_known_endpoint_with_honest_errors():
    rng = np.random.default_rng(0)
    beta_c, reps = 0.765, 100
    pulls = []
    for r in range(reps):
        res = cumulant_crossing(synthetic(beta_c, 0.03, rng), n_samples=300, seed=r)
        assert [(c.L1, c.L2) for c in res.crossings] == [(4, 6), (4, 8), (6, 8)]
        pulls.append((res.beta_c - beta_c) / res.beta_c_error)
    pulls = np.array(pulls)
    assert np.all(np.isfinite(pulls))
    # unbiased within the spread of the replica mean; the resampled error is honest to ~15-20 %
    # (linear interpolation on a curved difference; measured width 0.84 here: a little conservative)
    assert abs(pulls.mean()) < 4 * pulls.std(ddof=1) / np.sqrt(reps)
    assert 0.7 < pulls.std(ddof=1) < 1.15, pulls.std(ddof=1)
    text = format_endpoint(res)
    assert "endpoint of the first-order line: beta_c = " in text and "L = 6, 8" in text


def test_no_crossing_is_said():
    rng = np.random.default_rng(1)
    res = cumulant_crossing(synthetic(0.95, 0.01, rng))   # endpoint beyond the grid: all crossover side
    assert np.isnan(res.beta_c) and "no crossing" in format_endpoint(res)


def write(folder, name, shape, beta, theta=np.pi, n=150):
    cfg = config_from_dict({
        "name": name, "seed": 3, "lattice": {"shape": list(shape)},
        "model": {"nf": 3, "beta": beta, "mass": 0.5, "kappa": 2.0, "theta": theta},
        "run": {"thermalize": 20, "measurements": n, "start": "hot", "output": str(folder),
                "threads": 1},
    })
    cfg.run_dir.mkdir(parents=True, exist_ok=True)
    run_chain(Simulation(cfg), (RunWriter(cfg, cfg.run_file),))
    return cfg.run_file


def test_smoke_real_runs(tmp_path):
    paths = [write(tmp_path, f"e{L}-{b}", (L, L, L), b) for L in (2, 4) for b in (0.3, 1.5)]
    pts = cumulant_points(paths, discard=0.2)
    assert sorted((p.L, p.beta) for p in pts) == [(2, 0.3), (2, 1.5), (4, 0.3), (4, 1.5)]
    for p in pts:
        assert p.n == 120 and 1.0 <= p.binder < 6 and p.binder_error > 0
    res = cumulant_crossing(pts)
    assert len(res.crossings) == 1
    assert "Research toy" in format_endpoint(res)
    other = write(tmp_path, "odd", (2, 2, 2), 0.3, theta=3.0)
    with pytest.raises(ConfigError, match="theta"):
        cumulant_points(paths + [other])
