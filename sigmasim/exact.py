r"""Exact reference results for testing the sigmasim Monte Carlo engine.

Everything here is plain numpy/scipy; nothing is simulated.  The results are
meant as ground truth for unit and regression tests of the engine.

Conventions
-----------
Field ``U_x`` in U(Nf) (or SU(Nf)), Boltzmann weight ``exp(-S)``, normalised
Haar measure (``int dU 1 = 1``), with

.. math::

    S = -\beta \sum_{x,\mu} \mathrm{Re\,Tr}(U_x^\dagger U_{x+\mu})
        - \sum_x \mathrm{Re\,Tr}(H U_x)
        - \kappa \sum_x 2\,\mathrm{Re}(e^{i\theta_a} \det U_x),

    H = e^{i\theta_m}\,\mathrm{diag}(h_1, \dots, h_{N_f}),\quad h_f \in \mathbb{R}.

The physical angle is ``theta = Nf*theta_m - theta_a``; it is invariant under
the U(1) change of variables ``U -> exp(i alpha) U`` (which shifts
``theta_m -> theta_m + alpha`` and ``theta_a -> theta_a + Nf*alpha``).

Internally the one-site integrals are computed in the rotated frame
``V = exp(i theta_m) U``, in which the mass term is ``(h/2) Tr(V + V^dagger)``
and the anomaly term is ``2 kappa Re(exp(-i theta) det V)``.  Hence

* ``Tr(e^{i theta_m} U) = Tr V`` and ``e^{i theta_a} det U = e^{-i theta} det V``
  depend on (theta_m, theta_a) only through theta;
* ``Tr U = e^{-i theta_m} Tr V`` and ``det U = e^{-i Nf theta_m} det V`` do not.

A negative mass ``h_f < 0`` is absorbed by ``V -> diag(sign h) V`` (Haar
invariant), which multiplies ``det V`` by ``prod(sign h)``, i.e. shifts
theta by pi for every negative mass.

Contents
--------
1. One-site U(Nf) and SU(Nf) integrals and expectation values
   (:func:`one_site_u`, :func:`one_site_su`, :func:`bessel_determinant`,
   :func:`u_nondegenerate_integral`).
2. Periodic one-dimensional U(1) chain by an exact charge-basis transfer
   matrix (:func:`u1_chain`).
3. Free real lattice scalar field (:func:`free_scalar_correlator`,
   :func:`free_scalar_correlator_closed_form`, :func:`free_scalar_phi2`,
   :func:`free_scalar_mass`, :func:`cosh_effective_mass`).

All Bessel functions are evaluated as exponentially scaled ``scipy.special.ive``
so that arguments of order 50-100 do not overflow; logarithms of the scale
factors are added back analytically in ``ln_z``.

Numerical caveat: the one-site results are Fourier (Bessel) sums over the
topological charge / det-winding ``n``.  When both the mass and kappa (or, for
SU(Nf), the mass alone) are large and theta is near pi the terms cancel
strongly; the returned key ``cond`` (sum of |terms| / |sum|) quantifies the
loss of relative precision (roughly ``cond * 1e-16``).  A ``RuntimeWarning``
is issued when it exceeds 1e10 and all values are NaN when it exceeds 1e12
(or the sum comes out non-positive).  Nf = 1 uses the closed form
``Z = I_0(|c|)`` and is exact everywhere.  Example: Nf = 2, h = kappa = 50 is
fine at theta = 0 (cond ~ 2) but NaN at theta = pi/2 (cond ~ 1e15).
"""

import math
import warnings

import numpy as np
from scipy import optimize, special

__all__ = [
    "bessel_determinant",
    "u_nondegenerate_integral",
    "one_site_u",
    "one_site_su",
    "u1_chain",
    "free_scalar_correlator",
    "free_scalar_correlator_closed_form",
    "free_scalar_phi2",
    "free_scalar_mass",
    "cosh_effective_mass",
]

# Relative size below which a Bessel term is dropped from a sum.  1e-17 is
# below double precision epsilon so truncation is invisible next to rounding.
_TRUNC_TOL = 1e-17
# Hard cap on any charge sum / basis size to avoid runaway loops.
_NMAX_CAP = 4000
# Warn above this cancellation factor (results then have < ~6 correct digits);
# above _COND_NAN (< ~4 digits), or if the sum is not positive, the results
# are replaced by NaN.
_COND_WARN = 1e10
_COND_NAN = 1e12


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------


def _ive_int(order, x):
    """Scaled modified Bessel ``exp(-|x|) I_order(x)`` for integer orders.

    Uses ``I_{-n} = I_n`` and ``I_n(-x) = (-1)^n I_n(x)`` for integer n
    (Abramowitz & Stegun 1964, 9.6.6 and 9.6.30; quoted from memory) so
    that scipy is only ever called with non-negative order and argument.
    """
    order = np.asarray(order)
    val = special.ive(np.abs(order), abs(x))
    if x < 0:
        val = val * np.where(order % 2 == 0, 1.0, -1.0)
    return val


def _bessel_cutoff(x, tol=_TRUNC_TOL):
    """Smallest n >= 1 with I_n(x) <= tol * I_0(x) (x >= 0).

    I_n(x) is decreasing in n >= 0 for fixed x >= 0 (common practice, follows
    from the integral representation), so every later term is smaller too.
    """
    x = abs(float(x))
    if x == 0.0:
        return 1
    ref = special.ive(0, x)
    hi = 16
    while special.ive(hi, x) > tol * ref:
        hi *= 2
        if hi > _NMAX_CAP:
            raise ValueError(f"Bessel argument {x} too large for the charge sum")
    ns = np.arange(hi + 1)
    small = special.ive(ns, x) <= tol * ref
    return max(1, int(np.argmax(small)))


def _check_cond(cond, what):
    """Warn when a Fourier/Bessel sum has lost many digits by cancellation."""
    if not np.isfinite(cond) or cond > _COND_WARN:
        warnings.warn(
            f"{what}: strong cancellation in the Bessel sum (cond={cond:.3g}); "
            "results keep only about -log10(cond*1e-16) digits",
            RuntimeWarning,
            stacklevel=3,
        )


# ---------------------------------------------------------------------------
# 1. one-site integrals
# ---------------------------------------------------------------------------


def _degenerate_terms(nf, ns, x):
    """Scaled sector integrals for degenerate mass x >= 0.

    Returns ``z[n] = e^{-nf x} D_n(x)`` with ``D_n(x) = det[I_{n+j-i}(x)]``
    and ``t[n] = e^{-nf x} int dV (det V)^n Tr V exp((x/2) Tr(V+V^dag))``.

    ``t`` follows from the complex-source form of the Bessel determinant,
    ``int dV det^n exp(a Tr V + b Tr V^dag) = (b/a)^{n nf/2} D_n(2 sqrt(ab))``
    (derived here from the U(1) rotation V -> e^{i psi} V; common practice),
    whose a-derivative at a = b = x/2 gives ``D_n'(x) - n nf D_n(x)/x``.
    ``t`` is returned split equally over the flavours, shape (len(ns), nf),
    to share the bookkeeping of the non-degenerate path.
    """
    ns = np.asarray(ns)
    idx = np.arange(nf)
    orders = ns[:, None, None] + idx[None, None, :] - idx[None, :, None]  # n + j - i
    a = special.ive(np.abs(orders), x)
    # I_n' = (I_{n-1} + I_{n+1}) / 2  (Abramowitz & Stegun 9.6.26, from memory)
    ap = 0.5 * (special.ive(np.abs(orders - 1), x) + special.ive(np.abs(orders + 1), x))
    z = np.linalg.det(a)
    # d/dx det = sum over columns of det with that column differentiated
    dz = np.zeros_like(z)
    for j in range(nf):
        b = a.copy()
        b[:, :, j] = ap[:, :, j]
        dz += np.linalg.det(b)
    if x == 0.0:
        # D_n(0) = delta_{n0}; int det^n Tr V = 1 only for nf = 1, n = -1
        # (character orthogonality: Tr V is irreducible, det^{-1} Tr V is
        # the trivial rep only for U(1)).
        t = np.where((ns == -1) & (nf == 1), 1.0, 0.0)
    else:
        t = dz - ns * nf * z / x
    return z, t[:, None] * np.ones((1, nf)) / nf  # per-flavour share


def bessel_determinant(nf, nu, h, scaled=False):
    r"""U(Nf) sector integral with degenerate real mass.

    .. math:: Z_\nu(h) = \int_{U(N_f)} dU\, (\det U)^\nu
              \exp\!\big(\tfrac{h}{2}\mathrm{Tr}(U+U^\dagger)\big)
              = \det_{i,j=1..N_f}\big[I_{\nu+j-i}(h)\big]

    Source: Brower, Rossi & Tan, Phys. Rev. D 23 (1981) 942; Leutwyler &
    Smilga, Phys. Rev. D 46 (1992) 5607 (quoted from memory, verified in the
    tests against Weyl-formula quadrature).

    Parameters
    ----------
    nf : int
        Number of flavours (matrix size), >= 1.
    nu : int
        Power of the determinant (any sign).
    h : float
        Real mass, any sign; ``Z_nu(-h) = (-1)^{nu nf} Z_nu(h)``.
    scaled : bool, optional
        If True return ``exp(-nf |h|) Z_nu(h)`` (overflow-safe).

    Returns
    -------
    float
    """
    x = abs(float(h))
    z, _ = _degenerate_terms(int(nf), np.array([int(nu)]), x)
    val = float(z[0])
    if h < 0 and (nu * nf) % 2:
        val = -val
    return val if scaled else val * math.exp(nf * x)


def _nondegenerate_terms(xs, ns):
    """Scaled sector integrals for distinct positive masses xs.

    Jackson, Sener & Verbaarschot, Phys. Lett. B 387 (1996) 355 (form quoted
    from memory; normalisation fixed here by the small-mass limit and
    verified numerically in the tests):

        int dV det^n exp((1/2) Tr(M V + M V^dag))
            = c_N det[x_i^{j} I_{n+j}(x_i)]_{i, j=0..N-1} / Delta(x^2),
        Delta(x^2) = prod_{i<j} (x_j^2 - x_i^2),  c_N = prod_{j<N} 2^j j!.

    Returns z[n] scaled by exp(-sum x) and per-flavour t[n, f] =
    e^{-sum x} int det^n V_ff exp(...) = d z/d x_f - n z / x_f, the second
    term coming from the flavour-f rotation V -> diag(e^{i psi_f}) V.
    """
    xs = np.asarray(xs, dtype=float)
    nf = xs.size
    ns = np.asarray(ns)
    jj = np.arange(nf)
    cn = float(np.prod([2.0**j * math.factorial(j) for j in range(nf)]))
    diff2 = xs[None, :] ** 2 - xs[:, None] ** 2  # x_j^2 - x_i^2
    iu = np.triu_indices(nf, 1)
    delta = float(np.prod(diff2[iu]))
    orders = np.broadcast_to(ns[:, None, None] + jj[None, None, :], (ns.size, nf, nf))  # n + j
    powj = xs[None, :, None] ** jj[None, None, :]
    a = powj * special.ive(np.abs(orders), xs[None, :, None])
    # d/dx [x^j I_{n+j}(x)] = x^j I_{n+j-1}(x) - n x^{j-1} I_{n+j}(x)
    # (from d/dx[x^m I_m] = x^m I_{m-1}, A&S 9.6.28, from memory)
    powjm1 = xs[None, :, None] ** (jj[None, None, :] - 1.0)
    da = powj * special.ive(np.abs(orders - 1), xs[None, :, None]) - ns[
        :, None, None
    ] * powjm1 * special.ive(np.abs(orders), xs[None, :, None])
    deta = np.linalg.det(a)
    z = cn * deta / delta
    with np.errstate(divide="ignore"):
        off = np.where(np.eye(nf, dtype=bool), 0.0, 2.0 * xs[:, None] / (-diff2))
    dlndelta = off.sum(axis=1)  # sum_{k != i} 2 x_i / (x_i^2 - x_k^2)
    t = np.empty((ns.size, nf))
    for i in range(nf):
        b = a.copy()
        b[:, i, :] = da[:, i, :]
        dz = cn * np.linalg.det(b) / delta - z * dlndelta[i]
        t[:, i] = dz - ns * z / xs[i]
    return z, t


def u_nondegenerate_integral(nu, masses, scaled=False):
    r"""U(Nf) sector integral with non-degenerate real masses.

    .. math:: Z_\nu(M) = \int_{U(N_f)} dU\,(\det U)^\nu
              \exp\!\big(\mathrm{Re\,Tr}(M U)\big),\quad
              M = \mathrm{diag}(m_1,\dots,m_{N_f})

    evaluated as ``c_N det[m_i^{j} I_{nu+j}(m_i)] / prod_{i<j}(m_j^2-m_i^2)``
    with ``c_N = prod_{j<N} 2^j j!`` (Jackson, Sener & Verbaarschot, Phys.
    Lett. B 387 (1996) 355; form quoted from memory, normalisation derived
    from the m -> 0 limit and checked numerically).  Negative masses are
    reduced to positive ones by ``U -> diag(sign m) U``.

    Parameters
    ----------
    nu : int
        Power of the determinant.
    masses : sequence of float
        Real, non-zero masses whose absolute values are pairwise distinct
        (the Vandermonde division loses ~log10(1/relative gap) digits when
        two are close).  Use :func:`bessel_determinant` for equal masses.
    scaled : bool, optional
        If True return ``exp(-sum|m|) Z_nu``.

    Returns
    -------
    float
    """
    m = np.asarray(masses, dtype=float).ravel()
    xs = np.abs(m)
    _validate_nondegenerate(xs)
    z, _ = _nondegenerate_terms(xs, np.array([int(nu)]))
    sign = -1.0 if (nu * int(np.sum(m < 0))) % 2 else 1.0
    val = sign * float(z[0])
    return val if scaled else val * math.exp(xs.sum())


def _validate_nondegenerate(xs):
    if np.any(xs == 0.0):
        raise ValueError("non-degenerate formula needs non-zero masses")
    s = np.sort(xs)
    if np.any(np.diff(s) <= 1e-12 * s[1:]):
        raise ValueError(
            "masses with equal |h| are only supported when all are equal "
            "(degenerate path)"
        )


def _charge_sum(weights, z, t, zp1):
    """Combine sector integrals with Fourier weights.

    Returns (S, <V'_ff> per flavour, <det V'>, cond) where S = sum w z.
    """
    terms = weights * z
    s = terms.sum()
    s_real = float(s.real)
    cond = float(np.abs(terms).sum() / abs(s_real)) if s_real != 0 else np.inf
    vff = (weights[:, None] * t).sum(axis=0) / s_real
    detv = (weights * zp1).sum() / s_real
    return s_real, vff, detv, cond


def one_site_u(nf, h, kappa=0.0, theta_m=0.0, theta_a=0.0):
    r"""Exact one-site U(Nf) partition function and expectation values.

    .. math:: Z = \int_{U(N_f)} dU \exp\big(\mathrm{Re\,Tr}(HU)
              + 2\kappa\,\mathrm{Re}(e^{i\theta_a}\det U)\big),\quad
              H = e^{i\theta_m}\mathrm{diag}(h_f)

    Method: expand ``exp(2 kappa Re(e^{ia} d)) = sum_n I_n(2 kappa) e^{ina} d^n``
    (generating function, Abramowitz & Stegun 1964, 9.6.34; from memory), so
    ``Z = sum_n I_n(2 kappa) e^{-i n theta} Z_n(h)`` with ``Z_n`` the sector
    integrals of :func:`bessel_determinant` (degenerate; Brower, Rossi & Tan,
    Phys. Rev. D 23 (1981) 942; Leutwyler & Smilga, Phys. Rev. D 46 (1992)
    5607) or :func:`u_nondegenerate_integral` (Jackson, Sener & Verbaarschot,
    Phys. Lett. B 387 (1996) 355).  ``<Re Tr V>`` comes from the
    h-derivative, ``<Im V_ff>`` from the U(1)_f rotation Ward identity
    ``h_f <Im V_ff> = -2 kappa <Im(e^{-i theta} det V)>`` (derived here,
    common practice), ``<det V>`` from the shifted sum
    ``sum_n I_n e^{-in theta} Z_{n+1}``.  The n-sum is truncated where
    ``I_n(2 kappa) < 1e-17 I_0(2 kappa)`` (|Z_n| <= Z_0 bounds the rest).
    For ``nf == 1`` the closed form ``Z = I_0(|h e^{i theta_m} + 2 kappa
    e^{i theta_a}|)`` is used instead (no cancellation).  See the module notes
    on cancellation (key ``cond``; NaN results when it exceeds 1e12).

    Parameters
    ----------
    nf : int
        Number of flavours, 1..8 (larger works but is untested).
    h : float or sequence of float
        Degenerate mass (float) or the ``nf`` masses ``h_f`` (any sign).  A
        sequence with all entries equal uses the degenerate path; otherwise the
        masses must be non-zero with pairwise distinct ``|h_f|``.
    kappa : float, optional
        Anomaly coupling, >= 0.
    theta_m, theta_a : float, optional
        Mass and anomaly phases.

    Returns
    -------
    dict
        ``re_tr_thetam_u``, ``im_tr_thetam_u``: <Re/Im Tr(e^{i theta_m} U)>/Nf;
        ``re_tr_u``, ``im_tr_u``: <Re/Im Tr U>/Nf;
        ``re_det_u``, ``im_det_u``: <Re/Im det U>;
        ``re_thetaa_det_u``, ``im_thetaa_det_u``: <Re/Im(e^{i theta_a} det U)>;
        ``ln_z``: ln Z; ``theta``: Nf theta_m - theta_a;
        ``cond``: cancellation factor of the Bessel sum (see module notes).
    """
    nf = int(nf)
    if nf < 1:
        raise ValueError("nf must be >= 1")
    if kappa < 0:
        raise ValueError("kappa must be >= 0")
    harr = np.atleast_1d(np.asarray(h, dtype=float)).ravel()
    if harr.size == 1:
        harr = np.full(nf, harr[0])
    if harr.size != nf:
        raise ValueError("h must be a float or have nf entries")
    degenerate = bool(np.all(harr == harr[0]))
    signs = np.where(harr < 0, -1.0, 1.0)
    xs = np.abs(harr)
    psign = float(np.prod(signs))  # det(diag(sign h))
    theta = nf * theta_m - theta_a

    if nf == 1:
        return _one_site_u1_closed(float(harr[0]), kappa, theta_m, theta_a)

    kmax = _bessel_cutoff(2.0 * kappa) if kappa > 0 else 0
    ns = np.arange(-kmax, kmax + 2)  # one extra for the det shift n -> n+1
    if degenerate:
        z_all, t_all = _degenerate_terms(nf, ns, float(xs[0]))
    else:
        _validate_nondegenerate(xs)
        z_all, t_all = _nondegenerate_terms(xs, ns)
    nsum = ns[:-1]
    # weights for the frame V' = diag(sign h) e^{i theta_m} U
    w = _ive_int(nsum, 2.0 * kappa) * (psign * np.exp(-1j * theta)) ** nsum
    s, vff, detvp, cond = _charge_sum(w, z_all[:-1], t_all[:-1], z_all[1:])
    _check_cond(cond, "one_site_u")

    trv = complex(np.sum(signs * vff))  # Tr V = sum_f sign_f V'_ff
    if cond > _COND_NAN or not s > 0:
        trv = detvp = complex(np.nan, np.nan)
        s = np.nan
    detv = psign * complex(detvp)
    tr_u = np.exp(-1j * theta_m) * trv
    det_u = np.exp(-1j * nf * theta_m) * detv
    thetaa_det_u = np.exp(-1j * theta) * detv
    ln_z = float(xs.sum() + 2.0 * kappa + math.log(s)) if s > 0 else float("nan")
    return {
        "re_tr_thetam_u": trv.real / nf,
        "im_tr_thetam_u": trv.imag / nf,
        "re_tr_u": float(tr_u.real) / nf,
        "im_tr_u": float(tr_u.imag) / nf,
        "re_det_u": float(det_u.real),
        "im_det_u": float(det_u.imag),
        "re_thetaa_det_u": float(thetaa_det_u.real),
        "im_thetaa_det_u": float(thetaa_det_u.imag),
        "ln_z": ln_z,
        "theta": theta,
        "cond": cond,
    }


def _one_site_u1_closed(h, kappa, theta_m, theta_a):
    """Nf = 1 in closed form, free of Bessel-sum cancellations.

    For U = e^{i phi} the exponent is Re(c U) with
    c = h e^{i theta_m} + 2 kappa e^{i theta_a}, so Z = I_0(|c|) and
    <U> = e^{-i arg c} I_1(|c|)/I_0(|c|) (generating function, Abramowitz &
    Stegun 9.6.19/9.6.34; common practice).
    """
    c = h * np.exp(1j * theta_m) + 2.0 * kappa * np.exp(1j * theta_a)
    a = abs(c)
    u = np.exp(-1j * np.angle(c)) * special.ive(1, a) / special.ive(0, a)
    tr_tm = np.exp(1j * theta_m) * u
    da = np.exp(1j * theta_a) * u
    return {
        "re_tr_thetam_u": float(tr_tm.real),
        "im_tr_thetam_u": float(tr_tm.imag),
        "re_tr_u": float(u.real),
        "im_tr_u": float(u.imag),
        "re_det_u": float(u.real),
        "im_det_u": float(u.imag),
        "re_thetaa_det_u": float(da.real),
        "im_thetaa_det_u": float(da.imag),
        "ln_z": float(a + math.log(special.ive(0, a))),
        "theta": theta_m - theta_a,
        "cond": 1.0,
    }


def one_site_su(nf, h, theta_m=0.0):
    r"""Exact one-site SU(Nf) integral with a degenerate mass term.

    .. math:: Z_{SU} = \int_{SU(N_f)} dW \exp\big(\mathrm{Re\,Tr}(h e^{i\theta_m} W)\big)
              = \sum_\nu e^{-i\nu N_f\theta_m} \det[I_{\nu+j-i}(h)]

    Derivation (common practice, done here): ``U(N) = (U(1) x SU(N))/Z_N``
    gives ``int_{SU(N)} f = sum_nu int_{U(N)} (det U)^nu f(U)`` (the sum of
    det^nu is a delta function on arg det U = 0 mod 2 pi), and
    ``V = e^{i theta_m} U`` turns ``(det U)^nu`` into
    ``e^{-i nu Nf theta_m} (det V)^nu``.  Sector integrals from
    :func:`bessel_determinant` (Brower, Rossi & Tan, Phys. Rev. D 23 (1981)
    942; Leutwyler & Smilga, Phys. Rev. D 46 (1992) 5607).  The nu-sum is cut
    adaptively where the sector terms fall below 1e-17 of the nu = 0 term.
    For SU(Nf) the anomaly term is the constant ``2 kappa cos(theta_a)`` and is
    omitted; the physical angle is ``Nf theta_m`` (mod 2 pi).

    Parameters
    ----------
    nf : int
        Number of colours/flavours, >= 1 (SU(1) is the trivial group).
    h : float
        Real mass, any sign.
    theta_m : float, optional
        Mass phase.

    Returns
    -------
    dict
        ``re_tr_thetam_u``, ``im_tr_thetam_u``: <Re/Im Tr(e^{i theta_m} W)>/Nf;
        ``re_tr_u``, ``im_tr_u``: <Re/Im Tr W>/Nf; ``ln_z``; ``cond``.
    """
    nf = int(nf)
    x = abs(float(h))
    sign = -1.0 if h < 0 else 1.0
    psign = sign**nf
    # find the cut: the sector terms decay (super-)exponentially in |nu|
    z0 = _degenerate_terms(nf, np.array([0]), x)[0][0]
    kmax = 8
    while True:
        probe = np.array([-kmax - 1, -kmax, kmax, kmax + 1])
        zp, tp = _degenerate_terms(nf, probe, x)
        if max(np.abs(zp).max(), np.abs(tp).max() * nf) <= _TRUNC_TOL * z0:
            break
        kmax *= 2
        if kmax > _NMAX_CAP:
            raise ValueError("SU(N) sector sum did not converge")
    ns = np.arange(-kmax, kmax + 1)
    z, t = _degenerate_terms(nf, ns, x)
    w = (psign * np.exp(-1j * nf * theta_m)) ** ns
    s, vff, _, cond = _charge_sum(w, z, t, z)
    _check_cond(cond, "one_site_su")
    trv = sign * complex(vff.sum())
    if cond > _COND_NAN or not s > 0:
        trv, s = complex(np.nan, np.nan), np.nan
    tr_u = np.exp(-1j * theta_m) * trv
    return {
        "re_tr_thetam_u": trv.real / nf,
        "im_tr_thetam_u": trv.imag / nf,
        "re_tr_u": float(tr_u.real) / nf,
        "im_tr_u": float(tr_u.imag) / nf,
        "ln_z": float(nf * x + math.log(s)) if s > 0 else float("nan"),
        "cond": cond,
    }


# ---------------------------------------------------------------------------
# 2. U(1) chain
# ---------------------------------------------------------------------------


def u1_chain(n_sites, beta, h, kappa=0.0, theta_m=0.0, theta_a=0.0, nmax=None):
    r"""Exact periodic one-dimensional U(1) chain (Nf = 1).

    Weight ``prod_x exp(beta cos(phi_x - phi_{x+1}) + Re(c e^{i phi_x}))`` with
    ``c = h e^{i theta_m} + 2 kappa e^{i theta_a}`` (for Nf = 1, det U = U),
    sites ``x = 0..N-1``, ``phi_N = phi_0``.

    Method (transfer matrix in the charge basis, common practice, no source):
    with ``gamma = arg c`` and ``phi' = phi + gamma`` the on-site factor is
    ``exp(|c| cos phi')``; link factor ``exp(beta cos(phi-phi')) =
    sum_n I_n(beta) e^{in(phi-phi')}`` is ``K = diag(I_n(beta))`` and the
    site factor has elements ``D_{nm} = I_{n-m}(|c|)``.  With the symmetric
    ``T = K^{1/2} D K^{1/2}`` (truncated to ``|n| <= nmax``),
    ``Z = Tr T^N`` and insertions ``O`` (``e^{+-i phi'}``: ``I_{n-m-+1}``;
    ``cos phi'``: ``I'_{n-m}``; link ``cos``: ``diag(I_n'/I_n)``) are
    evaluated with the exact finite-N traces ``Tr(O T^t O' T^{N-t})/Tr T^N``
    in the eigenbasis of T (eigenvalues normalised to the largest one, so
    long chains do not under/overflow).

    Parameters
    ----------
    n_sites : int
        Number of sites N >= 2.
    beta : float
        Nearest-neighbour coupling, >= 0.
    h : float
        Mass (any sign).
    kappa, theta_m, theta_a : float, optional
        Anomaly coupling and phases (for Nf = 1 only the complex ``c``
        matters).
    nmax : int, optional
        Charge cut-off; default adaptive: smallest n with
        ``I_n(beta)/I_0(beta) < 1e-17 min(1, e^{-|c|} I_0(|c|))^2`` (>= 2).

    Returns
    -------
    dict
        ``ln_z``; ``re_u``, ``im_u`` (= <cos phi_x>, <sin phi_x>);
        ``re_thetam_u`` (= <Re(e^{i theta_m} U)>);
        ``g`` (array, ``G(t) = <cos(phi_0 - phi_t)>``, t = 0..N-1);
        ``g_conn`` (``G(t) - |<U>|^2``); ``energy``
        (``<cos(phi_x - phi_{x+1})>``); ``nmax``.
    """
    n_sites = int(n_sites)
    if n_sites < 2:
        raise ValueError("n_sites must be >= 2")
    if beta < 0:
        raise ValueError("beta must be >= 0")
    c = h * np.exp(1j * theta_m) + 2.0 * kappa * np.exp(1j * theta_a)
    a = abs(c)
    gamma = float(np.angle(c)) if a > 0 else 0.0
    if nmax is None:
        tol = _TRUNC_TOL * min(1.0, float(special.ive(0, a))) ** 2
        nmax = max(2, _bessel_cutoff(beta, tol)) if beta > 0 else 2
    n = np.arange(-nmax, nmax + 1)
    kdiag = special.ive(np.abs(n), beta)  # e^{-beta} I_n(beta)
    sk = np.sqrt(kdiag)
    dd = n[:, None] - n[None, :]
    d0 = special.ive(np.abs(dd), a)
    d1 = 0.5 * (special.ive(np.abs(dd - 1), a) + special.ive(np.abs(dd + 1), a))
    dplus = special.ive(np.abs(dd - 1), a)  # insertion of e^{+i phi'}

    def sym(m):
        return sk[:, None] * m * sk[None, :]

    tmat = sym(d0)
    lam, q = np.linalg.eigh(tmat)
    lmax = lam[-1]
    r = np.clip(lam / lmax, 0.0, 1.0)  # T is PSD (D is a positive Toeplitz form)
    zs = np.sum(r**n_sites)
    ln_z = n_sites * (beta + a + math.log(lmax)) + math.log(zs)

    o1 = q.T @ sym(d1) @ q
    cos_p = float(np.sum(np.diag(o1) * r ** (n_sites - 1)) / (lmax * zs))
    u = np.exp(-1j * gamma) * cos_p  # <e^{i phi}> = e^{-i gamma} <cos phi'>

    ap = q.T @ sym(dplus) @ q
    am = ap.T
    g = np.empty(n_sites)
    g[0] = 1.0
    for t in range(1, n_sites):
        # Tr(A+ T^{t-1} A- T^{N-t-1}) in the eigenbasis
        val = np.einsum("kl,l,lk,k->", ap, r ** (t - 1), am, r ** (n_sites - t - 1))
        g[t] = val / (lmax**2 * zs)
    if beta > 1e-8:
        ratio = 0.5 * (special.ive(np.abs(n - 1), beta) + special.ive(np.abs(n + 1), beta))
        ldiag = ratio / kdiag  # I_n'(beta) / I_n(beta)
        lq = np.einsum("kn,n,nk->k", q.T, ldiag, q)
        energy = float(np.sum(lq * r**n_sites) / zs)
    else:
        energy = float(g[1])  # translation invariance: <cos(phi_0-phi_1)> = G(1)
    return {
        "ln_z": float(ln_z),
        "re_u": float(u.real),
        "im_u": float(u.imag),
        "re_thetam_u": float((np.exp(1j * theta_m) * u).real),
        "g": g,
        "g_conn": g - abs(u) ** 2,
        "energy": energy,
        "nmax": int(nmax),
    }


# ---------------------------------------------------------------------------
# 3. free real scalar field
# ---------------------------------------------------------------------------


def free_scalar_correlator(shape, m2):
    r"""Exact zero-momentum time correlator of the free lattice scalar.

    Action ``S = sum_x [ 1/2 sum_mu (phi_{x+mu} - phi_x)^2 + m2/2 phi_x^2 ]``
    on a periodic lattice ``shape = (T, L_1, ..., L_{d-1})`` (axis 0 = time).
    With ``Phi(t) = sum_y phi_{(t, y)}`` (plain spatial sum) and spatial volume
    ``V_s = L_1 ... L_{d-1}``,

    .. math:: C(t) = \frac{1}{V_s}\langle \Phi(0)\Phi(t)\rangle
              = \sum_y \langle\phi_{(0,0)}\phi_{(t,y)}\rangle
              = \frac{1}{T}\sum_{k=0}^{T-1}
                \frac{\cos(p_k t)}{m^2 + 4\sin^2(p_k/2)},\quad p_k = 2\pi k/T,

    independent of the spatial extents.  Derivation: the propagator is
    ``(1/V) sum_p e^{ip(x-y)} / (m2 + sum_mu 4 sin^2(p_mu/2))``; the two
    spatial sums give ``V_s^2 delta_{p_s, 0}`` (common practice, no source).

    Parameters
    ----------
    shape : tuple of int
        Lattice shape, time first.
    m2 : float
        Bare mass squared, > 0 (m2 = 0 has a zero mode).

    Returns
    -------
    numpy.ndarray
        ``C(t)`` for ``t = 0..T-1``.
    """
    if m2 <= 0:
        raise ValueError("m2 must be > 0")
    nt = int(np.atleast_1d(shape)[0])
    p = 2.0 * np.pi * np.arange(nt) / nt
    t = np.arange(nt)
    prop = 1.0 / (m2 + 4.0 * np.sin(p / 2.0) ** 2)
    return np.cos(np.outer(t, p)) @ prop / nt


def free_scalar_mass(m2):
    r"""Lattice energy of the free scalar, ``E = 2 asinh(sqrt(m2)/2)``.

    Solves ``cosh E = 1 + m2/2`` (pole of ``1/(m2 + 4 sin^2(p/2))`` at
    ``p = iE``; common practice, no source).  It is the T -> infinity decay
    rate and, because the finite-T correlator is an exact single cosh, also the
    exact finite-T cosh effective mass at every t (see
    :func:`free_scalar_correlator_closed_form`).  Works elementwise on arrays.
    """
    return 2.0 * np.arcsinh(np.sqrt(m2) / 2.0)


def free_scalar_correlator_closed_form(nt, m2):
    r"""Closed form of :func:`free_scalar_correlator`.

    .. math:: C(t) = \frac{\cosh(E(T/2 - t))}{2\sinh E\,\sinh(E T/2)},
              \quad \cosh E = 1 + m^2/2

    Derivation (common practice, no source; from memory, verified in tests):
    the infinite-T propagator ``e^{-E|t|}/(2 sinh E)`` summed over periodic
    images ``t + kT``.

    Parameters
    ----------
    nt : int
        Time extent T.
    m2 : float
        Mass squared, > 0.

    Returns
    -------
    numpy.ndarray
        ``C(t)``, ``t = 0..T-1``.
    """
    e = free_scalar_mass(m2)
    t = np.arange(int(nt))
    return np.cosh(e * (nt / 2.0 - t)) / (2.0 * np.sinh(e) * np.sinh(e * nt / 2.0))


def free_scalar_phi2(shape, m2):
    r"""Exact local ``<phi_x^2>`` of the free lattice scalar.

    .. math:: \langle\phi_x^2\rangle = \frac{1}{V}\sum_p
              \frac{1}{m^2 + \sum_\mu 4\sin^2(p_\mu/2)},
              \quad p_\mu = 2\pi k_\mu/L_\mu

    (common practice, no source).  Action and shape as in
    :func:`free_scalar_correlator`.

    Parameters
    ----------
    shape : tuple of int
        Lattice shape.
    m2 : float
        Mass squared, > 0.

    Returns
    -------
    float
    """
    if m2 <= 0:
        raise ValueError("m2 must be > 0")
    shape = tuple(int(s) for s in np.atleast_1d(shape))
    denom = np.full(shape, float(m2))
    for mu, l in enumerate(shape):
        phat2 = 4.0 * np.sin(np.pi * np.arange(l) / l) ** 2
        bshape = [1] * len(shape)
        bshape[mu] = l
        denom = denom + phat2.reshape(bshape)
    return float(np.mean(1.0 / denom))


def cosh_effective_mass(corr):
    r"""Cosh effective mass of a periodic correlator.

    For each ``t`` solve ``C(t)/C(t+1) = cosh(m (T/2 - t)) / cosh(m (T/2 - t - 1))``
    for ``m > 0`` (``T = len(corr)``; common practice, no source).  For the
    free field this returns :func:`free_scalar_mass` exactly at every t.

    Parameters
    ----------
    corr : array_like
        ``C(t)``, ``t = 0..T-1``, periodic and symmetric.

    Returns
    -------
    numpy.ndarray
        Length ``T - 1``; ``m_eff(t)`` from the pair (t, t+1); NaN where no
        positive solution exists (noise, or the midpoint pair for even T).
    """
    c = np.asarray(corr, dtype=float)
    nt = c.size
    out = np.full(nt - 1, np.nan)
    for t in range(nt - 1):
        if not (c[t] > 0 and c[t + 1] > 0):
            continue
        lr = math.log(c[t] / c[t + 1])
        u = nt / 2.0 - t
        # g(m) = ln cosh(m u) - ln cosh(m (u-1)) is monotone with slope sign s
        s = np.sign(abs(u) - abs(u - 1.0))
        if s == 0 or s * lr <= 0:
            continue  # odd-T midpoint pair, or ratio on the wrong side of 1

        def f(m, u=u, lr=lr, s=s):
            # log form avoids overflow of cosh at large m*T
            return s * (_logcosh(m * u) - _logcosh(m * (u - 1.0)) - lr)

        hi = 1.0
        while f(hi) < 0 and hi < 1e6:
            hi *= 2.0
        if f(hi) < 0:
            continue
        out[t] = optimize.brentq(f, 0.0, hi, xtol=1e-15, rtol=1e-15)
    return out


def _logcosh(x):
    x = abs(x)
    return x + math.log1p(math.exp(-2.0 * x)) - math.log(2.0)


# ---------------------------------------------------------------------------
# one-site distribution of a collective variable (multicanonical checks)
# ---------------------------------------------------------------------------


def _split_nodes(sines, xi, wi):
    """Quadrature nodes and weights on (-pi, pi], split where sin(phi) equals one of ``sines``."""
    # +-pi/2 always: a kink at sin(phi) = v near +-1 sits next to them (near-tangency)
    br = [-np.pi, -0.5 * np.pi, 0.5 * np.pi, np.pi]
    for v in np.atleast_1d(sines):
        if abs(v) <= 1.0 + 1e-9:  # |v| = 1: a tangency, where the next level has a kink too
            a = math.asin(min(1.0, max(-1.0, v)))
            b = np.pi - a
            br += [a, b - 2.0 * np.pi if b > np.pi else b]
    br = np.unique(np.asarray(br))
    lo, hi = br[:-1, None], br[1:, None]
    # phi = lo + (hi - lo) (1 - cos(pi (1 + xi) / 2)) / 2: dphi/dxi vanishes at both ends, which
    # turns the square-root kinks at the split points into smooth behaviour (common practice)
    a = 0.5 * np.pi * (1.0 + xi[None, :])
    nodes = (lo + (hi - lo) * (1.0 - np.cos(a)) / 2.0).ravel()
    weights = ((hi - lo) * np.pi / 4.0 * np.sin(a) * wi[None, :]).ravel()
    return nodes, weights


def one_site_variable_distribution(nf, h, kappa, theta_m, theta_a, edges, variable="im_omega_h", n_gauss=32):
    r"""Probabilities of the bins ``edges`` for a one-site variable of U(Nf) at degenerate mass ``h``.

    Variables (as :mod:`sigmasim.kernels.bias` defines them):
    ``im_omega_h``: ``Im Tr(e^{i theta_m} U) / Nf``; ``im_det``: ``Im(e^{i theta_a} det U)``.

    Method: both the weight ``exp(h Re Tr V + 2 kappa Re(e^{-i theta} det V))`` (frame
    ``V = e^{i theta_m} U``, module notes) and the variables are class functions, so the Haar
    integral reduces to the eigenvalue phases phi_1..phi_Nf with Weyl's density
    ``prod_{j<k} |e^{i phi_j} - e^{i phi_k}|^2 / Nf!`` (H. Weyl, The Classical Groups, Princeton
    1939; from memory).  P(x < e) is an iterated integral: for fixed phi_1..phi_{Nf-1} the set of
    the last phase where x < e is one or two arcs in closed form (arcsin); each outer phase is
    integrated piecewise, split where the integrand of the next level stops being smooth (for
    ``im_omega_h``: sin(phi_j) = Nf e - sum_{k<j} sin(phi_k) - c with c = -r, -r + 2, ..., r and
    r the number of later phases), by ``n_gauss``-point Gauss-Legendre on each piece mapped by
    ``phi = lo + (hi - lo)(1 - cos(pi (1 + u) / 2)) / 2`` (smooth at the kinks); for ``im_det`` the
    outer phases need no split and use the periodic midpoint rule on ``2 n_gauss`` points (common
    practice, no source).  Tests check it against
    :func:`one_site_u` (means) and against itself at a larger ``n_gauss``.

    Parameters
    ----------
    nf : int, 1..3
    h, kappa, theta_m, theta_a : float
    edges : float64 (nb + 1,), increasing
    variable : "im_omega_h" or "im_det"
    n_gauss : int, optional

    Returns
    -------
    float64 (nb,)
        P(edges[b] <= x < edges[b + 1]) under the normalised one-site measure.
    """
    nf = int(nf)
    if not 1 <= nf <= 3:
        raise ValueError("one_site_variable_distribution: nf must be 1, 2 or 3")
    if variable not in ("im_omega_h", "im_det"):
        raise ValueError(f"unknown variable {variable!r}")
    edges = np.asarray(edges, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0):
        raise ValueError("edges must be increasing with at least 2 entries")
    theta = nf * theta_m - theta_a
    shift = nf * abs(h) + 2.0 * kappa  # log-weight shift that keeps exp finite
    xi, wi = np.polynomial.legendre.leggauss(int(n_gauss))

    def weight_of(angles, last):
        s = last
        tr_re = np.cos(last)
        vdm = np.ones_like(last)
        for j, a in enumerate(angles):
            s = s + a
            tr_re = tr_re + np.cos(a)
            vdm = vdm * (2.0 - 2.0 * np.cos(a - last))  # |e^{ia} - e^{ib}|^2
            for b in angles[j + 1:]:
                vdm = vdm * (2.0 - 2.0 * np.cos(a - b))
        return vdm * np.exp(h * tr_re + 2.0 * kappa * np.cos(s - theta) - shift)

    def inner(angles, t, delta):
        # integral over the last phase psi - delta of the arcs where sin(psi) < t (t broadcasts)
        asn = np.arcsin(np.clip(t, -1.0, 1.0))[..., None]
        out = 0.0
        for lo, hi in ((-np.pi + 0.0 * asn, asn), (np.pi - asn, np.pi + 0.0 * asn)):
            psi = lo + (hi - lo) * (xi + 1.0) / 2.0
            out = out + ((hi - lo)[..., 0] / 2.0) * (weight_of(angles, psi - delta) * wi).sum(axis=-1)
        return out

    def cdf(e):
        if variable == "im_det":
            if nf == 1:
                return float(inner([], np.float64(e), -theta))
            # no kinks: the midpoint rule on 2 n_gauss points is spectrally accurate for the periodic outer angles
            nodes = (np.arange(2 * int(n_gauss)) + 0.5) * (np.pi / int(n_gauss)) - np.pi
            wts = np.full(nodes.size, np.pi / int(n_gauss))
            grids = np.meshgrid(*([nodes] * (nf - 1)), indexing="ij")
            ws = np.prod(np.meshgrid(*([wts] * (nf - 1)), indexing="ij"), axis=0)
            ang = [g[..., None] for g in grids]
            return float((ws * inner(ang, np.float64(e), sum(grids)[..., None] - theta)).sum())
        t_all = nf * e
        if nf == 1:
            return float(inner([], np.float64(t_all), 0.0))
        if nf == 2:
            n1, w1 = _split_nodes([t_all - 1.0, t_all + 1.0], xi, wi)
            return float((w1 * inner([n1[:, None]], t_all - np.sin(n1), 0.0)).sum())
        n1, w1 = _split_nodes([t_all - 2.0, t_all, t_all + 2.0], xi, wi)
        total = 0.0
        for p1, q1 in zip(n1, w1):
            c = t_all - math.sin(p1)
            n2, w2 = _split_nodes([c - 1.0, c + 1.0], xi, wi)
            total += q1 * float((w2 * inner([np.float64(p1), n2[:, None]], c - np.sin(n2), 0.0)).sum())
        return total

    z = cdf(np.inf) if variable == "im_omega_h" else cdf(2.0)
    # |x| <= 1 for both variables: edges outside [-1, 1] are exactly 0 or z (no quadrature of them)
    return np.diff([0.0 if e <= -1.0 else (z if e >= 1.0 else cdf(float(e))) for e in edges]) / z
