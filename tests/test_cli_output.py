"""What the commands print: no run-together columns, no misleading numbers, warnings where due."""

import numpy as np
import pytest

from sigmasim.analysis.report import analyze_data, format_table, summarise_series
from sigmasim.chain import simulate
from sigmasim.cli import main
from sigmasim.config import config_from_dict
from sigmasim.cli import format_lifetimes
from sigmasim.protocols import LifetimeResult, fit_log_lifetimes


def _run_cfg(tmp_path, name, model, schedule=None, meas=40, shape=(4, 4)):
    raw = {"name": name, "seed": 5, "lattice": {"shape": list(shape)}, "model": model,
           "run": {"thermalize": 5, "measurements": meas, "threads": 1, "output": str(tmp_path)}}
    if schedule:
        raw["updates"] = {"schedule": [{"update": u} for u in schedule]}
    lines = []
    for k, v in raw.items():
        if not isinstance(v, dict):
            lines.append(f"{k} = {v!r}".replace("'", '"'))
    for sec, kv in raw.items():
        if isinstance(kv, dict):
            lines.append(f"[{sec}]")
            for k, v in kv.items():
                if k == "schedule":
                    v = "[" + ", ".join(f'{{update = "{s["update"]}"}}' for s in v) + "]"
                    lines.append(f"{k} = {v}")
                else:
                    lines.append(f"{k} = {v!r}".replace("'", '"'))
    p = tmp_path / f"{name}.toml"
    p.write_text("\n".join(lines) + "\n")
    return p


def _rows(out):
    lines = out.splitlines()
    head = lines[0].split()
    return head, [ln for ln in lines[2:] if ln and not ln.startswith(("warning", "(", " ", "run file"))]


def test_run_table_keeps_long_names_apart_and_splits_acceptances(tmp_path, capsys):
    long = "a_run_name_of_thirty_one_chars"
    cfg = _run_cfg(tmp_path, long, {"nf": 1, "beta": 0.5, "mass": 0.2, "theta": 1.0}, ["metropolis"])
    assert main(["run", str(cfg), "--quiet"]) == 0
    head, rows = _rows(capsys.readouterr().out)
    assert head[8:12] == ["acc", "Metr", "acc", "phase"] and head[12] == "branch"
    cells = rows[0].split()
    assert cells[0] == long and cells[8] == "k"  # name, theta, 4 means, 2 acceptances, branch
    assert 0 < float(cells[6]) < 1 and cells[7] == "-"


def test_run_table_shows_no_acceptance_for_an_su2_heatbath(tmp_path, capsys):
    cfg = _run_cfg(tmp_path, "su2", {"nf": 2, "group": "SU", "beta": 0.5, "mass": 0.0})
    assert main(["run", str(cfg), "--quiet"]) == 0
    _, rows = _rows(capsys.readouterr().out)
    cells = rows[0].split()
    assert cells[6:8] == ["-", "-"]  # was 1.00
    # h = 0 in SU(2): no isolated tree-level vacuum, said in words (was "(global )")
    assert "flat tree-level potential" in rows[0] and "global )" not in rows[0]


def test_run_table_warns_when_im_omega_rests_on_few_independent_samples(tmp_path, capsys):
    # U(1) Metropolis at strong coupling on 8^2: tau_int of Im Omega_h is several sweeps
    model = {"nf": 1, "beta": 1.2, "mass": 0.3, "theta": 2.0}
    few = _run_cfg(tmp_path, "few", model, ["metropolis"], meas=60, shape=(8, 8))
    assert main(["run", str(few), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "warning: few: <Im Omega_h> rests on about" in out and "independent samples" in out
    # the same coupling with exact heatbath + overrelaxation and many measurements: no warning
    many = _run_cfg(tmp_path, "many", {"nf": 1, "beta": 0.3, "mass": 0.3, "theta": 2.0}, meas=3000)
    assert main(["run", str(many), "--quiet"]) == 0
    assert "warning" not in capsys.readouterr().out


def test_lifetimes_table_says_no_chi2_test_with_zero_dof():
    fits = fit_log_lifetimes((4, 6), np.array([5.0, 20.0]), np.array([1.0, 4.0]), 3)
    res = LifetimeResult((4, 6), 3, {4: np.ones(2), 6: np.ones(2)}, {4: np.ones(2, bool), 6: np.ones(2, bool)},
                         np.array([5.0, 20.0]), np.array([1.0, 4.0]), np.array([2, 2]), fits)
    text = format_lifetimes(res)
    assert "chi2/dof" not in text and "0 dof" in text
    fits3 = fit_log_lifetimes((4, 6, 8), np.array([5.0, 20.0, 70.0]), np.array([1.0, 4.0, 9.0]), 3)
    res3 = LifetimeResult((4, 6, 8), 3, {L: np.ones(2) for L in (4, 6, 8)}, {L: np.ones(2, bool) for L in (4, 6, 8)},
                          np.array([5.0, 20.0, 70.0]), np.array([1.0, 4.0, 9.0]),
                          np.array([2, 2, 2]), fits3)
    assert "chi2/dof = " in format_lifetimes(res3) and "/1" in format_lifetimes(res3)


def test_tau_int_below_one_half_is_capped_and_flagged():
    """MA(3) x_t = e_t + 0.5 e_{t-1} - 0.9 e_{t-3}: exactly tau_int = 1/2 + sum rho = 0.087 (rho(1..3) =
    0.5, -0.45, -0.9 over 2.06; tau_int as in Wolff, Comput. Phys. Commun. 156 (2004) 143), so
    N / (2 tau_int) is about 5.7 N.  Shown: tau_int 1/2, N_indep = N, the naive error, a note."""
    rng = np.random.default_rng(4)
    e = rng.standard_normal(4003)
    x = e[3:] + 0.5 * e[2:-1] - 0.9 * e[:-3]
    s = summarise_series("x", x)
    assert s.tau_int == 0.5 and s.n_independent == x.size and "capped" in s.note
    assert s.error == pytest.approx(np.std(x, ddof=1) / np.sqrt(x.size), rel=0.1)  # the naive error
    # an ordinary positively correlated series is untouched
    y = np.empty(4000)
    y[0] = 0.0
    for i in range(1, y.size):
        y[i] = 0.8 * y[i - 1] + rng.standard_normal()
    t = summarise_series("y", y)
    assert t.tau_int > 2 and t.n_independent < y.size and "capped" not in t.note


def _analysis(model, shape=(8, 4), meas=300, schedule=None):
    raw = {"name": "a", "seed": 3, "lattice": {"shape": list(shape)}, "model": model,
           "run": {"thermalize": 20, "measurements": meas, "threads": 1}}
    if schedule:
        raw["updates"] = {"schedule": [{"update": u} for u in schedule]}
    cfg = config_from_dict(raw)
    d = simulate(cfg)
    return analyze_data(d, d, cfg)


def test_su2_analysis_collapses_constant_rows_and_claims_no_impossible_n_indep():
    ra = _analysis({"nf": 2, "group": "SU", "beta": 0.5, "mass": 0.0})
    text = format_table([ra])
    det_rows = [ln for ln in text.splitlines() if ln.startswith(("det.re", "det.im", "omega_h.im"))]
    assert det_rows == []  # constants (det U = 1, Im Tr U = 0 up to rounding) are one 'constant' line
    assert "constant" in text and "det.re = 1" in text
    for s in ra.series.values():
        assert not s.n_independent > s.n, s


def test_u1_analysis_prints_the_eta_prime_once():
    ra = _analysis({"nf": 1, "beta": 0.5, "mass": 0.3, "theta": 1.0})
    assert "eta_prime" in ra.masses and "eta_prime_det" not in ra.masses


def test_thermalisation_warning_says_why_not_no_cut():
    ra = _analysis({"nf": 1, "beta": 1.2, "mass": 0.3, "theta": 2.0}, shape=(8, 8), meas=160,
                   schedule=["metropolis"])
    warn = [w for w in ra.warnings if w.startswith("thermalisation")]
    assert warn, ra.warnings
    assert "no cut" not in warn[0] and "Not trusted" in warn[0]
