"""SIGKILL at random moments: a resumed run is bit-identical, no kill leaves an unreadable file.

Real runs (``python -m sigmasim run CFG --output DIR --quiet``) are killed with
SIGKILL at moments drawn from a fixed seed: some before the first checkpoint,
some at random moments of the run, and some exactly while a checkpoint is
being written (the harness polls for ``<name>.h5.<pid>.tmp`` and kills as soon as it
appears).  The killed run's resume is killed again in every episode, so the
chain crosses two crashes.  After every kill:

- the run file, if there is one, opens with :func:`sigmasim.storage.open_run`;
- a ``<name>.h5.<pid>.tmp`` never exists without the run file beside it;
- at most one checkpoint interval of work is lost (roughly: the stored sweep
  against the progress expected from the reference run's speed);
- with no run file, ``--resume`` says 'nothing to resume' and a fresh run works.

At the end of every episode ``--resume`` completes the run and every /series,
/slices and /state dataset and the /state attributes equal, bit for bit, those
of an uninterrupted run of the same config and seed.
"""

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from sigmasim.storage import checkpoint_leftovers, open_run

from runfiles import contents, subprocess_env

ROOT = Path(__file__).resolve().parents[1]
CHECKPOINT_EVERY = 4
THERMALIZE = 5
MEASUREMENTS = 80
TOTAL = THERMALIZE + MEASUREMENTS

# nf = 3 on 16 x 8 x 8: a run file of a few MB, so a checkpoint (copy, append, fsync, rename)
# takes long enough to be hit; about two seconds of sweeps on a loaded 2-core machine.
CONFIG = f"""
name = "crash"
seed = 2718
[lattice]
shape = [16, 8, 8]
[model]
nf = 3
beta = 0.6
mass = [0.3, 0.2, -0.1]
kappa = 0.5
theta = 2.5
[updates]
schedule = [{{update = "heatbath"}}, {{update = "overrelax"}}, {{update = "metropolis"}}]
reunitarize_every = 3
tune_every = 2
[run]
thermalize = {THERMALIZE}
measurements = {MEASUREMENTS}
checkpoint_every = {CHECKPOINT_EVERY}
checkpoint_seconds = 1000.0
start = "hot"
"""


def _cmd(cfg, out, *extra):
    return [sys.executable, "-m", "sigmasim", "run", str(cfg), "--output", str(out), "--quiet", *extra]


def _run(cfg, out, *extra, timeout=300):
    return subprocess.run(_cmd(cfg, out, *extra), capture_output=True, text=True, timeout=timeout,
                          cwd=ROOT, env=subprocess_env())


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    base = tmp_path_factory.mktemp("crash")
    cfg = base / "crash.toml"
    cfg.write_text(CONFIG)
    # warm the numba cache (cache=True) so that compile time does not distort the kill moments
    warm = _run(cfg, base / "warm", timeout=600)
    assert warm.returncode == 0, warm.stderr
    out = base / "ref"
    target = out / "crash" / "crash.h5"
    t0 = time.monotonic()
    p = subprocess.Popen(_cmd(cfg, out), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT,
                         env=subprocess_env())
    t_file = None
    while p.poll() is None:
        if t_file is None and target.exists():
            t_file = time.monotonic()
        time.sleep(0.002)
    t_end = time.monotonic()
    _, err = p.communicate()
    assert p.returncode == 0, err
    assert t_file is not None
    rate = TOTAL / max(t_end - t_file, 1e-3)  # sweeps per second, checkpoints included
    return {"cfg": cfg, "base": base, "file": contents(target), "startup": t_file - t0,
            "run_time": t_end - t_file, "rate": rate}


class _Leftover:
    """The run's checkpoint copies in the making (``crash.h5.<pid>.tmp``), whichever process writes them."""

    def __init__(self, target):
        self.target = target

    def exists(self) -> bool:
        # the copies of a checkpoint (.tmp); a first file is built as <name>.h5.<pid>.new instead
        return any(p.name.endswith(".tmp") for p in checkpoint_leftovers(self.target))


class _Watched:
    """A run subprocess watched every ~2 ms: when the run file was last switched, and its sweep."""

    def __init__(self, cfg, out, *extra):
        self.target = out / "crash" / "crash.h5"
        self.tmp = _Leftover(self.target)
        # a resumed run starts from a file it did not write: only a switch by this process counts
        # (t_switch is the time of this process's last checkpoint, None before its first)
        try:
            st = os.stat(self.target)
            self.inode = (st.st_ino, st.st_mtime_ns)
        except FileNotFoundError:
            self.inode = None
        self.t_switch = None
        self.t0 = time.monotonic()
        self.proc = subprocess.Popen(_cmd(cfg, out, *extra), stdout=subprocess.PIPE,
                                     stderr=subprocess.PIPE, text=True, cwd=ROOT, env=subprocess_env())
        self.tmp_seen = 0
        self._tmp_now = False

    def poll(self):
        try:
            st = os.stat(self.target)
        except FileNotFoundError:
            st = None
        if st is not None and (st.st_ino, st.st_mtime_ns) != self.inode:
            self.inode = (st.st_ino, st.st_mtime_ns)
            self.t_switch = time.monotonic()
        tmp = self.tmp.exists()
        if tmp and not self._tmp_now:
            self.tmp_seen += 1
        self._tmp_now = tmp
        return self.proc.poll() is None

    def kill(self):
        self.proc.send_signal(signal.SIGKILL)
        t = time.monotonic()
        self.proc.communicate(timeout=60)
        return t


def _kill_at(w: _Watched, mode: str, rng: random.Random, ref, sweep: int = 0) -> dict:
    """Kill ``w`` (which starts from ``sweep``) according to ``mode``; returns what was seen."""
    remaining = max(TOTAL - max(sweep, 0), 1)
    if mode == "early":
        at = w.t0 + rng.uniform(0.05, 0.9) * ref["startup"]
        while w.poll() and time.monotonic() < at:
            time.sleep(0.002)
    elif mode == "checkpoint":
        nth = rng.randint(1, max(1, min(4, remaining // CHECKPOINT_EVERY - 1)))
        deadline = time.monotonic() + 120
        while w.poll() and time.monotonic() < deadline:
            if w._tmp_now and w.tmp_seen >= nth:
                break
            time.sleep(0.0005)
    else:
        at = time.monotonic() + ref["startup"] + rng.uniform(0.05, 0.7) * remaining / ref["rate"]
        while w.poll() and time.monotonic() < at:
            time.sleep(0.002)
    alive = w.proc.poll() is None
    tmp_at_kill = w.tmp.exists()
    t_kill = w.kill() if alive else time.monotonic()
    return {"alive": alive, "tmp_at_kill": tmp_at_kill, "t_kill": t_kill, "t_switch": w.t_switch}


def _check_after_kill(w: _Watched, seen: dict, ref, sweep_before: int) -> int:
    """Checks after one kill; returns the stored sweep (-1 without a run file)."""
    assert not w.tmp.exists() or w.target.exists(), "a lone .tmp without the run file"
    if not w.target.exists():
        return -1
    d = open_run(w.target)  # never unreadable
    with h5py.File(w.target, "r") as f:
        sweep = int(f.attrs["sweep"])
    assert len(d) == max(0, sweep - THERMALIZE)
    assert sweep >= sweep_before, "a checkpoint went backwards"
    if seen["alive"] and seen["t_switch"] is not None and sweep > 0:
        # progress at the kill, estimated from the last switch of the file and the reference speed
        # (not before the first checkpoint: loading the cached kernels follows the file's creation);
        # generous slack for a loaded machine: the point is "about one interval", not "ten"
        progress = sweep + ref["rate"] * (seen["t_kill"] - seen["t_switch"])
        lost = min(progress, TOTAL) - sweep
        assert lost <= 2 * CHECKPOINT_EVERY + max(3.0, 0.5 * ref["rate"]), (
            f"about {lost:.1f} sweeps lost at sweep {sweep} (checkpoint every {CHECKPOINT_EVERY})")
    return sweep


EPISODES = [("early", "checkpoint"), ("early", "random"), ("checkpoint", "checkpoint"),
            ("random", "checkpoint"), ("checkpoint", "random"), ("random", "random")]


def test_sigkill_anywhere_then_resume_is_bit_identical(reference, tmp_path):
    rng = random.Random(20261201)
    cfg = reference["cfg"]
    kills = hits = 0
    episodes = list(EPISODES)
    i = 0
    while i < len(episodes):
        modes = episodes[i]
        out = tmp_path / f"e{i}"
        sweep = 0
        for k, mode in enumerate(modes):
            # first kill: a fresh run; later kills: the resume of the killed run
            extra = ("--resume",) if k > 0 and (out / "crash" / "crash.h5").exists() else ()
            w = _Watched(cfg, out, *extra)
            seen = _kill_at(w, mode, rng, reference, sweep)
            kills += seen["alive"]
            hits += seen["alive"] and seen["tmp_at_kill"]
            sweep = _check_after_kill(w, seen, reference, sweep)
        target = out / "crash" / "crash.h5"
        if not target.exists():
            r = _run(cfg, out, "--resume")
            assert r.returncode == 2 and "nothing to resume" in r.stderr, r.stderr
            assert "Traceback" not in r.stderr and r.stderr.count("\n") == 1
            r = _run(cfg, out)  # a fresh run must work beside any leftover
        else:
            r = _run(cfg, out, "--resume")
        assert r.returncode == 0, r.stderr
        got = contents(target)
        want = reference["file"]
        assert got.keys() == want.keys()
        for key in want:
            np.testing.assert_array_equal(got[key], want[key], err_msg=f"episode {i}: {key}")
        assert not checkpoint_leftovers(target)
        if i == len(episodes) - 1 and kills < 10 and len(episodes) < len(EPISODES) + 4:
            episodes.append(("random", "checkpoint"))  # a kill came too late (run already done)
        i += 1
    assert kills >= 10, f"only {kills} kills hit a live run"
    assert hits >= 3, f"only {hits} kills hit a checkpoint write"


def test_leftover_tmp_from_a_killed_checkpoint_is_harmless(reference, tmp_path):
    """A .tmp next to a good run file (checkpoint killed midway) does not stop resume or block a refusal."""
    cfg = reference["cfg"]
    out = tmp_path / "o"
    w = _Watched(cfg, out)
    while w.poll():
        if w._tmp_now and w.tmp_seen >= 2:
            break
        time.sleep(0.0005)
    w.kill()
    target = out / "crash" / "crash.h5"
    assert target.exists()
    target.with_name("crash.h5.999999.tmp").write_bytes(b"garbage from a checkpoint that never finished")
    r = _run(cfg, out)  # no --resume: must refuse, pointing at --resume, not at the .tmp
    assert r.returncode == 2 and "--resume" in r.stderr and "Traceback" not in r.stderr
    r = _run(cfg, out, "--resume")
    assert r.returncode == 0, r.stderr
    got, want = contents(target), reference["file"]
    for key in want:
        np.testing.assert_array_equal(got[key], want[key], err_msg=key)
    assert not w.tmp.exists()


def test_lone_tmp_without_run_file_does_not_block_a_fresh_run(reference, tmp_path):
    """A lone <name>.h5.tmp (a crash of an older sigmasim while creating the file) is no run."""
    from sigmasim.cli import main

    out = tmp_path / "o"
    (out / "crash").mkdir(parents=True)
    (out / "crash" / "crash.h5.tmp").write_bytes(b"half a checkpoint")
    cfg = tmp_path / "short.toml"
    cfg.write_text(CONFIG.replace(f"measurements = {MEASUREMENTS}", "measurements = 3"))
    assert main(["run", str(cfg), "--output", str(out), "--quiet", "--resume"]) == 2
    assert main(["run", str(cfg), "--output", str(out), "--quiet"]) == 0
