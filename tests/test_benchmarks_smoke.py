"""Smoke tests of benchmarks/independent_cost.py (tiny lattices) and benchmarks/scaling.py (a few seconds each)."""

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest

from runfiles import subprocess_env

ROOT = Path(__file__).resolve().parent.parent
SCRIPT = ROOT / "benchmarks" / "independent_cost.py"


def _run(*args, cwd):
    # the timeout only guards against a hang: a fresh numba cache compiles both models first
    return subprocess.run([sys.executable, str(SCRIPT), *args], cwd=cwd, capture_output=True,
                          text=True, timeout=900, env=subprocess_env())


def test_independent_cost_quick_tiny(tmp_path):
    p = _run("--quick", "--size", "4", "--budget", "2", "--results", str(tmp_path), cwd=tmp_path)
    assert p.returncode == 0, p.stderr
    files = list(tmp_path.glob("independent-cost-*.jsonl"))
    assert len(files) == 1
    rows = [json.loads(line) for line in files[0].read_text().splitlines()]
    assert [(d["model"], d["schedule"]) for d in rows] == [
        (m, s) for m in ("U1_d3", "U3_d3") for s in ("metropolis", "hb1+or3", "hb1+or1")]
    for d in rows:
        assert d["lattice"] == "4x4x4" and d["threads"] == 1
        assert d["sweeps"] >= 100
        assert d["cpu_seconds_per_sweep"] > 0 and d["tau_int"] > 0 and d["tau_int_err"] > 0
        # the documented convention: one independent sample costs 2 tau_int sweeps
        assert math.isclose(d["cpu_seconds_per_independent"],
                            2 * d["tau_int"] * d["cpu_seconds_per_sweep"], rel_tol=1e-12)
        assert 0 < d["abs_omega"] <= 1
        if d["tunnelling_events"]:
            assert d["sweeps_per_tunnelling_low"] < d["sweeps_per_tunnelling"] < d["sweeps_per_tunnelling_high"]
        elif d["model"] != "U1_d3":
            assert 0 < d["sweeps_per_tunnelling_lower_95"] < d["sweeps"]
    # the printed table has one row per chain
    table = [ln for ln in p.stdout.splitlines() if ln.startswith("| U")]
    assert len(table) == len(rows)


def test_independent_cost_bad_argument(tmp_path):
    p = _run("--models", "U9_d3", "--results", str(tmp_path), cwd=tmp_path)
    assert p.returncode == 2
    assert len(p.stderr.strip().splitlines()) == 1 and "U9_d3" in p.stderr
    assert not list(tmp_path.iterdir())


def test_scaling_one_short_repetition(tmp_path):
    """benchmarks/scaling.py runs end to end (no C, one short repetition) and writes its rows.

    It times 2 threads against 1, which only measures something with two idle cores: on a
    1-CPU machine or next to a busy core the test is skipped (a 2-thread sweep then waits for
    the scheduler at every colour update and the script takes minutes).
    """
    from sigmasim.threads import idle_cores

    if idle_cores() < 2:
        pytest.skip("needs two idle cores to time 2 threads against 1")
    script = ROOT / "benchmarks" / "scaling.py"
    p = subprocess.run([sys.executable, str(script), "--repeat", "1", "--seconds", "0.2", "--no-c",
                        "--results", str(tmp_path)], cwd=tmp_path, capture_output=True, text=True, timeout=900,
                       env=subprocess_env(NUMBA_NUM_THREADS=2))
    if "needs at least 2 CPUs" in p.stdout:
        pytest.skip("a 1-CPU machine: nothing to scale")
    assert p.returncode == 0, p.stderr
    rows = [json.loads(line) for f in tmp_path.glob("scaling-*.jsonl") for line in f.read_text().splitlines()]
    assert [(r["model"], r["update"]) for r in rows] == [("U1_d3", "metropolis"), ("U3_d3", "metropolis")]
    for r in rows:
        assert r["sigmasim_speedup"] > 0 and r["toy_vector_bound"] > 0 and "c_speedup" not in r
    assert "sigmasim median" in p.stdout


def test_scaling_unknown_case_is_one_line(tmp_path):
    script = ROOT / "benchmarks" / "scaling.py"
    p = subprocess.run([sys.executable, str(script), "--cases", "U2_d3:hbor,U2_d3:warp", "--no-c",
                        "--results", str(tmp_path)], cwd=tmp_path, capture_output=True, text=True, timeout=300,
                       env=subprocess_env(NUMBA_NUM_THREADS=2))
    if "needs at least 2 CPUs" in p.stdout:
        pytest.skip("a 1-CPU machine")
    assert p.returncode == 2
    assert len(p.stderr.strip().splitlines()) == 1 and "U2_d3:warp" in p.stderr
    assert not list(tmp_path.iterdir())


@pytest.fixture(scope="module")
def unf4(tmp_path_factory):
    """benchmarks/c/unf.c built for N = 4 as bench.py builds it (about 1 s); skips without a C compiler."""
    import os
    import shutil

    if shutil.which(os.environ.get("CC", "gcc")) is None:
        pytest.skip("no C compiler")
    sys.path.insert(0, str(ROOT))
    from benchmarks import bench

    return bench, bench.build_unf(tmp_path_factory.mktemp("unf"), [4])[4]


@pytest.mark.parametrize("h,kappa", [(0.1, 0.2), (1.5, 0.7)])
def test_unf_c_exact_one_site(unf4, h, kappa):
    """The C build bench.py compares nf = 4..6 with reproduces, at beta = 0, the exact one-site
    <S>/V and <Re Tr U>/N (sigmasim.exact; within 4 blocked errors).  About 0.5 s each (400 sweeps
    of 8^3, 1 hb + 3 or); no numba."""
    bench, exe = unf4
    m = dict(bench.UNF_MODELS["U4_d3"], mass=h, kappa=kappa)
    d = bench.unf_exact_check(exe, m, 400)
    assert d["action_per_site_err"] > 0 and d["retr_over_nf_err"] > 0
    assert abs(d["z_action"]) < 4, d
    assert abs(d["z_retr"]) < 4, d


def test_unf_c_bad_argument(unf4):
    _, exe = unf4
    p = subprocess.run([exe, "--L", "3"], capture_output=True, text=True, timeout=60,
                       env=subprocess_env())
    assert p.returncode == 2 and len(p.stderr.strip().splitlines()) == 1 and "--L" in p.stderr


@pytest.fixture
def icost(monkeypatch):
    """benchmarks/independent_cost.py as a module (its import sets NUMBA_NUM_THREADS=1: undone after)."""
    import os

    monkeypatch.setenv("NUMBA_NUM_THREADS", os.environ.get("NUMBA_NUM_THREADS", "1"))
    sys.path.insert(0, str(ROOT))
    from benchmarks import independent_cost

    return independent_cost


def _branch_series(ks, theta, nf, seed=5):
    """omega_h sitting on branch ks[i] at measurement i (phase (2 pi k + theta) / nf, small noise)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    ph = (2 * np.pi * np.asarray(ks) + theta) / nf + 0.05 * rng.normal(size=len(ks))
    return 0.3 * np.exp(1j * ph)


def test_tunnelling_times_interval_and_limit(icost):
    """Known answers: 4 changes in 1000 sweeps give 999 / 4 sweeps per change inside the inverted
    Garwood interval (Garwood, Biometrika 28 (1936) 437: for n = 4 the 68.27 % rate interval is
    [2.09, 7.16] / T, computed here from chi2); no change gives the 95 % lower limit T / ln(20)
    (= T / 3.0, the zero-event Poisson limit); nf = 1 gives '-'.  No numba; well under a second."""
    import numpy as np
    from scipy.stats import chi2

    ks = np.repeat([0, 1, 0, 2, 1], 200)
    d = icost.tunnelling_times(_branch_series(ks, 3.0, 3), 3.0, 3)
    t = 999.0
    assert d["tunnelling_events"] == 4
    assert d["sweeps_per_tunnelling"] == pytest.approx(t / 4)
    assert d["sweeps_per_tunnelling_low"] == pytest.approx(t / (chi2.ppf(0.5 + 0.6826894921370859 / 2, 10) / 2))
    assert d["sweeps_per_tunnelling_high"] == pytest.approx(t / (chi2.ppf(0.5 - 0.6826894921370859 / 2, 8) / 2))
    assert d["sweeps_per_tunnelling_low"] < t / 4 < d["sweeps_per_tunnelling_high"]
    row = dict(d, sweeps=1000, cpu_seconds_per_sweep=1e-3, cpu_seconds_per_tunnelling=t / 4 * 1e-3)
    text = icost._tunnel_text(row)
    assert text.startswith("250 [") and "(4" in text

    d0 = icost.tunnelling_times(_branch_series(np.zeros(1000, int), 3.0, 3), 3.0, 3)
    assert d0["tunnelling_events"] == 0 and d0["sweeps_per_tunnelling"] == float("inf")
    assert d0["sweeps_per_tunnelling_lower_95"] == pytest.approx(t / np.log(20.0))
    text0 = icost._tunnel_text(dict(d0, sweeps=1000, cpu_seconds_per_sweep=1e-3, cpu_seconds_per_tunnelling=np.inf))
    assert text0.startswith(f"> {t / np.log(20.0):.3g} (0 in 1000")

    d1 = icost.tunnelling_times(np.full(100, 0.5 + 0j), 3.0, 1)
    assert icost._tunnel_text(dict(d1, sweeps=100, cpu_seconds_per_sweep=1e-3,
                                   cpu_seconds_per_tunnelling=np.nan)) == "- | -"


def test_unf_c_layouts_same_chain(unf4):
    """unf.c's chunked update (the default, vectorised across sites) and its site-by-site one use the
    same draws and arithmetic: 3 heatbath sweeps, and one sweep of 1 heatbath + 3 overrelaxation,
    agree to rounding (the 6^3 lattice has a partial chunk).  Later the chains part, as any two
    roundings of a chaotic chain do (the overrelaxation and the accept thresholds amplify them).
    Well under a second."""
    import json

    _, exe = unf4
    for algo, sweeps in (("hb", 3), ("hbor", 1)):
        out = {}
        for layout in ("chunk", "site"):
            p = subprocess.run([exe, "--algo", algo, "--L", "6", "--sweeps", str(sweeps), "--therm", "0",
                                "--layout", layout], capture_output=True, text=True, timeout=60, check=True,
                               env=subprocess_env())
            out[layout] = json.loads(p.stdout)
        assert out["chunk"]["layout"] == "chunk" and out["site"]["layout"] == "site"
        assert out["chunk"]["acceptance"] == out["site"]["acceptance"], algo
        assert out["chunk"]["action_per_site"] == pytest.approx(out["site"]["action_per_site"], rel=1e-9, abs=0)
        assert out["chunk"]["retr_over_nf"] == pytest.approx(out["site"]["retr_over_nf"], rel=1e-8, abs=1e-12)
