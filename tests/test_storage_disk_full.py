"""Small outputs on a full disk: the sweep file, the sweep and tempering checkpoints, the scan index
and the exports end in one line naming the full disk, never in a crash, and leave nothing behind.

The outputs are built from made-up data (no simulation), so each test takes well under a second;
the tests on a really full disk mount a small tmpfs (root only) and run the writer in a child
process, since HDF5 dying on a full disk takes the whole process down.
"""

import json
import os
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from sigmasim.cli import main
from runfiles import assert_one_line_error, fill_disk, small_tmpfs, subprocess_env

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

CFG = """
name = "df"
seed = 3
[lattice]
shape = [8, 4]
[model]
nf = 2
group = "U"
beta = 0.6
mass = 0.3
kappa = 0.2
[run]
thermalize = 1
measurements = 2
threads = 1
[hysteresis]
start = 0.0
stop = 1.0
step = 0.5
sweeps_per_step = 2
"""

N = 4000  # about 140 KB of HDF5 output per writer below


def _toml(folder: Path) -> Path:
    p = folder / "sw.toml"
    p.write_text(CFG)
    return p


def _fake_sweep(toml):
    from sigmasim.protocols import SWEEP_SCHEMA, SweepParams, SweepResult, load_protocol

    cfg, raw = load_protocol(toml, "hysteresis", SWEEP_SCHEMA)
    r = np.random.default_rng(0)
    return SweepResult(config=cfg, params=SweepParams(**raw), steps={"theta": r.random(N)},
                       series={"theta": r.random(N), "omega_h": r.random(N) + 1j * r.random(N)},
                       area=r.random(1), area_stat_error=r.random(1), jump_up=r.random(1),
                       jump_down=r.random(1))


def _state():
    from sigmasim.chain import ChainState

    r = np.random.default_rng(1)
    return ChainState(re=r.random((4, N // 4)), im=r.random((4, N // 4)))


def write_sweep_cli(path: Path) -> int:
    """``sigmasim hysteresis`` with the simulation replaced by made-up results."""
    import sigmasim.protocols.hysteresis as protocols

    toml = _toml(path.parent.parent)
    saved = protocols.run_sweep, protocols.tree_level
    protocols.run_sweep = lambda config, params, **kw: _fake_sweep(toml)
    protocols.tree_level = lambda *a, **kw: {}
    try:
        return main(["hysteresis", str(toml), "--out", str(path), "--overwrite", "--quiet"])
    finally:  # in-process callers run other tests afterwards: leave the module as it was
        protocols.run_sweep, protocols.tree_level = saved


def write_sweep_checkpoint(path: Path) -> None:
    from sigmasim.protocols import SWEEP_SCHEMA, SweepParams, load_protocol
    from sigmasim.protocols.hysteresis import _save_sweep_checkpoint

    cfg, raw = load_protocol(_toml(path.parent.parent), "hysteresis", SWEEP_SCHEMA)
    ser = {"theta": np.zeros(N), "omega_h": np.zeros(N, complex), "sweep": np.arange(N)}
    _save_sweep_checkpoint(path, cfg, SweepParams(**raw), SimpleNamespace(state=_state()), 1, ser, 1.0)


def write_temper_checkpoint(path: Path) -> None:
    from sigmasim.protocols import SWEEP_SCHEMA, SweepParams, load_protocol
    from sigmasim.protocols.tempering import _save_temper_checkpoint

    cfg, _ = load_protocol(_toml(path.parent.parent), "hysteresis", SWEEP_SCHEMA)
    recs = [{"action": float(i), "slices/x": np.zeros(4)} for i in range(N // 8)]
    sink = (SimpleNamespace(records=recs),)
    _save_temper_checkpoint(path, cfg, SweepParams(), [SimpleNamespace(state=_state())] * 2,
                            [sink, sink], 5, 2, np.ones(1), np.ones(1), np.arange(2), [[0, 1]], [0, 0],
                            [1], 1.0)


def write_scan_index(path: Path) -> None:
    from sigmasim.scan import _write_h5

    spec = SimpleNamespace(name="s", product={"model.theta": [0.0]}, zipped={}, base={})
    rows = [[float(i), f"point {i:05d} " * 2] for i in range(N)]
    _write_h5(path, ["theta", "label"], rows, spec)


def write_hdf5_export(path: Path) -> None:
    from sigmasim.export import array_entry, write_arrays

    a = np.random.default_rng(2).random((N, 4))
    write_arrays(path.with_suffix(""), {"a": a}, [array_entry("a", a, "made up")], "hdf5", {})


WRITERS = {"sweep file": write_sweep_cli, "sweep checkpoint": write_sweep_checkpoint,
           "tempering checkpoint": write_temper_checkpoint, "scan index": write_scan_index,
           "hdf5 export": write_hdf5_export}


def _call(which, path):
    """Run a writer as the CLI would: 0, or 2 with the one-line message on stderr."""
    from sigmasim.errors import SigmasimError

    try:
        rc = WRITERS[which](path)
    except SigmasimError as exc:
        print(f"sigmasim: error: {exc}", file=sys.stderr)
        return 2
    return rc or 0


def _one_line(err):
    assert_one_line_error(err)
    assert "No space left on device" in err, err


def _snapshot(folder: Path) -> dict:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.name != "filler"}


# --------------------------------------------------------------- the free-space probe says full
@pytest.mark.parametrize("which", sorted(WRITERS))
def test_a_small_hdf5_output_on_a_nearly_full_disk_is_refused_in_one_line(which, tmp_path, capsys, monkeypatch):
    import sigmasim.files as files

    out = tmp_path / "o" / "out.h5"
    out.parent.mkdir(parents=True)
    out.write_bytes(b"previous")
    monkeypatch.setattr(files, "free_bytes", lambda folder: 100 << 10)
    rc = _call(which, out)
    err = capsys.readouterr().err
    assert rc == 2, err
    _one_line(err)
    assert out.read_bytes() == b"previous"
    assert sorted(p.name for p in out.parent.iterdir()) == ["out.h5"]  # no temporary file


def test_the_sweep_command_on_a_nearly_full_disk_exits_2_with_one_line(tmp_path, capsys, monkeypatch):
    import sigmasim.files as files

    out = tmp_path / "full" / "sw.h5"
    out.parent.mkdir()
    out.write_bytes(b"previous")
    monkeypatch.setattr(files, "free_bytes", lambda folder: 100 << 10)
    assert write_sweep_cli(out) == 2
    err = capsys.readouterr().err
    _one_line(err)
    assert "sweep file" in err
    assert out.read_bytes() == b"previous"
    assert sorted(p.name for p in out.parent.iterdir()) == ["sw.h5"]
    monkeypatch.undo()
    assert write_sweep_cli(out) == 0  # with room, the same call writes a readable file
    capsys.readouterr()
    from sigmasim.protocols import read_sweep

    got = read_sweep(out)
    np.testing.assert_array_equal(got["series"]["theta"], _fake_sweep(out.parent.parent / "sw.toml").series["theta"])


# --------------------------------------------------------------- a really full disk (tmpfs)
@pytest.fixture
def small_disk(tmp_path):
    """A 1 MiB tmpfs (needs root and a kernel that lets this process mount)."""
    with small_tmpfs(tmp_path / "disk", "1m") as mnt:
        yield mnt


def _fill(folder, leave):
    fill_disk(folder, leave)



@pytest.mark.parametrize("which", sorted(WRITERS))
def test_a_small_hdf5_output_on_a_really_full_disk_never_crashes(which, small_disk):
    """The free-space probe is bypassed, so the write itself meets ENOSPC (HDF5 writing straight to
    the disk died here with a segfault and left its temporary file)."""
    out = small_disk / "o" / "out.h5"
    out.parent.mkdir()
    out.write_bytes(b"previous")
    script = ("import sys; import sigmasim.files as s; s.free_bytes = lambda folder: 1 << 40; "
              "import test_storage_disk_full as t; from pathlib import Path; "
              "sys.exit(t._call(sys.argv[1], Path(sys.argv[2])))")
    for leave in (8 << 10, 40 << 10, 100 << 10):  # ENOSPC in different places of the file
        (small_disk / "filler").unlink(missing_ok=True)
        _fill(small_disk, leave)
        r = subprocess.run([sys.executable, "-c", script, which, str(out)], capture_output=True, text=True,
                           env=subprocess_env(PYTHONPATH=os.pathsep.join([str(ROOT), str(HERE)])), cwd=small_disk.parent, timeout=120)
        assert r.returncode == 2, (leave, r.returncode, r.stderr[-2000:])
        _one_line(r.stderr)
        assert out.read_bytes() == b"previous"
        assert sorted(p.name for p in out.parent.iterdir()) == ["out.h5"]


# --------------------------------------------------------------- a CSV export is all or nothing
def _csv_arrays():
    from sigmasim.export import array_entry

    r = np.random.default_rng(4)
    arrays = {k: r.random((2000, 3)) for k in ("a", "b", "c", "d")}
    return arrays, [array_entry(k, v, "made up") for k, v in arrays.items()]


def test_a_csv_export_checks_the_free_space_for_all_its_files_first(tmp_path, monkeypatch):
    import sigmasim.files as files
    from sigmasim.errors import RunFileError
    from sigmasim.export import write_arrays

    arrays, entries = _csv_arrays()
    one = len(",".join(f"{x:.17g}" for x in arrays["a"][0])) * len(arrays["a"])
    monkeypatch.setattr(files, "free_bytes", lambda folder: int(2.5 * one))  # room for two files
    (tmp_path / "keep.csv").write_text("not ours\n")
    with pytest.raises(RunFileError, match="No space left on device"):
        write_arrays(tmp_path / "x", arrays, entries, "csv", {})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.csv"]


def test_a_csv_export_that_fails_on_a_later_file_removes_the_files_it_wrote(tmp_path, monkeypatch, capsys):
    import errno

    import sigmasim.files as files
    from sigmasim.errors import RunFileError
    from sigmasim.export import write_arrays

    arrays, entries = _csv_arrays()
    (tmp_path / "keep.csv").write_text("not ours\n")
    (tmp_path / "x_d.csv").write_text("an older export, replaced only by a complete one\n")
    real = files.atomic_output
    calls = []

    def flaky(path, write, what="output"):  # the disk fills up while the third file is written
        calls.append(path.name)

        def failing(tmp):
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(path, failing if len(calls) == 3 else write, what)

    monkeypatch.setattr(files, "atomic_output", flaky)
    with pytest.raises(RunFileError, match="No space left on device.*nothing was left behind"):
        write_arrays(tmp_path / "x", arrays, entries, "csv", {})
    assert len(calls) == 3
    assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.csv", "x_d.csv"]
    assert (tmp_path / "x_d.csv").read_text().startswith("an older export")
    monkeypatch.undo()
    paths = write_arrays(tmp_path / "x", arrays, entries, "csv", {})
    side = json.loads(paths[-1].read_text())
    assert side["files"] == ["x_a.csv", "x_b.csv", "x_c.csv", "x_d.csv"]
    got = np.loadtxt(tmp_path / "x_c.csv", delimiter=",", skiprows=1)
    np.testing.assert_array_equal(got, arrays["c"])
