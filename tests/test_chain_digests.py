"""The chains of ten tiny configs (every model and update, two resumes) give the run files whose
digests were stored before the models package and the one chain loop existed (tests/chain_digests.py)."""

import json

import pytest

import chain_digests


pytestmark = pytest.mark.usefixtures("one_thread")  # conftest: one numba thread


def test_run_files_are_bit_identical_to_the_stored_digests(tmp_path):
    stored = json.loads(chain_digests.STORED.read_text())
    assert set(stored) == set(chain_digests.CONFIGS)
    got = chain_digests.run_digests(folder=tmp_path)
    assert chain_digests.compare(got, stored) == []


def test_the_comparison_sees_a_changed_record():
    stored = json.loads(chain_digests.STORED.read_text())
    changed = {name: dict(d) for name, d in stored.items()}
    changed["u1-metropolis"]["series/action"] = "0" * 24
    del changed["linear2"]["series/phi2"]
    assert chain_digests.compare(changed, stored) == [
        f"linear2: series/phi2: stored {stored['linear2']['series/phi2']} now None",
        f"u1-metropolis: series/action: stored {stored['u1-metropolis']['series/action']} now {'0' * 24}"]
