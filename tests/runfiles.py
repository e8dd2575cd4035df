"""Shared helpers of the tests that write, interrupt, resume and compare run files."""

import contextlib
import os
import shutil
import subprocess
from pathlib import Path

import h5py
import numpy as np

from sigmasim.chain import Interrupted, make_simulation, run_chain
from sigmasim.storage import RunWriter, read_state


ROOT = Path(__file__).resolve().parents[1]


def subprocess_env(**extra) -> dict:
    """The environment for a subprocess of a test: one numba thread and one BLAS thread.

    Numba's default is every core; on a machine whose other core is busy a parallel region then
    waits for a descheduled thread at every colour update, and a run of seconds takes minutes.
    The numbers do not depend on the thread count, so one thread tests the same thing.  This
    checkout goes first on PYTHONPATH, so the subprocess runs the code under test.
    """
    env = dict(os.environ, NUMBA_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1",
               MKL_NUM_THREADS="1")
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), *filter(None, [os.environ.get("PYTHONPATH")])])
    env.update({k: str(v) for k, v in extra.items()})
    return env


def run_file(cfg, stop_at=None) -> bool:
    """Run ``cfg`` into its run file; stop (as on SIGTERM) after sweep ``stop_at``.

    Returns True when the run completed, False when it was stopped.
    """
    sim = make_simulation(cfg)
    writer = RunWriter(cfg, cfg.run_file)
    cfg.run_dir.mkdir(parents=True, exist_ok=True)
    try:
        run_chain(sim, (writer,), should_stop=lambda: stop_at is not None and sim.state.sweep == stop_at)
    except Interrupted:
        writer.interrupted(sim)
        return False
    return True


def resume(cfg) -> None:
    """Continue the run file of ``cfg`` from its checkpoint to the end."""
    sim = make_simulation(cfg, read_state(cfg.run_file, cfg))
    run_chain(sim, (RunWriter(cfg, cfg.run_file, resume=True),))


def contents(path) -> dict:
    """Every recorded dataset, the state attributes and the root counters of a run file."""
    out = {}
    with h5py.File(path, "r") as f:
        for group in ("series", "slices", "state"):
            for k, d in f[group].items():
                out[f"{group}/{k}"] = d[...]
        for k, v in f["state"].attrs.items():
            out[f"state@{k}"] = v
        for k in ("n_meas", "sweep", "status"):
            out[k] = f.attrs[k]
    return out


def assert_same_contents(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for k in a:
        np.testing.assert_array_equal(a[k], b[k], err_msg=k)


def assert_thread_independent(cfg) -> None:
    """``simulate(cfg)`` on 1 and on 2 numba threads gives identical arrays (skips on 1 core)."""
    import numba
    import pytest

    from sigmasim.chain import simulate

    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.skip("needs at least 2 threads")
    old = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = simulate(cfg)
        numba.set_num_threads(2)
        two = simulate(cfg)
    finally:
        numba.set_num_threads(old)
    assert_same_contents(one, two)


def assert_one_line_error(err: str, limit: int | None = None) -> None:
    """``err`` (a command's stderr) is exactly one ``sigmasim: error:`` line, no traceback, and at
    most ``limit`` characters when given."""
    assert err.count("\n") == 1 and err.startswith("sigmasim: error:") and "Traceback" not in err, err
    if limit is not None:
        assert len(err) <= limit, f"{len(err)} characters: {err[:300]}"


@contextlib.contextmanager
def small_tmpfs(folder, size: str, read_only: bool = False):
    """Mount a tmpfs of ``size`` (e.g. "1m") on the new folder ``folder`` for the ``with`` block;
    skips the test where this process may not mount (needs root and a permitting kernel)."""
    import pytest

    folder = Path(folder)
    folder.mkdir()
    if os.geteuid() != 0:
        pytest.skip("mounting a small tmpfs needs root")
    opts = f"size={size}" + (",ro" if read_only else "")
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(folder)], capture_output=True,
                       env=subprocess_env())
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.decode().strip()}")
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], capture_output=True, env=subprocess_env())


def fill_disk(folder, leave: int) -> None:
    """Fill the file system of ``folder`` (with ``folder/filler``) until ``leave`` bytes are free."""
    free = shutil.disk_usage(folder).free
    with open(Path(folder) / "filler", "wb") as fh:
        fh.write(b"\0" * max(0, free - leave))


def tiny_config_dict(kind: str = "chiral", nf: int = 2, shape=(4, 4), **run) -> dict:
    """A run config of a few seconds for the model ``kind``, as the dict config_from_dict takes;
    ``run`` keys go into ``[run]`` (one thread unless given)."""
    model = {"kind": kind, "nf": nf, "mass": 0.3, "theta": 1.0}
    if kind == "chiral":
        model.update(beta=0.5, kappa=0.4)
    else:  # the linear model: a bounded potential with broken symmetry (mu2 < 0)
        model.update(mu2=-1.0, lambda1=0.1, lambda2=0.1, c=0.2)
    return {"name": f"tiny-{kind}", "seed": 7, "lattice": {"shape": list(shape)}, "model": model,
            "run": {"thermalize": 4, "measurements": 10, "threads": 1, **run}}
