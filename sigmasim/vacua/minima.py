r"""Local minima of the tree-level potential: why the diagonal torus suffices, and the search.

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

All of the above is derived here; the numerical cross-check against an unrestricted
minimisation over U(Nf) and a finite-difference Hessian live in the test-suite
(``tests/vacua_checks.py``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from sigmasim.vacua.potential import (TWO_PI, ChiralPotential, _egh, _spectrum, _wrap, _x_to_phases,
                                      diagonal_potential, make_potential)

__all__ = ["Vacuum", "find_local_minima", "large_kappa_vacua"]

# Relative tolerances (times the energy scale of the potential).  Newton
# converges quadratically, so gradients reach ~1e-13 * scale; Hessian
# eigenvalues below TOL_HESS * scale are indistinguishable from zero.
_GTOL_REL = 1e-11
_TOL_HESS_REL = 1e-9
# Two diagonal representatives are the same vacuum if their phases agree to this (rad).
_KEY_TOL = 1e-6


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
