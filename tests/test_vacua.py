"""Tests of the tree-level vacuum structure (sigmasim.vacua).

Each test names the source of the result it checks; "from memory" means the
reference was quoted without looking it up.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sigmasim import vacua as V
from sigmasim.cli import format_vacua
from vacua_checks import full_hessian_numeric, minimize_unrestricted

PI = np.pi


def _degenerate_branch_energies(nf, h, theta):
    """E_k(theta) = -Nf h cos((theta + 2 pi k)/Nf), k = 0..Nf-1."""
    k = np.arange(nf)
    return -nf * h * np.cos((theta + 2 * PI * k) / nf)


# ---------------------------------------------------------------------------
# two flavours, large kappa
# ---------------------------------------------------------------------------

# Source: P. Di Vecchia and G. Veneziano, Nucl. Phys. B 171 (1980) 253 (from
# memory): with det U fixed, E(theta) = -sqrt(h_u^2 + h_d^2 + 2 h_u h_d cos theta).
@pytest.mark.parametrize("hu,hd", [(1.0, 1.0), (1.0, 0.5), (0.3, 2.0), (1.0, -0.7)])
@pytest.mark.parametrize("theta", [0.0, 0.3, 2.0, PI, 4.0, 5.9])
def test_two_flavour_large_kappa_formula(hu, hd, theta):
    exact = -math.sqrt(max(hu**2 + hd**2 + 2 * hu * hd * math.cos(theta), 0.0))
    for placement in ("mass", "anomaly", "split"):
        # h_u = h_d at theta = pi is a flat circle of vacua (E = 0): not isolated
        vac = V.large_kappa_vacua([hu, hd], theta, placement, include_degenerate=True)
        assert vac[0].is_global
        assert vac[0].energy == pytest.approx(exact, abs=1e-10)
        # det U is fixed to e^{-i theta_a} in this limit
        _, ta = V.resolve_angles(2, theta, placement)
        assert vac[0].det == pytest.approx(np.exp(-1j * ta), abs=1e-10)


# Source: same reference; the finite-kappa model approaches the constrained
# limit as kappa -> infinity with corrections O(h^2 / kappa) (second-order
# perturbation theory in the stiff det direction; common practice, no source).
@pytest.mark.parametrize("hu,hd,theta", [(1.0, 0.5, 0.3), (1.0, 0.5, 2.0), (1.0, -0.7, 2.0),
                                         (0.8, 0.8, 1.0)])
def test_two_flavour_finite_kappa_tends_to_limit(hu, hd, theta):
    exact = -math.sqrt(hu**2 + hd**2 + 2 * hu * hd * math.cos(theta))
    h = max(abs(hu), abs(hd))
    dev = []
    for kappa in (1e3 * h, 1e4 * h):
        e = V.find_local_minima(V.make_potential([hu, hd], kappa, theta))[0].energy
        dev.append(e + 2 * kappa - exact)  # subtract the constant -2 kappa
        assert abs(dev[-1]) <= h**2 / kappa
    # the deviation scales like 1/kappa
    assert dev[0] / dev[1] == pytest.approx(10.0, rel=0.05)


# ---------------------------------------------------------------------------
# Nf degenerate flavours, large kappa
# ---------------------------------------------------------------------------

# Source: standard result, E_k(theta) = -Nf h cos((theta + 2 pi k)/Nf) (e.g.
# E. Witten, Ann. Phys. 128 (1980) 363, from memory); branch k is stable iff
# cos((theta + 2 pi k)/Nf) > 0 (its constrained Hessian is h cos(...) times 1),
# so spinodals sit at (theta + 2 pi k)/Nf = +-pi/2 and the global minimum
# switches at theta = pi mod 2 pi for Nf >= 2.
@pytest.mark.parametrize("nf", [1, 2, 3, 4, 5, 6])
def test_degenerate_large_kappa_branches(nf):
    h = 1.0
    res = V.scan_theta(h, nf=nf, large_kappa=True, placement="anomaly", n_theta=81)
    th = res.thetas
    for i, t in enumerate(th):
        ek = _degenerate_branch_energies(nf, h, t)
        cos_k = np.cos((t + 2 * PI * np.arange(nf)) / nf)
        # every followed branch is one of the analytic branches
        for k in range(res.n_branches):
            if np.isfinite(res.energies[k, i]):
                assert np.min(np.abs(ek - res.energies[k, i])) < 1e-10
        # away from marginal points the number of minima is the number of stable k
        # (Nf = 1: the single point det U = e^{-i theta_a} has no directions at all)
        if nf == 1:
            assert res.n_minima[i] == 1
        elif np.min(np.abs(cos_k)) > 1e-6:
            assert res.n_minima[i] == np.sum(cos_k > 0)
        assert res.global_energy[i] == pytest.approx(ek.min(), abs=1e-10)
    fo = sorted(p.theta for p in res.first_order)
    if nf == 1:
        assert fo == []
        assert res.n_branches == 1
    else:
        assert np.allclose(fo, [PI, 3 * PI], atol=1e-6)
    # spinodal points: (theta + 2 pi k)/nf = +-pi/2 inside (0, 4 pi); none for nf = 1
    expect = sorted({round((s * PI / 2) * nf - 2 * PI * k, 12)
                     for k in range(-nf - 2, nf + 3) for s in (-1, 1)
                     if 1e-9 < (s * PI / 2) * nf - 2 * PI * k < 4 * PI - 1e-9}) if nf > 1 else []
    got = sorted({round(s.theta, 6) for s in res.spinodals if s.kind != "merge"})
    assert np.allclose(got, np.round(expect, 6), atol=1e-6)


# Common practice, no source: in the large-kappa limit the branch with all
# phases 2 pi k / Nf has constrained Hessian h cos(2 pi k / Nf), so at theta = 0
# a metastable branch exists iff some k != 0 has cos(2 pi k / Nf) > 0, i.e. Nf > 4
# (Nf = 4 gives cos(pi/2) = 0: a degenerate inflection point, not a minimum).
@pytest.mark.parametrize("nf", range(1, 9))
@pytest.mark.parametrize("structured", [True, False])
def test_metastable_at_theta0_iff_nf_gt_4(nf, structured):
    pot = V.make_potential(1.0, 0.0, 0.0, nf=nf, large_kappa=True)
    vac = V.find_local_minima(pot, structured=structured, seed=11)
    n_stable = sum(math.cos(2 * PI * k / nf) > 1e-12 for k in range(nf))
    assert len(vac) == n_stable
    assert (len(vac) > 1) == (nf > 4)
    energies = sorted(-nf * math.cos(2 * PI * k / nf) for k in range(nf)
                      if math.cos(2 * PI * k / nf) > 1e-12)
    assert np.allclose([v.energy for v in vac], energies, atol=1e-10)


# ---------------------------------------------------------------------------
# Dashen's phenomenon
# ---------------------------------------------------------------------------

# Source: R. Dashen, Phys. Rev. D 3 (1971) 1879 (from memory): for an odd
# number of degenerate flavours with negative mass at theta = 0 (equivalent to
# positive mass at theta = pi) CP is spontaneously broken: two degenerate
# CP-conjugate vacua with Im Tr U != 0.  Positive mass: one CP-even vacuum.
@pytest.mark.parametrize("nf", [3, 5])
@pytest.mark.parametrize("kappa", [None, 20.0])
def test_dashen_phenomenon(nf, kappa):
    def vacua(h):
        if kappa is None:
            return V.large_kappa_vacua(h, 0.0, nf=nf)
        return V.find_local_minima(V.make_potential(h, kappa, 0.0, nf=nf))

    glob = [v for v in vacua(-1.0) if v.is_global]
    assert len(glob) == 2
    a, b = glob
    assert a.energy == pytest.approx(b.energy, abs=1e-12)
    assert abs(a.omega.imag) > 0.1 and abs(b.omega.imag) > 0.1
    assert b.omega == pytest.approx(np.conj(a.omega), abs=1e-9)  # CP conjugates (theta_m = 0)
    assert all(v.isolated and v.n_flat == 0 for v in glob)

    glob = [v for v in vacua(+1.0) if v.is_global]
    assert len(glob) == 1
    assert abs(glob[0].omega.imag) < 1e-12


# Common practice, no source (corollary of the same mapping h -> -h,
# theta -> theta + Nf pi): for even Nf a negative mass is equivalent to theta = 0.
def test_negative_mass_even_nf_single_vacuum():
    glob = [v for v in V.large_kappa_vacua(-1.0, 0.0, nf=4) if v.is_global]
    assert len(glob) == 1
    assert glob[0].omega == pytest.approx(-1.0, abs=1e-10)


# ---------------------------------------------------------------------------
# placement invariance
# ---------------------------------------------------------------------------

def _energies(pot):
    return np.array(sorted(v.energy for v in V.find_local_minima(pot)))


# Source: invariance of V under U -> e^{i alpha} U with (theta_m, theta_a) ->
# (theta_m - alpha, theta_a - Nf alpha) (common practice, no source): only
# theta = Nf theta_m - theta_a is physical.
@settings(max_examples=12, deadline=None)
@given(
    h=st.lists(st.floats(-2.0, 2.0).filter(lambda x: abs(x) > 0.05), min_size=2, max_size=3),
    kappa=st.floats(0.0, 2.0),
    theta=st.floats(0.0, 4 * PI),
    frac=st.floats(-1.0, 2.0),
)
def test_placement_invariance(h, kappa, theta, frac):
    nf = len(h)
    ref = _energies(V.make_potential(h, kappa, theta, "mass"))
    for placement in ("anomaly", "split", frac):
        assert np.allclose(_energies(V.make_potential(h, kappa, theta, placement)), ref,
                           atol=1e-9)
    alpha = 0.37
    pot = V.make_potential(h, kappa, theta_m=theta / nf + alpha, theta_a=nf * alpha)
    assert pot.theta == pytest.approx(theta)
    assert np.allclose(_energies(pot), ref, atol=1e-9)
    # also in the large-kappa limit
    ref_lk = _energies(V.make_potential(h, theta=theta, large_kappa=True))
    lk = _energies(V.make_potential(h, theta=theta, placement="anomaly", large_kappa=True))
    assert np.allclose(lk, ref_lk, atol=1e-9)


# Same source: whole theta scans agree between placements.
def test_placement_invariance_of_scan():
    kw = dict(h=[1.0, 0.6, -0.3], kappa=0.7, n_theta=61)
    a = V.scan_theta(placement="mass", **kw)
    b = V.scan_theta(placement="anomaly", **kw)
    assert np.allclose(a.global_energy, b.global_energy, atol=1e-10)
    assert np.array_equal(a.n_minima, b.n_minima)
    assert np.allclose([p.theta for p in a.first_order], [p.theta for p in b.first_order],
                       atol=1e-8)
    # the U(1)-invariant order parameter does not depend on the placement either
    for i in range(len(a.thetas)):
        za = np.sort_complex(a.omega_rot[~np.isnan(a.energies[:, i]), i])
        zb = np.sort_complex(b.omega_rot[~np.isnan(b.energies[:, i]), i])
        assert np.allclose(za, zb, atol=1e-8)


# ---------------------------------------------------------------------------
# diagonal reduction vs unrestricted minimisation on the group
# ---------------------------------------------------------------------------

_RANDOM_SETS = [
    # (h, kappa, theta, group, large_kappa)
    ([1.3, -0.4], 0.6, 1.1, "U", False),
    ([-0.9, -0.2], 1.7, 2.9, "U", False),
    ([0.7, -1.5, 0.25], 0.3, 4.0, "U", False),
    ([-1.0, -0.6, -0.3], 1.2, 0.4, "U", False),
    ([1.0, 0.5, -0.8], 0.0, 2.2, "U", False),
    ([1.1, -0.5, 0.3], 0.9, 3.3, "SU", False),
    ([1.1, -0.5, 0.3], 0.0, 5.0, "U", True),
]


# Source: module docstring, parts (a) and (b) (Birkhoff-von Neumann argument
# and the stationarity conditions [D, K] = 0, {D, L} = 2c; derived here); the
# numerical comparison itself is common practice, no source.
@pytest.mark.parametrize("h,kappa,theta,group,lk", _RANDOM_SETS)
def test_unrestricted_matches_diagonal(h, kappa, theta, group, lk):
    pot = V.make_potential(h, kappa, theta, "split", group=group, large_kappa=lk)
    vac = V.find_local_minima(pot)
    um = minimize_unrestricted(pot, n_starts=10, seed=5)
    assert um.energy == pytest.approx(vac[0].energy, abs=1e-8)
    # no start ever goes below the diagonal global minimum
    assert um.energies.min() >= vac[0].energy - 1e-10
    # pairwise distinct |h_f|: the minimiser is itself diagonal (part (b))
    off = um.U - np.diag(np.diag(um.U))
    assert np.abs(off).max() < 1e-6
    # unitary, and in the right coset
    assert np.allclose(um.U @ um.U.conj().T, np.eye(len(h)), atol=1e-10)
    if group == "SU":
        assert np.linalg.det(um.U) == pytest.approx(1.0, abs=1e-10)
    # a strict torus minimum is stable in all off-diagonal directions (part (c))
    for v in vac:
        assert np.all(v.hessian_offdiag > 0)


# Source: random matrix sampling, common practice, no source.  Every random
# start on U(2)/U(3) ends at a stationary point whose energy is one of the
# diagonal stationary values: here we only require it to be no lower than
# the diagonal minimum (checked above) and the best start to hit it.
def test_unrestricted_degenerate_masses():
    pot = V.make_potential([0.8, 0.8, -0.8], 0.5, 1.3)
    vac = V.find_local_minima(pot)
    um = minimize_unrestricted(pot, n_starts=10, seed=2)
    assert um.energy == pytest.approx(vac[0].energy, abs=1e-8)


# ---------------------------------------------------------------------------
# Hessian on the group
# ---------------------------------------------------------------------------

# Common practice, no source: analytic second-order expansion vs central
# finite differences of V(U0 exp(iX)).
@pytest.mark.parametrize("group,lk", [("U", False), ("SU", False), ("U", True)])
def test_full_hessian_analytic_vs_numeric(group, lk):
    pot = V.make_potential([1.0, -0.6, 0.35], 0.8, 2.4, "split", group=group, large_kappa=lk)
    for v in V.find_local_minima(pot):
        ha = V.full_hessian(v.phases, pot)
        hn = full_hessian_numeric(v.phases, pot, eps=1e-4)
        assert np.allclose(ha, hn, atol=1e-5)
        assert np.allclose(np.linalg.eigvalsh(ha), v.hessian_full, atol=1e-10)
    # also at a non-stationary point (the expansion is exact at second order)
    phi = np.array([0.3, -1.2, 0.9])
    if pot.constrained:
        phi[-1] = pot.constraint_sum - phi[:-1].sum()
    assert np.allclose(V.full_hessian(phi, pot), full_hessian_numeric(phi, pot), atol=1e-5)


# Common practice, no source: two massless flavours leave a flat torus
# direction and flat off-diagonal modes; they must be reported, not hidden.
def test_flat_directions_reported():
    pot = V.make_potential([1.0, 0.0, 0.0], 0.5, 0.0)
    assert V.find_local_minima(pot) == []  # no isolated minimum
    vac = V.find_local_minima(pot, include_degenerate=True)
    assert vac
    for v in vac:
        assert v.energy == pytest.approx(-1.0 - 2 * 0.5, abs=1e-10)
        assert not v.isolated
        assert (1, 2) in v.flat_pairs
        assert v.n_flat == 3  # one torus mode + two off-diagonal modes of pair (1, 2)


# ---------------------------------------------------------------------------
# SU(Nf), CP, output
# ---------------------------------------------------------------------------

# Common practice, no source: SU(Nf) with mass phase theta/Nf is the
# large-kappa U(Nf) coset det U = 1; energies differ by the frozen -2 kappa cos(theta_a).
@pytest.mark.parametrize("theta", [0.0, 1.0, PI, 5.0])
def test_su_equals_large_kappa(theta):
    h = [1.0, 0.7, -0.2]
    su = V.make_potential(h, 0.9, theta, "mass", group="SU")
    lk = V.make_potential(h, 0.0, theta, "mass", large_kappa=True)
    e_su = _energies(su) - su.energy_offset
    assert np.allclose(e_su, _energies(lk), atol=1e-10)


# Source: CP maps theta -> -theta, U -> U^*, so at theta = pi a first-order
# point is a pair of CP-conjugate vacua (common practice; e.g. Dashen 1971,
# from memory).  The invariant order parameter e^{i theta_m} Omega is
# conjugated by CP.
def test_cp_pairs_at_first_order_point():
    res = V.scan_theta([1.0, 0.8, 0.5], 0.5, n_theta=81)
    fo = [p for p in res.first_order if abs(p.theta - PI) < 1e-6]
    assert len(fo) == 1
    a, b = fo[0].branch_from, fo[0].branch_to
    i = int(np.argmin(np.abs(res.thetas - PI)))
    pairs = {(c.branch_a, c.branch_b) for c in res.cp_pairs if abs(c.theta - PI) < 1e-9}
    assert (min(a, b), max(a, b)) in pairs
    assert res.omega_rot[a, i] == pytest.approx(np.conj(res.omega_rot[b, i]), abs=1e-8)
    assert res.energies[a, i] == pytest.approx(res.energies[b, i], abs=1e-9)
    # at theta = 0 the unique vacuum is CP invariant
    pairs0 = {(c.branch_a, c.branch_b) for c in res.cp_pairs if c.theta == 0.0}
    assert (res.global_branch[0], res.global_branch[0]) in pairs0
    # first-order points are a pi (mod 2 pi) here: brentq refinement
    assert np.allclose(sorted(p.theta for p in res.first_order), [PI, 3 * PI], atol=1e-8)


# Source: as above (first-order point at theta = pi for CP-breaking masses);
# here pi is not a grid point, so the point comes from brentq on E_a - E_b.
def test_first_order_refined_off_grid():
    th = np.linspace(0.05, 4 * PI - 0.05, 41)
    res = V.scan_theta([1.0, 0.8, 0.5], 0.5, thetas=th)
    assert [p.method for p in res.first_order] == ["brentq", "brentq"]
    assert np.allclose([p.theta for p in res.first_order], [PI, 3 * PI], atol=1e-10)


# Common practice, no source: the global minimum of a scan equals that of an
# independent search at the same theta.
def test_scan_global_matches_search():
    res = V.scan_theta([1.0, -0.45, 0.7], 1.3, n_theta=41, placement="split")
    for i in range(0, 41, 7):
        pot = res.potential.with_theta(res.thetas[i], res.placement)
        assert res.global_energy[i] == pytest.approx(V.find_local_minima(pot)[0].energy,
                                                     abs=1e-10)


# Common practice, no source: smoke test of the table and plot helpers.
def test_table_and_plot():
    import matplotlib

    matplotlib.use("Agg")
    res = V.scan_theta(1.0, nf=3, large_kappa=True, n_theta=41)
    txt = format_vacua(res)
    assert "first-order" in txt and "spinodal" in txt and "research toy" in txt
    assert isinstance(format_vacua(V.large_kappa_vacua(1.0, 0.0, nf=5)), str)
    ax = V.plot_branches(res)
    assert ax.get_xlabel() == "theta"
    assert ax.get_ylabel() == "E / site (tree level)"
    assert "tree level, research toy" in ax.get_title()
    assert ax.get_legend() is not None
    import matplotlib.pyplot as plt

    plt.close(ax.figure)


def test_input_validation():
    # common practice, no source
    with pytest.raises(ValueError):
        V.make_potential(1.0, -1.0, nf=2)
    with pytest.raises(ValueError):
        V.make_potential([1.0] * 9)
    with pytest.raises(ValueError):
        V.make_potential(1.0, 1.0, nf=2, group="SU", large_kappa=True)
    with pytest.raises(ValueError):
        V.resolve_angles(2, 1.0, theta_m=0.2)
    with pytest.raises(ValueError):
        V.make_potential(1.0, nf=2, placement="nowhere")


# ---------------------------------------------------------------------------
# first-order points just above the threshold in kappa
# ---------------------------------------------------------------------------

# Derived here (tree level, degenerate masses h, Nf >= 2): at the CP-invariant
# angle theta_c the symmetric vacuum e^{i theta_m} U = +-1 turns unstable and a
# CP pair takes over for kappa > kappa_c = |h| / (2 Nf); checked numerically with
# find_local_minima for Nf = 2..6.  theta_c = pi, except for h < 0 and odd Nf,
# where h -> -h is theta -> theta + Nf pi, so theta_c = 0 (mod 2 pi).  Above
# kappa_c the metastable windows shrink to zero at kappa_c, so a scan must
# find the jump whatever its grid (a step that jumps onto the CP mirror of a
# dying minimum must not count as continuation).
def _theta_c(nf, h):
    return 2 * PI if (h < 0 and nf % 2) else PI


@pytest.mark.parametrize("nf", [2, 3, 4, 5, 6])
@pytest.mark.parametrize("h", [1.0, -1.0])
@pytest.mark.parametrize("ratio,offset", [(0.99, 0.03), (1.003, 0.03), (1.02, 0.0)])
def test_first_order_point_just_above_threshold(nf, h, ratio, offset):
    tc = _theta_c(nf, h)
    kappa = abs(h) / (2 * nf) * ratio
    # offset 0: tc is a grid point; otherwise it lies inside a grid interval
    th = tc + offset + np.linspace(-0.5, 0.5, 5)
    res = V.scan_theta([h] * nf, kappa, thetas=th, nf=nf)
    fo = res.first_order
    if ratio < 1:
        assert fo == []
        return
    assert len(fo) == 1, fo
    assert fo[0].theta == pytest.approx(tc, abs=1e-8)
    lab = res.global_label
    # the global branch changes by one step of k across the point (k -> k - 1)
    assert V.canonical_branch(lab[0] - 1, nf) == lab[-1]


# the command-line cases (default grid: 241 points over [0, 4 pi], pi on the grid)
@pytest.mark.parametrize("nf,h,kappa", [(4, 1.0, 0.1275), (3, 1.0, 0.17), (3, 0.4, 0.068)])
def test_first_order_point_cli_cases(nf, h, kappa):
    th = np.linspace(0, 4 * PI, 241)[:121]  # [0, 2 pi] with the default spacing
    res = V.scan_theta([h] * nf, kappa, thetas=th, nf=nf)
    assert [p.theta for p in res.first_order] == pytest.approx([PI], abs=1e-9)
    assert res.first_order[0].energy == pytest.approx(
        V.find_local_minima(res.potential.with_theta(PI))[0].energy, abs=1e-9)
    assert [(res.global_label[0], res.global_label[-1])] == [(0, -1 if nf > 2 else 1)]


# the answer must not depend on the last bit of kappa
def test_first_order_stable_under_last_bit():
    th = np.linspace(0, 2 * PI, 121)
    k = 0.1 * 1.01
    a = V.scan_theta([1.0] * 5, k, thetas=th, nf=5)
    b = V.scan_theta([1.0] * 5, np.nextafter(k, 1.0), thetas=th, nf=5)
    assert [p.theta for p in a.first_order] == pytest.approx([PI], abs=1e-9)
    assert [p.theta for p in b.first_order] == pytest.approx([PI], abs=1e-9)


# A degenerate global CP pair at a CP-invariant grid point is a first-order
# point, also at an end of the grid (h < 0, odd Nf: theta_c = 0).
def test_degenerate_cp_pair_at_grid_end_is_first_order():
    for th in (np.linspace(0.0, 1.0, 5), np.linspace(-1.0, 0.0, 5)):
        res = V.scan_theta([-1.0] * 3, 0.3, thetas=th, nf=3)
        assert [p.theta for p in res.first_order] == [0.0]
        assert res.first_order[0].method in ("cp", "grid")


# Branch numbers (convention of sigmasim.vacua): k modulo Nf in
# -floor((Nf-1)/2) .. floor(Nf/2), arg omega_h nearest (theta + 2 pi k)/Nf.
def test_branch_convention():
    assert [list(V.branch_range(n)) for n in (1, 2, 3, 4)] == [[0], [0, 1], [-1, 0, 1],
                                                                [-1, 0, 1, 2]]
    assert V.canonical_branch(2, 3) == -1 and V.canonical_branch(-1, 2) == 1
    for nf in range(1, 7):
        for k in V.branch_range(nf):
            for theta in (0.3, 2.8, 3.3, 8.0):
                om = np.exp(1j * V.branch_phase(k, theta, nf))
                assert V.branch_label(om, theta, nf) == k
    # the metastable vacuum of U(3), h = 0.3, kappa = 3 at theta = 2.8 is branch -1 at
    # arg omega_h = (2.8 - 2 pi)/3 = -1.161 (tree level: 0 is global)
    pot = V.make_potential(0.3, 3.0, 2.8, nf=3)
    st = V.branch_status(pot, -1)
    assert st.status == "metastable" and st.global_branches == (0,)
    assert V.branch_status(pot, 2).status == "metastable"
    assert V.branch_status(pot, 0).status == "global"
    assert V.branch_status(pot, 1).status == "no minimum"
    assert V.branch_phase(-1, 2.8, 3) == pytest.approx(-1.161, abs=1e-3)
    # at theta = pi above kappa_c the CP pair is 0 and -1
    pot = V.make_potential(1.0, 0.1275, PI, nf=4)
    assert V.branch_status(pot, -1).global_branches == (-1, 0)
    assert V.branch_status(pot, 0).status == "global (degenerate)"
