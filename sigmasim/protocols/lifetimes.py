r"""Finite-volume lifetimes of a metastable branch: escape times per lattice size and their fits.

Escape from a metastable branch at theta != pi goes by nucleation: a bubble of the stable branch
has to form and grow past a critical size, so escape times are a relaxation dead time (the start
leaving its initial configuration and the bubble growing across the lattice) plus a waiting time
that is close to exponential.  escape_time_fit separates the two (shifted exponential); the
dead time does not scale like a barrier and must not enter the ln tau fits.

The protocol table ``[lifetimes]`` (:data:`LIFETIME_SCHEMA`) lists the even sizes ``L`` (the lattice is
``L^d``), the starts per size and the censoring time; :func:`run_lifetimes` runs the starts in a
process pool and fits ``ln tau`` against ``L^(d-1)`` and ``L^d``.

This is a research toy, not a physical prediction.
"""

from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sigmasim.config import RunConfig, config_from_dict, read_toml
from sigmasim.errors import ConfigError, RunFileError
from sigmasim.protocols.common import split_protocol, sweeps

__all__ = ["LIFETIME_SCHEMA", "LifetimeResult", "run_lifetimes", "lifetime_estimate", "escape_time_fit",
           "plot_escape_times", "fit_log_lifetimes", "load_lifetimes", "default_path", "check_output",
           "write_lifetimes"]

LIFETIME_SCHEMA = {
    "sizes": ("sizes", None, "list of >= 1 even extents L; the lattice is L^d with d = len(lattice.shape)"),
    "starts": ("int:1:100000", 16, "independent starts (seeds seed*100000 + i) per size"),
    "max_sweeps": ("int:1:1000000000", 10000, "give up (censored) after this many sweeps"),
    "stay": ("int:0:1000000000", 20, "sweeps the new branch must persist for the escape to count"),
    "band": ("real", 0.5, "hysteresis band of the branch classification, 0 <= band < 1"),
    "workers": ("int:0:1024", 0, "worker processes (0: the idle cores); numba uses one thread per worker"),
}


def _lifetime_params(sub: dict) -> dict:
    rest = dict(sub)
    if "sizes" not in rest:
        raise ConfigError("[lifetimes] needs sizes = [L1, L2, ...]")
    sizes = rest.pop("sizes")
    if (not isinstance(sizes, list) or not sizes
            or not all(isinstance(x, int) and not isinstance(x, bool) for x in sizes)):
        raise ConfigError(f"lifetimes.sizes must be a non-empty list of integers, got {sizes!r}")
    if any(x < 2 or x % 2 for x in sizes):
        raise ConfigError(f"lifetimes.sizes must be even and >= 2 (checkerboard), got {sizes}")
    if len(set(sizes)) != len(sizes):
        raise ConfigError(f"lifetimes.sizes has repeated entries: {sizes}")
    schema = {k: v for k, v in LIFETIME_SCHEMA.items() if k != "sizes"}
    params, _ = split_protocol({"lifetimes": rest}, "lifetimes", schema)
    if not 0.0 <= params["band"] < 1.0:
        raise ConfigError(f"lifetimes.band must be in [0, 1), got {params['band']}")
    params["sizes"] = tuple(sorted(int(x) for x in sizes))
    return params


def _escape_time(config_dict: dict, max_sweeps: int, stay: int, band: float) -> tuple[float, bool]:
    """One start: sweeps until the branch index leaves start_branch for good (>= stay sweeps).

    Top level so that it pickles for ProcessPoolExecutor; sets numba to one thread.
    Returns (time, escaped); time = max_sweeps and escaped = False when censored.
    """
    import numba

    from sigmasim.analysis.tunnelling import branch_coordinate
    from sigmasim.chain import Simulation

    numba.set_num_threads(1)
    cfg = config_from_dict(config_dict)
    sim = Simulation(cfg)
    nf = cfg.nf
    k0 = cfg.start_branch % nf
    k = k0
    left_at = None
    thr = 0.5 * (1.0 + band)
    every = cfg.measure_every
    # run.thermalize is not used: the escape time counts from the branch start
    for rec in sweeps(sim, max_sweeps, lambda sweep: sweep % every == 0):
        sweep = int(rec["sweep"])
        om = rec["omega_h"]
        x = float(branch_coordinate(np.array([om]), cfg.theta, nf)[0])
        d = x - k
        if abs(d - nf * round(d / nf)) > thr:
            k = int(round(x)) % nf
        if k != k0:
            if left_at is None:
                left_at = sweep
            if sweep - left_at >= stay:
                return float(left_at), True
        else:
            left_at = None
    return float(max_sweeps), False


def escape_time_fit(times, escaped, n_boot: int = 1000, seed: int = 0) -> dict:
    """Shifted-exponential law ``P(t) = exp(-(t - t0) / tau) / tau`` (t >= t0) of escape times.

    An escape from a branch start needs the start to relax first: no start escapes before a dead
    time ``t0``, after which escape is (close to) a Poisson process of mean ``tau``.  With ``N`` starts,
    ``n`` escaped (the others censored at their time), ``t_min`` the smallest time and
    ``S = sum_i (t_i - t_min)`` over all starts:

    * ``tau = S / (n - 1)`` (unbiased without censoring; for a shifted exponential ``2 S / tau`` is
      chi^2 with ``2 (n - 1)`` degrees of freedom, independent of ``t_min``), its exact central 68.27 %
      interval from that law, and ``ln_tau = ln S - digamma(n - 1)`` (unbiased for ``ln tau``);
    * ``dead_time = t_min - tau / N`` (the minimum of N starts exceeds t0 by tau / N on average);
    * errors from the sample itself: bootstrap over starts (``n_boot`` resamples, seeded) of
      ``ln_tau`` (``ln_tau_error``; ``tau_error = tau * ln_tau_error``), of ``dead_time`` and of the
      mean escape time ``sum t / n`` (the censored exponential estimate without a dead time: what
      the lifetime was taken to be before; its ``tau / sqrt(n)`` error assumes std = mean);
    * ``cv``: std / mean of the escaped times (1 for a pure exponential), and Kolmogorov-Smirnov
      p-values of the escaped times against the fitted shifted law and against the pure exponential
      of the same mean (approximate: fitted parameters, censoring ignored).

    NaNs where fewer than two starts escaped.
    """
    from scipy import stats
    from scipy.special import digamma, gammaincinv

    t = np.asarray(times, float).ravel()
    e = np.asarray(escaped, bool).ravel()
    big_n, n = len(t), int(e.sum())
    nan = float("nan")
    out = dict(starts=big_n, escaped=n, t_min=float(t.min()) if big_n else nan, tau=nan,
               tau_interval=[nan, nan], tau_error=nan, ln_tau=nan, ln_tau_error=nan, dead_time=nan,
               dead_time_error=nan, mean_escape=nan, mean_escape_error=nan, cv=nan,
               ks_shifted=nan, ks_exponential=nan)
    if n >= 1:
        out["mean_escape"] = float(t.sum() / n)
    if n < 2:
        return out
    tmin = float(t.min())
    big_s = float(np.sum(t - tmin))
    k = n - 1
    tau = big_s / k
    a = 0.5 * (1.0 - 0.6826894921370859)
    out.update(tau=tau, tau_interval=[big_s / float(gammaincinv(k, 1 - a)), big_s / float(gammaincinv(k, a))],
               ln_tau=float(np.log(big_s) - digamma(k)) if big_s > 0 else nan,
               dead_time=tmin - tau / big_n)
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, big_n, size=(n_boot, big_n))
    tb, eb = t[idx], e[idx]
    nb = eb.sum(axis=1)
    ok = nb >= 2
    tb, nb = tb[ok], nb[ok]
    mb = tb.min(axis=1)
    sb = np.sum(tb - mb[:, None], axis=1)
    good = sb > 0
    if good.sum() >= 10:
        ln_b = np.log(sb[good]) - digamma(nb[good] - 1)
        out["ln_tau_error"] = float(np.std(ln_b, ddof=1))
        out["tau_error"] = tau * out["ln_tau_error"]
        out["dead_time_error"] = float(np.std(mb - sb / (nb - 1) / big_n, ddof=1))
        out["mean_escape_error"] = float(np.std(tb.sum(axis=1) / nb, ddof=1))
    te = t[e]
    out["cv"] = float(te.std(ddof=1) / te.mean()) if te.mean() > 0 else nan
    if tau > 0:
        out["ks_shifted"] = float(stats.kstest(te, "expon", args=(out["dead_time"], tau)).pvalue)
        out["ks_exponential"] = float(stats.kstest(te, "expon", args=(0.0, out["mean_escape"])).pvalue)
    return out


def lifetime_estimate(times, escaped) -> tuple[float, float, int]:
    """Pure exponential (censored) maximum-likelihood mean lifetime: total exposure / escapes, error
    tau/sqrt(n).  Right only without a dead time (see :func:`escape_time_fit`, which the lifetime
    study uses)."""
    times = np.asarray(times, float)
    escaped = np.asarray(escaped, bool)
    n = int(escaped.sum())
    if n == 0:
        return float("nan"), float("nan"), 0
    tau = times.sum() / n
    return float(tau), float(tau / math.sqrt(n)), n


def fit_log_lifetimes(sizes, tau, tau_err, d: int) -> dict:
    """Weighted straight-line fits of ln tau against L^(d-1) (surface) and L^d (volume).

    Returns {'surface': fit, 'volume': fit}, each fit a dict: slope, slope_error, intercept,
    intercept_error, chi2, dof (fits with fewer than 2 finite points are NaN).
    """
    sizes = np.asarray(sizes, float)
    tau, tau_err = np.asarray(tau, float), np.asarray(tau_err, float)
    ok = np.isfinite(tau) & np.isfinite(tau_err) & (tau > 0) & (tau_err > 0)
    y, sy = np.log(tau[ok]), tau_err[ok] / tau[ok]
    out = {}
    for name, power in (("surface", d - 1), ("volume", d)):
        x = sizes[ok] ** power
        if len(x) < 2:
            nan = float("nan")
            out[name] = dict(slope=nan, slope_error=nan, intercept=nan, intercept_error=nan, chi2=nan,
                             dof=0, power=power)
            continue
        w = 1.0 / sy ** 2
        a = np.vstack([x, np.ones_like(x)]).T
        cov = np.linalg.inv(a.T @ (a * w[:, None]))
        p = cov @ (a.T @ (w * y))
        chi2 = float(np.sum(w * (y - a @ p) ** 2))
        out[name] = dict(slope=float(p[0]), slope_error=float(math.sqrt(cov[0, 0])),
                         intercept=float(p[1]), intercept_error=float(math.sqrt(cov[1, 1])),
                         chi2=chi2, dof=len(x) - 2, power=power)
    return out


@dataclass
class LifetimeResult:
    """Result of :func:`run_lifetimes`: per size the escape times of every start and the fits."""

    sizes: tuple
    d: int
    times: dict
    escaped: dict
    tau: np.ndarray
    tau_error: np.ndarray
    n_escaped: np.ndarray
    fits: dict
    wall_seconds: float = 0.0
    escape: dict = field(default_factory=dict)



def run_lifetimes(config: RunConfig, params: dict, progress=None) -> LifetimeResult:
    """Escape times from the metastable branch (``run.start = 'branch'``) for every size and start.

    Starts run in parallel (``concurrent.futures.ProcessPoolExecutor``, numba one thread per
    worker; ``workers = 1`` runs in this process).  Start i of size L uses seed
    ``config.seed * 100000 + i`` and the lattice ``[L] * d``.
    """
    from concurrent.futures import ProcessPoolExecutor, as_completed

    from sigmasim.threads import idle_cores

    if config.start != "branch":
        raise ConfigError("lifetimes need run.start = 'branch' (and run.start_branch: the metastable branch)")
    t0 = time.monotonic()
    d = len(config.shape)
    jobs = []
    for L in params["sizes"]:
        for i in range(params["starts"]):
            c = dataclasses.replace(config, shape=(L,) * d, seed=config.seed * 100000 + i)
            raw = c.to_dict()
            config_from_dict(raw)  # memory guard per size
            jobs.append((L, raw))
    args = (params["max_sweeps"], params["stay"], params["band"])
    workers = params.get("workers", 0) or idle_cores()
    tick = progress or (lambda done, total: None)
    if workers == 1:
        results = []
        for _, raw in jobs:
            results.append(_escape_time(raw, *args))
            tick(len(results), len(jobs))
    else:
        import multiprocessing

        # spawn, not fork: numba's OpenMP/TBB layer may already run threads in this process
        ctx = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as ex:
            futs = [ex.submit(_escape_time, raw, *args) for _, raw in jobs]
            for done, _ in enumerate(as_completed(futs), 1):
                tick(done, len(jobs))
            results = [f.result() for f in futs]
    times = {L: [] for L in params["sizes"]}
    escaped = {L: [] for L in params["sizes"]}
    for (L, _), (t, e) in zip(jobs, results):
        times[L].append(t)
        escaped[L].append(e)
    esc = {L: escape_time_fit(times[L], escaped[L], seed=i) for i, L in enumerate(params["sizes"])}
    tau = np.array([esc[L]["tau"] for L in params["sizes"]])
    err = np.array([esc[L]["tau_error"] for L in params["sizes"]])
    n_esc = np.array([esc[L]["escaped"] for L in params["sizes"]])
    # fit ln tau (digamma-corrected, unbiased) with its bootstrap error: pass tau = e^{ln tau} and
    # err = tau * error so that fit_log_lifetimes sees exactly (ln_tau, ln_tau_error)
    ln_tau = np.array([esc[L]["ln_tau"] for L in params["sizes"]])
    ln_err = np.array([esc[L]["ln_tau_error"] for L in params["sizes"]])
    fits = fit_log_lifetimes(params["sizes"], np.exp(ln_tau), np.exp(ln_tau) * ln_err, d)
    return LifetimeResult(tuple(params["sizes"]), d, {L: np.array(v) for L, v in times.items()},
                          {L: np.array(v) for L, v in escaped.items()}, tau, err, n_esc, fits,
                          time.monotonic() - t0, esc)


def plot_escape_times(result: LifetimeResult, path) -> Path:
    """Survival function of the escape times per size (fraction of starts not yet escaped) against
    the fitted shifted exponential and the pure exponential of the same mean; writes a PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(result.sizes)
    fig, axes = plt.subplots(1, n, figsize=(3.4 * n, 3.4), squeeze=False)
    for ax, L in zip(axes[0], result.sizes):
        t, e = np.asarray(result.times[L], float), np.asarray(result.escaped[L], bool)
        f = result.escape.get(L, {})
        ts = np.sort(t[e])
        surv = 1.0 - np.arange(1, len(ts) + 1) / len(t)
        ax.step(np.concatenate([[0.0], ts]), np.concatenate([[1.0], surv]), where="post", color="k",
                label=f"{len(t)} starts ({len(ts)} escaped)")
        x = np.linspace(0.0, max(float(t.max()), 1.0), 200)
        if np.isfinite(f.get("tau", np.nan)):
            t0, tau = f["dead_time"], f["tau"]
            ax.plot(x, np.where(x < t0, 1.0, np.exp(-(x - t0) / tau)), color="tab:red",
                    label=f"t0 {t0:.3g} + exp(tau {tau:.3g}), KS p {f['ks_shifted']:.2f}")
        if np.isfinite(f.get("mean_escape", np.nan)):
            m = f["mean_escape"]
            ax.plot(x, np.exp(-x / m), color="tab:blue", ls="--",
                    label=f"exp(mean {m:.3g}), KS p {f['ks_exponential']:.2f}")
        ax.set_yscale("log")
        ax.set_ylim(max(0.5 / len(t), 1e-3), 1.1)
        ax.set_xlabel("escape time (sweeps)")
        ax.set_title(f"L = {L}", fontsize=9)
        ax.legend(fontsize=6)
    axes[0][0].set_ylabel("fraction not yet escaped")
    fig.text(0.01, 0.01, "escape-time distributions against the fitted laws. research toy", fontsize=7)
    fig.tight_layout(rect=(0, 0.05, 1, 1))
    from sigmasim.files import atomic_output

    try:  # temporary name, fsync, rename: never a truncated figure
        return atomic_output(Path(path), lambda tmp: fig.savefig(tmp, dpi=110, format="png"), what="figure")
    finally:
        plt.close(fig)


def load_lifetimes(config_path) -> tuple[RunConfig, dict]:
    """Read a ``[lifetimes]`` protocol TOML: (run config, validated params)."""
    raw = read_toml(config_path)
    if not isinstance(raw.get("lifetimes"), dict):
        raise ConfigError(f"{config_path} has no [lifetimes] table")
    rest = dict(raw)
    params = _lifetime_params(rest.pop("lifetimes"))
    return config_from_dict(rest), params


def default_path(config: RunConfig) -> Path:
    """Where the lifetimes table goes by default: ``<output>/<name>/<name>-lifetimes.json``."""
    return config.run_dir / f"{config.name}-lifetimes.json"


def check_output(out) -> Path:
    """``out`` as a path, refused unless it ends in ``.json`` and is absent or a lifetimes file of ours."""
    import json

    if not str(out).endswith(".json"):
        raise ConfigError(f"--out must end in .json, got {out}")
    out = Path(out)
    if out.exists():
        try:
            ours = "fits" in json.loads(out.read_text()) and "protocol" in json.loads(out.read_text())
        except (OSError, ValueError, TypeError):
            ours = False
        if not ours:
            raise RunFileError(f"refusing to overwrite {out}: it is not a lifetimes file of sigmasim")
    return out


def write_lifetimes(out, result: LifetimeResult, config: RunConfig, params: dict) -> Path:
    """The table, fits and every escape time as JSON (keys: sizes, d, tau, tau_error, n_escaped, fits,
    escape, times, escaped, config, protocol)."""
    import json

    res = result
    blob = {"sizes": list(res.sizes), "d": res.d, "tau": res.tau.tolist(), "tau_error": res.tau_error.tolist(),
            "n_escaped": res.n_escaped.tolist(), "fits": res.fits,
            "escape": {str(L): v for L, v in res.escape.items()},
            "times": {str(L): v.tolist() for L, v in res.times.items()},
            "escaped": {str(L): v.tolist() for L, v in res.escaped.items()},
            "config": config.to_dict(), "protocol": params}
    from sigmasim.files import atomic_text

    # temporary name, fsync, rename: a crash never leaves half a table (nor destroys the previous one)
    return atomic_text(Path(out), json.dumps(blob, indent=1, default=list), what="lifetimes file")
