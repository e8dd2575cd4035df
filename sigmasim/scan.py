"""Parameter scans: a grid of ordinary runs executed on Dask, resumable, with one index of results.

A scan file is TOML with a ``[scan]`` table::

    [scan]
    base = "example-u3-theta.toml"   # run config the points start from (relative to this file);
                                     # without it, the scan file's other tables are the base config
    name = "theta-mass"              # default: the scan file's stem
    output = "runs/theta-mass"       # default: <base run.output>/<name>
    retries = 1                      # re-runs of a point after an unexpected failure (a worker crash)
    workers = 0                      # embedded cluster: worker processes (0: one per core)
    threads = 0                      # numba threads per run (0: cores // workers; 1 on a remote scheduler)
    scheduler = ""                   # address of a running Dask scheduler ("" = embedded LocalCluster)
    host = "127.0.0.1"               # where the embedded scheduler (and dashboard) listen
    dashboard = false                # the embedded dashboard (needs bokeh; on host, a free port)

    [scan.product]                   # every combination of these
    "model.theta" = [2.8, 3.0, 3.14159]
    "model.mass" = {start = 0.1, stop = 0.3, num = 3}

    [scan.zip]                       # varied together (equal lengths), one more axis of the product
    seed = [11, 12]

Each point is an ordinary run named ``<label>-<hash>`` (the label lists the point's axis values, the
hash is a stable hash of its whole config) under ``<output>/points/``, so every other command works on
it. Rerunning a scan skips finished points, resumes interrupted ones from their checkpoints and
retries failed ones. The index ``<output>/index.csv`` and ``index.h5`` has one row per point: its
parameters, status, error and the headline observables with Gamma-method errors.
"""

from __future__ import annotations

import csv
import hashlib
import itertools
import json
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sigmasim.config import SCHEMA, _suggest, config_from_dict, read_toml
from sigmasim.errors import ConfigError, RunFileError, SigmasimError

__all__ = ["ScanSpec", "Point", "load_scan", "expand_points", "run_scan", "collect", "HEADLINE"]

INDEX_FORMAT = "sigmasim-scan-index"
INDEX_VERSION = 1
EVENT_TOPIC = "sigmasim-scan"
STOP_FILE = ".stop"
LOCK_FILE = "scan.lock"
FAILURES = "failures.json"

# headline observables of the index: (analysis series name, column name)
HEADLINE = (("action", "action"), ("omega_h.re", "re_omega_h"), ("omega_h.im", "im_omega_h"),
            ("abs_omega", "abs_omega"), ("det.re", "re_det"), ("det.im", "im_det"))

_SCAN_KEYS = {
    "base": (str, ""), "name": (str, ""), "output": (str, ""), "retries": (int, 1), "workers": (int, 0),
    "threads": (int, 0), "scheduler": (str, ""), "host": (str, "127.0.0.1"), "dashboard": (bool, False),
    "product": (dict, None), "zip": (dict, None),
}
# keys the scan itself manages
_NOT_AXES = {"name", "run.output", "run.threads"}


@dataclass(frozen=True)
class ScanSpec:
    """A validated scan file."""

    path: Path
    name: str
    output: Path
    base: dict
    product: dict
    zipped: dict
    retries: int = 1
    workers: int = 0
    threads: int = 0
    scheduler: str = ""
    host: str = "127.0.0.1"
    dashboard: bool = False

    @property
    def axes(self) -> list[str]:
        return list(self.product) + list(self.zipped)


@dataclass
class Point:
    """One point of a scan: its axis values, config and state."""

    label: str
    key: str  # stable hash of the config
    params: dict
    raw: dict | None  # the point's config as a nested dict (None when it does not validate)
    error: str = ""
    status: str = "pending"  # pending | done | partial | failed
    seconds: float = math.nan
    observables: dict = field(default_factory=dict)
    n_measurements: int = 0

    @property
    def name(self) -> str:
        return f"{self.label}-{self.key}"


# ----------------------------------------------------------------------------
# the scan file
# ----------------------------------------------------------------------------


def _check_key(key: str, where: str) -> tuple[str, str]:
    if not isinstance(key, str):
        raise ConfigError(f"{where}: axis names must be strings")
    if key in _NOT_AXES:
        raise ConfigError(f"{where}: '{key}' is set by the scan itself and cannot be an axis")
    section, _, name = key.rpartition(".")
    if section not in SCHEMA:
        raise ConfigError(f"{where}: unknown config section in '{key}'{_suggest(section, [s for s in SCHEMA if s])}")
    if name not in SCHEMA[section]:
        valid = [f"{section}.{k}" if section else k for k in SCHEMA[section]]
        raise ConfigError(f"{where}: unknown config key '{key}'{_suggest(key, valid)}")
    return section, name


def _axis_values(v, where: str) -> list:
    """A list as given, or a range: {start, stop, num} (linspace) or {start, stop, step} (inclusive)."""
    if isinstance(v, list):
        if not v:
            raise ConfigError(f"{where} is empty")
        return list(v)
    if not isinstance(v, dict):
        raise ConfigError(f"{where} must be a list or a range table {{start, stop, num}} / {{start, stop, step}}")
    extra = set(v) - {"start", "stop", "num", "step"}
    if extra:
        raise ConfigError(f"{where}: unknown range key '{sorted(extra)[0]}' (use start, stop and num or step)")
    if "start" not in v or "stop" not in v or ("num" in v) == ("step" in v):
        raise ConfigError(f"{where}: a range needs start, stop and exactly one of num, step")
    nums = [v[k] for k in ("start", "stop", "num", "step") if k in v]
    if not all(isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x) for x in nums):
        raise ConfigError(f"{where}: start, stop, num and step must be finite numbers")
    start, stop = v["start"], v["stop"]
    if "num" in v:
        num = v["num"]
        if not isinstance(num, int) or num < 1 or num > 100_000:
            raise ConfigError(f"{where}: num must be an integer in 1..100000, got {num!r}")
        vals = np.linspace(start, stop, num)
    else:
        step = v["step"]
        n = (stop - start) / step if step != 0 else -1
        if step == 0 or n < -1e-9 or n > 100_000:
            raise ConfigError(f"{where}: step {step!r} does not lead from start to stop in at most 100000 steps")
        vals = start + step * np.arange(int(math.floor(n + 1e-9)) + 1)
    if all(isinstance(x, int) for x in nums):
        return [int(round(x)) for x in vals]
    return [float(x) for x in vals]


def load_scan(path, raw: dict | None = None) -> ScanSpec:
    """Read and validate a scan file (one-line :class:`ConfigError` on any problem); ``raw`` is its
    parsed TOML when the caller has read it already (a pipe can be read only once)."""
    path = Path(path)
    if raw is None:
        raw = read_toml(path)
    scan = raw.get("scan")
    if not isinstance(scan, dict):
        raise ConfigError(f"{path} has no [scan] table (see 'sigmasim scan --help')")
    for k, v in scan.items():
        if k not in _SCAN_KEYS:
            raise ConfigError(f"unknown key 'scan.{k}'{_suggest(k, list(_SCAN_KEYS))}")
        kind = _SCAN_KEYS[k][0]
        ok = isinstance(v, kind) and not (kind is int and isinstance(v, bool))
        if not ok:
            raise ConfigError(f"scan.{k} must be {'a table' if kind is dict else kind.__name__}, got {v!r}")
    opts = {k: scan.get(k, d) for k, (_, d) in _SCAN_KEYS.items()}
    if opts["retries"] < 0 or opts["retries"] > 100:
        raise ConfigError(f"scan.retries must be in 0..100, got {opts['retries']}")
    if opts["workers"] < 0 or opts["threads"] < 0:
        raise ConfigError("scan.workers and scan.threads must be >= 0 (0: choose from the cores)")
    rest = {k: v for k, v in raw.items() if k != "scan"}
    if opts["base"]:
        if rest:
            raise ConfigError(f"{path}: give the base config either as scan.base or as tables in the scan "
                              f"file, not both (found [{sorted(rest)[0]}])")
        bpath = Path(opts["base"])
        if not bpath.is_absolute():
            bpath = path.parent / bpath
        base = read_toml(bpath)
        if "scan" in base:
            raise ConfigError(f"scan.base {bpath} is itself a scan file")
    else:
        base = rest
    for table in ("hysteresis", "sweep", "tempering", "lifetimes", "multicanonical"):
        if table in base:
            raise ConfigError(f"the base config has a [{table}] table: a scan runs plain runs only")
    base_cfg = config_from_dict(base)  # the base must be valid on its own
    product = {}
    for k, v in (opts["product"] or {}).items():
        _check_key(k, "scan.product")
        product[k] = _axis_values(v, f"scan.product.'{k}'")
    zipped = {}
    for k, v in (opts["zip"] or {}).items():
        _check_key(k, "scan.zip")
        if k in product:
            raise ConfigError(f"'{k}' is both in scan.product and scan.zip")
        zipped[k] = _axis_values(v, f"scan.zip.'{k}'")
    if len({len(v) for v in zipped.values()}) > 1:
        lens = ", ".join(f"{k}: {len(v)}" for k, v in zipped.items())
        raise ConfigError(f"scan.zip axes must have equal lengths ({lens})")
    if not product and not zipped:
        raise ConfigError("the scan has no axes: give [scan.product] and/or [scan.zip]")
    name = opts["name"] or path.stem
    if not name or any(c in name for c in "/\\") or name.startswith("."):
        raise ConfigError(f"scan.name {name!r} must be a plain file name")
    output = Path(opts["output"]) if opts["output"] else Path(base_cfg.output) / name
    return ScanSpec(path=path, name=name, output=output, base=base, product=product, zipped=zipped,
                    retries=opts["retries"], workers=opts["workers"], threads=opts["threads"],
                    scheduler=opts["scheduler"], host=opts["host"], dashboard=opts["dashboard"])


# ----------------------------------------------------------------------------
# points
# ----------------------------------------------------------------------------


def _fmt(v, sep=",") -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    if isinstance(v, (list, tuple)):
        return sep.join(_fmt(x) for x in v)
    return str(v)


def _label(params: dict) -> str:
    """Readable part of a point's name, e.g. ``theta3.14159_seed11`` (run names allow [A-Za-z0-9._-])."""
    text = "_".join(f"{k.rpartition('.')[2]}{_fmt(v, '-')}" for k, v in params.items())
    return "".join(c if c.isalnum() or c in "._-" else "-" for c in text.replace("+", ""))[:80]


def _set(raw: dict, key: str, value) -> None:
    section, _, name = key.rpartition(".")
    if section:
        raw[section] = {**raw.get(section, {}), name: value}
    else:
        raw[name] = value


def config_key(cfg) -> str:
    """Stable hash of everything that fixes a run's chain: the run's physics hash without its name
    (so not its folder, thread count, checkpointing, nor ``run.measurements``: raising that and
    rerunning the scan extends every point, as ``--resume`` extends a single run)."""
    d = cfg.physics_dict()
    d.pop("name")
    return hashlib.sha256(json.dumps(d, sort_keys=True).encode()).hexdigest()[:10]


def expand_points(spec: ScanSpec) -> list[Point]:
    """The scan's points in a fixed order (product axes, then the zip group, last axis fastest)."""
    groups = [[{k: v} for v in vals] for k, vals in spec.product.items()]
    if spec.zipped:
        n = len(next(iter(spec.zipped.values())))
        groups.append([{k: vals[i] for k, vals in spec.zipped.items()} for i in range(n)])
    points, seen = [], {}
    for combo in itertools.product(*groups):
        params = {}
        for part in combo:
            params.update(part)
        raw = json.loads(json.dumps(spec.base))  # deep copy of plain TOML data
        for k, v in params.items():
            _set(raw, k, v)
        label = _label(params)
        try:
            cfg = config_from_dict(raw)
        except ConfigError as exc:
            key = hashlib.sha256(json.dumps(params, sort_keys=True, default=str).encode()).hexdigest()[:10]
            points.append(Point(label, key, params, None, error=str(exc), status="failed"))
            continue
        key = config_key(cfg)
        raw["name"] = f"{label}-{key}"
        _set(raw, "run.output", str(spec.output / "points"))
        if key in seen:
            raise ConfigError(f"scan points {seen[key]} and {label} have the same config")
        seen[key] = label
        points.append(Point(label, key, params, raw))
    return points


def _file_of(p: Point, spec: ScanSpec) -> Path:
    return spec.output / "points" / p.name / f"{p.name}.h5"


def file_status(path: Path, measurements: int | None = None) -> tuple[str, int]:
    """('done' | 'partial' | 'pending' | 'failed', measurements) of a point's run file; done means
    complete with at least ``measurements`` records (default: what the file itself asked for)."""
    from sigmasim.storage import open_run

    if not path.exists():
        return "pending", 0
    try:
        d = open_run(path)
    except SigmasimError:
        return "failed", 0
    n = len(d)
    if d.status == "complete" and n >= (d.config.measurements if measurements is None else measurements):
        return "done", n
    return "partial", n


def _status(p: Point, spec: ScanSpec) -> tuple[str, int]:
    """A point's status from its run file, against the measurements the scan asks for now."""
    return file_status(_file_of(p, spec), config_from_dict(p.raw).measurements)


# ----------------------------------------------------------------------------
# what runs on a worker
# ----------------------------------------------------------------------------


class _EventSink:
    """Run sink that reports a point's sweep count to the scan's client, about once a second."""

    def __init__(self, key: str):
        self.key = key
        self.last = 0.0
        try:
            from distributed import get_worker

            self.worker = get_worker()
        except (ImportError, ValueError):
            self.worker = None

    def _send(self, sim, force=False):
        now = time.monotonic()
        if self.worker is None or (not force and now - self.last < 1.0):
            return
        self.last = now
        self.worker.log_event(EVENT_TOPIC, {"key": self.key, "sweep": int(sim.state.sweep),
                                            "total": int(sim.total_sweeps)})

    def start(self, sim):
        self._send(sim, force=True)

    def record(self, sim, record):
        self._send(sim)

    def checkpoint(self, sim):
        pass

    def finish(self, sim):
        self._send(sim, force=True)


class _StopFile:
    """Polled each sweep; looks for the scan's stop file at most once a second."""

    def __init__(self, path: str):
        self.path = path
        self.last = 0.0
        self.seen = False

    def __call__(self) -> bool:
        now = time.monotonic()
        if not self.seen and now - self.last >= 1.0:
            self.last = now
            self.seen = os.path.exists(self.path)
        return self.seen


def run_point(raw: dict, threads: int, stop_file: str) -> dict:
    """Run (or resume) one point to completion in this process; the task each worker executes.

    Bad input and damaged files (:class:`SigmasimError`) come back as a failed status (retrying
    cannot help); anything else is raised so that Dask retries the point.
    """
    import numba

    from sigmasim.chain import Interrupted
    from sigmasim.run import execute_run

    t0 = time.perf_counter()
    if os.path.exists(stop_file):  # the scan is stopping: leave a point that has not started alone
        return {"status": "pending", "error": "not started (scan interrupted)", "seconds": 0.0}
    try:
        numba.set_num_threads(max(1, min(threads, numba.config.NUMBA_NUM_THREADS)))
        cfg = config_from_dict(raw)
        execute_run(cfg, resume=cfg.run_file.exists(), quiet=True, should_stop=_StopFile(stop_file),
                    sinks=(_EventSink(config_key(cfg)),))
    except Interrupted as exc:
        return {"status": "partial", "error": f"stopped at sweep {exc.args[0]}", "seconds": time.perf_counter() - t0}
    except SigmasimError as exc:
        return {"status": "failed", "error": str(exc), "seconds": time.perf_counter() - t0}
    return {"status": "done", "error": "", "seconds": time.perf_counter() - t0}


# ----------------------------------------------------------------------------
# the client
# ----------------------------------------------------------------------------


def make_client(spec: ScanSpec, scheduler: str | None = None, workers: int | None = None,
                threads: int | None = None):
    """(client, cluster or None, numba threads per run) for a scan (:func:`sigmasim.cluster.make_client`
    with the scan's settings)."""
    from sigmasim.cluster import make_client as _make

    return _make(scheduler=spec.scheduler if scheduler is None else scheduler,
                 workers=spec.workers if workers is None else workers,
                 threads=spec.threads if threads is None else threads,
                 host=spec.host, dashboard=spec.dashboard)


def _write_failures(spec: ScanSpec, points: list[Point]) -> None:
    fails = {p.key: {"label": p.label, "error": p.error} for p in points if p.status == "failed"}
    _atomic_write(spec.output / FAILURES, json.dumps(fails, indent=1))


def _read_failures(spec: ScanSpec) -> dict:
    try:
        d = json.loads((spec.output / FAILURES).read_text())
        return d if isinstance(d, dict) else {}
    except (OSError, ValueError):
        return {}


def _atomic_write(path: Path, text: str) -> None:
    from sigmasim.files import atomic_text  # per-process temporary name; removed on failure

    atomic_text(path, text, what="scan file")


class _Display:
    """The scan's tqdm bar (points done / failed / running) and a live line for the running points."""

    def __init__(self, total: int, initial: int, disable: bool):
        from tqdm import tqdm

        self.bar = tqdm(total=total, initial=initial, desc="scan", unit="point", disable=disable or None,
                        dynamic_ncols=True)
        self.line = tqdm(total=0, bar_format="{desc}", position=1, disable=disable or None, leave=False)
        self.counts = {"done": initial, "failed": 0, "running": 0, "queued": 0}
        self.sweeps: dict = {}
        self.quiet = disable

    def write(self, text: str, always: bool = False) -> None:
        if always or not self.quiet:
            self.bar.write(text)

    def refresh(self, submitted: dict) -> None:
        """``submitted``: key -> label of the points not finished yet; those that have reported a
        sweep are running, the others queued."""
        running = {k: v for k, v in submitted.items() if k in self.sweeps}
        self.counts["running"] = len(running)
        self.counts["queued"] = len(submitted) - len(running)
        self.bar.set_postfix(self.counts, refresh=False)
        parts = [f"{label} {self.sweeps[key][0]}/{self.sweeps[key][1]}" for key, label in list(running.items())[:4]]
        more = f" (+{len(running) - 4})" if len(running) > 4 else ""
        self.line.set_description_str("running: " + ", ".join(parts) + more if parts else "")
        self.bar.refresh()

    def close(self) -> None:
        self.line.close()
        self.bar.close()


def _interrupt_on_signals() -> dict:
    """SIGINT and SIGTERM (what a batch system sends) become KeyboardInterrupt in the client."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return {}

    def handler(signum, frame):
        raise KeyboardInterrupt

    return {s: signal.signal(s, handler) for s in (signal.SIGINT, signal.SIGTERM)}


def _restore(handlers: dict) -> None:
    import signal

    for s, h in handlers.items():
        signal.signal(s, h)


def run_scan(spec: ScanSpec, scheduler: str | None = None, workers: int | None = None,
             threads: int | None = None, quiet: bool = False) -> list[Point]:
    """Run every point not finished yet on Dask; returns the points with their status.

    A failing point is reported and never stops the others. On Ctrl-C the running points are
    asked to checkpoint and stop (they stay resumable) and :class:`KeyboardInterrupt` is re-raised.
    """
    points = expand_points(spec)
    try:
        (spec.output / "points").mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create {spec.output / 'points'}: {exc.strerror}") from None
    lock = _take_lock(spec)
    try:
        return _run_locked(spec, points, scheduler, workers, threads, quiet)
    finally:
        from sigmasim.storage import release_lock

        release_lock(lock)


def _take_lock(spec: ScanSpec) -> Path:
    """``<output>/scan.lock`` (an flock held for the life of the scan, naming host and pid): two scans
    never write the same points at once, even when they start at the same instant."""
    from sigmasim.storage import take_lock

    return take_lock(spec.output / LOCK_FILE, "scan", spec.output)


def _run_locked(spec, points, scheduler, workers, threads, quiet) -> list[Point]:
    stop = spec.output / STOP_FILE
    stop.unlink(missing_ok=True)
    todo = []
    for p in points:
        if p.raw is None:
            continue
        p.status, p.n_measurements = _status(p, spec)
        if p.status != "done":
            todo.append(p)
    disp = _Display(len(points), sum(p.status == "done" for p in points), quiet)
    for p in points:
        if p.raw is None:
            disp.counts["failed"] += 1
            disp.write(f"FAILED {p.label}: {p.error}", always=True)
    if not todo:
        disp.refresh({})
        disp.close()
        _write_failures(spec, points)
        return points
    client, cluster, nthreads = make_client(spec, scheduler, workers, threads)
    running: dict = {}
    old_handlers = _interrupt_on_signals()

    def on_event(event):
        msg = event[1] if isinstance(event, tuple) else event
        if isinstance(msg, dict) and "key" in msg:
            disp.sweeps[msg["key"]] = (msg["sweep"], msg["total"])

    try:
        from distributed import as_completed

        client.subscribe_topic(EVENT_TOPIC, on_event)
        futures = {}
        for p in todo:
            fut = client.submit(run_point, p.raw, nthreads, str(stop), key=f"sigmasim-point-{p.key}",
                                pure=False, retries=spec.retries)
            futures[fut] = p
            running[p.key] = p.label
        pending = as_completed(futures)
        try:
            while True:
                batch = pending.next_batch(block=False) if pending.count() else None
                if batch is None:
                    break
                for fut in batch:
                    _finish(futures[fut], fut, disp, spec)
                    running.pop(futures[fut].key, None)
                disp.refresh(running)
                if not batch:
                    time.sleep(0.3)
        except KeyboardInterrupt:
            disp.write("sigmasim: interrupted; asking the running points to checkpoint ...", always=True)
            try:
                stop.touch()
                deadline = time.monotonic() + 60
                while time.monotonic() < deadline and not all(f.done() for f in futures):
                    time.sleep(0.2)
            except KeyboardInterrupt:
                pass
            raise
    finally:
        _restore(old_handlers)
        disp.close()
        try:
            client.close()
            if cluster is not None:
                cluster.close()
        except Exception:  # shutting down a half-dead cluster must not hide the real outcome
            pass
        stop.unlink(missing_ok=True)
    _write_failures(spec, points)
    return points


def _finish(p: Point, fut, disp: _Display, spec: ScanSpec) -> None:
    try:
        res = fut.result()
    except Exception as exc:  # the task raised (after its retries) or its worker died
        res = {"status": "failed", "error": f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"}
    p.status, p.error = res["status"], res.get("error", "")
    p.seconds = res.get("seconds", math.nan)
    if p.status == "done":
        disp.counts["done"] += 1
        disp.bar.update(1)
        disp.write(f"done   {p.label} ({p.seconds:.1f} s)")
    elif p.status == "failed":
        disp.counts["failed"] += 1
        disp.write(f"FAILED {p.label}: {p.error}", always=True)
    elif p.status == "partial":
        disp.write(f"partial {p.label}: {p.error}")


# ----------------------------------------------------------------------------
# the index
# ----------------------------------------------------------------------------


def collect(spec: ScanSpec, points: list[Point] | None = None) -> tuple[list[Point], Path, Path]:
    """Write ``index.csv`` and ``index.h5``: one row per point with parameters, status and headline
    observables (mean, Gamma-method error, tau_int). Returns (points, csv path, h5 path)."""
    from sigmasim.analysis.report import analyze_run

    if points is None:
        points = expand_points(spec)
        fails = _read_failures(spec)
        for p in points:
            if p.raw is not None:
                p.status, p.n_measurements = _status(p, spec)
                if p.status != "done" and p.key in fails:
                    p.status, p.error = "failed", fails[p.key].get("error", "")
    for p in points:
        p.observables = {}
        if p.raw is None:
            continue
        path = _file_of(p, spec)
        st, p.n_measurements = _status(p, spec)
        if p.status != "failed":
            p.status = st
        if st in ("done", "partial") and p.n_measurements > 0:
            try:
                ra = analyze_run(path, masses=False)
            except SigmasimError as exc:
                p.status, p.error = "failed", str(exc)
                continue
            for series, col in HEADLINE:
                s = ra.series.get(series)
                if s is not None:
                    p.observables[col] = (s.mean, s.error, s.tau_int)
    columns, rows = _rows(spec, points)
    spec.output.mkdir(parents=True, exist_ok=True)
    csv_path, h5_path = spec.output / "index.csv", spec.output / "index.h5"
    _write_csv(csv_path, columns, rows)
    _write_h5(h5_path, columns, rows, spec)
    return points, csv_path, h5_path


def _rows(spec: ScanSpec, points: list[Point]) -> tuple[list[str], list[list]]:
    columns = ["label", "key", *spec.axes, "status", "error", "n_measurements", "file"]
    for _, col in HEADLINE:
        columns += [col, f"{col}_err", f"{col}_tau"]
    rows = []
    for p in points:
        row = [p.label, p.key, *(p.params[a] for a in spec.axes), p.status, p.error, p.n_measurements,
               str(_file_of(p, spec)) if p.raw is not None else ""]
        for _, col in HEADLINE:
            row += list(p.observables.get(col, (math.nan, math.nan, math.nan)))
        rows.append(row)
    return columns, rows


def _cell(v) -> str:
    if isinstance(v, float):
        return repr(v)  # round-trips exactly
    if isinstance(v, (list, tuple)):
        return json.dumps(v)
    return str(v)


def _write_csv(path: Path, columns, rows) -> None:
    from sigmasim.files import atomic_output  # per-process temporary name; removed on failure

    def write(tmp):
        with open(tmp, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(columns)
            for r in rows:
                w.writerow([_cell(v) for v in r])

    atomic_output(path, write, what="scan index")


def _write_h5(path: Path, columns, rows, spec: ScanSpec) -> None:
    from sigmasim.storage import TEXT_DTYPE as text
    from sigmasim.storage import atomic_hdf5  # built in memory, then a per-process temporary name

    def write(f):
        f.attrs["format"] = INDEX_FORMAT
        f.attrs["version"] = INDEX_VERSION
        f.attrs["scan"] = json.dumps({"name": spec.name, "product": spec.product, "zip": spec.zipped})
        f.attrs["base_config"] = json.dumps(spec.base)
        f.attrs["note"] = "research toy, not a physical prediction"
        g = f.create_group("index")
        g.attrs["columns"] = json.dumps(columns)
        for i, col in enumerate(columns):
            vals = [r[i] for r in rows]
            if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
                g.create_dataset(col, data=np.asarray(vals, dtype=float if any(
                    isinstance(v, float) for v in vals) else np.int64))
            else:
                g.create_dataset(col, data=[_cell(v) for v in vals], dtype=text)

    atomic_hdf5(path, write, what="scan index")


def read_index(path) -> dict:
    """The columns of an ``index.h5`` as a dict of numpy arrays (one-line error on a foreign file)."""
    from sigmasim.storage import read_columns

    return read_columns(path, INDEX_FORMAT, "index", "sigmasim scan index")


def format_index(spec: ScanSpec, points: list[Point]) -> str:
    from sigmasim.analysis.report import fmt_err

    axes = spec.axes
    head = "".join(f"{a.rpartition('.')[2]:>12}" for a in axes) + f"{'status':>9}{'<S>/V':>18}" \
        f"{'Im Omega_h':>18}{'|Omega|':>18}"
    lines = [head, "-" * len(head)]
    for p in points:
        cells = "".join(f"{_fmt(p.params[a])[:11]:>12}" for a in axes) + f"{p.status:>9}"
        for col in ("action", "im_omega_h", "abs_omega"):
            o = p.observables.get(col)
            cells += f"{fmt_err(o[0], o[1]) if o else '-':>18}"
        lines.append(cells)
    return "\n".join(lines)


#: axis and column names of the scan figure in words
_AXIS_WORDS = {"model.theta": r"vacuum angle $\theta$", "model.mass": "quark mass h", "model.beta": r"coupling $\beta$",
               "model.kappa": r"anomaly coupling $\kappa$", "model.nf": r"flavours $N_f$", "seed": "seed",
               "lattice.shape": "lattice"}
_OBSERVABLE_WORDS = {"action": "action per site <S>/V", "re_omega_h": r"Re $\Omega_h$ (condensate)",
                     "im_omega_h": r"Im $\Omega_h$ ($\eta'$ direction)", "abs_omega": r"$|\Omega|$",
                     "re_det": r"Re det $U$", "im_det": r"Im det $U$"}


def plot_index(spec: ScanSpec, points: list[Point], observable: str, x: str | None = None) -> Path:
    """Draw one observable against axis ``x``, one curve per value of the other axes (seeds averaged)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    cols = [c for _, c in HEADLINE]
    if observable not in cols:
        raise ConfigError(f"--plot: unknown observable {observable!r}{_suggest(observable, cols)}")
    x = x or spec.axes[0]
    if x not in spec.axes:
        raise ConfigError(f"--x {x!r} is not an axis of this scan{_suggest(x, spec.axes)}")
    others = [a for a in spec.axes if a != x and a != "seed"]
    curves: dict = {}
    for p in points:
        o = p.observables.get(observable)
        if not o or not np.isfinite(o[0]):
            continue
        key = tuple(_fmt(p.params[a]) for a in others)
        curves.setdefault(key, {}).setdefault(float(np.real(p.params[x])), []).append((o[0], o[1]))
    if not curves:
        raise ConfigError(f"no finished point has {observable} yet")
    from sigmasim.analysis.plots import pi_ticks

    fig, ax = plt.subplots(figsize=(7, 4.5))
    all_x = []
    for key, by_x in sorted(curves.items()):
        xs = sorted(by_x)
        all_x += xs
        ys = [np.mean([v for v, _ in by_x[t]]) for t in xs]
        es = [math.sqrt(sum(e * e for _, e in by_x[t])) / len(by_x[t]) for t in xs]  # mean over seeds
        lab = ", ".join(f"{_AXIS_WORDS.get(a, a.rpartition('.')[2])} = {k}" for a, k in zip(others, key)) or None
        # markers only: a line between two points would draw a jump (first-order point) as a slope
        ax.errorbar(xs, ys, yerr=es, marker="o", ms=4, capsize=2, ls="none", label=lab)
    if x == "model.theta" and min(all_x) <= math.pi <= max(all_x):
        ax.axvline(math.pi, color="0.5", lw=0.8, ls=":", label=r"$\theta = \pi$")
    if x == "model.theta":
        pi_ticks(ax, min(all_x), max(all_x))
    ax.set_xlabel(_AXIS_WORDS.get(x, x))
    ax.set_ylabel(_OBSERVABLE_WORDS.get(observable, observable))
    ax.set_title(f"scan {spec.name} (research toy, not a physical prediction)", fontsize=9)
    if any(k for k in curves) or x == "model.theta":
        ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    fig.tight_layout()
    out = spec.output / f"index-{observable}.png"
    fig.savefig(out, dpi=130, bbox_inches="tight")
    fig.savefig(out.with_suffix(".pdf"), bbox_inches="tight")
    plt.close(fig)
    return out
