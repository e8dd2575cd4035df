"""What ``sigmasim info FILE`` prints: a short description of any file the tool writes.

Run files (also those of ``temper``), sweep files, scan indexes (``index.h5`` / ``index.csv``),
the JSON files of ``lifetimes``, ``analyze``, ``export`` and ``synth`` and the CSV of ``analyze``
and ``export``.  A run config is shown as a TOML block of the keys that apply to its model.
"""

from __future__ import annotations

import json
from pathlib import Path

from sigmasim.errors import RunFileError

__all__ = ["info_text", "config_block"]

_METROPOLIS_KEYS = ("metropolis_hits", "target_acceptance", "initial_step", "tune_every")


def _applies(section: str, key: str, d: dict) -> bool:
    from sigmasim import models

    model, updates, run = d.get("model", {}), d.get("updates", {}), d.get("run", {})
    name = f"{section}.{key}"
    if name in models.model_dependent_keys():
        try:
            return name in models.get(model.get("kind", "chiral")).CONFIG_KEYS
        except ValueError:  # not a model: show the key
            return True
    if section == "updates" and key in _METROPOLIS_KEYS:
        return any(s.get("update") == "metropolis" for s in updates.get("schedule", []))
    if section == "run" and key == "start_branch":
        return run.get("start") == "branch"
    return True


def _toml(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_toml(x)}" for k, x in v.items()) + "}"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml(x) for x in v) + "]"
    return repr(v)


def config_block(d: dict) -> str:
    """A config dict (TOML layout) as TOML, without the keys that do not apply to its model."""
    lines = [f"{k} = {_toml(v)}" for k, v in d.items() if not isinstance(v, dict)]
    for section, keys in d.items():
        if not isinstance(keys, dict):
            continue
        shown = {k: v for k, v in keys.items() if _applies(section, k, d)}
        if shown:
            lines.append(f"[{section}]")
            lines += [f"{k} = {_toml(v)}" for k, v in shown.items()]
    return "\n".join(lines)


def _indent(text: str) -> str:
    return "\n".join("  " + ln for ln in text.splitlines())


def _run_file(path: Path) -> str:
    from sigmasim.storage import open_run

    d = open_run(path)
    cfg = d.config
    sweeps = cfg.thermalize + cfg.measurements * cfg.measure_every
    n = len(d)
    sweep = "?" if d.sweep is None else d.sweep  # from the same open as the records
    if d.status == "done":
        status = f"status done, {n} measurements"
    elif d.status == "interrupted":
        status = (f"status interrupted (stopped cleanly): checkpoint at sweep {sweep} of {sweeps}, "
                  f"{n} of {cfg.measurements} measurements; continue with 'sigmasim run CONFIG --resume'")
    elif d.status == "running":
        status = (f"status interrupted or still running (no clean stop recorded): last checkpoint at sweep "
                  f"{sweep} of {sweeps}, {n} of {cfg.measurements} measurements; if no process writes it, "
                  f"continue with 'sigmasim run CONFIG --resume'")
    else:
        status = f"status {d.status}, {n} measurements"
    prov = ", ".join(f"{k} {v}" for k, v in d.provenance.items())
    return "\n".join([f"{path}: sigmasim run file, {status}", "config:", _indent(config_block(cfg.to_dict())),
                      f"provenance: {prov}"])


def _sweep_file(path: Path) -> str:
    from sigmasim.protocols import read_sweep

    s = read_sweep(path)
    n = len(s["steps"].get("theta", ()))
    summ = ", ".join(f"{k} {v:.4g}" if isinstance(v, float) else f"{k} {v}" for k, v in s["summary"].items()
                     if not isinstance(v, list))
    return "\n".join([f"{path}: sigmasim sweep file, {n} theta steps", f"summary: {summ}",
                      "protocol:", _indent(config_block({"hysteresis": s["protocol"]})),
                      "config:", _indent(config_block(s["config"]))])


def _multicanonical_file(path: Path) -> str:
    from sigmasim.storage import read_multicanonical

    data, attrs = read_multicanonical(path)
    protocol = json.loads(attrs.get("protocol", "{}"))
    averages = json.loads(attrs.get("averages", "{}"))
    n = len(data.get("production/x", ()))
    lines = [f"{path}: sigmasim multicanonical file, variable {protocol.get('variable', '?')}, "
             f"{len(data.get('weight/values', ()))} bins, {n} production measurements, "
             f"{attrs.get('round_trips', '?')} round trips"]
    lines.append("canonical averages (reweighted with exp(+W), Gamma-method errors):")
    for k, v in averages.items():
        lines.append(f"  {k}: {v[0]:.6g} +- {v[1]:.2g}")
    barrier = json.loads(attrs.get("barrier", "null") or "null")
    if barrier:
        v, e = barrier["values"], barrier["errors"]
        flags = "" if barrier.get("refined", True) else " [an extremum fell outside its fitting window]"
        if barrier.get("failed_replicas"):
            flags += (f" [{barrier['failed_replicas']} bootstrap replicas left a side without a visited bin: "
                      "errors NaN]")
        lines.append(f"barrier Delta F = {v['barrier']:.4g} +- {e['barrier']:.2g} (saddle at x = "
                     f"{v['x_saddle']:.4g} minus the lower minimum), {v['barrier_mean']:.4g} +- "
                     f"{e['barrier_mean']:.2g} (minus the mean of both minima); F(right) - F(left) = "
                     f"{v['asymmetry']:.4g} +- {e['asymmetry']:.2g}{flags}")
        lines.append(f"  -ln P(x): {attrs.get('profile_method', '?')}")
    elif "barrier" in attrs:
        lines.append("barrier: none (" + "; ".join(json.loads(attrs.get("notes", "[]"))) + ")")
    else:
        lines.append("barrier: not in this file (written by an earlier sigmasim)")
    lines.append("(a research toy, not a physical prediction)")
    lines += ["protocol:", _indent(config_block({"multicanonical": protocol})),
              "config:", _indent(config_block(json.loads(attrs.get("config", "{}"))))]
    return "\n".join(lines)


def _index_h5(path: Path, attrs: dict) -> str:
    from sigmasim.scan import read_index

    cols = read_index(path)
    n = len(next(iter(cols.values()))) if cols else 0
    status = cols.get("status")
    counts = ""
    if status is not None:
        vals, k = __import__("numpy").unique(status, return_counts=True)
        counts = ", ".join(f"{c} {v}" for v, c in zip(vals, k))
    scan = json.loads(attrs.get("scan", "{}"))
    return "\n".join([f"{path}: sigmasim scan index '{scan.get('name', '?')}', {n} points ({counts})",
                      f"axes: product {scan.get('product', {})}, zip {scan.get('zip', {})}",
                      f"columns: {', '.join(cols)}",
                      "base config:", _indent(config_block(json.loads(attrs.get("base_config", "{}"))))])


def _csv(path: Path) -> str:
    import csv

    try:
        with open(path, newline="") as f:
            rows = list(csv.reader(f))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise RunFileError(f"{path}: cannot read as CSV ({type(exc).__name__})") from None
    if not rows:
        raise RunFileError(f"{path}: empty CSV file")
    what = "scan index" if path.name == "index.csv" else "table"
    return f"{path}: CSV {what}, {len(rows) - 1} rows\ncolumns: {', '.join(rows[0])}"


def _json(path: Path) -> str:
    try:
        blob = json.loads(path.read_text())
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise RunFileError(f"{path}: cannot read as JSON ({type(exc).__name__})") from None
    if not isinstance(blob, dict):
        raise RunFileError(f"{path}: not a JSON file sigmasim writes (no object at the top)")
    if "fits" in blob and "tau" in blob:
        what = f"lifetimes: sizes {blob.get('sizes')}, d = {blob.get('d')}"
        lines = [f"{path}: sigmasim {what}"]
        for L, t, e, k in zip(blob.get("sizes", []), blob.get("tau", []), blob.get("tau_error", []),
                              blob.get("n_escaped", [])):
            lines.append(f"  L = {L}: tau = {t:.4g} +- {e:.2g} sweeps ({k} escaped)")
        if isinstance(blob.get("config"), dict):
            lines += ["config:", _indent(config_block(blob["config"]))]
        return "\n".join(lines)
    if "truth" in blob:
        return f"{path}: sigmasim sidecar (export/synth) with truth for: {', '.join(map(str, blob['truth']))}"
    return f"{path}: JSON with keys: {', '.join(map(str, blob))}"


def info_text(path) -> str:
    """The description ``sigmasim info`` prints (a :class:`RunFileError` for a file it cannot read)."""
    path = Path(path)
    if not path.exists():
        raise RunFileError(f"{path} does not exist")
    if path.is_dir():
        raise RunFileError(f"{path} is a folder; give a file in it")
    suffix = path.suffix.lower()
    if suffix == ".json":
        return _json(path)
    if suffix == ".csv":
        return _csv(path)
    if suffix == ".npz":
        import numpy as np

        try:
            with np.load(path) as z:
                arrays = {k: z[k].shape for k in z.files}
        except (OSError, ValueError) as exc:
            raise RunFileError(f"{path}: cannot read as npz ({type(exc).__name__})") from None
        return f"{path}: npz arrays: " + ", ".join(f"{k} {list(s)}" for k, s in arrays.items())
    from sigmasim.protocols import SWEEP_FORMAT
    from sigmasim.scan import INDEX_FORMAT
    from sigmasim.storage import MUCA_FORMAT, hdf5_datasets, hdf5_root_attrs

    try:  # only these, and only plain values
        attrs = hdf5_root_attrs(path, ("format", "sweep", "scan", "base_config"))
    except OSError:
        raise RunFileError(f"{path} is not a readable HDF5, JSON, CSV or npz file") from None
    fmt = attrs.get("format")
    if fmt == SWEEP_FORMAT:
        return _sweep_file(path)
    if fmt == INDEX_FORMAT:
        return _index_h5(path, attrs)
    if fmt == MUCA_FORMAT:
        return _multicanonical_file(path)
    if fmt == "sigmasim-export":
        try:
            shapes = hdf5_datasets(path)
        except Exception:
            raise RunFileError(f"{path}: cannot read the exported arrays") from None
        return f"{path}: sigmasim export (HDF5): " + ", ".join(f"{k} {s}" for k, s in shapes.items())
    return _run_file(path)  # a run file, or a one-line error naming what is wrong
