"""Export of run files: arrays round-trip, and the sidecar truth is the exact result."""

import json

import h5py
import numpy as np
import pytest

from sigmasim import exact
from sigmasim.analysis import gamma_analysis
from sigmasim.chain import Simulation, run_chain
from sigmasim.config import config_from_dict
from sigmasim.errors import ConfigError, RunFileError
from sigmasim.cli import export_command
from sigmasim.export import export_run, read_sidecar
from sigmasim.storage import RunWriter, open_run


def _run(tmp_path, name, shape, meas=120, **model):
    cfg = config_from_dict({
        "name": name, "seed": 3, "lattice": {"shape": shape}, "model": model,
        "run": {"thermalize": 5, "measurements": meas, "output": str(tmp_path), "start": "hot"},
    })
    cfg.run_dir.mkdir(parents=True, exist_ok=True)
    run_chain(Simulation(cfg), (RunWriter(cfg, cfg.run_file),))
    return cfg.run_file


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("runs")
    return {
        "u2": _run(tmp, "u2", [8, 8], nf=2, beta=0.0, mass=0.5, kappa=0.3, theta=1.0,
                   theta_placement="split"),
        "u3nd": _run(tmp, "u3nd", [4, 4], meas=40, nf=3, beta=0.0, mass=[0.4, 0.2, -0.1],
                     kappa=0.5, theta=2.5, theta_placement="anomaly"),
        "su3": _run(tmp, "su3", [8, 8], group="SU", nf=3, beta=0.0, mass=0.7, theta=2.0),
        "chain": _run(tmp, "chain", [16], meas=300, nf=1, beta=0.8, mass=0.3, kappa=0.2, theta=0.7),
        "tree": _run(tmp, "tree", [4, 4], meas=20, nf=2, beta=2.0, mass=0.2, kappa=0.3),
    }


def _truth(path, fmt="npz", **kw):
    paths = export_run(path, fmt, **kw)
    return paths, json.loads(paths[-1].read_text())


def _v(side, k):
    return side["truth"][k]["value"]


def test_beta0_u_truth_is_the_one_site_integral(runs):
    _, side = _truth(runs["u2"])
    cfg = open_run(runs["u2"]).config
    tm, ta = cfg.theta_angles
    r = exact.one_site_u(2, 0.5, 0.3, tm, ta)
    assert _v(side, "omega_re") == r["re_tr_u"] and _v(side, "omega_im") == r["im_tr_u"]
    assert _v(side, "omega_h_re") == r["re_tr_thetam_u"]
    assert _v(side, "omega_h_im") == r["im_tr_thetam_u"]
    assert _v(side, "det_re") == r["re_det_u"] and _v(side, "det_im") == r["im_det_u"]
    assert _v(side, "condensate_1_re") == r["re_tr_u"]
    assert _v(side, "action_det") == pytest.approx(-0.6 * r["re_thetaa_det_u"], rel=1e-15)
    assert _v(side, "action_mass") == pytest.approx(-2 * 0.5 * r["re_tr_thetam_u"], rel=1e-15)
    assert _v(side, "action_beta") == 0.0
    assert all(e["how"] == "exact" and e["error"] is None for e in side["truth"].values())
    assert "mass_pion" not in side["truth"]  # no tree level at beta = 0


def test_beta0_nondegenerate_and_su_truth(runs):
    _, side = _truth(runs["u3nd"])
    cfg = open_run(runs["u3nd"]).config
    tm, ta = cfg.theta_angles
    r = exact.one_site_u(3, [0.4, 0.2, -0.1], 0.5, tm, ta)
    assert _v(side, "omega_re") == r["re_tr_u"] and _v(side, "det_im") == r["im_det_u"]
    assert "condensate_0_re" not in side["truth"] and "action_mass" not in side["truth"]
    _, side = _truth(runs["su3"])
    r = exact.one_site_su(3, 0.7, 2.0 / 3)
    assert _v(side, "omega_re") == r["re_tr_u"] and _v(side, "omega_h_im") == r["im_tr_thetam_u"]
    assert _v(side, "det_re") == 1.0 and _v(side, "det_im") == 0.0


def test_u1_chain_truth_is_the_transfer_matrix(runs):
    _, side = _truth(runs["chain"])
    r = exact.u1_chain(16, 0.8, 0.3, 0.2, 0.7, 0.0)
    assert _v(side, "omega_re") == r["re_u"] and _v(side, "omega_im") == r["im_u"]
    assert _v(side, "action_beta") == pytest.approx(-0.8 * r["energy"], rel=1e-15)
    np.testing.assert_array_equal(_v(side, "correlator_U"), r["g_conn"])


@pytest.mark.parametrize("run", ["u2", "su3", "chain"])
def test_measured_means_agree_with_the_truth(runs, run):
    """Guards the mapping truth name -> array (signs, frames), not the engine."""
    paths, side = _truth(runs[run])
    arr = np.load(paths[0])
    checked = 0
    for k, e in side["truth"].items():
        if isinstance(e["value"], list):
            continue
        part = k[-2:] if k.endswith(("_re", "_im")) else None
        base = k[:-3] if part else k
        if base.startswith("condensate_"):
            x = arr["condensate"][:, int(base.split("_")[1])]
        else:
            x = arr[base]
        x = x.real if part == "re" else x.imag if part == "im" else x
        if np.ptp(x) < 1e-12:
            assert x.mean() == pytest.approx(e["value"], abs=1e-12)
            continue
        g = gamma_analysis(x)
        assert abs(g.value - e["value"]) < 5 * g.error, k
        checked += 1
    assert checked >= 6


def test_tree_level_truth_at_large_beta(runs):
    _, side = _truth(runs["tree"])
    t = side["truth"]
    assert t["m2_pion"]["value"] == pytest.approx(0.2 / 2.0)
    assert t["m2_eta_prime"]["value"] == pytest.approx((0.2 + 2 * 0.3 * 2) / 2.0)
    assert t["mass_pion"]["value"] == pytest.approx(exact.free_scalar_mass(0.1))
    assert t["mass_pion"]["how"] == "tree level" and "no source" in t["mass_pion"]["source"]
    # theta = 0, h > 0: one vacuum U = 1 with energy -nf h - 2 kappa
    assert t["vacuum_0_energy"]["value"] == pytest.approx(-2 * 0.2 - 2 * 0.3)
    assert t["vacuum_0_omega_h_re"]["value"] == pytest.approx(1.0)


@pytest.mark.parametrize("fmt", ["npz", "csv", "hdf5"])
def test_formats_round_trip(runs, tmp_path, fmt):
    data = open_run(runs["u2"])
    paths = export_run(runs["u2"], fmt, out=str(tmp_path / "ex"))
    side = read_sidecar(tmp_path / "ex.json")
    assert paths[-1] == tmp_path / "ex.json"
    assert side["format"] == "sigmasim-sidecar" and side["data_format"] == fmt
    assert side["seed"] == 3 and side["config"]["model"]["nf"] == 2
    assert {"git_commit", "sigmasim", "run_file"} <= set(side["provenance"])
    names = [e["name"] for e in side["arrays"]]
    assert "omega" in names and "slice_U" in names and "slice_det" in names
    want = {**data.series, **{"slice_" + k: v for k, v in data.slices.items()}}
    for e in side["arrays"]:
        ref = want[e["name"]]
        assert e["shape"] == list(ref.shape) and e["dtype"] == str(ref.dtype)
        if fmt == "npz":
            got = np.load(tmp_path / e["file"])[e["name"]]
        elif fmt == "hdf5":
            with h5py.File(tmp_path / e["file"], "r") as f:
                got = f[e["name"]][...]
        else:
            lines = (tmp_path / e["file"]).read_text().splitlines()
            assert lines[0].split(",") == e["columns"]
            mat = np.loadtxt(tmp_path / e["file"], delimiter=",", skiprows=1, ndmin=2)
            flat = ref.reshape(ref.shape[0], -1)
            if np.iscomplexobj(flat):
                got = (mat[:, 0::2] + 1j * mat[:, 1::2]).reshape(ref.shape)
            else:
                got = mat.reshape(ref.shape)
        np.testing.assert_array_equal(got, ref, err_msg=e["name"])
    if fmt == "csv":
        assert (tmp_path / "ex_omega.csv").read_text().startswith("omega_re,omega_im\n")
        assert "condensate_1_im" in (tmp_path / "ex_condensate.csv").read_text().splitlines()[0]


def test_reference_adds_labelled_estimates(runs, tmp_path):
    _, side = _truth(runs["tree"], out=str(tmp_path / "ref"), reference=True)
    t = side["truth"]
    est = [k for k, e in t.items() if e["how"] == "high-statistics estimate"]
    assert "action" in est and "omega_re" in est
    assert t["omega_re"]["error"] > 0 and "Wolff" in t["omega_re"]["source"]
    assert t["mass_pion"]["how"] == "tree level"
    _, plain = _truth(runs["tree"], out=str(tmp_path / "plain"))
    assert not any(e["how"] == "high-statistics estimate" for e in plain["truth"].values())


def test_bad_input_is_one_line(runs, tmp_path, capsys):
    with pytest.raises(ConfigError):
        export_command(str(runs["u2"]), "xlsx", None)
    with pytest.raises(RunFileError):
        export_command(str(tmp_path / "missing.h5"), "npz", None)
    (tmp_path / "junk.h5").write_text("no")
    with pytest.raises(RunFileError):
        export_command(str(tmp_path / "junk.h5"), "npz", None)
    # never overwrite the run file itself
    before = runs["u2"].read_bytes()
    with pytest.raises(RunFileError, match="refusing"):
        export_command(str(runs["u2"]), "hdf5", str(runs["u2"]))
    assert runs["u2"].read_bytes() == before
    assert export_command(str(runs["u2"]), "npz", str(tmp_path / "ok")) == 0
    assert "sidecar" in capsys.readouterr().out


def _linear_run(tmp_path):
    from sigmasim.chain import make_simulation

    cfg = config_from_dict({
        "name": "lin", "seed": 5, "lattice": {"shape": [4, 2]},
        "model": {"kind": "linear", "nf": 2, "mu2": 0.5, "lambda1": 0.2, "c": 0.1, "theta": 1.0},
        "updates": {"schedule": [{"update": "heatbath"}]},
        "run": {"thermalize": 2, "measurements": 6, "output": str(tmp_path)},
    })
    cfg.run_dir.mkdir(parents=True, exist_ok=True)
    run_chain(make_simulation(cfg), (RunWriter(cfg, cfg.run_file),))
    return cfg.run_file


def test_linear_export_carries_the_linear_action(tmp_path):
    """The sidecar of a linear run states the linear model's action, not the chiral one."""
    paths, side = _truth(_linear_run(tmp_path))
    conv = side["conventions"]
    assert "Tr|Phi_{x+mu} - Phi_x|^2" in conv and "lambda1" in conv
    assert "beta" not in conv and "U_x" not in conv
    assert "axis 0 of every array is the measurement" in conv
    with np.load(paths[0]) as z:
        names = set(z.files)
    assert "slice_Phi" in names and "slice_U" not in names and "action_beta" not in names
    entries = {e["name"]: e for e in side["arrays"]}
    assert "Phi" in entries["omega"]["description"] and "Phi" in entries["slice_Phi"]["convention"]


def test_chiral_export_keeps_the_chiral_action(runs):
    _, side = _truth(runs["tree"])
    assert side["conventions"].startswith("S = -beta sum_{x,mu} Re Tr(U_x^+ U_{x+mu})")
    assert "Phi" not in side["conventions"]
