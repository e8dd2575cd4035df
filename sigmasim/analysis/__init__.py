"""Statistical analysis of Monte Carlo output on plain numpy arrays.

Independent of the simulation engine.  Submodules:

* :mod:`~sigmasim.analysis.gamma` -- Wolff's Gamma method (autocorrelations,
  errors of primary and derived quantities, replica).
* :mod:`~sigmasim.analysis.resampling` -- binning, jackknife, bootstrap.
* :mod:`~sigmasim.analysis.thermalisation` -- burn-in cut.
* :mod:`~sigmasim.analysis.correlators` -- zero-momentum correlators,
  effective masses, correlated cosh fits.
* :mod:`~sigmasim.analysis.channels` -- pion / eta' / sigma operators from the
  run file's time-slice sums, their correlators, tree-level references.
* :mod:`~sigmasim.analysis.report` -- ``sigmasim analyze``: table, JSON, CSV.
* :mod:`~sigmasim.analysis.plots` -- its figures (matplotlib, imported lazily).
"""

from .channels import (
    ChannelData,
    channel_correlator,
    channel_operators,
    gell_mann,
    meson_correlators,
    tree_level,
)
from .correlators import (
    CorrelatorEstimate,
    FitResult,
    WindowScanResult,
    connected_correlator,
    correlator_bootstrap,
    correlator_jackknife,
    cosh_model,
    effective_mass,
    effective_mass_errors,
    fit_correlator,
    fit_cosh,
    scan_fit_windows,
    symmetrise,
)
from .gamma import GammaResult, autocorrelation, gamma_analysis
from .resampling import (
    ResamplingResult,
    auto_bin_size,
    bin_data,
    bootstrap,
    bootstrap_covariance,
    jackknife,
    jackknife_covariance,
    jackknife_means,
)
from .report import RunAnalysis, analyze_data, analyze_run, format_table
from .thermalisation import ThermalisationResult, thermalisation_cut

__all__ = [
    "ChannelData",
    "RunAnalysis",
    "analyze_data",
    "analyze_run",
    "channel_correlator",
    "channel_operators",
    "format_table",
    "gell_mann",
    "meson_correlators",
    "tree_level",
    "CorrelatorEstimate",
    "FitResult",
    "GammaResult",
    "ResamplingResult",
    "ThermalisationResult",
    "WindowScanResult",
    "auto_bin_size",
    "autocorrelation",
    "bin_data",
    "bootstrap",
    "bootstrap_covariance",
    "connected_correlator",
    "correlator_bootstrap",
    "correlator_jackknife",
    "cosh_model",
    "effective_mass",
    "effective_mass_errors",
    "fit_correlator",
    "fit_cosh",
    "gamma_analysis",
    "jackknife",
    "jackknife_covariance",
    "jackknife_means",
    "scan_fit_windows",
    "symmetrise",
    "thermalisation_cut",
]
