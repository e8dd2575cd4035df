"""Scans on Dask: scan files, points, a real LocalCluster on loopback, failures, kills and resumes."""

import csv
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from runfiles import assert_same_contents, contents, subprocess_env
from sigmasim.cli import main
from sigmasim.run import execute_run
from sigmasim.config import config_from_dict
from sigmasim.errors import ConfigError
from sigmasim.scan import config_key, expand_points, load_scan, read_index

pytest.importorskip("distributed")

BASE = """
[lattice]
shape = [4, 4, 4]
[model]
nf = 3
beta = 1.0
mass = 0.2
kappa = 1.0
[updates]
schedule = [{update = "heatbath", repeat = 1}, {update = "overrelax", repeat = 1}]
[run]
thermalize = 20
measurements = MEAS
checkpoint_every = EVERY
"""

# 4 theta x 3 (seed, target acceptance): 12 points, the 4 with target_acceptance = 1.5 are bad parameters
GRID = """
[scan]
name = "grid"
output = "OUT"
[scan.product]
"model.theta" = {start = 2.8, stop = 3.4, num = 4}
[scan.zip]
seed = [1, 2, 3]
"updates.target_acceptance" = [0.5, 0.5, 1.5]
"""

# 4 longer points (about 2 s each) for the interruption tests
LONG = """
[scan]
name = "long"
output = "OUT"
[scan.product]
"model.theta" = [2.9, 3.3]
seed = [7, 8]
"""


def _scan_file(tmp_path, grid, out, meas=200, every=50, name="scan.toml"):
    text = grid.replace("OUT", str(out)) + BASE.replace("MEAS", str(meas)).replace("EVERY", str(every))
    p = tmp_path / name
    p.write_text(text)
    return p


def _rows(path):
    with open(path) as fh:
        return {r["key"]: r for r in csv.DictReader(fh)}


def _same_table(a, b):
    """Every column but the file path is identical (observables compared as exact float reprs)."""
    assert a.keys() == b.keys()
    for k in a:
        ra, rb = dict(a[k]), dict(b[k])
        ra.pop("file"), rb.pop("file")
        assert ra == rb, k


# ----------------------------------------------------------------------------
# scan files and points (no cluster)
# ----------------------------------------------------------------------------


def test_points_product_zip_labels_and_stable_keys(tmp_path):
    spec = load_scan(_scan_file(tmp_path, GRID, tmp_path / "o"))
    pts = expand_points(spec)
    assert len(pts) == 12
    assert [p.params["model.theta"] for p in pts[::3]] == pytest.approx([2.8, 3.0, 3.2, 3.4])
    assert [p.params["seed"] for p in pts[:3]] == [1, 2, 3]
    bad = [p for p in pts if p.raw is None]
    assert len(bad) == 4 and all("target_acceptance" in p.error for p in bad)
    good = [p for p in pts if p.raw is not None]
    assert len({p.key for p in good}) == 8
    assert good[0].name == f"theta2.8_seed1_target_acceptance0.5-{good[0].key}"
    # the key ignores where and how fast a run is written, and nothing else
    cfg = config_from_dict(good[0].raw)
    moved = dict(good[0].raw, run={**good[0].raw["run"], "output": "elsewhere", "threads": 2})
    assert config_key(config_from_dict(moved)) == config_key(cfg) == good[0].key
    longer = dict(good[0].raw, run={**good[0].raw["run"], "measurements": 201})
    assert config_key(config_from_dict(longer)) == good[0].key  # more measurements extend the point
    other = dict(good[0].raw, run={**good[0].raw["run"], "thermalize": 21})
    assert config_key(config_from_dict(other)) != good[0].key
    # stable across processes and sessions: a fixed config has a fixed key
    assert expand_points(load_scan(_scan_file(tmp_path, GRID, tmp_path / "o")))[0].key == good[0].key


@pytest.mark.parametrize("text, message", [
    ('[scan]\nretires = 2\n[scan.product]\nseed = [1]\n', "unknown key 'scan.retires' (did you mean 'retries'?)"),
    ('[scan]\n[scan.product]\n"model.thetta" = [1.0]\n', "unknown config key 'model.thetta'"),
    ('[scan]\n[scan.product]\n"modle.theta" = [1.0]\n', "unknown config section"),
    ('[scan]\n[scan.product]\nname = ["a"]\n', "set by the scan itself"),
    ('[scan]\n[scan.zip]\nseed = [1, 2]\n"model.theta" = [1.0]\n', "equal lengths"),
    ('[scan]\n[scan.product]\n"model.theta" = {start = 0, stop = 1}\n', "exactly one of num, step"),
    ('[scan]\n[scan.product]\n"model.theta" = {start = 0, stop = 1, num = 0}\n', "num must be"),
    ('[scan]\n[scan.product]\n"model.theta" = []\n', "is empty"),
    ('[scan]\nretries = -1\n[scan.product]\nseed = [1]\n', "scan.retries"),
    ('[scan]\n', "no axes"),
    ('[scan]\nbase = "missing.toml"\n[scan.product]\nseed = [1]\n', "missing.toml"),
])
def test_bad_scan_files_give_one_line(tmp_path, capsys, text, message):
    p = tmp_path / "bad.toml"
    p.write_text(text + "[lattice]\nshape = [4, 4]\n" if "base" not in text else text)
    assert main(["scan", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and message in err, err
    assert not (tmp_path / "runs").exists()


def test_run_refuses_a_scan_file_and_scan_refuses_run_flags(tmp_path, capsys):
    p = _scan_file(tmp_path, GRID, tmp_path / "o")
    assert main(["run", str(p)]) == 2
    assert "sigmasim scan" in capsys.readouterr().err
    assert main(["scan", str(p), "--param", "model.beta", "--values", "1"]) == 2
    assert "--param is for a run config" in capsys.readouterr().err
    assert main(["scan", str(p), "--workers", "0"]) == 2
    assert "--workers must be >= 1" in capsys.readouterr().err


@pytest.mark.parametrize("table", ["hysteresis", "sweep", "tempering", "lifetimes", "multicanonical"])
def test_base_with_a_protocol_table_is_refused(tmp_path, table):
    base = tmp_path / "base.toml"
    base.write_text(BASE.replace("MEAS", "10").replace("EVERY", "5") + f"\n[{table}]\n")
    s = tmp_path / "s.toml"
    s.write_text('[scan]\nbase = "base.toml"\n[scan.product]\nseed = [1, 2]\n')
    with pytest.raises(ConfigError, match=rf"base config has a \[{table}\] table: a scan runs plain runs only"):
        load_scan(s)


def test_base_file_and_ranges(tmp_path):
    base = tmp_path / "base.toml"
    base.write_text(BASE.replace("MEAS", "10").replace("EVERY", "5"))
    s = tmp_path / "s.toml"
    s.write_text('[scan]\nbase = "base.toml"\n[scan.product]\nseed = {start = 1, stop = 7, step = 3}\n'
                 '"model.mass" = {start = 0.1, stop = 0.3, step = 0.1}\n')
    spec = load_scan(s)
    assert spec.product["seed"] == [1, 4, 7]
    assert spec.product["model.mass"] == pytest.approx([0.1, 0.2, 0.3])
    assert spec.output == Path("runs") / "s"


# ----------------------------------------------------------------------------
# a real LocalCluster (2 workers on loopback)
# ----------------------------------------------------------------------------


def test_grid_with_failures_on_two_workers_equals_one_worker(tmp_path, capsys):
    out2, out1 = tmp_path / "two", tmp_path / "one"
    p2 = _scan_file(tmp_path, GRID, out2, name="two.toml")
    # a runtime failure inside a worker: a plain file where one point's run folder must go
    blocked = expand_points(load_scan(p2))[4]
    assert blocked.raw is not None
    (out2 / "points").mkdir(parents=True)
    (out2 / "points" / blocked.name).write_text("in the way")
    assert main(["scan", str(p2), "--workers", "2", "--quiet"]) == 1
    text = capsys.readouterr().out
    rows = _rows(out2 / "index.csv")
    status = {k: r["status"] for k, r in rows.items()}
    assert sum(s == "done" for s in status.values()) == 7
    assert sum(s == "failed" for s in status.values()) == 5
    assert status[blocked.key] == "failed" and rows[blocked.key]["error"]
    assert "failed: theta3_seed2_target_acceptance0.5" in text
    bad = [r for r in rows.values() if r["updates.target_acceptance"] == "1.5"]
    assert all(r["status"] == "failed" and "target_acceptance" in r["error"] for r in bad)
    done = [r for r in rows.values() if r["status"] == "done"]
    assert all(math.isfinite(float(r["abs_omega"])) and float(r["abs_omega_err"]) > 0 for r in done)
    # rerun: finished points are skipped (their files untouched), the unblocked one runs
    first = next(r for r in done)
    mtime = os.stat(first["file"]).st_mtime_ns
    (out2 / "points" / blocked.name).unlink()
    assert main(["scan", str(p2), "--workers", "2", "--quiet"]) == 1  # the bad parameters still fail
    rows = _rows(out2 / "index.csv")
    assert sum(r["status"] == "done" for r in rows.values()) == 8
    assert os.stat(first["file"]).st_mtime_ns == mtime
    # raising run.measurements extends every point from its file (the others' numbers unchanged)
    p3 = tmp_path / "more.toml"
    p3.write_text(p2.read_text().replace("measurements = 200", "measurements = 260"))
    assert main(["scan", str(p3), "--workers", "2", "--quiet"]) == 1
    more = _rows(out2 / "index.csv")
    assert all(more[k]["n_measurements"] == "260" for k in more if more[k]["status"] == "done")
    assert sum(r["status"] == "done" for r in more.values()) == 8
    with h5py.File(first["file"], "r") as f:
        extended = f["series/action"][:200]
    # the same scan on one worker gives the same table, bit for bit
    p1 = _scan_file(tmp_path, GRID, out1, name="one.toml")
    assert main(["scan", str(p1), "--workers", "1", "--quiet"]) == 1
    _same_table(_rows(out1 / "index.csv"), rows)
    with h5py.File(out1 / "points" / Path(first["file"]).parent.name / Path(first["file"]).name, "r") as f:
        np.testing.assert_array_equal(f["series/action"][...], extended)  # extension continued the chain
    h5 = read_index(out1 / "index.h5")
    assert list(h5["key"]) == list(rows)
    np.testing.assert_array_equal(h5["abs_omega"], [float(r["abs_omega"]) for r in rows.values()])
    # --collect writes the same index without running anything; --plot draws a column
    assert main(["scan", str(p1), "--collect", "--plot", "im_omega_h", "--quiet"]) == 1
    assert (out1 / "index-im_omega_h.png").stat().st_size > 0
    _same_table(_rows(out1 / "index.csv"), rows)


@pytest.fixture(scope="module")
def long_reference(tmp_path_factory):
    """The LONG grid run one point after another in this process, uninterrupted."""
    tmp = tmp_path_factory.mktemp("ref")
    spec = load_scan(_scan_file(tmp, LONG, tmp / "out", meas=5000, every=250))
    for p in expand_points(spec):
        execute_run(config_from_dict(p.raw), quiet=True)
    assert main(["scan", str(spec.path), "--collect", "--quiet"]) == 0
    return spec


def _start(scan_path, workers=2):
    env = subprocess_env(PYTHONUNBUFFERED="1")
    return subprocess.Popen([sys.executable, "-m", "sigmasim", "scan", str(scan_path), "--workers", str(workers)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                            start_new_session=True)


def _wait_for_progress(out: Path, proc, min_meas=500, timeout=120):
    """Wait until some point has checkpointed at least ``min_meas`` measurements (and is not finished)."""
    import h5py

    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        assert proc.poll() is None, proc.communicate()
        for f in sorted(out.glob("points/*/*.h5")):
            try:
                with h5py.File(f, "r") as h:
                    if h.attrs["status"] == "running" and h.attrs["n_meas"] >= min_meas:
                        return f
            except (OSError, KeyError):
                pass
        time.sleep(0.1)
    raise AssertionError("no point made progress")


def _assert_equal_to_reference(spec, ref):
    _same_table(_rows(spec.output / "index.csv"), _rows(ref.output / "index.csv"))
    for p, q in zip(expand_points(spec), expand_points(ref)):
        assert p.key == q.key
        assert_same_contents(contents(spec.output / "points" / p.name / f"{p.name}.h5"),
                             contents(ref.output / "points" / q.name / f"{q.name}.h5"))


def test_killed_worker_is_replaced_and_the_scan_finishes_bit_identical(tmp_path, long_reference):
    import psutil

    spec = load_scan(_scan_file(tmp_path, LONG, tmp_path / "out", meas=5000, every=250))
    proc = _start(spec.path)
    try:
        _wait_for_progress(spec.output, proc)
        workers = []
        for _ in range(50):  # a worker busy with a point (not one between two points)
            workers = [c for c in psutil.Process(proc.pid).children(recursive=True)
                       if "spawn_main" in " ".join(c.cmdline()) and c.cpu_percent(interval=0.1) > 5]
            if workers:
                break
        assert workers, "no busy worker process found"
        workers[0].send_signal(signal.SIGKILL)  # a worker dies mid-run
        proc.wait(timeout=300)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    # the scheduler re-ran the lost point from its checkpoint; a rerun finds nothing left to do
    assert main(["scan", str(spec.path), "--workers", "2", "--quiet"]) == 0
    _assert_equal_to_reference(spec, long_reference)


def test_interrupted_scan_stops_resumably_and_the_rerun_is_bit_identical(tmp_path, long_reference):
    spec = load_scan(_scan_file(tmp_path, LONG, tmp_path / "out", meas=5000, every=250))
    proc = _start(spec.path)
    try:
        _wait_for_progress(spec.output, proc)
        proc.send_signal(signal.SIGINT)  # Ctrl-C in the client
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert proc.returncode == 130, err
    assert "every point is resumable" in err
    rows = _rows(spec.output / "index.csv")
    assert any(r["status"] != "done" for r in rows.values())
    assert main(["scan", str(spec.path), "--workers", "2", "--quiet"]) == 0
    _assert_equal_to_reference(spec, long_reference)


def test_example_scan_file_expands_to_valid_points():
    spec = load_scan(Path(__file__).resolve().parents[1] / "runs" / "scan-theta-volume.toml")
    pts = expand_points(spec)
    assert len(pts) == 16 and all(p.raw is not None for p in pts)
    assert spec.output == Path("runs") / "scan-theta-volume"


def test_embedded_cluster_listens_on_loopback_only(tmp_path):
    import psutil

    from sigmasim.cluster import cores as _cores
    from sigmasim.scan import make_client

    spec = load_scan(_scan_file(tmp_path, GRID, tmp_path / "o"))
    client, cluster, threads = make_client(spec, workers=1)
    try:
        info = client.scheduler_info()
        assert all(a.startswith("tcp://127.0.0.1:") for a in [cluster.scheduler_address, *info["workers"]])
        me = psutil.Process()
        listening = [c.laddr for p in [me, *me.children(recursive=True)]
                     for c in p.net_connections(kind="inet") if c.status == psutil.CONN_LISTEN]
        assert len(listening) >= 3  # scheduler, its HTTP server, the worker (and its nanny)
        assert all(a.ip == "127.0.0.1" for a in listening), listening
        assert threads == _cores()  # one worker: every core to its run's numba threads
    finally:
        client.close()
        cluster.close()


def test_a_second_scan_on_the_same_output_is_refused_and_a_stale_lock_taken_over(tmp_path, capsys):
    import socket

    from sigmasim.scan import LOCK_FILE, _take_lock

    spec = load_scan(_scan_file(tmp_path, GRID, tmp_path / "o"))
    (spec.output / "points").mkdir(parents=True)
    lock = spec.output / LOCK_FILE
    lock.write_text(f"{socket.gethostname()} {os.getpid()}")  # a live scan: this process
    assert main(["scan", str(spec.path), "--workers", "1"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "another scan" in err and str(lock) in err
    assert not list((spec.output / "points").iterdir())  # nothing was run
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, env=subprocess_env()).stdout.strip()
    lock.write_text(f"{socket.gethostname()} {dead}")  # left by a scan that was killed
    assert _take_lock(spec) == lock and lock.read_text() == f"{socket.gethostname()} {os.getpid()}"
