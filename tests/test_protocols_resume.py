"""Gaps a user hits: a sweep that resumes, outputs that are never silently replaced, read-only run
files, a resume that asks for fewer measurements than the file holds, the linear model's nf range."""

import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from sigmasim.cli import main
from sigmasim.config import config_from_dict, read_toml
from sigmasim.errors import ConfigError
from runfiles import assert_one_line_error, subprocess_env

ROOT = Path(__file__).resolve().parents[1]

SWEEP = """
name = "sw"
seed = 11
[lattice]
shape = [4, 4]
[model]
nf = 2
beta = 0.8
mass = 0.4
kappa = 0.6
[run]
thermalize = 10
checkpoint_every = 1
threads = 1
[hysteresis]
start = 0.0
stop = 6.0
step = 0.5
sweeps_per_step = {per_step}
thermalize_per_step = 2
cycles = 1
"""



def _one_line(err):
    assert_one_line_error(err)


def _same_sweep(a, b):
    from sigmasim.protocols import read_sweep

    ra, rb = read_sweep(a), read_sweep(b)
    np.testing.assert_equal(ra["summary"], rb["summary"])  # NaN (no jump) equals NaN here
    for g in ("steps", "series", "cycles"):
        assert ra[g].keys() == rb[g].keys()
        for k in ra[g]:
            np.testing.assert_array_equal(ra[g][k], rb[g][k], err_msg=f"{g}/{k}")


@pytest.fixture(scope="module")
def sweep_ref(tmp_path_factory):
    base = tmp_path_factory.mktemp("sweep")
    cfg = base / "sw.toml"
    cfg.write_text(SWEEP.format(per_step=6))
    ref = base / "ref.h5"
    assert main(["hysteresis", str(cfg), "--out", str(ref)]) == 0
    return cfg, ref


def test_an_interrupted_sweep_continues_bit_identically(sweep_ref, tmp_path, monkeypatch):
    from sigmasim.protocols import SweepParams, load_protocol, run_sweep, sweep_checkpoint_path

    cfg, ref = sweep_ref
    out = tmp_path / "s.h5"
    config, raw = load_protocol(cfg, "hysteresis", __import__("sigmasim.protocols").protocols.SWEEP_SCHEMA)
    params = SweepParams(**raw)

    def stop(i, n):
        if i == 7:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_sweep(config, params, progress=stop, checkpoint=sweep_checkpoint_path(out))
    with h5py.File(sweep_checkpoint_path(out), "r") as f:
        assert int(f.attrs["next_step"]) == 7
    assert main(["hysteresis", str(cfg), "--out", str(out)]) == 0  # continues the checkpoint
    assert not sweep_checkpoint_path(out).exists()
    _same_sweep(out, ref)


def test_a_sweep_killed_with_sigkill_resumes_bit_identically(sweep_ref, tmp_path):
    from sigmasim.protocols import sweep_checkpoint_path

    cfg, ref = sweep_ref
    out = tmp_path / "k.h5"
    ckpt = sweep_checkpoint_path(out)
    cmd = [sys.executable, "-m", "sigmasim", "hysteresis", str(cfg), "--out", str(out)]
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=subprocess_env(), cwd=ROOT)
    seen = 0
    deadline = time.monotonic() + 300
    while p.poll() is None and time.monotonic() < deadline:
        try:
            with h5py.File(ckpt, "r") as f:
                seen = int(f.attrs["next_step"])
        except (OSError, KeyError):
            pass
        if seen >= 5:
            break
        time.sleep(0.002)
    p.send_signal(signal.SIGKILL)
    p.communicate(timeout=60)
    assert seen >= 5, "the sweep kept no checkpoint"
    assert not out.exists()
    assert main(["hysteresis", str(cfg), "--out", str(out)]) == 0
    _same_sweep(out, ref)


def test_a_checkpoint_of_another_protocol_is_refused(sweep_ref, tmp_path, capsys):
    from sigmasim.protocols import sweep_checkpoint_path

    cfg, ref = sweep_ref
    out = tmp_path / "s.h5"
    other = tmp_path / "other.toml"
    other.write_text(SWEEP.format(per_step=4))
    ckpt = sweep_checkpoint_path(out)
    import sigmasim.protocols as pr
    from sigmasim.protocols import SweepParams, load_protocol, run_sweep

    config, raw = load_protocol(other, "hysteresis", pr.SWEEP_SCHEMA)
    with pytest.raises(KeyboardInterrupt):
        run_sweep(config, SweepParams(**raw), checkpoint=ckpt,
                  progress=lambda i, n: (_ for _ in ()).throw(KeyboardInterrupt) if i == 2 else None)
    assert main(["hysteresis", str(cfg), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    _one_line(err)
    assert "another config" in err
    with h5py.File(ckpt, "a") as f:  # damage it: a clear refusal, never the kernels
        f["state/re"][0, 0] = 7.0
    assert main(["hysteresis", str(other), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    _one_line(err)
    assert "damaged checkpoint" in err


def test_sweep_and_export_out_never_replace_a_file_without_overwrite(sweep_ref, tmp_path, capsys):
    cfg, ref = sweep_ref
    victim = tmp_path / "precious.h5"
    victim.write_bytes(b"another run's results")
    assert main(["hysteresis", str(cfg), "--out", str(victim)]) == 2
    err = capsys.readouterr().err
    _one_line(err)
    assert "--overwrite" in err and victim.read_bytes() == b"another run's results"
    # export: a run file to export, and an existing file in the way
    run_cfg = tmp_path / "r.toml"
    run_cfg.write_text(SWEEP.format(per_step=2).split("[hysteresis]")[0] + "measurements = 4\n")
    assert main(["run", str(run_cfg), "--output", str(tmp_path / "o"), "--quiet"]) == 0
    run = tmp_path / "o" / "sw" / "sw.h5"
    for fmt, target in (("hdf5", victim), ("npz", tmp_path / "x.npz")):
        target.write_bytes(b"another run's results")
        prefix = target.with_suffix("")
        assert main(["export", str(run), "--format", fmt, "--out", str(prefix)]) == 2
        err = capsys.readouterr().err
        _one_line(err)
        assert "--overwrite" in err and target.read_bytes() == b"another run's results"
        assert not prefix.with_name(prefix.name + ".json").exists()
        assert main(["export", str(run), "--format", fmt, "--out", str(prefix), "--overwrite"]) == 0
        assert target.read_bytes() != b"another run's results"
    capsys.readouterr()
    assert main(["hysteresis", str(cfg), "--out", str(victim), "--overwrite"]) == 0
    _same_sweep(victim, ref)


RUN = """
name = "rr"
seed = 3
[lattice]
shape = [8, 4]
[model]
nf = 2
beta = 0.6
mass = 0.3
kappa = 0.2
[run]
thermalize = 3
measurements = {meas}
checkpoint_every = 4
threads = 1
"""


@pytest.fixture
def stopped(tmp_path):
    from runfiles import run_file

    toml = tmp_path / "rr.toml"
    toml.write_text(RUN.format(meas=20))
    raw = read_toml(toml)
    raw["run"]["output"] = str(tmp_path / "o")
    cfg = config_from_dict(raw)
    assert not run_file(cfg, stop_at=11)  # 8 measurements, status 'interrupted'
    return toml, cfg


def test_resume_refuses_a_read_only_file_and_keeps_its_mode(stopped, capsys):
    toml, cfg = stopped
    path = cfg.run_file
    before = path.read_bytes()
    path.chmod(0o444)
    rc = main(["run", str(toml), "--output", str(cfg.output), "--resume", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    _one_line(err)
    assert "read-only" in err
    assert (path.stat().st_mode & 0o777) == 0o444 and path.read_bytes() == before


def test_resume_with_fewer_measurements_than_present_says_so_and_marks_complete(stopped, capsys):
    from sigmasim.storage import open_run

    toml, cfg = stopped
    toml.write_text(RUN.format(meas=5))
    rc = main(["run", str(toml), "--output", str(cfg.output), "--resume", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 0, err
    assert "already holds 8 measurements" in err and "asks for 5" in err
    d = open_run(cfg.run_file)
    assert d.status == "complete" and len(d) == 8
    # asking for more again continues the chain from where it stopped
    toml.write_text(RUN.format(meas=12))
    assert main(["run", str(toml), "--output", str(cfg.output), "--resume", "--quiet"]) == 0
    d = open_run(cfg.run_file)
    assert d.status == "complete" and len(d) == 12


@pytest.mark.parametrize("nf", [7, 8])
def test_the_linear_model_accepts_only_the_documented_nf(nf):
    with pytest.raises(ConfigError, match="nf = 1..6"):
        config_from_dict({"lattice": {"shape": [2]},
                          "model": {"kind": "linear", "nf": nf, "kappa": 0.0, "mu2": 1.0}})
    config_from_dict({"lattice": {"shape": [2]}, "model": {"kind": "linear", "nf": 6, "kappa": 0.0,
                                                         "mu2": 1.0}})


TEMPER = """
name = "tm"
seed = 9
[lattice]
shape = [4, 4]
[model]
nf = 2
beta = 0.8
mass = 0.4
kappa = 0.6
[run]
thermalize = 4
measurements = 30
checkpoint_every = 5
threads = 1
output = "{out}"
[tempering]
thetas = [2.5, 3.1, 3.7]
swap_every = 2
"""


def _temper(tmp_path, name):
    cfg = tmp_path / f"{name}.toml"
    cfg.write_text(TEMPER.format(out=(tmp_path / name).as_posix()))
    return cfg


def _slot_files(tmp_path, name):
    return [tmp_path / name / "tm" / f"tm-t{i}" / f"tm-t{i}.h5" for i in range(3)]


def _printed(capsys):
    return [line for line in capsys.readouterr().out.splitlines() if not line.startswith("wrote")]


@pytest.mark.parametrize("where", ["swap", "slot file"])
def test_an_interrupted_tempering_continues_bit_identically(tmp_path, capsys, monkeypatch, where):
    import sigmasim.protocols.tempering as pr
    import sigmasim.storage as storage
    from runfiles import contents

    from sigmasim.cli import temper_command
    from sigmasim.protocols import temper_checkpoint_path

    assert temper_command(str(_temper(tmp_path, "ref"))) == 0
    want_out = _printed(capsys)
    want = [contents(p) for p in _slot_files(tmp_path, "ref")]
    calls = [0]
    with monkeypatch.context() as m:
        if where == "swap":  # in the middle of the swaps of sweep 22
            real = pr._slot_action

            def action(*a):
                calls[0] += 1
                if calls[0] == 41:
                    raise KeyboardInterrupt
                return real(*a)

            m.setattr(pr, "_slot_action", action)
        else:  # at sweep 20, after the checkpoint and slot 0's commit: slots 1 and 2 are behind
            real = storage.RunWriter.checkpoint

            def ckpt(self, sim, *a):
                calls[0] += 1
                if calls[0] == 3 * 3 + 2:
                    raise KeyboardInterrupt
                return real(self, sim, *a)

            m.setattr(storage.RunWriter, "checkpoint", ckpt)
        with pytest.raises(KeyboardInterrupt):
            temper_command(str(_temper(tmp_path, "cut")))
    cfg = _temper(tmp_path, "cut")
    from sigmasim.config import config_from_dict

    ck = temper_checkpoint_path(config_from_dict({k: v for k, v in read_toml(cfg).items()
                                                  if k != "tempering"}))
    assert ck.exists()
    capsys.readouterr()
    assert temper_command(str(cfg)) == 0  # continues; no slot file has to be removed
    assert _printed(capsys) == want_out
    assert not ck.exists()
    for p, w in zip(_slot_files(tmp_path, "cut"), want):
        got = contents(p)
        assert got.keys() == w.keys()
        for k in w:
            np.testing.assert_array_equal(got[k], w[k], err_msg=f"{p.name} {k}")
    # finished: a rerun still refuses to replace the slot files
    from sigmasim.errors import RunFileError

    with pytest.raises(RunFileError, match="exists"):
        temper_command(str(cfg))
