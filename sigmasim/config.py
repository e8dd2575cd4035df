"""Run configuration: TOML in, a frozen validated :class:`RunConfig` out.

Every key is declared once in :data:`SCHEMA` with its type, default and
meaning; the README's config reference is generated from it
(``sigmasim config-reference``).  Validation errors are one line, name the
key, and for an unknown key suggest the closest valid one.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from sigmasim.errors import ConfigError, shown

__all__ = ["SCHEMA", "RunConfig", "load_config", "read_toml", "config_from_dict", "UPDATES", "reference_markdown"]

UPDATES = ("metropolis", "heatbath", "overrelax")

_DEFAULT_SCHEDULE = [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 3}]

# section -> key -> (kind, default, meaning).  kind is a short type tag checked by _check.
SCHEMA: dict[str, dict[str, tuple]] = {
    "": {
        "name": ("name", "run", "run name; output goes to <output>/<name>/<name>.h5"),
        "seed": ("int>=0", 1, "the run's one seed (any integer >= 0)"),
    },
    "lattice": {
        "shape": ("shape", [8, 8, 8], "extents, time direction first; 1 to 4 even extents >= 2"),
    },
    "model": {
        "group": ("choice:U,SU", "U", "field group: U(nf) or SU(nf) (SU needs nf >= 2)"),
        "nf": ("int:1:8", 1, "number of flavours"),
        "beta": ("real", 0.5, "nearest-neighbour coupling"),
        "mass": ("mass", 0.1, "h_f: one number (degenerate) or a list of nf numbers; sign allowed"),
        "kappa": ("real", 0.0, "anomaly ('t Hooft determinant) coupling"),
        "theta": ("real", 0.0, "vacuum angle theta = nf*theta_m - theta_a (radians)"),
        "theta_placement": (
            "choice:mass,anomaly,split",
            "mass",
            "where theta sits: mass (theta_m = theta/nf), anomaly (theta_a = -theta), "
            "split (half each); physics does not depend on it",
        ),
        "kind": ("choice:chiral,linear", "chiral",
                 "chiral: U(nf)/SU(nf) field (beta, kappa); linear: general complex nf x nf field Phi "
                 "(kinetic, mu2, lambda1, lambda2, c, lambda_s; group must be U)"),
        "kinetic": ("real", 1.0, "linear model: factor of the kinetic term sum Tr|Phi_{x+mu} - Phi_x|^2 / 2 "
                    "(>= 0; 0 decouples the sites)"),
        "mu2": ("real", 1.0, "linear model: mass term (mu2/2) Tr(Phi^+ Phi); may be negative"),
        "lambda1": ("real", 0.0, "linear model: lambda1 (Tr Phi^+ Phi)^2"),
        "lambda2": ("real", 0.0, "linear model: lambda2 Tr((Phi^+ Phi)^2)"),
        "c": ("real", 0.0, "linear model: determinant coupling, -c (e^{i theta_a} det Phi + c.c.)"),
        "lambda_s": ("real", 0.0, "linear model: stabiliser lambda_s (Tr Phi^+ Phi)^p (>= 0; needed for "
                     "nf >= 5 with c != 0)"),
        "stab_power": ("int:1:8", 4, "linear model: p of the stabiliser; lambda_s > 0 needs 2p > max(4, nf)"),
    },
    "updates": {
        "schedule": (
            "schedule",
            _DEFAULT_SCHEDULE,
            "one sweep: list of {update = metropolis|heatbath|overrelax, repeat = n}",
        ),
        "metropolis_hits": ("int:1:1000", 4, "Metropolis hits per site visit"),
        "target_acceptance": ("real:0:1", 0.5, "Metropolis acceptance the step is tuned to"),
        "initial_step": ("real>0", 0.5, "initial Metropolis step (rotation angle scale)"),
        "tune_every": ("int:1:100000", 10, "thermalisation sweeps between step adjustments"),
        "proposal_mu2": ("real>0", 0.5, "linear model, mu2 <= 0: the heatbath/overrelaxation Gaussian uses "
                         "precision 2 d kinetic + proposal_mu2 (the rest is accept/rejected)"),
        "reunitarize_every": ("int:1:100000000", 10, "sweeps between projections back onto the group"),
    },
    "run": {
        "thermalize": ("int>=0", 200, "sweeps before measuring (Metropolis step tuned here)"),
        "measurements": ("int:1:1000000000", 1000, "number of measurements"),
        "measure_every": ("int:1:1000000", 1, "sweeps between measurements"),
        "start": (
            "choice:cold,hot,branch",
            "cold",
            "cold: U = 1; hot: Haar-random U; branch: U = e^{i (2 pi k - theta_a)/nf} 1 "
            "(the tree-level vacuum k of degenerate flavours at large kappa)",
        ),
        "start_branch": ("int:-1000:1000", 0, "k for start = 'branch'"),
        "checkpoint_every": ("int:1:1000000000", 1000, "sweeps between checkpoints"),
        "checkpoint_seconds": ("real>0", 60.0, "also checkpoint when this much time has passed"),
        "output": ("str", "runs", "folder that holds the run folders"),
        "threads": ("int:0:1024", 0, "numba threads (0: auto, one below 2^11 sites per colour x nf^2, else the "
                    "idle cores); results do not depend on it"),
    },
}


def _suggest(key, valid):
    close = difflib.get_close_matches(key, valid, n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _where(section, key):
    return f"{section}.{key}" if section else key


def _is_int(v):
    return isinstance(v, int) and not isinstance(v, bool)


def _is_real(v):
    return (isinstance(v, (int, float)) and not isinstance(v, bool))


def _check(kind, v, where):
    """Validate one value of the given kind; returns it normalised."""
    if kind == "name":
        if not isinstance(v, str) or not v or len(v) > 100:
            raise ConfigError(f"{where} must be a non-empty string of at most 100 characters")
        if not all(ch.isalnum() or ch in "-_." for ch in v) or v.startswith("."):
            raise ConfigError(f"{where} may contain only letters, digits, '-', '_' and '.', got {v!r}")
        return v
    if kind == "str":  # a folder name
        if not isinstance(v, str) or not v:
            raise ConfigError(f"{where} must be a non-empty string, got {shown(v)}")
        if not v.isprintable():
            raise ConfigError(f"{where} must not contain control characters (NUL, line breaks), "
                              f"got {shown(v)}")
        if len(os.fsencode(v)) > 1024 or any(len(os.fsencode(part)) > 255 for part in Path(v).parts):
            raise ConfigError(f"{where} is too long for a path (at most 1024 bytes, 255 per folder "
                              f"name), got {shown(v)}")
        return v
    if kind.startswith("choice:"):
        choices = kind[7:].split(",")
        if not isinstance(v, str) or v not in choices:
            raise ConfigError(f"{where} must be one of {', '.join(choices)}, got {v!r}")
        return v
    if kind.startswith("int"):
        if not _is_int(v):
            raise ConfigError(f"{where} must be an integer, got {v!r}")
        if kind == "int>=0":
            lo, hi = 0, 2**63 - 1
        else:
            _, lo, hi = kind.split(":")
            lo, hi = int(lo), int(hi)
        if not lo <= v <= hi:
            raise ConfigError(f"{where} must be between {lo} and {hi}, got {v}")
        return int(v)
    if kind.startswith("real"):
        if not _is_real(v):
            raise ConfigError(f"{where} must be a number, got {v!r}")
        v = float(v)
        if not math.isfinite(v):
            raise ConfigError(f"{where} must be finite, got {v}")
        if kind == "real>0" and not v > 0:
            raise ConfigError(f"{where} must be > 0, got {v}")
        if kind.startswith("real:"):
            _, lo, hi = kind.split(":")
            if not float(lo) < v < float(hi):
                raise ConfigError(f"{where} must be strictly between {lo} and {hi}, got {v}")
        if abs(v) > 1e6:
            raise ConfigError(f"{where} = {v} is out of range (|value| <= 1e6)")
        return v
    if kind == "shape":
        if not isinstance(v, list) or not all(_is_int(n) for n in v):
            raise ConfigError(f"{where} must be a list of integers, got {v!r}")
        if not 1 <= len(v) <= 4:
            raise ConfigError(f"{where} must have 1 to 4 extents, got {len(v)}")
        for n in v:
            if n < 2 or n % 2:
                raise ConfigError(f"{where} extents must be even and >= 2 (checkerboard), got {v}")
        return [int(n) for n in v]
    if kind == "mass":
        vals = v if isinstance(v, list) else [v]
        if not vals or not all(_is_real(x) for x in vals):
            raise ConfigError(f"{where} must be a number or a list of numbers, got {v!r}")
        vals = [float(x) for x in vals]
        if not all(math.isfinite(x) and abs(x) <= 1e6 for x in vals):
            raise ConfigError(f"{where} must be finite numbers with |h| <= 1e6, got {v!r}")
        return vals
    if kind == "schedule":
        if not isinstance(v, list) or not v:
            raise ConfigError(f"{where} must be a non-empty list of {{update = ..., repeat = n}}")
        out = []
        for i, item in enumerate(v):
            if not isinstance(item, dict):
                raise ConfigError(f"{where}[{i}] must be a table {{update = ..., repeat = n}}")
            for k in item:
                if k not in ("update", "repeat"):
                    raise ConfigError(f"{where}[{i}] has unknown key '{k}'{_suggest(k, ['update', 'repeat'])}")
            name = item.get("update")
            if name not in UPDATES:
                raise ConfigError(
                    f"{where}[{i}].update must be one of {', '.join(UPDATES)}, got {name!r}"
                    + (_suggest(name, UPDATES) if isinstance(name, str) else "")
                )
            rep = item.get("repeat", 1)
            if not _is_int(rep) or not 1 <= rep <= 1000:
                raise ConfigError(f"{where}[{i}].repeat must be an integer between 1 and 1000, got {rep!r}")
            out.append((name, int(rep)))
        return tuple(out)
    raise AssertionError(kind)  # pragma: no cover - schema bug


@dataclass(frozen=True, slots=True)
class RunConfig:
    """A validated run configuration (see :data:`SCHEMA` for every key)."""

    name: str
    seed: int
    shape: tuple
    group: str
    nf: int
    beta: float
    mass: tuple
    kappa: float
    theta: float
    theta_placement: str
    kind: str
    kinetic: float
    mu2: float
    lambda1: float
    lambda2: float
    c: float
    lambda_s: float
    stab_power: int
    schedule: tuple
    metropolis_hits: int
    target_acceptance: float
    initial_step: float
    proposal_mu2: float
    tune_every: int
    reunitarize_every: int
    thermalize: int
    measurements: int
    measure_every: int
    start: str
    start_branch: int
    checkpoint_every: int
    checkpoint_seconds: float
    output: str
    threads: int

    @property
    def volume(self) -> int:
        return math.prod(self.shape)

    @property
    def special(self) -> bool:
        return self.group == "SU"

    @property
    def theta_angles(self) -> tuple[float, float]:
        """(theta_m, theta_a) with theta = nf*theta_m - theta_a.

        For SU(nf) det U = 1 makes the anomaly term a constant, so the whole
        angle sits in the mass phase whatever the placement (SU(nf) is the
        kappa -> infinity limit of U(nf), rotated to det U = 1).
        """
        if self.special or self.theta_placement == "mass":
            return self.theta / self.nf, 0.0
        if self.theta_placement == "anomaly":
            return 0.0, -self.theta
        return self.theta / (2 * self.nf), -self.theta / 2

    @property
    def hdiag(self) -> np.ndarray:
        """complex128 array (nf,): h_f e^{i theta_m}."""
        tm, _ = self.theta_angles
        return np.asarray(self.mass, dtype=np.float64) * np.exp(1j * tm)

    @property
    def eta(self) -> complex:
        """e^{i theta_a}."""
        return complex(np.exp(1j * self.theta_angles[1]))

    @property
    def run_dir(self) -> Path:
        return Path(self.output) / self.name

    @property
    def run_file(self) -> Path:
        return self.run_dir / f"{self.name}.h5"

    def to_dict(self) -> dict:
        """Nested dict in the TOML layout (round-trips through :func:`config_from_dict`)."""
        d: dict = {}
        for section, keys in SCHEMA.items():
            target = d if not section else d.setdefault(section, {})
            for key in keys:
                v = getattr(self, "shape" if key == "shape" else key)
                if key == "schedule":
                    v = [{"update": u, "repeat": r} for u, r in v]
                elif isinstance(v, tuple):
                    v = list(v)
                target[key] = v
        return d

    def physics_dict(self) -> dict:
        """The part of the config that fixes the chain (not where or how fast it is written)."""
        d = self.to_dict()
        for k in ("output", "threads", "checkpoint_every", "checkpoint_seconds"):
            d["run"].pop(k)
        d["run"].pop("measurements")  # a run may be extended
        if self.kind == "chiral":
            # the linear model's keys do not act on the chiral model: leave them out so chiral
            # hashes (and run files written before model.kind existed) stay as they were
            for k in ("kind",) + LINEAR_KEYS:
                d["model"].pop(k)
            d["updates"].pop("proposal_mu2")
        return d

    def physics_hash(self) -> str:
        blob = json.dumps(self.physics_dict(), sort_keys=True).encode()
        return hashlib.sha256(blob).hexdigest()[:16]


def config_from_dict(raw: dict, overrides: dict | None = None) -> RunConfig:
    """Validate a nested dict (the parsed TOML) into a :class:`RunConfig`."""
    if not isinstance(raw, dict):
        raise ConfigError("the config must be a TOML table")
    values: dict = {}
    sections = [s for s in SCHEMA if s]
    for key, v in raw.items():
        if key in SCHEMA[""]:
            values[key] = _check(SCHEMA[""][key][0], v, key)
        elif key in SCHEMA:
            if not isinstance(v, dict):
                raise ConfigError(f"[{key}] must be a table")
            for k2, v2 in v.items():
                if k2 not in SCHEMA[key]:
                    others = [s for s in sections if k2 in SCHEMA[s]]
                    hint = f" (it belongs in [{others[0]}])" if others else _suggest(k2, list(SCHEMA[key]))
                    raise ConfigError(f"unknown key '{key}.{k2}'{hint}")
                values[k2] = _check(SCHEMA[key][k2][0], v2, f"{key}.{k2}")
        else:
            valid = list(SCHEMA[""]) + sections
            raise ConfigError(f"unknown key '{key}'{_suggest(key, valid)}")
    for section, keys in SCHEMA.items():
        for key, (kind, default, _) in keys.items():
            if key not in values:
                values[key] = _check(kind, default, _where(section, key))
    for key, v in (overrides or {}).items():
        # command-line overrides are checked exactly like the same keys in a file
        section = next((sec for sec, keys in SCHEMA.items() if key in keys), None)
        if section is None:
            raise ConfigError(f"unknown key '{key}'")
        values[key] = _check(SCHEMA[section][key][0], v, _where(section, key))
    nf = values["nf"]
    if values["group"] == "SU" and nf < 2:
        raise ConfigError("model.group = 'SU' needs model.nf >= 2")
    mass = values["mass"]
    if len(mass) == 1:
        mass = mass * nf
    if len(mass) != nf:
        raise ConfigError(f"model.mass has {len(mass)} entries but model.nf = {nf}")
    values["mass"] = tuple(mass)
    values["shape"] = tuple(values["shape"])
    if values["kind"] == "linear":
        if values["group"] != "U":
            raise ConfigError("model.kind = 'linear' needs model.group = 'U' (Phi is a general complex matrix)")
        if nf > LINEAR_MAX_NF:
            raise ConfigError(f"model.kind = 'linear' supports model.nf = 1..{LINEAR_MAX_NF}, got {nf}")
        if values["kappa"] != 0:
            raise ConfigError("model.kappa is the chiral model's anomaly coupling; the linear model's is model.c")
        if values["kinetic"] < 0:
            raise ConfigError(f"model.kinetic must be >= 0, got {values['kinetic']}")
        msg = linear_stability(nf, values["mu2"], values["lambda1"], values["lambda2"], values["c"],
                               values["lambda_s"], values["stab_power"])
        if msg:
            raise ConfigError(msg)
    _check_memory(values["shape"], nf)
    return RunConfig(**values)


LINEAR_MAX_NF = 6  # the documented range of the linear model (README: Nf = 1..6)
LINEAR_KEYS = ("kinetic", "mu2", "lambda1", "lambda2", "c", "lambda_s", "stab_power")


def _quartic_det_min(nf, lambda1, lambda2, c):
    """min over Tr(Phi^+ Phi) = 1 of lambda1 + lambda2 Tr((Phi^+Phi)^2) - 2|c| |det Phi| (nf = 4).

    With w_i = sigma_i^2 (squared singular values, sum w = 1) the function is
    f(w) = lambda1 + lambda2 sum w^2 - 2|c| prod sqrt(w) (the det phase can always be aligned
    with e^{-i theta_a}).  On a face (some w = 0) the det vanishes; an interior stationary point
    solves 2 lambda2 w_i^2 - mu w_i - |c| prod sqrt(w) = 0 (Lagrange), a quadratic in w_i, so w takes
    at most two distinct values.  The minimum is therefore on one of the families
    (a repeated k times, b = (1 - k a)/(4 - k)), k = 1..3, which include every face minimum too
    (common practice, no source; derived here).  Evaluated on a fine grid of a.
    """
    best = lambda1 + lambda2 / nf - 2 * abs(c) * nf ** (-nf / 2)  # all w equal
    for k in range(1, nf):
        a = np.linspace(0.0, 1.0 / k, 20001)
        b = np.clip((1.0 - k * a) / (nf - k), 0.0, None)
        f = lambda1 + lambda2 * (k * a**2 + (nf - k) * b**2) - 2 * abs(c) * np.sqrt(a**k * b ** (nf - k))
        best = min(best, float(f.min()))
    return best


def linear_stability(nf, mu2, lambda1, lambda2, c, lambda_s, p) -> str | None:
    """None if the linear model's action is bounded below (and exp(-S) normalisable), else the error.

    Write r^2 = Tr(Phi^+ Phi) = sum_i sigma_i^2 (singular values).  Then
    Tr((Phi^+Phi)^2) = sum sigma^4 lies in [r^4/nf, r^4] and, by the AM-GM inequality,
    |det Phi| = prod sigma <= (r^2/nf)^{nf/2}, with equality (and the phase of det free) when all
    sigma are equal.  The kinetic term is >= 0 and vanishes on constant fields, so the condition
    is on the one-site potential.  q_min = lambda1 + min(lambda2, lambda2/nf) is the quartic's
    minimum on r = 1 (nf = 1: lambda1 + lambda2).  The source Re Tr(H Phi) is linear and never
    decides.  Strict inequalities (marginal cases are rejected):

    * lambda_s > 0 with 2p > max(4, nf): the stabiliser dominates every other term: bounded.
    * nf = 1: the det term is linear: need q_min > 0, or lambda1 = lambda2 = 0 and mu2 > 0.
    * nf = 2: the det term is quadratic, |2c Re(e^{i theta_a} det Phi)| <= |c| r^2 (sharp): need
      q_min > 0, or lambda1 = lambda2 = 0 and mu2 > 2|c|.
    * nf = 3: the det term is cubic (odd, takes both signs): need q_min > 0, or
      lambda1 = lambda2 = c = 0 and mu2 > 0.
    * nf = 4: the det term is quartic: need min over r = 1 of
      lambda1 + lambda2 sum sigma^4 - 2|c| prod sigma > 0 (see :func:`_quartic_det_min`); for
      lambda2 >= 0 this is lambda1 + lambda2/4 - |c|/8 > 0.  Or all of lambda1, lambda2, c zero and
      mu2 > 0.
    * nf >= 5: the det term (degree nf > 4) wins over the quartic along the equal-sigma direction:
      c != 0 needs the stabiliser; with c = 0 as for nf = 3.
    """
    if lambda_s < 0:
        return f"model.lambda_s must be >= 0, got {lambda_s}"
    if lambda_s > 0:
        if not 2 * p > max(4, nf):
            return (f"model.stab_power = {p} does not stabilise: lambda_s (Tr Phi^+Phi)^p needs "
                    f"2p > max(4, nf) = {max(4, nf)}")
        return None
    q_min = lambda1 + (lambda2 if nf == 1 else min(lambda2, lambda2 / nf))
    gaussian = lambda1 == 0 and lambda2 == 0
    pre = f"the linear model's action is unbounded below for nf = {nf}: "
    if nf == 1:
        if q_min > 0 or (gaussian and mu2 > 0):
            return None
        return pre + "need lambda1 + lambda2 > 0, or lambda1 = lambda2 = 0 and mu2 > 0"
    if nf == 2:
        if q_min > 0 or (gaussian and mu2 > 2 * abs(c)):
            return None
        return pre + "need lambda1 + min(lambda2, lambda2/2) > 0, or lambda1 = lambda2 = 0 and mu2 > 2|c|"
    if nf == 4 and c != 0:
        m = _quartic_det_min(nf, lambda1, lambda2, c)
        if m > 0:
            return None
        return (pre + f"need min over Tr Phi^+Phi = 1 of lambda1 + lambda2 Tr((Phi^+Phi)^2) - 2|c| |det Phi| "
                f"> 0 (lambda2 >= 0: lambda1 + lambda2/4 > |c|/8), it is {m:.4g}; or add model.lambda_s")
    if nf >= 5 and c != 0:
        return pre + "the det term (degree nf > 4) beats the quartic: set model.lambda_s > 0 with 2 stab_power > nf"
    if q_min > 0 or (gaussian and c == 0 and mu2 > 0):
        return None
    return (pre + f"need lambda1 + min(lambda2, lambda2/{nf}) > 0, or lambda1 = lambda2 = c = 0 and mu2 > 0, "
            "or model.lambda_s > 0")


def field_bytes(shape, nf) -> int:
    """Bytes the run needs at least: field, neighbour table and a copy for checkpoints."""
    volume = math.prod(int(n) for n in shape)
    return volume * (2 * 8 * nf * nf * 2 + 8 * 2 * len(shape) + 8 * 3)


def _check_memory(shape, nf):
    need = field_bytes(shape, nf)
    try:
        avail = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        avail = 16 * 2**30
    if need > 0.8 * avail:
        raise ConfigError(
            f"lattice.shape {list(shape)} with nf = {nf} needs about {need / 2**30:.1f} GiB, "
            f"more than this machine's {avail / 2**30:.1f} GiB allows"
        )


def read_toml(path) -> dict:
    """The parsed TOML of a config file, with one-line errors for a missing or malformed file."""
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise ConfigError(f"config file {path} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read config file {path}: {exc}") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path} is not valid TOML: {exc}") from None


def load_config(path, overrides: dict | None = None) -> RunConfig:
    """Read and validate a TOML config file."""
    return config_from_dict(read_toml(path), overrides)


def reference_markdown() -> str:
    """The config reference as a Markdown table (pasted into README.md)."""
    lines = ["| key | default | meaning |", "| --- | --- | --- |"]
    for section, keys in SCHEMA.items():
        for key, (_, default, meaning) in keys.items():
            if key == "schedule":
                dflt = "heatbath x1, overrelax x3"
            else:
                dflt = json.dumps(default)
            lines.append(f"| `{_where(section, key)}` | `{dflt}` | {meaning} |")
    return "\n".join(lines)
