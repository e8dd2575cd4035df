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
    assert [r["model"] for r in rows] == ["U1_d3", "U3_d3"]
    for r in rows:
        assert r["sigmasim_speedup"] > 0 and r["toy_vector_bound"] > 0 and "c_speedup" not in r
    assert "sigmasim median" in p.stdout



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
    p = subprocess.run([exe, "--L", "3"], capture_output=True, text=True, timeout=60)
    assert p.returncode == 2 and len(p.stderr.strip().splitlines()) == 1 and "--L" in p.stderr
