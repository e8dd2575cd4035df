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


def _open_checked(path: Path, mode: str = "r") -> h5py.File:
    if not path.exists():
        raise RunFileError(f"{path} does not exist")
    try:
        f = h5py.File(path, mode)
    except OSError:
        raise RunFileError(f"{path} is not a readable HDF5 file (truncated or damaged?)") from None
    if f.attrs.get("format") != FORMAT:
        f.close()
        raise RunFileError(f"{path} is not a sigmasim run file")
    if int(f.attrs.get("format_version", -1)) != FORMAT_VERSION:
        v = f.attrs.get("format_version")
        f.close()
        raise RunFileError(f"{path} has format version {v}; this sigmasim reads version {FORMAT_VERSION}")
    return f


def _stored_config(f: h5py.File, path) -> RunConfig:
    try:
        return config_from_dict(json.loads(f.attrs["config"]))
    except (KeyError, ValueError, TypeError, ConfigError) as exc:
        raise RunFileError(f"{path} holds no valid config ({exc})") from None


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
                self.wall_before = float(f["provenance"].attrs.get("wall_seconds", 0.0))

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
        cfg = self.config
        nf, t = cfg.nf, cfg.shape[0]
        self.tmp.unlink(missing_ok=True)
        with h5py.File(self.tmp, "w") as f:
            f.attrs["format"] = FORMAT
            f.attrs["format_version"] = FORMAT_VERSION
            f.attrs["config"] = json.dumps(cfg.to_dict(), sort_keys=True)
            f.attrs["physics_hash"] = cfg.physics_hash()
            f.attrs["status"] = "running"
            f.attrs["n_meas"] = 0
            f.attrs["sweep"] = 0
            f.attrs["conventions"] = (
                "S = -beta sum_{x,mu} Re Tr(U_x^+ U_{x+mu}) - sum_x Re Tr(H U_x) "
                "- kappa sum_x 2 Re(e^{i theta_a} det U_x), H = e^{i theta_m} diag(h), "
                "theta = nf theta_m - theta_a; time is lattice direction 0"
            )
            p = f.create_group("provenance")
            for k, v in _provenance(cfg).items():
                p.attrs[k] = v
            p.attrs["created"] = _now()
            s = f.create_group("series")
            for name, (kind, desc) in SERIES.items():
                dtype = {"int": np.int64, "real": np.float64}.get(kind, np.complex128)
                shape = (0, nf) if kind == "complex_nf" else (0,)
                d = s.create_dataset(name, shape=shape, maxshape=(None,) + shape[1:], dtype=dtype,
                                     chunks=(1024,) + shape[1:])
                d.attrs["description"] = desc
            g = f.create_group("slices")
            for name, (shape_doc, desc) in SLICES.items():
                shape = (0, t, nf, nf) if name == "U" else (0, t)
                chunk = (max(1, 4096 // (t * nf * nf)),) + shape[1:]
                d = g.create_dataset(name, shape=shape, maxshape=(None,) + shape[1:],
                                     dtype=np.complex128, chunks=chunk)
                d.attrs["description"] = desc
                d.attrs["shape_per_record"] = shape_doc
            f.create_group("state")
            self._write_state(f, sim)
        self._switch()

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
                    for name in SERIES:
                        d = f["series"][name]
                        d.resize(n_new, axis=0)
                        d[n_old:n_new] = np.array([r[name] for r in recs])
                    for name in SLICES:
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
        except OSError as exc:
            self.tmp.unlink(missing_ok=True)
            raise RunFileError(
                f"could not write checkpoint {self.path} ({exc.strerror or exc}); "
                "the previous checkpoint is intact, resume with --resume"
            ) from None
        self._switch()
        self.buffer = []

    def _switch(self) -> None:
        os.replace(self.tmp, self.path)
        try:
            fd = os.open(self.path.parent, os.O_RDONLY)
            os.fsync(fd)
            os.close(fd)
        except OSError:  # pragma: no cover - some filesystems cannot fsync folders
            pass


def read_state(path: Path, config: RunConfig) -> ChainState:
    """The chain state of a run file, after checking that it belongs to ``config``."""
    with _open_checked(Path(path)) as f:
        stored = _stored_config(f, path)
        if stored.physics_hash() != config.physics_hash():
            raise RunFileError(
                f"{path} was written by a different config (model, lattice, seed or schedule differ); "
                "refusing to resume it"
            )
        try:
            g = f["state"]
            st = ChainState(np.ascontiguousarray(g["re"][...]), np.ascontiguousarray(g["im"][...]))
            for k in ChainState.SCALARS:
                setattr(st, k, type(getattr(st, k))(g.attrs[k]))
            st.win_acc = np.asarray(g.attrs["win_acc"], dtype=np.int64)
            st.win_tried = np.asarray(g.attrs["win_tried"], dtype=np.int64)
            n_rec = f["series"]["sweep"].shape[0]
        except (KeyError, ValueError, TypeError, OSError) as exc:
            raise RunFileError(f"{path} has a damaged checkpoint ({exc})") from None
        nf, v = config.nf, config.volume
        if st.re.shape != (nf * nf, v) or st.im.shape != (nf * nf, v):
            raise RunFileError(f"{path}: stored field has shape {st.re.shape}, expected {(nf * nf, v)}")
        if n_rec != st.n_meas:
            raise RunFileError(f"{path}: {n_rec} records but the checkpoint says {st.n_meas}")
    return st


class RunData:
    """Read-only view of a run file: config, series and slices as numpy arrays."""

    def __init__(self, path):
        self.path = Path(path)
        with _open_checked(self.path) as f:
            self.config = _stored_config(f, self.path)
            self.status = str(f.attrs.get("status", "unknown"))
            self.provenance = {k: (v.item() if hasattr(v, "item") else v)
                               for k, v in f["provenance"].attrs.items()}
            try:
                self.series = {k: f["series"][k][...] for k in f["series"]}
                self.slices = {k: f["slices"][k][...] for k in f["slices"]}
            except (KeyError, OSError) as exc:
                raise RunFileError(f"{self.path}: damaged data ({exc})") from None

    def __len__(self) -> int:
        return len(self.series.get("sweep", ()))


def open_run(path) -> RunData:
    """Open a run file for analysis (raises :class:`RunFileError` on a foreign or damaged file)."""
    try:
        return RunData(path)
    except SigmasimError:
        raise
    except Exception as exc:  # h5py raises many kinds on damaged files
        raise RunFileError(f"{path}: cannot read ({type(exc).__name__}: {exc})") from None
