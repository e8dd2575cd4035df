r"""Reweighting in theta: single histogram (with Kish effective sample size) and multi-histogram.

Only two terms of the action depend on theta (through ``theta_m(theta)``, ``theta_a(theta)`` of the
run's placement):

.. math::

    S_\theta = -V\,\mathrm{Re}\sum_f h_f e^{i\theta_m} c_f \;-\; 2\kappa V\,\mathrm{Re}(e^{i\theta_a} d),
    \qquad c_f = \frac1V\sum_x (U_x)_{ff},\quad d = \frac1V\sum_x \det U_x ,

both read from the run-file series ``condensate`` (n, nf) and ``det`` (n,).  So for every recorded
configuration

.. math::

    S(\theta') - S(\theta) = -V\left[\mathrm{Re}\sum_f h_f e^{i\theta_m'} c_f
        - \mathrm{Re}\sum_f h_f e^{i\theta_m} c_f\right]
        - 2\kappa V\,\mathrm{Re}\left((e^{i\theta_a'} - e^{i\theta_a})\, d\right)

and ``<O>_{theta'} = <O e^{-Delta S}>_theta / <e^{-Delta S}>_theta``,
``F(theta') - F(theta) = -ln <e^{-Delta S}>_theta`` (``F = -ln Z``, the whole lattice).  An
observable that itself depends on theta (``omega_h = e^{i theta_m} Omega``) is formed with the new
``theta_m'`` (:func:`reweight_omega_h`).  The effective sample size of the weights is Kish's
``(sum w)^2 / sum w^2`` (L. Kish, Survey Sampling, Wiley 1965); when it is a small fraction of the
sample the result is not trustworthy.  A large ESS does *not* show that it is: the weights only
reshuffle the configurations the run visited, so if the vacuum that dominates at the target angle is
a branch the run never sat in (e.g. from theta = 3.0 in branch 0 to 3.2, past the first-order point
at pi, where branch -1 is the global minimum) the result has the wrong sign with a healthy ESS.
:func:`reweight` therefore compares the run's *branch census* (the branch numbers of
:mod:`sigmasim.vacua`, each measurement labelled with ``omega_h`` formed at the target angle) with the
tree-level global minimum at the target and refuses (``branch_check='refuse'``, default) or warns
(``'warn'``) when no visited branch is global there; :func:`multi_histogram` flags such evaluation
angles (``unreliable``) and warns.  Errors are blocked jackknife errors (blocks longer than the
autocorrelation time are the caller's responsibility via ``n_blocks``).

Multi-histogram: the Ferrenberg-Swendsen equations (A. M. Ferrenberg and R. H. Swendsen, Phys. Rev.
Lett. 63 (1989) 1195) for runs ``j`` at ``theta_j`` with ``N_j`` samples, generalised from energy
histograms to the theta-dependent action of each sample, solved self-consistently for
``f_j = ln Z(theta_j)`` (up to a common constant):

.. math::

    \ln Z(\theta) = \ln\sum_{i\in\text{all runs}}
        \frac{e^{-S_\theta(i)}}{\sum_j N_j\, e^{-S_{\theta_j}(i) - f_j}} .

The same expression evaluates ``F(theta) - F(theta_ref)`` at any theta.  Errors come from a seeded
block bootstrap within each run.  This is a research toy, not a physical prediction.
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass, field

import numpy as np

__all__ = ["theta_action", "delta_action", "kish_ess", "ReweightResult", "reweight", "branch_census",
           "target_branch_check", "UnvisitedVacuumError", "UnvisitedVacuumWarning",
           "reweight_omega_h", "free_energy_shift", "MultiHistogramResult", "multi_histogram"]


def _logsumexp(a, axis=None):
    a = np.asarray(a, float)
    m = np.max(a, axis=axis, keepdims=True)
    m = np.where(np.isfinite(m), m, 0.0)
    out = np.log(np.sum(np.exp(a - m), axis=axis, keepdims=True)) + m
    return np.squeeze(out, axis=axis) if axis is not None else float(out.squeeze())


def _angles(config, theta):
    return dataclasses.replace(config, theta=float(theta)).theta_angles


def theta_action(series: dict, config, theta: float) -> np.ndarray:
    """The theta-dependent part of the whole-lattice action, float64 (n,), of each recorded sample at ``theta``.

    ``series`` needs ``condensate`` (n, nf) and ``det`` (n,) (run-file or :func:`sigmasim.chain.simulate`
    series); ``config`` is the run's :class:`~sigmasim.config.RunConfig` (couplings, placement, volume).
    """
    c = np.asarray(series["condensate"], dtype=np.complex128).reshape(-1, config.nf)
    d = np.asarray(series["det"], dtype=np.complex128).ravel()
    tm, ta = _angles(config, theta)
    h = np.asarray(config.mass, dtype=float)
    v = config.volume
    s_mass = -v * (c @ (h * np.exp(1j * tm))).real
    s_det = -2.0 * config.kappa * v * (np.exp(1j * ta) * d).real
    return s_mass + s_det


def delta_action(series: dict, config, theta_new: float) -> np.ndarray:
    """``S(theta') - S(theta_run)`` (whole lattice), float64 (n,)."""
    return theta_action(series, config, theta_new) - theta_action(series, config, config.theta)


def kish_ess(log_w) -> float:
    """Kish effective sample size ``(sum w)^2 / sum w^2`` of weights given as logs."""
    lw = np.asarray(log_w, float)
    return float(np.exp(2 * _logsumexp(lw) - _logsumexp(2 * lw)))


@dataclass
class ReweightResult:
    """Reweighted estimate.

    Attributes
    ----------
    value, error : float
        Reweighted mean and blocked jackknife error.
    ess : float
        Kish effective sample size.
    ess_fraction : float
        ``ess / n``.
    n : int
    theta, theta_run : float
    """

    value: float
    error: float
    ess: float
    ess_fraction: float
    n: int
    theta: float
    theta_run: float
    census: dict = field(default_factory=dict)
    target_global: tuple = ()
    warning: str | None = None


class UnvisitedVacuumError(ValueError):
    """The run never visited the branch that is the global minimum at the target angle."""


class UnvisitedVacuumWarning(UserWarning):
    """As :class:`UnvisitedVacuumError`, issued instead of raising (``branch_check='warn'``)."""


#: a branch counts as visited by a run when at least this fraction of its measurements sit in it
MIN_BRANCH_FRACTION = 0.01


def branch_census(series: dict, config, theta: float) -> dict:
    """Fraction of the measurements in each branch (``{k: fraction}``), labelled at angle ``theta``.

    Each measurement's ``omega_h`` is formed with the ``theta_m`` of ``theta`` from the recorded
    per-flavour condensates, and numbered with :func:`sigmasim.vacua.branch_label` at ``theta``, so
    a configuration keeps its branch when the angle moves continuously.
    """
    from sigmasim.vacua import branch_label

    c = np.asarray(series["condensate"], dtype=np.complex128).reshape(-1, config.nf)
    tm, _ = _angles(config, theta)
    om = np.exp(1j * tm) * c.sum(axis=1) / config.nf
    lab = np.atleast_1d(branch_label(om, theta, config.nf))
    ks, counts = np.unique(lab, return_counts=True)
    return {int(k): float(n) / len(lab) for k, n in zip(ks, counts)}


def target_branch_check(census: dict, config, theta: float) -> tuple:
    """``(target_global, message or None)``: None when a visited branch is the tree-level global
    minimum at ``theta`` (or the model has no tree-level potential)."""
    from sigmasim.vacua import find_local_minima, branch_label, potential_of_config

    pot = potential_of_config(dataclasses.replace(config, theta=float(theta)))
    if pot is None:
        return (), None
    glob = tuple(sorted({branch_label(v.omega_rot, theta, config.nf)
                         for v in find_local_minima(pot) if v.is_global}))
    visited = sorted(k for k, f in census.items() if f >= MIN_BRANCH_FRACTION)
    if set(glob) & set(visited):
        return glob, None
    return glob, (f"reweighting to theta = {theta:g}: the run visited branch(es) "
                  f"{', '.join(map(str, visited))} only, but the tree-level global minimum there is "
                  f"branch {', '.join(map(str, glob))}; reweighting cannot reach a vacuum the run "
                  "never sat in (the result can even have the wrong sign with a large ESS)")


def _blocks(n, n_blocks):
    nb = int(max(2, min(n_blocks, n)))
    edges = np.linspace(0, n, nb + 1).astype(int)
    return edges


def _jackknife_ratio(obs, log_w, n_blocks):
    """Weighted mean sum(O w)/sum(w) and its blocked jackknife error."""
    lw = log_w - np.max(log_w)
    w = np.exp(lw)
    edges = _blocks(len(w), n_blocks)
    bw = np.add.reduceat(w, edges[:-1])
    bo = np.add.reduceat(w * obs, edges[:-1])
    value = bo.sum() / bw.sum()
    loo = (bo.sum() - bo) / (bw.sum() - bw)
    nb = len(bw)
    err = np.sqrt((nb - 1) / nb * np.sum((loo - loo.mean()) ** 2))
    return float(value), float(err)


def reweight(series: dict, config, theta_new: float, observable, n_blocks: int = 50,
             branch_check: str = "refuse") -> ReweightResult:
    """Single-histogram reweighting of a real observable to ``theta_new``.

    Parameters
    ----------
    series : dict of arrays
    config : RunConfig of the run (``config.theta`` is the simulated angle)
    theta_new : float
    observable : str or float array (n,)
        A real series name (e.g. ``'action_beta'``) or the values themselves.
    n_blocks : int
        Jackknife blocks (each should be longer than the autocorrelation time).
    branch_check : {'refuse', 'warn', 'off'}
        What to do when no branch the run visited is the tree-level global minimum at
        ``theta_new`` (module docstring): raise :class:`UnvisitedVacuumError`, or issue an
        :class:`UnvisitedVacuumWarning` and set ``warning`` on the result.
    """
    if branch_check not in ("refuse", "warn", "off"):
        raise ValueError(f"branch_check must be 'refuse', 'warn' or 'off', got {branch_check!r}")
    obs = np.asarray(series[observable] if isinstance(observable, str) else observable, float).ravel()
    log_w = -delta_action(series, config, theta_new)
    if len(obs) != len(log_w):
        raise ValueError(f"observable has {len(obs)} samples, the series {len(log_w)}")
    census, glob, msg = {}, (), None
    if branch_check != "off":
        census = branch_census(series, config, theta_new)
        glob, msg = target_branch_check(census, config, theta_new)
        if msg is not None and branch_check == "refuse":
            raise UnvisitedVacuumError(msg)
        if msg is not None:
            warnings.warn(msg, UnvisitedVacuumWarning, stacklevel=2)
    value, err = _jackknife_ratio(obs, log_w, n_blocks)
    ess = kish_ess(log_w)
    return ReweightResult(value, err, ess, ess / len(obs), len(obs), float(theta_new), config.theta,
                          census, glob, msg)


def reweight_omega_h(series: dict, config, theta_new: float, n_blocks: int = 50,
                     branch_check: str = "refuse"):
    """Reweighted ``<omega_h>`` at ``theta_new`` (formed with the new ``theta_m``); ``branch_check``
    as in :func:`reweight`.

    Returns
    -------
    (ReweightResult, ReweightResult) : real and imaginary parts.
    """
    c = np.asarray(series["condensate"], dtype=np.complex128).reshape(-1, config.nf)
    tm, _ = _angles(config, theta_new)
    om = np.exp(1j * tm) * c.sum(axis=1) / config.nf
    re = reweight(series, config, theta_new, om.real, n_blocks, branch_check)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UnvisitedVacuumWarning)  # said once, for the real part
        im = reweight(series, config, theta_new, om.imag, n_blocks, branch_check)
    return re, im


def free_energy_shift(series: dict, config, theta_new: float, n_blocks: int = 50):
    """``F(theta_new) - F(theta_run) = -ln <exp(-Delta S)>`` with blocked jackknife error and Kish ESS.

    Returns (value, error, ess).
    """
    log_w = -delta_action(series, config, theta_new)
    n = len(log_w)
    value = -(_logsumexp(log_w) - np.log(n))
    edges = _blocks(n, n_blocks)
    nb = len(edges) - 1
    loo = np.empty(nb)
    for b in range(nb):
        keep = np.concatenate([log_w[:edges[b]], log_w[edges[b + 1]:]])
        loo[b] = -(_logsumexp(keep) - np.log(len(keep)))
    err = np.sqrt((nb - 1) / nb * np.sum((loo - loo.mean()) ** 2))
    return float(value), float(err), kish_ess(log_w)


@dataclass
class MultiHistogramResult:
    """Result of :func:`multi_histogram`.

    Attributes
    ----------
    thetas : float array (m,)
        Evaluation angles.
    delta_f, error : float array (m,)
        ``F(theta) - F(theta_ref)`` (whole lattice, ``F = -ln Z``) and bootstrap errors.
    run_thetas : float array (R,)
    f_runs : float array (R,)
        ``-ln Z(theta_j) + ln Z(theta_ref)`` at the run angles.
    iterations : int
    converged : bool
    unreliable : bool array (m,)
        True where no run visited the branch that is the tree-level global minimum at that theta
        (module docstring); a warning lists them.
    """

    thetas: np.ndarray
    delta_f: np.ndarray
    error: np.ndarray
    run_thetas: np.ndarray
    f_runs: np.ndarray
    iterations: int
    converged: bool
    unreliable: np.ndarray | None = None


def _check_compatible(configs):
    ref = configs[0]
    keys = ("shape", "group", "nf", "beta", "mass", "kappa", "theta_placement")
    for c in configs[1:]:
        for k in keys:
            if getattr(c, k) != getattr(ref, k):
                raise ValueError(f"runs differ in {k}: {getattr(ref, k)!r} vs {getattr(c, k)!r}; "
                                 "multi-histogram reweighting needs runs that differ only in theta")


def _solve(s_runs, n_j, tol, max_iter, f0=None):
    """s_runs: (R, Ntot) action of every pooled sample at every run theta. Returns ln Z_j (ln Z_0 = 0)."""
    log_n = np.log(n_j)
    f = np.zeros(len(n_j)) if f0 is None else np.array(f0, float)
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        log_den = _logsumexp(log_n[:, None] - s_runs - f[:, None], axis=0)  # (Ntot,)
        f_new = _logsumexp(-s_runs - log_den[None, :], axis=1)
        f_new -= f_new[0]
        if np.max(np.abs(f_new - f)) < tol:
            f = f_new
            converged = True
            break
        f = f_new
    log_den = _logsumexp(log_n[:, None] - s_runs - f[:, None], axis=0)
    return f, log_den, it, converged


def multi_histogram(runs, thetas, theta_ref: float = 0.0, *, n_boot: int = 100, n_blocks: int = 20,
                    seed: int = 0, tol: float = 1e-10, max_iter: int = 10000) -> MultiHistogramResult:
    """Ferrenberg-Swendsen multi-histogram ``F(theta) - F(theta_ref)`` from runs at several theta.

    Parameters
    ----------
    runs : sequence of (series, config)
        Runs that differ only in theta (same couplings, lattice, placement); ``series`` needs
        ``condensate`` and ``det``.  Samples are taken as independent in the equations (thin the
        series to about one sample per autocorrelation time first); the error is a block bootstrap.
    thetas : float array (m,)
        Where to evaluate.
    theta_ref : float
        Reference angle (need not be a run angle, but should be covered by the runs).
    """
    configs = [c for _, c in runs]
    if len(runs) < 1:
        raise ValueError("multi_histogram needs at least one run")
    _check_compatible(configs)
    cfg0 = configs[0]
    run_thetas = np.array([c.theta for c in configs], float)
    thetas = np.atleast_1d(np.asarray(thetas, float))
    pooled = {"condensate": np.concatenate([np.asarray(s["condensate"]).reshape(-1, cfg0.nf) for s, _ in runs]),
              "det": np.concatenate([np.asarray(s["det"]).ravel() for s, _ in runs])}
    lengths = np.array([len(np.asarray(s["det"]).ravel()) for s, _ in runs])
    offsets = np.concatenate([[0], np.cumsum(lengths)])
    s_runs = np.stack([theta_action(pooled, cfg0, t) for t in run_thetas])
    s_eval = np.stack([theta_action(pooled, cfg0, t) for t in np.concatenate([[theta_ref], thetas])])

    def estimate(idx, n_j, f0=None):
        f, log_den, it, conv = _solve(s_runs[:, idx], n_j.astype(float), tol, max_iter, f0)
        ln_z = _logsumexp(-s_eval[:, idx] - log_den[None, :], axis=1)
        return -(ln_z[1:] - ln_z[0]), f, it, conv

    all_idx = np.arange(offsets[-1])
    delta_f, f_full, it, conv = estimate(all_idx, lengths)
    # F at the run angles relative to theta_ref
    log_den_full = _solve(s_runs, lengths.astype(float), tol, max_iter, f_full)[1]
    ln_zr = _logsumexp(-s_runs - log_den_full[None, :], axis=1)
    f_runs = -(ln_zr - _logsumexp(-s_eval[0] - log_den_full))
    rng = np.random.default_rng(seed)
    boots = []
    for _ in range(n_boot):
        parts, n_j = [], []
        for j in range(len(runs)):
            edges = _blocks(lengths[j], n_blocks)
            pick = rng.integers(0, len(edges) - 1, size=len(edges) - 1)
            chosen = [np.arange(edges[b], edges[b + 1]) + offsets[j] for b in pick]
            parts += chosen
            n_j.append(sum(len(c) for c in chosen))
        boots.append(estimate(np.concatenate(parts), np.array(n_j), f_full)[0])
    err = np.std(np.array(boots), axis=0, ddof=1) if n_boot >= 2 else np.full(len(thetas), np.nan)
    unreliable = np.zeros(len(thetas), bool)
    for i, t in enumerate(thetas):
        census = branch_census(pooled, cfg0, t)
        unreliable[i] = target_branch_check(census, cfg0, t)[1] is not None
    if unreliable.any():
        warnings.warn("multi_histogram: no run visited the tree-level global branch at theta = "
                      + ", ".join(f"{t:g}" for t in thetas[unreliable])
                      + "; F(theta) there is not reliable", UnvisitedVacuumWarning, stacklevel=2)
    return MultiHistogramResult(thetas, delta_f, err, run_thetas, f_runs, it, conv, unreliable)
