"""Damaged, foreign and tampered run files: one-line RunFileError / exit 2, never a traceback.

Every case is given to ``sigmasim.storage.open_run``, ``sigmasim info`` and
``sigmasim run --resume``.  A spy on h5py checks that only numeric datasets and
plain (string or numeric) attributes are ever read: nothing is unpickled and
no object, opaque, compound or reference data reaches the program.
"""

import json
import shutil

import h5py
import numpy as np
import pytest

from sigmasim.cli import main
from sigmasim.config import load_config
from sigmasim.errors import RunFileError
from sigmasim.storage import open_run, read_state

CONFIG = """
name = "dmg"
seed = 12
[lattice]
shape = [4, 4]
[model]
nf = 2
beta = 0.5
mass = 0.2
kappa = 0.3
theta = 1.0
[run]
thermalize = 2
measurements = 6
checkpoint_every = 3
"""


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    base = tmp_path_factory.mktemp("dmg")
    cfg = base / "dmg.toml"
    cfg.write_text(CONFIG)
    # an interrupted-looking file: stop after sweep 6 (not complete, so --resume has work to do)
    short = base / "short.toml"
    short.write_text(CONFIG.replace("measurements = 6", "measurements = 4"))
    assert main(["run", str(short), "--output", str(base / "src"), "--quiet"]) == 0
    return cfg, base / "src" / "dmg" / "dmg.h5"


def _attr(key, value):
    def f(h):
        h.attrs[key] = value
    return f


def _del_attr(key, where="/"):
    def f(h):
        del h[where].attrs[key]
    return f


def _delete(path):
    def f(h):
        del h[path]
    return f


def _replace(path, data):
    def f(h):
        del h[path]
        h[path] = data
    return f


def _resize(path, n):
    def f(h):
        h[path].resize(n, axis=0)
    return f


STR = h5py.string_dtype()
# name -> (tamper(h5py.File), may an analysis read still succeed?)
TAMPER = {
    "no format attribute": (_del_attr("format"), False),
    "other format": (_attr("format", "other-program"), False),
    "format is a number": (_attr("format", 7), False),
    "format version 3": (_attr("format_version", 3), False),
    "format version as text": (_attr("format_version", "1"), False),
    "format version array": (_attr("format_version", np.array([1, 1])), False),
    "no format version": (_del_attr("format_version"), False),
    "config not JSON": (_attr("config", "{not json"), False),
    "config JSON list": (_attr("config", "[1, 2]"), False),
    "config invalid values": (_attr("config", json.dumps({"model": {"nf": 99}})), False),
    "config deep JSON": (_attr("config", "[" * 100000 + "]" * 100000), False),
    "config is numbers": (_attr("config", np.arange(3)), False),
    "no config": (_del_attr("config"), False),
    "delete /state/re": (_delete("state/re"), False),
    "delete /state": (_delete("state"), False),
    "delete /series/omega": (_delete("series/omega"), False),
    "delete /slices": (_delete("slices"), False),
    "delete /provenance": (_delete("provenance"), False),
    "state/re wrong shape": (_replace("state/re", np.zeros((3, 16))), False),
    "state/re 1-d": (_replace("state/re", np.zeros(64)), False),
    "condensate wrong width": (_replace("series/condensate", np.zeros((4, 3), complex)), False),
    "slices/U wrong T": (_replace("slices/U", np.zeros((4, 2, 2, 2), complex)), False),
    "series too short": (_resize("series/action", 2), False),
    "slices too long": (_resize("slices/det", 9), False),
    "n_meas mismatch": (_attr("n_meas", 5), False),
    "n_meas as text": (_attr("n_meas", "4"), False),
    "sweep vs n_meas": (_attr("sweep", 40), False),
    "state n_meas mismatch": (lambda h: h["state"].attrs.__setitem__("n_meas", 3), True),
    "state step as text": (lambda h: h["state"].attrs.__setitem__("step", "12"), True),
    "state win_acc missing": (_del_attr("win_acc", "state"), True),
    "state win_acc wrong": (lambda h: h["state"].attrs.__setitem__("win_acc", np.zeros(5)), True),
    "state step_size nan": (lambda h: h["state"].attrs.__setitem__("step_size", np.nan), True),
    "field with NaN": (lambda h: h["state/re"].__setitem__((0, 3), np.nan), True),
    "series as strings": (_replace("series/action", np.array(["x"] * 4, dtype=object).astype(STR)), False),
    "state as opaque bytes": (_replace("state/re", np.zeros((4, 16), dtype="V8")), False),
    "series compound": (_replace("series/sweep", np.zeros(4, dtype=[("a", "<i8")])), False),
    "series object refs": (lambda h: _replace("series/det", np.array([h.ref] * 4, dtype=h5py.ref_dtype))(h), False),
    "series float32": (_replace("series/action", np.zeros(4, dtype=np.float32)), False),
    "series is a group": (lambda h: (h.__delitem__("series/omega"), h.create_group("series/omega")), False),
}


class _Spy:
    """Records what h5py hands to sigmasim: dataset dtypes read and attribute value types."""

    def __init__(self, monkeypatch):
        self.bad = []
        ds_get, at_get = h5py.Dataset.__getitem__, h5py.AttributeManager.__getitem__
        spy = self

        def dataset_getitem(ds, key):
            if ds.dtype.kind not in "iufc" or ds.dtype.fields:
                spy.bad.append(f"dataset {ds.name} dtype {ds.dtype}")
            return ds_get(ds, key)

        def attr_getitem(am, key):
            v = at_get(am, key)
            ok = isinstance(v, (str, bytes, int, float, np.integer, np.floating, np.bool_)) or (
                isinstance(v, np.ndarray) and v.dtype.kind in "biufc" and not v.dtype.fields)
            if not ok:
                spy.bad.append(f"attribute {key} of type {type(v).__name__}")
            return v

        monkeypatch.setattr(h5py.Dataset, "__getitem__", dataset_getitem)
        monkeypatch.setattr(h5py.AttributeManager, "__getitem__", attr_getitem)


def _case_dir(tmp_path, good):
    cfg, src = good
    out = tmp_path / "out"
    target = out / "dmg" / "dmg.h5"
    target.parent.mkdir(parents=True)
    shutil.copyfile(src, target)
    return cfg, out, target


def _one_line_exit_2(capsys, argv):
    rc = main(argv)
    err = capsys.readouterr().err
    assert rc == 2, err
    assert err.count("\n") == 1 and err.startswith("sigmasim: error:") and "Traceback" not in err, err
    return err


def _all_three(capsys, cfg, out, target, analysis_may_work=False):
    try:
        open_run(target)
        assert analysis_may_work, "open_run accepted a damaged file"
    except RunFileError as exc:
        assert "\n" not in str(exc) and str(exc)
    rc = main(["info", str(target)])
    err = capsys.readouterr().err
    assert rc == (0 if analysis_may_work and not err else 2), err
    if rc == 2:
        assert err.count("\n") == 1 and err.startswith("sigmasim: error:") and "Traceback" not in err, err
    return _one_line_exit_2(capsys, ["run", str(cfg), "--output", str(out), "--quiet", "--resume"])


@pytest.mark.parametrize("name", list(TAMPER))
def test_tampered_file(tmp_path, good, capsys, monkeypatch, name):
    cfg, out, target = _case_dir(tmp_path, good)
    tamper, analysis_may_work = TAMPER[name]
    with h5py.File(target, "a") as h:
        tamper(h)
    before = target.read_bytes()
    spy = _Spy(monkeypatch)
    _all_three(capsys, cfg, out, target, analysis_may_work)
    with pytest.raises(RunFileError):
        read_state(target, load_config(cfg, {"output": str(out)}))
    assert spy.bad == []
    assert target.read_bytes() == before  # a refused file is never touched


@pytest.mark.parametrize("frac", [0.0, 0.001, 0.01, 0.1, 0.3, 0.5, 0.75, 0.9, 0.99, 0.999])
def test_truncated_file(tmp_path, good, capsys, frac):
    cfg, out, target = _case_dir(tmp_path, good)
    data = target.read_bytes()
    n = int(frac * len(data)) if frac < 0.999 else len(data) - 1
    target.write_bytes(data[:n])
    err = _all_three(capsys, cfg, out, target)
    assert "dmg.h5" in err


def test_foreign_hdf5_and_not_a_file(tmp_path, capsys, good):
    cfg, out, target = _case_dir(tmp_path, good)
    target.unlink()
    with h5py.File(target, "w") as h:
        h["data"] = np.arange(3)
        h.attrs["config"] = "{}"
    assert "not a sigmasim run file" in _all_three(capsys, cfg, out, target)
    target.unlink()
    target.mkdir()  # a folder where the file should be
    _all_three(capsys, cfg, out, target)
    target.rmdir()
    target.write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 1000)  # HDF5 magic, nothing behind it
    _all_three(capsys, cfg, out, target)


def test_good_file_reads_numbers_and_strings_only(tmp_path, good, monkeypatch, capsys):
    cfg, out, target = _case_dir(tmp_path, good)
    spy = _Spy(monkeypatch)
    d = open_run(target)
    st = read_state(target, load_config(cfg, {"output": str(out)}))
    assert len(d) == 4 and st.n_meas == 4 and st.sweep == 6
    assert main(["info", str(target)]) == 0
    assert main(["run", str(cfg), "--output", str(out), "--quiet", "--resume"]) == 0
    assert spy.bad == []
    assert len(open_run(target)) == 6


def test_resume_with_a_different_config_is_refused(tmp_path, good, capsys):
    cfg, out, target = _case_dir(tmp_path, good)
    before = target.read_bytes()
    other = tmp_path / "other.toml"
    other.write_text(CONFIG.replace("beta = 0.5", "beta = 0.51"))
    err = _one_line_exit_2(capsys, ["run", str(other), "--output", str(out), "--quiet", "--resume"])
    assert "different config" in err
    other.write_text(CONFIG.replace("seed = 12", "seed = 13"))
    assert "different config" in _one_line_exit_2(capsys, ["run", str(other), "--output", str(out),
                                                           "--quiet", "--resume"])
    assert target.read_bytes() == before
