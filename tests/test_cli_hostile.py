"""Hostile input: overrides, pipes, damaged checkpoints, long or odd paths, signals at start-up,
full disks. Every case must end in one line naming the problem (exit 2) or a correct result; never a
traceback, a segfault or a file the tool cannot read back.

``test_byte_flips_never_reach_the_kernels`` is a small counted harness: it damages a run file at
many places and checks that a checkpoint is either refused or in range, finite and unitary.
"""

import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from sigmasim.cli import main
from sigmasim.config import config_from_dict, read_toml
from sigmasim.errors import RunFileError

from runfiles import assert_one_line_error, contents, fill_disk, small_tmpfs, subprocess_env

ROOT = Path(__file__).resolve().parents[1]

CFG = """
name = "ho"
seed = 17
[lattice]
shape = [8, 4]
[model]
nf = {nf}
group = "{group}"
beta = 0.6
mass = 0.3
kappa = 0.2
[run]
thermalize = 3
measurements = {meas}
checkpoint_every = 4
threads = 1
"""


def _cfg(tmp_path, meas=20, nf=2, group="U", name="ho.toml"):
    p = tmp_path / name
    p.write_text(CFG.format(meas=meas, nf=nf, group=group))
    return p



def _one_line(err, limit=600):
    assert_one_line_error(err, limit)


# ---------------------------------------------------------------- 3. overrides
@pytest.mark.parametrize("flags, what", [
    (["--threads", "-1"], "run.threads"),
    (["--threads", "5000"], "run.threads"),
    (["--output", ""], "run.output"),
    (["--output", "a\0b"], "run.output"),
    (["--output", "x" * 5000], "run.output"),
    (["--output", "d/" + "n" * 300], "run.output"),
])
def test_command_line_overrides_are_validated_before_anything_is_written(tmp_path, capsys, monkeypatch,
                                                                          flags, what):
    import sigmasim.chain as chain

    monkeypatch.chdir(tmp_path)
    started = []
    monkeypatch.setattr(chain, "run_chain", lambda *a, **k: started.append(1))
    cfg = _cfg(tmp_path)
    for cmd in (["run", str(cfg)], ["scan", str(cfg), "--param", "model.theta", "--values", "1,2"]):
        rc = main([*cmd, *flags, "--quiet"])
        err = capsys.readouterr().err
        assert rc == 2, err
        _one_line(err)
        assert what in err
    assert not started and not list(tmp_path.rglob("*.h5"))


# ---------------------------------------------------------------- 4. the config is read once
def test_a_config_from_a_pipe_is_read_once(tmp_path):
    fifo = tmp_path / "cfg.toml"
    os.mkfifo(fifo)
    text = CFG.format(meas=4, nf=2, group="U").replace("seed = 17", "seed = 4242")

    def feed():
        with open(fifo, "w") as fh:  # blocks until the reader opens it; one reader only
            fh.write(text)

    t = threading.Thread(target=feed, daemon=True)
    t.start()
    r = subprocess.run([sys.executable, "-m", "sigmasim", "run", str(fifo), "--smoke", "--quiet",
                        "--output", str(tmp_path / "o")], capture_output=True, text=True, env=subprocess_env(),
                       cwd=ROOT, timeout=300)
    if t.is_alive():  # unblock the feeder if the run never opened the pipe
        with open(fifo, "r") as fh:
            fh.read()
    assert r.returncode == 0, r.stderr
    with h5py.File(tmp_path / "o" / "cfg-smoke" / "cfg-smoke.h5", "r") as f:
        assert '"seed": 4242' in f.attrs["config"]  # the piped config, not built-in defaults


# ---------------------------------------------------------------- 5. damaged checkpoints
@pytest.fixture(scope="module")
def stopped_run(tmp_path_factory):
    """A run of 20 measurements stopped after sweep 11, and the same run completed (reference)."""
    from runfiles import run_file

    base = tmp_path_factory.mktemp("hostile")
    raw = read_toml(_cfg(base))
    raw["run"]["output"] = str(base / "ref")
    ref = config_from_dict(raw)
    assert run_file(ref)
    raw["run"]["output"] = str(base / "stop")
    cfg = config_from_dict(raw)
    assert not run_file(cfg, stop_at=11)
    return {"cfg": cfg, "toml": base / "ho.toml", "ref": contents(ref.run_file)}


def _damaged(stopped_run, tmp_path, change):
    src = stopped_run["cfg"].run_file
    dst = tmp_path / "o" / "ho" / "ho.h5"
    dst.parent.mkdir(parents=True)
    shutil.copyfile(src, dst)
    with h5py.File(dst, "a") as f:
        change(f)
    return dst


def _set_attr(name, value):
    return lambda f: f["state"].attrs.__setitem__(name, value)


def _scale_site(f):
    re = f["state/re"][...]
    re[0, 3] *= 1.5
    f["state/re"][...] = re


DAMAGES = {
    "step 2^63": _set_attr("step", np.uint64(2**63)),
    "step 2^64-1": _set_attr("step", np.uint64(2**64 - 1)),
    "step -1": _set_attr("step", np.int64(-1)),
    "step_size 1e300": _set_attr("step_size", 1e300),
    "step_size nan": _set_attr("step_size", np.nan),
    "tune_acc > tune_tried": lambda f: (f["state"].attrs.__setitem__("tune_acc", 10),
                                         f["state"].attrs.__setitem__("tune_tried", 3)),
    "tune_tried huge": _set_attr("tune_tried", np.uint64(2**63 + 5)),
    "win_drift inf": _set_attr("win_drift", np.inf),
    "win_acc negative": _set_attr("win_acc", np.array([-5, 0], dtype=np.int64)),
    "win_acc > win_tried": lambda f: (f["state"].attrs.__setitem__("win_acc", np.array([9, 9])),
                                       f["state"].attrs.__setitem__("win_tried", np.array([1, 1]))),
    "field not unitary": _scale_site,
    "field entry 1e308": lambda f: f["state/im"].__setitem__((1, 0), 1e308),
}


@pytest.mark.parametrize("damage", list(DAMAGES))
def test_a_damaged_checkpoint_is_refused_before_the_kernels(stopped_run, tmp_path, capsys, damage):
    from sigmasim.storage import read_state

    path = _damaged(stopped_run, tmp_path, DAMAGES[damage])
    cfg = config_from_dict({**read_toml(stopped_run["toml"]), "run": {
        **read_toml(stopped_run["toml"])["run"], "output": str(tmp_path / "o")}})
    with pytest.raises(RunFileError, match="damaged checkpoint|damaged"):
        read_state(path, cfg)
    rc = main(["run", str(stopped_run["toml"]), "--output", str(tmp_path / "o"), "--resume", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    _one_line(err)


def test_a_field_off_su_is_refused_for_an_su_run(tmp_path, capsys):
    from runfiles import run_file
    from sigmasim.storage import read_state

    raw = read_toml(_cfg(tmp_path, meas=8, nf=2, group="SU"))
    raw["run"]["output"] = str(tmp_path / "o")
    cfg = config_from_dict(raw)
    assert not run_file(cfg, stop_at=6)
    read_state(cfg.run_file, cfg)  # intact: accepted
    with h5py.File(cfg.run_file, "a") as f:  # multiply every site by the phase i: unitary, det -1
        re, im = f["state/re"][...], f["state/im"][...]
        f["state/re"][...], f["state/im"][...] = -im, re
    with pytest.raises(RunFileError, match="det U"):
        read_state(cfg.run_file, cfg)


def test_byte_flips_never_reach_the_kernels(stopped_run, tmp_path):
    """Counted harness: flip one byte at 300 places of a stopped run file; a checkpoint that is
    read back must be in range, finite and unitary (and the flip is then in a place it ignores)."""
    from sigmasim.storage import STEP_LIMIT, read_state

    src = stopped_run["cfg"].run_file
    cfg = stopped_run["cfg"]
    blob = src.read_bytes()
    with h5py.File(src, "r") as f:
        regions = [(f[k].id.get_offset(), f[k].id.get_storage_size()) for k in ("state/re", "state/im")]
    rng = np.random.default_rng(14)
    offsets = [int(rng.integers(0, len(blob))) for _ in range(150)]
    offsets += [int(o + rng.integers(0, n)) for o, n in regions for _ in range(75) if o is not None]
    tried = refused = accepted = 0
    for k, off in enumerate(offsets):
        bad = bytearray(blob)
        bad[off] ^= 1 << int(rng.integers(0, 8))
        p = tmp_path / f"f{k % 4}.h5"
        p.write_bytes(bytes(bad))
        tried += 1
        try:
            st = read_state(p, cfg)
        except RunFileError:
            refused += 1
            continue
        accepted += 1
        assert 0 <= st.step < STEP_LIMIT and 0 < st.step_size <= 1e3 and np.isfinite(st.win_drift)
        u = (st.re + 1j * st.im).T.reshape(-1, cfg.nf, cfg.nf)
        dev = np.abs(np.einsum("sba,sbc->sac", u.conj(), u) - np.eye(cfg.nf)).max()
        assert dev <= 1e-6, f"flip at byte {off}: a non-unitary field ({dev:.3g}) was accepted"
    print(f"byte flips: {tried} tried, {refused} refused, {accepted} accepted (all in range)")
    assert tried == 300 and refused >= 50  # low mantissa bits of the field are harmless flips


# ---------------------------------------------------------------- 6. odd paths, one line each
def test_odd_paths_give_one_line(tmp_path, capsys):
    cfg = _cfg(tmp_path)
    long = "/" + "/".join(["p" * 250] * 20)  # 5000 characters
    cases = [
        ["analyze", long + "/x.h5"],
        ["analyze", str(tmp_path / "a\0b.h5")],
        ["info", "q" * 5000 + ".h5"],
        ["export", long + ".h5"],
        ["run", str(cfg), "--output", long],
        ["run", long + ".toml"],
    ]
    for argv in cases:
        rc = main([*argv, *(["--quiet"] if argv[0] == "run" else [])])
        err = capsys.readouterr().err
        assert rc == 2, (argv[:1], err)
        _one_line(err)


def test_a_name_near_the_file_name_limit_works(tmp_path, capsys):
    """A run name of 100 characters in a folder whose name is 240 bytes long."""
    cfg = _cfg(tmp_path)
    cfg.write_text(cfg.read_text().replace('name = "ho"', f'name = "{"n" * 100}"')
                   .replace("measurements = 20", "measurements = 2"))
    out = tmp_path / ("o" * 240)
    rc = main(["run", str(cfg), "--output", str(out), "--quiet"])
    assert rc == 0, capsys.readouterr().err


def _signal_early(tmp_path, sig, delay):
    cfg = _cfg(tmp_path, meas=200, name=f"s{sig}-{delay}.toml")
    # a folder per trial: a trial stopped after its run file exists leaves a file the next would refuse
    p = subprocess.Popen([sys.executable, "-m", "sigmasim", "run", str(cfg), "--quiet", "--output",
                          str(tmp_path / f"o-{delay}")], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                         env=subprocess_env(), cwd=ROOT)
    time.sleep(delay)
    p.send_signal(sig)
    _, err = p.communicate(timeout=300)
    return p.returncode, err


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_a_signal_at_start_up_exits_130_without_a_traceback(tmp_path, sig):
    # not earlier: a signal before the interpreter runs any of our code ends it by the default action
    for delay in (0.4, 1.0):
        rc, err = _signal_early(tmp_path, sig, delay)
        assert "Traceback" not in err, (delay, err)
        # 0 only if the run had already finished; after Ctrl-C the interpreter may also end itself
        # by SIGINT once the message is written (a shell shows that as 130 too); SIGTERM must be 130
        ok = (130, 0, -signal.SIGINT) if sig == signal.SIGINT else (130, 0)
        assert rc in ok, (delay, rc, err)
        assert rc != -signal.SIGINT or err == "sigmasim: interrupted\n", err


def test_sigterm_during_the_imports_exits_130_every_time(tmp_path):
    """SIGTERM 0.12-0.4 s after start (while numba and friends are imported) in 50 starts of a small
    run: always 130 (or 0 had it finished), one line, no traceback.  Before sigmasim.interrupt and
    __main__._leave about 5 of 100 such starts ended by SIGINT (-2: CPython 3.11 after a
    KeyboardInterrupt that passed through namedtuple's eval) and a few printed a traceback (the
    interrupt ignored in an import-lock weakref callback, or turned into a RuntimeError or an
    ImportError); so the old code passed this test with a probability of about 0.95^50 = 8 %.
    About 40 s."""
    import random

    rng = random.Random(7)
    seen = []
    for i in range(50):
        trial = tmp_path / str(i)
        trial.mkdir()
        rc, err = _signal_early(trial, signal.SIGTERM, rng.uniform(0.12, 0.4))
        assert "Traceback" not in err and rc in (130, 0), (rc, err)
        assert rc == 0 or len(err.strip().splitlines()) == 1, err
        seen.append(rc)
    assert seen.count(130) >= 40, seen  # the signals did arrive while it ran


# ---------------------------------------------------------------- 2. full disks
def test_a_full_disk_before_a_checkpoint_is_one_line_and_the_last_checkpoint_survives(
        stopped_run, tmp_path, capsys, monkeypatch):
    import sigmasim.files as files

    out = tmp_path / "o"
    shutil.copytree(stopped_run["cfg"].run_dir, out / "ho")
    before = contents(out / "ho" / "ho.h5")
    monkeypatch.setattr(files, "free_bytes", lambda folder: 200_000)
    rc = main(["run", str(stopped_run["toml"]), "--output", str(out), "--resume", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    _one_line(err)
    assert "No space left on device" in err and "--resume" in err
    after = contents(out / "ho" / "ho.h5")
    for k in before:
        np.testing.assert_array_equal(after[k], before[k], err_msg=k)
    assert not list((out / "ho").glob("*.tmp"))
    monkeypatch.undo()
    assert main(["run", str(stopped_run["toml"]), "--output", str(out), "--resume", "--quiet"]) == 0
    got = contents(out / "ho" / "ho.h5")
    for k in stopped_run["ref"]:
        np.testing.assert_array_equal(got[k], stopped_run["ref"][k], err_msg=k)


@pytest.fixture
def small_disk(tmp_path):
    """A 3 MiB tmpfs (needs root and a kernel that lets this process mount)."""
    with small_tmpfs(tmp_path / "disk", "3m") as mnt:
        yield mnt


def _fill(folder, leave):
    fill_disk(folder, leave)


def test_a_really_full_disk_during_checkpoints_never_crashes(stopped_run, small_disk, tmp_path):
    """The free-space probe is bypassed, so the copy or the HDF5 append itself hits ENOSPC."""
    out = small_disk / "o"
    shutil.copytree(stopped_run["cfg"].run_dir, out / "ho")
    size = (out / "ho" / "ho.h5").stat().st_size
    script = ("import sys; import sigmasim.files as s; s.free_bytes = lambda folder: 1 << 40; "
              "from sigmasim.cli import main; sys.exit(main(sys.argv[1:]))")
    codes = []
    for leave in (size // 2, size + 2_000, size + 30_000):
        (small_disk / "filler").unlink(missing_ok=True)
        _fill(small_disk, leave)
        r = subprocess.run([sys.executable, "-c", script, "run", str(stopped_run["toml"]), "--output", str(out),
                            "--resume", "--quiet"], capture_output=True, text=True, env=subprocess_env(), cwd=ROOT,
                           timeout=300)
        codes.append(r.returncode)
        assert r.returncode in (0, 2), (leave, r.returncode, r.stderr[-2000:])
        if r.returncode == 2:
            _one_line(r.stderr)
            assert "No space left on device" in r.stderr
        from sigmasim.storage import open_run

        open_run(out / "ho" / "ho.h5")  # the last checkpoint is readable
        assert not list((out / "ho").glob("*.tmp"))
    assert 2 in codes


def test_analyze_and_export_on_a_full_disk_leave_no_truncated_output(stopped_run, small_disk, capsys):
    out = small_disk / "o"
    shutil.copytree(stopped_run["cfg"].run_dir, out / "ho")
    run = out / "ho" / "ho.h5"
    _fill(small_disk, 1_000)
    for argv in (["analyze", str(run), "--quiet"], ["export", str(run), "--format", "csv"]):
        rc = main(argv)
        err = capsys.readouterr().err
        assert rc == 2, err
        _one_line(err)
        assert "No space left on device" in err
    left = sorted(p.name for p in (out / "ho").iterdir())
    assert left == ["ho.h5"], left  # nothing half-written beside the run


def test_a_scan_on_a_full_disk_ends_in_one_line_and_leaves_no_temporary_files(small_disk, tmp_path):
    scan = tmp_path / "scan.toml"
    scan.write_text(f'name = "fs"\n[scan]\nretries = 0\noutput = "{(small_disk / "out").as_posix()}"\n'
                    '[scan.product]\n"model.theta" = [1.0, 2.0]\n'
                    + CFG.format(meas=20, nf=2, group="U").split("[lattice]", 1)[1].join(["[lattice]", ""]))
    _fill(small_disk, 12_000)
    r = subprocess.run([sys.executable, "-m", "sigmasim", "scan", str(scan), "--workers", "1", "--quiet"],
                       capture_output=True, text=True, env=subprocess_env(), cwd=ROOT, timeout=600)
    assert r.returncode == 2, r.stderr[-2000:]
    assert "Traceback" not in r.stderr and "Traceback" not in r.stdout
    assert r.stderr.strip().splitlines()[-1].startswith("sigmasim: error:")
    assert "No space left on device" in r.stderr or "not enough free disk space" in r.stderr + r.stdout
    assert not list((small_disk / "out").rglob("*.tmp"))


def test_outputs_on_a_read_only_file_system_end_in_one_line(tmp_path, capsys):
    with small_tmpfs(tmp_path / "ro", "1m", read_only=True) as ro:
        cfg = _cfg(tmp_path, meas=2)
        sweep = tmp_path / "sw.toml"
        sweep.write_text(cfg.read_text() + "[hysteresis]\nstart = 0.0\nstop = 1.0\nstep = 0.5\nsweeps_per_step = 2\n")
        for argv in (["hysteresis", str(sweep), "--out", str(ro / "s.h5")],
                     ["hysteresis", str(sweep), "--out", str(ro / "sub" / "s.h5")],
                     ["run", str(cfg), "--output", str(ro), "--quiet"]):
            rc = main(argv)
            err = capsys.readouterr().err
            assert rc == 2, (argv, err)
            _one_line(err)
            assert "Read-only file system" in err or "not writable" in err, err


def test_a_scan_file_from_a_pipe_is_read_once(tmp_path):
    fifo = tmp_path / "scan.toml"
    os.mkfifo(fifo)
    text = (f'name = "fs"\n[scan]\noutput = "{(tmp_path / "out").as_posix()}"\n'
            '[scan.product]\n"model.theta" = [1.0, 2.0]\n[lattice]\nshape = [4, 4]\n[model]\nnf = 2\n')

    def feed():
        with open(fifo, "w") as fh:
            fh.write(text)

    t = threading.Thread(target=feed, daemon=True)
    t.start()
    # a second read of the pipe would wait for a writer that never comes: the timeout fails the test
    r = subprocess.run([sys.executable, "-m", "sigmasim", "scan", str(fifo), "--collect", "--quiet"],
                       capture_output=True, text=True, env=subprocess_env(), cwd=ROOT, timeout=60)
    if t.is_alive():
        with open(fifo, "r") as fh:
            fh.read()
    assert "Traceback" not in r.stderr, r.stderr
    assert (tmp_path / "out" / "index.csv").exists(), (r.returncode, r.stderr)
