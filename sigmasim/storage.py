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
import io
import json
import os
import platform
import re
import shutil
import subprocess
import time
from pathlib import Path

import h5py
import numpy as np

from sigmasim import __version__
from sigmasim.chain import SERIES, SLICES, ChainState
from sigmasim.config import RunConfig, config_from_dict
from sigmasim.errors import ConfigError, RunFileError, SigmasimError, shown

__all__ = ["RunWriter", "RunData", "open_run", "read_state", "FORMAT", "FORMAT_VERSION",
           "check_writable", "take_lock", "release_lock", "lock_path", "free_bytes", "atomic_output",
           "atomic_hdf5", "hdf5_bytes", "check_space"]

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


def _p(path) -> str:
    """A path for an error line: as is when short, cut to about 200 characters when long."""
    text = str(path)
    return text if len(text) <= 200 and text.isprintable() else shown(text)


def _size(n: int) -> str:
    return f"{n / 2**20:.1f} MiB" if n >= 2**20 else f"{n / 2**10:.0f} KiB"


def free_bytes(folder: Path) -> int:
    """Free bytes on the file system holding ``folder`` (tests replace this probe)."""
    return shutil.disk_usage(folder).free


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


def atomic_output(path: Path, write, what: str = "output") -> Path:
    """Write ``path`` through ``write(tmp_path)`` into a temporary name, then rename it into place.

    A failure leaves no truncated file at ``path`` (the previous one, if any, stays) and becomes one
    line naming the problem.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name[:120]}.{os.getpid()}.tmp")  # unique to this process
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except (OSError, RuntimeError) as exc:  # h5py reports some write failures as RuntimeError
        try:
            tmp.unlink(missing_ok=True)
        except OSError:
            pass
        why = _strerror(exc)
        raise RunFileError(f"could not write the {what} {_p(path)} ({why}); "
                           "nothing was left behind") from None
    except BaseException:
        try:
            tmp.unlink(missing_ok=True)
        except OSError:
            pass
        raise
    return path


def hdf5_bytes(build) -> bytes:
    """The bytes of an HDF5 file whose content ``build(f)`` creates in an open ``h5py.File`` (built
    in memory: HDF5 writing straight to a full disk can take the process down while it closes the
    file, a plain write of these bytes fails with an ``OSError`` that becomes one line)."""
    buf = io.BytesIO()
    with h5py.File(buf, "w") as f:
        build(f)
    return buf.getvalue()


def check_space(path: Path, need_bytes: int, what: str = "output") -> None:
    """Refuse (one line naming the full disk) when the folder of ``path`` has less than
    ``need_bytes`` (plus slack for block rounding) free; creates the folder."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        free = free_bytes(path.parent)
    except OSError as exc:
        raise RunFileError(f"could not write the {what} {_p(path)} ({_strerror(exc)}); "
                           "nothing was left behind") from None
    need = need_bytes + (16 << 10)
    if free < need:
        raise RunFileError(f"could not write the {what} {_p(path)} (No space left on device: needs about "
                           f"{_size(need)}, {_size(free)} free); nothing was left behind")


def atomic_hdf5(path: Path, build, what: str = "output") -> Path:
    """Write a small HDF5 file ``path`` whose content ``build(f)`` creates in an open ``h5py.File``:
    built in memory (:func:`hdf5_bytes`), checked against the free space, then written through
    :func:`atomic_output`."""
    data = hdf5_bytes(build)
    check_space(path, len(data), what)
    return atomic_output(path, lambda tmp: tmp.write_bytes(data), what=what)


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
        free = free_bytes(folder)
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
            free = free_bytes(self.path.parent)
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


def _strerror(exc: BaseException) -> str:
    text = " ".join(str(getattr(exc, "strerror", None) or exc).split()) or type(exc).__name__
    if getattr(exc, "errno", None) == 28 or "errno = 28" in text:  # HDF5 wraps ENOSPC in a long text
        return "No space left on device"
    return text


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
        if getattr(stored, "kind", "chiral") != "linear":
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
