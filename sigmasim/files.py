"""File plumbing shared by every writer: atomic writes, free space, provenance, JSON.

Every output the tool writes goes to a temporary name unique to the process, is fsynced and then
renamed into place (:func:`atomic_output`), so a failure or a crash never leaves a truncated file
and never touches a file the tool did not write.  A write that will not fit is refused before it
starts (:func:`check_space`).  :func:`provenance` is the one description of the writing process;
:func:`write_json` the one JSON writer (numpy values made plain, non-finite floats as null).
HDF5 files are built by :mod:`sigmasim.storage` (the only h5py import) and written through here.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import platform
import shutil
import subprocess
from pathlib import Path

import numpy as np

from sigmasim import __version__
from sigmasim.errors import RunFileError, shown

__all__ = ["atomic_output", "atomic_text", "write_json", "json_safe", "check_space", "free_bytes",
           "provenance", "git_commit", "now", "strerror", "shown_path", "size_text"]


def now() -> str:
    """The current UTC time, ISO 8601 to the second."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def git_commit() -> str:
    """The commit of the sigmasim checkout this code runs from ("unknown" outside a checkout)."""
    here = Path(__file__).resolve().parent
    try:
        out = subprocess.run(["git", "rev-parse", "HEAD"], cwd=here, capture_output=True, text=True,
                             timeout=5)
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    return out.stdout.strip() if out.returncode == 0 else "unknown"


def provenance(created: bool = True, **extra) -> dict:
    """Versions and commit of the writing process (and the time, with ``created``), plus ``extra``."""
    d = {
        "sigmasim": __version__,
        "git_commit": git_commit(),
        "python": platform.python_version(),
        "numpy": np.__version__,
    }
    if created:
        d["created"] = now()
    d.update(extra)
    return d


def shown_path(path) -> str:
    """A path for an error line: as is when short, cut to about 200 characters when long."""
    text = str(path)
    return text if len(text) <= 200 and text.isprintable() else shown(text)


def size_text(n: int) -> str:
    return f"{n / 2**20:.1f} MiB" if n >= 2**20 else f"{n / 2**10:.0f} KiB"


def strerror(exc: BaseException) -> str:
    """The reason of an I/O error in a few words ("No space left on device" however it is wrapped)."""
    text = " ".join(str(getattr(exc, "strerror", None) or exc).split()) or type(exc).__name__
    if getattr(exc, "errno", None) == 28 or "errno = 28" in text:  # HDF5 wraps ENOSPC in a long text
        return "No space left on device"
    return text


def free_bytes(folder: Path) -> int:
    """Free bytes on the file system holding ``folder`` (tests replace this probe)."""
    return shutil.disk_usage(folder).free


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
        raise RunFileError(f"could not write the {what} {shown_path(path)} ({strerror(exc)}); "
                           "nothing was left behind") from None
    except BaseException:
        try:
            tmp.unlink(missing_ok=True)
        except OSError:
            pass
        raise
    return path


def check_space(path: Path, need_bytes: int, what: str = "output") -> None:
    """Refuse (one line naming the full disk) when the folder of ``path`` has less than
    ``need_bytes`` (plus slack for block rounding) free; creates the folder."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        free = free_bytes(path.parent)
    except OSError as exc:
        raise RunFileError(f"could not write the {what} {shown_path(path)} ({strerror(exc)}); "
                           "nothing was left behind") from None
    need = need_bytes + (16 << 10)
    if free < need:
        raise RunFileError(f"could not write the {what} {shown_path(path)} (No space left on device: "
                           f"needs about {size_text(need)}, {size_text(free)} free); nothing was left behind")


def atomic_text(path: Path, text: str, what: str = "output") -> Path:
    """Write ``text`` to ``path`` through :func:`atomic_output`."""
    return atomic_output(path, lambda tmp: tmp.write_text(text), what=what)


def json_safe(x):
    """JSON-safe copy (numpy scalars and arrays to Python, non-finite floats to None)."""
    if isinstance(x, dict):
        return {str(k): json_safe(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [json_safe(v) for v in x]
    if isinstance(x, np.ndarray):
        return json_safe(x.tolist())
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        x = float(x)
        return x if math.isfinite(x) else None
    if isinstance(x, (np.bool_,)):
        return bool(x)
    return x


def json_text(doc, indent: int | None = 1) -> str:
    """``doc`` as JSON text (:func:`json_safe`, no NaN), ending in a newline."""
    return json.dumps(json_safe(doc), indent=indent, allow_nan=False) + "\n"


def write_json(path: Path, doc, what: str = "output", indent: int | None = 1) -> Path:
    """Write ``doc`` as JSON (:func:`json_text`) through :func:`atomic_output`."""
    return atomic_text(path, json_text(doc, indent), what=what)
