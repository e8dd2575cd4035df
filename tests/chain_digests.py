"""Digests of the run files of a few tiny configs: the proof that a refactoring left the chains alone.

Each config is run through ``sigmasim run`` (in process, one thread) into a temporary folder; the
digest of a run file is the SHA-256 of every dataset (series, slices, state field) and of the state
attributes and root counters; provenance and timestamps are left out.  The stored digests
(``tests/chain_digests.json``) were made before the models package existed; ``test_chain_digests.py``
compares against them.

Linear runs of format version 2 name two records differently (``RENAMED``); their digests are
compared under the version-1 names, and ``series/action_beta`` (a copy of ``series/action_kinetic``
in version 1) is no longer written.

    python tests/chain_digests.py --write     # store the digests of this checkout
    python tests/chain_digests.py             # compare with the stored ones
"""

from __future__ import annotations

import hashlib
import json
import sys
import tempfile
from pathlib import Path

import h5py
import numpy as np

STORED = Path(__file__).with_name("chain_digests.json")

#: version-2 name of a linear record -> its version-1 name
RENAMED = {"slices/Phi": "slices/U"}
#: version-1 linear records that version 2 no longer writes (duplicates of another record)
DROPPED = ("series/action_beta",)

_RUN = {"thermalize": 6, "measurements": 8, "measure_every": 1, "checkpoint_every": 5}

#: name -> (config dict, resume extension or None)
CONFIGS = {
    "u1-metropolis": ({"seed": 11, "lattice": {"shape": [4, 4]},
                       "model": {"nf": 1, "beta": 0.7, "mass": 0.3, "kappa": 0.2, "theta": 1.0},
                       "updates": {"schedule": [{"update": "metropolis", "repeat": 1}]},
                       "run": {**_RUN, "start": "hot"}}, None),
    "u1-heatbath": ({"seed": 12, "lattice": {"shape": [4, 4, 2]},
                     "model": {"nf": 1, "beta": 0.6, "mass": 0.2, "theta": 2.0},
                     "updates": {"schedule": [{"update": "heatbath", "repeat": 1},
                                              {"update": "overrelax", "repeat": 1}]},
                     "run": {**_RUN, "start": "hot", "measure_every": 2}}, None),
    "u2-metropolis": ({"seed": 13, "lattice": {"shape": [4, 4]},
                       "model": {"nf": 2, "beta": 0.8, "mass": [0.2, 0.4], "kappa": 0.5, "theta": 2.5},
                       "updates": {"schedule": [{"update": "metropolis", "repeat": 1},
                                                {"update": "heatbath", "repeat": 1}]},
                       "run": {**_RUN, "start": "hot"}}, None),
    "u3-heatbath": ({"seed": 14, "lattice": {"shape": [4, 4]},
                     "model": {"nf": 3, "beta": 1.0, "mass": 0.2, "kappa": 1.0, "theta": 3.0,
                               "theta_placement": "split"},
                     "updates": {"schedule": [{"update": "heatbath", "repeat": 1},
                                              {"update": "overrelax", "repeat": 2}], "reunitarize_every": 3},
                     "run": {**_RUN, "start": "hot"}}, None),
    "u3-metropolis-resumed": ({"seed": 15, "lattice": {"shape": [4, 4]},
                               "model": {"nf": 3, "beta": 0.9, "mass": 0.3, "kappa": 0.7, "theta": 1.0},
                               "updates": {"schedule": [{"update": "metropolis", "repeat": 1}],
                                           "tune_every": 2},
                               "run": {**_RUN, "start": "hot"}}, 7),
    "su2-heatbath": ({"seed": 16, "lattice": {"shape": [4, 4]},
                      "model": {"group": "SU", "nf": 2, "beta": 0.9, "mass": 0.3},
                      "updates": {"schedule": [{"update": "heatbath", "repeat": 1},
                                               {"update": "overrelax", "repeat": 1}]},
                      "run": {**_RUN, "start": "hot"}}, None),
    "su3-metropolis": ({"seed": 17, "lattice": {"shape": [4, 2]},
                        "model": {"group": "SU", "nf": 3, "beta": 1.1, "mass": 0.2},
                        "updates": {"schedule": [{"update": "metropolis", "repeat": 1},
                                                 {"update": "overrelax", "repeat": 1}], "tune_every": 3},
                        "run": {**_RUN, "start": "hot"}}, None),
    "u4-metropolis": ({"seed": 18, "lattice": {"shape": [2, 2, 2]},
                       "model": {"nf": 4, "beta": 0.5, "mass": 0.2, "kappa": 0.3, "theta": 0.5},
                       "updates": {"schedule": [{"update": "metropolis", "repeat": 1},
                                                {"update": "heatbath", "repeat": 1}]},
                       "run": {**_RUN, "start": "hot"}}, None),
    "linear1-resumed": ({"seed": 19, "lattice": {"shape": [4, 4]},
                         "model": {"kind": "linear", "nf": 1, "mu2": -0.5, "lambda1": 0.3, "c": 0.2,
                                   "mass": 0.1, "theta": 1.5},
                         "updates": {"schedule": [{"update": "metropolis", "repeat": 1},
                                                  {"update": "heatbath", "repeat": 1}], "tune_every": 2},
                         "run": {**_RUN}}, 5),
    "linear2": ({"seed": 20, "lattice": {"shape": [4, 4]},
                 "model": {"kind": "linear", "nf": 2, "mu2": 0.5, "lambda1": 0.2, "lambda2": 0.1, "c": 0.3,
                           "mass": 0.2, "theta": 2.0},
                 "updates": {"schedule": [{"update": "heatbath", "repeat": 1},
                                          {"update": "overrelax", "repeat": 1},
                                          {"update": "metropolis", "repeat": 1}]},
                 "run": {**_RUN}}, None),
}


def _toml(raw: dict) -> str:
    def value(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, list):
            return "[" + ", ".join(value(x) for x in v) + "]"
        if isinstance(v, dict):
            return "{" + ", ".join(f"{k} = {value(x)}" for k, x in v.items()) + "}"
        return repr(v)

    lines = [f"{k} = {value(v)}" for k, v in raw.items() if not isinstance(v, dict)]
    for k, v in raw.items():
        if isinstance(v, dict):
            lines.append(f"[{k}]")
            lines += [f"{kk} = {value(x)}" for kk, x in v.items()]
    return "\n".join(lines) + "\n"


def _digest(obj) -> str:
    a = np.asarray(obj)
    h = hashlib.sha256(f"{a.dtype.str}{a.shape}".encode())
    h.update(np.ascontiguousarray(a).tobytes() if a.dtype.kind != "U" else str(a).encode())
    return h.hexdigest()[:24]


def file_digests(path) -> dict:
    """name -> digest of every dataset (not /provenance), the /state attributes and root counters."""
    out = {}
    with h5py.File(path, "r") as f:
        def visit(name, obj):
            if isinstance(obj, h5py.Dataset) and not name.startswith("provenance"):
                out[name] = _digest(obj[...])

        f.visititems(visit)
        for k, v in f["state"].attrs.items():
            out[f"state@{k}"] = _digest(v)
        for k in ("n_meas", "sweep"):
            out[f"@{k}"] = _digest(int(f.attrs[k]))
        out["@status"] = str(f.attrs["status"])
    return out


def as_version1(digests: dict) -> dict:
    """Digests of a version-2 linear file under the version-1 names (see RENAMED)."""
    return {RENAMED.get(k, k): v for k, v in digests.items()}


def run_digests(names=None, folder=None) -> dict:
    """Run the configs through ``sigmasim run`` and return name -> file digests."""
    import contextlib
    import io

    from sigmasim.cli import main

    names = list(CONFIGS) if names is None else names
    out = {}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(folder or tmp)
        for name in names:
            raw, extend = CONFIGS[name]
            raw = {"name": name, **raw, "run": {**raw["run"], "output": str(tmp / "runs"), "threads": 1}}
            cfg = tmp / f"{name}.toml"
            cfg.write_text(_toml(raw))
            with contextlib.redirect_stdout(io.StringIO()):  # the summary tables
                assert main(["run", str(cfg), "--quiet"]) == 0, name
                if extend is not None:
                    raw["run"]["measurements"] += extend
                    cfg.write_text(_toml(raw))
                    assert main(["run", str(cfg), "--quiet", "--resume"]) == 0, name
            d = file_digests(tmp / "runs" / name / f"{name}.h5")
            if raw["model"].get("kind") == "linear":
                d = as_version1(d)
            out[name] = d
    return out


def compare(got: dict, stored: dict) -> list[str]:
    """Differences between run digests and the stored ones (linear: DROPPED records may be missing)."""
    bad = []
    for name, want in stored.items():
        have = got.get(name)
        if have is None:
            continue
        linear = CONFIGS[name][0]["model"].get("kind") == "linear"
        for k in sorted(set(want) | set(have)):
            if linear and k in DROPPED and k not in have:
                continue
            if want.get(k) != have.get(k):
                bad.append(f"{name}: {k}: stored {want.get(k)} now {have.get(k)}")
    return bad


if __name__ == "__main__":
    import os

    os.environ.setdefault("NUMBA_NUM_THREADS", "1")
    got = run_digests()
    if "--write" in sys.argv:
        STORED.write_text(json.dumps(got, indent=1, sort_keys=True) + "\n")
        print(f"wrote {STORED} ({len(got)} runs)")
    else:
        diff = compare(got, json.loads(STORED.read_text()))
        print("\n".join(diff) or f"all {len(got)} runs identical to the stored digests")
        sys.exit(1 if diff else 0)
