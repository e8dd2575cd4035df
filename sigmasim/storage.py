"""The run file: HDF5 layout, crash-safe writer and reader (the only h5py import).

Layout of ``<output>/<name>/<name>.h5`` (format ``sigmasim-run``, version 2)::

    /                    attrs: format, format_version, config (JSON), physics_hash,
                                status (running|interrupted|complete), n_meas, sweep, conventions
    /provenance          attrs: sigmasim, git_commit, python, numpy, numba, h5py,
                                seed, created, updated, wall_seconds
    /series/<name>       (n,) float64 | complex128 | int64, or (n, nf) complex128;
                         attrs: description
    /slices/<name>       (n, T, nf, nf) complex128 (the field matrix: U for the chiral model,
                         Phi for the linear one), (n, T) complex128 or float64: per-time-slice sums
    /state/re, /state/im (nf*nf, V) float64: the field at the last checkpoint
                         (checkerboard site order, component a*nf + b)
    /state               attrs: step, sweep, n_meas, step_size, ... (ChainState scalars),
                         win_acc, win_tried

The series and slices are those of the config's model (:mod:`sigmasim.models`: ``SERIES``,
``SLICES``, ``CONVENTIONS``).  Version 1 differs only in the linear model's names
(``slices/U`` for ``slices/Phi``, plus ``series/action_beta``, a copy of ``action_kinetic``);
version-1 files are read under the current names, and a resume rewrites them as version 2 at its
first checkpoint.

Time series are chunked and resizable along the first axis.  Records stay in
memory between checkpoints; a checkpoint copies the file, appends to the copy,
flushes and fsyncs it and then renames it over the original (write new, flush,
then switch), so a crash at any moment leaves the previous complete file.
Nothing is ever unpickled: strings are JSON.
"""

from __future__ import annotations

import io
import json
import os
import re
import shutil
import time
from pathlib import Path

import h5py
import numpy as np

from sigmasim import files, models
from sigmasim.chain import ChainState
from sigmasim.config import RunConfig, config_from_dict
from sigmasim.errors import ConfigError, RunFileError, SigmasimError
from sigmasim.files import atomic_output, check_space, now as _now, shown_path as _p, size_text as _size
from sigmasim.files import strerror as _strerror

# atomic_output and check_space live in sigmasim.files (re-exported here for the protocol writers)
__all__ = ["RunWriter", "RunData", "open_run", "read_state", "FORMAT", "FORMAT_VERSION",
           "check_writable", "take_lock", "release_lock", "lock_path", "atomic_output",
           "atomic_hdf5", "hdf5_bytes", "check_space"]

FORMAT = "sigmasim-run"
FORMAT_VERSION = 2
READABLE_VERSIONS = (1, 2)


def _provenance(config: RunConfig) -> dict:
    import numba

    return files.provenance(created=False, numba=numba.__version__, h5py=h5py.__version__, seed=config.seed)


# ---------------------------------------------------------------------------------------------
# One writer per file: an exclusive flock on a small lock file that names its holder.
#
# flock is released by the kernel when the holding process dies, so a lock of a killed process
# never blocks.  The holder removes the lock file while it still holds it; a process that waited
# on the old file sees that the path no longer names the file it locked and tries again, so two
# processes never hold locks on two different files of the same name.  The host and pid inside
# are only for the refusal message, and for lock files written without flock: such a file that
# names a live process (or another host) is treated as held.

_HELD: dict[str, int] = {}


def lock_path(target: Path) -> Path:
    """The lock file of a run file (``<name>.h5.lock``)."""
    target = Path(target)
    return target.with_name(target.name + ".lock")


def _holder(fd: int) -> tuple[str, str]:
    try:
        parts = os.pread(fd, 300, 0).decode("utf-8", "replace").split()
    except OSError:
        parts = []
    return (parts[0], parts[1]) if len(parts) == 2 else ("?", "?")


def _pid_alive(pid: int) -> bool:
    """Whether ``pid`` may be a live sigmasim process (a stale lock file's pid may have been reused)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, ValueError):
        return True
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            cmd = fh.read()
    except OSError:  # no /proc: assume it is
        return True
    return b"python" in cmd or b"sigmasim" in cmd


def take_lock(lock: Path, who: str, target) -> Path:
    """Hold an exclusive lock on ``lock`` for the life of this process (until :func:`release_lock`).

    ``who`` and ``target`` word the refusal: "another <who> (host H, pid P) is writing <target>".
    """
    import fcntl
    import socket

    lock = Path(lock)
    key = os.path.abspath(lock)
    host = socket.gethostname()

    def refuse(h, p):
        return RunFileError(f"another {who} (host {h}, pid {p}) is writing {_p(target)}; "
                            f"wait for it or remove {_p(lock)} if it is gone")

    if key in _HELD:
        raise refuse(host, os.getpid())
    for _ in range(50):
        try:
            fd = os.open(lock, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
        except OSError as exc:
            raise RunFileError(f"cannot create the lock file {_p(lock)} "
                               f"({_strerror(exc)})") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            h, p = _holder(fd)
            os.close(fd)
            if isinstance(exc, BlockingIOError):
                raise refuse(h, p) from None
            raise RunFileError(f"cannot lock {_p(lock)} ({_strerror(exc)})") from None
        try:
            same = os.fstat(fd).st_ino == os.stat(lock).st_ino
        except OSError:
            same = False
        if not same:  # the holder removed this file while we waited: lock the new one
            os.close(fd)
            continue
        h, p = _holder(fd)
        if h != "?" and (h != host or (p.isdigit() and int(p) != os.getpid() and _pid_alive(int(p)))
                         or (p == str(os.getpid()))):
            # written by a process that did not use flock (or by this one without holding it)
            os.close(fd)
            raise refuse(h, p)
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{host} {os.getpid()}".encode(), 0)
        except OSError as exc:
            os.close(fd)
            raise RunFileError(f"cannot write the lock file {_p(lock)} "
                               f"({_strerror(exc)})") from None
        _HELD[key] = fd
        return lock
    raise RunFileError(f"cannot take the lock {_p(lock)}")


def release_lock(lock: Path) -> None:
    """Remove and release a lock taken by :func:`take_lock` (nothing if not held)."""
    fd = _HELD.pop(os.path.abspath(lock), None)
    if fd is None:
        return
    try:
        os.unlink(lock)  # while still held: see above
    except OSError:
        pass
    os.close(fd)


def hdf5_bytes(build) -> bytes:
    """The bytes of an HDF5 file whose content ``build(f)`` creates in an open ``h5py.File`` (built
    in memory: HDF5 writing straight to a full disk can take the process down while it closes the
    file, a plain write of these bytes fails with an ``OSError`` that becomes one line)."""
    buf = io.BytesIO()
    with h5py.File(buf, "w") as f:
        build(f)
    return buf.getvalue()


def atomic_hdf5(path: Path, build, what: str = "output") -> Path:
    """Write a small HDF5 file ``path`` whose content ``build(f)`` creates in an open ``h5py.File``:
    built in memory (:func:`hdf5_bytes`), checked against the free space, then written through
    :func:`atomic_output`."""
    data = hdf5_bytes(build)
    files.check_space(path, len(data), what)
    return files.atomic_output(path, lambda tmp: tmp.write_bytes(data), what=what)


def hdf5_root_attrs(path, keys) -> dict:
    """The root attributes ``keys`` of an HDF5 file that are plain strings or numbers (bytes
    decoded); raises OSError when ``path`` is not a readable HDF5 file, gives {} when an attribute
    is damaged (a reader that knows the format names the problem)."""
    out = {}
    with h5py.File(path, "r") as f:
        try:
            for k in keys:
                v = f.attrs.get(k)
                if isinstance(v, bytes):
                    v = v.decode("utf-8", "replace")
                if isinstance(v, (str, int, float)) or getattr(v, "shape", None) == ():
                    out[k] = v
        except Exception:  # a damaged attribute
            return {}
    return out


TEXT_DTYPE = h5py.string_dtype("utf-8")  # variable-length UTF-8 strings (scan index columns)


def read_columns(path, fmt: str, group: str, what: str) -> dict:
    """The columns of table ``group`` of an HDF5 file whose ``format`` attribute is ``fmt`` (column
    names in the group's JSON ``columns`` attribute; strings decoded); one-line errors."""
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != fmt:
                raise RunFileError(f"{path} is not a {what}")
            g = f[group]
            cols = json.loads(g.attrs["columns"])
            return {c: (g[c].asstr()[...] if g[c].dtype.kind == "O" else g[c][...]) for c in cols}
    except SigmasimError:
        raise
    except Exception as exc:
        raise RunFileError(f"{path}: cannot read ({type(exc).__name__})") from None


def hdf5_datasets(path) -> dict:
    """Name -> shape (list) of the datasets at the root of an HDF5 file."""
    with h5py.File(path, "r") as f:
        return {k: list(f[k].shape) for k in f if isinstance(f[k], h5py.Dataset)}


def check_writable(path: Path, need_bytes: int) -> None:
    """Fail early when the run folder cannot be created or written, or the disk is too full."""
    folder = path.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {_p(folder)}: {_strerror(exc)}") from None
    if not os.access(folder, os.W_OK | os.X_OK):
        raise RunFileError(f"the output folder {_p(folder)} is not writable")
    try:
        free = files.free_bytes(folder)
    except OSError as exc:
        raise RunFileError(f"cannot use the output folder {_p(folder)}: {_strerror(exc)}") from None
    if free < need_bytes:
        raise RunFileError(f"not enough free disk space in {_p(folder)}: need about {_size(need_bytes)}, "
                           f"{_size(free)} free")


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
                and int(v) in READABLE_VERSIONS):
            shown = (int(v) if isinstance(v, np.integer) else v if isinstance(v, (int, float, str, bytes))
                     else type(v).__name__)
            raise RunFileError(f"{path} has format version {shown!r}; this sigmasim reads versions "
                               f"{', '.join(map(str, READABLE_VERSIONS))}")
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


_SLICE_DTYPES = {"matrix": np.complex128, "complex": np.complex128, "real": np.float64}


def record_kinds(cfg: RunConfig) -> tuple[dict, dict]:
    """The model's records: (series name -> (kind, description), slice name -> (dtype, shape, description)).

    From the model's ``SERIES`` and ``SLICES`` (:mod:`sigmasim.models`).
    """
    model = models.get(cfg.kind)
    nf, t = cfg.nf, cfg.shape[0]
    slices = {name: (_SLICE_DTYPES[kind], (t, nf, nf) if kind == "matrix" else (t,), desc)
              for name, (kind, desc) in model.SLICES.items()}
    return dict(model.SERIES), slices


def _names_in_file(f: h5py.File, cfg: RunConfig) -> dict:
    """Current dataset name -> its name in the open file ``f`` (they differ in version-1 files)."""
    if int(f.attrs["format_version"]) >= 2:
        return {}
    return {new: old for old, new in models.get(cfg.kind).VERSION1_NAMES.items()}


def _upgrade_version1(f: h5py.File, cfg: RunConfig) -> None:
    """Rename a version-1 file's records (open for writing) to the current layout."""
    model = models.get(cfg.kind)
    for old, new in model.VERSION1_NAMES.items():
        if old in f and new not in f:
            f.move(old, new)
    for old in model.VERSION1_DROPPED:
        if old in f:
            del f[old]
    f.attrs["format_version"] = FORMAT_VERSION
    f.attrs["conventions"] = model.CONVENTIONS


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
    names = _names_in_file(f, cfg)
    for key, (dtype, per_record) in _layout(cfg).items():
        d = _dataset(f, names.get(key, key), path, dtype)
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


def checkpoint_leftovers(path) -> list[Path]:
    """Checkpoint copies of ``path`` left by writers that died mid-write (``<name>.<pid>.tmp`` and
    ``.new``, and the older fixed ``<name>.tmp``).  Remove them only while holding the run's lock."""
    path = Path(path)
    pat = re.compile(re.escape(path.name) + r"(\.[0-9]+)?\.(tmp|new)")
    try:
        return sorted(p for p in path.parent.iterdir() if pat.fullmatch(p.name))
    except OSError:
        return []


class RunWriter:
    """Sink that buffers records and writes them at checkpoints, atomically."""

    def __init__(self, config: RunConfig, path: Path, resume: bool = False):
        self.config = config
        self.path = Path(path)
        # unique to this process: a writer never touches another process's copy (the run lock keeps
        # a second writer away in any case; leftovers of dead writers go via checkpoint_leftovers)
        self.tmp = self.path.with_name(f"{self.path.name}.{os.getpid()}.tmp")
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
        # The first file is built under its own name, not the checkpoint copy's: a crash here must
        # not leave a lone checkpoint copy (the command line refuses a fresh run beside one), and
        # a leftover of this name is never a checkpoint, so it is simply replaced.
        new = self.path.with_name(f"{self.path.name}.{os.getpid()}.new")
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
            f.attrs["conventions"] = models.get(cfg.kind).CONVENTIONS
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
        write_state_group(f["state"], st)
        f.attrs["n_meas"] = st.n_meas
        f.attrs["sweep"] = st.sweep

    def _need_bytes(self) -> int:
        """Bytes a checkpoint copy needs: the file, the buffered records, slack for HDF5 chunks."""
        per_record = sum(int(np.prod(shape or (1,))) * dt.itemsize
                         for dt, shape in _layout(self.config).values())
        try:
            size = self.path.stat().st_size
        except OSError:
            size = 0
        return size + 2 * per_record * len(self.buffer) + (1 << 20)

    def _commit(self, sim, status: str) -> None:
        need = self._need_bytes()
        try:
            free = files.free_bytes(self.path.parent)
        except OSError:
            free = need
        if free < need:
            # checked before the copy: a write that fails inside HDF5 can take the process down
            raise RunFileError(
                f"No space left on device: the disk holding {_p(self.path.parent)} is full (a checkpoint needs "
                f"about {_size(need)}, {_size(free)} free); the previous checkpoint "
                "is intact, free some space and resume with --resume"
            )
        f = None
        try:
            shutil.copyfile(self.path, self.tmp)
            f = h5py.File(self.tmp, "a")
            if int(f.attrs["format_version"]) < FORMAT_VERSION:  # a resumed version-1 file
                _upgrade_version1(f, self.config)
            series, slices = record_kinds(self.config)
            # the records on disk (equal to the n_meas attribute, except in a file just rebuilt
            # around a state with records still to append)
            n_old = int(f["series"][next(iter(series))].shape[0])
            recs = self.buffer
            n_new = n_old + len(recs)
            if recs:
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
            f.close()
            f = None
            with open(self.tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            self._switch(self.tmp)
        except (OSError, RuntimeError) as exc:  # disk full, quota, I/O error, h5py write failure
            _close_quietly(f)
            self.tmp.unlink(missing_ok=True)
            why = _strerror(exc)
            raise RunFileError(
                f"could not write checkpoint {_p(self.path)} ({why}); "
                "the previous checkpoint is intact, resume with --resume"
            ) from None
        except (KeyError, TypeError, ValueError) as exc:  # the file changed under the run
            _close_quietly(f)
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


def _close_quietly(f) -> None:
    """Close an HDF5 file on an error path (explicitly, so no half-written handle outlives it)."""
    if f is None:
        return
    try:
        f.close()
    except Exception:  # the close of a file whose write failed can fail again; nothing to save
        pass


def write_state_group(g, st: ChainState) -> None:
    """Store a chain state in the HDF5 group ``g``: field datasets ``re``/``im`` (written in place
    when they exist), the scalar counters and the tuning window as attributes."""
    for name in ("re", "im"):
        if name in g:
            g[name][...] = getattr(st, name)
        else:
            g.create_dataset(name, data=getattr(st, name))
    for k in ChainState.SCALARS:
        g.attrs[k] = getattr(st, k)
    g.attrs["win_acc"] = st.win_acc
    g.attrs["win_tried"] = st.win_tried


def read_state_group(g) -> ChainState:
    """The chain state stored by :func:`write_state_group`; raises KeyError/TypeError/ValueError on
    a damaged group (the callers turn them into one-line RunFileErrors).  Ranges are checked
    separately (:func:`_check_state_ranges`)."""
    st = ChainState(np.ascontiguousarray(g["re"][...], dtype=np.float64),
                    np.ascontiguousarray(g["im"][...], dtype=np.float64))
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
    return st


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
            st = read_state_group(f["state"])
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
        _check_state_ranges(st, stored, path)
        if not (np.isfinite(st.re).all() and np.isfinite(st.im).all()):
            raise RunFileError(f"{path} has a damaged checkpoint (non-finite field)")
        if models.get(stored.kind).UNITARY:
            _check_unitary(st, stored, path)
    return st


# the kernels take the step counter as a signed 64-bit key input: keep far from its end
STEP_LIMIT = 2**62
UNITARITY_TOL = 1e-6  # a run re-unitarises every few sweeps; its drift stays near 1e-13


def _check_state_ranges(st: ChainState, cfg: RunConfig, path, last_sweep: int | None = None) -> None:
    """Every checkpoint scalar within what a run can have produced, before any kernel sees it.

    ``last_sweep`` is the chain's last sweep, when known.
    """
    def bad(what):
        return RunFileError(f"{path} has a damaged checkpoint ({what})")

    for k in ("step", "sweep", "n_meas", "tune_acc", "tune_tried"):
        v = getattr(st, k)
        if not 0 <= v < STEP_LIMIT:
            raise bad(f"state attribute {k} = {v} is out of range")
    # a run file's sweep is tied to its records by _check_file (a resume may ask for fewer
    # measurements than a file holds); a protocol checkpoint gives its last sweep
    if last_sweep is not None and st.sweep > last_sweep:
        raise bad(f"sweep {st.sweep} is past the run's last sweep")
    if st.tune_acc > st.tune_tried:
        raise bad(f"{st.tune_acc} accepted of {st.tune_tried} tried")
    step_max = max(float(cfg.initial_step), 1e3)
    if not st.step_size <= step_max:
        raise bad(f"step size {st.step_size} is out of range")
    if not (np.isfinite(st.win_drift) and 0 <= st.win_drift < 1):
        raise bad(f"unitarity drift {st.win_drift} is out of range")
    if ((st.win_acc < 0) | (st.win_tried < 0) | (st.win_acc > st.win_tried)
            | (st.win_tried >= STEP_LIMIT)).any():
        raise bad(f"window counts {st.win_acc.tolist()} of {st.win_tried.tolist()} are out of range")


def _check_unitary(st: ChainState, cfg: RunConfig, path) -> None:
    """The chiral field is unitary (and of unit determinant for SU) at every site."""
    nf = cfg.nf
    worst, worst_det = 0.0, 0.0
    eye = np.eye(nf)
    step = 1 << 14
    for lo in range(0, st.re.shape[1], step):  # blocks: bounded scratch memory on big lattices
        u = (st.re[:, lo:lo + step] + 1j * st.im[:, lo:lo + step]).T.reshape(-1, nf, nf)
        g = np.einsum("sba,sbc->sac", u.conj(), u)
        worst = max(worst, float(np.abs(g - eye).max()))
        if cfg.group == "SU":
            worst_det = max(worst_det, float(np.abs(np.linalg.det(u) - 1).max()))
    if not worst <= UNITARITY_TOL:
        raise RunFileError(f"{path} has a damaged checkpoint (the field is not unitary: "
                           f"|U^+U - 1| = {worst:.3g})")
    if not worst_det <= UNITARITY_TOL:
        raise RunFileError(f"{path} has a damaged checkpoint (det U differs from 1 by {worst_det:.3g})")


class RunData:
    """Read-only view of a run file: config, series and slices as numpy arrays."""

    def __init__(self, path):
        self.path = Path(path)
        with _open_checked(self.path) as f:
            self.config = _stored_config(f, self.path)
            _check_file(f, self.path, self.config)
            self.status = _text(f.attrs.get("status", "unknown"))
            try:  # the checkpoint's sweep, read in the same open as the records (a live run switches files)
                self.sweep = int(f.attrs.get("sweep", 0))
            except (TypeError, ValueError):
                self.sweep = None
            self.provenance = {k: _plain(v) for k, v in f["provenance"].attrs.items()}
            layout = _layout(self.config)
            names = _names_in_file(f, self.config)  # read a version-1 file under the current names
            try:
                # only the datasets of the layout, each checked numeric before it is read
                self.series = {k[7:]: _dataset(f, names.get(k, k), self.path, dt)[...]
                               for k, (dt, _) in layout.items() if k.startswith("series/")}
                self.slices = {k[7:]: _dataset(f, names.get(k, k), self.path, dt)[...]
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


# ---------------------------------------------------------------- protocol files
# The hysteresis sweep file and the hysteresis and tempering checkpoints are trees of groups,
# attributes and datasets that their protocol modules lay out; this reader/writer pair is all the
# HDF5 code they need, so that this module stays the only h5py import.
def write_tree(path, tree: dict, what: str = "output") -> Path:
    """Write ``tree`` to the HDF5 file ``path`` atomically (:func:`atomic_hdf5`).

    In ``tree`` (and every dict below it) the key ``"@attrs"`` holds the group's attributes and
    ``"@state"`` a :class:`ChainState` stored in that group (:func:`write_state_group`); any other
    dict is a subgroup and anything else a dataset.  Groups, attributes and datasets are created
    in the order of the keys.
    """
    def fill(g, node):
        for k, v in node.items():
            if k == "@attrs":
                for a, x in v.items():
                    g.attrs[a] = x
            elif k == "@state":
                write_state_group(g, v)
            elif isinstance(v, dict):
                fill(g.create_group(k), v)
            else:
                g.create_dataset(k, data=v)

    return atomic_hdf5(Path(path), lambda f: fill(f, tree), what=what)


def read_tree(path, states=()) -> dict:
    """Everything in the HDF5 file ``path`` as the tree :func:`write_tree` takes: attributes under
    ``"@attrs"``, datasets as arrays, and for the groups named in ``states`` (e.g. ``"state"``,
    ``"slot0"``) their :class:`ChainState` under ``"@state"``.

    Raises OSError (not an HDF5 file), KeyError, TypeError or ValueError (a damaged state group);
    the protocol modules turn them into one-line errors.
    """
    def walk(g, name):
        node = {"@attrs": dict(g.attrs)}
        if name in states:
            node["@state"] = read_state_group(g)
        for k, v in g.items():
            key = f"{name}/{k}" if name else k
            node[k] = walk(v, key) if isinstance(v, h5py.Group) else v[...]
        return node

    with h5py.File(Path(path), "r") as f:
        return walk(f, "")


# ---------------------------------------------------------------------------
# multicanonical output (sigmasim multicanonical)
# ---------------------------------------------------------------------------

MUCA_FORMAT = "sigmasim-multicanonical"


def check_multicanonical_target(path) -> None:
    """Refuse (one line) to replace a file at ``path`` that is not a multicanonical file of sigmasim."""
    path = Path(path)
    if not path.exists():
        return
    try:
        with h5py.File(path, "r") as f:
            ours = _text(f.attrs.get("format")) == MUCA_FORMAT
    except Exception:
        ours = False
    if not ours:
        raise RunFileError(f"refusing to overwrite {_p(path)}: it is not a multicanonical file of sigmasim")


def write_multicanonical(path, data: dict, attrs: dict) -> Path:
    """Write the multicanonical output: ``data`` name -> array (``group/name`` makes groups),
    ``attrs`` name -> attribute; atomically (nothing left behind on failure)."""
    check_multicanonical_target(path)

    def build(f):
        f.attrs["format"] = MUCA_FORMAT
        f.attrs["format_version"] = 1
        for k, v in attrs.items():
            f.attrs[k] = v
        for k, v in data.items():
            f.create_dataset(k, data=np.asarray(v))

    return atomic_hdf5(Path(path), build, what="multicanonical file")


def read_multicanonical(path) -> tuple[dict, dict]:
    """(datasets, attributes) of a file written by :func:`write_multicanonical`; one-line
    :class:`RunFileError` on a missing, foreign or damaged file."""
    path = Path(path)
    if not path.is_file():
        raise RunFileError(f"{_p(path)} does not exist or is not a file")
    try:
        with h5py.File(path, "r") as f:
            if _text(f.attrs.get("format")) != MUCA_FORMAT:
                raise RunFileError(f"{_p(path)} is not a multicanonical file of sigmasim")
            data = {}
            f.visititems(lambda name, obj: data.__setitem__(name, obj[...])
                         if isinstance(obj, h5py.Dataset) else None)
            attrs = {k: _plain(v) for k, v in f.attrs.items()}
    except RunFileError:
        raise
    except Exception as exc:
        raise RunFileError(f"{_p(path)}: cannot read ({type(exc).__name__}: {_one_line(exc)})") from None
    return data, attrs
