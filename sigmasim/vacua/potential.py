r"""The tree-level potential of the chiral sigma model: parameters, energies, Hessians.

Conventions
-----------
The potential per site is

.. math::

    V(U) = -\mathrm{Re}\,\mathrm{Tr}(H U) - 2\kappa\,\mathrm{Re}\left(e^{i\theta_a}\det U\right),
    \qquad H = e^{i\theta_m}\,\mathrm{diag}(h_1,\dots,h_{N_f}),

with real ``h_f`` (negative values allowed), ``kappa >= 0`` and ``1 <= Nf <= 8``.
Under ``U -> e^{i alpha} U`` the pair ``(theta_m, theta_a)`` moves to
``(theta_m - alpha, theta_a - Nf alpha)``, so only the physical angle
``theta = Nf theta_m - theta_a`` matters (for group ``'U'`` and for the large-kappa
limit).  For group ``'SU'`` the determinant is one, the anomaly term is the
constant ``-2 kappa cos(theta_a)`` (kept in all energies so that energies are
literally ``V(U)``) and the physics depends on ``Nf theta_m`` only.

A *placement* says how ``theta`` is split: a fraction ``x`` gives
``theta_m = x theta / Nf`` and ``theta_a = -(1 - x) theta``; ``'mass'`` is
``x = 1``, ``'anomaly'`` is ``x = 0``, ``'split'`` is ``x = 1/2``.

The large-kappa limit (``large_kappa=True``) freezes ``det U = e^{-i theta_a}``
and minimises ``-Re Tr(H U)`` on that coset; its energies omit the divergent
constant ``-2 kappa``.

Stability of a diagonal point in the off-diagonal directions (the Hessian on U(Nf), used by
:mod:`sigmasim.vacua.minima`) is derived in that module's docstring.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import numbers
from dataclasses import dataclass

import numpy as np

__all__ = ["PLACEMENTS", "ChiralPotential", "resolve_angles", "make_potential", "matrix_potential",
           "diagonal_potential", "hermitian_basis", "full_hessian"]

TWO_PI = 2.0 * np.pi

#: Named placements of theta: the fraction ``x`` of theta carried by the mass phase.
PLACEMENTS = {"mass": 1.0, "split": 0.5, "anomaly": 0.0}



def _wrap(x):
    """Map angles to [-pi, pi) so that distances modulo 2 pi are plain differences."""
    return (np.asarray(x) + np.pi) % TWO_PI - np.pi


# ----------------------------------------------------------------------------
# parameters
# ----------------------------------------------------------------------------


def _placement_fraction(placement) -> float:
    if isinstance(placement, str):
        try:
            return PLACEMENTS[placement]
        except KeyError:
            raise ValueError(
                f"unknown placement {placement!r}; use one of {sorted(PLACEMENTS)} or a float"
            ) from None
    if isinstance(placement, numbers.Real):
        return float(placement)
    raise TypeError("placement must be a string or a real fraction")


def resolve_angles(nf, theta=None, placement="mass", theta_m=None, theta_a=None):
    """Turn ``theta`` and a placement (or explicit phases) into ``(theta_m, theta_a)``.

    Parameters
    ----------
    nf : int
        Number of flavours.
    theta : float, optional
        Physical angle ``Nf theta_m - theta_a``.  Must be omitted if
        ``theta_m`` or ``theta_a`` is given.
    placement : {'mass', 'anomaly', 'split'} or float
        Fraction ``x`` of theta put into the mass phase:
        ``theta_m = x theta / Nf``, ``theta_a = -(1 - x) theta``.
    theta_m, theta_a : float, optional
        Explicit phases (missing one defaults to 0).

    Returns
    -------
    tuple of float
        ``(theta_m, theta_a)``.
    """
    if theta_m is not None or theta_a is not None:
        if theta is not None:
            raise ValueError("give either theta (+ placement) or theta_m/theta_a, not both")
        return float(theta_m or 0.0), float(theta_a or 0.0)
    theta = 0.0 if theta is None else float(theta)
    x = _placement_fraction(placement)
    return x * theta / nf, -(1.0 - x) * theta


@dataclass(frozen=True)
class ChiralPotential:
    """Parameters of the tree-level potential (immutable).

    Parameters
    ----------
    h : tuple of float
        Real mass parameters ``h_f``; their number is ``Nf``.
    kappa : float
        Anomaly coupling, ``>= 0``.
    theta_m, theta_a : float
        Mass and anomaly phases.
    group : {'U', 'SU'}
        Target group.
    large_kappa : bool
        If True use the determinant-constrained limit ``det U = e^{-i theta_a}``
        (energies without the constant ``-2 kappa``); only for ``group='U'``.
    """

    h: tuple
    kappa: float = 0.0
    theta_m: float = 0.0
    theta_a: float = 0.0
    group: str = "U"
    large_kappa: bool = False

    def __post_init__(self):
        h = tuple(float(v) for v in np.atleast_1d(np.asarray(self.h, dtype=float)))
        object.__setattr__(self, "h", h)
        if not 1 <= len(h) <= 8:
            raise ValueError("Nf must be between 1 and 8")
        if not all(math.isfinite(v) for v in h):
            raise ValueError("h must be finite")
        if not (self.kappa >= 0 and math.isfinite(self.kappa)):
            raise ValueError("kappa must be finite and >= 0")
        if self.group not in ("U", "SU"):
            raise ValueError("group must be 'U' or 'SU'")
        if self.large_kappa and self.group != "U":
            raise ValueError("the large-kappa limit is defined for group 'U' only")

    @property
    def nf(self) -> int:
        """Number of flavours."""
        return len(self.h)

    @functools.cached_property
    def h_array(self) -> np.ndarray:
        """Masses as an array (read-only, cached)."""
        arr = np.asarray(self.h, dtype=float)
        arr.setflags(write=False)
        return arr

    @property
    def constrained(self) -> bool:
        """True if ``sum(phi)`` is fixed (SU(Nf) or the large-kappa limit)."""
        return self.group == "SU" or self.large_kappa

    @property
    def constraint_sum(self) -> float:
        """Value of ``sum(phi)`` mod 2 pi in the constrained cases."""
        return 0.0 if self.group == "SU" else -self.theta_a

    @property
    def kappa_eff(self) -> float:
        """Coupling of the phase-dependent anomaly term (0 when it is constant)."""
        return 0.0 if self.constrained else float(self.kappa)

    @property
    def energy_offset(self) -> float:
        """Constant added to the diagonal potential (the frozen anomaly term for SU)."""
        return -2.0 * self.kappa * math.cos(self.theta_a) if self.group == "SU" else 0.0

    @property
    def theta(self) -> float:
        """Physical angle: ``Nf theta_m - theta_a`` (U, large kappa) or ``Nf theta_m`` (SU)."""
        if self.group == "SU":
            return self.nf * self.theta_m
        return self.nf * self.theta_m - self.theta_a

    @functools.cached_property
    def scale(self) -> float:
        """Energy scale used for relative tolerances."""
        s = float(np.sum(np.abs(self.h))) + 2.0 * self.kappa_eff
        return s if s > 0 else 1.0

    @property
    def dim(self) -> int:
        """Number of free torus coordinates."""
        return self.nf - 1 if self.constrained else self.nf

    def with_angles(self, theta_m: float, theta_a: float) -> "ChiralPotential":
        """Copy with new phases."""
        return dataclasses.replace(self, theta_m=float(theta_m), theta_a=float(theta_a))

    def with_theta(self, theta: float, placement="mass") -> "ChiralPotential":
        """Copy at physical angle ``theta`` with the given placement."""
        return self.with_angles(*resolve_angles(self.nf, theta, placement))

    def describe(self) -> str:
        """Short human-readable parameter string."""
        grp = f"{self.group}({self.nf})"
        if self.large_kappa:
            grp += ", kappa -> inf"
        else:
            grp += f", kappa={self.kappa:g}"
        hs = ",".join(f"{v:g}" for v in self.h)
        return f"{grp}, h=({hs})"


def make_potential(
    h,
    kappa=0.0,
    theta=None,
    placement="mass",
    *,
    nf=None,
    group="U",
    theta_m=None,
    theta_a=None,
    large_kappa=False,
) -> ChiralPotential:
    """Build a :class:`ChiralPotential` from user-level inputs.

    Parameters
    ----------
    h : float or sequence of float
        Masses; a scalar needs ``nf`` (degenerate flavours).
    kappa : float
        Anomaly coupling (ignored except for the SU constant when ``large_kappa``).
    theta : float, optional
        Physical angle (default 0).
    placement : {'mass', 'anomaly', 'split'} or float
        How theta is split, see :func:`resolve_angles`.
    nf : int, optional
        Number of flavours (required for scalar ``h``).
    group : {'U', 'SU'}
        Target group.
    theta_m, theta_a : float, optional
        Explicit phases instead of ``theta``.
    large_kappa : bool
        Determinant-constrained limit.

    Returns
    -------
    ChiralPotential
    """
    harr = np.atleast_1d(np.asarray(h, dtype=float))
    if harr.size == 1 and nf is not None:
        harr = np.full(int(nf), float(harr[0]))
    if nf is not None and harr.size != nf:
        raise ValueError("len(h) does not match nf")
    tm, ta = resolve_angles(harr.size, theta, placement, theta_m, theta_a)
    return ChiralPotential(tuple(harr), float(kappa), tm, ta, group, bool(large_kappa))


# ----------------------------------------------------------------------------
# potential on matrices and on the torus
# ----------------------------------------------------------------------------


def matrix_potential(U, pot: ChiralPotential) -> float:
    """Evaluate ``V(U)`` for a unitary matrix.

    Parameters
    ----------
    U : (Nf, Nf) array_like
        Unitary matrix (in SU(Nf), or with ``det U = e^{-i theta_a}`` in the
        large-kappa limit; not checked).
    pot : ChiralPotential

    Returns
    -------
    float
        The potential; in the large-kappa limit without the constant ``-2 kappa``.
    """
    U = np.asarray(U, dtype=complex)
    tr = np.exp(1j * pot.theta_m) * np.dot(pot.h_array, np.diagonal(U))
    e = -tr.real
    if not pot.large_kappa:
        e -= 2.0 * pot.kappa * (np.exp(1j * pot.theta_a) * np.linalg.det(U)).real
    return float(e)


def diagonal_potential(phases, pot: ChiralPotential):
    """``V(diag(e^{i phi}))`` for phases of shape ``(..., Nf)``.

    Parameters
    ----------
    phases : array_like
        Eigenvalue phases; in constrained cases they are assumed to satisfy the
        constraint (not enforced here).
    pot : ChiralPotential

    Returns
    -------
    ndarray or float
        ``- sum_f h_f cos(phi_f + theta_m) - 2 kappa cos(sum phi + theta_a)``,
        with the anomaly term replaced by its constant for SU and dropped in the
        large-kappa limit.
    """
    phi = np.asarray(phases, dtype=float)
    e = -(pot.h_array * np.cos(phi + pot.theta_m)).sum(-1) + pot.energy_offset
    if pot.kappa_eff:
        e = e - 2.0 * pot.kappa_eff * np.cos(phi.sum(-1) + pot.theta_a)
    return e


def _x_to_phases(x, pot):
    """Free coordinates -> phases (the last phase carries the constraint)."""
    if not pot.constrained:
        return x
    last = pot.constraint_sum - x.sum(-1, keepdims=True)
    return np.concatenate([x, last], axis=-1)


def _phases_to_x(phi, pot):
    return np.array(phi[..., : pot.dim], dtype=float)


def _egh(x, pot):
    """Energy, gradient and Hessian in the free coordinates, batched over rows of x."""
    phi = _x_to_phases(x, pot)
    h = pot.h_array
    c = np.cos(phi + pot.theta_m)
    s = np.sin(phi + pot.theta_m)
    e = -(h * c).sum(-1) + pot.energy_offset
    g_phi = h * s
    a = h * c
    d = pot.dim
    if pot.constrained:
        # chain rule with phi_N = const - sum(x): J^T g and J^T diag(a) J
        g = g_phi[..., :d] - g_phi[..., d:]
        H = np.zeros(x.shape[:-1] + (d, d))
        idx = np.arange(d)
        H[..., idx, idx] = a[..., :d]
        H += a[..., d:, None]
    else:
        S = phi.sum(-1) + pot.theta_a
        k2 = 2.0 * pot.kappa_eff
        e = e - k2 * np.cos(S)
        g = g_phi + k2 * np.sin(S)[..., None]
        H = np.zeros(x.shape[:-1] + (d, d))
        idx = np.arange(d)
        H[..., idx, idx] = a
        H += (k2 * np.cos(S))[..., None, None]
    return e, g, H


_QCACHE: dict = {}


def _traceless_diag_basis(n):
    """Orthonormal basis (n, n-1) of the vectors with zero sum (cached)."""
    if n not in _QCACHE:
        m = np.eye(n)[:, : n - 1] - 1.0 / n
        if n > 1:
            q, _ = np.linalg.qr(m)
        else:
            q = np.zeros((1, 0))
        _QCACHE[n] = q
    return _QCACHE[n]


def _spectrum(phi, pot):
    """Hessian spectrum at diagonal points in the Tr(XY)-orthonormal basis.

    Returns
    -------
    diag_eigs : (B, dim) torus-block eigenvalues (ascending)
    off_eigs : (B, n_pairs) pair eigenvalues (a_f + a_g)/2, each doubly degenerate
    """
    phi = np.atleast_2d(phi)
    h = pot.h_array
    a = h * np.cos(phi + pot.theta_m)
    n = pot.nf
    if pot.constrained:
        q = _traceless_diag_basis(n)
        Hd = np.einsum("fi,bf,fj->bij", q, a, q)
    else:
        S = phi.sum(-1) + pot.theta_a
        Hd = np.zeros((phi.shape[0], n, n))
        Hd[:, np.arange(n), np.arange(n)] = a
        Hd += (2.0 * pot.kappa_eff * np.cos(S))[:, None, None]
    if Hd.shape[-1]:
        de = np.linalg.eigvalsh(Hd)
    else:
        de = np.zeros((phi.shape[0], 0))
    iu, ju = np.triu_indices(n, 1)
    oe = 0.5 * (a[:, iu] + a[:, ju])
    return de, oe


# ----------------------------------------------------------------------------
# Hessian on the group
# ----------------------------------------------------------------------------


def hermitian_basis(nf: int, traceless: bool = False) -> np.ndarray:
    """Basis of Hermitian matrices orthonormal under ``<X, Y> = Tr(X Y)``.

    Ordering: diagonal elements first (``e_ff``, or an orthonormal basis of
    traceless diagonal matrices), then for each pair ``f < g`` the symmetric
    ``(e_fg + e_gf)/sqrt 2`` and antisymmetric ``i(e_gf - e_fg)/sqrt 2`` element.

    Parameters
    ----------
    nf : int
        Matrix size.
    traceless : bool
        Restrict to su(nf).

    Returns
    -------
    ndarray, shape (nf**2 or nf**2 - 1, nf, nf)
    """
    mats = []
    if traceless:
        q = _traceless_diag_basis(nf)
        for k in range(q.shape[1]):
            mats.append(np.diag(q[:, k]).astype(complex))
    else:
        for f in range(nf):
            m = np.zeros((nf, nf), complex)
            m[f, f] = 1.0
            mats.append(m)
    r = 1.0 / math.sqrt(2.0)
    for f in range(nf):
        for g in range(f + 1, nf):
            m = np.zeros((nf, nf), complex)
            m[f, g] = m[g, f] = r
            mats.append(m)
            m = np.zeros((nf, nf), complex)
            m[f, g] = -1j * r
            m[g, f] = 1j * r
            mats.append(m)
    if not mats:
        return np.zeros((0, nf, nf), complex)
    return np.array(mats)


def full_hessian(phases, pot: ChiralPotential) -> np.ndarray:
    """Analytic Hessian of ``X -> V(U0 exp(i X))`` at ``X = 0``, ``U0 = diag(e^{i phi})``.

    Uses the exact second-order term ``1/2 Re Tr(M X^2) + kappa Re(e^{i theta_a}
    det U0)(Tr X)^2`` (``M = H U0``); at stationary points this is the
    Riemannian Hessian on U(Nf) (SU(Nf)/coset: traceless ``X``).

    Parameters
    ----------
    phases : (Nf,) array_like
    pot : ChiralPotential

    Returns
    -------
    ndarray
        Symmetric matrix in the basis of :func:`hermitian_basis`.
    """
    phi = np.asarray(phases, dtype=float)
    T = hermitian_basis(pot.nf, traceless=pot.constrained)
    m = pot.h_array * np.exp(1j * (phi + pot.theta_m))
    # 1/2 Re Tr(M (Ti Tj + Tj Ti))
    mt = np.einsum("f,ifg->ifg", m, T)
    A = np.einsum("ifg,jgf->ij", mt, T)
    hess = 0.5 * (A + A.T).real
    if pot.kappa_eff:
        tr = np.einsum("iff->i", T).real
        hess += 2.0 * pot.kappa_eff * math.cos(phi.sum() + pot.theta_a) * np.outer(tr, tr)
    return hess
