r"""Synthetic data with known answers, reproducible from a seed.

``sigmasim synth KIND --out PREFIX --seed N [params]`` writes ``PREFIX.npz`` and the
sidecar ``PREFIX.json`` (layout of :mod:`sigmasim.export`).  Each generator returns
``(arrays, truth)``; :func:`synthesize` adds the sidecar metadata.  Arrays have
shape ``(replicas, N, ...)``: axis 0 is the independent replica, axis 1 the Monte
Carlo time (configuration).  Every truth value is per replica (the same for all).
Same kind, parameters and seed give bit-identical arrays (``numpy.random.Generator``
with PCG64 seeded by ``seed``).

Kinds
-----
``ar1``: Gaussian AR(1) ``y_t = rho y_{t-1} + sqrt(1 - rho^2) eps_t``, started in
the stationary distribution (mean 0, variance 1, ``rho(t) = rho^|t|``), or a sum
``x = sum_i a_i y_i`` of independent such processes (``rho`` and ``amplitude``
lists).  For the sum ``Gamma(t) = sum_i a_i^2 rho_i^|t|``, so

    ``rho_x(t) = sum_i a_i^2 rho_i^t / sum_i a_i^2``,
    ``tau_int = 1/2 + sum_{t>=1} rho_x(t) = 1/2 + sum_i w_i rho_i / (1 - rho_i)``,
    ``w_i = a_i^2 / sum_j a_j^2``

(geometric series; one term gives the standard ``(1 + rho) / (2 (1 - rho))``,
tau_int in the convention of :mod:`sigmasim.analysis.gamma`).  The exact error of
the mean of one replica of length N is
``sqrt(Var xbar)``, ``Var xbar = (1/N) [Gamma(0) + 2 sum_{t=1}^{N-1} (1 - t/N) Gamma(t)]``
(standard result), summed in closed form.

``free-field``: zero-momentum time-slice sums ``Phi(t) = sum_y phi_(t, y)`` of the free
real scalar with ``S = sum_x [1/2 sum_mu (phi_{x+mu} - phi_x)^2 + m2/2 phi_x^2]`` on a
periodic ``T x L^(d-1)`` lattice, independent exact samples (no autocorrelation).
Drawn in Fourier space: white noise ``z``, ``phi = F^-1 [F z / sqrt(m2 + phat^2)]``
has exactly the propagator as covariance (common practice, no source).  Only the
spatial zero mode reaches ``Phi``, so by default (``method="slice"``) just the T
zero-momentum modes are drawn, with covariance ``V_s C(t - t')``; ``method="field"``
draws the whole lattice and sums it (same distribution, for checking).  Truth:
``C(t)`` of :func:`sigmasim.exact.free_scalar_correlator` (the mean of
``connected_correlator(Phi, spatial_volume=V_s)``), the energy
``mass = 2 asinh(sqrt(m2)/2)`` (:func:`sigmasim.exact.free_scalar_mass`) and the
amplitude ``A`` of ``C(t) = A cosh(mass (t - T/2))``,
``A = 1 / (2 sinh(mass) sinh(mass T/2))``
(:func:`sigmasim.exact.free_scalar_correlator_closed_form`).

``telegraph``: a two-state Markov chain ``s_t in {0, 1}``, per-step switching
probabilities ``p01`` (0 -> 1) and ``p10`` (1 -> 0), started in the stationary
distribution ``pi_1 = p01 / (p01 + p10)``; the series is ``x_t = 2 s_t - 1 + noise
eps_t`` with Gaussian ``eps``.  Standard results: dwell times are geometric with
means ``1/p01`` (in 0) and ``1/p10`` (in 1); with ``lambda = 1 - p01 - p10`` the
level has mean ``pi_1 - pi_0``, autocovariance ``4 pi_0 pi_1 lambda^|t|``, so
``tau_int = 1/2 + w lambda / (1 - lambda)``, ``w = 4 pi_0 pi_1 / (4 pi_0 pi_1 + noise^2)``.
Generated from geometric dwell times (memoryless, so the first dwell of a
stationary start has the same law).
"""

from __future__ import annotations

import numpy as np
import scipy.signal

from sigmasim.errors import ConfigError
from sigmasim.export import array_entry, truth_entry
from sigmasim.files import provenance

__all__ = [
    "KINDS",
    "DEFAULTS",
    "ar1",
    "free_field",
    "telegraph",
    "synthesize",
    "geometric_sum_stats",
]

SRC_AR1 = ("standard result for AR(1) processes (common practice, no source); "
           "sums derived in sigmasim.synth")
SRC_MARKOV = "standard result for two-state Markov chains (common practice, no source)"
SRC_FREE = "sigmasim.exact free-scalar formulas (common practice, no source)"
SRC_DEF = "fixed by construction (parameter of the generator)"

#: Default parameters of every kind (also the set of valid parameter names).
DEFAULTS = {
    "ar1": {"rho": [0.8], "amplitude": None, "length": 1000, "replicas": 200},
    "free-field": {"shape": [16, 4, 4], "m2": 0.25, "configs": 200, "replicas": 200,
                   "method": "slice"},
    "telegraph": {"p01": 0.05, "p10": 0.1, "noise": 0.0, "length": 2000, "replicas": 200},
}
KINDS = tuple(DEFAULTS)


def geometric_sum_stats(coefs, lams, n: int) -> dict:
    r"""Statistics of a stationary series with ``Gamma(t) = sum_i c_i lam_i^|t|``.

    Returns ``variance = sum c_i`` (with ``0^0 = 1``: ``lam = 0`` is white noise),
    ``tau_int = 1/2 + sum_i (c_i/var) lam_i / (1 - lam_i)`` and the exact
    ``error_of_mean`` of ``n`` consecutive samples,
    ``Var xbar = (1/n) sum_i c_i [1 + 2 S_i]``,
    ``S_i = sum_{t=1}^{n-1} (1 - t/n) lam^t = lam/(1-lam) - lam (1 - lam^n) / (n (1-lam)^2)``
    (geometric sums; derived here, standard).
    """
    c = np.asarray(coefs, dtype=float)
    lam = np.asarray(lams, dtype=float)
    if np.any(np.abs(lam) >= 1):
        raise ConfigError("autocorrelation coefficients must lie in (-1, 1)")
    var = float(c.sum())
    geo = lam / (1.0 - lam)
    tau = 0.5 + float(np.sum(c * geo)) / var
    s = geo - lam * (1.0 - lam**n) / (n * (1.0 - lam) ** 2)
    var_mean = float(np.sum(c * (1.0 + 2.0 * s))) / n
    lam_max = float(np.max(np.abs(lam)))
    tau_exp = float(-1.0 / np.log(lam_max)) if lam_max > 0 else 0.0
    return {"variance": var, "tau_int": tau, "error_of_mean": float(np.sqrt(var_mean)),
            "tau_exp": tau_exp}


def _rng(seed) -> np.random.Generator:
    try:
        seed = int(seed)
    except (TypeError, ValueError):
        raise ConfigError(f"seed must be an integer >= 0, got {seed!r}") from None
    if seed < 0:
        raise ConfigError(f"seed must be an integer >= 0, got {seed}")
    return np.random.default_rng(seed)


def _posint(name, v, minimum=1):
    if isinstance(v, bool) or int(v) != v or int(v) < minimum:
        raise ConfigError(f"{name} must be an integer >= {minimum}, got {v!r}")
    return int(v)


def ar1(rho=0.8, amplitude=None, length=1000, replicas=200, seed=0):
    """AR(1) replicas (or a sum of independent AR(1) processes); see module docstring.

    Parameters
    ----------
    rho : float or sequence of float
        Coefficients ``rho_i`` in (-1, 1).
    amplitude : float or sequence of float, optional
        ``a_i`` (default all 1).
    length, replicas : int
        Samples per replica (N >= 2), number of replicas.
    seed : int

    Returns
    -------
    arrays : dict
        ``"x"``: float64 ``(replicas, length)``.
    truth : dict
        ``mean``, ``variance``, ``tau_int``, ``tau_exp``, ``error_of_mean`` (of one
        replica), ``rho_t`` (list ``rho_x(t)``, t = 0..min(N-1, 50)).
    """
    rhos = np.atleast_1d(np.asarray(rho, dtype=float))
    amps = np.ones_like(rhos) if amplitude is None else np.atleast_1d(np.asarray(amplitude, float))
    if amps.size == 1 and rhos.size > 1:
        amps = np.full(rhos.size, amps[0])
    if amps.shape != rhos.shape:
        raise ConfigError(f"ar1 needs one amplitude per rho: {rhos.size} rho, "
                          f"{amps.size} amplitudes")
    if np.any(np.abs(rhos) >= 1) or not np.all(np.isfinite(rhos)):
        raise ConfigError(f"ar1: every rho must lie in (-1, 1), got {rhos.tolist()}")
    if not np.any(amps != 0):
        raise ConfigError("ar1: at least one amplitude must be non-zero")
    n = _posint("length", length, 2)
    r = _posint("replicas", replicas)
    rng = _rng(seed)
    x = np.zeros((r, n))
    for rh, a in zip(rhos, amps):
        eps = rng.standard_normal((r, n))
        eps[:, 1:] *= np.sqrt(1.0 - rh * rh)  # eps[:, 0] is the stationary start
        x += a * scipy.signal.lfilter([1.0], [1.0, -rh], eps, axis=1)
    c = amps**2
    st = geometric_sum_stats(c, rhos, n)
    tt = np.arange(min(n - 1, 50) + 1)
    rho_t = (c[None, :] * rhos[None, :] ** tt[:, None]).sum(axis=1) / c.sum()
    d = "of every replica of x"
    truth = {
        "mean": truth_entry(0.0, "exact", SRC_DEF, f"expectation {d}"),
        "variance": truth_entry(st["variance"], "exact", SRC_AR1, f"variance {d}: sum a_i^2"),
        "tau_int": truth_entry(st["tau_int"], "exact", SRC_AR1,
                               "integrated autocorrelation time, 1/2 + sum_{t>=1} rho(t) "
                               "(sigmasim.analysis.gamma convention)"),
        "tau_exp": truth_entry(st["tau_exp"], "exact", SRC_AR1, "-1/ln(max |rho_i|)"),
        "error_of_mean": truth_entry(st["error_of_mean"], "exact", SRC_AR1,
                                     f"exact standard deviation of the mean of one replica "
                                     f"(N = {n})"),
        "rho_t": truth_entry(rho_t, "exact", SRC_AR1,
                             "normalised autocorrelation rho(t), t = 0, 1, ..."),
    }
    arrays = {"x": x}
    entries = [array_entry("x", x, "sum_i a_i y_i of independent unit-variance AR(1) processes",
                           "axes: (replica, Monte Carlo time)", "dimensionless")]
    params = {"rho": rhos.tolist(), "amplitude": amps.tolist(), "length": n, "replicas": r}
    return arrays, truth, entries, params


def _free_lambda(shape, m2):
    lam = np.full(tuple(shape), float(m2))
    for mu, l in enumerate(shape):
        b = [1] * len(shape)
        b[mu] = l
        lam = lam + (4.0 * np.sin(np.pi * np.arange(l) / l) ** 2).reshape(b)
    return lam


def free_field(shape=(16, 4, 4), m2=0.25, configs=200, replicas=200, method="slice", seed=0):
    """Free-field time-slice sums; see module docstring.

    Returns
    -------
    arrays : dict
        ``"phi_t"``: float64 ``(replicas, configs, T)``, per configuration the sums
        ``Phi(t) = sum_y phi_(t, y)``.
    truth : dict
        ``mass``, ``amplitude``, ``m2``, ``correlator`` (list C(t), t = 0..T-1),
        ``spatial_volume``.
    """
    from sigmasim import exact

    shape = tuple(_posint("shape entries", s, 2) for s in np.atleast_1d(shape))
    if not 1 <= len(shape) <= 4:
        raise ConfigError(f"free-field shape must have 1 to 4 extents, got {list(shape)}")
    m2 = float(m2)
    if not m2 > 0 or not np.isfinite(m2):
        raise ConfigError(f"free-field needs m2 > 0 (m2 = 0 has a zero mode), got {m2}")
    if method not in ("slice", "field"):
        raise ConfigError(f"free-field method must be 'slice' or 'field', got {method!r}")
    nc = _posint("configs", configs, 2)
    r = _posint("replicas", replicas)
    nt, vs = shape[0], int(np.prod(shape[1:])) if len(shape) > 1 else 1
    rng = _rng(seed)
    if method == "slice":
        lam = _free_lambda((nt,), m2)
        z = rng.standard_normal((r, nc, nt))
        phi = np.fft.ifft(np.fft.fft(z, axis=-1) / np.sqrt(lam), axis=-1).real * np.sqrt(vs)
    else:
        lam = _free_lambda(shape, m2)
        axes = tuple(range(1, 1 + len(shape)))
        phi = np.empty((r, nc, nt))
        for i in range(r):  # one replica at a time keeps the memory small
            z = rng.standard_normal((nc,) + shape)
            f = np.fft.ifftn(np.fft.fftn(z, axes=axes) / np.sqrt(lam), axes=axes).real
            phi[i] = f.reshape(nc, nt, -1).sum(axis=-1)
    e = float(exact.free_scalar_mass(m2))
    amp = 1.0 / (2.0 * np.sinh(e) * np.sinh(e * nt / 2.0))
    corr = exact.free_scalar_correlator(shape, m2)
    truth = {
        "mass": truth_entry(e, "exact", SRC_FREE, "lattice energy 2 asinh(sqrt(m2)/2): decay rate "
                            "and exact cosh effective mass of C(t)"),
        "amplitude": truth_entry(amp, "exact", SRC_FREE,
                                 "A in C(t) = A cosh(mass (t - T/2)), "
                                 "A = 1/(2 sinh(mass) sinh(mass T/2))"),
        "m2": truth_entry(m2, "exact", SRC_DEF, "bare mass squared"),
        "spatial_volume": truth_entry(vs, "exact", SRC_DEF, "V_s = L_1 ... L_{d-1}"),
        "correlator": truth_entry(corr, "exact", SRC_FREE,
                                  "C(t) = <Phi(0) Phi(t)>/V_s, t = 0..T-1 "
                                  "(sigmasim.exact.free_scalar_correlator), the mean of "
                                  "connected_correlator(phi_t, spatial_volume=V_s)"),
    }
    arrays = {"phi_t": phi}
    entries = [array_entry("phi_t", phi, "time-slice sums Phi(t) = sum_y phi_(t, y) of exact "
                           "independent free-field configurations",
                           "axes: (replica, configuration, t); <Phi(t) Phi(t')> = V_s C(t - t')",
                           "lattice units")]
    params = {"shape": list(shape), "m2": m2, "configs": nc, "replicas": r, "method": method}
    return arrays, truth, entries, params


def _check_prob(name, p):
    p = float(p)
    if not 0 < p <= 1:
        raise ConfigError(f"telegraph: {name} must lie in (0, 1], got {p}")
    return p


def telegraph(p01=0.05, p10=0.1, noise=0.0, length=2000, replicas=200, seed=0):
    """Two-state telegraph replicas; see module docstring.

    Returns
    -------
    arrays : dict
        ``"x"``: float64 ``(replicas, length)``, levels -1 (state 0) and +1 (state 1)
        plus noise; ``"state"``: int8 ``(replicas, length)``.
    truth : dict
        ``mean``, ``variance``, ``tau_int``, ``tau_exp``, ``error_of_mean``,
        ``dwell_mean_0`` (1/p01), ``dwell_mean_1`` (1/p10), ``fraction_1``, ``p01``, ``p10``.
    """
    p01, p10 = _check_prob("p01", p01), _check_prob("p10", p10)
    if p01 + p10 >= 2:
        raise ConfigError("telegraph: p01 = p10 = 1 is a deterministic alternation")
    noise = float(noise)
    if not noise >= 0 or not np.isfinite(noise):
        raise ConfigError(f"telegraph: noise must be >= 0, got {noise}")
    n = _posint("length", length, 2)
    r = _posint("replicas", replicas)
    rng = _rng(seed)
    pi1 = p01 / (p01 + p10)
    leave = (p01, p10)
    state = np.empty((r, n), dtype=np.int8)
    # expected number of runs in n steps: 2 n p01 p10 / (p01 + p10)
    k = int(n * p01 * p10 / (p01 + p10)) + 16
    for i in range(r):
        s = int(rng.random() < pi1)
        pieces, total = [], 0
        while total < n:
            # 2k complete alternating runs starting in state s (so the next batch starts in s)
            runs = np.empty(2 * k, dtype=np.int64)
            runs[0::2] = rng.geometric(leave[s], k)
            runs[1::2] = rng.geometric(leave[1 - s], k)
            labels = np.tile(np.array([s, 1 - s], dtype=np.int8), k)
            pieces.append(np.repeat(labels, runs))
            total += pieces[-1].size
        state[i] = np.concatenate(pieces)[:n]
    x = 2.0 * state - 1.0
    if noise > 0:
        x = x + noise * rng.standard_normal((r, n))
    lam = 1.0 - p01 - p10
    c_level = 4.0 * pi1 * (1.0 - pi1)
    coefs, lams = [c_level], [lam]
    if noise > 0:
        coefs.append(noise**2)
        lams.append(0.0)
    st = geometric_sum_stats(coefs, lams, n)
    truth = {
        "mean": truth_entry(2 * pi1 - 1, "exact", SRC_MARKOV, "expectation of x: pi_1 - pi_0"),
        "variance": truth_entry(st["variance"], "exact", SRC_MARKOV,
                                "variance of x: 4 pi_0 pi_1 + noise^2"),
        "tau_int": truth_entry(st["tau_int"], "exact", SRC_MARKOV,
                               "integrated autocorrelation time of x (sigmasim.analysis.gamma "
                               "convention)"),
        "tau_exp": truth_entry(st["tau_exp"], "exact", SRC_MARKOV, "-1/ln|1 - p01 - p10|"),
        "error_of_mean": truth_entry(st["error_of_mean"], "exact", SRC_MARKOV,
                                     f"exact standard deviation of the mean of one replica "
                                     f"(N = {n})"),
        "dwell_mean_0": truth_entry(1.0 / p01, "exact", SRC_MARKOV, "mean dwell time in state 0"),
        "dwell_mean_1": truth_entry(1.0 / p10, "exact", SRC_MARKOV, "mean dwell time in state 1"),
        "fraction_1": truth_entry(pi1, "exact", SRC_MARKOV,
                                  "stationary fraction of time in state 1"),
        "p01": truth_entry(p01, "exact", SRC_DEF, "per-step probability 0 -> 1"),
        "p10": truth_entry(p10, "exact", SRC_DEF, "per-step probability 1 -> 0"),
    }
    arrays = {"x": x, "state": state}
    entries = [
        array_entry("x", x, "telegraph signal 2 s_t - 1 plus Gaussian noise",
                    "axes: (replica, Monte Carlo time)", "dimensionless"),
        array_entry("state", state, "hidden state s_t in {0, 1}",
                    "axes: (replica, Monte Carlo time)", "dimensionless"),
    ]
    params = {"p01": p01, "p10": p10, "noise": noise, "length": n, "replicas": r}
    return arrays, truth, entries, params


_GENERATORS = {"ar1": ar1, "free-field": free_field, "telegraph": telegraph}


def _parse_list(v, cast=float):
    if isinstance(v, str):
        parts = [p for p in v.replace(" ", "").split(",") if p]
        try:
            return [cast(p) for p in parts]
        except ValueError:
            raise ConfigError(f"cannot read {v!r} as a comma-separated list of numbers") from None
    return [cast(a) for a in np.atleast_1d(v)]


def _params(kind: str, params: dict) -> dict:
    if kind not in DEFAULTS:
        raise ConfigError(f"unknown synth kind {kind!r}; choose one of {', '.join(KINDS)}")
    given = {k.replace("-", "_"): v for k, v in params.items() if v is not None}
    valid = DEFAULTS[kind]
    bad = sorted(k for k in given if k not in valid)
    if bad:
        raise ConfigError(f"synth {kind} takes no parameter {bad[0]!r}; its parameters are "
                          f"{', '.join(valid)}")
    out = dict(valid)
    out.update(given)
    try:
        if kind == "ar1":
            out["rho"] = _parse_list(out["rho"])
            if out["amplitude"] is not None:
                out["amplitude"] = _parse_list(out["amplitude"])
        if kind == "free-field":
            out["shape"] = _parse_list(out["shape"], int)
        for k in ("length", "replicas", "configs"):
            if k in out:
                out[k] = int(out[k])
        for k in ("m2", "p01", "p10", "noise"):
            if k in out:
                out[k] = float(out[k])
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"synth {kind}: bad parameter value ({exc})") from None
    return out


def synthesize(kind: str, seed: int = 0, **params) -> tuple[dict, dict]:
    """Generate ``kind`` with ``params`` (defaults in :data:`DEFAULTS`).

    Returns ``(arrays, sidecar)``: the arrays (name -> ndarray) and the sidecar
    dict without the file keys (``kind``, ``params``, ``seed``, ``arrays``,
    ``truth``, ``conventions``, ``provenance``).
    """
    p = _params(kind, params)
    arrays, truth, entries, used = _GENERATORS[kind](seed=seed, **p)
    side = {
        "kind": kind,
        "params": used,
        "seed": int(seed),
        "config": {"kind": kind, **used},
        "conventions": ("axis 0: independent replica; axis 1: Monte Carlo time / configuration; "
                        "every truth value holds for each replica; "
                        "tau_int = 1/2 + sum_{t>=1} rho(t)"),
        "units": "dimensionless (free field: lattice units)",
        "provenance": provenance(generator=f"sigmasim.synth.{_GENERATORS[kind].__name__}",
                                 rng="numpy.random.default_rng(seed), PCG64"),
        "truth": truth,
        "arrays": entries,
        "notes": [],
    }
    return arrays, side
