"""The config reference: every key of a run config and of the protocol tables.

``sigmasim config-reference`` prints :func:`reference_text`; ``--help`` of ``hysteresis``, ``temper``,
``lifetimes`` and ``scan`` ends with :func:`table_help` of its table; the README's tables are this
text.  The meanings live beside the code that checks them (``config.SCHEMA``,
``protocols.SWEEP_SCHEMA``/``TEMPER_SCHEMA``/``LIFETIME_SCHEMA``, ``scan._SCAN_KEYS`` with
``SCAN_MEANINGS`` below).
"""

from __future__ import annotations

import json

__all__ = ["PROTOCOL_TABLES", "TABLE_ALIASES", "SCAN_MEANINGS", "protocol_schema", "table_markdown",
           "table_help", "reference_text"]

#: table -> the command that runs a config with it
PROTOCOL_TABLES = {"hysteresis": "hysteresis", "tempering": "temper", "lifetimes": "lifetimes", "scan": "scan",
                   "multicanonical": "multicanonical", "umbrella": "umbrella"}
#: old table name -> its table (read for one more release)
TABLE_ALIASES = {"sweep": "hysteresis"}

SCAN_MEANINGS = {
    "base": "run config the points start from (relative to the scan file); empty: the scan file's "
            "other tables are the base config",
    "name": "scan name (empty: the scan file's stem)",
    "output": "folder of the scan (empty: <base run.output>/<name>)",
    "retries": "re-runs of a point after an unexpected failure (a worker crash)",
    "workers": "embedded cluster: worker processes (0: one per core)",
    "threads": "numba threads per run (0: cores // workers; 1 on a remote scheduler)",
    "scheduler": "address of a running Dask scheduler (empty: an embedded local cluster)",
    "host": "where the embedded scheduler (and dashboard) listen",
    "dashboard": "the embedded Dask dashboard (needs bokeh)",
    "product": "table of axes: every combination of these, e.g. \"model.theta\" = [2.8, 3.0] or "
               "{start, stop, num}",
    "zip": "table of axes varied together (equal lengths), one more axis of the product",
}


def protocol_schema(table: str) -> dict:
    """key -> (kind, default, meaning) of a protocol table."""
    if table == "scan":
        from sigmasim.scan import _SCAN_KEYS

        return {k: (t.__name__, {} if d is None else d, SCAN_MEANINGS[k]) for k, (t, d) in _SCAN_KEYS.items()}
    if table == "multicanonical":
        from sigmasim.protocols.multicanonical import MUCA_SCHEMA

        return MUCA_SCHEMA
    if table == "umbrella":
        from sigmasim.protocols.umbrella import UMBRELLA_SCHEMA

        return UMBRELLA_SCHEMA
    from sigmasim import protocols

    table = TABLE_ALIASES.get(table, table)
    return {"hysteresis": protocols.SWEEP_SCHEMA, "tempering": protocols.TEMPER_SCHEMA,
            "lifetimes": protocols.LIFETIME_SCHEMA}[table]


def _default(d, meaning: str = "") -> str:
    if d is None:
        return "none" if meaning.startswith("optional") else "required"
    return json.dumps(d)


def table_markdown(table: str) -> str:
    lines = [f"`[{table}]` (`sigmasim {PROTOCOL_TABLES[table]}`):", "",
             "| key | default | meaning |", "| --- | --- | --- |"]
    for key, (_, default, meaning) in protocol_schema(table).items():
        lines.append(f"| `{table}.{key}` | `{_default(default, meaning)}` | {meaning} |")
    return "\n".join(lines)


def table_help(table: str) -> str:
    """Plain text for ``--help``: the keys of ``[table]`` with defaults and meanings."""
    import textwrap

    lines = [f"keys of the [{table}] table (the rest of the file is an ordinary run config):"]
    for key, (_, default, meaning) in protocol_schema(table).items():
        head = f"  {key} = {_default(default, meaning)}"
        lines.append(head)
        lines += textwrap.wrap(meaning, width=92, initial_indent="      ", subsequent_indent="      ")
    return "\n".join(lines)


def reference_text() -> str:
    from sigmasim.config import reference_markdown

    parts = ["Run config (every command):", "", reference_markdown(), "",
             "Protocol tables: a run config plus one of these tables is run by the named command.", ""]
    for table in PROTOCOL_TABLES:
        parts += [table_markdown(table), ""]
    return "\n".join(parts).rstrip()
