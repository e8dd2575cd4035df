r"""Tree-level (classical) vacuum structure of the U(Nf)/SU(Nf) chiral sigma model.

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

Why diagonal ``U`` suffices (for diagonal ``H``)
------------------------------------------------
Write ``D = diag(h_f)`` so that ``H = e^{i theta_m} D``.

*(a) Global minimum (Birkhoff--von Neumann argument).*  Every unitary is
``U = W Lambda W^dagger`` with ``Lambda = diag(e^{i alpha_j})``.  ``det U``
depends only on the spectrum, so on the unitary orbit of fixed spectrum only
``Re Tr(H U) = sum_{f,j} |W_fj|^2 Re(H_ff e^{i alpha_j})`` varies.  The matrix
``B_fj = |W_fj|^2`` is doubly stochastic and the expression is linear in ``B``.
The doubly stochastic matrices form the convex hull of the permutation matrices
(G. Birkhoff, Univ. Nac. Tucuman Rev. Ser. A 5 (1946) 147, quoted from memory;
the same mechanism underlies J. von Neumann's trace inequality, Tomsk Univ.
Rev. 1 (1937) 286, quoted from memory), so the maximum of a linear function is
reached at a permutation matrix, which is itself of the form ``|W_fj|^2``
(``W`` a permutation).  That ``W`` makes ``U`` diagonal.  Hence on every orbit,
and therefore globally, the minimum of ``V`` is attained at a diagonal ``U``.
The orbit keeps ``det U``, so the argument holds for SU(Nf) and in the
large-kappa limit as well.

*(b) Every stationary point is diagonal up to an exact symmetry.*  Put
``U' = e^{i theta_m} U = K + i L`` with ``K, L`` commuting Hermitian matrices.
Varying ``U -> U e^{i eps X}`` and ``U -> e^{i eps X} U`` with Hermitian ``X``
(traceless for SU(Nf) and for the large-kappa limit) gives the stationarity
conditions ``D U' - U'^dagger D = 2 i c 1`` and ``U' D - D U'^dagger = 2 i c 1``
with one real ``c`` (``c = -2 kappa Im(e^{i theta_a} det U)`` for U(Nf), a
Lagrange multiplier otherwise; the two conditions are conjugate to each other
by ``U'``, hence the same ``c``).  Their difference and sum give

    ``[D, K] = 0``  and  ``{D, L} = 2 c 1``,

i.e. ``(h_f - h_g) K_fg = 0`` and ``(h_f + h_g) L_fg = 0`` for ``f != g``.  So
``U_fg = 0`` unless ``|h_f| = |h_g|``: ``U`` is block diagonal in blocks of
equal ``|h_f|``; for pairwise distinct ``|h_f|`` *every* stationary point is
diagonal.  In a block with ``|h_f| = m > 0`` write ``D_b = m S_b`` with
``S_b = diag(+-1)``.  ``V`` depends on ``U_b`` only through ``Tr(S_b U_b)`` and
``det U_b = det S_b det(S_b U_b)``, both invariant under
``S_b U_b -> W (S_b U_b) W^dagger``, i.e. under ``U_b -> (S_b W S_b) U_b W^dagger``
with ``W`` in ``U(n_b)``.  This left/right multiplication is an isometry of the
bi-invariant metric, so it maps stationary points to stationary points with the
same energy and the same Hessian spectrum; choosing ``W`` to diagonalise the
unitary ``S_b U_b`` makes ``U_b`` diagonal (for ``m = 0`` plain conjugation
does it).  Hence all stationary points -- in particular all local minima --
are images of diagonal ones, and it suffices to classify the points
``U = diag(e^{i phi_f})`` (order parameters such as ``Tr U`` are quoted on this
diagonal representative).  Conversely a stationary point of the restriction to
the torus is stationary on U(Nf): the first-order change along an off-diagonal
Hermitian ``X`` is ``Re Tr(H U X) = 0`` because ``H U`` is diagonal.

*(c) Stability in the off-diagonal directions.*  For ``U = U0 exp(i X)`` the
second-order term is exactly
``Q(X) = 1/2 Re Tr(M X^2) + kappa Re(e^{i theta_a} det U0) (Tr X)^2`` with
``M = H U0``.  At diagonal ``U0`` and in the basis of Hermitian matrices
orthonormal under ``<X, Y> = Tr(X Y)`` the Hessian splits into the torus block
``diag(a_f) + 2 kappa cos(sum phi + theta_a) 1 1^T`` (``a_f = h_f cos(phi_f +
theta_m)``) and, for every pair ``f < g``, the doubly degenerate eigenvalue
``(a_f + a_g) / 2``.  A torus minimum is a true local minimum on U(Nf) only if
these are ``>= 0``; zero values are flat directions (they occur e.g. for
degenerate ``h_f`` with unequal phases, as orbits of the symmetry in (b)).  One
can show that a *strictly* stable torus minimum never has a negative
off-diagonal eigenvalue (a rank-one positive update of ``diag(a)`` tolerates at
most one negative ``a_1`` and then needs ``sum_f 1/a_f < 0``, which forces
``a_g > |a_1|``); the module still checks every point independently and reports
flat directions, which matter at degenerate (non-isolated) points.

All of the above is derived here; the numerical cross-check against an
unrestricted minimisation over U(Nf) is :func:`minimize_unrestricted` (and the
test-suite).

Branch numbers (the one convention of the package)
--------------------------------------------------
Branch ``k`` is the vacuum continued from the tree-level minimum
``e^{i theta_m} U = e^{i (theta + 2 pi k)/Nf} 1`` (the degenerate large-kappa
vacua), i.e. the one whose placement-independent order parameter
``omega_h = e^{i theta_m} Omega`` has the phase nearest to
``(theta + 2 pi k)/Nf``.  ``k`` is defined modulo ``Nf`` and is always quoted
in the range ``-floor((Nf-1)/2) .. floor(Nf/2)`` (:func:`branch_range`):
``{0}`` for Nf = 1, ``{0, 1}`` for Nf = 2, ``{-1, 0, 1}`` for Nf = 3,
``{-1, 0, 1, 2}`` for Nf = 4.  With positive degenerate masses branch 0 is the
global minimum for ``|theta| < pi``, branch -1 for ``pi < theta < 3 pi`` (for
Nf >= 3; for Nf = 2 it is quoted as 1); at ``theta = pi`` the two are a
degenerate CP pair.  ``theta`` is the physical angle itself, not reduced
modulo 2 pi, so branch ``k`` at ``theta + 2 pi`` is the vacuum of branch
``k + 1`` at ``theta``.  :func:`branch_label` computes ``k``, everything that
prints a branch number (``vacua``, ``run``, ``analyze``, the demo and the
figures) uses it, and :func:`branch_status` says whether a branch is the
tree-level global minimum or a metastable one.

Branch following
----------------
:func:`scan_theta` finds all local minima at the first grid point, follows each
one by Newton continuation from its predecessor (so a branch survives level
crossings and ends only where it stops being a local minimum -- its spinodal
point), searches for new minima at every grid point (births, followed backwards
to their spinodal), and refines first-order points with ``brentq`` and
spinodal points by bisection on existence.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import numbers
from dataclasses import dataclass, field

import numpy as np
from scipy import linalg, optimize

__all__ = [
    "PLACEMENTS",
    "branch_range",
    "canonical_branch",
    "branch_label",
    "branch_phase",
    "branch_status",
    "BranchStatus",
    "potential_of_config",
    "measured_branch",
    "ChiralPotential",
    "Vacuum",
    "FirstOrderPoint",
    "SpinodalPoint",
    "CPPair",
    "BranchScan",
    "UnrestrictedMinimum",
    "resolve_angles",
    "make_potential",
    "matrix_potential",
    "diagonal_potential",
    "hermitian_basis",
    "full_hessian",
    "full_hessian_numeric",
    "find_local_minima",
    "large_kappa_vacua",
    "minimize_unrestricted",
    "scan_theta",
    "format_table",
    "plot_branches",
]

TWO_PI = 2.0 * np.pi

#: Named placements of theta: the fraction ``x`` of theta carried by the mass phase.
PLACEMENTS = {"mass": 1.0, "split": 0.5, "anomaly": 0.0}

# Relative tolerances (times the energy scale of the potential).  Newton
# converges quadratically, so gradients reach ~1e-13 * scale; Hessian
# eigenvalues below TOL_HESS * scale are indistinguishable from zero.
_GTOL_REL = 1e-11
_TOL_HESS_REL = 1e-9
# Two diagonal representatives are the same vacuum if their phases agree to this (rad).
_KEY_TOL = 1e-6
# Newton iterations allowed when continuing a branch: from a nearby predicted
# point a few iterations suffice, and failures (past a spinodal) should be cheap.
_CONT_MAXIT = 25


def _wrap(x):
    """Map angles to [-pi, pi) so that distances modulo 2 pi are plain differences."""
    return (np.asarray(x) + np.pi) % TWO_PI - np.pi


# ----------------------------------------------------------------------------
# branch numbers
# ----------------------------------------------------------------------------


def branch_range(nf: int) -> range:
    """The quoted branch numbers ``-floor((nf-1)/2) .. floor(nf/2)`` (module docstring)."""
    return range(-((nf - 1) // 2), nf // 2 + 1)


def canonical_branch(k, nf: int):
    """``k`` modulo ``nf`` moved into :func:`branch_range` (int or int array)."""
    lo = (nf - 1) // 2
    out = (np.asarray(k, dtype=np.int64) + lo) % nf - lo
    return int(out) if out.ndim == 0 else out


def branch_label(omega_h, theta, nf: int):
    """Branch number of ``omega_h = e^{i theta_m} Omega`` at the physical angle ``theta``.

    The nearest ``k`` with ``arg omega_h = (theta + 2 pi k)/nf`` (mod 2 pi), in
    :func:`branch_range`; scalar or array (element-wise, ``theta`` broadcast).
    """
    om = np.asarray(omega_h, dtype=np.complex128)
    x = (nf * np.angle(om) - np.asarray(theta, dtype=float)) / TWO_PI
    return canonical_branch(np.round(x).astype(np.int64), nf)


def branch_phase(k, theta, nf: int):
    """``(theta + 2 pi k)/nf`` wrapped to ``(-pi, pi]``: the large-kappa phase of branch ``k``."""
    return np.angle(np.exp(1j * (np.asarray(theta, float) + TWO_PI * np.asarray(k)) / nf))


@dataclass(frozen=True)
class BranchStatus:
    """Where a branch stands among the tree-level minima at one theta.

    Attributes
    ----------
    branch : int
        The branch asked about (:func:`branch_label` convention).
    status : str
        ``'global'``, ``'global (degenerate)'`` (one of several global minima,
        e.g. a CP pair at theta = pi), ``'metastable'`` or ``'no minimum'``
        (not a tree-level local minimum at this theta).
    global_branches : tuple of int
        Branches of the tree-level global minimum.
    minima : tuple of (int, float)
        ``(branch, energy per site)`` of every tree-level local minimum, by energy.
    """

    branch: int
    status: str
    global_branches: tuple
    minima: tuple

    def describe(self) -> str:
        """One line, e.g. ``branch -1: metastable at tree level (global: 0)``."""
        g = ", ".join(str(k) for k in self.global_branches) or "none"
        return f"branch {self.branch}: {self.status} at tree level (global: {g})"


def measured_branch(omega_h, theta, nf: int) -> tuple:
    """Majority branch number of a series of ``omega_h`` and the fraction of it in that branch.

    Returns ``(k, fraction)``; ``(0, nan)`` for an empty series.
    """
    om = np.asarray(omega_h, dtype=np.complex128).ravel()
    om = om[np.isfinite(om)]
    if om.size == 0:
        return 0, float("nan")
    lab = branch_label(om, theta, nf)
    lo = (nf - 1) // 2
    counts = np.bincount(np.atleast_1d(lab) + lo, minlength=nf)
    j = int(np.argmax(counts))
    return j - lo, float(counts[j] / counts.sum())


def potential_of_config(config) -> "ChiralPotential | None":
    """Tree-level potential of a run config (None for models without one, e.g. linear)."""
    if getattr(config, "kind", "chiral") != "chiral":
        return None
    theta_m, theta_a = config.theta_angles
    return make_potential(list(config.mass), config.kappa, theta_m=theta_m, theta_a=theta_a,
                          nf=config.nf, group=config.group)


@functools.lru_cache(maxsize=64)
def _tree_minima(pot):
    theta = pot.theta
    out = []
    for v in find_local_minima(pot):
        out.append((branch_label(v.omega_rot, theta, pot.nf), v.energy, v.is_global))
    return tuple(out)


def branch_status(pot: "ChiralPotential", branch: int) -> BranchStatus:
    """Classify ``branch`` at the theta of ``pot`` against its tree-level minima.

    Parameters
    ----------
    pot : ChiralPotential
        The potential at the run's theta (e.g. :func:`potential_of_config`).
    branch : int
        Measured branch number (any integer; taken modulo Nf).
    """
    nf = pot.nf
    k = canonical_branch(int(branch), nf)
    mins = _tree_minima(pot)
    glob = tuple(sorted({b for b, _, g in mins if g}))
    labels = {b for b, _, _ in mins}
    if not glob:  # h = kappa = 0 (or SU(Nf) at h = 0): the potential is flat
        status = "flat"
    elif k in glob:
        status = "global" if len(glob) == 1 else "global (degenerate)"
    elif k in labels:
        status = "metastable"
    else:
        status = "no minimum"
    return BranchStatus(k, status, glob, tuple((b, float(e)) for b, e, _ in mins))


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


def _chart_energy(U0, X, pot):
    return matrix_potential(U0 @ linalg.expm(1j * X), pot)


def full_hessian_numeric(phases, pot: ChiralPotential, eps: float = 1e-4) -> np.ndarray:
    """Finite-difference Hessian of ``X -> V(U0 exp(i X))`` (independent check).

    Parameters
    ----------
    phases : (Nf,) array_like
        Phases of ``U0 = diag(e^{i phi})``.
    pot : ChiralPotential
    eps : float
        Step of the central differences.

    Returns
    -------
    ndarray
        Matrix in the basis of :func:`hermitian_basis`.
    """
    U0 = np.diag(np.exp(1j * np.asarray(phases, dtype=float)))
    T = hermitian_basis(pot.nf, traceless=pot.constrained)
    n = len(T)
    hess = np.zeros((n, n))
    e0 = _chart_energy(U0, 0 * T[0] if n else np.zeros_like(U0), pot)
    for i in range(n):
        for j in range(i, n):
            if i == j:
                ep = _chart_energy(U0, eps * T[i], pot)
                em = _chart_energy(U0, -eps * T[i], pot)
                hess[i, i] = (ep - 2 * e0 + em) / eps**2
            else:
                s = 0.0
                for si, sj in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
                    s += si * sj * _chart_energy(U0, eps * (si * T[i] + sj * T[j]), pot)
                hess[i, j] = hess[j, i] = s / (4 * eps**2)
    return hess


# ----------------------------------------------------------------------------
# vacua
# ----------------------------------------------------------------------------


@dataclass
class Vacuum:
    """A diagonal stationary point classified by its Hessian.

    Attributes
    ----------
    phases : ndarray
        ``phi_f`` in [-pi, pi).
    energy : float
        ``V`` at the point.
    omega : complex
        ``(1/Nf) Tr U``.
    omega_rot : complex
        ``e^{i theta_m} Omega``, invariant under ``U -> e^{i alpha} U``; CP acts
        on it as complex conjugation.
    det : complex
        ``det U``.
    hessian_diag : ndarray
        Torus-block eigenvalues.
    hessian_offdiag : ndarray
        Pair eigenvalues ``(a_f + a_g)/2`` (each twice degenerate), order of
        ``numpy.triu_indices(Nf, 1)``.
    n_flat : int
        Number of zero modes of the full Hessian (with multiplicity).
    flat_pairs : tuple
        Flavour pairs ``(f, g)`` whose two off-diagonal modes are flat.
    isolated : bool
        True if the torus block is positive definite.
    is_global : bool
        True if the energy equals the lowest one found.
    """

    phases: np.ndarray
    energy: float
    omega: complex
    omega_rot: complex
    det: complex
    hessian_diag: np.ndarray
    hessian_offdiag: np.ndarray
    n_flat: int
    flat_pairs: tuple
    isolated: bool
    is_global: bool = False

    @property
    def hessian_full(self) -> np.ndarray:
        """All eigenvalues of the full Hessian, ascending."""
        return np.sort(np.concatenate([self.hessian_diag, np.repeat(self.hessian_offdiag, 2)]))


def _make_vacuum(phi, pot) -> Vacuum:
    phi = np.asarray(phi, dtype=float)
    de, oe = _spectrum(phi[None], pot)
    de, oe = de[0], oe[0]
    tol = _TOL_HESS_REL * pot.scale
    iu, ju = np.triu_indices(pot.nf, 1)
    flat = tuple((int(f), int(g)) for f, g, v in zip(iu, ju, oe) if abs(v) <= tol)
    n_flat = int(np.sum(np.abs(de) <= tol)) + 2 * len(flat)
    z = np.exp(1j * phi)
    return Vacuum(
        phases=_wrap(phi),
        energy=float(diagonal_potential(phi, pot)),
        omega=complex(z.mean()),
        omega_rot=complex(np.exp(1j * pot.theta_m) * z.mean()),
        det=complex(np.prod(z)),
        hessian_diag=de,
        hessian_offdiag=oe,
        n_flat=n_flat,
        flat_pairs=flat,
        isolated=bool(de.size == 0 or de[0] > tol),
    )


def _blocks(pot):
    """Flavour blocks of equal |h_f| (exact symmetries permute inside a block)."""
    absh = np.abs(pot.h_array)
    blocks, used = [], np.zeros(pot.nf, bool)
    for f in range(pot.nf):
        if used[f]:
            continue
        same = np.isclose(absh, absh[f], rtol=1e-12, atol=0.0) & ~used
        used |= same
        blocks.append(np.flatnonzero(same))
    return blocks


def _eff_phases(phi, pot):
    """Phases of the unitary S e^{i theta_m} U whose spectrum labels a vacuum (see (b))."""
    return _wrap(np.asarray(phi) + pot.theta_m + np.pi * (pot.h_array < 0))


def _same_vacuum(e1, e2, blocks, tol=_KEY_TOL):
    """Compare effective phases as multisets inside each block (circular distance)."""
    for b in blocks:
        rest = list(e2[b])
        for v in e1[b]:
            for k, w in enumerate(rest):
                if abs(_wrap(v - w)) < tol:
                    del rest[k]
                    break
            else:
                return False
    return True


def _newton(x0, pot, saddle_free, max_step, maxit=80):
    """Batched (saddle-free) Newton iteration in the free torus coordinates.

    Saddle-free Newton (|eigenvalues|, with backtracking) is used for the
    search because it is repelled by saddles; plain Newton is used for
    continuation because it follows a stationary point through a spinodal,
    where the Hessian test then ends the branch.
    """
    x = np.array(x0, dtype=float, copy=True)
    B, d = x.shape
    if d == 0:
        return x, np.ones(B, bool)
    gtol = _GTOL_REL * pot.scale
    delta = 1e-12 * pot.scale
    conv = np.zeros(B, bool)
    for _ in range(maxit):
        e, g, H = _egh(x, pot)
        conv = np.abs(g).max(-1) <= gtol
        act = ~conv
        if not act.any():
            break
        w, V = np.linalg.eigh(H[act])
        if saddle_free:
            w_eff = np.maximum(np.abs(w), delta)
        else:
            w_eff = np.where(np.abs(w) < delta, delta, w)
        gv = np.einsum("bij,bi->bj", V, g[act])
        step = -np.einsum("bij,bj->bi", V, gv / w_eff)
        nrm = np.linalg.norm(step, axis=-1)
        fac = np.minimum(1.0, max_step / np.maximum(nrm, 1e-300))
        step *= fac[:, None]
        if saddle_free:
            # backtracking keeps the energy decreasing (the step is a descent direction)
            e0 = e[act]
            xa = x[act]
            for _ in range(20):
                e1 = _egh(xa + step, pot)[0]
                bad = e1 > e0 + 1e-14 * pot.scale
                if not bad.any():
                    break
                step[bad] *= 0.5
            x[act] = xa + step
        else:
            x[act] += step
    return x, conv


def _structured_starts(pot):
    """Deterministic starts: equal phases on every winding sector, and the kappa = 0 optimum."""
    n, d = pot.nf, pot.dim
    starts = []
    base = pot.constraint_sum if pot.constrained else -pot.theta_a
    for k in range(n):
        phi = np.full(n, (base + TWO_PI * k) / n)
        starts.append(phi)
        if not pot.constrained:
            starts.append(np.full(n, -pot.theta_m + TWO_PI * k / n))
    starts.append(-pot.theta_m + np.pi * (pot.h_array < 0))
    return np.array([s[:d] for s in starts])


def _search(pot, n_starts=None, seed=0, include_degenerate=False, structured=True):
    """All local minima on the torus (deduplicated modulo 2 pi and symmetry)."""
    d = pot.dim
    if d == 0:
        return [_x_to_phases(np.zeros((1, 0)), pot)[0]]
    rng = np.random.default_rng(seed)
    n = n_starts if n_starts is not None else 24 + 12 * pot.nf
    x0 = rng.uniform(-np.pi, np.pi, (n, d))
    if structured:
        x0 = np.vstack([_structured_starts(pot), x0])
    x, conv = _newton(x0, pot, saddle_free=True, max_step=0.6)
    x = x[conv]
    if len(x) == 0:
        return []
    phi = _x_to_phases(x, pot)
    de, oe = _spectrum(phi, pot)
    tol = _TOL_HESS_REL * pot.scale
    dmin = de[:, 0] if d else np.full(len(x), np.inf)
    omin = oe.min(-1) if oe.shape[1] else np.full(len(x), np.inf)
    keep = (omin >= -tol) & ((dmin > tol) | (include_degenerate & (dmin >= -tol)))
    blocks = _blocks(pot)
    x = x[keep]
    if len(x) == 0:
        return []
    # cheap pre-deduplication on a rounded canonical form (phases sorted inside
    # each symmetry block); the exact tolerance-based comparison below then
    # only sees a handful of candidates
    eff = _eff_phases(_x_to_phases(x, pot), pot)
    canon = np.concatenate([np.sort(eff[:, b], axis=1) for b in blocks], axis=1)
    _, first = np.unique(np.round(canon, 4), axis=0, return_index=True)
    x = x[np.sort(first)]
    found, keys = [], []
    for xi in x:
        ph = _x_to_phases(xi[None], pot)[0]
        key = _eff_phases(ph, pot)
        if any(_same_vacuum(key, k, blocks) for k in keys):
            continue
        keys.append(key)
        found.append(xi)
    out = []
    for xi in found:
        # polish with a trust-region method (the Newton points are already
        # converged, so this mainly certifies them with an independent solver)
        def fun(z):
            return float(_egh(z[None], pot)[0][0])

        def jac(z):
            return _egh(z[None], pot)[1][0]

        def hess(z):
            return _egh(z[None], pot)[2][0]

        res = optimize.minimize(
            fun, xi, jac=jac, hess=hess, method="trust-exact",
            options={"gtol": _GTOL_REL * pot.scale},
        )
        xp = res.x if np.max(np.abs(res.x - xi)) < 1e-3 else xi
        out.append(_x_to_phases(xp[None], pot)[0])
    return out


def find_local_minima(
    pot: ChiralPotential,
    n_starts: int | None = None,
    seed: int = 0,
    include_degenerate: bool = False,
    structured: bool = True,
) -> list:
    """All local minima of the tree-level potential (diagonal representatives).

    Multi-start saddle-free Newton on the torus (``Nf`` phases for U(Nf),
    ``Nf - 1`` for SU(Nf) and the large-kappa limit), polishing with
    ``scipy.optimize.minimize(method='trust-exact')``, deduplication modulo
    2 pi and modulo the exact flavour symmetries of part (b) of the module
    docstring, and a full U(Nf) Hessian test.

    Parameters
    ----------
    pot : ChiralPotential
    n_starts : int, optional
        Random starts (default ``24 + 12 Nf``).
    seed : int
        Seed of the random starts.
    include_degenerate : bool
        Also return points whose torus Hessian is only semidefinite (continua
        of vacua or inflection points); by default only isolated minima.
    structured : bool
        Add deterministic starts (equal phases in every winding sector).

    Returns
    -------
    list of Vacuum
        Sorted by energy; ``is_global`` marks the lowest (within tolerance).
    """
    vac = [_make_vacuum(p, pot) for p in _search(pot, n_starts, seed, include_degenerate,
                                                 structured)]
    vac.sort(key=lambda v: v.energy)
    if vac:
        e0 = vac[0].energy
        for v in vac:
            v.is_global = v.energy <= e0 + 1e-10 * pot.scale
    return vac


def large_kappa_vacua(h, theta=None, placement="mass", *, nf=None, theta_m=None, theta_a=None,
                      n_starts=None, seed=0, include_degenerate=False) -> list:
    """Local minima in the determinant-constrained (kappa -> infinity) limit.

    Minimises ``-sum_f h_f cos(phi_f + theta_m)`` subject to
    ``sum_f phi_f = -theta_a (mod 2 pi)``, i.e. ``det U = e^{-i theta_a}``.

    Parameters
    ----------
    h, theta, placement, nf, theta_m, theta_a
        As in :func:`make_potential`.
    n_starts, seed, include_degenerate
        As in :func:`find_local_minima`.

    Returns
    -------
    list of Vacuum
        Energies without the constant ``-2 kappa``.
    """
    pot = make_potential(h, 0.0, theta, placement, nf=nf, theta_m=theta_m, theta_a=theta_a,
                         large_kappa=True)
    return find_local_minima(pot, n_starts=n_starts, seed=seed,
                             include_degenerate=include_degenerate)


# ----------------------------------------------------------------------------
# unrestricted minimisation on the group (independent check of the diagonal reduction)
# ----------------------------------------------------------------------------


@dataclass
class UnrestrictedMinimum:
    """Result of :func:`minimize_unrestricted`.

    Attributes
    ----------
    energy : float
        Lowest energy found.
    U : ndarray
        The minimising matrix.
    energies : ndarray
        Final energies of all starts (sorted).
    """

    energy: float
    U: np.ndarray
    energies: np.ndarray


def _haar_unitary(n, rng):
    # QR of a complex Ginibre matrix with the phase fix gives Haar measure
    # (F. Mezzadri, Notices AMS 54 (2007) 592, quoted from memory)
    z = (rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n))) / math.sqrt(2)
    q, r = np.linalg.qr(z)
    d = np.diagonal(r)
    return q * (d / np.abs(d))


def _chart_fun_grad(U0, pot, T):
    """Energy and analytic gradient of p -> V(U0 exp(i sum p_i T_i))."""
    M = np.exp(1j * pot.theta_m) * pot.h_array[:, None] * U0
    c = np.exp(1j * pot.theta_a) * np.linalg.det(U0)
    trT = np.einsum("iff->i", T).real
    use_det = not pot.large_kappa
    kap = pot.kappa

    def fg(p):
        X = np.einsum("i,ijk->jk", p, T)
        lam, W = np.linalg.eigh(X)
        el = np.exp(1j * lam)
        E = (W * el) @ W.conj().T
        tr = np.trace(M @ E)
        f = -tr.real
        # Daleckii-Krein: D exp(iX)[Y] = W ((W^+ Y W) o G) W^+ with the divided
        # differences G_jk of e^{i lambda} (Yu. L. Daleckii & S. G. Krein, 1965,
        # quoted from memory); the sinc form is exact and stable for lambda_j ~ lambda_k
        dl = lam[:, None] - lam[None, :]
        G = 1j * np.exp(0.5j * (lam[:, None] + lam[None, :])) * np.sinc(dl / TWO_PI)
        Mt = W.conj().T @ M @ W
        A = Mt.T * G
        Tt = np.einsum("ja,iab,bk->ijk", W.conj().T, T, W)
        g = -np.einsum("jk,ijk->i", A, Tt).real
        if use_det:
            t = float(p @ trT)
            z = c * np.exp(1j * t)
            f -= 2.0 * kap * z.real
            g += 2.0 * kap * z.imag * trT
        return f, g

    return fg


def minimize_unrestricted(pot: ChiralPotential, n_starts: int = 24, seed: int = 0,
                          ) -> UnrestrictedMinimum:
    """Minimise ``V`` over the whole group from random starting points.

    Each start is a Haar-random ``U0`` (rescaled into SU(Nf) or onto the
    fixed-determinant coset); ``U = U0 exp(i X)`` with ``X`` Hermitian
    (traceless in constrained cases) is minimised with BFGS and an analytic
    gradient, then re-centred and polished once.  This never uses the diagonal
    reduction, so it tests it.

    Parameters
    ----------
    pot : ChiralPotential
    n_starts : int
        Number of random starts.
    seed : int
        Random seed.

    Returns
    -------
    UnrestrictedMinimum
    """
    rng = np.random.default_rng(seed)
    n = pot.nf
    T = hermitian_basis(n, traceless=pot.constrained)
    best_e, best_u, all_e = np.inf, None, []
    for _ in range(n_starts):
        U0 = _haar_unitary(n, rng)
        if pot.constrained:
            target = 1.0 if pot.group == "SU" else np.exp(-1j * pot.theta_a)
            U0 = U0 * (target / np.linalg.det(U0)) ** (1.0 / n)
        for _round in range(2):
            if len(T) == 0:
                break
            fg = _chart_fun_grad(U0, pot, T)
            res = optimize.minimize(fg, np.zeros(len(T)), jac=True, method="BFGS",
                                    options={"gtol": 1e-10 * pot.scale, "maxiter": 2000})
            X = np.einsum("i,ijk->jk", res.x, T)
            U0 = U0 @ linalg.expm(1j * X)
        e = matrix_potential(U0, pot)
        all_e.append(e)
        if e < best_e:
            best_e, best_u = e, U0
    return UnrestrictedMinimum(float(best_e), best_u, np.sort(np.array(all_e)))


# ----------------------------------------------------------------------------
# branch following in theta
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class FirstOrderPoint:
    """A point where the global minimum switches branch.

    Attributes
    ----------
    theta : float
    branch_from, branch_to : int
        Global branch just below / above ``theta``.
    energy : float
        Common energy at ``theta``.
    method : str
        ``'brentq'`` (root of ``E_a - E_b``, on the part of the grid interval
        where both branches exist), ``'grid'`` (degenerate at a grid point),
        ``'cp'`` (a degenerate global CP pair at a CP-invariant grid point,
        also at an end of the grid) or ``'spinodal'`` (switch limited by a
        branch end).
    """

    theta: float
    branch_from: int
    branch_to: int
    energy: float
    method: str


@dataclass(frozen=True)
class SpinodalPoint:
    """End point of a branch (where it stops being a local minimum).

    Attributes
    ----------
    theta : float
    branch : int
    kind : str
        ``'end'`` (branch ceases with increasing theta), ``'start'`` (branch
        appears with increasing theta) or ``'merge'`` (it coincided with an
        older branch, located to grid precision).
    energy : float
    """

    theta: float
    branch: int
    kind: str
    energy: float


@dataclass(frozen=True)
class CPPair:
    """Two branches that are CP images of each other at a CP-invariant theta.

    Attributes
    ----------
    theta : float
    branch_a, branch_b : int
        ``branch_a == branch_b`` means a CP-invariant vacuum.
    """

    theta: float
    branch_a: int
    branch_b: int


@dataclass
class BranchScan:
    """Branches of local minima followed over a theta grid.

    Attributes
    ----------
    potential : ChiralPotential
        Parameters at ``thetas[0]``.
    placement : float
        Fraction of theta carried by the mass phase.
    thetas : ndarray, shape (nt,)
    energies : ndarray, shape (nb, nt)
        ``E_k(theta)``, NaN where branch ``k`` is not a local minimum.
    phases : ndarray, shape (nb, nt, Nf)
    omega, omega_rot, det : complex ndarray, shape (nb, nt)
        ``(1/Nf) Tr U``, ``e^{i theta_m} Omega`` and ``det U``.
    lambda_min : ndarray, shape (nb, nt)
        Smallest torus-block Hessian eigenvalue.
    n_flat : ndarray, shape (nb, nt)
        Number of flat directions of the full Hessian (-1 where absent).
    global_energy : ndarray, shape (nt,)
    global_branch : ndarray, shape (nt,)
        Index of the lowest branch (-1 if none).
    n_minima, n_metastable : ndarray, shape (nt,)
        Number of local minima and of those other than one global minimum.
    first_order : list of FirstOrderPoint
        Switches of the global branch between neighbouring grid points (one
        switch per grid interval is resolved), and every CP-invariant grid
        point whose global minimum is a degenerate CP pair (method ``'cp'``,
        also at the first or last grid point).
    spinodals : list of SpinodalPoint
    cp_pairs : list of CPPair
        At grid points with ``2 theta = 0 mod 2 pi``.
    """

    potential: ChiralPotential
    placement: float
    thetas: np.ndarray
    energies: np.ndarray
    phases: np.ndarray
    omega: np.ndarray
    omega_rot: np.ndarray
    det: np.ndarray
    lambda_min: np.ndarray
    n_flat: np.ndarray
    global_energy: np.ndarray
    global_branch: np.ndarray
    n_minima: np.ndarray
    n_metastable: np.ndarray
    first_order: list = field(default_factory=list)
    spinodals: list = field(default_factory=list)
    cp_pairs: list = field(default_factory=list)

    @property
    def n_branches(self) -> int:
        """Number of branches."""
        return self.energies.shape[0]

    @property
    def labels(self) -> np.ndarray:
        """Branch number (:func:`branch_label`) of every followed branch at every grid point,
        int array (nb, nt), ``-999`` where the branch is absent.  The rows of the scan are
        followed minima; their number can change along a row where no barrier separates two
        branches (e.g. below the first-order threshold in kappa)."""
        nf = self.potential.nf
        lab = branch_label(np.where(np.isnan(self.omega_rot), 1.0, self.omega_rot),
                           self.thetas[None, :], nf)
        return np.where(np.isnan(self.energies), -999, lab)

    @property
    def global_label(self) -> np.ndarray:
        """Branch number of the global minimum at every grid point (int (nt,), -999 if none)."""
        lab = self.labels
        gb = self.global_branch
        return np.where(gb >= 0, lab[np.maximum(gb, 0), np.arange(len(gb))], -999)

    def row_labels(self, b: int) -> str:
        """The branch numbers that row ``b`` takes along theta, e.g. ``'0'`` or ``'0 -> -1'``."""
        seq = [int(v) for v in self.labels[b] if v != -999]
        out = [seq[0]] if seq else []
        for v in seq[1:]:
            if v != out[-1]:
                out.append(v)
        return " -> ".join(str(v) for v in out) if out else "-"


class _Tracker:
    """Internal state of a scan (keeps the unwrapped free coordinates of each branch)."""

    def __init__(self, template, placement, thetas, jump_tol):
        self.template = template
        self.placement = placement
        self.thetas = thetas
        self.jump_tol = jump_tol
        self.pots = [template.with_theta(t, placement) for t in thetas]
        self.x = []  # per branch: (nt, dim) with NaN
        self.alive = []
        self.spinodals = []

    def pot(self, theta):
        return self.template.with_theta(theta, self.placement)

    def _accept(self, xn, xp, conv, pot, require_min=True):
        phn, php = _x_to_phases(xn, pot), _x_to_phases(xp, pot)
        dist = np.abs(_wrap(phn - php)).max(-1) if phn.shape[-1] else np.zeros(len(xn))
        ok = conv & (dist < self.jump_tol)
        if not require_min:
            return ok
        de, oe = _spectrum(phn, pot)
        tol = _TOL_HESS_REL * pot.scale
        dmin = de[:, 0] if de.shape[1] else np.full(len(xn), np.inf)
        omin = oe.min(-1) if oe.shape[1] else np.full(len(xn), np.inf)
        return ok & (dmin >= -tol) & (omin >= -tol)

    def _predict(self, xp, t0, t1):
        """Euler predictor dx = -H^{-1} (d g / d theta) dtheta (capped)."""
        if xp.shape[-1] == 0:
            return xp
        eps = 1e-6
        pot0 = self.pot(t0)
        _, _, H = _egh(xp, pot0)
        dg = (_egh(xp, self.pot(t0 + eps))[1] - _egh(xp, self.pot(t0 - eps))[1]) / (2 * eps)
        w, V = np.linalg.eigh(H)
        delta = 1e-8 * pot0.scale
        w_eff = np.where(np.abs(w) < delta, delta, w)
        dx = -np.einsum("bij,bj->bi", V, np.einsum("bij,bi->bj", V, dg) / w_eff) * (t1 - t0)
        nrm = np.linalg.norm(dx, axis=-1)
        cap = 0.25 * self.jump_tol
        dx *= np.minimum(1.0, cap / np.maximum(nrm, 1e-300))[:, None]
        return xp + dx

    def step(self, xp, t0, t1, require_min=True):
        """Continue stationary points xp (B, d) from t0 to t1; returns (x, ok).

        Predictor-corrector: Newton from the Euler-predicted point, and if that
        fails from the old point; near a spinodal the Newton basin shrinks with
        the smallest Hessian eigenvalue, which the predictor compensates.
        """
        pot = self.pot(t1)
        xs, conv = _newton(self._predict(xp, t0, t1), pot, saddle_free=False, max_step=0.25,
                            maxit=_CONT_MAXIT)
        ok = self._accept(xs, xp, conv, pot, require_min) & self._returns(xs, xp, t0, conv)
        if not ok.all():
            xn, conv = _newton(xp, pot, saddle_free=False, max_step=0.25,
                            maxit=_CONT_MAXIT)
            okn = (self._accept(xn, xp, conv, pot, require_min)
                   & self._returns(xn, xp, t0, conv) & ~ok)
            xs[okn] = xn[okn]
            ok = ok | okn
        return xs, ok

    def _returns(self, xn, xp, t0, conv):
        """True where Newton at t0 started from the continued point xn comes back to xp.

        When a branch ends inside the step, Newton at t1 can land on a different
        minimum (typically the CP mirror of the dying one near a first-order
        point, which lies closer than ``jump_tol``); that minimum also exists at
        t0, so the way back finds it and not xp.  A genuine continuation step
        is reversible.
        """
        ok = conv.copy()
        if xn.shape[-1] == 0 or not ok.any():
            return ok
        pot0 = self.pot(t0)
        xb, convb = _newton(xn[ok], pot0, saddle_free=False, max_step=0.25, maxit=_CONT_MAXIT)
        back = np.abs(_wrap(_x_to_phases(xb, pot0) - _x_to_phases(xp[ok], pot0))).max(-1)
        fwd = np.abs(_wrap(_x_to_phases(xn[ok], pot0) - _x_to_phases(xp[ok], pot0))).max(-1)
        ok[ok] = convb & (back <= 1e-3 * fwd + _KEY_TOL)
        return ok

    def cp_inside(self, t0, t1):
        """CP-invariant angles (theta = 0 mod pi) strictly between t0 and t1, in path order.

        A continuation step never jumps over one of them: at a first-order point there
        the CP mirror of the dying minimum exists too, and only a step that stops at the
        CP-invariant angle lets the reversibility test (:meth:`_returns`) see it.
        """
        lo, hi = min(t0, t1), max(t0, t1)
        # physical theta = t (the placement only splits it between the phases)
        n0, n1 = math.floor(lo / np.pi) + 1, math.ceil(hi / np.pi) - 1
        out = [n * np.pi for n in range(n0, n1 + 1)
               if lo + 1e-12 < n * np.pi < hi - 1e-12]
        return out if t1 > t0 else out[::-1]

    def continue_one(self, x0, t0, t1, depth=6, require_min=True):
        """Continue one branch from t0 to t1, halving the step when it fails."""
        cps = self.cp_inside(t0, t1)
        if cps:
            x, t = x0, t0
            for tc in cps + [t1]:
                x, ok = self.continue_one(x, t, tc, depth, require_min)
                if not ok:
                    return x0, False
                t = tc
            return x, True
        xn, ok = self.step(x0[None], t0, t1, require_min)
        if ok[0]:
            return xn[0], True
        if depth == 0:
            return x0, False
        tm = 0.5 * (t0 + t1)
        xm, okm = self.continue_one(x0, t0, tm, depth - 1, require_min)
        if not okm:
            return x0, False
        return self.continue_one(xm, tm, t1, depth - 1, require_min)

    def refine_end(self, x_good, t_good, t_bad):
        """Bisection on existence between a good and a bad theta; returns (theta, x)."""
        state = {"x": x_good.copy(), "t": t_good}

        def exists(t):
            if t == state["t"]:
                return 1.0
            xn, ok = self.continue_one(state["x"], state["t"], t, depth=1)
            if ok:
                state["x"], state["t"] = xn, t
                return 1.0
            return -1.0

        if exists(t_bad) > 0:
            # reachable with finer steps after all: the end is at (or beyond) t_bad
            return state["t"], state["x"]
        # xtol well below any grid spacing; existence is monotone along the bisection
        optimize.bisect(exists, t_good, t_bad, xtol=1e-11, maxiter=200)
        return state["t"], state["x"]


def _grid_search(tr, i, n_starts, seed):
    # births are rare and every followed branch is already known, so the
    # per-grid-point search can use fewer random starts than the first one
    n = n_starts if n_starts is not None else 16 + 4 * tr.template.nf
    return _search(tr.pots[i], n, seed + i)


def scan_theta(
    h,
    kappa=0.0,
    thetas=None,
    placement="mass",
    *,
    nf=None,
    group="U",
    large_kappa=False,
    n_theta=401,
    n_starts=None,
    seed=0,
    search_every=1,
    jump_tol=0.5,
) -> BranchScan:
    """Follow all branches of local minima in theta (default grid over [0, 4 pi]).

    Parameters
    ----------
    h : float or sequence of float
        Masses (scalar needs ``nf``).
    kappa : float
        Anomaly coupling.
    thetas : array_like, optional
        Increasing grid; default ``linspace(0, 4 pi, n_theta)``.
    placement : {'mass', 'anomaly', 'split'} or float
        How theta is split between mass and anomaly phases.
    nf : int, optional
        Number of flavours for scalar ``h``.
    group : {'U', 'SU'}
        Target group (for SU only ``Nf theta_m`` matters, use ``'mass'``).
    large_kappa : bool
        Determinant-constrained limit.
    n_theta : int
        Grid size if ``thetas`` is not given.
    n_starts : int, optional
        Random starts of the search at every grid point (default
        ``16 + 4 Nf``; the first grid point uses ``24 + 12 Nf``).
    seed : int
        Seed.
    search_every : int
        Search for new branches every this many grid points (1 = everywhere).
    jump_tol : float
        Largest phase change (rad) accepted between successive grid points;
        larger moves count as the branch ending.

    Returns
    -------
    BranchScan
    """
    thetas = (np.linspace(0.0, 4 * np.pi, n_theta) if thetas is None
              else np.asarray(thetas, dtype=float))
    if thetas.ndim != 1 or len(thetas) < 2 or np.any(np.diff(thetas) <= 0):
        raise ValueError("thetas must be an increasing 1-d grid with >= 2 points")
    x_frac = _placement_fraction(placement)
    template = make_potential(h, kappa, thetas[0], x_frac, nf=nf, group=group,
                              large_kappa=large_kappa)
    nt, d, nf_ = len(thetas), template.dim, template.nf
    tr = _Tracker(template, x_frac, thetas, jump_tol)
    blocks = _blocks(template)

    def new_branch(i, phi):
        arr = np.full((nt, d), np.nan)
        arr[i] = _phases_to_x(phi[None], tr.pots[i])[0]
        tr.x.append(arr)
        tr.alive.append(True)
        return len(tr.x) - 1

    def keys_at(i, ks):
        return [(_eff_phases(_x_to_phases(tr.x[k][i][None], tr.pots[i])[0], tr.pots[i]), k)
                for k in ks]

    def energy_of(pot, xk):
        return float(_egh(xk[None], pot)[0][0])

    # initial branches, ordered by energy
    init = _search(tr.pots[0], None if n_starts is None else max(n_starts, 24 + 12 * nf_),
                   seed)
    init.sort(key=lambda p: float(diagonal_potential(p, tr.pots[0])))
    for p in init:
        new_branch(0, p)

    for i in range(1, nt):
        t0, t1 = thetas[i - 1], thetas[i]
        live = [k for k in range(len(tr.x)) if tr.alive[k]]
        if live:
            xp = np.array([tr.x[k][i - 1] for k in live])
            if tr.cp_inside(t0, t1):
                # stop at the CP-invariant angle inside the interval (continue_one does)
                xn, ok = xp.copy(), np.zeros(len(live), bool)
            else:
                xn, ok = tr.step(xp, t0, t1)
            for j, k in enumerate(live):
                if ok[j]:
                    tr.x[k][i] = xn[j]
                    continue
                xs, oks = tr.continue_one(xp[j], t0, t1)
                if oks:
                    tr.x[k][i] = xs
                    continue
                ts, xsp = tr.refine_end(xp[j], t0, t1)
                tr.alive[k] = False
                tr.spinodals.append(SpinodalPoint(ts, k, "end", energy_of(tr.pot(ts), xsp)))
        # two followed branches that became the same vacuum (pitchfork): keep the older
        live = [k for k in range(len(tr.x)) if tr.alive[k]]
        keyed = keys_at(i, live)
        for a in range(len(keyed)):
            for b in range(a):
                ka, kb = keyed[a][1], keyed[b][1]
                if tr.alive[ka] and tr.alive[kb] and _same_vacuum(keyed[a][0], keyed[b][0],
                                                                  blocks):
                    tr.alive[ka] = False
                    tr.x[ka][i] = np.nan
                    tr.spinodals.append(SpinodalPoint(
                        t1, ka, "merge", float(_egh(tr.x[kb][i][None], tr.pots[i])[0][0])))
        # births
        if i % search_every == 0 or i == nt - 1:
            live = [k for k in range(len(tr.x)) if tr.alive[k]]
            keyed = keys_at(i, live)
            for phi in _grid_search(tr, i, n_starts, seed):
                key = _eff_phases(phi, tr.pots[i])
                if any(_same_vacuum(key, kk, blocks) for kk, _ in keyed):
                    continue
                k = new_branch(i, phi)
                keyed.append((key, k))
                # follow the newcomer backwards to where it starts
                for j in range(i - 1, -1, -1):
                    xs, oks = tr.continue_one(tr.x[k][j + 1], thetas[j + 1], thetas[j])
                    if not oks:
                        ts, xsp = tr.refine_end(tr.x[k][j + 1], thetas[j + 1], thetas[j])
                        tr.spinodals.append(SpinodalPoint(ts, k, "start",
                                                          energy_of(tr.pot(ts), xsp)))
                        break
                    if d and _clashes(tr, k, j, xs, blocks):
                        # ran into a branch that is already known there (it had
                        # been lost by forward tracking); stop without a spinodal
                        break
                    tr.x[k][j] = xs

    return _assemble(tr, template, x_frac)


def _clashes(tr, k, j, xs, blocks):
    """True if the point xs of branch k at grid index j is another branch's vacuum."""
    pot = tr.pots[j]
    key = _eff_phases(_x_to_phases(xs[None], pot)[0], pot)
    for m in range(len(tr.x)):
        if m == k or np.isnan(tr.x[m][j][0]):
            continue
        other = _eff_phases(_x_to_phases(tr.x[m][j][None], pot)[0], pot)
        if _same_vacuum(key, other, blocks):
            return True
    return False


def _assemble(tr, template, x_frac):
    thetas = tr.thetas
    nt, nb, n = len(thetas), len(tr.x), template.nf
    E = np.full((nb, nt), np.nan)
    PH = np.full((nb, nt, n), np.nan)
    OM = np.full((nb, nt), np.nan + 0j)
    OMR = np.full((nb, nt), np.nan + 0j)
    DET = np.full((nb, nt), np.nan + 0j)
    LAM = np.full((nb, nt), np.nan)
    NFL = np.full((nb, nt), -1, dtype=int)
    d = template.dim
    for k in range(nb):
        for i in range(nt):
            xk = tr.x[k][i]
            if d and np.isnan(xk[0]):
                continue
            if d == 0 and k > 0:
                continue
            v = _make_vacuum(_x_to_phases(xk[None], tr.pots[i])[0], tr.pots[i])
            E[k, i], PH[k, i], OM[k, i], OMR[k, i], DET[k, i] = (
                v.energy, v.phases, v.omega, v.omega_rot, v.det)
            LAM[k, i] = v.hessian_diag[0] if v.hessian_diag.size else np.inf
            NFL[k, i] = v.n_flat
    exists = ~np.isnan(E)
    n_min = exists.sum(0)
    gE = np.where(n_min > 0, np.nanmin(np.where(exists, E, np.inf), axis=0), np.nan)
    gB = np.where(n_min > 0, np.argmin(np.where(exists, E, np.inf), axis=0), -1)
    res = BranchScan(
        potential=template, placement=x_frac, thetas=thetas, energies=E, phases=PH,
        omega=OM, omega_rot=OMR, det=DET, lambda_min=LAM, n_flat=NFL,
        global_energy=gE, global_branch=gB, n_minima=n_min,
        n_metastable=np.maximum(n_min - 1, 0), spinodals=sorted(tr.spinodals,
                                                                key=lambda s: s.theta),
    )
    res.cp_pairs = _cp_pairs(tr, res)
    res.first_order = _first_order_points(tr, res)
    return res


def _first_order_points(tr, res):
    out = []
    thetas, gB, E = res.thetas, res.global_branch, res.energies
    scale = tr.template.scale
    tol = 1e-9 * scale

    def cont_energy(k, i, t):
        # continue branch k from grid point i as a stationary point (it may be a
        # saddle past its spinodal; only the energy difference matters here)
        xn, ok = tr.continue_one(tr.x[k][i], thetas[i], t, depth=4, require_min=False)
        if not ok:
            return np.nan
        return float(_egh(xn[None], tr.pot(t))[0][0])

    for i in range(1, len(thetas)):
        a, b = gB[i - 1], gB[i]
        if a < 0 or b < 0 or a == b:
            continue
        t0, t1 = thetas[i - 1], thetas[i]

        def f(t):
            return cont_energy(a, i - 1, t) - cont_energy(b, i, t)

        f0 = (E[a, i - 1] - cont_energy(b, i, t0))
        f1 = (cont_energy(a, i - 1, t1) - E[b, i])
        if abs(f0) <= tol:
            ts, method = t0, "grid"
            e_at = E[a, i - 1]
        elif abs(f1) <= tol:
            ts, method = t1, "grid"
            e_at = E[b, i]
        elif np.isfinite(f0) and np.isfinite(f1) and f0 * f1 < 0:
            ts = optimize.brentq(f, t0, t1, xtol=1e-13, rtol=4 * np.finfo(float).eps)
            method = "brentq"
            e_at = cont_energy(a, i - 1, ts)
        elif (root := _root_on_overlap(f, a, b, t0, t1, res.spinodals)) is not None:
            # a ends and/or b starts inside the interval (no stationary point to
            # continue past a fold): the crossing lies where both exist
            ts, method = root, "brentq"
            e_at = cont_energy(a, i - 1, ts)
        else:
            # the switch is limited by a branch end (no common interval of existence)
            ends = [s.theta for s in res.spinodals
                    if t0 <= s.theta <= t1 and s.branch in (a, b)]
            ts = float(np.mean(ends)) if ends else 0.5 * (t0 + t1)
            method = "spinodal"
            e_at = np.nanmin([E[a, i - 1], E[b, i]])
        out.append(FirstOrderPoint(float(ts), int(a), int(b), float(e_at), method))
    # a degenerate global CP pair at a grid point is a first-order point even where
    # the argmin of the two equal energies did not change across it (or at an end
    # point of the grid)
    for c in res.cp_pairs:
        a, b = c.branch_a, c.branch_b
        if a == b:
            continue
        i = int(np.argmin(np.abs(thetas - c.theta)))
        ea, eb, eg = E[a, i], E[b, i], res.global_energy[i]
        if max(abs(ea - eg), abs(eb - eg)) > tol:
            continue
        if any(abs(p.theta - c.theta) <= 1e-9 for p in out):
            continue
        out.append(FirstOrderPoint(float(c.theta), int(a), int(b), float(eg), "cp"))
    out.sort(key=lambda p: p.theta)
    return out


def _root_on_overlap(f, a, b, t0, t1, spinodals):
    """Root of f = E_a - E_b on the part of [t0, t1] where both branches exist, or None."""
    ends = [s.theta for s in spinodals if s.branch == a and s.kind == "end" and t0 <= s.theta <= t1]
    starts = [s.theta for s in spinodals
              if s.branch == b and s.kind == "start" and t0 <= s.theta <= t1]
    lo = max([t0] + starts)
    hi = min([t1] + ends)
    # the spinodals are bisected to 1e-11: stay just inside the common interval
    pad = 1e-10
    lo, hi = lo + (pad if lo > t0 else 0.0), hi - (pad if hi < t1 else 0.0)
    if not lo < hi:
        return None
    flo, fhi = f(lo), f(hi)
    if not (np.isfinite(flo) and np.isfinite(fhi)) or flo * fhi > 0:
        return None
    if flo == 0.0:
        return float(lo)
    if fhi == 0.0:
        return float(hi)
    return float(optimize.brentq(f, lo, hi, xtol=1e-13, rtol=4 * np.finfo(float).eps))


def _cp_pairs(tr, res):
    """CP pairs at grid points where theta and -theta are equivalent (2 theta = 0 mod 2 pi)."""
    out = []
    blocks = _blocks(tr.template)
    for i, t in enumerate(res.thetas):
        pot = tr.pots[i]
        if abs(_wrap(2.0 * pot.theta)) > 1e-9:
            continue
        ks = [k for k in range(res.n_branches) if not np.isnan(res.energies[k, i])]
        keys = {k: _eff_phases(res.phases[k, i], pot) for k in ks}
        for a in ks:
            # CP: U -> e^{-2 i theta_m} U^*, i.e. effective phases -> minus themselves
            img = _wrap(-keys[a])
            for b in ks:
                if b >= a and _same_vacuum(img, keys[b], blocks, tol=1e-5):
                    out.append(CPPair(float(t), a, b))
    return out


# ----------------------------------------------------------------------------
# output
# ----------------------------------------------------------------------------


def _fmt_c(z):
    return f"{z.real:+.5f}{z.imag:+.5f}i"


def format_table(obj, step: int | None = None, theta: float | None = None) -> str:
    """Plain-text table of vacua or of a branch scan.

    Parameters
    ----------
    obj : list of Vacuum or BranchScan
        What to tabulate.
    step : int, optional
        For a scan: print every ``step``-th grid point (default: about 17 rows).
    theta : float, optional
        For a list of vacua: the physical angle they belong to, to print their
        branch numbers (:func:`branch_label`); ``?`` without it.

    Returns
    -------
    str
    """
    lines = []
    if isinstance(obj, BranchScan):
        r = obj
        lines.append(f"# {r.potential.describe()}, placement x={r.placement:g}; "
                     "tree level, research toy")
        nt = len(r.thetas)
        step = step or max(1, (nt - 1) // 16)
        lines.append("# k = branch number: arg e^{i theta_m} Omega nearest (theta + 2 pi k)/Nf, "
                     f"k in {branch_range(r.potential.nf).start}..{branch_range(r.potential.nf).stop - 1}")
        lines.append("# followed minima (columns E_#): " + "; ".join(
            f"#{b}: k = {r.row_labels(b)}" for b in range(r.n_branches)))
        glab = r.global_label
        head = f"{'theta':>9} {'theta/pi':>9} {'k_glob':>6} {'E_glob':>13} {'n_meta':>6}"
        head += "".join(f" {'E_#' + str(k):>12}" for k in range(r.n_branches))
        lines.append(head)
        for i in range(0, nt, step):
            row = (f"{r.thetas[i]:9.5f} {r.thetas[i] / np.pi:9.4f} {glab[i]:6d} "
                   f"{r.global_energy[i]:13.8f} {r.n_metastable[i]:6d}")
            row += "".join(f" {r.energies[k, i]:12.6f}" if np.isfinite(r.energies[k, i])
                           else f" {'-':>12}" for k in range(r.n_branches))
            lines.append(row)
        lab = r.labels
        nfl = r.potential.nf

        def k_at(b, t):
            # branch number of row b at theta t (from the nearest grid point where it exists)
            ok = np.flatnonzero(lab[b] != -999)
            if not ok.size:
                return "-"
            j = ok[np.argmin(np.abs(r.thetas[ok] - t))]
            ph = r.omega_rot[b, j]
            return str(branch_label(ph, t, nfl)) if abs(r.thetas[j] - t) > 0 else str(lab[b, j])

        lines.append("# first-order points (theta, theta/pi, k from -> to, E, method, rows #)")
        for p in r.first_order:
            lines.append(f"  {p.theta:.10f} {p.theta / np.pi:.8f} k {k_at(p.branch_from, p.theta)} -> "
                         f"{k_at(p.branch_to, p.theta)} {p.energy:.8f} {p.method} "
                         f"#{p.branch_from} -> #{p.branch_to}")
        lines.append("# spinodal points (theta, theta/pi, k, kind, E, row #)")
        for s in r.spinodals:
            lines.append(f"  {s.theta:.10f} {s.theta / np.pi:.8f} k {k_at(s.branch, s.theta)} {s.kind} "
                         f"{s.energy:.8f} #{s.branch}")
        lines.append("# CP pairs at CP-invariant theta (theta/pi, k_a, k_b; the same: self-conjugate)")
        for c in r.cp_pairs:
            lines.append(f"  {c.theta / np.pi:.4f} {k_at(c.branch_a, c.theta)} {k_at(c.branch_b, c.theta)}")
        return "\n".join(lines)
    vac = list(obj)
    lines.append(f"{'k':>3} {'energy':>14} {'Omega':>20} {'det U':>20} {'lam_min':>11} "
                 f"{'flat':>4} {'status':>10}  phases/pi")
    for v in vac:
        lam = v.hessian_full[0] if v.hessian_full.size else float("nan")
        ph = " ".join(f"{p / np.pi:+.4f}" for p in v.phases)
        k = "?" if theta is None else str(branch_label(v.omega_rot, theta, len(v.phases)))
        lines.append(f"{k:>3} {v.energy:14.8f} {_fmt_c(v.omega):>20} {_fmt_c(v.det):>20} "
                     f"{lam:11.3e} {v.n_flat:4d} {'global' if v.is_global else 'metastable':>10}  {ph}")
    if theta is not None:
        lines.append("(k = branch number: arg e^{i theta_m} Omega nearest (theta + 2 pi k)/Nf)")
    return "\n".join(lines)


def plot_branches(result: BranchScan, ax=None):
    """Plot ``E_k(theta)`` of every branch with global minimum and transitions marked.

    Parameters
    ----------
    result : BranchScan
    ax : matplotlib.axes.Axes, optional
        Axes to draw into (a new figure otherwise).

    Returns
    -------
    matplotlib.axes.Axes
    """
    import matplotlib.pyplot as plt  # optional dependency: imported only when plotting

    if ax is None:
        _, ax = plt.subplots(figsize=(8, 5))
    th = result.thetas
    for k in range(result.n_branches):
        ax.plot(th, result.energies[k], lw=1.0, label=f"k = {result.row_labels(k)}")
    ax.plot(th, result.global_energy, color="k", lw=3.0, alpha=0.6, label="global minimum")
    for j, p in enumerate(result.first_order):
        ax.axvline(p.theta, color="grey", ls="--", lw=0.8,
                   label="first-order point" if j == 0 else None)
        ax.plot([p.theta], [p.energy], "kD", ms=5)
    if result.spinodals:
        ax.plot([s.theta for s in result.spinodals], [s.energy for s in result.spinodals],
                "o", mfc="none", mec="r", ms=7, label="spinodal point")
    ax.set_xlabel("theta")
    ax.set_ylabel("E / site (tree level)")
    ax.set_xlim(th[0], th[-1])
    ticks = np.arange(math.ceil(th[0] / np.pi), math.floor(th[-1] / np.pi) + 1) * np.pi
    ax.set_xticks(ticks)
    ax.set_xticklabels([{0: "0", 1: "pi"}.get(int(round(t / np.pi)), f"{int(round(t / np.pi))}pi")
                        for t in ticks])
    ax.set_title(f"{result.potential.describe()}, placement x={result.placement:g}\n"
                 "tree level, research toy", fontsize=10)
    ax.legend(fontsize=8, loc="best")
    return ax
