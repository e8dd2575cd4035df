r"""Score estimates with errors against known answers: are the errors honest?

``sigmasim score TRUTH.json ESTIMATES.json``

``TRUTH.json`` is a sidecar written by ``sigmasim synth`` or ``sigmasim export``
(its ``truth`` section: ``{NAME: {"value", "error", "how", "source", ...}}``).

ESTIMATES.json
--------------
Either a list of estimates, one object per estimate::

    [{"name": "tau_int", "value": 4.3, "error": 0.4},
     {"name": "mean",    "value": 0.02, "error": 0.09}]

or an object mapping a name to one estimate or to a list of estimates (one per
replica)::

    {"mean": [{"value": 0.02, "error": 0.09}, {"value": -0.11, "error": 0.10}, ...],
     "tau_int": {"value": 4.3, "error": 0.4}}

In the list form a name may occur several times; all its estimates are pooled as
replicas.  ``value`` and ``error`` are finite numbers, ``error > 0``.  A truth
whose value is a list (a correlator ``C(t)``) is addressed element-wise as
``NAME[i]`` (``"correlator[3]"``).  Replicas must be independent estimates of the
same truth (for ``sigmasim synth`` data: one estimate per replica, axis 0).

Output
------
Per estimate the pull ``(estimate - truth) / error``; if the truth is itself an
estimate with an error (``how = "high-statistics estimate"``) the pull uses
``sqrt(error^2 + truth_error^2)``.  With several replicas: the mean pull (with its
error ``width / sqrt(n)``), the width (sample standard deviation, with the error
``width / sqrt(2 (n - 1))`` of a Gaussian sample) and the Kolmogorov-Smirnov p-value
of the pulls against the standard normal (``scipy.stats.kstest``).  Honest errors
and an unbiased estimator give mean 0, width 1 and a p-value that is not small.
The verdict column reads ``ok``, ``errors too small`` (width > 1 by more than 3 of
its errors), ``errors too large`` (width < 1 likewise), ``biased`` (mean pull more
than 3 of its errors from 0) or ``not normal`` (KS p < 0.001); the thresholds are
common practice, no source.  A single estimate gets ``ok`` if ``|pull| <= 3``.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from sigmasim.errors import ConfigError

__all__ = ["ScoreRow", "load_truth", "load_estimates", "parse_estimates", "pulls", "score",
           "format_scores", "truth_value"]


@dataclass(frozen=True)
class ScoreRow:
    """Scores of one quantity.

    Attributes
    ----------
    name : str
    truth : float
    how : str
        How the truth is known (``exact``, ``tree level``, ``high-statistics estimate``).
    n : int
        Number of estimates (replicas).
    pulls : numpy.ndarray
        ``(n,)`` pulls.
    mean, mean_error, width, width_error : float
        Mean and standard deviation of the pulls and their errors (NaN for n < 2).
    ks_p : float
        KS p-value against N(0, 1) (NaN for n < 2).
    verdict : str
    """

    name: str
    truth: float
    how: str
    n: int
    pulls: np.ndarray
    mean: float
    mean_error: float
    width: float
    width_error: float
    ks_p: float
    verdict: str


def _read_json(path, what):
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise ConfigError(f"{p} is not a JSON text file") from None
    except OSError as exc:
        raise ConfigError(f"cannot read the {what} file {p}: {exc.strerror or exc}") from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise ConfigError(f"{p} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
                          f"{exc.msg})") from None


def load_truth(path) -> dict:
    """The ``truth`` section of a sidecar: name -> entry dict."""
    doc = _read_json(path, "truth")
    truth = doc.get("truth") if isinstance(doc, dict) else None
    if not isinstance(truth, dict) or not truth:
        raise ConfigError(f"{path} has no 'truth' section (expected a sidecar of sigmasim synth "
                          "or sigmasim export)")
    for k, e in truth.items():
        if not isinstance(e, dict) or "value" not in e:
            raise ConfigError(f"{path}: truth entry {k!r} has no 'value'")
    return truth


_INDEX = re.compile(r"^(.*)\[(\d+)\]$")


def truth_value(truth: dict, name: str) -> tuple[float, float, str]:
    """``(value, error or 0, how)`` of ``name`` (``NAME[i]`` for list-valued truths)."""
    m = _INDEX.match(name)
    key, idx = (m.group(1), int(m.group(2))) if m else (name, None)
    if key not in truth:
        known = ", ".join(sorted(truth)[:12]) + (", ..." if len(truth) > 12 else "")
        raise ConfigError(f"unknown quantity {name!r}: the truth file knows {known}")
    e = truth[key]
    v = e["value"]
    if isinstance(v, list):
        if idx is None:
            raise ConfigError(f"truth {key!r} is a list of {len(v)} values: name one element as "
                              f"{key}[i], i = 0..{len(v) - 1}")
        if idx >= len(v):
            raise ConfigError(f"{name}: index out of range, {key!r} has {len(v)} values")
        v = v[idx]
    elif idx is not None:
        raise ConfigError(f"{name}: truth {key!r} is a single number, not a list")
    if v is None:
        raise ConfigError(f"truth {name!r} is not a finite number")
    err = e.get("error") or 0.0
    return float(v), float(err), str(e.get("how", "exact"))


def _num(x, what):
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
        raise ConfigError(f"{what} must be a finite number, got {x!r}")
    return float(x)


def _one(name, obj, i=None):
    where = f"estimate {name!r}" + (f" #{i}" if i is not None else "")
    if not isinstance(obj, dict) or "value" not in obj or "error" not in obj:
        raise ConfigError(f"{where} must be an object with 'value' and 'error'")
    v = _num(obj["value"], f"{where}: value")
    e = _num(obj["error"], f"{where}: error")
    if e <= 0:
        raise ConfigError(f"{where}: error must be > 0, got {e}")
    return v, e


def parse_estimates(doc) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """ESTIMATES (module docstring) -> name -> (values, errors), names in first-seen order."""
    out: dict[str, list] = {}
    if isinstance(doc, list):
        for i, item in enumerate(doc):
            if not isinstance(item, dict) or not isinstance(item.get("name"), str):
                raise ConfigError(f"estimate #{i} must be an object with a string 'name'")
            out.setdefault(item["name"], []).append(_one(item["name"], item))
    elif isinstance(doc, dict):
        if not doc:
            raise ConfigError("no estimates given")
        for name, v in doc.items():
            items = v if isinstance(v, list) else [v]
            if not items:
                raise ConfigError(f"estimate {name!r} is an empty list")
            out[name] = [_one(name, it, k if isinstance(v, list) else None)
                         for k, it in enumerate(items)]
    else:
        raise ConfigError("estimates must be a JSON list of {name, value, error} or an object "
                          "{name: {value, error} | [{value, error}, ...]}")
    if not out:
        raise ConfigError("no estimates given")
    return {k: (np.array([a for a, _ in v]), np.array([b for _, b in v])) for k, v in out.items()}


def load_estimates(path) -> dict:
    """Read and validate an ESTIMATES.json file."""
    return parse_estimates(_read_json(path, "estimates"))


def pulls(values, errors, truth: float, truth_error: float = 0.0) -> np.ndarray:
    """``(values - truth) / sqrt(errors^2 + truth_error^2)``."""
    v, e = np.asarray(values, float), np.asarray(errors, float)
    return (v - truth) / np.sqrt(e**2 + truth_error**2)


def _row(name, p, truth, how) -> ScoreRow:
    import scipy.stats

    n = p.size
    if n >= 2:
        mean, width = float(p.mean()), float(p.std(ddof=1))
        me, we = width / math.sqrt(n), width / math.sqrt(2 * (n - 1))
        ks = float(scipy.stats.kstest(p, "norm").pvalue)
        if abs(mean) > 3 * me:
            verdict = "biased"
        elif width - 1 > 3 * we:
            verdict = "errors too small"
        elif 1 - width > 3 * we:
            verdict = "errors too large"
        elif ks < 1e-3:
            verdict = "not normal"
        else:
            verdict = "ok"
    else:
        mean, width, me, we, ks = float(p[0]), math.nan, math.nan, math.nan, math.nan
        verdict = "ok" if abs(p[0]) <= 3 else "off by > 3 sigma"
    return ScoreRow(name, truth, how, n, p, mean, me, width, we, ks, verdict)


def score(truth: dict, estimates: dict) -> list[ScoreRow]:
    """Score parsed estimates (:func:`parse_estimates`) against a truth section."""
    rows = []
    for name, (v, e) in estimates.items():
        t, te, how = truth_value(truth, name)
        rows.append(_row(name, pulls(v, e, t, te), t, how))
    return rows


def _g(x, spec=".3f"):
    return "-" if not math.isfinite(x) else format(x, spec)


def format_scores(rows: list[ScoreRow]) -> str:
    """Text table: one line per quantity; every column as wide as its widest cell plus two spaces."""
    head = ["quantity", "truth", "how", "n", "pull / mean", "width", "KS p", "verdict"]
    left = {0, 2, 7}
    cells = []
    for r in rows:
        how = {"high-statistics estimate": "estimate"}.get(r.how, r.how)
        if r.n >= 2:
            mean = f"{r.mean:+.2f}({r.mean_error:.2f})"
            width = f"{r.width:.3f}({r.width_error:.3f})"
        else:
            mean, width = f"{r.mean:+.2f}", "-"
        cells.append([r.name, f"{r.truth:.6g}", how, str(r.n), mean, width, _g(r.ks_p), r.verdict])
    widths = [max(len(c[i]) for c in [head, *cells]) for i in range(len(head))]

    def line(c):
        return "  ".join(x.ljust(w) if i in left else x.rjust(w) for i, (x, w) in enumerate(zip(c, widths))).rstrip()

    text = [line(head)]
    text.append("-" * len(text[0]))
    return "\n".join(text + [line(c) for c in cells])
