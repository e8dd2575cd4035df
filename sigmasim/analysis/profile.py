r"""Free-energy profiles of one collective variable across a barrier (numpy and scipy only).

A collective variable ``x`` (e.g. ``Im omega_h``) has the canonical density ``P(x)``; its profile
is ``F(x) = -ln P(x)`` (in units of the action, i.e. of kT).  This module turns biased Monte Carlo
series into ``F`` with honest errors and reads off what a study of the barrier needs.

Bias convention
---------------
A biased chain samples ``exp(-S - W(x))``: ``W`` is *added to the action*.  An umbrella window has
``W_k(x) = k/2 (x - x_k)^2`` (:class:`HarmonicBias`); a multicanonical chain has the frozen weight
``W(x)`` of its production run.  Canonical averages come back with the factor ``exp(+W)``.

Joining windows: WHAM
---------------------
Weighted histogram analysis (S. Kumar, D. Bouzida, R. H. Swendsen, P. A. Kollman and
J. M. Rosenberg, J. Comput. Chem. 13 (1992) 1011), at one temperature.  With ``h_kb`` the counts of
window ``k`` in bin ``b``, ``N_k = sum_b h_kb``, ``H_b = sum_k h_kb`` and ``w_kb = W_k(x_b)`` at the
bin centre,

.. math:: P_b = H_b / \sum_k N_k e^{f_k - w_{kb}},\qquad e^{-f_k} = \sum_b P_b e^{-w_{kb}}.

These are the stationarity conditions of the convex function
``A(f) = sum_b H_b ln(sum_k N_k e^{f_k - w_kb}) - sum_k N_k f_k`` (up to the constant shift of all
``f_k``; we fix ``f_0 = 0``).  We minimise it (damped Newton steps with the exact Hessian,
scipy's ``trust-exact`` minimiser if they stall) instead of the slow self-consistent iteration.  Only samples inside the grid enter (``N_k`` counts them; the
fraction outside is reported per window).  The bias at the bin centre is the histogram
approximation of WHAM (its error is of order ``(bin width)^2`` times derivatives of ``W``; keep
bins narrow compared with a window's width ``1/sqrt(k)``).  :func:`mbar_profile` is the binless
cross-check with the MBAR estimator (M. R. Shirts and J. D. Chodera, J. Chem. Phys. 129 (2008)
124105), from the optional package pymbar (``pip install pymbar``).

The profile is ``F_b = -ln(P_b / width_b)`` with ``sum_b P_b = 1`` over the grid: an estimate of
``-ln`` of the density normalised on the grid.  A bin that no window visited has ``P_b = 0``: its
``F`` is NaN and it is listed in ``unvisited`` (never interpolated).

Errors
------
Block bootstrap over each window's own series (B. Efron, The Jackknife, the Bootstrap and Other
Resampling Plans, SIAM (1982); blocks for correlated data: common practice, no source): the block
length is ``ceil(10 tau_int)`` of the window's series from Wolff's Gamma method
(:func:`sigmasim.analysis.resampling.auto_bin_size`, same rule as the binned jackknife there),
capped so that at least 10 blocks remain.  A series whose block length had to be capped (shorter
than ``10 x 10 = 100 tau_int``: a multicanonical chain with a few dozen round trips) is listed in
``short``: its blocks are shorter than the correlations and its tau_int itself is estimated low, so
its errors are underestimated (at beta = 0.80, L = 12 a multicanonical production chain of 40000
sweeps holds about 16 tau_int of arg omega_h): run it longer or take the error from the scatter of
independent chains.  A window with fewer than
:data:`sigmasim.analysis.gamma.MIN_SAMPLES` samples gets blocks of one sample and is listed in
``sparse`` (its errors are then iid errors: too few samples to measure an autocorrelation).  Each
replica resamples blocks with replacement inside every window independently and re-solves WHAM.
Errors are half the central 68.27 % range of the replicas (``interval`` gives the range itself),
so a replica in which a rarely visited bin is empty (``F = inf``) widens the error honestly instead
of being dropped.

Barrier
-------
:func:`barrier` finds the lowest bin left and right of ``split`` and the highest bin between them,
then refines each by a least-squares cubic over ``2 half_width + 1`` bins around it (its stationary
point with the right curvature inside the fitting window, else the bin value and a flag; a cubic
rather than a parabola because a parabola's vertex is shifted by the skewness of the well).  The same procedure runs on every bootstrap replica, so the errors include the uncertainty of
the locations.  ``barrier = F(saddle) - min(F(left), F(right))``; ``asymmetry = F(right) -
F(left)`` is the free-energy difference of the two branches (metastable minus stable when positive).
At a symmetric point (theta = pi) use ``barrier_mean = F(saddle) - (F(left) + F(right)) / 2``: the
minimum of two noisy values is biased low.

Interface tension
-----------------
In a periodic box of linear size ``L`` in ``d`` dimensions the configurations at the saddle contain
two interfaces, so ``Delta F(L) = 2 sigma L^(d-1)`` plus corrections (K. Binder, Phys. Rev. A 25
(1982) 1699); :func:`fit_interface_tension` fits this with an optional constant and ``c ln L``
(scipy.optimize.curve_fit with absolute errors) and gives chi^2 and its p-value.

Round trips
-----------
:func:`round_trips` counts the passages of a series between two regions ``x <= left`` and
``x >= right`` (a half trip is the first entry into the opposite region); the exposure runs from the
first entry into either region to the end of the series, the rate is ``half trips / exposure`` with
the exact Poisson (Garwood) interval of :mod:`sigmasim.analysis.tunnelling`, and the round-trip time
is ``2 exposure / half trips`` with the inverted interval (no passage: a lower limit only).

Everything shown from this module is a research toy, not a physical prediction.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from sigmasim.analysis.gamma import MIN_SAMPLES
from sigmasim.analysis.tunnelling import ONE_SIGMA, poisson_interval, poisson_upper_limit

__all__ = ["HarmonicBias", "Window", "Profile", "block_length", "wham", "mbar_profile",
           "multicanonical_profile", "BarrierResult", "barrier", "TensionFit",
           "fit_interface_tension", "RoundTrips", "round_trips", "plot_profiles",
           "BLOCK_FACTOR", "MIN_BLOCKS"]

#: block length = ceil(BLOCK_FACTOR * tau_int) (as the binned jackknife of analysis.resampling)
BLOCK_FACTOR = 10.0
#: at least this many blocks per window (the block length is capped accordingly)
MIN_BLOCKS = 10
_Q = (0.5 * (1.0 - ONE_SIGMA), 0.5 * (1.0 + ONE_SIGMA))
_TOY = "research toy, not a physical prediction"


@dataclass(frozen=True)
class HarmonicBias:
    """``W(x) = spring/2 (x - centre)^2`` (added to the action); picklable, so it travels to workers."""

    spring: float
    centre: float

    def __call__(self, x):
        x = np.asarray(x, dtype=float)
        return 0.5 * self.spring * (x - self.centre) ** 2


@dataclass
class Window:
    """One biased series: ``x`` in Monte Carlo order and the bias ``W`` it was sampled with."""

    x: np.ndarray
    bias: Callable
    label: str = ""
    block: int | None = None     # block length; default from the Gamma method (block_length)

    def __post_init__(self):
        self.x = np.asarray(self.x, dtype=float).ravel()
        if not np.all(np.isfinite(self.x)):
            raise ValueError(f"window {self.label or '?'}: the series has non-finite values")


def block_length(x, factor: float = BLOCK_FACTOR, min_blocks: int = MIN_BLOCKS) -> tuple[int, bool]:
    """Block length ``ceil(factor tau_int)`` of a series (capped to leave ``min_blocks`` blocks).

    Returns ``(length, sparse, capped)``; ``sparse`` is True when the series is too short (or
    constant) for the Gamma method, and the length is then 1; ``capped`` is True when
    ``factor tau_int`` exceeded the cap (the series is shorter than ``factor min_blocks tau_int``:
    errors underestimated, see the module notes).
    """
    x = np.asarray(x, dtype=float).ravel()
    if len(x) < MIN_SAMPLES or not np.ptp(x) > 0:
        return 1, True, False
    return _capped_block(x, factor, min_blocks)


def _capped_block(data, factor: float, min_blocks: int) -> tuple[int, bool, bool]:
    """``(min(ceil(factor tau_int), N // min_blocks), False, capped)`` or ``(1, True, False)``."""
    from sigmasim.analysis.resampling import auto_bin_size

    n = len(data)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            full = int(auto_bin_size(data, factor=factor, min_bins=1))
    except ValueError:
        return 1, True, False
    cap = max(1, n // max(1, int(min_blocks)))
    return min(full, cap), False, full > cap


def _reweighted_block_length(x, wx, edges, factor: float = BLOCK_FACTOR,
                             min_blocks: int = MIN_BLOCKS) -> tuple[int, bool]:
    """Block length of a reweighted chain (see :func:`multicanonical_profile`): ``(length, sparse)``.

    The series analysed are ``x``, ``|x - c|`` (``c`` the grid's centre: the distance from the
    barrier can stay correlated while x flips sign), ``e 1[x in grid]`` and ``e 1[x in bin b]`` for
    every bin with at least ``MIN_SAMPLES`` samples (``e = exp(W - max W)``); the longest
    ``tau_int`` sets the length, capped to leave ``min_blocks`` blocks.  Constant series are left out.
    Returns ``(length, sparse, capped)`` as :func:`block_length`.
    """
    x = np.asarray(x, dtype=float).ravel()
    if len(x) < MIN_SAMPLES:
        return 1, True, False
    nb = len(edges) - 1
    b = np.searchsorted(edges, x, side="right") - 1
    b[x == edges[-1]] = nb - 1
    inside = (b >= 0) & (b < nb)
    e = np.exp(np.asarray(wx, dtype=float) - np.max(wx))
    counts = np.bincount(b[inside], minlength=nb)
    centre = 0.5 * (edges[0] + edges[-1])
    cols = [x, np.abs(x - centre), e * inside] + [e * (b == j) for j in np.nonzero(counts >= MIN_SAMPLES)[0]]
    data = np.column_stack(cols)
    data = data[:, np.ptp(data, axis=0) > 0]
    if data.shape[1] == 0:
        return 1, True, False
    return _capped_block(data, factor, min_blocks)


def _check_edges(edges) -> np.ndarray:
    e = np.asarray(edges, dtype=float).ravel()
    if len(e) < 3 or not np.all(np.isfinite(e)) or not np.all(np.diff(e) > 0):
        raise ValueError("edges must be at least 3 finite, increasing bin edges")
    return e


def _block_hist(x, edges, block, weights=None) -> np.ndarray:
    """Histogram of each block of a series: float array (n_blocks, n_bins); outside samples dropped."""
    nb = len(edges) - 1
    n = len(x)
    nblk = max(1, -(-n // block))
    b = np.searchsorted(edges, x, side="right") - 1
    b[x == edges[-1]] = nb - 1
    inside = (b >= 0) & (b < nb)
    blk = np.arange(n) // block
    w = np.ones(n) if weights is None else weights
    flat = np.bincount(blk[inside] * nb + b[inside], weights=w[inside], minlength=nblk * nb)
    return flat.reshape(nblk, nb)


def _logsumexp(a, axis=None):
    """ln sum exp(a) (plain numpy: scipy.special.logsumexp costs milliseconds per call here)."""
    a = np.asarray(a, dtype=float)
    m = np.max(a, axis=axis, keepdims=True)
    m = np.where(np.isfinite(m), m, 0.0)
    with np.errstate(divide="ignore"):
        out = np.log(np.sum(np.exp(a - m), axis=axis, keepdims=True)) + m
    return out.item() if axis is None else np.squeeze(out, axis=axis)


@dataclass
class Profile:
    """A free-energy profile ``F(x) = -ln P(x)`` on a grid (see the module notes).

    Attributes
    ----------
    edges, centres, widths : float arrays (n_bins + 1,), (n_bins,), (n_bins,)
    F, error : float arrays (n_bins,)
        ``-ln(P_b / width_b)`` (``sum P_b = 1``) and half the central 68 % range of the replicas;
        NaN in unvisited bins.
    interval : float array (n_bins, 2)
        Central 68.27 % range of the bootstrap replicas.
    replicas : float array (n_boot, n_bins)
        Bootstrap replicas of ``F`` (``inf`` where a replica left a bin empty).
    counts : float array (n_bins,)
        Samples per bin (all windows).
    unvisited : int array
        Bins without any sample (F is NaN there).
    window_f : float array (K,)
        WHAM free energies ``f_k`` of the windows (``f_0 = 0``); empty for a single chain.
    windows : list of dict
        Per window: label, samples, in-grid fraction, block length, sparse and short flags.
    sparse : list of str
        Labels of windows too short for a block length (iid errors there).
    short : list of str
        Labels of series shorter than ``100 tau_int`` (block length capped): their errors are
        underestimated (module notes, *Errors*).
    method : str
    """

    edges: np.ndarray
    F: np.ndarray
    error: np.ndarray
    interval: np.ndarray
    replicas: np.ndarray
    counts: np.ndarray
    unvisited: np.ndarray
    window_f: np.ndarray
    windows: list
    sparse: list
    method: str
    notes: list = field(default_factory=list)
    short: list = field(default_factory=list)

    @property
    def centres(self) -> np.ndarray:
        return 0.5 * (self.edges[1:] + self.edges[:-1])

    @property
    def widths(self) -> np.ndarray:
        return np.diff(self.edges)

    def summary(self) -> str:
        lines = [f"{self.method}: {len(self.F)} bins on [{self.edges[0]:.4g}, {self.edges[-1]:.4g}], "
                 f"{int(self.counts.sum())} samples in {max(1, len(self.windows))} series, "
                 f"{self.replicas.shape[0]} bootstrap replicas"]
        if len(self.unvisited):
            lines.append(f"unvisited bins (F left NaN): {', '.join(str(int(b)) for b in self.unvisited)}")
        if self.sparse:
            lines.append(f"too few samples for a block length (iid errors): {', '.join(self.sparse)}")
        if self.short:
            lines.append(f"shorter than {BLOCK_FACTOR * MIN_BLOCKS:.0f} tau_int (blocks capped; errors UNDERESTIMATED: "
                         f"run longer or use the scatter of independent chains): {', '.join(self.short)}")
        lines += self.notes
        return "\n".join(lines) + f"\n({_TOY})"


def _finish(edges, logp_central, logp_reps, counts, window_f, info, sparse, method, notes, short=()) -> Profile:
    """Normalise log bin probabilities into F = -ln(P/width), with replica ranges."""
    widths = np.diff(edges)

    def to_f(lp):
        lp = lp - _logsumexp(lp[np.isfinite(lp)]) if np.any(np.isfinite(lp)) else lp
        return -(lp - np.log(widths))

    F = to_f(logp_central)
    reps = np.array([to_f(r) for r in logp_reps]) if len(logp_reps) else np.empty((0, len(F)))
    unvisited = np.nonzero(counts <= 0)[0]
    F[unvisited] = np.nan
    if len(reps):
        # no interpolation between replicas: a range reaching an empty replica bin is inf, not NaN
        lo, hi = np.quantile(reps, _Q, axis=0, method="inverted_cdf")
        with np.errstate(invalid="ignore"):
            err = np.where(np.isinf(hi), np.inf, 0.5 * (hi - lo))
        interval = np.column_stack([lo, hi])
    else:
        err = np.full(len(F), np.nan)
        interval = np.full((len(F), 2), np.nan)
    err[unvisited] = np.nan
    interval[unvisited] = np.nan
    return Profile(edges, F, err, interval, reps, counts, unvisited, window_f, info, sparse, method,
                   notes, list(short))


def _wham_solve(h, n_k, w, f0=None):
    """Solve WHAM: h (K, nb) counts, n_k (K,), w (K, nb) bias at bin centres -> (log P_b, f_k)."""
    from scipy.optimize import minimize

    use = n_k > 0
    H = h.sum(axis=0)
    vis = H > 0
    nk, wk = n_k[use], w[use][:, vis]
    Hv = H[vis]
    K = len(nk)
    ntot = nk.sum()
    lnk = np.log(nk)

    def parts(g):
        f = np.concatenate([[0.0], g])
        a = f[:, None] - wk + lnk[:, None]          # (K, nbv)
        lden = _logsumexp(a, axis=0)
        p = np.exp(a - lden[None, :])              # share of window k in bin b
        return f, lden, p

    def obj(g):
        f, lden, p = parts(g)
        return (Hv @ lden - nk @ f) / ntot, ((p @ Hv - nk) / ntot)[1:]

    def hess(g):
        _, _, p = parts(g)
        ph = p * Hv[None, :]
        return ((np.diag(ph.sum(axis=1)) - ph @ p.T) / ntot)[1:, 1:]

    g = np.zeros(K - 1) if f0 is None else np.asarray(f0, float)[use][1:] - np.asarray(f0, float)[use][0]
    g = np.nan_to_num(g)
    if K > 1:
        # convex: damped Newton steps (a few from a warm start); scipy's trust region if they stall
        val, grad = obj(g)
        done = False
        for _ in range(100):
            if np.max(np.abs(grad)) < 1e-11:
                done = True
                break
            try:
                step = np.linalg.solve(hess(g), -grad)
            except np.linalg.LinAlgError:
                break
            t = 1.0
            while t > 1e-6:
                v2, g2 = obj(g + t * step)
                if v2 <= val + 1e-4 * t * (grad @ step):
                    break
                t *= 0.5
            else:
                break
            g, val, grad = g + t * step, v2, g2
        if not done and np.max(np.abs(grad)) > 1e-9:
            g = minimize(obj, g, jac=True, hess=hess, method="trust-exact", options={"gtol": 1e-11}).x
    else:
        g = np.zeros(0)
    f = np.concatenate([[0.0], g])
    lden = _logsumexp(f[:, None] - wk + lnk[:, None], axis=0)
    logp = np.full(h.shape[1], -np.inf)
    logp[vis] = np.log(Hv) - lden
    f_all = np.full(len(n_k), np.nan)
    f_all[np.nonzero(use)[0]] = f
    return logp, f_all


def wham(windows: Sequence[Window], edges, *, n_boot: int = 200, seed: int = 0,
         block_factor: float = BLOCK_FACTOR) -> Profile:
    """Join biased windows into one profile by WHAM, with block-bootstrap errors (module notes).

    Parameters
    ----------
    windows : sequence of Window
    edges : float array (n_bins + 1,)
        Histogram grid; samples outside it are dropped (the in-grid fraction is reported).
    n_boot : int
        Bootstrap replicas (0: no errors).
    seed : int
        Seed of the bootstrap (numpy default_rng).
    """
    edges = _check_edges(edges)
    if len(windows) == 0:
        raise ValueError("wham needs at least one window")
    centres = 0.5 * (edges[1:] + edges[:-1])
    blocks, info, sparse, short = [], [], [], []
    w = np.empty((len(windows), len(centres)))
    for k, win in enumerate(windows):
        label = win.label or f"window {k}"
        if win.block is not None:
            blen, sp, capped = int(win.block), False, False
        else:
            blen, sp, capped = block_length(win.x, block_factor)
        hb = _block_hist(win.x, edges, max(1, blen))
        blocks.append(hb)
        n_in = float(hb.sum())
        info.append({"label": label, "samples": len(win.x), "in_grid": n_in / max(1, len(win.x)),
                     "block": blen, "sparse": sp, "short": capped})
        if sp:
            sparse.append(label)
        if capped:
            short.append(label)
        wk = np.asarray(win.bias(centres), dtype=float)
        if wk.shape != centres.shape or not np.all(np.isfinite(wk)):
            raise ValueError(f"{label}: the bias must give finite values at the bin centres")
        w[k] = wk
    h = np.array([b.sum(axis=0) for b in blocks])
    n_k = h.sum(axis=1)
    if not n_k.sum() > 0:
        raise ValueError("no sample of any window lies inside the grid")
    notes = [f"{i['label']}: no sample inside the grid (left out)" for i, n in zip(info, n_k) if n == 0]
    logp, f = _wham_solve(h, n_k, w)
    rng = np.random.default_rng(seed)
    reps = []
    for _ in range(int(n_boot)):
        hr = np.array([rng.multinomial(len(b), np.full(len(b), 1.0 / len(b))) @ b for b in blocks])
        lp, _ = _wham_solve(hr, hr.sum(axis=1), w, f0=np.nan_to_num(f))
        reps.append(lp)
    return _finish(edges, logp, reps, h.sum(axis=0), f, info, sparse, "WHAM", notes, short)


def mbar_profile(windows: Sequence[Window], edges) -> Profile:
    """Binless MBAR profile of the same windows (point estimate; needs the optional pymbar package).

    The unbiased weight of sample ``n`` is ``1 / sum_k N_k exp(f_k - W_k(x_n))`` with the MBAR
    ``f_k`` (Shirts & Chodera 2008); bin probabilities are the sums of these weights over the samples
    in each bin, normalised over the grid.  A cross-check of :func:`wham` (no errors here).
    """
    try:
        from pymbar import MBAR
    except ImportError:
        raise ValueError("mbar_profile needs the optional package pymbar (pip install pymbar)") from None
    edges = _check_edges(edges)
    x = np.concatenate([win.x for win in windows])
    n_k = np.array([len(win.x) for win in windows])
    u = np.array([np.asarray(win.bias(x), dtype=float) for win in windows])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = MBAR(u, n_k, solver_protocol="robust")
    f = np.asarray(m.f_k)
    ok = n_k > 0
    logw = -_logsumexp(np.log(n_k[ok])[:, None] + f[ok][:, None] - u[ok], axis=0)
    nb = len(edges) - 1
    b = np.searchsorted(edges, x, side="right") - 1
    b[x == edges[-1]] = nb - 1
    inside = (b >= 0) & (b < nb)
    logp = np.full(nb, -np.inf)
    for j in np.unique(b[inside]):
        logp[j] = _logsumexp(logw[inside & (b == j)])
    counts = np.bincount(b[inside], minlength=nb).astype(float)
    info = [{"label": win.label or f"window {k}", "samples": len(win.x)} for k, win in enumerate(windows)]
    return _finish(edges, logp, [], counts, f - f[0], info, [], "MBAR (pymbar)", [])


def multicanonical_profile(x, bias: Callable, edges, *, n_boot: int = 200, seed: int = 0,
                           block: int | None = None, block_factor: float = BLOCK_FACTOR) -> Profile:
    """``-ln P(x)`` of one chain sampled with a frozen weight ``W`` (reweighted with ``exp(+W)``).

    Each sample counts with ``exp(W(x_n))`` (exact per sample, no binning of the weight); the
    errors are a block bootstrap over the chain, the block length ``ceil(block_factor tau_int)``
    with the largest Gamma-method ``tau_int`` among ``x``, its distance from the grid's centre, the
    reweighted in-grid indicator and the reweighted indicator of every bin with at least
    ``MIN_SAMPLES`` samples
    (:func:`_reweighted_block_length`: ``x`` alone can decorrelate much faster than the bins'
    contents, e.g. when overrelaxation flips its sign).  A chain shorter than ``block_factor x 10
    tau_int`` is listed in ``short`` (errors underestimated; module notes, *Errors*).
    """
    edges = _check_edges(edges)
    x = np.asarray(x, dtype=float).ravel()
    if not np.all(np.isfinite(x)):
        raise ValueError("the series has non-finite values")
    wx = np.asarray(bias(x), dtype=float)
    if wx.shape != x.shape or not np.all(np.isfinite(wx)):
        raise ValueError("the weight must give a finite value for every sample")
    if block is None:
        blen, sp, capped = _reweighted_block_length(x, wx, edges, block_factor)
    else:
        blen, sp, capped = int(block), False, False
    shift = float(wx.max()) if len(wx) else 0.0
    blocks = _block_hist(x, edges, max(1, blen), np.exp(wx - shift))
    counts = _block_hist(x, edges, max(1, blen)).sum(axis=0)
    if not counts.sum() > 0:
        raise ValueError("no sample lies inside the grid")

    def logp_of(hist):
        with np.errstate(divide="ignore"):
            return np.log(hist)

    rng = np.random.default_rng(seed)
    reps = [logp_of(rng.multinomial(len(blocks), np.full(len(blocks), 1.0 / len(blocks))) @ blocks)
            for _ in range(int(n_boot))]
    info = [{"label": "chain", "samples": len(x), "in_grid": counts.sum() / max(1, len(x)),
             "block": blen, "sparse": sp, "short": capped}]
    return _finish(edges, logp_of(blocks.sum(axis=0)), reps, counts, np.zeros(0), info,
                   ["chain"] if sp else [], "multicanonical reweighting", [], ["chain"] if capped else [])


# ----------------------------------------------------------------------------- barrier


def _refine(c, F, i, hw, kind):
    """Least-squares cubic over bins i-hw..i+hw (finite ones) -> (x, F, ok).

    The extremum is the stationary point of the cubic with the right curvature inside the fitting
    window; a cubic (not a parabola) so that the skewness of a well does not shift the location.
    """
    lo, hi = max(0, i - hw), min(len(F), i + hw + 1)
    xs, ys = c[lo:hi], F[lo:hi]
    ok = np.isfinite(ys)
    if ok.sum() >= 5:
        x0 = c[i]
        p = np.polyfit(xs[ok] - x0, ys[ok], 3)
        d1, d2 = np.polyder(p), np.polyder(p, 2)
        roots = np.roots(d1)
        roots = roots[np.isreal(roots)].real
        good = [r for r in roots if xs[ok][0] - x0 <= r <= xs[ok][-1] - x0
                and (np.polyval(d2, r) > 0 if kind == "min" else np.polyval(d2, r) < 0)]
        if good:
            r = min(good, key=abs)
            return float(x0 + r), float(np.polyval(p, r)), True
    return float(c[i]), float(F[i]), False


def _minimum_bins(c, F, split):
    """The lowest visited bin left and right of ``split`` (``None`` when a side has none)."""
    fin = np.isfinite(F)
    left = np.nonzero(fin & (c < split))[0]
    right = np.nonzero(fin & (c >= split))[0]
    if len(left) == 0 or len(right) == 0:
        return None
    return left[np.argmin(F[left])], right[np.argmin(F[right])]


def _extrema(c, F, split, hw, hws=None):
    """(xL, FL, xS, FS, xR, FR, all refined) of one profile; NaNs when a side has no finite bin.
    ``hws``: half width of the saddle's fitting window (default ``hw``)."""
    ends = _minimum_bins(c, F, split)
    if ends is None:
        return (np.nan,) * 6 + (False,)
    il, ir = ends
    fin = np.isfinite(F)
    mid = np.arange(il, ir + 1)
    mid = mid[fin[mid]]
    i_s = mid[np.argmax(F[mid])]
    xl, fl, okl = _refine(c, F, il, hw, "min")
    xr, fr, okr = _refine(c, F, ir, hw, "min")
    xs, fs, oks = _refine(c, F, i_s, hw if hws is None else hws, "max")
    return xl, fl, xs, fs, xr, fr, okl and okr and oks


@dataclass
class BarrierResult:
    """Minima, saddle and the free-energy differences of a profile (module notes, *Barrier*).

    Each quantity ``q`` has ``q`` (from the central profile), ``q_error`` (half the central 68 %
    range of the bootstrap replicas) in ``values``/``errors`` dicts and the replicas in ``samples``.
    Keys: ``x_left, F_left, x_saddle, F_saddle, x_right, F_right, barrier, barrier_left,
    barrier_right, barrier_mean, asymmetry``.  ``refined`` is False when a fitted extremum fell
    outside its fitting window (the bin value was used: widen ``half_width`` or refine the grid).
    ``outer_bins``: {"left": n, "right": n}, the visited bins of the central profile farther out than
    each minimum's bin; ``at_edge``: the sides where that is 0, i.e. F still falls toward the end of
    the visited range (or of the grid) and the minimum was not located: the barrier is then not the
    one between the two minima (widen the grid or visit its ends).
    """

    values: dict
    errors: dict
    samples: dict
    refined: bool
    failed_replicas: int
    outer_bins: dict = field(default_factory=dict)

    @property
    def at_edge(self) -> tuple:
        return tuple(side for side in ("left", "right") if self.outer_bins.get(side, 1) == 0)

    def __getitem__(self, key):
        return self.values[key]

    def summary(self) -> str:
        v, e = self.values, self.errors
        s = (f"minima at x = {v['x_left']:.4g} +- {e['x_left']:.2g} and {v['x_right']:.4g} +- "
             f"{e['x_right']:.2g}, saddle at {v['x_saddle']:.4g} +- {e['x_saddle']:.2g}; "
             f"barrier {v['barrier']:.4g} +- {e['barrier']:.2g} (mean of both minima: "
             f"{v['barrier_mean']:.4g} +- {e['barrier_mean']:.2g}), F(right) - F(left) = "
             f"{v['asymmetry']:.4g} +- {e['asymmetry']:.2g}")
        if not self.refined:
            s += " [an extremum fell outside its fitting window: bin values used]"
        if self.at_edge:
            s += (f" [minimum at the edge of the visited range on the {' and '.join(self.at_edge)} side: not "
                  "located, the barrier is not between two minima]")
        if self.failed_replicas:
            s += (f" [{self.failed_replicas} bootstrap replicas left a side of the split without a visited"
                  " bin: errors NaN, more statistics needed]")
        return s + f" ({_TOY})"


_BKEYS = ("x_left", "F_left", "x_saddle", "F_saddle", "x_right", "F_right")


def _derived(d):
    d["barrier_left"] = d["F_saddle"] - d["F_left"]
    d["barrier_right"] = d["F_saddle"] - d["F_right"]
    d["barrier"] = d["F_saddle"] - np.minimum(d["F_left"], d["F_right"])
    d["barrier_mean"] = d["F_saddle"] - 0.5 * (d["F_left"] + d["F_right"])
    d["asymmetry"] = d["F_right"] - d["F_left"]
    return d


def barrier(profile: Profile, split: float | None = None, half_width: int = 4,
            saddle_half_width: int | None = None) -> BarrierResult:
    """Locate the two minima (left/right of ``split``, default the grid centre) and the saddle.

    ``half_width`` bins on each side enter the cubic fit around each extremum;
    ``saddle_half_width`` (default ``half_width``) sets the saddle's window alone: on a fine grid
    the barrier top is flat over many bins, and a narrow window around the highest (noisiest) bin
    follows its noise upward, while the minima need a window no wider than the peak.
    """
    c = profile.centres
    split = 0.5 * (profile.edges[0] + profile.edges[-1]) if split is None else float(split)
    hw = int(half_width)
    hws = hw if saddle_half_width is None else int(saddle_half_width)
    if min(hw, hws) < 2:
        raise ValueError("half_width and saddle_half_width must be >= 2 (a cubic needs 5 bins)")
    central = _extrema(c, profile.F, split, hw, hws)
    if not np.isfinite(central[0]):
        raise ValueError(f"the profile has no visited bin on one side of split = {split:g}")
    vals = _derived(dict(zip(_BKEYS, (np.float64(v) for v in central[:6]))))
    reps = np.array([_extrema(c, r, split, hw, hws)[:6] for r in profile.replicas]).reshape(-1, 6)
    samp = _derived({k: reps[:, j] for j, k in enumerate(_BKEYS)})
    failed = int(np.count_nonzero(~np.all(np.isfinite(reps), axis=1)))
    errs = {}
    for k, s in samp.items():
        if len(s):
            lo, hi = np.quantile(s, _Q, method="inverted_cdf")   # NaN replicas make the error NaN
            errs[k] = float(0.5 * (hi - lo))
        else:
            errs[k] = float("nan")
    fin = np.isfinite(profile.F)
    il, ir = _minimum_bins(c, profile.F, split)
    outer = {"left": int(np.count_nonzero(fin[:il])), "right": int(np.count_nonzero(fin[ir + 1:]))}
    return BarrierResult({k: float(v) for k, v in vals.items()}, errs, samp, bool(central[6]), failed, outer)


# ----------------------------------------------------------------------------- interface tension


@dataclass
class TensionFit:
    """Fit of ``Delta F(L) = 2 sigma L^(d-1) [+ a] [+ c ln L]`` (Binder 1982).

    ``params``/``errors``: dict name -> value (``sigma``, and ``const``/``log`` when fitted);
    ``chi2``, ``dof``, ``p_value`` (NaN when dof = 0); ``covariance``.
    """

    params: dict
    errors: dict
    covariance: np.ndarray
    chi2: float
    dof: int
    p_value: float
    d: int
    terms: tuple

    @property
    def sigma(self) -> float:
        return self.params["sigma"]

    @property
    def sigma_error(self) -> float:
        return self.errors["sigma"]

    def model(self, L):
        L = np.asarray(L, dtype=float)
        out = 2.0 * self.params["sigma"] * L ** (self.d - 1)
        if "const" in self.terms:
            out = out + self.params["const"]
        if "log" in self.terms:
            out = out + self.params["log"] * np.log(L)
        return out

    def summary(self) -> str:
        extra = "".join(f", {k} = {self.params[k]:.4g} +- {self.errors[k]:.2g}" for k in self.terms)
        p = "-" if not np.isfinite(self.p_value) else f"{self.p_value:.3g}"
        return (f"sigma = {self.sigma:.5g} +- {self.sigma_error:.2g}{extra}; chi^2 = {self.chi2:.3g} "
                f"for {self.dof} dof (p = {p}) ({_TOY})")


def fit_interface_tension(L, dF, dF_error, d: int, terms: Sequence[str] = ()) -> TensionFit:
    """Fit ``Delta F = 2 sigma L^(d-1)`` plus the optional ``terms`` ('const', 'log') over ``L``.

    scipy.optimize.curve_fit with ``absolute_sigma=True`` (the errors are taken as true standard
    deviations); chi^2 with ``len(L) - n_params`` degrees of freedom and its upper-tail p-value.
    """
    from scipy import optimize, stats

    L = np.asarray(L, dtype=float).ravel()
    y = np.asarray(dF, dtype=float).ravel()
    e = np.asarray(dF_error, dtype=float).ravel()
    terms = tuple(terms)
    bad = [t for t in terms if t not in ("const", "log")]
    if bad:
        raise ValueError(f"unknown fit term {bad[0]!r} (use 'const' and/or 'log')")
    if not (len(L) == len(y) == len(e)):
        raise ValueError("L, dF and dF_error must have the same length")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(e)) and np.all(e > 0) and np.all(L > 0)):
        raise ValueError("L must be positive and dF, dF_error finite with dF_error > 0")
    npar = 1 + len(terms)
    if len(L) < npar:
        raise ValueError(f"{len(L)} volumes cannot fix {npar} parameters")
    d = int(d)

    def model(Lv, *p):
        out = 2.0 * p[0] * Lv ** (d - 1)
        j = 1
        for t in terms:
            out = out + (p[j] if t == "const" else p[j] * np.log(Lv))
            j += 1
        return out

    p0 = [float(np.median(y / (2 * L ** (d - 1))))] + [0.0] * len(terms)
    p, cov = optimize.curve_fit(model, L, y, p0=p0, sigma=e, absolute_sigma=True)
    chi2 = float(np.sum(((y - model(L, *p)) / e) ** 2))
    dof = len(L) - npar
    pval = float(stats.chi2.sf(chi2, dof)) if dof > 0 else float("nan")
    names = ("sigma",) + terms
    err = np.sqrt(np.diag(cov))
    return TensionFit(dict(zip(names, map(float, p))), dict(zip(names, map(float, err))), cov, chi2,
                      dof, pval, d, terms)


# ----------------------------------------------------------------------------- round trips


@dataclass
class RoundTrips:
    """Passages between two regions of ``x`` (module notes, *Round trips*); times in sweeps.

    ``half_trips``: first entries into the opposite region; ``round_trips`` = half_trips // 2;
    ``exposure``: sweeps from the first entry into either region to the end; ``rate`` (half trips
    per sweep) with the exact 68 % interval ``rate_low``/``rate_high``; ``time`` = 2 / rate (sweeps
    per round trip) with ``time_low``/``time_high``; without a passage ``time`` is NaN and
    ``time_lower_95`` (= 2 / the 95 % upper limit of the rate) is the honest statement.
    ``passages``: sweeps between consecutive half trips (completed ones).
    """

    half_trips: int
    round_trips: int
    exposure: float
    rate: float
    rate_low: float
    rate_high: float
    time: float
    time_low: float
    time_high: float
    time_lower_95: float
    passages: np.ndarray

    def summary(self) -> str:
        if self.half_trips == 0:
            return (f"no passage between the regions in {self.exposure:.0f} sweeps: round-trip time > "
                    f"{self.time_lower_95:.3g} sweeps (95 %) ({_TOY})")
        return (f"round-trip time {self.time:.4g} sweeps (68 % interval [{self.time_low:.3g}, "
                f"{self.time_high:.3g}]; {self.half_trips} half trips in {self.exposure:.0f} sweeps) "
                f"({_TOY})")


def round_trips(x, left: float, right: float, sweeps=None) -> RoundTrips:
    """Half trips of ``x`` between ``x <= left`` and ``x >= right`` (``left < right``)."""
    x = np.asarray(x, dtype=float).ravel()
    if not left < right:
        raise ValueError(f"left ({left}) must lie below right ({right})")
    t = np.arange(len(x), dtype=float) if sweeps is None else np.asarray(sweeps, dtype=float).ravel()
    if len(t) != len(x):
        raise ValueError("sweeps and x must have the same length")
    region = np.zeros(len(x), dtype=np.int8)
    region[x <= left] = -1
    region[x >= right] = 1
    seen = np.nonzero(region)[0]
    nan = float("nan")
    if len(seen) == 0:
        return RoundTrips(0, 0, 0.0, nan, nan, nan, nan, nan, nan, nan, np.zeros(0))
    r = region[seen]
    change = np.nonzero(r[1:] != r[:-1])[0] + 1        # first entries into the other region
    times = t[seen[change]]
    exposure = float(t[-1] - t[seen[0]])
    n = int(len(change))
    lo, hi = poisson_interval(n, exposure)
    up = poisson_upper_limit(n, exposure)
    rate = n / exposure if exposure > 0 else nan
    tm = 2.0 / rate if n and exposure > 0 else nan
    return RoundTrips(n, n // 2, exposure, float(rate), lo, hi, float(tm),
                      2.0 / hi if hi > 0 else nan, 2.0 / lo if lo > 0 else float("inf"),
                      2.0 / up if up > 0 else nan, np.diff(times))


# ----------------------------------------------------------------------------- figure


def plot_profiles(profiles: dict, path, *, title: str = "free-energy profile", xlabel: str = r"Im $\omega_h$",
                  shift_minimum: bool = True):
    """Profiles ``{label: Profile}`` (e.g. one per L) on one plot with error bands; saves ``path``.

    Each profile is shifted so that its lowest visited bin is 0 (``shift_minimum``).  The figure is
    written through a temporary name and renamed (never a truncated file).  Returns the path.
    """
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    from pathlib import Path

    from sigmasim.storage import atomic_output

    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    for label, p in profiles.items():
        F = p.F - (np.nanmin(p.F) if shift_minimum else 0.0)
        line, = ax.plot(p.centres, F, label=str(label))
        ax.fill_between(p.centres, F - p.error, F + p.error, color=line.get_color(), alpha=0.25, lw=0)
        if len(p.unvisited):
            ax.plot(p.centres[p.unvisited], np.zeros(len(p.unvisited)), "x", color=line.get_color(), ms=4)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(r"$F = -\ln P$ (shifted to 0 at the minimum)")
    ax.legend(fontsize=8)
    fig.suptitle(f"{title}\n{_TOY}; bands: bootstrap 68 %, x: unvisited bins", fontsize=9)
    fig.tight_layout()
    path = Path(path)
    ext = path.suffix.lstrip(".") or "png"
    atomic_output(path, lambda tmp: fig.savefig(tmp, format=ext, dpi=120), what="figure")
    plt.close(fig)
    return path
