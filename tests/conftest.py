"""Test-suite settings.

Linear algebra in the fits runs on tiny matrices, where a multithreaded BLAS only
competes with numba's threads for the two cores; one BLAS thread is much faster.
This must be set before numpy is first imported.
"""

import os

for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "1")

import pytest  # noqa: E402  (after the BLAS settings above)


@pytest.fixture(scope="module")
def one_thread():
    """One numba thread for a module (small lattices: threading only costs; results do not depend
    on the thread count).  Use with ``pytestmark = pytest.mark.usefixtures("one_thread")``."""
    import numba

    old = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(old)


@pytest.fixture
def tiny_config():
    """Builder of tiny run configs: ``tiny_config(kind, nf, shape, **run)`` -> RunConfig."""
    from runfiles import tiny_config_dict

    from sigmasim.config import config_from_dict

    def build(kind: str = "chiral", nf: int = 2, shape=(4, 4), **run):
        return config_from_dict(tiny_config_dict(kind, nf, shape, **run))

    return build
