"""Numerical guards: NaN detection, the measured action against numpy, det against numpy."""

import math
import subprocess
import sys
import textwrap

import h5py
import numpy as np
import pytest

from sigmasim.chain import ChainState, MemorySink, Simulation, run_chain
from sigmasim.cli import main
from sigmasim.config import config_from_dict
from sigmasim.errors import NumericalError
from sigmasim.kernels.group import det as kernel_det
from sigmasim.storage import checkpoint_leftovers, open_run

from runfiles import assert_one_line_error, subprocess_env


def _cfg(nf=3, group="U", shape=(4, 4, 4), schedule="heatbath", output="runs", **run):
    sched = {"heatbath": [{"update": "heatbath"}, {"update": "overrelax"}],
             "metropolis": [{"update": "metropolis"}]}[schedule]
    return config_from_dict({
        "name": "guard", "seed": 5, "lattice": {"shape": list(shape)},
        "model": {"nf": nf, "group": group, "beta": 0.7, "mass": 0.2, "kappa": 0.3, "theta": 1.1},
        "updates": {"schedule": sched},
        "run": {"thermalize": 3, "measurements": 30, "start": "hot", "checkpoint_every": 4,
                "output": str(output), **run},
    })


class _Injector:
    """Sink that puts a NaN into one field entry right after sweep ``at``."""

    def __init__(self, at, comp, site):
        self.at, self.comp, self.site = at, comp, site

    def start(self, sim):
        pass

    def record(self, sim, record):
        if sim.state.sweep == self.at:
            sim.state.re[self.comp, self.site] = np.nan

    def checkpoint(self, sim):
        pass

    def finish(self, sim):
        pass


@pytest.mark.parametrize("nf, group, schedule, at", [(1, "U", "heatbath", 9), (2, "SU", "heatbath", 1),
                                                     (3, "U", "metropolis", 12), (1, "U", "metropolis", 30)])
def test_nan_in_field_raises_naming_sweep_and_site(nf, group, schedule, at):
    sim = Simulation(_cfg(nf, group, schedule=schedule))
    site = 37
    sink = MemorySink()
    with pytest.raises(NumericalError) as info:
        run_chain(sim, (sink, _Injector(at, nf * nf - 1, site)))
    msg = str(info.value)
    assert f"sweep {at}" in msg and f"site {site}" in msg, msg
    assert "\n" not in msg
    assert sim.state.sweep == at  # detected before the next sweep touched the field
    assert all(np.isfinite(r["action"]) for r in sink.records)


def test_nan_in_nf3_heatbath_does_not_hang():
    # The Kennedy-Pendleton / von Mises rejection loops of kernels/group.py never end on a NaN
    # coupling (reported); run_chain must stop before a sweep sees the NaN.  Subprocess + timeout
    # so that a regression fails instead of hanging the suite.
    code = textwrap.dedent("""
        import numpy as np
        from sigmasim.chain import Simulation, run_chain
        from sigmasim.config import config_from_dict
        from sigmasim.errors import NumericalError
        cfg = config_from_dict({"lattice": {"shape": [4, 4]}, "model": {"nf": 3, "kappa": 0.3},
                                "run": {"thermalize": 3, "measurements": 20, "start": "hot"}})
        sim = Simulation(cfg)
        class Inject:
            def start(self, s): pass
            def record(self, s, r):
                if s.state.sweep == 7: s.state.im[4, 5] = np.nan
            def checkpoint(self, s): pass
            def finish(self, s): pass
        try:
            run_chain(sim, (Inject(),))
        except NumericalError as exc:
            print("OK", exc)
    """)
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300,
                       env=subprocess_env())
    assert r.returncode == 0, r.stderr
    assert r.stdout.startswith("OK") and "sweep 7" in r.stdout and "site 5" in r.stdout


@pytest.mark.filterwarnings("ignore:invalid value")
def test_measure_guard_names_sweep_and_site():
    sim = Simulation(_cfg(2))
    sim.state.sweep = 17
    sim.state.im[1, 11] = np.inf
    with pytest.raises(NumericalError, match=r"sweep 17 at site 11"):
        sim.measure()


def test_nan_through_cli_keeps_last_good_checkpoint(tmp_path, monkeypatch, capsys):
    cfg_text = textwrap.dedent("""
        name = "nanrun"
        seed = 8
        [lattice]
        shape = [8, 4, 4]
        [model]
        nf = 2
        beta = 0.6
        mass = 0.3
        kappa = 0.4
        theta = 2.0
        [run]
        thermalize = 3
        measurements = 25
        checkpoint_every = 4
        start = "hot"
    """)
    cfg = tmp_path / "nan.toml"
    cfg.write_text(cfg_text)
    ref_out, out = tmp_path / "ref", tmp_path / "out"
    assert main(["run", str(cfg), "--output", str(ref_out), "--quiet"]) == 0
    capsys.readouterr()

    real_sweep = Simulation.sweep

    def bad_sweep(self):
        real_sweep(self)
        if self.state.sweep == 10:
            self.state.re[0, 3] = np.nan

    monkeypatch.setattr(Simulation, "sweep", bad_sweep)
    rc = main(["run", str(cfg), "--output", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1 and err.startswith("sigmasim: error:") and "Traceback" not in err
    assert "sweep 10" in err and "site 3" in err, err
    path = out / "nanrun" / "nanrun.h5"
    d = open_run(path)
    with h5py.File(path, "r") as f:
        assert int(f.attrs["sweep"]) == 8  # the last checkpoint before the NaN
        assert np.isfinite(f["state/re"][...]).all()
    assert len(d) == 8 - 3
    monkeypatch.setattr(Simulation, "sweep", real_sweep)
    assert main(["run", str(cfg), "--output", str(out), "--quiet", "--resume"]) == 0
    a, b = open_run(ref_out / "nanrun" / "nanrun.h5"), open_run(path)
    for part in ("series", "slices"):
        for k, v in getattr(a, part).items():
            np.testing.assert_array_equal(v, getattr(b, part)[k], err_msg=k)


# --- the measured action against an independent numpy evaluation -------------------------------

def _haar(rng, n, nf, special):
    z = (rng.normal(size=(n, nf, nf)) + 1j * rng.normal(size=(n, nf, nf))) / math.sqrt(2)
    q, r = np.linalg.qr(z)
    d = np.diagonal(r, axis1=1, axis2=2)
    u = q * (d / np.abs(d))[:, None, :]
    if special:
        u = u * np.exp(-1j * np.angle(np.linalg.det(u)) / nf)[:, None, None]
    return u


def _angles(theta, nf, placement, special):
    # README: theta = nf theta_m - theta_a; SU puts it all in the mass phase
    if special or placement == "mass":
        return theta / nf, 0.0
    if placement == "anomaly":
        return 0.0, -theta
    return theta / (2 * nf), -theta / 2


CASES = [(nf, g) for nf in range(1, 9) for g in ("U", "SU") if not (g == "SU" and nf == 1)]


@pytest.mark.parametrize("nf, group", CASES)
def test_action_terms_equal_numpy(nf, group):
    rng = np.random.default_rng(1000 + 10 * nf + (group == "SU"))
    for trial in range(3):
        d = int(rng.integers(1, 5))
        shape = tuple(int(x) for x in rng.choice([2, 4, 6], size=d))
        if np.prod(shape) > 512:
            shape = shape[:2]
        beta, kappa, theta = rng.normal(), rng.normal(), rng.uniform(-7, 7)
        mass = [float(x) for x in rng.normal(size=nf)]
        placement = str(rng.choice(["mass", "anomaly", "split"]))
        cfg = config_from_dict({
            "lattice": {"shape": list(shape)},
            "model": {"nf": nf, "group": group, "beta": beta, "mass": mass, "kappa": kappa,
                      "theta": theta, "theta_placement": placement},
        })
        sim = Simulation(cfg)
        vol = sim.lattice.volume
        u_nat = _haar(rng, vol, nf, group == "SU")  # lexicographic site order
        u_cb = u_nat[sim.lattice.natural]  # checkerboard order, as the engine stores it
        flat = u_cb.reshape(vol, nf * nf).T
        sim.state = ChainState(np.ascontiguousarray(flat.real), np.ascontiguousarray(flat.imag))
        rec = sim.measure()

        ul = u_nat.reshape(shape + (nf, nf))
        link = sum((ul.conj() * np.roll(ul, -1, axis=mu)).sum().real for mu in range(d))
        tm, ta = _angles(theta, nf, placement, group == "SU")
        h = np.exp(1j * tm) * np.diag(mass)
        want = {
            "action_beta": -beta * link / vol,
            "action_mass": -np.einsum("ab,xba->", h, u_nat).real / vol,
            "action_det": -2 * kappa * (np.exp(1j * ta) * np.linalg.det(u_nat).sum()).real / vol,
        }
        want["action"] = sum(want.values())
        scale = abs(beta) * d * nf + np.abs(mass).sum() + 2 * abs(kappa)  # largest possible |term|
        for k, v in want.items():
            assert rec[k] == pytest.approx(v, rel=1e-12, abs=1e-14 * scale), (k, shape, placement)


@pytest.mark.parametrize("nf", range(1, 9))
def test_kernel_det_equals_numpy(nf):
    rng = np.random.default_rng(77 + nf)
    work = np.empty((nf, nf), dtype=np.complex128)
    unitary = _haar(rng, 200, nf, False)
    general = (rng.normal(size=(200, nf, nf)) + 1j * rng.normal(size=(200, nf, nf))) * rng.uniform(
        0.1, 10, size=(200, 1, 1))
    for m in np.concatenate([unitary, general]):
        m = np.ascontiguousarray(m)
        got = kernel_det(m, nf, work)
        want = np.linalg.det(m)
        assert abs(got - want) <= 1e-12 * abs(want), (nf, got, want)
    z = np.zeros((nf, nf), dtype=np.complex128)
    assert kernel_det(z, nf, work) == 0


# --- unwritable folder and full disk -------------------------------------------------------------

DISK_CFG = """
name = "disk"
seed = 21
[lattice]
shape = [8, 4]
[model]
nf = 2
beta = 0.6
mass = 0.3
kappa = 0.2
[run]
thermalize = 3
measurements = 20
checkpoint_every = 4
"""


def _one_line(err):
    assert_one_line_error(err)


def test_unwritable_output_folder_is_refused_before_the_run(tmp_path, capsys, monkeypatch):
    import os

    import sigmasim.chain as chain

    cfg = tmp_path / "disk.toml"
    cfg.write_text(DISK_CFG)
    started = []
    monkeypatch.setattr(chain, "run_chain", lambda *a, **k: started.append(1))
    outs = []
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    outs.append(blocker / "sub")  # fails for root too
    if os.geteuid() != 0:  # chmod does not stop root (CI runs as root)
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o500)
        outs.append(ro)
    for out in outs:
        rc = main(["run", str(cfg), "--output", str(out), "--quiet"])
        err = capsys.readouterr().err
        assert rc == 2
        _one_line(err)
        assert "output folder" in err, err
    assert not started and not list(tmp_path.rglob("*.h5"))


def _disk_full_at_second_checkpoint(monkeypatch, where):
    import errno

    import sigmasim.storage as storage

    calls = []
    if where == "copy":
        real = storage.shutil.copyfile

        def copyfile(src, dst, *a, **k):
            calls.append(dst)
            if len(calls) == 2:
                raise OSError(errno.ENOSPC, "No space left on device", str(dst))
            return real(src, dst, *a, **k)

        monkeypatch.setattr(storage.shutil, "copyfile", copyfile)
    else:  # the copy succeeds, the h5py append fails
        real_file = storage.h5py.File

        def file(name, mode="r", *a, **k):
            if mode == "a":
                calls.append(name)
                if len(calls) == 2:
                    raise OSError(errno.ENOSPC, "No space left on device")
            return real_file(name, mode, *a, **k)

        monkeypatch.setattr(storage.h5py, "File", file)


@pytest.mark.parametrize("where", ["copy", "hdf5"])
def test_full_disk_at_second_checkpoint(tmp_path, capsys, monkeypatch, where):
    cfg = tmp_path / "disk.toml"
    cfg.write_text(DISK_CFG)
    ref, out = tmp_path / "ref", tmp_path / "out"
    assert main(["run", str(cfg), "--output", str(ref), "--quiet"]) == 0
    capsys.readouterr()
    with monkeypatch.context() as m:
        _disk_full_at_second_checkpoint(m, where)
        rc = main(["run", str(cfg), "--output", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    _one_line(err)
    assert "No space left on device" in err and "--resume" in err, err
    path = out / "disk" / "disk.h5"
    assert not checkpoint_leftovers(path)
    d = open_run(path)  # the first checkpoint, intact
    with h5py.File(path, "r") as f:
        assert int(f.attrs["sweep"]) == 4
    assert len(d) == 1
    assert main(["run", str(cfg), "--output", str(out), "--quiet", "--resume"]) == 0
    a, b = open_run(ref / "disk" / "disk.h5"), open_run(path)
    for part in ("series", "slices"):
        for k, v in getattr(a, part).items():
            np.testing.assert_array_equal(v, getattr(b, part)[k], err_msg=k)


def test_full_disk_when_creating_the_file(tmp_path, capsys, monkeypatch):
    import errno

    import sigmasim.storage as storage

    cfg = tmp_path / "disk.toml"
    cfg.write_text(DISK_CFG)
    real_file = storage.h5py.File

    def file(name, mode="r", *a, **k):
        if mode == "w":
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_file(name, mode, *a, **k)

    monkeypatch.setattr(storage.h5py, "File", file)
    rc = main(["run", str(cfg), "--output", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    _one_line(err)
    assert "No space left on device" in err
    assert not [p for p in (tmp_path / "out").rglob("*") if p.is_file()]


# ---------------------------------------------------------------------------------------------
# the local action change of the kernels equals the difference of full actions (every term)
@pytest.mark.parametrize("nf", range(1, 9))
@pytest.mark.parametrize("group", ["U", "SU"])
def test_local_action_change_equals_full_difference(nf, group):
    from scipy.stats import unitary_group

    from sigmasim.chain import Simulation
    from sigmasim.config import config_from_dict
    from sigmasim.kernels.general import site_action_change

    if group == "SU" and nf == 1:
        pytest.skip("SU needs nf >= 2")
    rng = np.random.default_rng(100 + nf)
    cfg = config_from_dict({
        "lattice": {"shape": [4, 2, 4]},
        "model": {"nf": nf, "group": group, "beta": 0.7, "mass": list(rng.normal(size=nf)),
                  "kappa": 0.9, "theta": 2.3, "theta_placement": "split"},
        "run": {"start": "hot"}, "seed": nf,
    })
    sim = Simulation(cfg)
    st, lat = sim.state, sim.lattice

    def full_action():
        u = (st.re + 1j * st.im).T.reshape(-1, nf, nf)
        link = sum(np.einsum("xab,xab->", u.conj(), u[lat.neighbours[2 * mu]]).real
                   for mu in range(lat.ndim))
        mass = np.einsum("f,xff->", sim.hdiag, u).real
        return -cfg.beta * link - mass - 2 * cfg.kappa * (cfg.eta * np.linalg.det(u).sum()).real

    for s in rng.choice(lat.volume, size=5, replace=False):
        r = unitary_group.rvs(nf, random_state=rng) if nf > 1 else np.exp(1j * rng.uniform(0, 6.3, (1, 1)))
        if group == "SU":
            r = r / np.linalg.det(r) ** (1 / nf)
        local = site_action_change(st.re, st.im, lat.neighbours, s, nf, cfg.beta, sim.hdiag, cfg.kappa,
                                   cfg.eta, np.ascontiguousarray(r))
        before = full_action()
        u = (st.re[:, s] + 1j * st.im[:, s]).reshape(nf, nf)
        new = (r @ u).ravel()
        old_re, old_im = st.re[:, s].copy(), st.im[:, s].copy()
        st.re[:, s], st.im[:, s] = new.real, new.imag
        after = full_action()
        st.re[:, s], st.im[:, s] = old_re, old_im
        assert abs(local - (after - before)) < 1e-10 * max(1.0, abs(before))
