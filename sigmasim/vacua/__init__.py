"""Tree-level (classical) vacuum structure of the U(Nf)/SU(Nf) chiral sigma model.

Four concepts, one module each, each importing only the ones before it:

- :mod:`~sigmasim.vacua.potential`: the potential per site, its parameters (``h_f``, ``kappa``,
  ``theta_m``, ``theta_a``, placements of theta), energies on matrices and on the diagonal
  torus, Hessians;
- :mod:`~sigmasim.vacua.minima`: why diagonal ``U`` suffices, and the search for every local
  minimum (:func:`find_local_minima`, :class:`Vacuum`);
- :mod:`~sigmasim.vacua.branches`: the branch-number convention that every module uses
  (:func:`branch_label`, :func:`branch_status`);
- :mod:`~sigmasim.vacua.continuation`: branches followed in theta, first-order, spinodal and CP
  points (:func:`scan_theta`, :class:`BranchScan`, :func:`plot_branches`).

The table printer of the ``vacua`` command lives in :mod:`sigmasim.cli`.  Tree level only:
a research toy, not a physical prediction.
"""

from sigmasim.vacua.branches import (BranchStatus, branch_label, branch_phase, branch_range,
                                     branch_status, canonical_branch, measured_branch,
                                     potential_of_config)
from sigmasim.vacua.continuation import (BranchScan, CPPair, FirstOrderPoint, SpinodalPoint,
                                         plot_branches, scan_theta)
from sigmasim.vacua.minima import Vacuum, find_local_minima, large_kappa_vacua
from sigmasim.vacua.potential import (PLACEMENTS, ChiralPotential, diagonal_potential, full_hessian,
                                      hermitian_basis, make_potential, matrix_potential,
                                      resolve_angles)

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
    "resolve_angles",
    "make_potential",
    "matrix_potential",
    "diagonal_potential",
    "hermitian_basis",
    "full_hessian",
    "find_local_minima",
    "large_kappa_vacua",
    "scan_theta",
    "plot_branches",
]
