"""Independent numerical checks of the vacuum solver (tests only).

:func:`full_hessian_numeric` is a finite-difference Hessian of ``X -> V(U0 exp(i X))`` and
:func:`minimize_unrestricted` minimises the potential over the whole group from Haar-random starts;
neither uses the diagonal reduction of :mod:`sigmasim.vacua.minima`, so they test it.
"""

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg, optimize

from sigmasim.vacua.potential import TWO_PI, ChiralPotential, hermitian_basis, matrix_potential


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
