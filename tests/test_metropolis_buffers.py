"""The Metropolis kernels' two ways of keeping U between hits give the same numbers.

Compiled for AVX-512, ``u3.metropolis_u3`` and ``unf.metropolis_u2`` write each hit's U and
det U back into the scratch they read (masked stores are cheap there); compiled without it,
they alternate between two buffers (``simd.avx512_code``).  Only one of the two is
compiled on a given machine, so the other is compiled here in a subprocess for a target with
every avx512 feature off (AVX2 and FMA kept): on an AVX-512 host that is the buffered path,
on an AVX2 host the subprocess gives the same code as this process and the test still runs.
Odd and even hit counts (the last hit's U in the second buffer or the first), both colours.
"""

import subprocess
import sys

import pytest

from runfiles import subprocess_env

SCRIPT = r"""
import hashlib, sys
import numpy as np
from sigmasim.kernels.simd import avx512_code
from sigmasim.kernels.u3 import metropolis_u3_update, rows_per_chunk3
from sigmasim.kernels.unf import metropolis_u2_update
from sigmasim.lattice import make_lattice
from numba import njit

@njit(cache=False)
def cheap():
    return avx512_code()

def digest():
    out = [str(cheap())]
    for nf, f in ((2, metropolis_u2_update), (3, metropolis_u3_update)):
        for shape in ((4, 4, 16), (2, 6, 6)):
            lat = make_lattice(shape)
            rng = np.random.default_rng(11)
            z = rng.normal(size=(lat.volume, nf, nf)) + 1j * rng.normal(size=(lat.volume, nf, nf))
            q, r = np.linalg.qr(z)
            u = q * (np.diagonal(r, axis1=1, axis2=2) / abs(np.diagonal(r, axis1=1, axis2=2)))[:, None, :]
            flat = u.reshape(lat.volume, nf * nf).T
            re, im = np.ascontiguousarray(flat.real), np.ascontiguousarray(flat.imag)
            hdiag = np.array([0.3 - 0.1j, 0.2 + 0.05j, -0.1 + 0.2j])[:nf]
            h = lat.row_len_half
            h_ = hashlib.sha256()
            for nhits in (3, 4):
                acc = 0
                for step in range(0, 6, 2):
                    acc += f(re, im, lat.row_neighbours, lat.row_parity, h, 0.9, hdiag, 0.3, -0.2, False, 0.6,
                             np.uint64(12345), step, 7, nhits, rows_per_chunk3(h), 1)
                h_.update(np.int64(acc).tobytes())
                h_.update(re.tobytes())
                h_.update(im.tobytes())
            out.append(h_.hexdigest())
    return " ".join(out)

print(digest())
"""


def _no_avx512_env(tmp_path):
    from llvmlite import binding as ll

    feats = ll.get_host_cpu_features()
    if not feats.get("avx2", False):
        pytest.skip("needs a host with AVX2")
    flat = ",".join(("-" if k.startswith("avx512") or not v else "+") + k for k, v in sorted(feats.items()))
    return subprocess_env(NUMBA_CPU_NAME="haswell", NUMBA_CPU_FEATURES=flat, NUMBA_CACHE_DIR=tmp_path / "cache")


def test_buffered_hits_give_the_in_place_numbers(tmp_path):
    space = {}
    exec(SCRIPT.replace("print(digest())", ""), space)
    a = space["digest"]().split()  # this process: the path compiled for this machine
    env = _no_avx512_env(tmp_path)  # subprocess_env (one thread) plus the target without avx512
    other = subprocess.run([sys.executable, "-c", SCRIPT], capture_output=True, text=True, env=env, timeout=600)
    assert other.returncode == 0, other.stderr
    b = other.stdout.split()
    assert b[0] == "False"  # the subprocess compiled the buffered path
    assert a[1:] == b[1:]
    assert len(set(a[1:])) == len(a[1:])  # four different chains (the digests see the field)
