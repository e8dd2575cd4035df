"""Synthetic data: truths are the closed forms, samples agree with them, estimators score."""

import math
import os

# the correlated fits call small LAPACK solves; a threaded BLAS on a busy machine makes
# each ~30x slower (measured), so keep BLAS single-threaded when this module imports numpy first
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import pytest  # noqa: E402

from sigmasim import exact, synth  # noqa: E402
from sigmasim.analysis import correlator_jackknife, fit_correlator, gamma_analysis  # noqa: E402
from sigmasim.cli import synth_command  # noqa: E402
from sigmasim.errors import ConfigError  # noqa: E402
from sigmasim.score import parse_estimates, score  # noqa: E402


def _truth(side, k):
    return side["truth"][k]["value"]


def test_same_seed_same_data_other_seed_other_data():
    for kind, p in [("ar1", dict(length=50, replicas=3)),
                    ("telegraph", dict(length=50, replicas=3)),
                    ("free-field", dict(configs=5, replicas=2))]:
        a, _ = synth.synthesize(kind, 11, **p)
        b, _ = synth.synthesize(kind, 11, **p)
        c, _ = synth.synthesize(kind, 12, **p)
        for k in a:
            np.testing.assert_array_equal(a[k], b[k])
            assert not np.array_equal(a[k], c[k])


@pytest.mark.parametrize("rhos, amps", [([0.8], [1.0]), ([0.9, 0.3], [1.0, 2.0]),
                                        ([0.5, -0.4, 0.95], [0.3, 1.0, 0.2])])
def test_ar1_truth_equals_brute_force_sums(rhos, amps):
    n = 40
    _, side = synth.synthesize("ar1", 0, rho=rhos, amplitude=amps, length=n, replicas=1)
    r, a2 = np.array(rhos), np.array(amps) ** 2
    gam = lambda t: float(np.sum(a2 * r ** abs(t)))  # noqa: E731
    tau = 0.5 + sum(gam(t) for t in range(1, 5000)) / gam(0)
    var_mean = sum(gam(i - j) for i in range(n) for j in range(n)) / n**2
    assert _truth(side, "variance") == pytest.approx(a2.sum(), rel=1e-14)
    assert _truth(side, "tau_int") == pytest.approx(tau, rel=1e-12)
    assert _truth(side, "error_of_mean") == pytest.approx(math.sqrt(var_mean), rel=1e-12)
    if len(rhos) == 1:
        want = (1 + rhos[0]) / (2 * (1 - rhos[0]))
        assert _truth(side, "tau_int") == pytest.approx(want, rel=1e-14)


@pytest.mark.parametrize("rhos, amps", [([0.8], None), ([0.9, 0.3], [1.0, 2.0])])
def test_ar1_samples_have_the_prescribed_tau_int(rhos, amps):
    a, side = synth.synthesize("ar1", 3, rho=rhos, amplitude=amps, length=4000, replicas=50)
    x = a["x"]
    g = gamma_analysis(list(x))  # replicas of one ensemble
    assert abs(g.tau_int - _truth(side, "tau_int")) < 4 * g.tau_int_error
    assert abs(g.value) < 4 * g.error
    var = x.var()
    assert var == pytest.approx(_truth(side, "variance"), rel=0.05)


def test_telegraph_dwell_times_rates_and_tau_int():
    p01, p10 = 0.05, 0.2
    a, side = synth.synthesize("telegraph", 5, p01=p01, p10=p10, length=4000, replicas=60)
    s = a["state"]
    assert _truth(side, "dwell_mean_0") == 1 / p01 and _truth(side, "dwell_mean_1") == 1 / p10
    # complete runs (not touching either end) of each state
    runs = {0: [], 1: []}
    n01 = n10 = t0 = t1 = 0
    for row in s:
        edges = np.flatnonzero(np.diff(row)) + 1
        bounds = np.concatenate([[0], edges, [row.size]])
        lengths, labels = np.diff(bounds), row[bounds[:-1]]
        for ln, lb in zip(lengths[1:-1], labels[1:-1]):
            runs[int(lb)].append(ln)
        # maximum-likelihood rates: transitions / time at risk
        n01 += np.sum((row[:-1] == 0) & (row[1:] == 1))
        n10 += np.sum((row[:-1] == 1) & (row[1:] == 0))
        t0 += np.sum(row[:-1] == 0)
        t1 += np.sum(row[:-1] == 1)
    for st, p in ((0, p01), (1, p10)):
        d = np.array(runs[st], float)
        mean, err = d.mean(), d.std(ddof=1) / math.sqrt(d.size)
        # geometric dwell: mean 1/p, variance (1-p)/p^2
        assert abs(mean - 1 / p) < 4 * err
        assert d.var() == pytest.approx((1 - p) / p**2, rel=0.1)
    assert abs(n01 / t0 - p01) < 4 * math.sqrt(p01 * (1 - p01) / t0)
    assert abs(n10 / t1 - p10) < 4 * math.sqrt(p10 * (1 - p10) / t1)
    g = gamma_analysis(list(a["x"]))
    assert abs(g.tau_int - _truth(side, "tau_int")) < 4 * g.tau_int_error
    assert abs(g.value - _truth(side, "mean")) < 4 * g.error
    assert s.mean() == pytest.approx(_truth(side, "fraction_1"), abs=4 * g.error)


def test_telegraph_with_noise_tau_int():
    a, side = synth.synthesize("telegraph", 6, p01=0.1, p10=0.1, noise=1.5, length=4000,
                               replicas=40)
    lam, c = 0.8, 1.0
    w = c / (c + 1.5**2)
    assert _truth(side, "tau_int") == pytest.approx(0.5 + w * lam / (1 - lam), rel=1e-14)
    assert _truth(side, "variance") == pytest.approx(1 + 1.5**2, rel=1e-14)
    g = gamma_analysis(list(a["x"]))
    assert abs(g.tau_int - _truth(side, "tau_int")) < 4 * g.tau_int_error


@pytest.mark.parametrize("shape, m2", [((16, 4, 4), 0.25), ((12,), 0.5), ((8, 4, 2, 2), 1.3)])
def test_free_field_truth_is_the_exact_formula(shape, m2):
    _, side = synth.synthesize("free-field", 0, shape=list(shape), m2=m2, configs=2, replicas=1)
    np.testing.assert_allclose(_truth(side, "correlator"), exact.free_scalar_correlator(shape, m2),
                               rtol=1e-13)
    e = exact.free_scalar_mass(m2)
    assert _truth(side, "mass") == pytest.approx(e, rel=1e-14)
    nt = shape[0]
    model = _truth(side, "amplitude") * np.cosh(e * (np.arange(nt) - nt / 2))
    np.testing.assert_allclose(model, exact.free_scalar_correlator_closed_form(nt, m2), rtol=1e-12)
    np.testing.assert_allclose(model, exact.free_scalar_correlator(shape, m2), rtol=1e-10)


@pytest.mark.parametrize("method", ["slice", "field"])
def test_free_field_samples_have_the_exact_covariance(method):
    shape, m2 = (8, 4, 2), 0.4
    a, side = synth.synthesize("free-field", 2, shape=list(shape), m2=m2, configs=400, replicas=10,
                               method=method)
    phi = a["phi_t"].reshape(-1, shape[0])
    vs = 8
    cov = phi.T @ phi / phi.shape[0] / vs  # mean is exactly 0
    c = np.array(_truth(side, "correlator"))
    want = np.array([[c[(i - j) % shape[0]] for j in range(shape[0])] for i in range(shape[0])])
    # Wick: Var(phi_i phi_j) = C_ii C_jj + C_ij^2 per sample (units of V_s)
    err = np.sqrt((np.outer(np.diag(want), np.diag(want)) + want**2) / phi.shape[0])
    assert np.all(np.abs(cov - want) < 4.5 * err)


def test_gamma_method_error_of_the_mean_scores_honestly_on_ar1():
    a, side = synth.synthesize("ar1", 21, rho=0.7, length=500, replicas=200)
    est = [{"name": "mean", "value": g.value, "error": g.error}
           for g in (gamma_analysis(x) for x in a["x"])]
    (row,) = score(side["truth"], parse_estimates(est))
    assert row.n == 200
    assert abs(row.width - 1) < 0.15
    assert abs(row.mean) < 0.25


def test_fit_correlator_mass_scores_honestly_on_free_field():
    # 400 configurations and the window [2, 6]: with 200 configurations and [2, 8] the
    # widths are 1.10-1.16 over seeds (the noisy covariance in the correlated fit), see
    # analysis/score_estimators.py
    shape = [16, 4, 4]
    a, side = synth.synthesize("free-field", 22, shape=shape, m2=0.25, configs=400, replicas=200)
    est = []
    for phi in a["phi_t"]:
        ce = correlator_jackknife(phi, spatial_volume=16, symmetrise_result=True)
        fr = fit_correlator(ce, 2, 6)
        est.append({"name": "mass", "value": fr.mass, "error": fr.mass_error})
    (row,) = score(side["truth"], parse_estimates(est))
    assert abs(row.width - 1) < 0.15
    assert abs(row.mean) < 0.3


def test_bad_parameters_are_one_line_config_errors(tmp_path):
    cases = [("ar1", dict(rho=1.0)), ("ar1", dict(rho="0.5,x")), ("ar1", dict(m2=0.3)),
             ("free-field", dict(m2=0.0)), ("telegraph", dict(p01=0.0)), ("nope", {}),
             ("ar1", dict(rho=[0.5, 0.2], amplitude=[1, 2, 3])), ("ar1", dict(length=1))]
    for kind, p in cases:
        with pytest.raises(ConfigError) as ei:
            synth_command(kind, str(tmp_path / "x"), 1, **p)
        assert "\n" not in str(ei.value)
    with pytest.raises(ConfigError):
        synth_command("ar1", str(tmp_path / "x"), -1)


def test_synth_command_writes_npz_and_sidecar(tmp_path, capsys):
    import json

    assert synth_command("ar1", str(tmp_path / "ar"), 4, rho="0.9,0.2", amplitude="1,1",
                               length=100, replicas=3) == 0
    side = json.loads((tmp_path / "ar.json").read_text())
    arr = np.load(tmp_path / "ar.npz")
    assert arr["x"].shape == (3, 100) and side["arrays"][0]["shape"] == [3, 100]
    assert side["seed"] == 4 and side["params"]["rho"] == [0.9, 0.2]
    assert side["truth"]["tau_int"]["how"] == "exact"
    a, _ = synth.synthesize("ar1", 4, rho=[0.9, 0.2], amplitude=[1, 1], length=100, replicas=3)
    np.testing.assert_array_equal(arr["x"], a["x"])
    assert "truth" in capsys.readouterr().out
