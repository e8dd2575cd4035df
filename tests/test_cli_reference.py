"""Every key of the run config and of the protocol tables is documented where a user looks."""

import json
import subprocess
import sys
from pathlib import Path

import h5py
import pytest

from sigmasim.cli import main
from sigmasim.reference import PROTOCOL_TABLES, protocol_schema, table_markdown

from runfiles import run_file, subprocess_env

ROOT = Path(__file__).resolve().parents[1]


def test_config_reference_lists_every_protocol_key(capsys):
    assert main(["config-reference"]) == 0
    out = capsys.readouterr().out
    for table in PROTOCOL_TABLES:
        for key in protocol_schema(table):
            assert f"`{table}.{key}`" in out, (table, key)


def test_readme_has_the_same_protocol_tables():
    readme = (ROOT / "README.md").read_text()
    for table in PROTOCOL_TABLES:
        assert table_markdown(table) in readme, f"README.md: regenerate the [{table}] table"


@pytest.mark.parametrize("command, table", [("hysteresis", "hysteresis"), ("sweep", "hysteresis"),
                                            ("temper", "tempering"),
                                            ("lifetimes", "lifetimes"), ("scan", "scan")])
def test_help_of_protocol_commands_lists_their_keys(command, table, capsys):
    with pytest.raises(SystemExit):
        main([command, "--help"])
    out = capsys.readouterr().out
    assert f"[{table}] table" in out
    for key in protocol_schema(table):
        assert f"  {key} = " in out, key


def test_every_protocol_table_has_an_example():
    examples = [p.read_text() for p in (ROOT / "runs").glob("*.toml")]
    for table in PROTOCOL_TABLES:
        assert any(f"[{table}]" in t for t in examples), table


@pytest.mark.parametrize("example", ["sweep-u3.toml", "temper-u3.toml", "lifetimes-u3.toml",
                                     "scan-theta-volume.toml"])
def test_vacua_reads_the_model_of_a_protocol_config(example, capsys):
    assert main(["vacua", str(ROOT / "runs" / example), "--points", "9"]) == 0
    assert "tree-level local minima" in capsys.readouterr().out


def test_lifetimes_saves_by_default(tmp_path, capsys):
    text = (ROOT / "runs" / "lifetimes-u3.toml").read_text()
    text = (text.replace("sizes = [4, 6, 8, 10]", "sizes = [4]").replace("starts = 16", "starts = 2")
            .replace("max_sweeps = 20000", "max_sweeps = 30").replace("workers = 0", "workers = 1")
            .replace("[run]", f"[run]\noutput = \"{tmp_path}\""))
    cfg = tmp_path / "lt.toml"
    cfg.write_text(text)
    assert main(["lifetimes", str(cfg), "--quiet"]) == 0
    saved = tmp_path / "lifetimes-u3" / "lifetimes-u3-lifetimes.json"
    assert f"wrote {saved}" in capsys.readouterr().out
    blob = json.loads(saved.read_text())
    assert blob["sizes"] == [4] and len(blob["times"]["4"]) == 2
    assert main(["lifetimes", str(cfg), "--quiet"]) == 0  # its own file: replaced
    saved.write_text("my notes")  # not ours: never overwritten
    assert main(["lifetimes", str(cfg), "--quiet"]) == 2
    assert saved.read_text() == "my notes"


CHIRAL = {"name": "inf", "seed": 1, "lattice": {"shape": [4, 4]},
          "model": {"nf": 2, "beta": 0.5, "mass": 0.3, "kappa": 0.2, "theta": 1.0},
          "run": {"thermalize": 2, "measurements": 20, "checkpoint_every": 5, "threads": 1}}


def test_info_after_a_kill_says_interrupted_with_the_checkpointed_count(tmp_path, capsys):
    from sigmasim.config import config_from_dict

    cfg = config_from_dict({**CHIRAL, "run": {**CHIRAL["run"], "output": str(tmp_path)}})
    run_file(cfg, stop_at=13)  # checkpoints at sweeps 5 and 10, then a clean stop at 13
    with h5py.File(cfg.run_file, "r+") as f:  # what kill -9 after the checkpoint at 10 leaves
        f.attrs["status"] = "running"
    assert main(["info", str(cfg.run_file)]) == 0
    out = capsys.readouterr().out
    assert "interrupted" in out and "--resume" in out
    with h5py.File(cfg.run_file, "r") as f:
        assert f"sweep {int(f.attrs['sweep'])} of 22, {int(f.attrs['n_meas'])} of 20 measurements" in out
    # a TOML block with the keys of a chiral run, no Python dict, no linear-model keys
    assert "[model]" in out and "beta = 0.5" in out and "{'" not in out
    for key in ("lambda1", "mu2", "kinetic", "stab_power", "proposal_mu2", "metropolis_hits", "start_branch"):
        assert f"{key} =" not in out, key


def test_info_reads_every_file_the_tool_writes(tmp_path, capsys):
    base = ROOT / "runs" / "sweep-u3.toml"
    sweep = tmp_path / "s.toml"
    sweep.write_text(base.read_text().replace("sweeps_per_step = 20", "sweeps_per_step = 2")
                     .replace("thermalize = 100", "thermalize = 2").replace("step = 0.2", "step = 2.0"))
    assert main(["hysteresis", str(sweep), "--out", str(tmp_path / "s.h5"), "--quiet"]) == 0
    run = tmp_path / "r.toml"
    run.write_text("\n".join(['name = "r"', "seed = 2", "[lattice]", "shape = [4, 4]", "[run]",
                              "thermalize = 2", "measurements = 30", f'output = "{tmp_path}"']))
    assert main(["run", str(run), "--quiet"]) == 0
    h5 = tmp_path / "r" / "r.h5"
    assert main(["analyze", str(h5), "--quiet"]) == 0
    assert main(["export", str(h5), "--out", str(tmp_path / "ex")]) == 0
    assert main(["export", str(h5), "--format", "csv", "--out", str(tmp_path / "exc")]) == 0
    assert main(["export", str(h5), "--format", "hdf5", "--out", str(tmp_path / "exh")]) == 0
    capsys.readouterr()
    files = [tmp_path / "s.h5", h5, *sorted((tmp_path / "r").glob("r.analysis.*")),
             *sorted(tmp_path.glob("ex*.*"))]
    assert len(files) >= 6
    for f in files:
        assert main(["info", str(f)]) == 0, f
        out = capsys.readouterr().out
        assert out.startswith(str(f)), out
    assert main(["info", str(tmp_path / "s.toml")]) == 2  # not a file sigmasim writes: one line


def test_info_reads_a_scan_index(tmp_path, capsys):
    pytest.importorskip("dask")
    scan = tmp_path / "scan.toml"
    scan.write_text("\n".join([
        'name = "sc"', "seed = 2", "[lattice]", "shape = [4, 4]", "[run]", "thermalize = 2",
        "measurements = 20", "[scan]", f'output = "{tmp_path / "sc"}"', "workers = 1",
        "[scan.product]", '"model.theta" = [0.5, 1.0]']))
    r = subprocess.run([sys.executable, "-m", "sigmasim", "scan", str(scan), "--quiet"], capture_output=True,
                       text=True, timeout=600, env=subprocess_env())
    assert r.returncode == 0, r.stderr
    for name in ("index.h5", "index.csv"):
        assert main(["info", str(tmp_path / "sc" / name)]) == 0
        out = capsys.readouterr().out
        assert "2 " in out and ("scan index" in out), out
