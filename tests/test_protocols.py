"""Hysteresis sweeps in theta (small lattices, fixed seeds) and protocol config validation."""

import math

import numpy as np
import pytest

from sigmasim.cli import hysteresis_command, lifetimes_command, temper_command
from sigmasim.config import config_from_dict
from sigmasim.errors import ConfigError, RunFileError
from sigmasim.protocols import (SweepParams, load_protocol, read_sweep, run_sweep, split_protocol,
                                SWEEP_SCHEMA, tree_level, write_sweep)


pytestmark = pytest.mark.usefixtures("one_thread")  # conftest: one numba thread


def u3_config(nf=3, seed=1):
    return config_from_dict({
        "seed": seed,
        "lattice": {"shape": [4, 4, 4]},
        "model": {"nf": nf, "beta": 1.0, "mass": 0.5, "kappa": 2.0},
        "updates": {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}]},
        "run": {"thermalize": 100, "start": "cold"},
    })


def sweep(nf, sweeps_per_step, cycles=4, seed=1):
    p = SweepParams(start=0.0, stop=2 * math.pi, step=0.2, sweeps_per_step=sweeps_per_step, cycles=cycles)
    return run_sweep(u3_config(nf, seed), p)


@pytest.fixture(scope="module")
def u3_sweeps():
    return {rate: sweep(3, rate) for rate in (6, 60)}


def test_u3_jumps_beyond_pi_before_spinodal_and_mirrored(u3_sweeps):
    tree = tree_level(u3_config(), 0.0, 2 * math.pi, n=121)
    ends = [t for (t, b), kind in zip(tree["spinodals"], tree["spinodal_kinds"]) if kind == "end"]
    spin = min(t for t in ends if t > math.pi)        # branch 0 stops being a minimum (about 4.75)
    for rate, res in u3_sweeps.items():
        s = res.summary
        res_err = s["jump_resolution"]
        assert all(math.isfinite(j) for j in s["jump_up_per_cycle"] + s["jump_down_per_cycle"])
        assert s["jump_up"] > math.pi
        assert s["jump_up"] <= spin + res_err                   # near or before the tree-level spinodal
        assert s["jump_down"] < math.pi
        assert s["jump_down"] >= 2 * math.pi - spin - res_err   # mirror spinodal
        # mirror about pi: (up + down) / 2 = pi within errors and the grid resolution
        err = math.hypot(s["jump_up_error"], s["jump_down_error"])
        assert abs(0.5 * (s["jump_up"] + s["jump_down"]) - math.pi) < 2 * err + res_err
        # the branch reached past the jump is k = -1 (sigmasim.vacua numbering): Im omega_h changes sign
        st = res.steps
        up = (st["cycle"] == 0) & (st["direction"] == 1)
        assert st["branch"][up][0] == 0 and st["branch"][up][-1] == -1
        assert st["im_omega_h"][up][0] == pytest.approx(0.0, abs=0.05)


def test_u3_loop_area_shrinks_when_slowed(u3_sweeps):
    fast, slow = u3_sweeps[6].summary, u3_sweeps[60].summary
    assert fast["area"] > 0 and slow["area"] > 0
    diff_err = math.hypot(fast["area_error"], slow["area_error"])
    assert fast["area"] - slow["area"] > 3 * diff_err
    # significant hysteresis at both rates
    assert slow["area"] > 4 * slow["area_error"]


def test_u1_has_no_loop():
    s = sweep(1, 6).summary
    assert math.isnan(s["jump_up"]) and math.isnan(s["jump_down"])
    assert abs(s["area"]) < 4 * max(s["area_error"], s["area_error_stat"])


def test_sweep_file_and_plot(tmp_path, u3_sweeps):
    res = u3_sweeps[6]
    res.tree = tree_level(res.config, 0.0, 2 * math.pi, n=61)
    path = write_sweep(tmp_path / "s.h5", res)
    back = read_sweep(path)
    assert back["summary"]["area"] == pytest.approx(res.summary["area"])
    assert np.array_equal(back["steps"]["branch"], res.steps["branch"])
    assert back["series"]["omega_h"].dtype == np.complex128
    assert back["tree"]["im_omega_h"].shape[1] == 61
    from sigmasim.protocols import plot_sweep
    png = plot_sweep(res, tmp_path / "s.png")
    assert png.stat().st_size > 10000
    with pytest.raises(RunFileError):
        read_sweep(tmp_path / "missing.h5")


def test_protocol_config_errors(tmp_path):
    with pytest.raises(ConfigError, match="unknown key 'sweep.sweeps_per_stp'.*did you mean 'sweeps_per_step'"):
        split_protocol({"sweep": {"sweeps_per_stp": 1}}, "sweep", SWEEP_SCHEMA)
    with pytest.raises(ConfigError, match="sweep.cycles must be an integer"):
        split_protocol({"sweep": {"cycles": 1.5}}, "sweep", SWEEP_SCHEMA)
    with pytest.raises(ConfigError, match="no \\[sweep\\] table"):
        split_protocol({"model": {}}, "sweep", SWEEP_SCHEMA)
    with pytest.raises(ConfigError, match="hysteresis.stop must be > hysteresis.start"):
        SweepParams(start=1.0, stop=0.5)
    with pytest.raises(ConfigError, match="hysteresis.band"):
        SweepParams(band=1.5)
    cfg = tmp_path / "c.toml"
    cfg.write_text('name = "t"\n[model]\nnf = 3\n[hysteresis]\nstep = 0.5\ncycles = 2\n[run]\noutput = "%s"\n'
                   % tmp_path)
    config, params = load_protocol(cfg, "hysteresis", SWEEP_SCHEMA)
    assert config.nf == 3 and params["step"] == 0.5 and params["cycles"] == 2
    bad = tmp_path / "b.toml"
    bad.write_text('[model]\nnf = 3\nbogus = 1\n[hysteresis]\n')
    with pytest.raises(ConfigError, match="unknown key 'model.bogus'"):
        load_protocol(bad, "hysteresis", SWEEP_SCHEMA)
    with pytest.raises(ConfigError, match="does not exist"):
        hysteresis_command(str(tmp_path / "nope.toml"), False, None)


def test_hysteresis_command_end_to_end(tmp_path, capsys):
    cfg = tmp_path / "c.toml"
    cfg.write_text(f'name = "t"\n[lattice]\nshape = [2, 2]\n[model]\nnf = 2\nmass = 0.3\nkappa = 1.0\n'
                   f'[run]\nthermalize = 5\noutput = "{tmp_path}"\n'
                   f'[hysteresis]\nstart = 0.0\nstop = 1.0\nstep = 0.5\nsweeps_per_step = 10\n')
    assert hysteresis_command(str(cfg), False, None) == 0
    assert (tmp_path / "t" / "t-sweep.h5").exists()
    out = capsys.readouterr().out
    assert "loop area = dissipated work per site" in out
    # two steps from 0 to 1 at U(2): no branch change up, said in words, never "nan +- nan"
    assert "jump up   no jump" in out and "nan" not in out


def test_sweep_is_an_alias_of_hysteresis_for_one_release(tmp_path, capsys):
    # the command and its table were renamed (two meanings of "sweep"); the old names still run the
    # same protocol, bit for bit, with one line on stderr, and the new names print no note
    from sigmasim.cli import main

    body = (f'name = "t"\nseed = 4\n[lattice]\nshape = [2, 2]\n[model]\nnf = 2\nmass = 0.3\nkappa = 1.0\n'
            f'[run]\nthermalize = 5\noutput = "{tmp_path}"\n')
    table = 'start = 0.0\nstop = 1.0\nstep = 0.5\nsweeps_per_step = 4\n'
    new, old = tmp_path / "new.toml", tmp_path / "old.toml"
    new.write_text(body + "[hysteresis]\n" + table)
    old.write_text(body + "[sweep]\n" + table)
    assert main(["hysteresis", str(new), "--out", str(tmp_path / "new.h5"), "--quiet"]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    assert main(["sweep", str(old), "--out", str(tmp_path / "old.h5"), "--quiet"]) == 0
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'sigmasim sweep' and the [sweep] table are now" in err, err
    assert main(["hysteresis", str(old), "--out", str(tmp_path / "old2.h5"), "--quiet"]) == 0
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "the [sweep] table is now [hysteresis]" in err, err
    a, b = read_sweep(tmp_path / "new.h5"), read_sweep(tmp_path / "old.h5")
    assert a["protocol"] == b["protocol"]
    for g in ("steps", "series", "cycles"):
        for k in a[g]:
            np.testing.assert_array_equal(a[g][k], b[g][k], err_msg=f"{g}/{k}")
    both = tmp_path / "both.toml"
    both.write_text(body + "[sweep]\n" + table + "[hysteresis]\n" + table)
    assert main(["hysteresis", str(both), "--quiet"]) == 2
    assert "keep [hysteresis]" in capsys.readouterr().err
    for cfg in (new, old):  # a protocol config given to 'run' names the new command
        assert main(["run", str(cfg), "--quiet"]) == 2
        assert "run it with 'sigmasim hysteresis" in capsys.readouterr().err


@pytest.mark.parametrize("placement", ["mass", "anomaly", "split"])
@pytest.mark.parametrize("group", ["U", "SU"])
def test_theta_derivative_of_the_action_is_exact(placement, group):
    """dS/dtheta / V from the condensate and det series equals the finite difference of the measured
    action per site in theta on the same configuration, for non-degenerate masses and any placement."""
    from sigmasim.chain import make_simulation
    from sigmasim.protocols import theta_derivative

    cfg = config_from_dict({"seed": 5, "lattice": {"shape": [4, 4]},
                            "model": {"group": group, "nf": 3, "beta": 0.7, "mass": [0.3, 0.5, 0.9],
                                      "kappa": 1.3, "theta": 2.2, "theta_placement": placement},
                            "run": {"start": "hot"}})
    sim = make_simulation(cfg)
    for _ in range(5):
        sim.sweep()
    deriv = theta_derivative(sim.config, sim.measure())
    eps = 1e-5
    sim.set_theta(2.2 + eps)
    up = sim.measure()["action"]
    sim.set_theta(2.2 - eps)
    down = sim.measure()["action"]
    assert deriv == pytest.approx((up - down) / (2 * eps), rel=1e-6, abs=1e-9)
    assert abs(deriv) > 1e-3


@pytest.mark.parametrize("placement", ["mass", "anomaly", "split"])
def test_theta_derivative_of_the_linear_action_is_exact(placement):
    """Same for the linear model (determinant coupling c instead of kappa)."""
    from sigmasim.chain import make_simulation
    from sigmasim.protocols import theta_derivative

    cfg = config_from_dict({"seed": 6, "lattice": {"shape": [4, 4]},
                            "model": {"kind": "linear", "nf": 2, "mu2": -1.0, "lambda1": 0.1,
                                      "lambda2": 0.1, "c": 0.3, "mass": [0.1, 0.4], "theta": 1.1,
                                      "theta_placement": placement},
                            "run": {"threads": 1}})
    sim = make_simulation(cfg)
    for _ in range(5):
        sim.sweep()
    deriv = theta_derivative(sim.config, sim.measure())
    eps = 1e-5
    sim.set_theta(1.1 + eps)
    up = sim.measure()["action"]
    sim.set_theta(1.1 - eps)
    down = sim.measure()["action"]
    assert deriv == pytest.approx((up - down) / (2 * eps), rel=1e-6, abs=1e-9)
    assert abs(deriv) > 1e-3


def test_loop_area_is_the_dissipated_work(u3_sweeps):
    """The loop area is oint <dS/dtheta>/V dtheta; with degenerate masses h in the mass placement
    dS/dtheta / V = h Im omega_h per measurement, so the former Im omega_h area is the work / h."""
    for res in u3_sweeps.values():
        ser = res.series
        np.testing.assert_allclose(ser["ds_dtheta"], 0.5 * ser["omega_h"].imag, rtol=1e-10, atol=1e-13)
        s = res.summary
        assert s["area"] == pytest.approx(0.5 * s["area_im_omega_h"], rel=1e-10)
        assert s["area"] > 4 * s["area_error"]              # dissipated work of a cycle is positive


def test_loop_work_with_non_degenerate_masses():
    """Masses 0.2, 0.5, 0.8 (mean 0.5): the work is the integral of <dS/dtheta>, not mean(h) times
    the Im omega_h area; it is positive and the per-step means are those of the series."""
    cfg = config_from_dict({"seed": 2, "lattice": {"shape": [4, 4, 4]},
                            "model": {"nf": 3, "beta": 1.0, "mass": [0.2, 0.5, 0.8], "kappa": 2.0},
                            "updates": {"schedule": [{"update": "heatbath", "repeat": 1},
                                                     {"update": "overrelax", "repeat": 2}]},
                            "run": {"thermalize": 100, "start": "cold"}})
    res = run_sweep(cfg, SweepParams(start=0.0, stop=2 * math.pi, step=0.2, sweeps_per_step=6, cycles=4))
    s, st = res.summary, res.steps
    for i in (0, 7, len(st["theta"]) - 1):
        assert st["ds_dtheta"][i] == pytest.approx(res.series["ds_dtheta"][res.series["step"] == i].mean())
    assert s["area"] > 4 * max(s["area_error"], s["area_error_stat"])
    # the Im omega_h form is not the work here: h_f weight the flavours differently
    assert abs(s["area"] - 0.5 * s["area_im_omega_h"]) > 1e-3


# ---------------------------------------------------------------- tempering
from sigmasim.analysis.gamma import gamma_analysis  # noqa: E402
from sigmasim.analysis.tunnelling import tunnelling_analysis  # noqa: E402
from sigmasim.exact import one_site_u  # noqa: E402
from sigmasim.protocols import (CENSUS_MIN_CHANGES, TemperParams, branch_census, branch_populations,  # noqa: E402
                                run_tempering)
from sigmasim.storage import open_run  # noqa: E402


def beta0_config(tmp_path, meas=3000):
    return config_from_dict({
        "name": "tp", "seed": 4, "lattice": {"shape": [4]},
        "model": {"nf": 2, "beta": 0.0, "mass": 1.0, "kappa": 0.5},
        "run": {"thermalize": 50, "measurements": meas, "output": str(tmp_path), "checkpoint_every": 1000},
    })


def test_tempering_slots_sample_their_theta_exactly(tmp_path):
    # beta = 0: each slot must reproduce the exact one-site <omega_h>(theta); a wrong swap rule biases it
    cfg = beta0_config(tmp_path)
    thetas = (0.0, 1.0, 2.0, 3.0)
    res = run_tempering(cfg, TemperParams(thetas=thetas), write=True)
    assert np.all(res.swap_tried > 0) and np.all((res.acceptance > 0.05) & (res.acceptance < 1.0))
    assert len(res.round_trips) > 10
    for i, t in enumerate(thetas):
        ex = one_site_u(2, 1.0, 0.5, t / 2, 0.0)
        om = res.series[i]["omega_h"]
        for part, want in ((om.real, ex["re_tr_thetam_u"]), (om.imag, ex["im_tr_thetam_u"])):
            g = gamma_analysis(part)
            assert abs(g.value - want) < 4 * g.error
        # each slot is an ordinary run file at its theta, usable by the tunnelling analysis
        run = open_run(res.files[i])
        assert run.config.theta == t and run.config.name == f"tp-t{i}" and run.status == "complete"
        assert np.allclose(run.series["omega_h"], om)
        tunnelling_analysis(run.series["omega_h"], t, 2, sweeps=run.series["sweep"])
    # reproducible from the seed
    again = run_tempering(cfg, TemperParams(thetas=thetas), write=False)
    assert np.array_equal(again.replica_at, res.replica_at)
    assert np.array_equal(again.series[2]["omega_h"], res.series[2]["omega_h"])
    # refuses to overwrite
    with pytest.raises(RunFileError, match="exists"):
        run_tempering(cfg, TemperParams(thetas=thetas), write=True)


def test_tempering_config_errors(tmp_path):
    cfg = tmp_path / "t.toml"
    cfg.write_text('[model]\nnf = 2\n[tempering]\nthetas = [1.0, 0.5]\n')
    with pytest.raises(ConfigError, match="tempering.thetas must be strictly increasing"):
        temper_command(str(cfg))
    cfg.write_text('[model]\nnf = 2\n[tempering]\nthetas = [0.0, 0.5]\nswap_evry = 2\n')
    with pytest.raises(ConfigError, match="unknown key 'tempering.swap_evry'.*swap_every"):
        temper_command(str(cfg))
    cfg.write_text('[model]\nnf = 2\n[tempering]\nswap_every = 2\n')
    with pytest.raises(ConfigError, match="needs thetas"):
        temper_command(str(cfg))
    cfg.write_text('[model]\nnf = 2\n[tempering]\nthetas = [3.0]\nmass_scales = [1.0, "a"]\n')
    with pytest.raises(ConfigError, match="tempering.mass_scales must be a list of at least 2 number"):
        temper_command(str(cfg))


def test_temper_command_prints_census_and_warns_when_frozen(tmp_path, capsys):
    body = ('name = "tc"\nseed = 5\n[lattice]\nshape = [4, 4, 4]\n'
            '[model]\ngroup = "U"\nnf = 3\nbeta = 2.0\nmass = 0.5\nkappa = 2.0\ntheta = 3.141592653589793\n'
            f'[run]\nthermalize = 20\nmeasurements = 40\noutput = "{tmp_path.as_posix()}"\n')
    cfg = tmp_path / "tc.toml"
    cfg.write_text(body + '[tempering]\nthetas = [3.09, 3.19]\nwrite = "no"\n')
    assert temper_command(str(cfg)) == 0
    out = capsys.readouterr().out
    assert "branch census of the replicas changed 0 times" in out and "warning: the branch census" in out
    cfg.write_text(body + '[tempering]\nthetas = [3.141592653589793]\nmass_scales = [1.0, 0.0]\n')
    assert temper_command(str(cfg)) == 0
    out = capsys.readouterr().out
    assert "scale 0.0000" in out and (tmp_path / "tc" / "tc-t1" / "tc-t1.h5").exists()


def test_slot_action_is_the_action_difference_between_slots():
    # the swap rule needs S_i(A) - S_j(A) for slots that differ in theta and masses; compare the slot
    # action with full-action differences (Simulation.measure) for every model and placement
    from sigmasim.chain import make_simulation
    from sigmasim.protocols import replica_configs
    from sigmasim.protocols.tempering import _slot_action

    cases = [
        {"model": {"nf": 3, "beta": 0.7, "mass": [0.5, 0.3, 0.2], "kappa": 1.5, "theta_placement": "mass"}},
        {"model": {"nf": 3, "beta": 0.7, "mass": 0.4, "kappa": 1.5, "theta_placement": "anomaly"}},
        {"model": {"nf": 2, "beta": 0.7, "mass": 0.4, "kappa": 0.8, "theta_placement": "split"}},
        {"model": {"nf": 2, "group": "SU", "beta": 0.7, "mass": 0.4}},
        {"model": {"nf": 1, "beta": 0.7, "mass": 0.4, "kappa": 0.6, "theta_placement": "anomaly"}},
        {"model": {"kind": "linear", "nf": 3, "mass": 0.3, "c": 0.4, "mu2": 1.0, "lambda1": 0.5,
                   "theta_placement": "anomaly"}},
    ]
    for case in cases:
        cfg = config_from_dict({"seed": 3, "lattice": {"shape": [4, 2]}, **case, "run": {"start": "hot"}})
        ci, cj = replica_configs(cfg, [0.4, 2.9], [1.0, 0.35])
        sim_i, sim_j = make_simulation(ci), make_simulation(cj)
        sim_i.sweep()                                  # a generic field (linear model: not unitary)
        sim_j.state.re, sim_j.state.im = sim_i.state.re.copy(), sim_i.state.im.copy()
        v = sim_i.lattice.volume
        want = v * (sim_i.measure()["action"] - sim_j.measure()["action"])
        got = _slot_action(sim_i, ci) - _slot_action(sim_i, cj)
        assert got == pytest.approx(want, rel=1e-10, abs=1e-10), case


def test_mass_ladder_slots_sample_their_couplings_exactly(tmp_path):
    # beta = 0: every slot (theta, scale * h) must reproduce the exact one-site values; a swap rule
    # that ignored the slot masses would bias them
    cfg = beta0_config(tmp_path)
    scales = (1.0, 0.6, 0.3, 0.0)
    params = TemperParams(thetas=(3.0,), mass_scales=scales)
    assert params.thetas == (3.0,) * 4
    res = run_tempering(cfg, params, write=True)
    assert np.all((res.acceptance > 0.05) & (res.acceptance < 1.0)) and len(res.round_trips) > 10
    for i, s in enumerate(scales):
        ex = one_site_u(2, s, 0.5, 1.5, 0.0)
        om, det = res.series[i]["omega_h"], res.series[i]["det"]
        for part, want in ((om.real, ex["re_tr_thetam_u"]), (om.imag, ex["im_tr_thetam_u"]),
                           (det.real, ex["re_det_u"])):
            g = gamma_analysis(part)
            assert abs(g.value - want) < 4 * g.error
        run = open_run(res.files[i])
        assert run.config.mass == (s, s) and run.config.theta == 3.0
    census = branch_census(res, 2)
    assert np.all(census.counts.sum(axis=1) == 4)
    assert census.changes > 0 and census.slot_changes.sum() > 0


def test_tempering_ladder_validation():
    with pytest.raises(ConfigError, match="tempering.thetas has 2 entries but tempering.mass_scales has 3"):
        TemperParams(thetas=(1.0, 2.0), mass_scales=(1.0, 0.5, 0.0))
    with pytest.raises(ConfigError, match=r"tempering.mass_scales must be finite numbers in \[0"):
        TemperParams(thetas=(1.0,), mass_scales=(1.0, -0.5))
    with pytest.raises(ConfigError, match="same \\(theta, mass scale\\)"):
        TemperParams(thetas=(1.0, 1.0, 2.0), mass_scales=(0.5, 0.5, 0.5))
    with pytest.raises(ConfigError, match="tempering.thetas must be strictly increasing"):
        TemperParams(thetas=(1.0, 1.0))
    # a theta repeated along a mass path is fine, and so is one theta for all slots
    assert TemperParams(thetas=(1.0, 1.0, 2.0), mass_scales=(1.0, 0.5, 0.5)).mass_scales == (1.0, 0.5, 0.5)


def strong_first_order_u3(tmp_path, name, meas):
    # U(3), 4^3, deep in the ordered phase, strong anomaly: at theta = pi the plain chain did not
    # tunnel in 100000 sweeps (seed 5, measured while choosing these couplings; at beta = 1.6 it
    # tunnels about once per 20000 sweeps, too often for a robust contrast)
    return config_from_dict({
        "name": name, "seed": 5, "lattice": {"shape": [4, 4, 4]},
        "model": {"group": "U", "nf": 3, "beta": 2.0, "mass": 0.5, "kappa": 2.0, "theta": math.pi},
        "updates": {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}]},
        "run": {"thermalize": 500, "measurements": meas, "start": "cold", "output": str(tmp_path)},
    })


def test_mass_ladder_reaches_both_vacua_where_plain_chain_and_theta_ladder_stay_stuck(tmp_path):
    from sigmasim.analysis.tunnelling import branch_coordinate, branch_index
    from sigmasim.chain import simulate

    meas = 4000
    cfg = strong_first_order_u3(tmp_path, "plain", meas)
    plain = simulate(cfg)
    idx = branch_index(branch_coordinate(plain["omega_h"], math.pi, 3), 3, 0.5)
    assert np.all(idx == 0)                       # the plain chain never leaves the cold-start vacuum

    # theta ladder around pi: swaps alone cannot change the replicas' branch census
    cfg = strong_first_order_u3(tmp_path, "theta", meas)
    thetas = tuple(math.pi + d for d in (-0.1, 0.0, 0.1))
    res = run_tempering(cfg, TemperParams(thetas=thetas), write=False)
    census = branch_census(res, 3)
    assert census.changes == 0 and census.slot_changes.sum() == 0
    occ, _ = branch_populations(res, 3)[1]
    assert occ[0] == 1.0 or occ[2] == 1.0 or abs(occ[0] - 0.5) > 0.2      # not symmetric

    # mass ladder at theta = pi down to h = 0: both vacua, equal weight (CP) within 4 sigma
    cfg = strong_first_order_u3(tmp_path, "mass", meas)
    res = run_tempering(cfg, TemperParams(thetas=(math.pi,), mass_scales=(1.0, 0.8, 0.6, 0.4, 0.24, 0.12, 0.0)),
                        write=False)
    census = branch_census(res, 3)
    assert census.changes >= CENSUS_MIN_CHANGES and len(res.round_trips) >= 20
    occ, err = branch_populations(res, 3)[0]
    assert err[0] < 0.1                           # an error small enough to tell 0.5 from 0 or 1
    assert abs(occ[0] - 0.5) < 4 * err[0] and abs(occ[2] - 0.5) < 4 * err[2] and occ[1] < 0.01


# ---------------------------------------------------------------- lifetimes
from sigmasim.protocols import fit_log_lifetimes, lifetime_estimate, run_lifetimes  # noqa: E402
from sigmasim.protocols.lifetimes import _lifetime_params  # noqa: E402


def test_lifetime_fits_recover_exact_lines():
    sizes = np.array([4, 6, 8, 10])
    tau = np.exp(0.5 + 0.03 * sizes ** 2)
    fits = fit_log_lifetimes(sizes, tau, 0.05 * tau, d=3)
    assert fits["surface"]["slope"] == pytest.approx(0.03) and fits["surface"]["intercept"] == pytest.approx(0.5)
    assert fits["surface"]["chi2"] == pytest.approx(0.0, abs=1e-12) and fits["surface"]["dof"] == 2
    assert fits["volume"]["chi2"] > 1.0           # the wrong power does not fit
    # censored exponential MLE: exposure / escapes
    tau_hat, err, n = lifetime_estimate([10.0, 30.0, 100.0], [True, True, False])
    assert (tau_hat, n) == (70.0, 2) and err == pytest.approx(70.0 / math.sqrt(2))
    assert math.isnan(lifetime_estimate([5.0], [False])[0])


def test_lifetime_params_validation():
    with pytest.raises(ConfigError, match="even"):
        _lifetime_params({"sizes": [3, 4]})
    with pytest.raises(ConfigError, match="unknown key 'lifetimes.start'.*starts"):
        _lifetime_params({"sizes": [2, 4], "start": 3})
    with pytest.raises(ConfigError, match="needs sizes"):
        _lifetime_params({})


def test_lifetimes_end_to_end_parallel(tmp_path):
    # metastable branch 0 past theta = pi decays; two worker processes, reproducible from the seed
    cfg = config_from_dict({
        "seed": 2, "lattice": {"shape": [4, 4, 4]},
        "model": {"nf": 3, "beta": 1.0, "mass": 0.5, "kappa": 2.0, "theta": 4.0},
        "updates": {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}]},
        "run": {"thermalize": 0, "start": "branch", "start_branch": 0},
    })
    params = _lifetime_params({"sizes": [2, 4], "starts": 4, "max_sweeps": 2000, "stay": 10, "workers": 2})
    a = run_lifetimes(cfg, params)
    assert np.all(a.n_escaped == 4) and np.all(a.tau > 0)
    b = run_lifetimes(cfg, {**params, "workers": 1})
    assert all(np.array_equal(a.times[L], b.times[L]) for L in (2, 4))
    with pytest.raises(ConfigError, match="start = 'branch'"):
        run_lifetimes(u3_config(), params)
    toml = tmp_path / "l.toml"
    toml.write_text('[model]\nnf = 3\n[run]\nstart = "cold"\n[lifetimes]\nsizes = [2]\n')
    with pytest.raises(ConfigError, match="start = 'branch'"):
        lifetimes_command(str(toml))


# ---------------------------------------------------------------- lifetimes: dead time, bootstrap errors
def shifted_starts(reps, n, t0, tau, seed, cap=None):
    rng = np.random.default_rng(seed)
    t = t0 + rng.exponential(tau, (reps, n))
    if cap is None:
        return t, np.ones_like(t, dtype=bool)
    return np.minimum(t, cap), t < cap


@pytest.mark.parametrize("t0,cap", [(2.45, None), (0.67, None), (0.67, 3.0)])
def test_escape_time_fit_bias_and_coverage(t0, cap):
    """Shifted exponential escape times (std/mean 0.29 and 0.6 as measured at L = 4 and L >= 6,
    with and without ~10 % censoring), 16 starts: tau after the dead time is recovered, the
    bootstrap error of ln tau gives pulls of width ~1, the exact interval covers >= 68 %.  The former
    estimate (sum t / escapes, error tau / sqrt(n)) measures t0 + tau with an error 1.7-3.4x too big."""
    from sigmasim.protocols import escape_time_fit

    reps, n, tau = 300, 16, 1.0
    times, esc = shifted_starts(reps, n, t0, tau, seed=int(10 * t0) + (cap is not None), cap=cap)
    fits = [escape_time_fit(t, e, n_boot=400, seed=i) for i, (t, e) in enumerate(zip(times, esc))]
    pull = np.array([(f["ln_tau"] - np.log(tau)) / f["ln_tau_error"] for f in fits])
    assert np.all(np.isfinite(pull))
    assert abs(pull.mean()) < 4 / np.sqrt(reps) and 0.85 < pull.std(ddof=1) < 1.2, (pull.mean(), pull.std())
    cover = np.mean([f["tau_interval"][0] <= tau <= f["tau_interval"][1] for f in fits])
    assert cover > 0.6827 - 4 * np.sqrt(0.6827 * 0.3173 / reps)
    dead = np.array([f["dead_time"] for f in fits])
    derr = np.array([f["dead_time_error"] for f in fits])
    assert abs(dead.mean() - t0) < 4 * dead.std(ddof=1) / np.sqrt(reps)
    # the bootstrap error of the mean escape time matches its real scatter (within 25 %), while
    # tau / sqrt(n) of the pure exponential assumption is far too large
    mean_esc = np.array([f["mean_escape"] for f in fits])
    real = mean_esc.std(ddof=1)
    boot = np.median([f["mean_escape_error"] for f in fits])
    assert abs(boot / real - 1) < 0.25, (boot, real)
    if cap is None:
        old = np.median(mean_esc / np.sqrt(n))
        assert old > 1.5 * real
        cv = np.median([f["cv"] for f in fits])
        assert abs(cv - tau / (t0 + tau)) < 0.1
        assert np.median(derr) > 0


def test_lifetimes_command_writes_escape_figure(tmp_path, capsys):
    cfg = tmp_path / "l.toml"
    cfg.write_text('name = "l"\nseed = 3\n[lattice]\nshape = [4, 4]\n'
                   '[model]\nnf = 3\nbeta = 0.6\nmass = 0.5\nkappa = 2.0\ntheta = 4.5\n'
                   '[updates]\nschedule = [{update = "heatbath", repeat = 1}]\n'
                   '[run]\nstart = "branch"\nstart_branch = 0\nthermalize = 0\n'
                   '[lifetimes]\nsizes = [2, 4]\nstarts = 6\nmax_sweeps = 400\nstay = 3\nworkers = 1\n')
    out = tmp_path / "lt.json"
    assert lifetimes_command(str(cfg), str(out)) == 0
    text = capsys.readouterr().out
    assert "dead time" in text and "KS p shifted/exp" in text
    import json
    doc = json.loads(out.read_text())
    assert set(doc["escape"]) == {"2", "4"} and "dead_time" in doc["escape"]["4"]
    assert (tmp_path / "lt.png").stat().st_size > 5000


# ---------------------------------------------------------------- non-finite fields never reach a file
def _poison_at(monkeypatch, sweep, slot_seed=None):
    """Simulation.sweep that puts a NaN into the field after ``sweep`` (of the chain with seed
    ``slot_seed``, or of every chain)."""
    from sigmasim.chain import Simulation

    real = Simulation.sweep

    def bad(self):
        real(self)
        if self.state.sweep == sweep and slot_seed in (None, self.config.seed):
            self.state.re[0, 3] = np.nan

    monkeypatch.setattr(Simulation, "sweep", bad)


def test_hysteresis_stops_on_a_non_finite_field_before_its_checkpoint(tmp_path, monkeypatch):
    from sigmasim.errors import NumericalError
    from sigmasim.protocols import sweep_checkpoint_path

    cfg = config_from_dict({"seed": 2, "lattice": {"shape": [4, 4]}, "model": {"nf": 2, "mass": 0.3, "kappa": 1.0},
                            "run": {"thermalize": 3, "threads": 1}})
    ckpt = sweep_checkpoint_path(tmp_path / "s.h5")
    _poison_at(monkeypatch, 3)  # the last thermalisation sweep: the protocol checkpoints right after it
    with pytest.raises(NumericalError, match="non-finite field after sweep 3 at site 3"):
        run_sweep(cfg, SweepParams(start=0.0, stop=1.0, step=0.5, sweeps_per_step=4), checkpoint=ckpt)
    assert not ckpt.exists()


def test_tempering_stops_on_a_non_finite_field_before_its_checkpoint(tmp_path, monkeypatch):
    from sigmasim.errors import NumericalError
    from sigmasim.protocols import temper_checkpoint_path
    from sigmasim.storage import read_tree

    cfg = config_from_dict({"name": "nan", "seed": 2, "lattice": {"shape": [4, 4]},
                            "model": {"nf": 2, "mass": 0.3, "kappa": 1.0},
                            "run": {"thermalize": 10, "measurements": 5, "checkpoint_every": 4,
                                    "checkpoint_seconds": 1e6, "threads": 1, "output": str(tmp_path)}})
    ckpt = temper_checkpoint_path(cfg)
    _poison_at(monkeypatch, 8, slot_seed=2 * 1000 + 1)  # slot 1, at its second checkpoint, unmeasured
    with pytest.raises(NumericalError, match="non-finite field after sweep 8 at site 3"):
        run_tempering(cfg, TemperParams(thetas=(0.5, 1.0)), checkpoint=ckpt)
    saved = read_tree(ckpt, states=("slot0", "slot1"))  # the one of sweep 4 stays, finite
    assert int(saved["@attrs"]["sweep"]) == 4
    assert all(np.isfinite(saved[s]["re"]).all() for s in ("slot0", "slot1"))


def test_lifetimes_file_is_replaced_atomically(tmp_path, capsys, monkeypatch):
    # a write that fails half-way (disk full) leaves the previous lifetimes file as it was
    import errno
    import pathlib

    cfg = tmp_path / "l.toml"
    cfg.write_text('name = "l"\nseed = 3\n[lattice]\nshape = [4, 4]\n'
                   '[model]\nnf = 3\nbeta = 0.6\nmass = 0.5\nkappa = 2.0\ntheta = 4.5\n'
                   '[updates]\nschedule = [{update = "heatbath", repeat = 1}]\n'
                   '[run]\nstart = "branch"\nstart_branch = 0\nthermalize = 0\n'
                   '[lifetimes]\nsizes = [2]\nstarts = 2\nmax_sweeps = 20\nstay = 3\nworkers = 1\n')
    out = tmp_path / "lt.json"
    assert lifetimes_command(str(cfg), str(out)) == 0
    before = out.read_bytes()
    real = pathlib.Path.write_text

    def half(self, text, *a, **kw):
        real(self, text[:20], *a, **kw)
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(pathlib.Path, "write_text", half)
    with pytest.raises(RunFileError):
        lifetimes_command(str(cfg), str(out))
    monkeypatch.undo()
    assert out.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["l.toml", "lt.json", "lt.png"]
