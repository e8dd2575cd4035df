"""One writer per run file and per scan folder.

A run (fresh, ``--resume`` or ``--overwrite``) holds an exclusive lock on ``<name>.h5.lock`` for
its whole life; a second process on the same file is refused with one line naming the holder's
host and pid, and never touches the file or the holder's checkpoint copy. ``scan.lock`` is the
same lock: processes that try to take it at the same instant get it exactly once.
"""

import multiprocessing as mp
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from sigmasim.cli import main
from sigmasim.config import config_from_dict
from sigmasim.storage import RunWriter, checkpoint_leftovers
from runfiles import assert_one_line_error, contents, subprocess_env

ROOT = Path(__file__).resolve().parents[1]

# nf = 2 on 8 x 4: small, but slow enough per checkpoint (checkpoint_every = 1) that a second
# process starts while the first is still writing
CFG = """
name = "lk"
seed = 5
[lattice]
shape = [8, 4]
[model]
nf = 2
beta = 0.6
mass = 0.3
kappa = 0.2
[run]
thermalize = 5
measurements = {meas}
checkpoint_every = 1
threads = 1
"""


def lock_path(target):
    return target.with_name(target.name + ".lock")



def _cmd(cfg, out, *extra):
    return [sys.executable, "-m", "sigmasim", "run", str(cfg), "--output", str(out), "--quiet", *extra]


def _one_line(err):
    assert_one_line_error(err)


def _holder_script(lock, seconds=60):
    """A process that holds ``lock`` (as a run would) until killed; prints 'held' once it does."""
    return [sys.executable, "-c",
            "import sys, time; from sigmasim.storage import take_lock; "
            f"take_lock({str(lock)!r}, 'sigmasim process', 'x'); print('held', flush=True); "
            f"time.sleep({seconds})"]


def test_a_second_writer_of_a_run_file_is_refused_naming_the_holder(tmp_path, capsys):
    cfg = tmp_path / "lk.toml"
    cfg.write_text(CFG.format(meas=10))
    out = tmp_path / "o"
    target = out / "lk" / "lk.h5"
    target.parent.mkdir(parents=True)
    holder = subprocess.Popen(_holder_script(lock_path(target)), stdout=subprocess.PIPE, text=True,
                              env=subprocess_env(), cwd=ROOT)
    try:
        assert holder.stdout.readline().strip() == "held"
        for extra in ([], ["--overwrite"], ["--resume"]):
            if extra == ["--resume"]:
                target.write_bytes(b"")  # something to resume: the lock is refused before reading it
            rc = main(["run", str(cfg), "--output", str(out), "--quiet", *extra])
            err = capsys.readouterr().err
            assert rc == 2, (extra, err)
            _one_line(err)
            assert f"pid {holder.pid}" in err and socket.gethostname() in err, err
        assert target.read_bytes() == b""  # untouched
        assert not checkpoint_leftovers(target)
    finally:
        holder.kill()
        holder.wait()
    # the holder died without releasing: the kernel released its flock, a run proceeds
    target.unlink()
    assert main(["run", str(cfg), "--output", str(out), "--quiet"]) == 0
    assert not lock_path(target).exists()


def test_two_resumes_at_once_one_wins_and_the_file_equals_an_uninterrupted_run(tmp_path):
    """The issue's repro: start, stop, then two --resume at the same moment."""
    cfg = tmp_path / "lk.toml"
    cfg.write_text(CFG.format(meas=60))
    ref = subprocess.run(_cmd(cfg, tmp_path / "ref"), capture_output=True, text=True, env=subprocess_env(), cwd=ROOT,
                         timeout=600)
    assert ref.returncode == 0, ref.stderr
    want = contents(tmp_path / "ref" / "lk" / "lk.h5")
    out = tmp_path / "o"
    target = out / "lk" / "lk.h5"
    first = subprocess.Popen(_cmd(cfg, out), stderr=subprocess.PIPE, text=True, env=subprocess_env(), cwd=ROOT)
    while first.poll() is None and not target.exists():
        time.sleep(0.005)
    first.terminate()  # SIGTERM: checkpoint and stop
    first.communicate(timeout=120)
    assert first.returncode == 130
    procs = [subprocess.Popen(_cmd(cfg, out, "--resume"), stderr=subprocess.PIPE, text=True, env=subprocess_env(),
                              cwd=ROOT) for _ in range(2)]
    errs = [p.communicate(timeout=600)[1] for p in procs]
    codes = sorted(p.returncode for p in procs)
    # either both ran one after the other (the first finished before the second looked), or one was
    # refused; never both at once
    assert codes in ([0, 0], [0, 2]), (codes, errs)
    for p, err in zip(procs, errs):
        if p.returncode == 2:
            _one_line(err)
            assert "another sigmasim process" in err and "pid" in err, err
    got = contents(target)
    assert got.keys() == want.keys()
    for key in want:
        np.testing.assert_array_equal(got[key], want[key], err_msg=key)
    assert not lock_path(target).exists() and not checkpoint_leftovers(target)


def _race(lock, start, queue):
    from types import SimpleNamespace

    from sigmasim.scan import _take_lock

    while time.time() < start:
        pass
    try:
        _take_lock(SimpleNamespace(output=lock.parent))
        queue.put(1)
        time.sleep(0.3)  # keep it while the others try
    except Exception:
        queue.put(0)


@pytest.mark.parametrize("leftover", ["none", "empty"])
def test_processes_taking_one_lock_at_the_same_instant_get_it_once(tmp_path, leftover):
    """The old scan.lock: an empty lock file read as stale and check-then-remove in two steps let
    two processes take it at once."""
    ctx = mp.get_context("fork")
    lock = tmp_path / "scan.lock"
    rounds, procs_per_round, doubles = 8, 4, 0
    for _ in range(rounds):
        if leftover == "empty":
            lock.write_text("")
        q = ctx.Queue()
        start = time.time() + 0.3
        ps = [ctx.Process(target=_race, args=(lock, start, q)) for _ in range(procs_per_round)]
        for p in ps:
            p.start()
        for p in ps:
            p.join(30)
        won = sum(q.get(timeout=5) for _ in ps)
        doubles += won != 1
    assert doubles == 0, f"{doubles} of {rounds} rounds had more or fewer than one holder"


def test_scan_lock_at_library_level_is_exclusive_and_released(tmp_path):
    from sigmasim.errors import RunFileError
    from sigmasim.storage import release_lock, take_lock

    lock = tmp_path / "scan.lock"
    got = take_lock(lock, "scan", tmp_path)
    with pytest.raises(RunFileError, match="another scan"):
        take_lock(lock, "scan", tmp_path)  # the same process twice: still refused
    release_lock(got)
    assert not lock.exists()
    release_lock(take_lock(lock, "scan", tmp_path))


def test_a_stale_lock_file_of_a_killed_process_does_not_block(tmp_path, capsys):
    cfg = tmp_path / "lk.toml"
    cfg.write_text(CFG.format(meas=4))
    out = tmp_path / "o"
    target = out / "lk" / "lk.h5"
    target.parent.mkdir(parents=True)
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, env=subprocess_env()).stdout.strip()
    lock_path(target).write_text(f"{socket.gethostname()} {dead}")
    assert main(["run", str(cfg), "--output", str(out), "--quiet"]) == 0, capsys.readouterr().err
    cfg_obj = config_from_dict({"name": "lk", "lattice": {"shape": [8, 4]}, "run": {"output": str(out)}})
    assert cfg_obj.run_file == target


def test_a_held_scan_lock_whose_file_is_still_empty_is_not_taken_over(tmp_path):
    """The moment between creating the lock file and writing host and pid into it: the old lock read
    the empty file as stale and removed it, so two scans held it."""
    from types import SimpleNamespace

    from sigmasim.errors import RunFileError
    from sigmasim.scan import LOCK_FILE, _take_lock

    spec = SimpleNamespace(output=tmp_path)
    lock = tmp_path / LOCK_FILE
    script = ("import sys, time; from types import SimpleNamespace; from sigmasim.scan import _take_lock; "
              f"p = _take_lock(SimpleNamespace(output=__import__('pathlib').Path({str(tmp_path)!r}))); "
              "open(p, 'w').close(); print('held', flush=True); time.sleep(60)")
    holder = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, text=True, env=subprocess_env(),
                              cwd=ROOT)
    try:
        assert holder.stdout.readline().strip() == "held"
        assert lock.exists() and lock.read_text() == ""
        with pytest.raises(RunFileError, match="another scan"):
            _take_lock(spec)
    finally:
        holder.kill()
        holder.wait()
    from sigmasim.storage import release_lock

    release_lock(_take_lock(spec))  # free once the holder is gone


def test_a_lock_file_naming_a_reused_pid_of_another_program_does_not_block(tmp_path, capsys):
    """After a kill -9 the lock file stays; its pid may later belong to an unrelated program."""
    cfg = tmp_path / "lk.toml"
    cfg.write_text(CFG.format(meas=2))
    out = tmp_path / "o"
    target = out / "lk" / "lk.h5"
    target.parent.mkdir(parents=True)
    other = subprocess.Popen(["sleep", "60"], env=subprocess_env())
    try:
        lock_path(target).write_text(f"{socket.gethostname()} {other.pid}")
        assert main(["run", str(cfg), "--output", str(out), "--quiet"]) == 0, capsys.readouterr().err
    finally:
        other.kill()
        other.wait()


def test_checkpoint_copies_are_named_per_process_and_leftovers_go_at_resume(tmp_path, capsys):
    """Issue: every writer used ``<name>.h5.tmp``; now the copy is ``<name>.h5.<pid>.tmp`` and a
    resume (holding the lock) removes the copies that dead writers left, old name included."""
    cfg = tmp_path / "lk.toml"
    cfg.write_text(CFG.format(meas=6))
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--output", str(out), "--quiet"]) == 0
    target = out / "lk" / "lk.h5"
    w = RunWriter(config_from_dict({"name": "lk", "model": {"nf": 2}, "lattice": {"shape": [8, 4]}}),
                  target)
    assert w.tmp.name == f"lk.h5.{os.getpid()}.tmp"
    dead = [target.with_name("lk.h5.tmp"), target.with_name("lk.h5.999999.tmp"),
            target.with_name("lk.h5.999999.new")]
    for p in dead:
        p.write_bytes(b"half a checkpoint")
    target.with_name("lk.h5.backup").write_bytes(b"not ours")  # not a checkpoint copy: kept
    assert checkpoint_leftovers(target) == sorted(dead)
    cfg.write_text(CFG.format(meas=8))
    capsys.readouterr()
    assert main(["run", str(cfg), "--output", str(out), "--quiet", "--resume"]) == 0
    assert checkpoint_leftovers(target) == []
    assert target.with_name("lk.h5.backup").read_bytes() == b"not ours"


def test_the_demo_never_removes_a_run_file_that_a_process_is_writing(tmp_path, capsys):
    """The demo replaces its own earlier files; it used to unlink them without the run lock."""
    target = tmp_path / "demo-theta-2.600" / "demo-theta-2.600.h5"
    target.parent.mkdir(parents=True)
    target.write_bytes(b"being written")
    holder = subprocess.Popen(_holder_script(lock_path(target)), stdout=subprocess.PIPE, text=True,
                              env=subprocess_env(), cwd=ROOT)
    try:
        assert holder.stdout.readline().strip() == "held"
        rc = main(["demo", "--output", str(tmp_path), "--quiet"])
        err = capsys.readouterr().err
        assert rc == 2, err
        _one_line(err)
        assert f"pid {holder.pid}" in err
        assert target.read_bytes() == b"being written"
    finally:
        holder.kill()
        holder.wait()
