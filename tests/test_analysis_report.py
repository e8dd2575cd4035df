"""`sigmasim analyze` back end: table, JSON, CSV, figures, and bad input.

Small real runs are written with the production writer (RunWriter +
run_chain), so the reader path is the one the command line uses.
"""

from __future__ import annotations

import csv
import json
import shutil

import h5py
import numpy as np
import pytest

from sigmasim.analysis.channels import (
    channel_correlator,
    channel_operators,
    frame_field,
    gell_mann,
)
from sigmasim.analysis.correlators import correlator_jackknife
from sigmasim.analysis.report import (
    CSV_COLUMNS,
    TOY_NOTE,
    analyze_data,
    analyze_run,
    output_paths,
)
from sigmasim.chain import Simulation, run_chain
from sigmasim.cli import analyze_command
from sigmasim.config import config_from_dict
from sigmasim.errors import RunFileError, SigmasimError
from sigmasim.storage import RunWriter


pytestmark = pytest.mark.usefixtures("one_thread")  # conftest: one numba thread


def write_run(folder, name="small", n_meas=400, nf=2, group="U", theta=0.0, kappa=0.2,
              shape=(16, 4, 4), beta=6.0, h=0.5):
    cfg = config_from_dict({
        "name": name, "seed": 7, "lattice": {"shape": list(shape)},
        "model": {"group": group, "nf": nf, "beta": beta, "mass": h, "kappa": kappa,
                  "theta": theta},
        "run": {"thermalize": 50, "measurements": n_meas, "start": "cold", "output": str(folder)},
    })
    cfg.run_dir.mkdir(parents=True, exist_ok=True)
    run_chain(Simulation(cfg), (RunWriter(cfg, cfg.run_file),))
    return cfg.run_file


@pytest.fixture(scope="module")
def run_file(tmp_path_factory):
    return write_run(tmp_path_factory.mktemp("runs"))


def _one_line_error(exc_info):
    msg = str(exc_info.value)
    assert msg and "\n" not in msg
    return msg


def test_analyze_table_json_csv_plots(run_file, tmp_path, capsys):
    figs = tmp_path / "figs"
    assert analyze_command([str(run_file)], plot=True, out_dir=str(figs)) == 0
    out = capsys.readouterr().out
    # the table: parameters, series, masses, the toy note last
    assert "U(2) beta=6 h=0.5 kappa=0.2 theta=0 lattice 16x4x4" in out
    for word in ("action", "omega_h.re", "abs_omega", "condensate[1].re", "tau_int", "pion",
                 "eta_prime", "sigma", "chi2/dof", "thermalisation cut"):
        assert word in out
    assert out.rstrip().splitlines()[-2] == TOY_NOTE
    # JSON next to the run with the documented keys
    jpath, cpath = output_paths(run_file)
    assert jpath.name == "small.analysis.json" and jpath.parent == run_file.parent
    doc = json.loads(jpath.read_text())
    for key in ("format", "format_version", "note", "run", "name", "status", "label", "config",
                "n_measurements", "n_used", "thermalisation", "series", "acceptance", "masses",
                "vacuum_alignment_phases", "tunnelling", "warnings"):
        assert key in doc, key
    assert doc["format"] == "sigmasim-analysis" and doc["n_measurements"] == 400
    assert set(doc["thermalisation"]) >= {"cut", "reason", "thermalised", "series"}
    s = doc["series"]["action"]
    assert set(s) >= {"mean", "error", "tau_int", "tau_int_error", "n_independent", "window"}
    assert s["error"] > 0 and s["tau_int"] > 0
    for name in ("omega.re", "omega.im", "omega_h.re", "omega_h.im", "abs_omega", "det.re",
                 "condensate[0].re", "condensate[1].im", "accept_phase", "unitarity_drift"):
        assert name in doc["series"], name
    pion = doc["masses"]["pion"]
    for key in ("mass", "error", "t_min", "t_max", "chi2_dof", "p_value", "m_eff", "correlator",
                "tree_level_mass", "window_reason"):
        assert key in pion, key
    assert pion["mass"] > 0 and pion["t_min"] >= 1 and pion["t_max"] <= 8
    assert pion["tree_level_mass"] == pytest.approx(2 * np.arcsinh(np.sqrt(0.5 / 6) / 2))
    assert doc["acceptance"]["metropolis"] is None  # heatbath/overrelax only
    # CSV with the documented columns
    with open(cpath) as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0].keys()) == CSV_COLUMNS
    sections = {r["section"] for r in rows}
    assert sections == {"thermalisation", "series", "acceptance", "mass", "tunnelling"}
    assert any(r["section"] == "mass" and r["name"] == "pion" and float(r["value"]) > 0 for r in rows)
    # figures: PNG and PDF of each (dwell times only with a completed dwell: never an empty figure)
    dwells = doc["tunnelling"]["exponential_fit"]["n"] or 0
    for fig in ("phase_history", "omega_plane", "dwell_times", "autocorrelation", "effective_mass"):
        for ext in ("png", "pdf"):
            p = figs / f"small.{fig}.{ext}"
            if fig == "dwell_times" and not dwells:
                assert not p.exists(), p
                continue
            assert p.exists() and p.stat().st_size > 1000, p


def test_several_runs_and_folder_argument(run_file, tmp_path, capsys):
    other = write_run(tmp_path, name="other", n_meas=200, theta=1.0)
    assert analyze_command([str(run_file.parent), str(other)], quiet=False) == 0
    out = capsys.readouterr().out
    assert "small: U(2)" in out and "other: U(2)" in out and "theta=1" in out
    assert out.count(TOY_NOTE) == 1
    assert output_paths(other)[0].exists()


def test_foreign_hdf5(tmp_path):
    p = tmp_path / "foreign.h5"
    with h5py.File(p, "w") as f:
        f["x"] = np.arange(3)
    with pytest.raises(RunFileError) as e:
        analyze_command([str(p)])
    assert "not a sigmasim run file" in _one_line_error(e)


def test_truncated_file(run_file, tmp_path):
    p = tmp_path / "truncated.h5"
    p.write_bytes(run_file.read_bytes()[:1000])
    with pytest.raises(RunFileError) as e:
        analyze_command([str(p)])
    assert "truncated" in _one_line_error(e) or "cannot read" in str(e.value)


def test_text_file_and_missing(tmp_path):
    p = tmp_path / "notes.txt"
    p.write_text("not a run\n")
    with pytest.raises(RunFileError) as e:
        analyze_command([str(p)])
    _one_line_error(e)
    with pytest.raises(RunFileError) as e:
        analyze_command([str(tmp_path / "nothing.h5")])
    assert "does not exist" in _one_line_error(e)
    with pytest.raises(SigmasimError):
        analyze_command([])


def test_bad_file_fails_before_any_output(run_file, tmp_path):
    good = tmp_path / "good.h5"
    shutil.copy(run_file, good)
    bad = tmp_path / "bad.txt"
    bad.write_text("x")
    with pytest.raises(RunFileError):
        analyze_command([str(good), str(bad)], quiet=True)
    assert not output_paths(good)[0].exists()


def test_too_few_samples_is_a_warning(tmp_path, capsys):
    p = write_run(tmp_path, name="tiny", n_meas=12)
    assert analyze_command([str(p)], plot=True) == 0
    out = capsys.readouterr().out
    assert "!! WARNING" in out
    assert "too few" in out
    doc = json.loads(output_paths(p)[0].read_text())
    assert doc["warnings"]
    assert doc["masses"]["pion"]["mass"] is None


def test_running_file_warns(run_file, tmp_path, capsys):
    p = tmp_path / "live.h5"
    shutil.copy(run_file, p)
    with h5py.File(p, "a") as f:
        f.attrs["status"] = "running"
    assert analyze_command([str(p)]) == 0
    out = capsys.readouterr().out
    assert "!! WARNING: run status is 'running'" in out


def test_missing_observable(run_file, tmp_path):
    # in a file, a missing dataset is damage: the reader refuses it with one line
    p = tmp_path / "holey.h5"
    shutil.copy(run_file, p)
    with h5py.File(p, "a") as f:
        del f["series"]["det"]
    with pytest.raises(RunFileError) as e:
        analyze_command([str(p)])
    assert "series/det" in _one_line_error(e)
    # in memory (e.g. an older or partial record set) it is a warning
    from sigmasim.storage import open_run

    d = open_run(run_file)
    series = {k: v for k, v in d.series.items() if k != "det"}
    ra = analyze_data(series, {"U": d.slices["U"]}, d.config)
    assert any("missing series: det" in w for w in ra.warnings)
    assert any("missing slices" in w for w in ra.warnings)
    assert "action" in ra.series and not ra.masses


@pytest.mark.parametrize("nf,group", [(1, "U"), (2, "SU"), (3, "U")])
def test_other_groups_analyse(tmp_path, nf, group):
    p = write_run(tmp_path, name=f"g{nf}{group}", n_meas=150, nf=nf, group=group,
                  kappa=0.0 if group == "SU" else 0.2, shape=(8, 4))
    ra = analyze_run(p)
    if nf == 1:
        assert "pion" not in ra.masses
    else:
        assert "pion" in ra.masses
    assert ("eta_prime" in ra.masses) == (group == "U")


# -- channel building blocks ------------------------------------------------


@pytest.mark.parametrize("nf", [2, 3, 4])
def test_gell_mann_basis(nf):
    g = gell_mann(nf)
    assert g.shape == (nf * nf - 1, nf, nf)
    np.testing.assert_allclose(g, np.conj(np.swapaxes(g, 1, 2)), atol=1e-15)  # hermitian
    np.testing.assert_allclose(np.trace(g, axis1=1, axis2=2), 0, atol=1e-15)  # traceless
    gram = np.einsum("aij,bji->ab", g, g)
    np.testing.assert_allclose(gram, 0.5 * np.eye(nf * nf - 1), atol=1e-14)


def test_pion_operator_is_phi_over_two():
    # U = exp(i eps T_a) (a single site per slice): Im Tr(T_b U) = eps/2 delta_ab + O(eps^3)
    g = gell_mann(3)
    eps = 1e-4
    w, v = np.linalg.eigh(g[4])
    u = (v * np.exp(1j * eps * w)) @ v.conj().T
    slices = np.broadcast_to(u, (5, 4, 3, 3)).copy()
    ops = channel_operators(slices, np.linalg.det(slices), align=False)
    expect = np.zeros(8)
    expect[4] = eps / 2
    np.testing.assert_allclose(ops["pion"][0, :, 0], expect, atol=1e-11)


def test_frame_and_alignment():
    rng = np.random.default_rng(3)
    u = np.exp(0.3j) * (np.eye(2) + 0.05 * rng.normal(size=(50, 6, 2, 2)))
    d = np.linalg.det(u)
    w, dw, alpha = frame_field(u, d, theta_m=0.2, align=True)
    np.testing.assert_allclose(alpha, 0.5, atol=0.02)
    # aligned frame: mean diagonal is real; the det transforms with exp(i(nf theta_m - sum alpha))
    assert np.all(np.abs(np.angle(np.diagonal(w.mean(axis=(0, 1))))) < 1e-12)
    np.testing.assert_allclose(dw, np.exp(1j * (2 * 0.2 - alpha.sum())) * d)
    w0, _, a0 = frame_field(np.exp(0.2j) * u, d, theta_m=0.0, align=True)
    np.testing.assert_allclose(w0, w, atol=1e-13)


def test_channel_correlator_matches_library():
    rng = np.random.default_rng(5)
    x = rng.normal(size=(200, 8)) + 3.0
    a = channel_correlator(x, bin_size=4, spatial_volume=9, symmetrise_result=False)
    b = correlator_jackknife(x, bin_size=4, spatial_volume=9)
    np.testing.assert_allclose(a.mean, b.mean, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(a.error, b.error, rtol=1e-10)
    # average over components = mean of the per-component correlators
    y = rng.normal(size=(200, 3, 8))
    c = channel_correlator(y, bin_size=4, symmetrise_result=False)
    per = [correlator_jackknife(y[:, k], bin_size=4).mean for k in range(3)]
    np.testing.assert_allclose(c.mean, np.mean(per, axis=0), rtol=1e-12, atol=1e-14)


def test_tunnelling_section_counts_the_events_of_a_known_index_series():
    """A telegraph omega_h whose branch is known at every measurement (U(3), theta = 3)."""
    from sigmasim.analysis.tunnelling import tunnelling_analysis

    nf, theta, n = 3, 3.0, 2000
    rng = np.random.default_rng(5)
    k = np.zeros(n, dtype=int)
    for i in range(1, n):  # switch 0 <-> 2 with probability 0.01 per measurement
        k[i] = k[i - 1] if rng.random() > 0.01 else 2 - k[i - 1]
    noise = 0.1 * rng.standard_normal(n)  # well inside the hysteresis band (pi/3 * 0.5 ~ 0.52)
    om = 0.8 * np.exp(1j * ((2 * np.pi * k + theta) / nf + noise))
    cfg = config_from_dict({"lattice": {"shape": [4, 4, 4]}, "model": {"nf": nf, "kappa": 1.0, "theta": theta}})
    series = {"sweep": np.arange(1, n + 1), "omega_h": om, "action": rng.standard_normal(n)}
    ra = analyze_data(series, {}, cfg, masses=False)
    t = ra.tunnelling
    true_events = int(np.count_nonzero(np.diff(k)))
    assert true_events > 10
    assert t.n_events == true_events
    np.testing.assert_array_equal(t.index, k)
    assert t.occupation[0] == pytest.approx(np.mean(k == 0))
    assert t.rate_per_volume == pytest.approx(t.rate / 64)
    ref = tunnelling_analysis(om, theta, nf, band=0.5, sweeps=series["sweep"], volume=64, seed=0)
    assert t.rate == ref.rate and t.fit.tau_mle == ref.fit.tau_mle
    # geometric dwells with p = 0.01: mean 100 sweeps, within 4 of the fit's errors
    assert abs(t.fit.tau_mle - 100.0) < 4 * t.fit.tau_mle_error
    # the band is the user's: band 0 on noise of 0.1 adds no events here either, band 0.9 none lost
    assert analyze_data(series, {}, cfg, masses=False, band=0.9).tunnelling.n_events == true_events


def test_tunnelling_section_gives_no_rate_without_two_vacua():
    """One peak of omega_h at the midpoint between the two theta = pi branches (a crossover): the
    band is crossed often, but the table, JSON and CSV give the verdict and no rate."""
    from sigmasim.analysis.report import analysis_dict, format_table

    nf, n = 3, 5000
    rng = np.random.default_rng(3)
    phi = np.empty(n)
    phi[0] = 0.0
    for i in range(1, n):  # AR(1), tau ~ 5 measurements, stationary sd 0.55 rad about arg 0
        phi[i] = 0.82 * phi[i - 1] + 0.55 * np.sqrt(1 - 0.82 ** 2) * rng.normal()
    om = 0.3 * np.exp(1j * phi)
    cfg = config_from_dict({"lattice": {"shape": [4, 4, 4]}, "model": {"nf": nf, "kappa": 2.0, "theta": np.pi}})
    series = {"sweep": np.arange(1, n + 1), "omega_h": om, "action": rng.standard_normal(n)}
    ra = analyze_data(series, {}, cfg, masses=False)
    t = ra.tunnelling
    assert t.n_events > 20 and np.isnan(t.rate)
    assert not t.counted
    text = format_table([ra])
    assert "two-peak test: no separated vacua" in text
    assert f"no rate: no separated vacua in the histogram of omega_h ({t.n_events} band crossings" in text
    assert any("band crossings, not tunnelling; no rate" in w for w in ra.warnings)
    doc = analysis_dict(ra)["tunnelling"]
    assert doc["rate_per_sweep"] is None and doc["counted"] is False
    assert doc["bimodality"]["verdict"] == "no separated vacua" and doc["bimodality"]["binder"] > 2


def test_analyze_reports_tunnelling_of_a_real_run(tmp_path, capsys):
    """U(3) 4^3 at theta = 3 (beta 1, h 0.2, kappa 1) tunnels between k = 0 and k = 2 every ~30 sweeps."""
    path = write_run(tmp_path, name="tun", n_meas=1000, nf=3, theta=3.0, kappa=1.0, shape=(4, 4, 4),
                     beta=1.0, h=0.2)
    figs = tmp_path / "figs"
    assert analyze_command([str(path)], plot=True, out_dir=str(figs), band=0.5) == 0
    out = capsys.readouterr().out
    doc = json.loads(output_paths(path)[0].read_text())
    t = doc["tunnelling"]
    assert t["n_events"] >= 10, t["n_events"]
    assert f"{t['n_events']} events / " in out and t["counted"]
    assert sum(t["occupation"].values()) == pytest.approx(1.0)
    assert t["rate_per_site"] == pytest.approx(t["rate_per_sweep"] / 64)
    assert (figs / "tun.dwell_times.png").stat().st_size > 1000
    with pytest.raises(SigmasimError, match="--band"):
        analyze_command([str(path)], band=1.0)


def test_guide_lines_are_the_solver_minima():
    """U(1), h = -0.2, kappa = 0.3, theta = 0.5 (mass placement): V(phi) = 0.2 cos(phi + 0.5)
    - 0.6 cos(phi); its minimum (brute force on a fine grid here, independent of the solver)
    gives arg Omega_h = phi + 0.5 = 0.722, not the large-kappa 0.5."""
    from sigmasim.analysis.plots import tree_guides
    from sigmasim.config import config_from_dict

    c = config_from_dict({"lattice": {"shape": [4]},
                          "model": {"nf": 1, "mass": -0.2, "kappa": 0.3, "theta": 0.5}})
    phi = np.linspace(-np.pi, np.pi, 2_000_001)
    ref = phi[np.argmin(0.2 * np.cos(phi + 0.5) - 0.6 * np.cos(phi))] + 0.5
    g = tree_guides(c)
    assert [(k, what) for k, _, what in g] == [(0, "global")]
    assert g[0][1] == pytest.approx(ref, abs=1e-5)
    assert g[0][1] == pytest.approx(0.722, abs=1e-3)
    # U(3), h = 0.3, kappa = 3, theta = 2.8: the legend's k agrees with its phase
    # (branch -1 near (2.8 - 2 pi)/3 = -1.161, metastable; branch 0 global)
    c = config_from_dict({"lattice": {"shape": [4]},
                          "model": {"nf": 3, "mass": 0.3, "kappa": 3.0, "theta": 2.8}})
    g = {k: (a, what) for k, a, what in tree_guides(c)}
    assert set(g) == {0, -1}
    assert g[-1][1] == "metastable" and g[0][1] == "global"
    assert abs(g[-1][0] - (2.8 - 2 * np.pi) / 3) < 0.1 and abs(g[0][0] - 2.8 / 3) < 0.1


def test_branch_marked_global_or_metastable_tree_and_measured():
    """U(3), h = 0.3, kappa = 3, theta = 2.8: tree level (sigmasim.vacua) has branch 0 global and
    branch -1 metastable.  Two runs at these couplings, one in each branch: the tree-level flag and
    the measured comparison of <S>/V (lower wins) mark the branch -1 run metastable."""
    from types import SimpleNamespace

    from sigmasim.analysis.report import _branch, _branch_line, compare_branches
    from sigmasim.config import config_from_dict

    cfg = config_from_dict({"lattice": {"shape": [4, 4]},
                            "model": {"nf": 3, "mass": 0.3, "kappa": 3.0, "theta": 2.8}})
    runs = []
    for name, k, act in (("a", 0, -5.0), ("b", -1, -4.9)):
        om = np.full(50, np.exp(1j * (2.8 + 2 * np.pi * k) / 3) * 0.7)
        ra = SimpleNamespace(cut=0, series={"action": SimpleNamespace(mean=act, error=0.01)},
                             warnings=[], name=name, config=cfg, branch=None)
        _branch(ra, {"omega_h": om}, cfg)
        runs.append(ra)
    compare_branches(runs)
    a, b = runs
    assert (a.branch["k"], a.branch["tree_status"]) == (0, "global")
    assert (b.branch["k"], b.branch["tree_status"], b.branch["tree_global"]) == (-1, "metastable", [0])
    assert b.branch["measured"].startswith("metastable") and "7.1 sigma" in b.branch["measured"]
    assert a.branch["measured"].startswith("global")
    assert "METASTABLE at tree level (global 0)" in _branch_line(b)
    assert any("branch -1" in w for w in b.warnings) and not a.warnings


def test_tunnelling_lines_use_the_branch_numbers_of_vacua():
    """U(3) at theta = 2.8, every measurement at arg omega_h = (2.8 - 2 pi)/3: that is branch -1
    (sigmasim.vacua convention), which the tunnelling table must print as -1, not 2."""
    from types import SimpleNamespace

    from sigmasim.analysis.report import _tunnelling_lines
    from sigmasim.analysis.tunnelling import tunnelling_analysis

    om = np.full(40, 0.7 * np.exp(1j * (2.8 - 2 * np.pi) / 3))
    t = tunnelling_analysis(om, 2.8, 3, band=0.5, sweeps=np.arange(40))
    ra = SimpleNamespace(tunnelling=t, config=SimpleNamespace(nf=3))
    lines = _tunnelling_lines(ra)
    head = next(i for i, ln in enumerate(lines) if ln.split()[:2] == ["branch", "occupation"])
    rows = {ln.split()[0]: ln.split()[1] for ln in lines[head + 1:head + 4]}
    assert rows == {"-1": "1.000", "0": "0.000", "1": "0.000"}
    assert "branch -1 for" in "\n".join(_tunnelling_lines(ra))


def test_tunnelling_json_and_csv_use_the_branch_numbers_of_vacua():
    """The same series: the JSON and CSV name the branch -1 too (they said 2 before)."""
    from sigmasim.analysis.report import _tunnelling_dict
    from sigmasim.analysis.tunnelling import tunnelling_analysis

    om = np.full(40, 0.7 * np.exp(1j * (2.8 - 2 * np.pi) / 3))
    t = tunnelling_analysis(om, 2.8, 3, band=0.5, sweeps=np.arange(40))
    doc = _tunnelling_dict(t)
    assert doc["occupation"] == {"-1": 1.0, "0": 0.0, "1": 0.0}
    assert doc["censored_first"] == [-1, 39.0]  # one open dwell over the whole series
    assert set(doc["dwells"]) == set(doc["escape"]) == {"-1", "0", "1"}
    assert doc["escape"]["-1"]["sweeps"] == 39.0
    assert "k=-1: 1.000" in t.summary()


def test_phase_figure_marks_the_branch_of_the_run(run_file):
    """The phase history says which branch the run sits in and whether it is global at tree level,
    and its guide lines are the tree-level minima with the same branch numbers."""
    import matplotlib.pyplot as plt

    from sigmasim import vacua
    from sigmasim.analysis.plots import plot_phase_history

    ra = analyze_run(run_file, masses=False)
    fig = plot_phase_history(ra)
    ax = fig.axes[0]
    b = ra.branch
    assert ax.get_title().startswith(f"the run sits in branch k = {b['k']} (")
    assert f"{b['tree_status']} at tree level" in ax.get_title()
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    guides = [t for t in labels if t.startswith("branch k=")]
    assert guides and all("tree level" in t for t in guides)
    for t in guides:  # the legend's k and arg agree with the convention
        k = int(t.split("=")[1].split()[0])
        a = float(t.rsplit("=", 1)[1])
        assert vacua.branch_label(np.exp(1j * a), ra.config.theta, ra.config.nf) == k
    plt.close(fig)
