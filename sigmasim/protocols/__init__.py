"""Multi-chain protocols on top of :class:`sigmasim.chain.Simulation`, one module each.

- :mod:`~sigmasim.protocols.hysteresis`: theta walked up and down one chain (``sigmasim
  hysteresis``, table ``[hysteresis]``; ``sweep`` and ``[sweep]`` are the old names, accepted for
  one release); its own HDF5 file (format ``sigmasim-sweep``), jumps and loop areas;
- :mod:`~sigmasim.protocols.tempering`: replica exchange over (theta, mass scale) slots with the
  replicas' branch census (``sigmasim temper``, ``[tempering]``);
- :mod:`~sigmasim.protocols.lifetimes`: escape times from a metastable branch against the volume
  (``sigmasim lifetimes``, ``[lifetimes]``; a process pool);
- :mod:`~sigmasim.protocols.common`: a protocol config is a run config plus one table that its
  module validates.

The commands' printing lives in :mod:`sigmasim.cli`.  Research toy, not a physical prediction.
"""

from sigmasim.protocols.common import load_protocol, split_protocol
from sigmasim.protocols.hysteresis import (SWEEP_FORMAT, SWEEP_SCHEMA, SweepParams, SweepResult, load_hysteresis,
                                           plot_sweep, read_sweep, run_sweep, sweep_checkpoint_path,
                                           theta_derivative, tree_level, write_sweep)
from sigmasim.protocols.lifetimes import (LIFETIME_SCHEMA, LifetimeResult, escape_time_fit, fit_log_lifetimes,
                                          lifetime_estimate, load_lifetimes, plot_escape_times, run_lifetimes)
from sigmasim.protocols.tempering import (CENSUS_MIN_CHANGES, TEMPER_SCHEMA, BranchCensus, TemperParams,
                                          TemperResult, branch_census, branch_populations, load_tempering,
                                          replica_configs, run_tempering, temper_checkpoint_path)

__all__ = ["LIFETIME_SCHEMA", "LifetimeResult", "run_lifetimes", "lifetime_estimate", "escape_time_fit",
           "plot_escape_times", "fit_log_lifetimes", "load_lifetimes", "SWEEP_SCHEMA", "TEMPER_SCHEMA",
           "TemperParams", "TemperResult", "run_tempering", "replica_configs",
           "branch_populations", "branch_census", "BranchCensus", "CENSUS_MIN_CHANGES", "SweepParams",
           "SweepResult", "load_protocol", "split_protocol", "load_hysteresis", "load_tempering", "run_sweep",
           "write_sweep", "read_sweep", "plot_sweep", "tree_level", "theta_derivative", "SWEEP_FORMAT",
           "sweep_checkpoint_path", "temper_checkpoint_path"]
