r"""Where the first-order line in theta = pi ends: crossings of ``<q^4>/<q^2>^2`` over volumes.

At theta = pi the two branches next to the midpoint ``phi = 0`` are degenerate and
``q = Im omega_h`` is odd under CP.  Where the transition is first order (two vacua), the histogram
of ``q`` has two peaks that sharpen with the volume and the cumulant ``B = <q^4>/<q^2>^2`` goes to 1;
where there is only a crossover (one vacuum at ``q = 0``), ``q`` is Gaussian in large volumes and ``B``
goes to 3.  So at fixed ``(h, kappa)`` the curves ``B_L(beta)`` of different ``L`` cross near the
endpoint ``beta_c`` of the first-order line (the usual finite-size crossing of a Binder-type
cumulant; common practice, no source).  Corrections to scaling move the crossing of small pairs;
compare the pairs.

:func:`cumulant_points` reads run files (any number of ``L`` and ``beta``, same model otherwise) and
computes ``B`` with its binned-jackknife error after discarding a leading fraction;
:func:`cumulant_crossing` finds, for every pair of sizes, the ``beta`` where ``B_L2 - B_L1`` changes
sign from positive (crossover side, small beta) to negative (first-order side), by linear
interpolation between the neighbouring ``beta`` of the pair's common grid, and its error by
resampling the ``B`` values within their errors.  A sign change counts only when the difference is
more than 2 sigma positive at some ``beta`` below it and 2 sigma negative at some ``beta`` above
it.  The headline is the crossing of the largest pair.
``python analysis/endpoint.py`` runs a study and prints the table.  Research toy, not a physical
prediction.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["CumulantPoint", "Crossing", "EndpointResult", "cumulant_points", "cumulant_crossing",
           "format_endpoint"]


@dataclass
class CumulantPoint:
    """``B = <q^4>/<q^2>^2`` of one run (size ``L``, coupling ``beta``)."""

    L: int
    beta: float
    binder: float
    binder_error: float
    n: int
    verdict: str = ""
    path: str = ""


@dataclass
class Crossing:
    """Crossing of the pair ``(L1, L2)``: ``beta`` with error, ``B`` there, and how often resampled
    data had a crossing at all (``found``; a low value means the pair does not resolve one)."""

    L1: int
    L2: int
    beta: float
    beta_error: float
    binder: float
    found: float
    n_sign_changes: int


@dataclass
class EndpointResult:
    points: list
    crossings: list
    beta_c: float
    beta_c_error: float
    note: str = ""
    extra: dict = field(default_factory=dict)


def cumulant_points(paths, discard: float = 0.2, midpoint: float = -0.5) -> list:
    """Read run files and compute ``B`` of ``q = Im(omega_h e^{-i phi_m})`` (``Im omega_h`` at theta =
    pi with the default midpoint).  ``L`` is the largest lattice extent.  All runs must share nf,
    group, masses, kappa and theta (else :class:`~sigmasim.errors.ConfigError`)."""
    from sigmasim.analysis.tunnelling import binder_ratio, bimodality, order_parameter
    from sigmasim.errors import ConfigError
    from sigmasim.storage import open_run

    if not 0.0 <= discard < 1.0:
        raise ConfigError(f"discard must be in [0, 1), got {discard}")
    out, ref = [], None
    for p in paths:
        run = open_run(p)
        c = run.config
        key = (c.nf, c.group, tuple(c.mass), c.kappa, c.theta, len(c.shape))
        if ref is None:
            ref = key
        elif key != ref:
            raise ConfigError(f"{p}: nf, group, mass, kappa, theta and dimension must be those of the "
                              f"first run ({ref}), got {key}")
        om = np.asarray(run.series.get("omega_h", ()))
        om = om[int(discard * len(om)):]
        om = om[np.isfinite(om)]
        if len(om) < 20:
            raise ConfigError(f"{p}: only {len(om)} measurements after discarding {discard:g}; need 20")
        q = order_parameter(om, c.theta, c.nf, midpoint)
        b, e = binder_ratio(q, bin_size=None)
        out.append(CumulantPoint(int(max(c.shape)), float(c.beta), b, e, len(om),
                                 bimodality(om, c.theta, c.nf).verdict, str(p)))
    return out


def _sign_changes(betas, d):
    """Indices i where d[i] > 0 >= d[i+1] (crossover side to first-order side)."""
    return [i for i in range(len(d) - 1) if d[i] > 0 >= d[i + 1]]


def _cross(betas, d, i):
    return betas[i] + (betas[i + 1] - betas[i]) * d[i] / (d[i] - d[i + 1])


def cumulant_crossing(points, n_samples: int = 2000, seed: int = 0) -> EndpointResult:
    """Crossings of ``B_L(beta)`` for every pair of sizes (see the module notes)."""
    rng = np.random.default_rng(seed)
    by_l = {}
    for p in points:
        if np.isfinite(p.binder) and np.isfinite(p.binder_error):
            by_l.setdefault(p.L, {})[p.beta] = (p.binder, p.binder_error)
    sizes = sorted(by_l)
    crossings = []
    for a in range(len(sizes)):
        for b in range(a + 1, len(sizes)):
            l1, l2 = sizes[a], sizes[b]
            betas = np.array(sorted(set(by_l[l1]) & set(by_l[l2])))
            if len(betas) < 2:
                continue
            b1 = np.array([by_l[l1][x] for x in betas])
            b2 = np.array([by_l[l2][x] for x in betas])
            d = b2[:, 0] - b1[:, 0]
            z = d / np.hypot(b1[:, 1], b2[:, 1])
            # a crossing needs the difference significantly positive somewhere below it and
            # significantly negative somewhere above it (2 sigma); noise where the curves coincide
            # (deep in the crossover or deep in the first-order region) is not a crossing
            ch = [i for i in _sign_changes(betas, d) if z[:i + 1].max() > 2 and z[i + 1:].min() < -2]
            if not ch:
                crossings.append(Crossing(l1, l2, float("nan"), float("nan"), float("nan"), 0.0, 0))
                continue
            i0 = ch[0]
            beta0 = _cross(betas, d, i0)
            w = (beta0 - betas[i0]) / (betas[i0 + 1] - betas[i0])
            bval = float((1 - w) * (b1[i0, 0] + b2[i0, 0]) / 2 + w * (b1[i0 + 1, 0] + b2[i0 + 1, 0]) / 2)
            sd = (rng.normal(size=(n_samples, len(betas))) * b2[:, 1] + b2[:, 0]
                  - rng.normal(size=(n_samples, len(betas))) * b1[:, 1] - b1[:, 0])
            samples = []
            for row in sd:
                c = _sign_changes(betas, row)
                if c:   # the sign change nearest to the central one
                    j = min(c, key=lambda k: abs(_cross(betas, row, k) - beta0))
                    samples.append(_cross(betas, row, j))
            err = float(np.std(samples, ddof=1)) if len(samples) > 1 else float("nan")
            crossings.append(Crossing(l1, l2, float(beta0), err, bval, len(samples) / n_samples, len(ch)))
    good = [c for c in crossings if np.isfinite(c.beta)]
    note = ""
    if good:
        head = max(good, key=lambda c: (c.L2, c.L1))
        bc, be = head.beta, head.beta_error
        note = f"from the largest pair L = {head.L1}, {head.L2}"
    else:
        bc = be = float("nan")
        note = "no crossing: the cumulants do not cross on this beta grid"
    return EndpointResult(list(points), crossings, bc, be, note)


def format_endpoint(res: EndpointResult) -> str:
    """Table of the points and crossings (plain text)."""
    lines = [f"{'L':>4}{'beta':>9}{'<q^4>/<q^2>^2':>18}{'n':>8}  two-peak test"]
    for p in sorted(res.points, key=lambda p: (p.L, p.beta)):
        lines.append(f"{p.L:>4}{p.beta:>9.4f}{p.binder:>11.4f} +- {p.binder_error:<6.2g}{p.n:>7}  {p.verdict}")
    lines.append("")
    lines.append(f"{'pair':>10}{'beta crossing':>22}{'B there':>10}{'found':>8}")
    for c in res.crossings:
        be = "-" if not np.isfinite(c.beta) else f"{c.beta:.4f} +- {c.beta_error:.2g}"
        extra = f"  ({c.n_sign_changes} sign changes)" if c.n_sign_changes > 1 else ""
        lines.append(f"{f'{c.L1},{c.L2}':>10}{be:>22}{c.binder:>10.3f}{c.found:>8.2f}{extra}")
    lines.append("")
    if np.isfinite(res.beta_c):
        lines.append(f"endpoint of the first-order line: beta_c = {res.beta_c:.4f} +- {res.beta_c_error:.2g} "
                     f"({res.note}); B -> 1 above (two vacua), -> 3 below (crossover)")
    else:
        lines.append(f"endpoint: {res.note}")
    lines.append("Research toy, not a physical prediction.")
    return "\n".join(lines)
