"""Models: what a field is, what a run records about it and how it is updated.

A model is one module of this package; :func:`get` returns it by its ``model.kind`` name.  The
chain (:mod:`sigmasim.chain`), the run file (:mod:`sigmasim.storage`) and the exports ask the model,
never test ``kind`` themselves.  Adding a model = one module + one line in ``_MODULES``.

The contract: a model module defines

``KIND``
    its ``model.kind`` name.
``SERIES``
    the time series a run file stores: name -> (kind, description), kind one of ``int``, ``real``,
    ``complex``, ``complex_nf`` ((nf,) complex per record).  Every record :func:`measure` returns
    holds these keys (plus ``sweep``, ``accept_metropolis``, ``accept_phase``, which the chain adds).
``SLICES``
    the per-time-slice sums a run file stores: name -> (kind, description), kind ``matrix``
    ((T, nf, nf) complex), ``complex`` ((T,) complex) or ``real`` ((T,) float); a record holds them
    as ``slices/<name>``.
``FIELD_SLICE``
    the name in SLICES of the per-slice sums of the field matrix (correlators are built from it).
``FIELD_TEX``
    the field's symbol in figure labels (matplotlib mathtext).
``describe(config, h) -> str``
    the model and its couplings in one line (``h``: the masses, formatted).
``VERSION1_NAMES``
    run-file format version 1 name -> current name of a record (``series/...``, ``slices/...``);
    ``VERSION1_DROPPED``: version-1 records that are no longer written.
``CONVENTIONS``
    one paragraph: the action and the sign conventions (stored in run files and exports).
``CONFIG_KEYS``
    the ``section.key`` config keys of the model-dependent part of the schema that this model
    reads (``sigmasim info`` shows only these of them).
``ANOMALY``
    the config attribute of the determinant coupling (``kappa``, ``c``).
``CHIRAL_POTENTIAL``
    whether the tree-level chiral potential of :mod:`sigmasim.vacua` describes the model.
``UNITARY``
    whether the field must be unitary (a checkpoint's field is checked before a kernel sees it).
``STEP_MAX``
    the largest Metropolis step the tuning may reach.
``UPDATES``
    update name -> ``fn(sim) -> (accepted, tried)``: one update over both colours; it advances
    ``sim.state.step`` by one per colour (the random-number key counter).
``initial_field(config, lattice) -> (re, im)``
    the start field (``run.start``), float64 arrays (nf*nf, V).
``measure(sim) -> dict``
    one record of the current field (reads ``sim.state``; draws no random numbers).
``project(sim) -> float | None``
    the after-sweep projection every ``reunitarize_every`` sweeps (returns the largest drift it
    corrected), or None for a model without one.
"""

from __future__ import annotations

import importlib
from types import ModuleType

__all__ = ["get", "kinds", "model_dependent_keys"]

_MODULES = {
    "chiral": "sigmasim.models.chiral",
    "linear": "sigmasim.models.linear",
}


def kinds() -> tuple[str, ...]:
    """The model names (values of ``model.kind``)."""
    return tuple(_MODULES)


def get(kind: str) -> ModuleType:
    """The model module of ``kind`` (``config.kind``)."""
    try:
        name = _MODULES[kind]
    except KeyError:
        raise ValueError(f"unknown model kind {kind!r}; known: {', '.join(_MODULES)}") from None
    return importlib.import_module(name)


def model_dependent_keys() -> frozenset:
    """The config keys (``section.key``) that some model reads and another does not."""
    sets = [frozenset(get(k).CONFIG_KEYS) for k in kinds()]
    return frozenset().union(*sets) - frozenset.intersection(*sets)
