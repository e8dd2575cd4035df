"""Umbrella windows (sigmasim.protocols.umbrella): exact answer at beta = 0, resume, refusals, Dask, command.

Known answer: at beta = 0 the sites are independent, so on a 2-site U(1) lattice ``x = Im omega_h``
is the mean of two independent one-site variables; its bin probabilities are the convolution of the
exact one-site distribution (:func:`sigmasim.exact.one_site_variable_distribution`, Weyl
integration) taken on a fine grid.  The WHAM profile of the windows must match it within 4 sigma
(block-bootstrap errors).
"""

import json
import os

import numpy as np
import pytest

from runfiles import assert_one_line_error
from sigmasim import exact
from sigmasim.protocols import umbrella as um
from sigmasim.config import config_from_dict
from sigmasim.errors import ConfigError, RunFileError

RAW = {"name": "umb", "seed": 3, "lattice": {"shape": [2]},
       "model": {"group": "U", "nf": 1, "beta": 0.0, "mass": 0.5, "kappa": 2.0, "theta": 2.0},
       "run": {"start": "hot", "thermalize": 0, "measurements": 1, "threads": 1}}
TABLE = {"centres": [-0.6, -0.3, 0.0, 0.3, 0.6], "spring": 40.0, "range": [-0.9, 0.9], "bins": 36,
         "sweeps": 4000, "thermalize": 100, "bootstrap": 200}


def two_site_exact(edges, h=0.5, kappa=2.0, theta_m=2.0, theta_a=0.0, fine=2000):
    """Bin probabilities of (x1 + x2) / 2 for independent one-site x (fine-grid convolution)."""
    fe = np.linspace(-1.0, 1.0, fine + 1)
    q = exact.one_site_variable_distribution(1, h, kappa, theta_m, theta_a, fe, "im_omega_h", n_gauss=24)
    y = 0.5 * (fe[1:] + fe[:-1])
    s = 0.5 * (y[:, None] + y[None, :])
    p, _ = np.histogram(s.ravel(), bins=edges, weights=(q[:, None] * q[None, :]).ravel())
    return p


@pytest.fixture(scope="module")
def done(tmp_path_factory):
    folder = tmp_path_factory.mktemp("umb") / "umbrella"
    cfg = config_from_dict(RAW)
    params = um.umbrella_params(dict(TABLE))
    um._prepare_folder(folder, RAW, cfg, params)
    status = um.run_windows(RAW, cfg, params, folder, serial=True)
    assert all(s["status"] == "done" and not s["skipped"] for s in status)
    return folder, cfg, params


def test_windows_join_to_the_exact_beta0_distribution(done):
    folder, cfg, params = done
    res = um.join_windows(folder, params)
    p = res.profile
    edges = p.edges
    truth = two_site_exact(edges)
    T = -np.log(truth / truth.sum() / np.diff(edges))
    ok = np.isfinite(p.F) & np.isfinite(p.error)
    assert ok.sum() >= 30
    pull = (p.F[ok] - T[ok]) / p.error[ok]
    assert np.max(np.abs(pull)) < 4.0, pull
    # the windows' own statistics: measured block lengths, all samples inside the grid
    assert all(w["block"] >= 1 and w["in_grid"] > 0.99 for w in p.windows)


def test_wrong_bias_in_the_join_fails_the_same_comparison(done):
    """The check can fail: joining with the restraint's sign flipped is far off the exact answer."""
    from sigmasim.analysis import profile as pr

    folder, cfg, params = done
    wins = []
    for k in range(len(params["centres"])):
        meta, arrays = um._read_window(um._window_path(folder, k))
        w = um.window_weight(params, k)
        wins.append(pr.Window(arrays["x"], lambda x, w=w: -w(x)))
    p = pr.wham(wins, np.linspace(-0.9, 0.9, 37), n_boot=50)
    truth = two_site_exact(p.edges)
    T = -np.log(truth / truth.sum() / np.diff(p.edges))
    ok = np.isfinite(p.F) & np.isfinite(p.error)
    assert np.max(np.abs((p.F[ok] - T[ok]) / p.error[ok])) > 10.0


def test_rerun_skips_complete_windows_and_reruns_a_missing_one(done):
    folder, cfg, params = done
    path = um._window_path(folder, 2)
    before = um._read_window(path)[1]["x"].copy()
    os.remove(path)
    status = um.run_windows(RAW, cfg, params, folder, serial=True)
    assert [s["skipped"] for s in status] == [True, True, False, True, True]
    np.testing.assert_array_equal(um._read_window(path)[1]["x"], before)   # same seed, same chain
    # a stray file in a window's place is never overwritten
    (folder / "window-009.npz").write_bytes(b"not mine")
    params10 = um.umbrella_params({**TABLE, "centres": [-0.8 + 0.16 * k for k in range(11)]})
    with pytest.raises(RunFileError, match="another config"):
        um._prepare_folder(folder, RAW, cfg, params10)
    os.remove(folder / "window-009.npz")


def test_folder_of_another_config_or_not_ours_is_refused(tmp_path, done):
    folder, cfg, params = done
    other = config_from_dict({**RAW, "seed": 4})
    with pytest.raises(RunFileError, match="another config"):
        um._prepare_folder(folder, RAW, other, params)
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "data.txt").write_text("somebody's")
    with pytest.raises(RunFileError, match="not written by sigmasim umbrella"):
        um._prepare_folder(foreign, RAW, cfg, params)
    assert (foreign / "data.txt").read_text() == "somebody's"


def test_window_seeds_differ_and_depend_on_index_only():
    seeds = [um.window_seed(3, k) for k in range(50)]
    assert len(set(seeds)) == 50 and all(0 <= s < 2 ** 62 for s in seeds)
    assert um.window_seed(3, 7) == um.window_seed(3, 7) != um.window_seed(4, 7)


@pytest.mark.parametrize("change, msg", [
    ({"centres": []}, "non-empty list"),
    ({"centres": [0.1, 0.0]}, "strictly increasing"),
    ({"centres": [0.0, 2.0]}, "outside umbrella.range"),
    ({"spring": -1.0}, "umbrella.spring must be a finite number > 0"),
    ({"spring": None}, "umbrella.spring is required"),
    ({"range": [0.5, -0.5]}, "low < high"),
    ({"range": [-2.0, 2.0], "centres": [0.0]}, "inside \\[-1, 1\\]"),
    ({"bins": 2}, "umbrella.bins must be an integer"),
    ({"sweeps": 10, "measure_every": 5}, "at least 8 measurements"),
    ({"variable": "energy"}, "umbrella.variable must be one of"),
    ({"colour": 1}, "unknown key umbrella.colour"),
    ({"split": 5.0}, "umbrella.split"),
])
def test_bad_table_one_line(change, msg):
    table = {**TABLE, **change}
    table = {k: v for k, v in table.items() if v is not None}
    with pytest.raises(ConfigError, match=msg) as ei:
        um.umbrella_params(table)
    assert "\n" not in str(ei.value)


def _toml(path, table, raw=RAW):
    def val(v):
        return json.dumps(v) if not isinstance(v, bool) else str(v).lower()

    lines = [f'name = "{raw["name"]}"', f'seed = {raw["seed"]}']
    for sec in ("lattice", "model", "run"):
        lines.append(f"[{sec}]")
        lines += [f"{k} = {val(v)}" for k, v in raw[sec].items()]
    lines.append(f'output = "{path.parent / "out"}"')
    lines.append("[umbrella]")
    lines += [f"{k} = {val(v)}" for k, v in table.items()]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_command_serial_and_bad_input(tmp_path, capsys):
    from sigmasim.cli import main

    small = {**TABLE, "centres": [-0.3, 0.0, 0.3], "sweeps": 400, "thermalize": 20, "bootstrap": 20}
    cfg = _toml(tmp_path / "u.toml", small)
    assert main(["umbrella", str(cfg), "--serial", "--quiet"]) == 0
    out = capsys.readouterr().out
    folder = tmp_path / "out" / "umb" / "umbrella"
    prof = json.loads((folder / "profile.json").read_text())
    assert len(prof["F"]) == 36 and "research toy" in prof["note"]
    assert (folder / "profile.png").stat().st_size > 1000 and (folder / "profile.csv").exists()
    assert "WHAM" in out
    # a second run skips the complete windows and rewrites only the joined outputs
    stamp = (folder / "window-000.npz").stat().st_mtime_ns
    assert main(["umbrella", str(cfg), "--serial"]) == 0
    assert "skipped (complete)" in capsys.readouterr().out
    assert (folder / "window-000.npz").stat().st_mtime_ns == stamp
    bad = _toml(tmp_path / "bad.toml", {**small, "spring": 0})
    assert main(["umbrella", str(bad), "--serial"]) == 2
    assert_one_line_error(capsys.readouterr().err)
    assert main(["run", str(cfg)]) == 2        # an [umbrella] config is not an ordinary run
    err = capsys.readouterr().err
    assert_one_line_error(err)
    assert "umbrella" in err


@pytest.mark.slow
def test_dask_windows_equal_serial_windows(tmp_path, done):
    """Two windows as Dask tasks on a local cluster give the serial windows bit for bit."""
    pytest.importorskip("distributed")
    folder, cfg, params = done
    params2 = um.umbrella_params({**TABLE, "workers": 2})
    target = tmp_path / "dask" / "umbrella"
    um._prepare_folder(target, RAW, cfg, params2)
    for k in (0, 1, 2):     # three of the five already done: only 3 and 4 go to Dask
        os.link(um._window_path(folder, k), um._window_path(target, k))
    status = um.run_windows(RAW, cfg, params2, target)
    assert [s["skipped"] for s in status] == [True, True, True, False, False]
    for k in (3, 4):
        a = um._read_window(um._window_path(folder, k))[1]
        b = um._read_window(um._window_path(target, k))[1]
        np.testing.assert_array_equal(a["x"], b["x"])
        np.testing.assert_array_equal(a["series.action"], b["series.action"])


def _common_shape(p, bins):
    """F on the given bins renormalised over them, with the replica error (half 68 % range)."""
    def norm(F):
        lp = -F[bins]
        return -(lp - np.log(np.sum(np.exp(lp - lp.max()))) - lp.max())

    F = norm(p.F)
    reps = np.array([norm(r) for r in p.replicas])
    lo, hi = np.quantile(reps, [0.1587, 0.8413], axis=0)
    return F, 0.5 * (hi - lo)


def test_windows_agree_with_a_plain_chain_on_an_interacting_lattice(tmp_path):
    """U(1) on 4 x 4 at beta = 0.4, h = 0.5, theta = 0 (sites interact): the WHAM join of five windows and the histogram
    of a plain chain (W = 0) give the same -ln P(x) within 4 sigma of the combined errors."""
    from sigmasim.analysis import profile as pr
    from sigmasim.protocols.multicanonical import Weight, run_biased

    raw = {**RAW, "lattice": {"shape": [4, 4]},
           "model": {**RAW["model"], "beta": 0.4, "kappa": 0.0, "theta": 0.0}}
    cfg = config_from_dict(raw)
    table = {**TABLE, "centres": [-0.4, -0.2, 0.0, 0.2, 0.4], "spring": 60.0, "range": [-0.6, 0.6],
             "bins": 24, "sweeps": 3000}
    params = um.umbrella_params(table)
    folder = tmp_path / "umbrella"
    um._prepare_folder(folder, raw, cfg, params)
    assert all(s["status"] == "done" for s in um.run_windows(raw, cfg, params, folder, serial=True))
    pu = um.join_windows(folder, params, n_boot=200).profile
    plain = run_biased(config_from_dict({**raw, "seed": 99}), Weight.flat(-0.6, 0.6, 24), 20000, thermalize=200)
    pp = pr.multicanonical_profile(plain.x, lambda x: np.zeros_like(np.asarray(x, float)), pu.edges, n_boot=200)
    both = np.nonzero(np.isfinite(pu.F) & np.isfinite(pp.F) & (pp.counts >= 50))[0]
    assert len(both) >= 8
    fu, eu = _common_shape(pu, both)
    fp, ep = _common_shape(pp, both)
    pull = (fu - fp) / np.hypot(eu, ep)
    assert np.max(np.abs(pull)) < 4.0, pull
    assert np.max(fu) - np.min(fu) > 1.5            # a profile with shape, not a flat one
