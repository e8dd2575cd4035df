"""Tests of sigmasim.exact against independent brute-force numerics.

None of the reference computations below uses a Bessel-function identity:
they are direct quadratures (scipy.integrate.quad / dblquad), periodic
trapezoid grids over eigenvalue phases (Weyl integration formula), explicit
Haar coordinates on U(2), Haar Monte Carlo (scipy.stats.unitary_group),
phi-grid transfer matrices, Gaussian sampling and dense matrix inversion.

The periodic trapezoid rule is spectrally (exponentially) accurate for smooth
periodic integrands (Trefethen & Weideman, SIAM Review 56 (2014) 385; quoted
from memory), which is why modest grids reach ~1e-12.
"""

import math
from itertools import combinations

import numpy as np
import pytest
from scipy import integrate, special, stats

from sigmasim import exact as ex

U_KEYS = [
    "re_tr_thetam_u",
    "im_tr_thetam_u",
    "re_tr_u",
    "im_tr_u",
    "re_det_u",
    "im_det_u",
    "re_thetaa_det_u",
    "im_thetaa_det_u",
    "ln_z",
]
SU_KEYS = ["re_tr_thetam_u", "im_tr_thetam_u", "re_tr_u", "im_tr_u", "ln_z"]

# (h, kappa, theta_m, theta_a): negative h, kappa = 0, h = 0, generic angles
PARAMS = [
    (0.7, 0.4, 0.3, -1.1),
    (-1.3, 1.1, 2.2, 0.5),
    (2.5, 0.0, -0.8, 0.0),
    (0.0, 0.9, 0.4, 2.0),
    (1.1, 0.6, 0.0, math.pi),
    (-0.4, 1.4, -2.7, 1.9),
]


def _assert_dict_close(got, ref, keys, atol, rtol=0.0):
    for k in keys:
        assert got[k] == pytest.approx(ref[k], abs=atol, rel=rtol), k


# ---------------------------------------------------------------------------
# brute-force references
# ---------------------------------------------------------------------------


def _quad_u1(h, kappa, tm, ta):
    """Nf = 1 one-site averages by adaptive quadrature over the phase."""
    shift = abs(h) + 2 * kappa  # keep the integrand O(1)

    def w(p):
        return math.exp(h * math.cos(p + tm) + 2 * kappa * math.cos(p + ta) - shift)

    obs = {
        "re_tr_thetam_u": lambda p: math.cos(p + tm),
        "im_tr_thetam_u": lambda p: math.sin(p + tm),
        "re_tr_u": math.cos,
        "im_tr_u": math.sin,
        "re_det_u": math.cos,
        "im_det_u": math.sin,
        "re_thetaa_det_u": lambda p: math.cos(p + ta),
        "im_thetaa_det_u": lambda p: math.sin(p + ta),
    }
    opts = dict(epsabs=1e-13, epsrel=1e-12, limit=200)
    z = integrate.quad(w, 0, 2 * math.pi, **opts)[0] / (2 * math.pi)
    out = {"ln_z": math.log(z) + shift}
    for k, f in obs.items():
        out[k] = integrate.quad(lambda p: w(p) * f(p), 0, 2 * math.pi, **opts)[0] / (
            2 * math.pi * z
        )
    return out


def _vandermonde2(phis):
    """|prod_{i<j} (e^{i phi_i} - e^{i phi_j})|^2 on a broadcast grid."""
    v = 1.0
    for a, b in combinations(range(len(phis)), 2):
        v = v * np.abs(np.exp(1j * phis[a]) - np.exp(1j * phis[b])) ** 2
    return v


def _weyl_averages(phis, nf, expo, tm, ta):
    """Averages over a class-function weight given eigenphases on a grid."""
    vdm = _vandermonde2(phis) / math.factorial(nf)
    emax = expo.max()
    w = vdm * np.exp(expo - emax)
    z = w.mean()
    tr = sum(np.exp(1j * p) for p in phis)
    det = np.exp(1j * sum(phis))

    def avg(o):
        return complex((w * o).mean() / z)

    tr_tm = avg(np.exp(1j * tm) * tr) / nf
    tr_u = avg(tr) / nf
    d = avg(det)
    da = np.exp(1j * ta) * d
    return {
        "re_tr_thetam_u": tr_tm.real,
        "im_tr_thetam_u": tr_tm.imag,
        "re_tr_u": tr_u.real,
        "im_tr_u": tr_u.imag,
        "re_det_u": d.real,
        "im_det_u": d.imag,
        "re_thetaa_det_u": da.real,
        "im_thetaa_det_u": da.imag,
        "ln_z": math.log(z) + emax,
    }


def _weyl_u(nf, h, kappa, tm, ta, m):
    """U(Nf) one-site averages via the Weyl integration formula
    (H. Weyl, The Classical Groups, 1939; quoted from memory):
    int dU f = (1/N!) int prod dphi_j/2pi |Delta(e^{i phi})|^2 f(phi)
    for class functions f; evaluated on an m^nf periodic trapezoid grid."""
    g = 2 * np.pi * np.arange(m) / m
    phis = np.meshgrid(*([g] * nf), indexing="ij", sparse=True)
    expo = h * sum(np.cos(p + tm) for p in phis) + 2 * kappa * np.cos(sum(phis) + ta)
    expo = np.broadcast_to(expo, (m,) * nf)
    return _weyl_averages(phis, nf, expo, tm, ta)


def _weyl_su(nf, h, tm, m):
    """SU(Nf): same Weyl formula with phi_N = -sum_{j<N} phi_j (common
    practice; follows from the U(N) formula with a delta function on arg det)."""
    g = 2 * np.pi * np.arange(m) / m
    free = np.meshgrid(*([g] * (nf - 1)), indexing="ij", sparse=True)
    phis = list(free) + [-sum(free)]
    expo = h * sum(np.cos(p + tm) for p in phis)
    expo = np.broadcast_to(expo, (m,) * (nf - 1))
    return _weyl_averages(phis, nf, expo, tm, 0.0)


def _haar_u2(hs, kappa, tm, ta, m=64, ngl=48):
    """U(2) averages in explicit Haar coordinates (common practice, no source):
    U = e^{i alpha} [[a, b], [-b*, a*]], a = cos(eta) e^{i xi}, b = sin(eta) e^{i chi},
    measure (d alpha/2pi)(d xi/2pi)(d chi/2pi) sin(2 eta) d eta on [0, pi/2]
    (uniform measure on S^3 in Hopf coordinates; the double cover
    (alpha, W) ~ (alpha + pi, -W) does not affect normalised averages).
    chi drops out of every quantity used here."""
    al = 2 * np.pi * np.arange(m) / m
    xi = 2 * np.pi * np.arange(m) / m
    x, wgl = np.polynomial.legendre.leggauss(ngl)
    eta = (x + 1) * np.pi / 4
    weta = wgl * np.pi / 4 * np.sin(2 * eta)
    al, xi, eta = np.meshgrid(al, xi, eta, indexing="ij", sparse=True)
    a = np.cos(eta) * np.exp(1j * xi)
    ph = np.exp(1j * al)
    u11, u22 = ph * a, ph * np.conj(a)
    det = np.exp(2j * al)
    expo = (np.exp(1j * tm) * (hs[0] * u11 + hs[1] * u22)).real + 2 * kappa * (
        np.exp(1j * ta) * det
    ).real
    emax = expo.max()
    w = np.exp(expo - emax) * weta
    z = w.sum() / m**2

    def avg(o):
        return complex((w * o).sum() / m**2 / z)

    tr = u11 + u22
    tr_tm = avg(np.exp(1j * tm) * tr) / 2
    tr_u = avg(tr) / 2
    d = avg(det)
    da = np.exp(1j * ta) * d
    return {
        "re_tr_thetam_u": tr_tm.real,
        "im_tr_thetam_u": tr_tm.imag,
        "re_tr_u": tr_u.real,
        "im_tr_u": tr_u.imag,
        "re_det_u": d.real,
        "im_det_u": d.imag,
        "re_thetaa_det_u": da.real,
        "im_thetaa_det_u": da.imag,
        "ln_z": math.log(z) + emax,
    }


# ---------------------------------------------------------------------------
# 1. one-site integrals
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("nf", range(1, 9))
def test_normalisation(nf):
    # int dU 1 = 1 for normalised Haar measure (definition)
    assert ex.one_site_u(nf, 0.0, 0.0)["ln_z"] == pytest.approx(0.0, abs=1e-15)
    assert ex.one_site_su(nf, 0.0)["ln_z"] == pytest.approx(0.0, abs=1e-15)
    assert ex.bessel_determinant(nf, 0, 0.0) == pytest.approx(1.0, abs=1e-15)
    assert ex.bessel_determinant(nf, 1, 0.0) == pytest.approx(0.0, abs=1e-15)


@pytest.mark.parametrize("p", PARAMS)
def test_u1_one_site_vs_quad(p):
    _assert_dict_close(ex.one_site_u(1, *p), _quad_u1(*p), U_KEYS, atol=1e-11)


@pytest.mark.parametrize(
    "p", [(50.0, 50.0, 0.3, 1.0), (-40.0, 25.0, 1.0, 0.2), (30.0, 10.0, 0.0, 2.5)]
)
def test_u1_one_site_large_args_closed_form(p):
    # Nf = 1: Re(cU) with c = h e^{i tm} + 2 kappa e^{i ta} (common practice),
    # Z = I_0(|c|), <U> = e^{-i arg c} I_1(|c|)/I_0(|c|)
    h, k, tm, ta = p
    c = h * np.exp(1j * tm) + 2 * k * np.exp(1j * ta)
    got = ex.one_site_u(1, *p)
    assert got["ln_z"] == pytest.approx(math.log(special.ive(0, abs(c))) + abs(c), rel=1e-13)
    u = np.exp(-1j * np.angle(c)) * special.ive(1, abs(c)) / special.ive(0, abs(c))
    assert got["re_tr_u"] == pytest.approx(u.real, abs=1e-12)
    assert got["im_tr_u"] == pytest.approx(u.imag, abs=1e-12)


@pytest.mark.parametrize("nf,m", [(2, 48), (3, 40)])
@pytest.mark.parametrize("p", PARAMS)
def test_un_one_site_vs_weyl(nf, m, p):
    _assert_dict_close(ex.one_site_u(nf, *p), _weyl_u(nf, *p, m=m), U_KEYS, atol=1e-11)


@pytest.mark.parametrize("p", [(50.0, 50.0, 0.2, 0.1), (-45.0, 20.0, 0.1, -0.5)])
def test_u2_one_site_large_args_vs_weyl(p):
    # no overflow at h, kappa ~ 50; the grid needs ~200 points per phase here
    got = ex.one_site_u(2, *p)
    ref = _weyl_u(2, *p, m=200)
    _assert_dict_close(got, ref, U_KEYS, atol=1e-9, rtol=1e-11)


@pytest.mark.parametrize("nf", range(1, 9))
def test_large_args_finite(nf):
    for p in [(50.0, 50.0, 0.1, 0.3), (-50.0, 0.0, 0.0, 0.0), (0.0, 50.0, 0.0, 1.0)]:
        d = ex.one_site_u(nf, *p)
        assert all(np.isfinite(d[k]) for k in U_KEYS)
        assert all(abs(d[k]) <= 1 + 1e-12 for k in U_KEYS if k != "ln_z")
    s = ex.one_site_su(nf, 50.0, 0.2)
    assert all(np.isfinite(s[k]) for k in SU_KEYS)


def test_cancellation_guard():
    # strongly frustrated point: Bessel sum loses all digits -> warning + NaN
    with pytest.warns(RuntimeWarning, match="cancellation"):
        d = ex.one_site_u(2, 50.0, 50.0, math.pi / 2, 0.0)
    assert d["cond"] > 1e12 and all(math.isnan(d[k]) for k in U_KEYS)
    with pytest.warns(RuntimeWarning, match="cancellation"):
        s = ex.one_site_su(3, 50.0, math.pi / 3)
    assert all(math.isnan(s[k]) for k in SU_KEYS)
    # Nf = 1 uses the closed form and stays exact there
    d1 = ex.one_site_u(1, 50.0, 25.0, 0.0, math.pi)  # c = 0
    assert d1["ln_z"] == pytest.approx(0.0, abs=1e-14)


@pytest.mark.parametrize("nf", [1, 2, 3, 5, 8])
@pytest.mark.parametrize("p", PARAMS[:4])
def test_theta_invariance(nf, p):
    # U -> e^{i a} U maps (tm, ta) -> (tm + a, ta + nf a) (module docstring)
    h, k, tm, ta = p
    a = 0.77
    d0 = ex.one_site_u(nf, h, k, tm, ta)
    d1 = ex.one_site_u(nf, h, k, tm + a, ta + nf * a)
    inv = ["re_tr_thetam_u", "im_tr_thetam_u", "re_thetaa_det_u", "im_thetaa_det_u", "ln_z"]
    _assert_dict_close(d1, d0, inv, atol=1e-12)
    # Tr U and det U rotate: <Tr U'> = e^{-i a} <Tr U>
    t0 = complex(d0["re_tr_u"], d0["im_tr_u"]) * np.exp(-1j * a)
    assert complex(d1["re_tr_u"], d1["im_tr_u"]) == pytest.approx(t0, abs=1e-12)
    q0 = complex(d0["re_det_u"], d0["im_det_u"]) * np.exp(-1j * nf * a)
    assert complex(d1["re_det_u"], d1["im_det_u"]) == pytest.approx(q0, abs=1e-12)


@pytest.mark.parametrize("nf", [1, 2, 3, 4])
def test_negative_h_is_theta_m_shift(nf):
    # -h e^{i tm} = h e^{i (tm + pi)}: identical action, hence identical
    # <Tr U>, <det U>, ln Z, while Tr(e^{i tm} U) flips sign
    same = [k for k in U_KEYS if "thetam" not in k]
    for h, k, tm, ta in PARAMS:
        d0 = ex.one_site_u(nf, -h, k, tm, ta)
        d1 = ex.one_site_u(nf, h, k, tm + math.pi, ta)
        _assert_dict_close(d0, d1, same, atol=1e-12)
        for key in ("re_tr_thetam_u", "im_tr_thetam_u"):
            assert d0[key] == pytest.approx(-d1[key], abs=1e-12)


@pytest.mark.parametrize("nf", [1, 2, 4, 6, 8])
def test_derivatives_and_ward_identity(nf):
    # d lnZ/dh = nf <Re Tr(e^{i tm} U)>/nf * nf, d lnZ/dkappa = 2 <Re(e^{i ta} det U)>,
    # d lnZ/dta = -2 kappa <Im(e^{i ta} det U)> (differentiate the weight;
    # common practice).  Ward identity from U -> e^{i a} U (derived here):
    # h <Im Tr(e^{i tm}U)> = -2 kappa nf <Im(e^{i ta} det U)>.
    h, k, tm, ta = 1.7, 0.8, 0.4, -0.3
    eps = 1e-5
    d = ex.one_site_u(nf, h, k, tm, ta)

    def lz(**kw):
        a = dict(h=h, kappa=k, theta_m=tm, theta_a=ta)
        a.update(kw)
        return ex.one_site_u(nf, **a)["ln_z"]

    dh = (lz(h=h + eps) - lz(h=h - eps)) / (2 * eps)
    dk = (lz(kappa=k + eps) - lz(kappa=k - eps)) / (2 * eps)
    dta = (lz(theta_a=ta + eps) - lz(theta_a=ta - eps)) / (2 * eps)
    assert dh == pytest.approx(nf * d["re_tr_thetam_u"], abs=1e-8)
    assert dk == pytest.approx(2 * d["re_thetaa_det_u"], abs=1e-8)
    assert dta == pytest.approx(-2 * k * d["im_thetaa_det_u"], abs=1e-8)
    assert h * nf * d["im_tr_thetam_u"] == pytest.approx(
        -2 * k * nf * d["im_thetaa_det_u"], abs=1e-12
    )


def test_theta_zero_is_real():
    # at theta = 0 (mod 2 pi) and real h the Im parts vanish (U -> U^* symmetry)
    for nf in range(1, 9):
        d = ex.one_site_u(nf, 1.2, 0.7, 0.0, 0.0)
        for k in ["im_tr_thetam_u", "im_thetaa_det_u", "im_tr_u", "im_det_u"]:
            assert d[k] == pytest.approx(0.0, abs=1e-14)


# --- SU(Nf) -----------------------------------------------------------------


@pytest.mark.parametrize("h", [0.3, 1.5, -2.2, 7.0, 45.0])
def test_su2_closed_form(h):
    # int_{SU(2)} exp(h Re Tr W) = (2/pi) int_0^pi sin^2 t e^{2h cos t} dt
    #   = I_1(2|h|)/|h|  (Weyl formula for SU(2); checked here by quad as well)
    d = ex.one_site_su(2, h)
    ref = math.log(special.ive(1, 2 * abs(h)) / abs(h)) + 2 * abs(h)
    assert d["ln_z"] == pytest.approx(ref, rel=1e-13)
    if abs(h) < 10:
        q = integrate.quad(lambda t: 2 / math.pi * math.sin(t) ** 2 * math.exp(2 * h * math.cos(t)),
                           0, math.pi, epsabs=1e-14, epsrel=1e-13)[0]
        assert d["ln_z"] == pytest.approx(math.log(q), rel=1e-12)
    # <Re Tr W>/2 = d lnZ/dh / 2 = (I_0(2h) + I_2(2h))/(2 I_1(2h)) - 1/(2h) (differentiate)
    x = 2 * abs(h)
    der = (special.ive(0, x) + special.ive(2, x)) / special.ive(1, x) - 1 / abs(h)
    assert d["re_tr_u"] == pytest.approx(np.sign(h) * der / 2, abs=1e-12)


def test_su1_trivial():
    # SU(1) = {1}: Z = exp(h cos tm)
    d = ex.one_site_su(1, 1.3, 0.7)
    assert d["ln_z"] == pytest.approx(1.3 * math.cos(0.7), abs=1e-14)
    assert d["re_tr_u"] == pytest.approx(1.0, abs=1e-14)
    assert d["im_tr_u"] == pytest.approx(0.0, abs=1e-14)


@pytest.mark.parametrize("nf,m", [(2, 64), (3, 48)])
@pytest.mark.parametrize("h,tm", [(0.8, 0.3), (-1.7, 1.1), (2.6, 2.9), (1.0, 0.0)])
def test_su_vs_weyl(nf, m, h, tm):
    ref = _weyl_su(nf, h, tm, m)
    _assert_dict_close(ex.one_site_su(nf, h, tm), ref, SU_KEYS, atol=1e-11)


# --- non-degenerate masses --------------------------------------------------


@pytest.mark.parametrize(
    "hs,k,tm,ta",
    [((1.2, 0.5), 0.0, 0.3, 0.0), ((1.2, -0.7), 0.6, -0.4, 1.3), ((2.1, 0.3), 1.0, 1.9, -2.0)],
)
def test_nondegenerate_u2_vs_haar_coordinates(hs, k, tm, ta):
    got = ex.one_site_u(2, hs, k, tm, ta)
    _assert_dict_close(got, _haar_u2(hs, k, tm, ta), U_KEYS, atol=1e-11)


def test_haar_coordinates_degenerate_consistency():
    # the Haar-coordinate reference itself against the Weyl-tested degenerate path
    _assert_dict_close(
        ex.one_site_u(2, 0.9, 0.5, 0.2, 0.7), _haar_u2((0.9, 0.9), 0.5, 0.2, 0.7), U_KEYS, 1e-11
    )


def test_nondegenerate_nf1_and_dispatch():
    assert ex.one_site_u(1, [0.8], 0.3, 0.1, 0.2) == ex.one_site_u(1, 0.8, 0.3, 0.1, 0.2)
    assert ex.one_site_u(3, [0.8] * 3, 0.3) == ex.one_site_u(3, 0.8, 0.3)
    with pytest.raises(ValueError):
        ex.one_site_u(3, [0.8, -0.8, 1.0])
    with pytest.raises(ValueError):
        ex.one_site_u(2, [0.0, 1.0])


@pytest.mark.parametrize("nf,spread,tol", [(2, 1e-4, 1e-7), (3, 1e-3, 1e-5), (4, 1e-2, 2e-3)])
def test_nondegenerate_degenerate_limit(nf, spread, tol):
    # masses symmetric about their mean: deviation from the degenerate result is
    # O(spread^2) (symmetric function, first order cancels); the Vandermonde
    # division costs ~log10(1/prod gaps) digits, hence the growing spread
    hs = 1.1 + spread * (np.arange(nf) - (nf - 1) / 2)
    got = ex.one_site_u(nf, hs, 0.4, 0.3, -0.2)
    ref = ex.one_site_u(nf, 1.1, 0.4, 0.3, -0.2)
    _assert_dict_close(got, ref, U_KEYS, atol=tol)
    # and with a much larger spread, permutation symmetry
    hs = np.array([0.5, 1.7, -2.3, 0.9][:nf])
    a = ex.one_site_u(nf, hs, 0.4, 0.3, -0.2)
    b = ex.one_site_u(nf, hs[::-1], 0.4, 0.3, -0.2)
    _assert_dict_close(a, b, U_KEYS, atol=1e-12)


@pytest.mark.parametrize("ms", [(0.6, 1.3, -0.9), (0.4, 1.5, -0.8, 1.1)])
def test_nondegenerate_vs_haar_monte_carlo(ms):
    # Haar Monte Carlo (scipy.stats.unitary_group; QR method of Mezzadri,
    # Notices AMS 54 (2007) 592, from memory), statistical check of Z_nu(M)
    # for nu = 0, 1, -2 at 5 sigma with a fixed seed
    ms = np.array(ms)
    n = ms.size
    u = stats.unitary_group.rvs(n, size=30000, random_state=np.random.default_rng(7))
    expo = np.einsum("i,nii->n", ms, u).real
    det = np.linalg.det(u)
    for nu in (0, 1, -2):
        samples = (det**nu * np.exp(expo)).real
        ref = ex.u_nondegenerate_integral(nu, ms)
        err = samples.std() / math.sqrt(samples.size)
        assert abs(samples.mean() - ref) < 5 * err


def test_bessel_determinant_sign_rule():
    # I_n(-x) = (-1)^n I_n(x) => Z_nu(-h) = (-1)^{nu nf} Z_nu(h)
    for nf in (1, 2, 3):
        for nu in (-2, -1, 0, 1, 3):
            assert ex.bessel_determinant(nf, nu, -1.3) == pytest.approx(
                (-1) ** (nu * nf) * ex.bessel_determinant(nf, nu, 1.3), rel=1e-13
            )


# ---------------------------------------------------------------------------
# 2. U(1) chain
# ---------------------------------------------------------------------------


def _grid_chain(n, beta, h, k, tm, ta, m=256):
    """Independent phi-grid transfer matrix (periodic trapezoid, m points)."""
    phi = 2 * np.pi * np.arange(m) / m
    c = h * np.exp(1j * tm) + 2 * k * np.exp(1j * ta)
    onsite = (c * np.exp(1j * phi)).real
    sw = np.exp(0.5 * (onsite - abs(c)))
    kin = np.exp(beta * (np.cos(phi[:, None] - phi[None, :]) - 1)) / m
    t = sw[:, None] * kin * sw[None, :]
    lam, q = np.linalg.eigh(t)
    lmax = lam[-1]
    r = lam / lmax
    zs = np.sum(r**n)
    ln_z = n * (beta + abs(c) + math.log(lmax)) + math.log(zs)
    eu = q.T @ (np.exp(1j * phi)[:, None] * q)
    u = np.sum(np.diag(eu) * r**n) / zs
    g = np.empty(n)
    for s in range(n):
        # Tr(diag(e^{-i phi}) T^s diag(e^{i phi}) T^{n-s})
        g[s] = (np.einsum("kl,l,lk,k->", eu.conj().T, r**s, eu, r ** (n - s)) / zs).real
    te = sw[:, None] * kin * np.cos(phi[:, None] - phi[None, :]) * sw[None, :]
    # Tr(T_e T^{n-1}) without powers of the unnormalised matrix
    tq = q.T @ te @ q
    energy = np.sum(np.diag(tq) * r ** (n - 1)) / (lmax * zs)
    return {"ln_z": ln_z, "re_u": u.real, "im_u": u.imag, "g": g, "energy": energy}


CHAIN_PARAMS = [
    (2, 0.4, 0.7, 0.3, 0.2, -1.0),
    (3, 1.7, -1.2, 0.5, 1.1, 0.4),
    (6, 4.0, 0.9, 0.0, -0.6, 0.0),
    (7, 1.1, 0.0, 0.8, 0.0, 2.2),
    (5, 0.9, 1.5, 0.75, 0.0, math.pi),
    (40, 20.0, 3.0, 1.0, 0.5, 0.3),
]


@pytest.mark.parametrize("p", CHAIN_PARAMS)
def test_chain_vs_phi_grid(p):
    got = ex.u1_chain(*p)
    ref = _grid_chain(*p)
    assert got["ln_z"] == pytest.approx(ref["ln_z"], rel=1e-12)
    for k in ("re_u", "im_u", "energy"):
        assert got[k] == pytest.approx(ref[k], abs=1e-11), k
    np.testing.assert_allclose(got["g"], ref["g"], atol=1e-11)
    tm = p[4]
    assert got["re_thetam_u"] == pytest.approx(
        (np.exp(1j * tm) * complex(got["re_u"], got["im_u"])).real, abs=1e-14
    )


def test_chain_two_sites_vs_dblquad():
    # N = 2: two links between the same pair -> exp(2 beta cos(phi0 - phi1))
    beta, h, k, tm, ta = 0.8, 1.1, 0.35, 0.6, -0.9
    c = h * np.exp(1j * tm) + 2 * k * np.exp(1j * ta)

    def w(p0, p1):
        return math.exp(
            2 * beta * math.cos(p0 - p1) + (c * np.exp(1j * p0)).real + (c * np.exp(1j * p1)).real
        )

    def q(f):
        return integrate.dblquad(
            lambda p1, p0: w(p0, p1) * f(p0, p1), 0, 2 * math.pi, 0, 2 * math.pi,
            epsabs=1e-13, epsrel=1e-12,
        )[0] / (4 * math.pi**2)

    z = q(lambda a, b: 1.0)
    got = ex.u1_chain(2, beta, h, k, tm, ta)
    assert got["ln_z"] == pytest.approx(math.log(z), rel=1e-10)
    assert got["re_u"] == pytest.approx(q(lambda a, b: math.cos(a)) / z, abs=1e-10)
    assert got["im_u"] == pytest.approx(q(lambda a, b: math.sin(a)) / z, abs=1e-10)
    assert got["g"][1] == pytest.approx(q(lambda a, b: math.cos(a - b)) / z, abs=1e-10)


@pytest.mark.parametrize("p", PARAMS)
def test_chain_beta_zero_is_one_site(p):
    n = 5
    one = ex.one_site_u(1, *p)
    ch = ex.u1_chain(n, 0.0, *p)
    assert ch["ln_z"] == pytest.approx(n * one["ln_z"], abs=1e-12)
    assert ch["re_u"] == pytest.approx(one["re_tr_u"], abs=1e-13)
    assert ch["im_u"] == pytest.approx(one["im_tr_u"], abs=1e-13)
    assert ch["re_thetam_u"] == pytest.approx(one["re_tr_thetam_u"], abs=1e-13)
    u2 = one["re_tr_u"] ** 2 + one["im_tr_u"] ** 2
    np.testing.assert_allclose(ch["g"][1:], u2, atol=1e-13)
    np.testing.assert_allclose(ch["g_conn"][1:], 0.0, atol=1e-13)
    # continuity at small beta (O(beta) corrections)
    small = ex.u1_chain(n, 1e-7, *p)
    assert small["re_u"] == pytest.approx(one["re_tr_u"], abs=1e-6)
    assert small["energy"] == pytest.approx(u2, abs=1e-6)


@pytest.mark.parametrize("p", CHAIN_PARAMS)
def test_chain_energy_is_beta_derivative(p):
    # <cos(phi_x - phi_{x+1})> = (1/N) d lnZ / d beta (N links); = G(1)
    n, beta = p[0], p[1]
    got = ex.u1_chain(*p)
    eps = 1e-5 * max(1.0, beta)
    up = ex.u1_chain(n, beta + eps, *p[2:])["ln_z"]
    dn = ex.u1_chain(n, beta - eps, *p[2:])["ln_z"]
    dz = (up - dn) / (2 * eps)
    assert got["energy"] == pytest.approx(dz / n, abs=1e-7)
    assert got["energy"] == pytest.approx(got["g"][1], abs=1e-12)
    # periodicity G(t) = G(N - t)
    np.testing.assert_allclose(got["g"][1:], got["g"][1:][::-1], atol=1e-12)


def test_chain_long_and_strong():
    d = ex.u1_chain(500, 50.0, 40.0, 10.0, 0.3, 1.0)
    assert np.isfinite(d["ln_z"]) and np.all(np.isfinite(d["g"]))
    assert np.all(np.abs(d["g"]) <= 1 + 1e-12)


# ---------------------------------------------------------------------------
# 3. free scalar field
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("nt,m2", [(8, 0.3), (9, 1.7), (16, 0.05), (64, 0.5)])
def test_free_correlator_closed_form_and_mass(nt, m2):
    c = ex.free_scalar_correlator((nt, 4, 4), m2)
    cc = ex.free_scalar_correlator_closed_form(nt, m2)
    # the momentum sum has absolute (not relative) accuracy ~1e-16 C(0)
    np.testing.assert_allclose(c, cc, rtol=1e-12, atol=1e-14 * cc[0])
    meff = ex.cosh_effective_mass(cc)
    ok = np.isfinite(meff)
    assert ok.sum() >= nt - 2
    np.testing.assert_allclose(meff[ok], ex.free_scalar_mass(m2), rtol=1e-9)
    if nt <= 16:  # exact momentum sum still has full relative precision
        me = ex.cosh_effective_mass(c)[ok]
        np.testing.assert_allclose(me, ex.free_scalar_mass(m2), rtol=1e-9)
    # T -> infinity: C(t)/C(t+1) -> e^{E} far from the boundary
    cl = ex.free_scalar_correlator((400,), m2)
    assert math.log(cl[5] / cl[6]) == pytest.approx(ex.free_scalar_mass(m2), rel=1e-9)


def _laplacian(shape, m2):
    """Dense A = m2 + sum_mu (2 - S_mu - S_mu^T), S_mu the periodic shift."""
    v = int(np.prod(shape))
    idx = np.arange(v).reshape(shape)
    a = (m2 + 2 * len(shape)) * np.eye(v)
    for mu in range(len(shape)):
        nb = np.roll(idx, -1, axis=mu).ravel()
        s = np.zeros((v, v))
        s[np.arange(v), nb] = 1.0
        a -= s + s.T
    return a


@pytest.mark.parametrize("shape", [(6,), (4, 3), (4, 3, 2), (5, 2, 2, 2)])
def test_free_field_vs_dense_inverse(shape):
    m2 = 0.4
    g = np.linalg.inv(_laplacian(shape, m2))  # <phi_x phi_y> = A^{-1}_{xy}
    g0 = g[0].reshape(shape)  # <phi_0 phi_(t, y)>
    c = g0.reshape(shape[0], -1).sum(axis=1)
    np.testing.assert_allclose(ex.free_scalar_correlator(shape, m2), c, rtol=1e-12)
    assert ex.free_scalar_phi2(shape, m2) == pytest.approx(g[0, 0], rel=1e-12)
    # full definition (1/V_s) <Phi(0) Phi(t)> with Phi the spatial sum
    vs = int(np.prod(shape[1:]))
    blocks = g.reshape(shape[0], vs, shape[0], vs).sum(axis=(1, 3)) / vs
    np.testing.assert_allclose(blocks[0], c, rtol=1e-12)


def test_free_field_gaussian_sampling():
    # exact Gaussian samples: phi = F^{-1}[ F[xi] / sqrt(lambda_p) ], xi white noise,
    # lambda_p = m2 + sum 4 sin^2(p/2) (covariance A^{-1}; common practice)
    shape, m2, ns = (8, 4, 4), 0.3, 4000
    rng = np.random.default_rng(12345)
    lam = np.full(shape, m2)
    for mu, l in enumerate(shape):
        b = [1] * 3
        b[mu] = l
        lam = lam + (4 * np.sin(np.pi * np.arange(l) / l) ** 2).reshape(b)
    xi = rng.standard_normal((ns,) + shape)
    phi = np.fft.ifftn(np.fft.fftn(xi, axes=(1, 2, 3)) / np.sqrt(lam), axes=(1, 2, 3)).real
    big_phi = phi.sum(axis=(2, 3))  # (ns, T)
    vs = 16
    # translation-averaged estimator per sample
    est = np.stack(
        [(big_phi * np.roll(big_phi, -t, axis=1)).mean(axis=1) / vs for t in range(shape[0])],
        axis=1,
    )
    mean, err = est.mean(axis=0), est.std(axis=0, ddof=1) / math.sqrt(ns)
    exact = ex.free_scalar_correlator(shape, m2)
    assert np.all(np.abs(mean - exact) < 4 * err)
    p2 = (phi**2).mean(axis=(1, 2, 3))
    assert abs(p2.mean() - ex.free_scalar_phi2(shape, m2)) < 4 * p2.std(ddof=1) / math.sqrt(ns)
