"""The hot start: Haar-distributed, and the same bits on every machine.

The start must not run CPU-dependent library code: numpy's QR and det go through OpenBLAS,
which picks its kernels by CPU, and the last bits of the start (then the whole chain) moved
between machines with and without AVX-512.  The first test forces two OpenBLAS kernel sets
(``OPENBLAS_CORETYPE``, both run on any x86-64) in subprocesses; it fails on the QR start.
"""

from __future__ import annotations

import hashlib
import os
import platform
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from sigmasim.config import config_from_dict
from sigmasim.lattice import make_lattice
from sigmasim.models.chiral import initial_field

ROOT = Path(__file__).resolve().parents[1]

_DIGEST = """
import hashlib
from sigmasim.config import config_from_dict
from sigmasim.lattice import make_lattice
from sigmasim.models.chiral import initial_field
h = hashlib.sha256()
for nf, group in ((2, "U"), (3, "U"), (3, "SU"), (5, "U")):
    cfg = config_from_dict({"name": "h", "seed": 7, "lattice": {"shape": [4, 4]},
                            "model": {"nf": nf, "group": group, "beta": 0.5, "mass": 0.1},
                            "run": {"start": "hot", "threads": 1}})
    re, im = initial_field(cfg, make_lattice((4, 4)))
    h.update(re.tobytes()); h.update(im.tobytes())
print(h.hexdigest())
"""


def _start(nf, group, shape, seed=7):
    cfg = config_from_dict({"name": "h", "seed": seed, "lattice": {"shape": list(shape)},
                            "model": {"nf": nf, "group": group, "beta": 0.5, "mass": 0.1},
                            "run": {"start": "hot", "threads": 1}})
    re, im = initial_field(cfg, make_lattice(tuple(shape)))
    return (re + 1j * im).T.reshape(-1, nf, nf)


@pytest.mark.skipif(platform.machine() not in ("x86_64", "AMD64"), reason="OpenBLAS core types of x86-64")
def test_hot_start_does_not_depend_on_the_blas_kernels():
    out = []
    for core in ("Prescott", "Nehalem"):
        env = {**os.environ, "OPENBLAS_CORETYPE": core, "NUMBA_NUM_THREADS": "1",
               "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
        p = subprocess.run([sys.executable, "-c", _DIGEST], capture_output=True, text=True, env=env,
                           cwd=ROOT, timeout=600)
        assert p.returncode == 0, p.stderr
        out.append(p.stdout.strip())
    assert out[0] == out[1]


@pytest.mark.parametrize("nf, group", [(1, "U"), (2, "U"), (3, "U"), (2, "SU"), (3, "SU"), (4, "U")])
def test_hot_start_is_haar(nf, group):
    """Moments of Haar-random matrices, site by site (independent draws, 4 sigma):
    E Tr U = 0, E |Tr U|^2 = 1 and, for nf >= 2, E |Tr U|^4 = 2 (P. Diaconis and M. Shahshahani,
    J. Appl. Probab. 31A (1994) 49: E |Tr U|^{2k} = k! for k <= nf on U(nf); on SU(nf), nf >= 2,
    the same for k = 1, 2 except SU(2), where Tr U is real and E (Tr U)^4 = 2 too (the Catalan
    number C_2; common practice, no source)); E |U_11|^2 = 1/nf; and U unitary (SU: det 1)."""
    u = _start(nf, group, (64, 64), seed=3)
    eye = np.eye(nf)
    assert np.abs(np.einsum("sba,sbc->sac", u.conj(), u) - eye).max() < 1e-13
    if group == "SU":
        assert np.abs(np.linalg.det(u) - 1).max() < 1e-13
    t = np.trace(u, axis1=1, axis2=2)
    n = len(t)
    checks = [(t.real, 0.0), (t.imag, 0.0), (np.abs(t) ** 2, 1.0), (np.abs(u[:, 0, 0]) ** 2, 1.0 / nf)]
    if nf >= 2:
        checks.append((np.abs(t) ** 4, 2.0))
    for x, exact in checks:
        if np.ptp(x) < 1e-12:  # fixed up to rounding: |Tr U| = 1 on U(1), Im Tr U = 0 on SU(2)
            assert abs(x.mean() - exact) < 1e-12
            continue
        z = (x.mean() - exact) / (x.std(ddof=1) / np.sqrt(n))
        assert abs(z) < 4, (exact, x.mean(), z)


def test_hot_start_depends_on_the_seed_only():
    a = _start(3, "U", (4, 4), seed=5)
    b = _start(3, "U", (4, 4), seed=5)
    c = _start(3, "U", (4, 4), seed=6)
    assert hashlib.sha256(a.tobytes()).digest() == hashlib.sha256(b.tobytes()).digest()
    assert not np.allclose(a, c)
