r"""Branch numbers: the one convention of the package for naming a vacuum.

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
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from sigmasim.vacua.minima import find_local_minima
from sigmasim.vacua.potential import TWO_PI, ChiralPotential, make_potential

__all__ = ["branch_range", "canonical_branch", "branch_label", "branch_phase", "BranchStatus",
           "measured_branch", "potential_of_config", "branch_status"]


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
    from sigmasim import models

    if not models.get(config.kind).CHIRAL_POTENTIAL:
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
