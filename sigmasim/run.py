"""The run entry point: one config run (or resumed) into its run file.

:func:`execute_run` owns what a run needs around the chain: the resume (:func:`storage.read_state`),
the refusal to overwrite a file of another config or without ``overwrite``, the disk check, the
one-writer lock, leftovers of crashed writers, SIGINT/SIGTERM turned into a checkpoint and
:class:`sigmasim.chain.Interrupted`.  The command line (:mod:`sigmasim.cli`) and the scan workers
(:func:`sigmasim.scan.run_point`) call it; it prints nothing.
"""

from __future__ import annotations

import os
import signal
import threading
from pathlib import Path

from sigmasim.errors import RunFileError, SigmasimError

__all__ = ["StopFlag", "execute_run"]


class StopFlag:
    """Turns SIGINT/SIGTERM into a request to stop at the next sweep boundary."""

    def __init__(self):
        self.signal = None

    def __call__(self) -> bool:
        return self.signal is not None

    def install(self):
        def handler(signum, frame):
            self.signal = signum

        self.old = {}
        if threading.current_thread() is threading.main_thread():  # not in a worker's task thread
            self.old = {s: signal.signal(s, handler) for s in (signal.SIGINT, signal.SIGTERM)}
        return self

    def restore(self):
        for s, h in self.old.items():
            signal.signal(s, h)


def execute_run(config, resume: bool = False, overwrite: bool = False, quiet: bool = False,
                label: str | None = None, should_stop=None, sinks=(), note=None) -> Path:
    """Run (or resume) one config to completion; returns the run file path.

    ``should_stop`` (a callable polled once per sweep) adds a stop request to
    SIGINT/SIGTERM; ``sinks`` are fed like the progress bar (see
    :func:`sigmasim.chain.run_chain`); ``note(text)`` receives the one message for the user
    (a resume with nothing left to run).

    Raises :class:`SigmasimError` subclasses for bad input and
    :class:`sigmasim.chain.Interrupted` after a checkpoint when stopped.
    """
    from sigmasim.config import field_bytes
    from sigmasim.storage import check_writable, lock_path, release_lock, take_lock

    path = config.run_file
    if resume and not path.exists():
        raise RunFileError(f"nothing to resume: {path} does not exist")
    per_record = 16 * config.shape[0] * (config.nf**2 + 1) + 16 * (config.nf + 4) + 64
    check_writable(path, 2 * (field_bytes(config.shape, config.nf) + per_record * config.measurements))
    # one writer per run file, for the whole life of this call: another run, resume or overwrite
    # of the same file is refused with the holder's host and pid
    lock = take_lock(lock_path(path), "sigmasim process", path)
    try:
        return _execute_locked(config, path, resume, overwrite, quiet, label, should_stop, sinks, note)
    finally:
        release_lock(lock)


def _execute_locked(config, path, resume, overwrite, quiet, label, should_stop, sinks, note) -> Path:
    from sigmasim.chain import Interrupted, Simulation, run_chain
    from sigmasim.progress import ProgressBar
    from sigmasim.storage import RunWriter, checkpoint_leftovers, read_state

    state = None
    if resume:
        if not path.exists():
            raise RunFileError(f"nothing to resume: {path} does not exist")
        if not os.access(path, os.W_OK) or not (path.stat().st_mode & 0o222):
            raise RunFileError(f"refusing to resume {path}: the file is read-only (make it writable to "
                               "continue the run)")
        state = read_state(path, config)
    elif path.exists():
        _refuse_overwrite(path, config, overwrite)
    for left in checkpoint_leftovers(path):
        # checkpoint copies left by a crash mid-write (the lock shows no one else is writing them)
        left.unlink(missing_ok=True)
    sim = Simulation(config, state)
    if resume and sim.state.sweep >= sim.total_sweeps:
        _note_complete(path, config, sim, note)
        return path
    writer = RunWriter(config, path, resume=resume)
    bar = ProgressBar(label or config.name, disable=True if quiet else None)
    flag = StopFlag().install()
    try:
        stop = flag if should_stop is None else (lambda: flag() or should_stop())
        run_chain(sim, (bar, writer, *sinks), should_stop=stop)
    except Interrupted:
        bar.close()
        writer.interrupted(sim)
        raise
    finally:
        bar.close()
        flag.restore()
    return path


def _note_complete(path: Path, config, sim, note) -> None:
    """A resume that asks for no more than the file holds: say so, and mark the file complete."""
    from sigmasim.storage import RunWriter, open_run

    d = open_run(path)
    if d.status == "complete":
        return
    if note is not None:
        note(f"{path} already holds {len(d)} measurements (sweep {sim.state.sweep}), "
             f"the config asks for {config.measurements}: nothing to run; marked complete")
    RunWriter(config, path, resume=True)._commit(sim, "complete")


def _refuse_overwrite(path: Path, config, overwrite: bool) -> None:
    from sigmasim.storage import open_run

    try:
        stored = open_run(path).config
    except SigmasimError:
        raise RunFileError(f"refusing to overwrite {path}: it is not a readable sigmasim run file") from None
    if stored.physics_hash() != config.physics_hash():
        raise RunFileError(f"refusing to overwrite {path}: it was written by a different config")
    if not overwrite:
        raise RunFileError(f"{path} exists; use --resume to continue it or --overwrite to start again")
    path.unlink()
