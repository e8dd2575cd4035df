"""Figures for a talk: mathtext, no clipped data, legends off the data, no empty figures."""

import math
from types import SimpleNamespace

import numpy as np
import pytest

from sigmasim.analysis import plots
from sigmasim.analysis.report import analyze_data
from sigmasim.chain import simulate
from sigmasim.config import config_from_dict


def _ra(model, shape=(8, 4), meas=200, therm=30):
    cfg = config_from_dict({"name": "fig", "seed": 3, "lattice": {"shape": list(shape)}, "model": model,
                            "run": {"thermalize": therm, "measurements": meas, "threads": 1}})
    d = simulate(cfg)
    return analyze_data(d, d, cfg)


@pytest.fixture(scope="module")
def u1():
    return _ra({"nf": 1, "beta": 0.5, "mass": 0.3, "theta": 1.0})


@pytest.fixture(scope="module")
def linear():
    # broken phase: |Omega| well above 1 (Phi is not unitary)
    return _ra({"kind": "linear", "nf": 2, "mu2": -5.0, "lambda1": 0.05, "lambda2": 0.25, "c": 0.3,
                "mass": 0.1, "theta": 1.0}, shape=(4, 4))


def _data_inside(ax, artist, xy):
    fig = ax.figure
    fig.canvas.draw()
    box = artist.get_window_extent(fig.canvas.get_renderer())
    pts = ax.transData.transform(np.column_stack(xy))
    return np.sum(box.contains_points(pts) if hasattr(box, "contains_points") else
                  [box.contains(*p) for p in pts])


def test_phase_history_legend_covers_no_data():
    # weak coupling to the mass on a small lattice: arg Omega_h fills (-pi, pi] at every sweep
    ra = _ra({"nf": 1, "beta": 0.1, "mass": 0.01, "theta": 1.0}, shape=(4, 4), meas=300)
    fig = plots.plot_phase_history(ra)
    ax = fig.axes[0]
    leg = ax.get_legend()
    om = ra.data["omega_h"]
    assert np.ptp(np.angle(om)) > 5.0
    assert _data_inside(ax, leg, (ra.data["sweep"], np.angle(om))) == 0
    plots._plt().close(fig)


def test_linear_omega_plane_shows_every_point_and_names_phi(linear):
    om = linear.data["omega_h"][linear.cut:]
    assert np.max(np.abs(om)) > 1.05  # the case of the issue: the data leave the unit disk
    fig = plots.plot_omega_plane(linear)
    ax = fig.axes[0]
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    assert x0 <= om.real.min() and om.real.max() <= x1 and y0 <= om.imag.min() and om.imag.max() <= y1
    title = fig._suptitle.get_text()
    assert r"\Phi_x" in title and "U_x" not in title
    leg = ax.get_legend()
    assert _data_inside(ax, leg, (om.real, om.imag)) == 0
    plots._plt().close(fig)


def test_effective_mass_limits_show_every_point(u1):
    fig = plots.plot_effective_mass(u1)
    for ax, ch in zip(fig.axes, u1.masses):
        m = u1.masses[ch]
        T = u1.config.shape[0]
        y = m.m_eff[: T // 2]
        y = y[np.isfinite(y)]
        lo, hi = ax.get_ylim()
        assert np.all((lo <= y) & (y <= hi)), (ch, y, lo, hi)
    plots._plt().close(fig)


def test_no_empty_dwell_time_figure(tmp_path, u1):
    # deep in one vacuum (h = 2 at theta = 0): no branch change in 60 measurements for any of seeds 1..8,
    # not only for this seed (at h = 0.3, theta = 1 five of eight seeds changed branch)
    ra = _ra({"nf": 2, "beta": 0.6, "mass": 2.0, "kappa": 0.5, "theta": 0.0}, meas=60)
    assert ra.tunnelling is not None and len(ra.tunnelling.completed) == 0
    names = [p.name for p in plots.plot_all(ra, tmp_path)]
    assert not any("dwell_times" in n for n in names) and any("omega_plane" in n for n in names)


def test_pi_ticks_are_mathtext():
    fig, ax = plots._plt().subplots()
    plots.pi_ticks(ax, 0.0, 2 * math.pi)
    labels = [t.get_text() for t in ax.get_xticklabels()]
    assert labels == ["0", r"$\pi/2$", r"$\pi$", r"$3\pi/2$", r"$2\pi$"]
    plots._plt().close(fig)


def test_scan_figure_markers_only_line_at_pi_words_on_axes(tmp_path, monkeypatch):
    import matplotlib.pyplot as plt

    from sigmasim import scan

    kept = []
    monkeypatch.setattr(plt, "close", lambda fig=None: kept.append(fig))
    spec = SimpleNamespace(axes=["model.theta"], name="s", output=tmp_path)
    pts = [SimpleNamespace(params={"model.theta": t}, observables={"im_omega_h": (v, 0.02)})
           for t, v in ((2.6, 0.3), (3.0, 0.25), (3.3, -0.25), (3.7, -0.3))]
    scan.plot_index(spec, pts, "im_omega_h")
    fig = kept[0]
    ax = fig.axes[0]
    data_lines = [ln for ln in ax.get_lines() if len(ln.get_xdata()) == 4]
    assert data_lines and all(ln.get_linestyle() in ("None", "none", "") for ln in data_lines)
    assert any(len(ln.get_xdata()) == 2 and np.allclose(ln.get_xdata(), math.pi) for ln in ax.get_lines())
    assert "theta" in ax.get_xlabel() and "vacuum angle" in ax.get_xlabel()
    assert ax.get_ylabel() != "im_omega_h" and r"\Omega_h" in ax.get_ylabel()
    plt.close(fig)


def test_sweep_figure_scales_tree_level_to_the_measured_modulus(tmp_path, monkeypatch):
    import matplotlib.pyplot as plt

    from sigmasim.protocols import SweepParams, plot_sweep, run_sweep, tree_level

    kept = []
    monkeypatch.setattr(plt, "close", lambda fig=None: kept.append(fig))
    cfg = config_from_dict({"name": "sw", "seed": 3, "lattice": {"shape": [4, 4]},
                            "model": {"nf": 3, "beta": 0.4, "mass": 0.5, "kappa": 2.0},
                            "run": {"thermalize": 20, "threads": 1}})
    params = SweepParams(start=0.0, stop=2 * math.pi, step=0.8, sweeps_per_step=10, thermalize_per_step=0,
                         cycles=1, band=0.5)
    res = run_sweep(cfg, params)
    res.tree = tree_level(cfg, 0.0, float(params.grid()[-1]))
    plot_sweep(res, tmp_path / "s.png")
    ax = kept[0].axes[0]
    mod = np.median(np.hypot(res.steps["re_omega_h"], res.steps["im_omega_h"]))
    assert mod < 0.95  # fluctuations shrink |Omega| below the tree-level 1
    tree = [ln for ln in ax.get_lines() if ln.get_linestyle() == "--"]
    assert tree
    top = max(np.nanmax(np.abs(ln.get_ydata())) for ln in tree)
    assert top == pytest.approx(mod, rel=0.02)
    assert any(r"$\pi$" in t.get_text() for t in ax.get_xticklabels())
