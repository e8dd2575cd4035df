"""The model registry: every model fulfils the contract of sigmasim.models, the chain and the run
file ask the model (no kind tests elsewhere), and version-1 linear run files stay readable."""

import ast
import shutil
from pathlib import Path

import h5py
import numpy as np
import pytest

from sigmasim import models
from sigmasim.chain import MemorySink, Simulation, run_chain
from sigmasim.config import SCHEMA, UPDATES, config_from_dict, read_toml
from sigmasim.errors import RunFileError
from sigmasim.storage import FORMAT_VERSION, open_run, read_state

from runfiles import resume

ROOT = Path(__file__).resolve().parents[1]
DATA = Path(__file__).with_name("data")


pytestmark = pytest.mark.usefixtures("one_thread")  # conftest: one numba thread


def test_registry_lists_every_schema_kind():
    choices = SCHEMA["model"]["kind"][0].split(":", 1)[1].split(",")
    assert set(models.kinds()) == set(choices)
    with pytest.raises(ValueError, match="unknown model kind 'nope'"):
        models.get("nope")


@pytest.mark.parametrize("kind", models.kinds())
def test_model_fulfils_the_contract(kind):
    m = models.get(kind)
    assert m.KIND == kind
    for name in ("sweep", "action", "accept_metropolis", "accept_phase", "omega_h"):
        assert name in m.SERIES
    assert {k for k, _ in m.SERIES.values()} <= {"int", "real", "complex", "complex_nf"}
    assert {k for k, _ in m.SLICES.values()} <= {"matrix", "complex", "real"}
    assert m.SLICES[m.FIELD_SLICE][0] == "matrix"
    assert set(m.UPDATES) == set(UPDATES)
    assert isinstance(m.CONVENTIONS, str) and m.CONVENTIONS.startswith("S = ")
    assert m.STEP_MAX > 0 and isinstance(m.UNITARY, bool)
    for old, new in m.VERSION1_NAMES.items():
        assert new[len("slices/"):] in m.SLICES or new[len("series/"):] in m.SERIES
    for key in m.CONFIG_KEYS:
        section, _, name = key.partition(".")
        assert name in SCHEMA[section]
    assert callable(m.initial_field) and callable(m.measure) and callable(m.project)


def _tiny(kind, **run):
    model = {"nf": 2, "mass": 0.2, "theta": 1.0}
    if kind == "linear":
        model.update(kind="linear", mu2=0.5, lambda1=0.2, c=0.1)
    else:
        model.update(beta=0.5, kappa=0.2)
    return config_from_dict({
        "name": f"tiny-{kind}", "seed": 2, "lattice": {"shape": [4, 2]}, "model": model,
        "updates": {"schedule": [{"update": "metropolis"}, {"update": "heatbath"}, {"update": "overrelax"}]},
        "run": {"thermalize": 4, "measurements": 5, **run}})


@pytest.mark.parametrize("kind", models.kinds())
def test_records_are_the_models(kind):
    """A chain's records hold exactly the model's SERIES and SLICES, as the run file stores them."""
    sim = Simulation(_tiny(kind))
    assert sim.model is models.get(kind)
    sink = MemorySink()
    run_chain(sim, (sink,))
    rec = sink.records[0]
    want = set(sim.model.SERIES) | {f"slices/{k}" for k in sim.model.SLICES}
    assert set(rec) == want


def _assert_kind_free(path: Path):
    """Comparisons with a model name, or of a ``getattr(x, "kind", ...)``, in ``path``."""
    names = set(models.kinds())
    tree = ast.parse(path.read_text())
    bad = []
    for node in ast.walk(tree):
        if not isinstance(node, ast.Compare):
            continue
        for side in [node.left, *node.comparators]:
            consts = side.elts if isinstance(side, (ast.Tuple, ast.List, ast.Set)) else [side]
            is_name = any(isinstance(c, ast.Constant) and c.value in names for c in consts)
            is_getattr = (isinstance(side, ast.Call) and getattr(side.func, "id", "") == "getattr"
                          and len(side.args) > 1 and getattr(side.args[1], "value", None) == "kind")
            if is_name or is_getattr:
                bad.append(f"{path.relative_to(ROOT)}:{node.lineno}")
                break
    return bad


# config.py defines model.kind (the schema's choices and which keys hash); the two single-module
# files below become the sigmasim/protocols/ and sigmasim/vacua/ packages, checked like the rest
_EXEMPT = {"config.py", "protocols.py", "vacua.py"}


def test_no_kind_tests_outside_the_models():
    bad = []
    for path in sorted((ROOT / "sigmasim").rglob("*.py")):
        rel = path.relative_to(ROOT / "sigmasim")
        if rel.parts[0] in ("models", "kernels") or str(rel) in _EXEMPT:
            continue
        bad += _assert_kind_free(path)
    assert not bad, f"kind tests outside sigmasim/models: {bad}"


def test_the_kind_check_finds_a_kind_test(tmp_path):
    p = ROOT / "sigmasim" / "_probe_kind.py"
    try:
        p.write_text('def f(cfg, a):\n    return cfg.kind == "linear" or getattr(cfg, "kind", "c") != "x"'
                     ' or a.dtype.kind == "f" or cfg.kind in ("chiral",)\n')
        assert len(_assert_kind_free(p)) == 3
    finally:
        p.unlink()


# a linear run file of format version 1, written by sigmasim before the models package
# (tests/data/linear-v1.toml run with `sigmasim run`, then copied with smaller HDF5 chunks)
def _v1_copy(tmp_path):
    raw = read_toml(DATA / "linear-v1.toml")
    cfg = config_from_dict(raw, {"output": str(tmp_path)})
    cfg.run_dir.mkdir(parents=True)
    shutil.copyfile(DATA / "linear-v1.h5", cfg.run_file)
    return raw, cfg


def test_version1_linear_file_reads_under_the_new_names(tmp_path):
    _, cfg = _v1_copy(tmp_path)
    with h5py.File(cfg.run_file, "r") as f:
        assert int(f.attrs["format_version"]) == 1 and "slices/U" in f and "series/action_beta" in f
        old_u = f["slices/U"][...]
    d = open_run(cfg.run_file)
    assert set(d.slices) == {"Phi", "det", "phi2"} and "action_beta" not in d.series
    np.testing.assert_array_equal(d.slices["Phi"], old_u)
    assert len(d) == 3 and d.status == "complete"
    assert read_state(cfg.run_file, cfg).sweep == 5


def test_resumed_version1_file_becomes_version2_and_continues_the_chain(tmp_path):
    """Extending a version-1 linear run gives the file a fresh version-2 run of the longer config
    writes, record for record."""
    raw, cfg = _v1_copy(tmp_path / "old")
    longer = config_from_dict(raw, {"output": str(tmp_path / "old"), "measurements": 6})
    resume(longer)
    fresh = config_from_dict(raw, {"output": str(tmp_path / "new"), "measurements": 6})
    fresh.run_dir.mkdir(parents=True)
    from runfiles import run_file

    assert run_file(fresh)
    with h5py.File(longer.run_file, "r") as a, h5py.File(fresh.run_file, "r") as b:
        assert int(a.attrs["format_version"]) == FORMAT_VERSION == 2
        assert "slices/U" not in a and "series/action_beta" not in a
        assert a.attrs["conventions"] == models.get("linear").CONVENTIONS
        for group in ("series", "slices", "state"):
            assert set(a[group]) == set(b[group])
            for k in a[group]:
                np.testing.assert_array_equal(a[group][k][...], b[group][k][...], err_msg=k)


def test_unknown_format_version_is_refused(tmp_path):
    _, cfg = _v1_copy(tmp_path)
    with h5py.File(cfg.run_file, "a") as f:
        f.attrs["format_version"] = 3
    with pytest.raises(RunFileError, match="format version 3; this sigmasim reads versions 1, 2"):
        open_run(cfg.run_file)
