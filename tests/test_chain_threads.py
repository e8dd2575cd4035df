"""The thread-count default (``run.threads = 0``): one thread on small lattices, never more than the idle cores."""

import numba
import pytest

from sigmasim import threads
from sigmasim.cli import main
from sigmasim.config import config_from_dict

SMALL = """
name = "small"
seed = 3
[lattice]
shape = [16, 16]
[model]
nf = 1
beta = 0.5
mass = 0.1
theta = 1.0
[run]
thermalize = 2
measurements = 3
"""


@pytest.mark.parametrize("sites", [0, 1, 128, threads.CROSSOVER_SITES - 1])
@pytest.mark.parametrize("load", [0.0, 0.9, 7.0])
def test_small_lattices_use_one_thread_whatever_the_load(sites, load):
    assert threads.auto_threads(sites, load=load, cores=8) == 1


@pytest.mark.parametrize("cores, load, want", [
    (2, 0.0, 2), (2, 0.3, 2), (2, 0.6, 1), (2, 1.2, 1), (2, 5.0, 1),  # 2 cores: the machine
    (8, 2.4, 6), (8, 0.0, 8), (8, 12.0, 1), (1, 0.0, 1),
])
def test_large_lattices_use_the_idle_cores(cores, load, want):
    assert threads.auto_threads(threads.CROSSOVER_SITES, load=load, cores=cores) == want
    assert threads.auto_threads(None, load=load, cores=cores) == want


def test_a_positive_request_overrides_and_is_capped():
    assert threads.choose_threads(3, 10, load=9.0, cores=2) == 3  # run.threads wins over size and load
    assert threads.choose_threads(3, 10, available=2) == 2         # but not above numba's maximum
    assert threads.choose_threads(0, 10**9, load=0.0, cores=4, available=2) == 2


def test_os_readings_are_sane():
    assert 1 <= threads.idle_cores() <= threads.usable_cores()


@pytest.fixture
def recorded(monkeypatch):
    """numba.set_num_threads as seen on a 4-core machine with one core busy."""
    calls = []
    monkeypatch.setattr(numba.config, "NUMBA_NUM_THREADS", 4)
    monkeypatch.setattr(numba, "set_num_threads", calls.append)
    monkeypatch.setattr(threads, "usable_cores", lambda: 4)
    monkeypatch.setattr(threads.os, "getloadavg", lambda: (1.0, 1.0, 1.0))
    return calls


def test_run_of_a_small_config_uses_one_thread(tmp_path, recorded):
    cfg = tmp_path / "small.toml"
    cfg.write_text(SMALL)
    assert main(["run", str(cfg), "--output", str(tmp_path), "--quiet"]) == 0
    assert recorded == [1]


def test_run_threads_overrides_the_default(tmp_path, recorded):
    cfg = tmp_path / "small.toml"
    cfg.write_text(SMALL.replace("[run]", "[run]\nthreads = 2"))
    assert main(["run", str(cfg), "--output", str(tmp_path), "--quiet"]) == 0
    assert main(["run", str(cfg), "--output", str(tmp_path), "--quiet", "--overwrite", "--threads", "3"]) == 0
    assert recorded == [2, 3]


def test_the_threshold_counts_the_matrix_size():
    # measured on 2 idle cores (benchmarks/threads_crossover.py): U(3) 8^3 (256 sites per colour x 9)
    # gains 1.2x, U(1) 8^3 (256 x 1) and U(3) 6^3 (108 x 9) lose (0.95x)
    assert threads.auto_threads(8**3 // 2, 3, load=0.0, cores=2) == 2
    assert threads.auto_threads(8**3 // 2, 1, load=0.0, cores=2) == 1
    assert threads.auto_threads(6**3 // 2, 3, load=0.0, cores=2) == 1
    assert threads.auto_threads(16**3 // 2, 1, load=0.0, cores=2) == 2


def test_protocols_and_large_lattices_follow_the_same_rule(recorded):
    from sigmasim.protocols.common import _set_threads

    raw = {"lattice": {"shape": [256, 256]}, "model": {"nf": 1}}  # 32768 sites per colour
    _set_threads(config_from_dict(raw))
    _set_threads(config_from_dict({**raw, "lattice": {"shape": [16, 16]}}))
    _set_threads(config_from_dict({**raw, "run": {"threads": 4}}))
    assert recorded == [3, 1, 4]  # 4 cores, load 1: three idle


def test_every_test_subprocess_gets_the_one_thread_environment():
    """Each subprocess.run/Popen call in the tests passes env=subprocess_env(...) (tests/runfiles.py)."""
    import ast
    from pathlib import Path

    missing = []
    for path in sorted(Path(__file__).parent.glob("test_*.py")):
        for node in ast.walk(ast.parse(path.read_text())):
            if (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
                    and isinstance(node.func.value, ast.Name) and node.func.value.id == "subprocess"
                    and node.func.attr in ("run", "Popen", "call", "check_call", "check_output")):
                env = [k.value for k in node.keywords if k.arg == "env"]
                ok = env and (isinstance(env[0], ast.Name) and env[0].id == "env"
                              or isinstance(env[0], ast.Call) and getattr(env[0].func, "id", "") == "subprocess_env")
                if not ok:
                    missing.append(f"{path.name}:{node.lineno}")
    assert not missing, f"subprocess calls without env=subprocess_env(): {missing}"
