"""The run file: HDF5 layout, crash-safe writer and reader (the only h5py import).

Layout of ``<output>/<name>/<name>.h5`` (format ``sigmasim-run``, version 1)::

    /                    attrs: format, format_version, config (JSON), physics_hash,
                                status (running|interrupted|complete), n_meas, sweep
    /provenance          attrs: sigmasim, git_commit, python, numpy, numba, h5py,
                                seed, created, updated, wall_seconds
    /series/<name>       (n,) float64 | complex128 | int64, or (n, nf) complex128;
                         attrs: description, convention
    /slices/U            (n, T, nf, nf) complex128: per-time-slice sums of U_x
    /slices/det          (n, T) complex128: per-time-slice sums of det U_x
    /state/re, /state/im (nf*nf, V) float64: the field at the last checkpoint
                         (checkerboard site order, component a*nf + b)
    /state               attrs: step, sweep, n_meas, step_size, ... (ChainState scalars),
                         win_acc, win_tried

Time series are chunked and resizable along the first axis.  Records stay in
memory between checkpoints; a checkpoint copies the file, appends to the copy,
flushes and fsyncs it and then renames it over the original (write new, flush,
then switch), so a crash at any moment leaves the previous complete file.
Nothing is ever unpickled: strings are JSON.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import shutil
import subprocess
import time
from pathlib import Path

import h5py
import numpy as np

from sigmasim import __version__
from sigmasim.chain import SERIES, SLICES, ChainState
from sigmasim.config import RunConfig, config_from_dict
from sigmasim.errors import ConfigError, RunFileError, SigmasimError

__all__ = ["RunWriter", "RunData", "open_run", "read_state", "FORMAT", "FORMAT_VERSION",
           "check_writable"]

FORMAT = "sigmasim-run"
FORMAT_VERSION = 1


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _git_commit() -> str:
    here = Path(__file__).resolve().parent
    try:
        out = subprocess.run(["git", "rev-parse", "HEAD"], cwd=here, capture_output=True, text=True,
                             timeout=5)
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    return out.stdout.strip() if out.returncode == 0 else "unknown"


def _provenance(config: RunConfig) -> dict:
    import numba

    return {
        "sigmasim": __version__,
        "git_commit": _git_commit(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "numba": numba.__version__,
        "h5py": h5py.__version__,
        "seed": config.seed,
    }


def check_writable(path: Path, need_bytes: int) -> None:
    """Fail early when the run folder cannot be created or written, or the disk is too full."""
    folder = path.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {folder}: {exc.strerror}") from None
    if not os.access(folder, os.W_OK):
        raise RunFileError(f"the output folder {folder} is not writable")
    free = shutil.disk_usage(folder).free
    if free < need_bytes:
        raise RunFileError(
            f"not enough free disk space in {folder}: need about {need_bytes / 2**20:.0f} MiB, "
            f"{free / 2**20:.0f} MiB free"
        )


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


def _open_checked(path: Path, mode: str = "r") -> h5py.File:
    path = Path(path)
    if not path.exists():
        raise RunFileError(f"{path} does not exist")
    if not path.is_file():
        raise RunFileError(f"{path} is not a file")
    try:
        f = h5py.File(path, mode)
    except Exception:  # OSError for truncated/foreign files; never let h5py's text through
        raise RunFileError(f"{path} is not a readable HDF5 file (truncated or damaged?)") from None
    try:
        fmt = f.attrs.get("format")
        if isinstance(fmt, bytes):
            fmt = fmt.decode("utf-8", "replace")
        if not isinstance(fmt, str) or fmt != FORMAT:
            raise RunFileError(f"{path} is not a sigmasim run file")
        v = f.attrs.get("format_version")
        if not (isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))
                and int(v) == FORMAT_VERSION):
            shown = v if isinstance(v, (int, np.integer, float, str, bytes)) else type(v).__name__
            raise RunFileError(f"{path} has format version {shown!r}; this sigmasim reads version "
                               f"{FORMAT_VERSION}")
    except RunFileError:
        f.close()
        raise
    except Exception as exc:  # attributes of a damaged file can fail to decode
        f.close()
        raise RunFileError(f"{path} has damaged attributes ({_one_line(exc)})") from None
    return f


def _stored_config(f: h5py.File, path) -> RunConfig:
    try:
        text = f.attrs["config"]
        if isinstance(text, bytes):
            text = text.decode("utf-8")
        if not isinstance(text, str):
            raise TypeError(f"the config attribute is {type(text).__name__}, not a JSON string")
        raw = json.loads(text)
        return config_from_dict(raw)
    except (KeyError, ValueError, TypeError, ConfigError, RecursionError, OSError) as exc:
        raise RunFileError(f"{path} holds no valid config ({_one_line(exc)})") from None


def record_kinds(cfg: RunConfig) -> tuple[dict, dict]:
    """The model's records: (series name -> (kind, description), slice name -> (dtype, shape, description)).

    The chiral model records :data:`chain.SERIES` and :data:`chain.SLICES`; the
    linear model adds its radial terms (``sigmasim.linear.LINEAR_EXTRA``).
    """
    nf, t = cfg.nf, cfg.shape[0]
    series = dict(SERIES)
    slices = {"U": (np.complex128, (t, nf, nf), SLICES["U"][1]),
              "det": (np.complex128, (t,), SLICES["det"][1])}
    if getattr(cfg, "kind", "chiral") == "linear":
        from sigmasim.linear import LINEAR_EXTRA

        for name, (kind, desc) in LINEAR_EXTRA.items():
            if name.startswith("slices/"):
                slices[name[7:]] = (np.float64, (t,), desc)
            else:
                series[name] = (kind, desc)
    return series, slices


def _series_dtype(kind):
    return np.dtype({"int": np.int64, "real": np.float64}.get(kind, np.complex128))


def _layout(cfg: RunConfig) -> dict:
    """Every dataset of the run file: path -> (numpy dtype, shape per record or None for /state)."""
    nf = cfg.nf
    series, slices = record_kinds(cfg)
    out = {}
    for name, (kind, _) in series.items():
        out[f"series/{name}"] = (_series_dtype(kind), (nf,) if kind == "complex_nf" else ())
    for name, (dtype, shape, _) in slices.items():
        out[f"slices/{name}"] = (np.dtype(dtype), shape)
    return out


def _dataset(f: h5py.File, key: str, path, dtype: np.dtype) -> h5py.Dataset:
    """The dataset ``key`` after checking it is a plain numeric array of ``dtype``'s kind.

    Only numeric arrays are ever read: an object, string, opaque, compound or
    reference dtype is refused before any data is touched.
    """
    obj = f.get(key)
    if obj is None:
        raise RunFileError(f"{path} is damaged: /{key} is missing")
    if not isinstance(obj, h5py.Dataset):
        raise RunFileError(f"{path} is damaged: /{key} is not a dataset")
    dt = obj.dtype
    if dt.kind != np.dtype(dtype).kind or dt.itemsize != np.dtype(dtype).itemsize or dt.fields:
        raise RunFileError(f"{path} is damaged: /{key} has dtype {dt}, expected {np.dtype(dtype)}")
    return obj


def _check_file(f: h5py.File, path, cfg: RunConfig) -> int:
    """Check the whole layout against ``cfg``; returns the number of records."""
    try:
        n_meas = f.attrs["n_meas"]
        sweep = f.attrs["sweep"]
        if not all(isinstance(x, (int, np.integer)) for x in (n_meas, sweep)):
            raise TypeError("n_meas and sweep must be integers")
        n_meas, sweep = int(n_meas), int(sweep)
    except (KeyError, TypeError, ValueError, OSError) as exc:
        raise RunFileError(f"{path} is damaged: bad root attributes ({_one_line(exc)})") from None
    if not isinstance(f.get("provenance"), h5py.Group):
        raise RunFileError(f"{path} is damaged: /provenance is missing")
    for key, (dtype, per_record) in _layout(cfg).items():
        d = _dataset(f, key, path, dtype)
        if d.ndim != 1 + len(per_record) or tuple(d.shape[1:]) != per_record:
            raise RunFileError(f"{path} is damaged: /{key} has shape {d.shape}, expected "
                               f"(n,) + {per_record}")
        if d.shape[0] != n_meas:
            raise RunFileError(f"{path} is damaged: /{key} has {d.shape[0]} records but the file "
                               f"says n_meas = {n_meas}")
    past = sweep - cfg.thermalize
    expect = past // cfg.measure_every if past > 0 else 0
    if sweep < 0 or n_meas != expect:
        raise RunFileError(f"{path} is damaged: {n_meas} records after sweep {sweep}, expected {expect}")
    comps = None
    for name in ("re", "im"):
        d = _dataset(f, f"state/{name}", path, np.dtype(np.float64))
        if d.ndim != 2 or d.shape[1] != cfg.volume or (comps is not None and d.shape != comps):
            raise RunFileError(f"{path} is damaged: /state/{name} has shape {d.shape}, expected "
                               f"(components, {cfg.volume})")
        comps = d.shape
    return n_meas


class RunWriter:
    """Sink that buffers records and writes them at checkpoints, atomically."""

    def __init__(self, config: RunConfig, path: Path, resume: bool = False):
        self.config = config
        self.path = Path(path)
        self.tmp = self.path.with_name(self.path.name + ".tmp")
        self.buffer: list[dict] = []
        self.resume = resume
        self.t0 = time.monotonic()
        self.wall_before = 0.0
        if resume:
            with _open_checked(self.path) as f:
                try:
                    self.wall_before = float(f["provenance"].attrs.get("wall_seconds", 0.0))
                except (KeyError, TypeError, ValueError, OSError) as exc:
                    raise RunFileError(f"{self.path} is damaged: bad /provenance ({_one_line(exc)})") from None

    # sink protocol -----------------------------------------------------
    def start(self, sim) -> None:
        if not self.resume:
            self._create(sim)

    def record(self, sim, record) -> None:
        if record is not None:
            self.buffer.append(record)

    def checkpoint(self, sim, status: str = "running") -> None:
        self._commit(sim, status)

    def finish(self, sim) -> None:
        self._commit(sim, "complete")

    def interrupted(self, sim) -> None:
        self._commit(sim, "interrupted")

    # -------------------------------------------------------------------
    def _create(self, sim) -> None:
        # The first file is built under its own name, not <name>.h5.tmp: a crash here must not
        # leave a lone <name>.h5.tmp (the command line refuses a fresh run beside one), and
        # a leftover of this name is never a checkpoint, so it is simply replaced.
        new = self.path.with_name(self.path.name + ".new")
        try:
            new.unlink(missing_ok=True)
            self._build(sim, new)
            self._switch(new)
        except (OSError, RuntimeError) as exc:
            new.unlink(missing_ok=True)
            raise RunFileError(f"could not create {self.path} ({_strerror(exc)})") from None

    def _build(self, sim, target: Path) -> None:
        cfg = self.config
        nf = cfg.nf
        with h5py.File(target, "w") as f:
            f.attrs["format"] = FORMAT
            f.attrs["format_version"] = FORMAT_VERSION
            f.attrs["config"] = json.dumps(cfg.to_dict(), sort_keys=True)
            f.attrs["physics_hash"] = cfg.physics_hash()
            f.attrs["status"] = "running"
            f.attrs["n_meas"] = 0
            f.attrs["sweep"] = 0
            if getattr(cfg, "kind", "chiral") == "linear":
                f.attrs["conventions"] = (
                    "S = sum_x [ (k/2) sum_mu Tr|Phi_{x+mu} - Phi_x|^2 + (mu2/2) Tr Phi^+Phi "
                    "+ lambda1 (Tr Phi^+Phi)^2 + lambda2 Tr (Phi^+Phi)^2 + lambda_s (Tr Phi^+Phi)^p "
                    "- c (e^{i theta_a} det Phi + c.c.) - Re Tr(H Phi) ], H = e^{i theta_m} diag(h), "
                    "theta = nf theta_m - theta_a; time is lattice direction 0"
                )
            else:
                f.attrs["conventions"] = (
                    "S = -beta sum_{x,mu} Re Tr(U_x^+ U_{x+mu}) - sum_x Re Tr(H U_x) "
                    "- kappa sum_x 2 Re(e^{i theta_a} det U_x), H = e^{i theta_m} diag(h), "
                    "theta = nf theta_m - theta_a; time is lattice direction 0"
                )
            p = f.create_group("provenance")
            for k, v in _provenance(cfg).items():
                p.attrs[k] = v
            p.attrs["created"] = _now()
            series, slices = record_kinds(cfg)
            s = f.create_group("series")
            for name, (kind, desc) in series.items():
                shape = (0, nf) if kind == "complex_nf" else (0,)
                d = s.create_dataset(name, shape=shape, maxshape=(None,) + shape[1:],
                                     dtype=_series_dtype(kind), chunks=(1024,) + shape[1:])
                d.attrs["description"] = desc
            g = f.create_group("slices")
            for name, (dtype, per_record, desc) in slices.items():
                shape = (0,) + per_record
                chunk = (max(1, 4096 // int(np.prod(per_record))),) + per_record
                d = g.create_dataset(name, shape=shape, maxshape=(None,) + per_record,
                                     dtype=dtype, chunks=chunk)
                d.attrs["description"] = desc
                d.attrs["shape_per_record"] = str(per_record)
            f.create_group("state")
            self._write_state(f, sim)
            f.flush()
        with open(target, "rb+") as fh:
            os.fsync(fh.fileno())

    def _write_state(self, f: h5py.File, sim) -> None:
        st: ChainState = sim.state
        g = f["state"]
        for name in ("re", "im"):
            if name in g:
                g[name][...] = getattr(st, name)
            else:
                g.create_dataset(name, data=getattr(st, name))
        for k in ChainState.SCALARS:
            g.attrs[k] = getattr(st, k)
        g.attrs["win_acc"] = st.win_acc
        g.attrs["win_tried"] = st.win_tried
        f.attrs["n_meas"] = st.n_meas
        f.attrs["sweep"] = st.sweep

    def _commit(self, sim, status: str) -> None:
        try:
            shutil.copyfile(self.path, self.tmp)
            with h5py.File(self.tmp, "a") as f:
                n_old = int(f.attrs["n_meas"])
                recs = self.buffer
                n_new = n_old + len(recs)
                if recs:
                    series, slices = record_kinds(self.config)
                    for name in series:
                        d = f["series"][name]
                        d.resize(n_new, axis=0)
                        d[n_old:n_new] = np.array([r[name] for r in recs])
                    for name in slices:
                        d = f["slices"][name]
                        d.resize(n_new, axis=0)
                        d[n_old:n_new] = np.stack([r["slices/" + name] for r in recs])
                self._write_state(f, sim)
                # measurements may have been extended on resume; the rest is checked equal
                f.attrs["config"] = json.dumps(self.config.to_dict(), sort_keys=True)
                f.attrs["status"] = status
                p = f["provenance"]
                p.attrs["updated"] = _now()
                p.attrs["wall_seconds"] = self.wall_before + time.monotonic() - self.t0
                f.flush()
            with open(self.tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            self._switch(self.tmp)
        except (OSError, RuntimeError) as exc:  # disk full, quota, I/O error, h5py write failure
            self.tmp.unlink(missing_ok=True)
            raise RunFileError(
                f"could not write checkpoint {self.path} ({_strerror(exc)}); "
                "the previous checkpoint is intact, resume with --resume"
            ) from None
        except (KeyError, TypeError, ValueError) as exc:  # the file changed under the run
            self.tmp.unlink(missing_ok=True)
            raise RunFileError(f"could not write checkpoint {self.path}: the file is damaged "
                               f"({_one_line(exc)})") from None
        self.buffer = []

    def _switch(self, src: Path) -> None:
        os.replace(src, self.path)
        try:
            fd = os.open(self.path.parent, os.O_RDONLY)
            os.fsync(fd)
            os.close(fd)
        except OSError:  # pragma: no cover - some filesystems cannot fsync folders
            pass


def _strerror(exc: BaseException) -> str:
    return " ".join(str(getattr(exc, "strerror", None) or exc).split()) or type(exc).__name__


def read_state(path: Path, config: RunConfig) -> ChainState:
    """The chain state of a run file, after checking that it belongs to ``config``."""
    with _open_checked(Path(path)) as f:
        stored = _stored_config(f, path)
        if stored.physics_hash() != config.physics_hash():
            raise RunFileError(
                f"{path} was written by a different config (model, lattice, seed or schedule differ); "
                "refusing to resume it"
            )
        _check_file(f, path, stored)
        try:
            g = f["state"]
            st = ChainState(np.ascontiguousarray(g["re"][...]), np.ascontiguousarray(g["im"][...]))
            for k in ChainState.SCALARS:
                v = g.attrs[k]
                if not isinstance(v, (int, float, np.integer, np.floating)) or isinstance(v, (bool, np.bool_)):
                    raise TypeError(f"state attribute {k} is {type(v).__name__}, not a number")
                setattr(st, k, type(getattr(st, k))(v))
            for k in ("win_acc", "win_tried"):
                v = g.attrs[k]
                if not (isinstance(v, np.ndarray) and v.dtype.kind in "iu" and v.shape == (2,)):
                    raise TypeError(f"state attribute {k} must be 2 integers")
                setattr(st, k, np.asarray(v, dtype=np.int64).copy())
        except (KeyError, ValueError, TypeError, OSError, OverflowError) as exc:
            raise RunFileError(f"{path} has a damaged checkpoint ({_one_line(exc)})") from None
        nf, v = config.nf, config.volume
        if st.re.shape != (nf * nf, v) or st.im.shape != (nf * nf, v):
            raise RunFileError(f"{path}: stored field has shape {st.re.shape}, expected {(nf * nf, v)}")
        if st.n_meas != int(f.attrs["n_meas"]) or st.sweep != int(f.attrs["sweep"]):
            raise RunFileError(f"{path}: the checkpoint says {st.n_meas} records after sweep {st.sweep}, "
                               f"the file {int(f.attrs['n_meas'])} after sweep {int(f.attrs['sweep'])}")
        if st.step < 0 or st.step_size <= 0 or not np.isfinite(st.step_size):
            raise RunFileError(f"{path} has a damaged checkpoint (step {st.step}, step size {st.step_size})")
        if not (np.isfinite(st.re).all() and np.isfinite(st.im).all()):
            raise RunFileError(f"{path} has a damaged checkpoint (non-finite field)")
    return st


class RunData:
    """Read-only view of a run file: config, series and slices as numpy arrays."""

    def __init__(self, path):
        self.path = Path(path)
        with _open_checked(self.path) as f:
            self.config = _stored_config(f, self.path)
            _check_file(f, self.path, self.config)
            self.status = _text(f.attrs.get("status", "unknown"))
            self.provenance = {k: _plain(v) for k, v in f["provenance"].attrs.items()}
            layout = _layout(self.config)
            try:
                # only the datasets of the layout, each checked numeric before it is read
                self.series = {k[7:]: _dataset(f, k, self.path, dt)[...]
                               for k, (dt, _) in layout.items() if k.startswith("series/")}
                self.slices = {k[7:]: _dataset(f, k, self.path, dt)[...]
                               for k, (dt, _) in layout.items() if k.startswith("slices/")}
            except (KeyError, OSError) as exc:
                raise RunFileError(f"{self.path}: damaged data ({_one_line(exc)})") from None

    def __len__(self) -> int:
        return len(self.series.get("sweep", ()))


def _text(v) -> str:
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    return v if isinstance(v, str) else "unknown"


def _plain(v):
    """An attribute as a plain Python value; anything but numbers and strings is shown by type."""
    if isinstance(v, (str, bytes)):
        return _text(v)
    if isinstance(v, np.ndarray) and v.dtype.kind in "biufc":
        return v.tolist()
    if isinstance(v, (np.generic, int, float)) and np.asarray(v).dtype.kind in "biufc":
        return v.item() if hasattr(v, "item") else v
    return f"<{type(v).__name__}>"


def open_run(path) -> RunData:
    """Open a run file for analysis (raises :class:`RunFileError` on a foreign or damaged file)."""
    try:
        return RunData(path)
    except SigmasimError:
        raise
    except Exception as exc:  # h5py raises many kinds on damaged files
        raise RunFileError(f"{path}: cannot read ({type(exc).__name__}: {_one_line(exc)})") from None
