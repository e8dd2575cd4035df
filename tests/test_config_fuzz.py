"""Property-based fuzzing of configs: every malformed config is refused in one line, exit 2.

Each example starts from a valid config, breaks it in one way, writes it as
TOML and runs ``sigmasim.cli.main(['run', path, '--output', dir, '--quiet'])``
in-process.  It must return 2, print exactly one stderr line starting with
``sigmasim: error:`` that names the offending key (or the problem), raise
nothing, and write no file under the output folder.  About 1100 examples in
all (derandomized, so every run tries the same ones); a handful more go
through a real subprocess to prove no traceback reaches the terminal.

Unstable couplings of the linear sigma model (actions unbounded below) are one
of the categories: each must be refused naming the unbounded action.
"""

import contextlib
import io
import json
import math
import subprocess
import sys
import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sigmasim.cli import main
from sigmasim.config import SCHEMA

from runfiles import subprocess_env

SETTINGS = dict(deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])

BASE = {
    "name": "fuzz",
    "seed": 3,
    "lattice": {"shape": [4, 4]},
    "model": {"group": "U", "nf": 2, "beta": 0.5, "mass": 0.1, "kappa": 0.2, "theta": 1.0,
              "theta_placement": "mass"},
    "updates": {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}],
                "metropolis_hits": 2, "target_acceptance": 0.5, "initial_step": 0.5, "tune_every": 5,
                "reunitarize_every": 5},
    "run": {"thermalize": 2, "measurements": 3, "measure_every": 1, "start": "cold", "start_branch": 0,
            "checkpoint_every": 10, "checkpoint_seconds": 60.0, "output": "runs", "threads": 1},
}

KEYS = [(sec, key, kind) for sec, keys in SCHEMA.items() for key, (kind, _, _) in keys.items()
        if (sec, key) != ("model", "kind")]  # a key another developer is adding; not fuzzed here


# --- TOML writing (no third-party writer: the subset the configs need) ------------------------

def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)  # its escapes are valid TOML escapes
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{json.dumps(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(v)


def to_toml(raw: dict) -> str:
    lines = [f"{json.dumps(k)} = {_toml_value(v)}" for k, v in raw.items() if not isinstance(v, dict)]
    for k, v in raw.items():
        if isinstance(v, dict):
            lines.append(f"[{json.dumps(k)}]")
            lines += [f"{json.dumps(k2)} = {_toml_value(v2)}" for k2, v2 in v.items()]
    return "\n".join(lines) + "\n"


def _with(sec, key, value) -> dict:
    raw = json.loads(json.dumps(BASE))
    (raw if not sec else raw[sec])[key] = value
    return raw


def _where(sec, key):
    return f"{sec}.{key}" if sec else key


_ROOT = Path(tempfile.mkdtemp(prefix="sigmasim-fuzz-"))
_COUNT = [0]


def assert_refused(raw: dict, words) -> str:
    """Run ``raw`` through the CLI in-process and check the one-line refusal."""
    _COUNT[0] += 1
    case = _ROOT / f"c{_COUNT[0]}"
    out = case / "out"
    case.mkdir()
    cfg = case / "c.toml"
    cfg.write_text(to_toml(raw))
    err, so = io.StringIO(), io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(so):
        rc = main(["run", str(cfg), "--output", str(out), "--quiet"])
    text = err.getvalue()
    assert rc == 2, (raw, text, so.getvalue())
    assert text.count("\n") == 1 and text.endswith("\n"), text
    assert text.startswith("sigmasim: error:"), text
    assert "Traceback" not in text
    words = [words] if isinstance(words, str) else words
    assert any(w in text for w in words), (words, text)
    assert not out.exists() or not [p for p in out.rglob("*") if p.is_file()], "a file was written"
    return text


# --- strategies -----------------------------------------------------------------------------

TEXT = st.text(st.characters(codec="utf-8", exclude_categories=["Cs", "Cc"]), max_size=8)
NUMBER = st.one_of(st.integers(-10**6, 10**6), st.floats(-1e3, 1e3, allow_nan=False))


def wrong_value(kind):
    """Values of a wrong type for a key of this kind."""
    table = st.dictionaries(st.sampled_from(["a", "b"]), st.integers(0, 3), min_size=1, max_size=2)
    common = [table, st.lists(st.integers(0, 3), min_size=2, max_size=3).map(lambda x: [x])]
    if kind.startswith("int"):
        return st.one_of(TEXT, st.booleans(), st.floats(allow_nan=False).filter(lambda x: x != int(x)
                         if math.isfinite(x) else True), st.lists(st.integers(), max_size=2), *common)
    if kind.startswith("real"):
        return st.one_of(TEXT, st.booleans(), st.lists(NUMBER, max_size=2), *common)
    if kind.startswith("choice:"):
        return st.one_of(st.integers(), st.booleans(), TEXT.filter(lambda s: s not in kind[7:].split(",")),
                         *common)
    if kind == "name":
        bad = st.sampled_from(["", "a b", "x/y", ".hidden", "../up", "a" * 101, "semi;colon", "tab\t"])
        return st.one_of(st.integers(), st.booleans(), bad, *common)
    if kind == "str":
        return st.one_of(st.integers(), st.booleans(), st.just(""), st.lists(TEXT, max_size=2), *common)
    if kind == "shape":
        return st.one_of(TEXT, st.integers(), st.just([]), st.lists(TEXT, min_size=1, max_size=3),
                         st.lists(st.floats(2.5, 9.5), min_size=1, max_size=3), table)
    if kind == "mass":
        return st.one_of(TEXT, st.booleans(), st.just([]), st.lists(TEXT, min_size=1, max_size=2), table)
    if kind == "schedule":
        item = st.one_of(st.integers(), TEXT, st.fixed_dictionaries({"update": TEXT.filter(
            lambda s: s not in ("metropolis", "heatbath", "overrelax"))}),
            st.fixed_dictionaries({"update": st.just("heatbath"),
                                   "repeat": st.one_of(st.integers(-5, 0), st.integers(1001, 10**6),
                                                       TEXT, st.floats(1.5, 2.5))}))
        return st.one_of(TEXT, st.integers(), st.just([]), st.lists(item, min_size=1, max_size=3))
    raise AssertionError(kind)


@st.composite
def wrong_types(draw):
    sec, key, kind = draw(st.sampled_from(KEYS))
    return _with(sec, key, draw(wrong_value(kind))), _where(sec, key)


@settings(max_examples=300, **SETTINGS)
@given(wrong_types())
def test_wrong_types(case):
    raw, where = case
    assert_refused(raw, where)


COUNTS = {  # key -> values out of range (zero, negative, too large)
    ("", "seed"): st.integers(-10**12, -1),
    ("model", "nf"): st.one_of(st.integers(-100, 0), st.integers(9, 10**6)),
    ("updates", "metropolis_hits"): st.one_of(st.integers(-100, 0), st.integers(1001, 10**9)),
    ("updates", "tune_every"): st.integers(-100, 0),
    ("updates", "reunitarize_every"): st.integers(-100, 0),
    ("updates", "initial_step"): st.floats(-1e6, 0.0),
    ("updates", "target_acceptance"): st.one_of(st.floats(-1e3, 0.0), st.floats(1.0, 1e3)),
    ("run", "thermalize"): st.integers(-10**9, -1),
    ("run", "measurements"): st.one_of(st.integers(-10**9, 0), st.integers(10**9 + 1, 10**15)),
    ("run", "measure_every"): st.integers(-100, 0),
    ("run", "checkpoint_every"): st.integers(-100, 0),
    ("run", "checkpoint_seconds"): st.floats(-1e6, 0.0),
    ("run", "threads"): st.one_of(st.integers(-100, -1), st.integers(1025, 10**6)),
    ("run", "start_branch"): st.one_of(st.integers(-10**6, -1001), st.integers(1001, 10**6)),
}


@st.composite
def bad_sizes(draw):
    if draw(st.booleans()):
        (sec, key), values = draw(st.sampled_from(sorted(COUNTS.items())))
        return _with(sec, key, draw(values)), _where(sec, key)
    extents = st.one_of(st.integers(-10, 1), st.integers(1, 50).map(lambda k: 2 * k + 1),
                        st.integers(1, 8).map(lambda k: 2 * k))
    shape = draw(st.one_of(st.lists(extents, min_size=1, max_size=4).filter(
        lambda s: any(n < 2 or n % 2 for n in s)), st.lists(st.sampled_from([2, 4]), min_size=5, max_size=7)))
    return _with("lattice", "shape", shape), "lattice.shape"


@settings(max_examples=250, **SETTINGS)
@given(bad_sizes())
def test_zero_negative_odd_sizes(case):
    raw, where = case
    assert_refused(raw, where)


@st.composite
def bad_flavours(draw):
    which = draw(st.sampled_from(["su1", "nf", "mass"]))
    raw = json.loads(json.dumps(BASE))
    if which == "su1":
        raw["model"].update(group="SU", nf=1)
        return raw, "SU"
    if which == "nf":
        raw["model"]["nf"] = draw(st.one_of(st.integers(-10**3, 0), st.integers(9, 10**3)))
        return raw, "model.nf"
    nf = draw(st.integers(1, 8))
    n = draw(st.integers(2, 10).filter(lambda n: n != nf))
    raw["model"].update(nf=nf, mass=draw(st.lists(NUMBER, min_size=n, max_size=n)))
    return raw, "model.mass"


@settings(max_examples=100, **SETTINGS)
@given(bad_flavours())
def test_nf_out_of_range_and_su1(case):
    raw, where = case
    assert_refused(raw, where)


IDENT = st.from_regex(r"[a-z][a-z_]{0,10}", fullmatch=True)


@st.composite
def unknown_keys(draw):
    level = draw(st.sampled_from(["", "lattice", "model", "updates", "run", "schedule", "section"]))
    raw = json.loads(json.dumps(BASE))
    if level == "":
        key = draw(IDENT.filter(lambda k: k not in SCHEMA[""] and k not in SCHEMA))
        raw[key] = draw(st.one_of(st.integers(0, 5), NUMBER, TEXT))
    elif level == "schedule":
        key = draw(IDENT.filter(lambda k: k not in ("update", "repeat")))
        i = draw(st.integers(0, 1))
        raw["updates"]["schedule"][i][key] = 1
    elif level == "section":  # a known section given as a plain value
        key = draw(st.sampled_from(["lattice", "model", "updates", "run"]))
        raw[key] = draw(st.one_of(st.integers(), TEXT, st.lists(st.integers(), max_size=2)))
    else:
        key = draw(IDENT.filter(lambda k: k not in SCHEMA[level]))
        raw[level][key] = draw(st.one_of(st.integers(0, 5), TEXT, st.lists(st.integers(0, 3), max_size=2)))
    return raw, key


@settings(max_examples=200, **SETTINGS)
@given(unknown_keys())
def test_unknown_keys_at_every_level(case):
    raw, key = case
    # 'lattice.key' / 'key' for an unknown key, [section] for a section given as a plain value
    assert_refused(raw, [f".{key}'", f"'{key}'", f"[{key}]"])


NONFINITE = st.sampled_from([math.nan, math.inf, -math.inf])
REAL_KEYS = [("model", "beta"), ("model", "kappa"), ("model", "theta"), ("model", "mass"),
             ("updates", "target_acceptance"), ("updates", "initial_step"), ("run", "checkpoint_seconds")]


@st.composite
def nonfinite(draw):
    sec, key = draw(st.sampled_from(REAL_KEYS))
    if draw(st.booleans()):
        value = draw(NONFINITE)
    else:  # finite but absurd
        value = draw(st.floats(1e6, 1e300, exclude_min=True)) * draw(st.sampled_from([1, -1]))
    if key == "mass" and draw(st.booleans()):
        value = [0.1, value]  # inside the per-flavour list (nf = 2)
    return _with(sec, key, value), _where(sec, key)


@settings(max_examples=150, **SETTINGS)
@given(nonfinite())
def test_nan_inf_and_huge_couplings(case):
    raw, where = case
    assert_refused(raw, where)


@st.composite
def absurd_memory(draw):
    raw = json.loads(json.dumps(BASE))
    if draw(st.integers(0, 4)) == 0:  # fits in memory, not on any disk: measurements x slices
        raw["lattice"]["shape"] = [draw(st.sampled_from([1024, 4096, 65536])), 2]
        raw["model"].update(nf=8, mass=0.1)
        raw["run"]["measurements"] = draw(st.integers(10**8, 10**9))
        return raw, "disk space"
    # 2 to 4 power-of-two extents, V = 2^37 .. 2^61 sites: far beyond memory, no int64 overflow
    exps = draw(st.lists(st.integers(1, 30), min_size=2, max_size=4).filter(lambda e: 37 <= sum(e) <= 61))
    raw["lattice"]["shape"] = [2**e for e in exps]
    raw["model"]["nf"] = draw(st.integers(1, 8))
    raw["model"]["mass"] = 0.1
    return raw, "lattice.shape"


@settings(max_examples=100, **SETTINGS)
@given(absurd_memory())
def test_absurd_memory_requests(case):
    raw, where = case
    assert_refused(raw, where)


@st.composite
def unstable_linear(draw):
    """Linear-model couplings whose action is unbounded below (conditions in config.linear_stability)."""
    nf = draw(st.integers(1, 6))
    mass = draw(st.floats(-1, 1, allow_nan=False))
    model = {"kind": "linear", "nf": nf, "mass": mass, "mu2": draw(st.floats(-5, 5, allow_nan=False))}
    case = draw(st.integers(0, 3))
    if case == 0:  # negative quartic, no stabiliser
        l2 = draw(st.floats(-2, 2, allow_nan=False))
        q_min_target = -draw(st.floats(1e-3, 2, allow_nan=False))
        l1 = q_min_target - min(l2, l2 / nf)
        model.update(lambda1=l1, lambda2=l2)
    elif case == 1 and nf >= 5:  # determinant dominates the quartic terms without a stabiliser
        model.update(lambda1=draw(st.floats(0.01, 2)), lambda2=draw(st.floats(0.0, 2)),
                     c=draw(st.sampled_from([-1, 1])) * draw(st.floats(1e-3, 2)))
    elif case == 2 or nf == 4:  # nf = 4: det beats the quartic when |c| / 8 > lambda1 + lambda2 / 4
        nf = 4
        l1, l2 = draw(st.floats(0.0, 0.5)), draw(st.floats(0.0, 0.5))
        model.update(nf=4, lambda1=l1, lambda2=l2, c=8 * (l1 + l2 / 4) + draw(st.floats(1e-3, 2)))
    else:  # pure Gaussian part with a negative or too small mass term
        c = draw(st.floats(0.0, 2)) if nf == 2 else 0.0
        model.update(lambda1=0.0, lambda2=0.0, c=c, mu2=draw(st.floats(-5, 2 * c if nf == 2 else 0.0)))
    raw = json.loads(json.dumps(BASE))
    raw["model"] = model
    return raw


@settings(max_examples=150, **SETTINGS)
@given(unstable_linear())
def test_unstable_linear_couplings(raw):
    assert_refused(raw, "unbounded below")


# math.prod, not np.prod: np.prod wraps around int64 for huge shapes (V -> 0)
def test_shape_whose_volume_overflows_int64():
    raw = _with("lattice", "shape", [4, 2**62])
    assert_refused(raw, "lattice.shape")


# --- a handful through a real subprocess --------------------------------------------------------

SUBPROCESS_CASES = [
    ("model", "beta", "nan"), ("model", "nf", 0), ("model", "nf", 9), ("lattice", "shape", [8, 5]),
    ("lattice", "shape", [-4, 4]), ("lattice", "shape", [2**20, 2**20, 2**10]), ("model", "mass", [0.1]),
    ("run", "measurements", 0), ("run", "thermalize", -1), ("", "seed", -3), ("model", "group", "SO"),
    ("model", "kappa", "inf"), ("updates", "schedule", [{"update": "heatbth"}]), ("model", "betta", 1),
    ("run", "checkpoint_every", 0), ("", "name", "a b"), ("lattice", "shape", []),
    ("updates", "target_acceptance", 1.5), ("run", "output", ""), ("model", "theta", "-inf"),
]


def test_subprocess_errors_have_no_traceback(tmp_path):
    procs = []
    for i, (sec, key, value) in enumerate(SUBPROCESS_CASES):
        if value in ("nan", "inf", "-inf"):
            value = float(value)
        raw = _with(sec, key, value)
        if (sec, key, value) == ("model", "mass", [0.1]):
            raw["model"]["mass"] = [0.1, 0.2, 0.3]
        cfg = tmp_path / f"c{i}.toml"
        cfg.write_text(to_toml(raw))
        procs.append(subprocess.Popen([sys.executable, "-m", "sigmasim", "run", str(cfg), "--output",
                                       str(tmp_path / f"o{i}"), "--quiet"], stdout=subprocess.PIPE,
                                      stderr=subprocess.PIPE, text=True, env=subprocess_env()))
        if len(procs) % 10 == 0:  # at most 10 at a time on a small machine
            for p in procs[-10:]:
                p.wait(timeout=300)
    for i, p in enumerate(procs):
        out, err = p.communicate(timeout=300)
        assert p.returncode == 2, (SUBPROCESS_CASES[i], err)
        assert "Traceback" not in err and err.count("\n") == 1 and err.startswith("sigmasim: error:"), err
        assert not [q for q in (tmp_path / f"o{i}").rglob("*") if q.is_file()]
