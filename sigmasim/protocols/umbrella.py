"""Umbrella sampling in restrained windows on Dask, joined by WHAM into one free-energy profile.

Each window ``k`` is an exact Markov chain of ``exp(-S - W_k(x))`` with the harmonic restraint
``W_k(x) = spring/2 (x - centre_k)^2`` along a collective variable (``Im omega_h`` by default),
tabulated like every frozen weight (:meth:`sigmasim.protocols.multicanonical.Weight.harmonic`: linear between
bin centres, a wall outside the grid); the WHAM join uses exactly that tabulated function.  Windows
are independent tasks: one Dask task per window (an embedded local cluster, or a running scheduler
given by address), or serially in this process.

Protocol config: an ordinary run config plus a table ``[umbrella]`` (:data:`UMBRELLA_SCHEMA`)::

    [umbrella]
    centres = [-0.4, -0.3, -0.2, -0.1, 0.0, 0.1, 0.2, 0.3, 0.4]
    spring = 400.0          # restraint strength (action units per x^2)
    range = [-0.5, 0.5]     # grid of the restraint table and of the WHAM histogram
    bins = 50
    sweeps = 2000           # measured sweeps per window (after `thermalize`)

Output folder ``<run.output>/<name>/umbrella/``: ``umbrella.json`` (the config and the table, written
first; a folder holding another config's windows is refused), one ``window-NNN.npz`` per window
(x, W(x), the run series, and its parameters; written atomically when the window is complete), and
after the join ``profile.json``, ``profile.csv`` and ``profile.png``.  A re-run skips complete
windows and runs only the missing ones (an interrupted window restarts from its beginning: it has no
checkpoint of its own).  Window ``k`` is seeded with ``SplitMix64(seed + k)`` (a function of the
config's seed and the window index only), so the numbers do not depend on which worker or in which
order the windows run.  Results are a research toy, not a physical prediction.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from sigmasim.errors import ConfigError, RunFileError, SigmasimError

__all__ = ["UMBRELLA_SCHEMA", "umbrella_params", "load_umbrella", "window_seed", "window_weight",
           "run_window", "run_windows", "join_windows", "UmbrellaResult"]

FORMAT = "sigmasim-umbrella"
MANIFEST = "umbrella.json"
_TOY = "research toy, not a physical prediction"

#: key -> (kind, default, meaning)
UMBRELLA_SCHEMA = {
    "variable": ("choice", "im_omega_h", "collective variable: im_omega_h or im_det (see [multicanonical])"),
    "centres": ("centres", None, "window centres x_k (increasing numbers inside range); required"),
    "spring": ("real>0", None, "restraint W_k = spring/2 (x - x_k)^2, added to the action; required"),
    "range": ("range", [-0.5, 0.5], "[low, high]: grid of the restraint table and of the WHAM histogram"),
    "bins": ("int:4:100000", 50, "bins of that grid"),
    "wall": ("real>=0", 10.0, "restraint slope outside the grid, per bin width"),
    "sweeps": ("int:8:1000000000", None, "measured sweeps per window; required"),
    "thermalize": ("int:0:1000000000", 200, "sweeps per window before measuring (Metropolis step tuned there)"),
    "measure_every": ("int:1:1000000", 1, "sweeps between measurements"),
    "overrelax": ("int:0:100", 1, "overrelaxation passes per sweep"),
    "bootstrap": ("int:0:100000", 200, "bootstrap replicas of the WHAM errors"),
    "split": ("real", None, "optional: x that separates the two minima (default: the middle of range)"),
    "workers": ("int:0:4096", 0, "Dask workers of the embedded cluster (0: the cores)"),
    "scheduler": ("str", "", "address of a running Dask scheduler (empty: an embedded local cluster)"),
}
_REQUIRED = ("centres", "spring", "sweeps")


def _num(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def umbrella_params(sub) -> dict:
    """Validate an ``[umbrella]`` table; every key with its default filled in (one-line errors)."""
    from sigmasim.protocols.multicanonical import VARIABLES

    if not isinstance(sub, dict):
        raise ConfigError("[umbrella] must be a table")
    unknown = sorted(set(sub) - set(UMBRELLA_SCHEMA))
    if unknown:
        raise ConfigError(f"unknown key umbrella.{unknown[0]}; valid keys: {', '.join(UMBRELLA_SCHEMA)}")
    for key in _REQUIRED:
        if key not in sub:
            raise ConfigError(f"umbrella.{key} is required ({UMBRELLA_SCHEMA[key][2]})")
    out = {}
    for key, (kind, default, _) in UMBRELLA_SCHEMA.items():
        v = sub.get(key, default)
        where = f"umbrella.{key}"
        if kind == "choice":
            if v not in VARIABLES:
                raise ConfigError(f"{where} must be one of {', '.join(VARIABLES)}, got {v!r}")
        elif kind == "range":
            if not (isinstance(v, list) and len(v) == 2 and all(_num(t) for t in v) and v[0] < v[1]):
                raise ConfigError(f"{where} must be two numbers [low, high] with low < high, got {v!r}")
            v = [float(v[0]), float(v[1])]
        elif kind == "centres":
            if not (isinstance(v, list) and len(v) >= 1 and all(_num(t) for t in v)):
                raise ConfigError(f"{where} must be a non-empty list of finite numbers, got {v!r}")
            v = [float(t) for t in v]
            if any(b <= a for a, b in zip(v[:-1], v[1:])):
                raise ConfigError(f"{where} must be strictly increasing, got {v!r}")
        elif kind.startswith("int:"):
            lo, hi = (int(t) for t in kind[4:].split(":"))
            if not (isinstance(v, int) and not isinstance(v, bool) and lo <= v <= hi):
                raise ConfigError(f"{where} must be an integer in [{lo}, {hi}], got {v!r}")
        elif kind in ("real>0", "real>=0"):
            if not (_num(v) and (v > 0 if kind == "real>0" else v >= 0)):
                raise ConfigError(f"{where} must be a finite number {'> 0' if kind == 'real>0' else '>= 0'}, "
                                  f"got {v!r}")
            v = float(v)
        elif kind == "real":
            if v is not None:
                if not _num(v):
                    raise ConfigError(f"{where} must be a finite number, got {v!r}")
                v = float(v)
        elif kind == "str":
            if not isinstance(v, str):
                raise ConfigError(f"{where} must be a string, got {v!r}")
        out[key] = v
    lo, hi = out["range"]
    outside = [c for c in out["centres"] if not lo <= c <= hi]
    if outside:
        raise ConfigError(f"umbrella.centres {outside[0]} lies outside umbrella.range {out['range']}")
    if out["variable"] == "im_omega_h" and (lo < -1.0 or hi > 1.0):
        raise ConfigError(f"umbrella.range {out['range']} must lie inside [-1, 1] (|Im omega_h| <= 1)")
    if out["sweeps"] // out["measure_every"] < 8:
        raise ConfigError("umbrella.sweeps / umbrella.measure_every must give at least 8 measurements")
    if out["split"] is not None and not lo < out["split"] < hi:
        raise ConfigError(f"umbrella.split {out['split']} must lie inside umbrella.range {out['range']}")
    return out


def load_umbrella(config_path) -> tuple[dict, object, dict]:
    """Read an ``[umbrella]`` protocol TOML: (raw run table without [umbrella], RunConfig, params)."""
    from sigmasim.config import config_from_dict, read_toml
    from sigmasim.protocols.multicanonical import check_config

    raw = read_toml(config_path)
    if not isinstance(raw.get("umbrella"), dict):
        raise ConfigError(f"{config_path} has no [umbrella] table")
    rest = dict(raw)
    params = umbrella_params(rest.pop("umbrella"))
    config = config_from_dict(rest)
    check_config(config, params)
    return rest, config, params


def window_seed(seed: int, k: int) -> int:
    """Seed of window ``k``: SplitMix64 of ``seed + k`` cut to 62 bits (independent streams)."""
    from sigmasim.rng import mix64_int

    return int(mix64_int(int(seed) + int(k) + 1) >> 2)


def window_weight(params: dict, k: int):
    """The tabulated restraint of window ``k`` (:class:`sigmasim.protocols.multicanonical.Weight`)."""
    from sigmasim.protocols.multicanonical import Weight

    lo, hi = params["range"]
    return Weight.harmonic(params["spring"], params["centres"][k], lo, hi, params["bins"], params["wall"])


def _window_path(folder: Path, k: int) -> Path:
    return Path(folder) / f"window-{k:03d}.npz"


def _window_meta(config, params: dict, k: int) -> dict:
    return {"format": FORMAT, "window": k, "centre": params["centres"][k], "spring": params["spring"],
            "physics": config.physics_hash(), "seed": window_seed(config.seed, k),
            "table": {key: params[key] for key in ("variable", "range", "bins", "wall", "sweeps",
                                                   "thermalize", "measure_every", "overrelax")}}


def _read_window(path: Path) -> tuple[dict, dict] | None:
    """(meta, arrays) of a window file, or None if it is not a readable window file."""
    try:
        with np.load(path, allow_pickle=False) as z:
            meta = json.loads(str(z["meta"]))
            arrays = {k: z[k] for k in z.files if k != "meta"}
    except (OSError, ValueError, KeyError, json.JSONDecodeError):
        return None
    return (meta, arrays) if meta.get("format") == FORMAT else None


def _same(meta: dict, want: dict) -> bool:
    keys = ("window", "centre", "spring", "physics", "seed", "table")
    return all(meta.get(k) == want.get(k) for k in keys)


def _write_npz(path: Path, arrays: dict) -> None:
    """Atomic npz (:func:`sigmasim.files.atomic_output`: a temporary name unique to the process, fsync,
    rename; nothing left behind on failure)."""
    from sigmasim.files import atomic_output

    def write(tmp):
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)

    atomic_output(path, write, what="umbrella window")


def run_window(raw: dict, params: dict, k: int, folder: str) -> dict:
    """Run window ``k`` to completion and write its file; the task a Dask worker executes.

    ``raw`` is the run table (the TOML without ``[umbrella]``).  Bad input comes back as a failed
    status (retrying cannot help); anything else is raised (Dask retries the window).
    """
    import numba

    from sigmasim.config import config_from_dict
    from sigmasim.protocols.multicanonical import run_biased

    t0 = time.perf_counter()
    try:
        numba.set_num_threads(1)          # the biased chain is serial; one window per worker core
        config = config_from_dict(raw)
        meta = _window_meta(config, params, k)
        path = _window_path(Path(folder), k)
        if path.exists():
            old = _read_window(path)
            if old is not None and _same(old[0], meta):
                return {"window": k, "status": "done", "error": "", "seconds": 0.0, "skipped": True}
            raise RunFileError(f"{path} exists and is not this window's output; it is left alone")
        wk = dict(raw)
        wk["seed"] = meta["seed"]
        wconf = config_from_dict(wk)
        run = run_biased(wconf, window_weight(params, k), params["sweeps"],
                         measure_every=params["measure_every"], thermalize=params["thermalize"],
                         variable=params["variable"], overrelax=params["overrelax"])
        meta.update(acceptance=run.acceptance, cpu_seconds=run.seconds, measurements=len(run.x))
        arrays = {"x": run.x, "w": run.w, "meta": np.array(json.dumps(meta))}
        for name, v in run.series.items():
            arrays[f"series.{name}"] = np.asarray(v)
        _write_npz(path, arrays)
    except SigmasimError as exc:
        return {"window": k, "status": "failed", "error": str(exc), "seconds": time.perf_counter() - t0}
    return {"window": k, "status": "done", "error": "", "seconds": time.perf_counter() - t0, "skipped": False}


def _prepare_folder(folder: Path, raw: dict, config, params: dict) -> None:
    """Create the folder or check that it holds this config's windows (never touch another's)."""
    manifest = {"format": FORMAT, "physics": config.physics_hash(), "seed": config.seed,
                "umbrella": {k: v for k, v in params.items() if k not in ("workers", "scheduler", "bootstrap",
                                                                          "split")}}
    path = folder / MANIFEST
    if folder.exists() and any(folder.iterdir()):
        try:
            old = json.loads(path.read_text())
        except (OSError, json.JSONDecodeError):
            raise RunFileError(f"{folder} exists and was not written by sigmasim umbrella; "
                               "choose another run name or output folder") from None
        if old != manifest:
            raise RunFileError(f"{folder} holds umbrella windows of another config or [umbrella] table; "
                               "choose another run name or remove that folder") from None
        return
    folder.mkdir(parents=True, exist_ok=True)
    from sigmasim.files import atomic_output

    atomic_output(path, lambda tmp: Path(tmp).write_text(json.dumps(manifest, indent=1)), what="manifest")


def _client(params: dict):
    from sigmasim.cluster import make_client

    return make_client(scheduler=params["scheduler"] or None, threads=1, workers=params["workers"] or None)


def run_windows(raw: dict, config, params: dict, folder: Path, *, serial: bool = False, client=None,
                progress=None) -> list[dict]:
    """Run the windows whose files are missing (one Dask task each, or serially); statuses per window."""
    folder = Path(folder)
    todo, status = [], []
    for k in range(len(params["centres"])):
        path = _window_path(folder, k)
        old = _read_window(path) if path.exists() else None
        if old is not None and _same(old[0], _window_meta(config, params, k)):
            status.append({"window": k, "status": "done", "error": "", "seconds": 0.0, "skipped": True})
            if progress:
                progress(status[-1])
        elif path.exists():
            raise RunFileError(f"{path} is not a window of this config; it is left alone (remove it to rerun)")
        else:
            todo.append(k)
    if not todo:
        return status
    if serial:
        for k in todo:
            status.append(run_window(raw, params, k, str(folder)))
            if progress:
                progress(status[-1])
        return sorted(status, key=lambda s: s["window"])
    own = client is None
    cluster = None
    if own:
        client, cluster, _ = _client(params)
    try:
        from distributed import as_completed

        futs = [client.submit(run_window, raw, params, k, str(folder), pure=False, retries=2,
                              key=f"umbrella-{config.physics_hash()}-{config.seed}-{k}") for k in todo]
        for fut in as_completed(futs):
            try:
                st = fut.result()
            except Exception as exc:          # a worker crashed beyond its retries
                st = {"window": -1, "status": "failed", "error": f"{type(exc).__name__}: {exc}", "seconds": 0.0}
            status.append(st)
            if progress:
                progress(st)
    finally:
        if own:
            client.close()
            if cluster is not None:
                cluster.close()
    return sorted(status, key=lambda s: s["window"])


@dataclass
class UmbrellaResult:
    """The joined profile (:class:`sigmasim.analysis.profile.Profile`), its barrier and the windows."""

    profile: object
    barrier: object
    windows: list
    round_trip_note: str = ""

    def summary(self) -> str:
        lines = [self.profile.summary()]
        if self.barrier is not None:
            lines.append(self.barrier.summary())
        return "\n".join(lines)


def join_windows(folder, params: dict, n_boot: int | None = None, seed: int = 0) -> UmbrellaResult:
    """WHAM over the window files of ``folder`` (all of them must be complete)."""
    from sigmasim.analysis import profile as pr

    folder = Path(folder)
    wins, info = [], []
    for k, c in enumerate(params["centres"]):
        got = _read_window(_window_path(folder, k))
        if got is None:
            raise RunFileError(f"window {k} (centre {c:g}) has no complete file in {folder}; run the windows first")
        meta, arrays = got
        wins.append(pr.Window(arrays["x"], window_weight(params, k), f"x0={c:+.4g}"))
        info.append(meta)
    lo, hi = params["range"]
    edges = np.linspace(lo, hi, params["bins"] + 1)
    prof = pr.wham(wins, edges, n_boot=params["bootstrap"] if n_boot is None else n_boot, seed=seed)
    split = params["split"] if params["split"] is not None else 0.5 * (lo + hi)
    try:
        br = pr.barrier(prof, split=split, half_width=max(2, min(4, params["bins"] // 12)))
    except ValueError as exc:
        prof.notes.append(f"no barrier: {exc}")
        br = None
    return UmbrellaResult(prof, br, info)


def result_dict(res: UmbrellaResult) -> dict:
    p = res.profile

    def clean(a):
        return [None if not np.isfinite(v) else float(v) for v in np.asarray(a, float)]

    out = {"format": FORMAT, "note": _TOY, "method": p.method, "edges": clean(p.edges), "F": clean(p.F),
           "error": clean(p.error), "counts": clean(p.counts), "unvisited": [int(b) for b in p.unvisited],
           "window_f": clean(p.window_f), "windows": p.windows, "sparse": p.sparse, "short": p.short, "notes": p.notes}
    if res.barrier is not None:
        out["barrier"] = {k: {"value": res.barrier.values[k], "error": res.barrier.errors[k]}
                          for k in res.barrier.values}
        out["barrier"]["refined"] = res.barrier.refined
    return json.loads(json.dumps(out, default=lambda o: None if isinstance(o, float) and not math.isfinite(o)
                                 else str(o)))


def write_outputs(res: UmbrellaResult, folder, title: str) -> list[Path]:
    """profile.json, profile.csv and profile.png in ``folder`` (atomic writes)."""
    from sigmasim.analysis.profile import plot_profiles
    from sigmasim.files import atomic_output

    folder = Path(folder)
    p = res.profile
    js = folder / "profile.json"
    atomic_output(js, lambda tmp: Path(tmp).write_text(json.dumps(result_dict(res), indent=1, allow_nan=False)),
                  what="profile")
    rows = ["x_low,x_high,F,error,counts"] + [
        f"{a:.10g},{b:.10g},{f:.10g},{e:.6g},{int(c)}" for a, b, f, e, c in
        zip(p.edges[:-1], p.edges[1:], p.F, p.error, p.counts)]
    csv = folder / "profile.csv"
    atomic_output(csv, lambda tmp: Path(tmp).write_text("\n".join(rows) + "\n"), what="profile table")
    png = plot_profiles({title: p}, folder / "profile.png", title=f"umbrella windows joined by WHAM: {title}")
    return [js, csv, png]
