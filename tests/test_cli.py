"""The command line: one-line errors with exit 2, no overwrites, clean stops and resumes."""

import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from sigmasim.cli import main

from runfiles import subprocess_env

ROOT = Path(__file__).resolve().parents[1]

GOOD = """
name = "cli"
seed = 4
[lattice]
shape = [8, 4, 4]
[model]
nf = 2
beta = 0.6
mass = 0.3
kappa = 0.5
theta = 3.0
[run]
thermalize = 10
measurements = 40
checkpoint_every = 5
"""


def _write(tmp_path, text, name="c.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def _run(*args, cwd=None, timeout=300):
    return subprocess.run([sys.executable, "-m", "sigmasim", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=timeout, env=subprocess_env())


@pytest.mark.parametrize(
    "text, word",
    [
        (GOOD.replace("beta = 0.6", "betta = 0.6"), "did you mean 'beta'"),
        (GOOD.replace("[8, 4, 4]", "[8, -4, 4]"), "lattice.shape"),
        (GOOD.replace("[8, 4, 4]", "[8, 5, 4]"), "even"),
        (GOOD.replace("nf = 2", 'nf = "two"'), "model.nf"),
        (GOOD.replace("nf = 2", "nf = 1\ngroup = \"SU\""), "SU"),
        (GOOD.replace("[model]", "[modell]"), "modell"),
        (GOOD.replace("kappa = 0.5", "kappa = nan"), "model.kappa"),
        (GOOD + "\nextra = 1\n", "extra"),
        ("this is not toml", "not valid TOML"),
    ],
)
def test_bad_configs_exit_2_with_one_line(tmp_path, capsys, text, word):
    cfg = _write(tmp_path, text)
    rc = main(["run", str(cfg), "--output", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1 and err.startswith("sigmasim: error:") and word in err
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").rglob("*.h5"))


def test_subprocess_error_has_no_traceback(tmp_path):
    cfg = _write(tmp_path, GOOD.replace("nf = 2", "nf = 0"))
    r = _run("run", cfg, "--output", tmp_path)
    assert r.returncode == 2
    assert "Traceback" not in r.stderr and r.stderr.count("\n") == 1


def test_missing_config_and_unknown_command(tmp_path, capsys):
    assert main(["run", str(tmp_path / "none.toml")]) == 2
    with pytest.raises(SystemExit) as info:
        main(["frobnicate"])
    assert info.value.code == 2


def test_refuses_to_overwrite(tmp_path, capsys):
    cfg = _write(tmp_path, GOOD)
    out = tmp_path / "out"
    assert main(["run", str(cfg), "--output", str(out), "--quiet"]) == 0
    f = out / "cli" / "cli.h5"
    before = f.read_bytes()
    # same config: must ask for --resume or --overwrite
    assert main(["run", str(cfg), "--output", str(out), "--quiet"]) == 2
    assert "--resume" in capsys.readouterr().err
    # different config: refused even with --overwrite
    other = _write(tmp_path, GOOD.replace("beta = 0.6", "beta = 0.7"), "other.toml")
    assert main(["run", str(other), "--output", str(out), "--quiet", "--overwrite"]) == 2
    assert "different config" in capsys.readouterr().err
    assert main(["run", str(other), "--output", str(out), "--quiet", "--resume"]) == 2
    assert "different config" in capsys.readouterr().err
    assert f.read_bytes() == before
    # a foreign file with the run's name is never touched
    foreign = out / "x" / "x.h5"
    foreign.parent.mkdir()
    with h5py.File(foreign, "w") as h:
        h["data"] = np.arange(3)
    fx = _write(tmp_path, GOOD.replace('name = "cli"', 'name = "x"'), "x.toml")
    for extra in ([], ["--overwrite"], ["--resume"]):
        assert main(["run", str(fx), "--output", str(out), "--quiet", *extra]) == 2
    assert "sigmasim run file" in capsys.readouterr().err
    with h5py.File(foreign, "r") as h:
        assert list(h["data"][...]) == [0, 1, 2]


def test_resume_of_missing_run(tmp_path, capsys):
    cfg = _write(tmp_path, GOOD)
    assert main(["run", str(cfg), "--output", str(tmp_path), "--resume"]) == 2
    assert "nothing to resume" in capsys.readouterr().err


def _series(path):
    with h5py.File(path, "r") as f:
        return {k: f["series"][k][...] for k in f["series"]}, {k: f["slices"][k][...] for k in f["slices"]}


def test_sigterm_stops_cleanly_and_resume_matches(tmp_path):
    # about two seconds of sweeps (1510 on 16 x 8 x 8, six checkpoints): the signal comes half a
    # second after the run file appears, so the run is stopped mid-way on an idle or a busy machine
    long = (GOOD.replace("measurements = 40", "measurements = 1500").replace("[8, 4, 4]", "[16, 8, 8]")
            .replace("checkpoint_every = 5", "checkpoint_every = 250"))
    cfg = _write(tmp_path, long)
    ref_dir, cut_dir = tmp_path / "ref", tmp_path / "cut"
    r = _run("run", cfg, "--output", ref_dir, "--quiet")
    assert r.returncode == 0, r.stderr
    p = subprocess.Popen([sys.executable, "-m", "sigmasim", "run", str(cfg), "--output", str(cut_dir),
                          "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                         env=subprocess_env())
    target = cut_dir / "cli" / "cli.h5"
    deadline = time.time() + 300
    while not target.exists() and time.time() < deadline:
        time.sleep(0.05)
    time.sleep(0.5)
    p.send_signal(signal.SIGTERM)
    out, err = p.communicate(timeout=300)
    if p.returncode == 0:
        pytest.skip("run finished before the signal arrived")
    assert p.returncode == 130, err
    assert "--resume" in err and "Traceback" not in err
    with h5py.File(target, "r") as f:
        assert f.attrs["status"] == "interrupted"
        assert 0 < f.attrs["sweep"] < 1510
    r = _run("run", cfg, "--output", cut_dir, "--quiet", "--resume")
    assert r.returncode == 0, r.stderr
    a, b = _series(ref_dir / "cli" / "cli.h5"), _series(target)
    for part in (0, 1):
        for k in a[part]:
            np.testing.assert_array_equal(a[part][k], b[part][k], err_msg=k)


from sigmasim.cli import PROTOCOL_TABLES  # noqa: E402  every table that `run` refuses

EXAMPLES = sorted((ROOT / "runs").glob("*.toml"))
PLAIN = [p for p in EXAMPLES if not any(f"[{t}]" in p.read_text() for t in PROTOCOL_TABLES)]
PROTOCOL = [p for p in EXAMPLES if p not in PLAIN]


@pytest.mark.parametrize("example", PLAIN, ids=lambda p: p.name)
def test_example_configs_run(tmp_path, example, capsys):
    assert main(["run", str(example), "--smoke", "--output", str(tmp_path), "--quiet"]) == 0
    assert "run file" in capsys.readouterr().out


@pytest.mark.parametrize("example", PROTOCOL, ids=lambda p: p.name)
def test_protocol_configs_are_sent_to_their_command(tmp_path, example, capsys):
    assert main(["run", str(example), "--output", str(tmp_path), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "run it with 'sigmasim" in err


def test_example_sweep_runs(tmp_path, capsys):
    out = tmp_path / "s.h5"
    assert main(["hysteresis", str(ROOT / "runs" / "sweep-u3.toml"), "--out", str(out)]) == 0
    assert out.exists()


def test_demo_runs(tmp_path, capsys):
    from sigmasim import vacua
    from sigmasim.storage import open_run

    assert main(["demo", "--output", str(tmp_path), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "research toy" in out.lower() or "Research toy" in out
    files = sorted(tmp_path.rglob("*.h5"))
    assert len(files) == 5
    runs = {round(open_run(f).config.theta, 2): open_run(f) for f in files}
    # the jump comes from the physics: every theta starts from the same field (a hot start
    # with one seed, theta-independent), and the runs next to pi visit both branches
    assert {(d.config.start, d.config.seed) for d in runs.values()} == {("hot", 2026)}
    for th in (3.0, 3.3):
        k = vacua.branch_label(runs[th].series["omega_h"], th, 3)
        # both branches next to pi hold a good share; the third (k = +1, tree-level energy
        # -3m cos((theta + 2 pi)/3) > 0, far above) is at most a rare fluctuation of the 4^3 lattice
        assert np.mean(k == 0) > 0.05 and np.mean(k == -1) > 0.05, np.unique(k, return_counts=True)
        assert np.mean((k != 0) & (k != -1)) < 0.01, np.unique(k, return_counts=True)
    assert runs[2.6].series["omega_h"].imag.mean() > 0 > runs[3.7].series["omega_h"].imag.mean()
    assert "k = 0 global" in out and "k = -1 global" in out


def test_vacua_command(tmp_path, capsys):
    assert main(["vacua", "--nf", "3", "--mass", "0.2", "--kappa", "1.0", "--theta", "3.4",
                 "--points", "61", "--plot", "--out", str(tmp_path / "v")]) == 0
    out = capsys.readouterr().out
    assert "first-order" in out and "research toy" in out
    assert (tmp_path / "v.png").exists() and (tmp_path / "v.pdf").exists()
    assert main(["vacua", "--nf", "9"]) == 2


def test_scan_runs_resumes_and_refuses_damaged_files(tmp_path, capsys):
    cfg = _write(tmp_path, GOOD)
    out = tmp_path / "scan"
    args = ["scan", str(cfg), "--param", "model.theta", "--values", "2.9,3.3", "--output", str(out), "--quiet"]
    assert main(args) == 0
    files = sorted(out.rglob("*.h5"))
    assert [f.name for f in files] == ["cli-theta-2.9.h5", "cli-theta-3.3.h5"]
    with h5py.File(files[1], "r") as f:
        assert json_theta(f) == 3.3
    capsys.readouterr()
    assert main(args) == 2  # exists: needs --resume or --overwrite
    assert "--resume" in capsys.readouterr().err
    assert main(args + ["--resume"]) == 0
    files[0].write_bytes(files[0].read_bytes()[:2000])  # truncated
    assert main(args + ["--resume"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "cli-theta-2.9" in err
    assert main(["scan", str(cfg), "--param", "model.betta", "--values", "1", "--output", str(out)]) == 2
    assert main(["scan", str(cfg), "--param", "model.beta", "--values", "x", "--output", str(out)]) == 2


def json_theta(f):
    import json

    return json.loads(f.attrs["config"])["model"]["theta"]


def test_run_summary_flags_metastable_branch(tmp_path, capsys):
    # Tree level (sigmasim.vacua): U(3), h = 0.3, kappa = 3 at theta = 2.8 has the global
    # minimum in branch 0 and a metastable one in branch -1; a run started in branch -1
    # stays there (strong anomaly, short run) and the summary must say so.
    cfg = tmp_path / "meta.toml"
    cfg.write_text('name = "meta"\nseed = 3\n[lattice]\nshape = [4, 4, 4]\n'
                   '[model]\nnf = 3\nbeta = 2.0\nmass = 0.3\nkappa = 3.0\ntheta = 2.8\n'
                   f'[run]\nthermalize = 5\nmeasurements = 20\nstart = "branch"\nstart_branch = -1\n'
                   f'output = "{tmp_path}"\nthreads = 1\n')
    assert main(["run", str(cfg), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "k = -1 METASTABLE (global 0)" in out
