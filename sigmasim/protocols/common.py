r"""What every protocol shares: its config (a run TOML plus one table), threads, a mean with its error.

A protocol config is an ordinary run TOML plus one extra table that this module pops and
validates itself; the rest goes to :func:`sigmasim.config.config_from_dict`.

The three protocols (:mod:`~sigmasim.protocols.hysteresis`, :mod:`~sigmasim.protocols.tempering`,
:mod:`~sigmasim.protocols.lifetimes`) each declare their table's schema beside the code that uses it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from sigmasim.config import RunConfig, _check, _suggest, config_from_dict, read_toml
from sigmasim.errors import ConfigError, RunFileError

__all__ = ["split_protocol", "load_protocol", "h5_output"]


def h5_output(path) -> Path:
    """The ``--out`` of a protocol command as a Path: it must end in .h5, and its folder is created
    (one-line errors: ConfigError, RunFileError)."""
    path = Path(path)
    if path.suffix != ".h5":
        raise ConfigError(f"--out must end in .h5, got {path}")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {path.parent}: {exc.strerror}") from None
    return path


def split_protocol(raw: dict, table: str, schema: dict) -> tuple[dict, dict]:
    """Pop ``[table]`` from a parsed TOML dict and validate it; returns (params, rest)."""
    if not isinstance(raw, dict):
        raise ConfigError("the config must be a TOML table")
    rest = dict(raw)
    if table not in rest:
        raise ConfigError(f"the config has no [{table}] table")
    sub = rest.pop(table)
    if not isinstance(sub, dict):
        raise ConfigError(f"[{table}] must be a table")
    params = {}
    for k, v in sub.items():
        if k not in schema:
            raise ConfigError(f"unknown key '{table}.{k}'{_suggest(k, list(schema))}")
        params[k] = _check(schema[k][0], v, f"{table}.{k}")
    for k, (kind, default, _) in schema.items():
        if k not in params:
            params[k] = _check(kind, default, f"{table}.{k}")
    return params, rest


def load_protocol(path, table: str, schema: dict) -> tuple[RunConfig, dict]:
    """Read a protocol TOML: the validated run config and the validated ``[table]`` params."""
    params, rest = split_protocol(read_toml(path), table, schema)
    return config_from_dict(rest), params


def _mean_err(x):
    from sigmasim.analysis.gamma import gamma_analysis

    x = np.asarray(x, float)
    if len(x) >= 8 and np.ptp(x) > 0:
        try:
            g = gamma_analysis(x)
            return g.value, g.error, g.tau_int
        except Exception:  # degenerate series: fall back to the naive error
            pass
    err = float(np.std(x, ddof=1) / np.sqrt(len(x))) if len(x) >= 2 else float("nan")
    return float(x.mean()), err, 0.5


def _set_threads(config: RunConfig) -> None:
    from sigmasim.threads import set_threads

    set_threads(config.threads, config.volume // 2, config.nf)


def _never(sweep: int) -> bool:
    return False


def sweeps(sim, n: int, measure_due=_never):
    """``n`` more sweeps of ``sim`` through :func:`sigmasim.chain.iterate`, yielding the records.

    ``measure_due(sweep)`` says whether to measure after that sweep (``sim.state.sweep``); the
    records taken are yielded in order.  iterate checks the field for NaN/inf before every sweep
    and when the ``n`` sweeps are done, so a protocol never stores a non-finite field; a protocol
    writes its checkpoints between calls (iterate flags none here).
    """
    from sigmasim.chain import iterate

    for step in iterate(sim, until=sim.state.sweep + n, measure_due=measure_due,
                        checkpoint_every=1 << 62, checkpoint_seconds=float("inf")):
        if step.record is not None:
            yield step.record
