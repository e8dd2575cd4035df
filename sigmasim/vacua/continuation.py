r"""Following the tree-level branches in theta: first-order, spinodal and CP points.

:func:`scan_theta` finds all local minima at the first grid point, follows each
one by Newton continuation from its predecessor (so a branch survives level
crossings and ends only where it stops being a local minimum -- its spinodal
point), searches for new minima at every grid point (births, followed backwards
to their spinodal), and refines first-order points with ``brentq`` and
spinodal points by bisection on existence.

Branch numbers along the scan are those of :mod:`sigmasim.vacua.branches`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from sigmasim.vacua.branches import branch_label
from sigmasim.vacua.minima import (_KEY_TOL, _TOL_HESS_REL, _blocks, _eff_phases, _make_vacuum,
                                   _newton, _same_vacuum, _search)
from sigmasim.vacua.potential import (ChiralPotential, _egh, _phases_to_x, _placement_fraction, _spectrum,
                                      _wrap, _x_to_phases, diagonal_potential, make_potential)

__all__ = ["FirstOrderPoint", "SpinodalPoint", "CPPair", "BranchScan", "scan_theta", "plot_branches"]

# Newton iterations allowed when continuing a branch: from a nearby predicted
# point a few iterations suffice, and failures (past a spinodal) should be cheap.
_CONT_MAXIT = 25



# ----------------------------------------------------------------------------
# branch following in theta
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class FirstOrderPoint:
    """A point where the global minimum switches branch.

    Attributes
    ----------
    theta : float
    branch_from, branch_to : int
        Global branch just below / above ``theta``.
    energy : float
        Common energy at ``theta``.
    method : str
        ``'brentq'`` (root of ``E_a - E_b``, on the part of the grid interval
        where both branches exist), ``'grid'`` (degenerate at a grid point),
        ``'cp'`` (a degenerate global CP pair at a CP-invariant grid point,
        also at an end of the grid) or ``'spinodal'`` (switch limited by a
        branch end).
    """

    theta: float
    branch_from: int
    branch_to: int
    energy: float
    method: str


@dataclass(frozen=True)
class SpinodalPoint:
    """End point of a branch (where it stops being a local minimum).

    Attributes
    ----------
    theta : float
    branch : int
    kind : str
        ``'end'`` (branch ceases with increasing theta), ``'start'`` (branch
        appears with increasing theta) or ``'merge'`` (it coincided with an
        older branch, located to grid precision).
    energy : float
    """

    theta: float
    branch: int
    kind: str
    energy: float


@dataclass(frozen=True)
class CPPair:
    """Two branches that are CP images of each other at a CP-invariant theta.

    Attributes
    ----------
    theta : float
    branch_a, branch_b : int
        ``branch_a == branch_b`` means a CP-invariant vacuum.
    """

    theta: float
    branch_a: int
    branch_b: int


@dataclass
class BranchScan:
    """Branches of local minima followed over a theta grid.

    Attributes
    ----------
    potential : ChiralPotential
        Parameters at ``thetas[0]``.
    placement : float
        Fraction of theta carried by the mass phase.
    thetas : ndarray, shape (nt,)
    energies : ndarray, shape (nb, nt)
        ``E_k(theta)``, NaN where branch ``k`` is not a local minimum.
    phases : ndarray, shape (nb, nt, Nf)
    omega, omega_rot, det : complex ndarray, shape (nb, nt)
        ``(1/Nf) Tr U``, ``e^{i theta_m} Omega`` and ``det U``.
    lambda_min : ndarray, shape (nb, nt)
        Smallest torus-block Hessian eigenvalue.
    n_flat : ndarray, shape (nb, nt)
        Number of flat directions of the full Hessian (-1 where absent).
    global_energy : ndarray, shape (nt,)
    global_branch : ndarray, shape (nt,)
        Index of the lowest branch (-1 if none).
    n_minima, n_metastable : ndarray, shape (nt,)
        Number of local minima and of those other than one global minimum.
    first_order : list of FirstOrderPoint
        Switches of the global branch between neighbouring grid points (one
        switch per grid interval is resolved), and every CP-invariant grid
        point whose global minimum is a degenerate CP pair (method ``'cp'``,
        also at the first or last grid point).
    spinodals : list of SpinodalPoint
    cp_pairs : list of CPPair
        At grid points with ``2 theta = 0 mod 2 pi``.
    """

    potential: ChiralPotential
    placement: float
    thetas: np.ndarray
    energies: np.ndarray
    phases: np.ndarray
    omega: np.ndarray
    omega_rot: np.ndarray
    det: np.ndarray
    lambda_min: np.ndarray
    n_flat: np.ndarray
    global_energy: np.ndarray
    global_branch: np.ndarray
    n_minima: np.ndarray
    n_metastable: np.ndarray
    first_order: list = field(default_factory=list)
    spinodals: list = field(default_factory=list)
    cp_pairs: list = field(default_factory=list)

    @property
    def n_branches(self) -> int:
        """Number of branches."""
        return self.energies.shape[0]

    @property
    def labels(self) -> np.ndarray:
        """Branch number (:func:`branch_label`) of every followed branch at every grid point,
        int array (nb, nt), ``-999`` where the branch is absent.  The rows of the scan are
        followed minima; their number can change along a row where no barrier separates two
        branches (e.g. below the first-order threshold in kappa)."""
        nf = self.potential.nf
        lab = branch_label(np.where(np.isnan(self.omega_rot), 1.0, self.omega_rot),
                           self.thetas[None, :], nf)
        return np.where(np.isnan(self.energies), -999, lab)

    @property
    def global_label(self) -> np.ndarray:
        """Branch number of the global minimum at every grid point (int (nt,), -999 if none)."""
        lab = self.labels
        gb = self.global_branch
        return np.where(gb >= 0, lab[np.maximum(gb, 0), np.arange(len(gb))], -999)

    def row_labels(self, b: int) -> str:
        """The branch numbers that row ``b`` takes along theta, e.g. ``'0'`` or ``'0 -> -1'``."""
        seq = [int(v) for v in self.labels[b] if v != -999]
        out = [seq[0]] if seq else []
        for v in seq[1:]:
            if v != out[-1]:
                out.append(v)
        return " -> ".join(str(v) for v in out) if out else "-"


class _Tracker:
    """Internal state of a scan (keeps the unwrapped free coordinates of each branch)."""

    def __init__(self, template, placement, thetas, jump_tol):
        self.template = template
        self.placement = placement
        self.thetas = thetas
        self.jump_tol = jump_tol
        self.pots = [template.with_theta(t, placement) for t in thetas]
        self.x = []  # per branch: (nt, dim) with NaN
        self.alive = []
        self.spinodals = []

    def pot(self, theta):
        return self.template.with_theta(theta, self.placement)

    def _accept(self, xn, xp, conv, pot, require_min=True):
        phn, php = _x_to_phases(xn, pot), _x_to_phases(xp, pot)
        dist = np.abs(_wrap(phn - php)).max(-1) if phn.shape[-1] else np.zeros(len(xn))
        ok = conv & (dist < self.jump_tol)
        if not require_min:
            return ok
        de, oe = _spectrum(phn, pot)
        tol = _TOL_HESS_REL * pot.scale
        dmin = de[:, 0] if de.shape[1] else np.full(len(xn), np.inf)
        omin = oe.min(-1) if oe.shape[1] else np.full(len(xn), np.inf)
        return ok & (dmin >= -tol) & (omin >= -tol)

    def _predict(self, xp, t0, t1):
        """Euler predictor dx = -H^{-1} (d g / d theta) dtheta (capped)."""
        if xp.shape[-1] == 0:
            return xp
        eps = 1e-6
        pot0 = self.pot(t0)
        _, _, H = _egh(xp, pot0)
        dg = (_egh(xp, self.pot(t0 + eps))[1] - _egh(xp, self.pot(t0 - eps))[1]) / (2 * eps)
        w, V = np.linalg.eigh(H)
        delta = 1e-8 * pot0.scale
        w_eff = np.where(np.abs(w) < delta, delta, w)
        dx = -np.einsum("bij,bj->bi", V, np.einsum("bij,bi->bj", V, dg) / w_eff) * (t1 - t0)
        nrm = np.linalg.norm(dx, axis=-1)
        cap = 0.25 * self.jump_tol
        dx *= np.minimum(1.0, cap / np.maximum(nrm, 1e-300))[:, None]
        return xp + dx

    def step(self, xp, t0, t1, require_min=True):
        """Continue stationary points xp (B, d) from t0 to t1; returns (x, ok).

        Predictor-corrector: Newton from the Euler-predicted point, and if that
        fails from the old point; near a spinodal the Newton basin shrinks with
        the smallest Hessian eigenvalue, which the predictor compensates.
        """
        pot = self.pot(t1)
        xs, conv = _newton(self._predict(xp, t0, t1), pot, saddle_free=False, max_step=0.25,
                            maxit=_CONT_MAXIT)
        ok = self._accept(xs, xp, conv, pot, require_min) & self._returns(xs, xp, t0, conv)
        if not ok.all():
            xn, conv = _newton(xp, pot, saddle_free=False, max_step=0.25,
                            maxit=_CONT_MAXIT)
            okn = (self._accept(xn, xp, conv, pot, require_min)
                   & self._returns(xn, xp, t0, conv) & ~ok)
            xs[okn] = xn[okn]
            ok = ok | okn
        return xs, ok

    def _returns(self, xn, xp, t0, conv):
        """True where Newton at t0 started from the continued point xn comes back to xp.

        When a branch ends inside the step, Newton at t1 can land on a different
        minimum (typically the CP mirror of the dying one near a first-order
        point, which lies closer than ``jump_tol``); that minimum also exists at
        t0, so the way back finds it and not xp.  A genuine continuation step
        is reversible.
        """
        ok = conv.copy()
        if xn.shape[-1] == 0 or not ok.any():
            return ok
        pot0 = self.pot(t0)
        xb, convb = _newton(xn[ok], pot0, saddle_free=False, max_step=0.25, maxit=_CONT_MAXIT)
        back = np.abs(_wrap(_x_to_phases(xb, pot0) - _x_to_phases(xp[ok], pot0))).max(-1)
        fwd = np.abs(_wrap(_x_to_phases(xn[ok], pot0) - _x_to_phases(xp[ok], pot0))).max(-1)
        ok[ok] = convb & (back <= 1e-3 * fwd + _KEY_TOL)
        return ok

    def cp_inside(self, t0, t1):
        """CP-invariant angles (theta = 0 mod pi) strictly between t0 and t1, in path order.

        A continuation step never jumps over one of them: at a first-order point there
        the CP mirror of the dying minimum exists too, and only a step that stops at the
        CP-invariant angle lets the reversibility test (:meth:`_returns`) see it.
        """
        lo, hi = min(t0, t1), max(t0, t1)
        # physical theta = t (the placement only splits it between the phases)
        n0, n1 = math.floor(lo / np.pi) + 1, math.ceil(hi / np.pi) - 1
        out = [n * np.pi for n in range(n0, n1 + 1)
               if lo + 1e-12 < n * np.pi < hi - 1e-12]
        return out if t1 > t0 else out[::-1]

    def continue_one(self, x0, t0, t1, depth=6, require_min=True):
        """Continue one branch from t0 to t1, halving the step when it fails."""
        cps = self.cp_inside(t0, t1)
        if cps:
            x, t = x0, t0
            for tc in cps + [t1]:
                x, ok = self.continue_one(x, t, tc, depth, require_min)
                if not ok:
                    return x0, False
                t = tc
            return x, True
        xn, ok = self.step(x0[None], t0, t1, require_min)
        if ok[0]:
            return xn[0], True
        if depth == 0:
            return x0, False
        tm = 0.5 * (t0 + t1)
        xm, okm = self.continue_one(x0, t0, tm, depth - 1, require_min)
        if not okm:
            return x0, False
        return self.continue_one(xm, tm, t1, depth - 1, require_min)

    def refine_end(self, x_good, t_good, t_bad):
        """Bisection on existence between a good and a bad theta; returns (theta, x)."""
        state = {"x": x_good.copy(), "t": t_good}

        def exists(t):
            if t == state["t"]:
                return 1.0
            xn, ok = self.continue_one(state["x"], state["t"], t, depth=1)
            if ok:
                state["x"], state["t"] = xn, t
                return 1.0
            return -1.0

        if exists(t_bad) > 0:
            # reachable with finer steps after all: the end is at (or beyond) t_bad
            return state["t"], state["x"]
        # xtol well below any grid spacing; existence is monotone along the bisection
        optimize.bisect(exists, t_good, t_bad, xtol=1e-11, maxiter=200)
        return state["t"], state["x"]


def _grid_search(tr, i, n_starts, seed):
    # births are rare and every followed branch is already known, so the
    # per-grid-point search can use fewer random starts than the first one
    n = n_starts if n_starts is not None else 16 + 4 * tr.template.nf
    return _search(tr.pots[i], n, seed + i)


def scan_theta(
    h,
    kappa=0.0,
    thetas=None,
    placement="mass",
    *,
    nf=None,
    group="U",
    large_kappa=False,
    n_theta=401,
    n_starts=None,
    seed=0,
    search_every=1,
    jump_tol=0.5,
) -> BranchScan:
    """Follow all branches of local minima in theta (default grid over [0, 4 pi]).

    Parameters
    ----------
    h : float or sequence of float
        Masses (scalar needs ``nf``).
    kappa : float
        Anomaly coupling.
    thetas : array_like, optional
        Increasing grid; default ``linspace(0, 4 pi, n_theta)``.
    placement : {'mass', 'anomaly', 'split'} or float
        How theta is split between mass and anomaly phases.
    nf : int, optional
        Number of flavours for scalar ``h``.
    group : {'U', 'SU'}
        Target group (for SU only ``Nf theta_m`` matters, use ``'mass'``).
    large_kappa : bool
        Determinant-constrained limit.
    n_theta : int
        Grid size if ``thetas`` is not given.
    n_starts : int, optional
        Random starts of the search at every grid point (default
        ``16 + 4 Nf``; the first grid point uses ``24 + 12 Nf``).
    seed : int
        Seed.
    search_every : int
        Search for new branches every this many grid points (1 = everywhere).
    jump_tol : float
        Largest phase change (rad) accepted between successive grid points;
        larger moves count as the branch ending.

    Returns
    -------
    BranchScan
    """
    thetas = (np.linspace(0.0, 4 * np.pi, n_theta) if thetas is None
              else np.asarray(thetas, dtype=float))
    if thetas.ndim != 1 or len(thetas) < 2 or np.any(np.diff(thetas) <= 0):
        raise ValueError("thetas must be an increasing 1-d grid with >= 2 points")
    x_frac = _placement_fraction(placement)
    template = make_potential(h, kappa, thetas[0], x_frac, nf=nf, group=group,
                              large_kappa=large_kappa)
    nt, d, nf_ = len(thetas), template.dim, template.nf
    tr = _Tracker(template, x_frac, thetas, jump_tol)
    blocks = _blocks(template)

    def new_branch(i, phi):
        arr = np.full((nt, d), np.nan)
        arr[i] = _phases_to_x(phi[None], tr.pots[i])[0]
        tr.x.append(arr)
        tr.alive.append(True)
        return len(tr.x) - 1

    def keys_at(i, ks):
        return [(_eff_phases(_x_to_phases(tr.x[k][i][None], tr.pots[i])[0], tr.pots[i]), k)
                for k in ks]

    def energy_of(pot, xk):
        return float(_egh(xk[None], pot)[0][0])

    # initial branches, ordered by energy
    init = _search(tr.pots[0], None if n_starts is None else max(n_starts, 24 + 12 * nf_),
                   seed)
    init.sort(key=lambda p: float(diagonal_potential(p, tr.pots[0])))
    for p in init:
        new_branch(0, p)

    for i in range(1, nt):
        t0, t1 = thetas[i - 1], thetas[i]
        live = [k for k in range(len(tr.x)) if tr.alive[k]]
        if live:
            xp = np.array([tr.x[k][i - 1] for k in live])
            if tr.cp_inside(t0, t1):
                # stop at the CP-invariant angle inside the interval (continue_one does)
                xn, ok = xp.copy(), np.zeros(len(live), bool)
            else:
                xn, ok = tr.step(xp, t0, t1)
            for j, k in enumerate(live):
                if ok[j]:
                    tr.x[k][i] = xn[j]
                    continue
                xs, oks = tr.continue_one(xp[j], t0, t1)
                if oks:
                    tr.x[k][i] = xs
                    continue
                ts, xsp = tr.refine_end(xp[j], t0, t1)
                tr.alive[k] = False
                tr.spinodals.append(SpinodalPoint(ts, k, "end", energy_of(tr.pot(ts), xsp)))
        # two followed branches that became the same vacuum (pitchfork): keep the older
        live = [k for k in range(len(tr.x)) if tr.alive[k]]
        keyed = keys_at(i, live)
        for a in range(len(keyed)):
            for b in range(a):
                ka, kb = keyed[a][1], keyed[b][1]
                if tr.alive[ka] and tr.alive[kb] and _same_vacuum(keyed[a][0], keyed[b][0],
                                                                  blocks):
                    tr.alive[ka] = False
                    tr.x[ka][i] = np.nan
                    tr.spinodals.append(SpinodalPoint(
                        t1, ka, "merge", float(_egh(tr.x[kb][i][None], tr.pots[i])[0][0])))
        # births
        if i % search_every == 0 or i == nt - 1:
            live = [k for k in range(len(tr.x)) if tr.alive[k]]
            keyed = keys_at(i, live)
            for phi in _grid_search(tr, i, n_starts, seed):
                key = _eff_phases(phi, tr.pots[i])
                if any(_same_vacuum(key, kk, blocks) for kk, _ in keyed):
                    continue
                k = new_branch(i, phi)
                keyed.append((key, k))
                # follow the newcomer backwards to where it starts
                for j in range(i - 1, -1, -1):
                    xs, oks = tr.continue_one(tr.x[k][j + 1], thetas[j + 1], thetas[j])
                    if not oks:
                        ts, xsp = tr.refine_end(tr.x[k][j + 1], thetas[j + 1], thetas[j])
                        tr.spinodals.append(SpinodalPoint(ts, k, "start",
                                                          energy_of(tr.pot(ts), xsp)))
                        break
                    if d and _clashes(tr, k, j, xs, blocks):
                        # ran into a branch that is already known there (it had
                        # been lost by forward tracking); stop without a spinodal
                        break
                    tr.x[k][j] = xs

    return _assemble(tr, template, x_frac)


def _clashes(tr, k, j, xs, blocks):
    """True if the point xs of branch k at grid index j is another branch's vacuum."""
    pot = tr.pots[j]
    key = _eff_phases(_x_to_phases(xs[None], pot)[0], pot)
    for m in range(len(tr.x)):
        if m == k or np.isnan(tr.x[m][j][0]):
            continue
        other = _eff_phases(_x_to_phases(tr.x[m][j][None], pot)[0], pot)
        if _same_vacuum(key, other, blocks):
            return True
    return False


def _assemble(tr, template, x_frac):
    thetas = tr.thetas
    nt, nb, n = len(thetas), len(tr.x), template.nf
    E = np.full((nb, nt), np.nan)
    PH = np.full((nb, nt, n), np.nan)
    OM = np.full((nb, nt), np.nan + 0j)
    OMR = np.full((nb, nt), np.nan + 0j)
    DET = np.full((nb, nt), np.nan + 0j)
    LAM = np.full((nb, nt), np.nan)
    NFL = np.full((nb, nt), -1, dtype=int)
    d = template.dim
    for k in range(nb):
        for i in range(nt):
            xk = tr.x[k][i]
            if d and np.isnan(xk[0]):
                continue
            if d == 0 and k > 0:
                continue
            v = _make_vacuum(_x_to_phases(xk[None], tr.pots[i])[0], tr.pots[i])
            E[k, i], PH[k, i], OM[k, i], OMR[k, i], DET[k, i] = (
                v.energy, v.phases, v.omega, v.omega_rot, v.det)
            LAM[k, i] = v.hessian_diag[0] if v.hessian_diag.size else np.inf
            NFL[k, i] = v.n_flat
    exists = ~np.isnan(E)
    n_min = exists.sum(0)
    gE = np.where(n_min > 0, np.nanmin(np.where(exists, E, np.inf), axis=0), np.nan)
    gB = np.where(n_min > 0, np.argmin(np.where(exists, E, np.inf), axis=0), -1)
    res = BranchScan(
        potential=template, placement=x_frac, thetas=thetas, energies=E, phases=PH,
        omega=OM, omega_rot=OMR, det=DET, lambda_min=LAM, n_flat=NFL,
        global_energy=gE, global_branch=gB, n_minima=n_min,
        n_metastable=np.maximum(n_min - 1, 0), spinodals=sorted(tr.spinodals,
                                                                key=lambda s: s.theta),
    )
    res.cp_pairs = _cp_pairs(tr, res)
    res.first_order = _first_order_points(tr, res)
    return res


def _first_order_points(tr, res):
    out = []
    thetas, gB, E = res.thetas, res.global_branch, res.energies
    scale = tr.template.scale
    tol = 1e-9 * scale

    def cont_energy(k, i, t):
        # continue branch k from grid point i as a stationary point (it may be a
        # saddle past its spinodal; only the energy difference matters here)
        xn, ok = tr.continue_one(tr.x[k][i], thetas[i], t, depth=4, require_min=False)
        if not ok:
            return np.nan
        return float(_egh(xn[None], tr.pot(t))[0][0])

    for i in range(1, len(thetas)):
        a, b = gB[i - 1], gB[i]
        if a < 0 or b < 0 or a == b:
            continue
        t0, t1 = thetas[i - 1], thetas[i]

        def f(t):
            return cont_energy(a, i - 1, t) - cont_energy(b, i, t)

        f0 = (E[a, i - 1] - cont_energy(b, i, t0))
        f1 = (cont_energy(a, i - 1, t1) - E[b, i])
        if abs(f0) <= tol:
            ts, method = t0, "grid"
            e_at = E[a, i - 1]
        elif abs(f1) <= tol:
            ts, method = t1, "grid"
            e_at = E[b, i]
        elif np.isfinite(f0) and np.isfinite(f1) and f0 * f1 < 0:
            ts = optimize.brentq(f, t0, t1, xtol=1e-13, rtol=4 * np.finfo(float).eps)
            method = "brentq"
            e_at = cont_energy(a, i - 1, ts)
        elif (root := _root_on_overlap(f, a, b, t0, t1, res.spinodals)) is not None:
            # a ends and/or b starts inside the interval (no stationary point to
            # continue past a fold): the crossing lies where both exist
            ts, method = root, "brentq"
            e_at = cont_energy(a, i - 1, ts)
        else:
            # the switch is limited by a branch end (no common interval of existence)
            ends = [s.theta for s in res.spinodals
                    if t0 <= s.theta <= t1 and s.branch in (a, b)]
            ts = float(np.mean(ends)) if ends else 0.5 * (t0 + t1)
            method = "spinodal"
            e_at = np.nanmin([E[a, i - 1], E[b, i]])
        out.append(FirstOrderPoint(float(ts), int(a), int(b), float(e_at), method))
    # a degenerate global CP pair at a grid point is a first-order point even where
    # the argmin of the two equal energies did not change across it (or at an end
    # point of the grid)
    for c in res.cp_pairs:
        a, b = c.branch_a, c.branch_b
        if a == b:
            continue
        i = int(np.argmin(np.abs(thetas - c.theta)))
        ea, eb, eg = E[a, i], E[b, i], res.global_energy[i]
        if max(abs(ea - eg), abs(eb - eg)) > tol:
            continue
        if any(abs(p.theta - c.theta) <= 1e-9 for p in out):
            continue
        out.append(FirstOrderPoint(float(c.theta), int(a), int(b), float(eg), "cp"))
    out.sort(key=lambda p: p.theta)
    return out


def _root_on_overlap(f, a, b, t0, t1, spinodals):
    """Root of f = E_a - E_b on the part of [t0, t1] where both branches exist, or None."""
    ends = [s.theta for s in spinodals if s.branch == a and s.kind == "end" and t0 <= s.theta <= t1]
    starts = [s.theta for s in spinodals
              if s.branch == b and s.kind == "start" and t0 <= s.theta <= t1]
    lo = max([t0] + starts)
    hi = min([t1] + ends)
    # the spinodals are bisected to 1e-11: stay just inside the common interval
    pad = 1e-10
    lo, hi = lo + (pad if lo > t0 else 0.0), hi - (pad if hi < t1 else 0.0)
    if not lo < hi:
        return None
    flo, fhi = f(lo), f(hi)
    if not (np.isfinite(flo) and np.isfinite(fhi)) or flo * fhi > 0:
        return None
    if flo == 0.0:
        return float(lo)
    if fhi == 0.0:
        return float(hi)
    return float(optimize.brentq(f, lo, hi, xtol=1e-13, rtol=4 * np.finfo(float).eps))


def _cp_pairs(tr, res):
    """CP pairs at grid points where theta and -theta are equivalent (2 theta = 0 mod 2 pi)."""
    out = []
    blocks = _blocks(tr.template)
    for i, t in enumerate(res.thetas):
        pot = tr.pots[i]
        if abs(_wrap(2.0 * pot.theta)) > 1e-9:
            continue
        ks = [k for k in range(res.n_branches) if not np.isnan(res.energies[k, i])]
        keys = {k: _eff_phases(res.phases[k, i], pot) for k in ks}
        for a in ks:
            # CP: U -> e^{-2 i theta_m} U^*, i.e. effective phases -> minus themselves
            img = _wrap(-keys[a])
            for b in ks:
                if b >= a and _same_vacuum(img, keys[b], blocks, tol=1e-5):
                    out.append(CPPair(float(t), a, b))
    return out


def plot_branches(result: BranchScan, ax=None):
    """Plot ``E_k(theta)`` of every branch with global minimum and transitions marked.

    Parameters
    ----------
    result : BranchScan
    ax : matplotlib.axes.Axes, optional
        Axes to draw into (a new figure otherwise).

    Returns
    -------
    matplotlib.axes.Axes
    """
    import matplotlib.pyplot as plt  # optional dependency: imported only when plotting

    if ax is None:
        _, ax = plt.subplots(figsize=(8, 5))
    th = result.thetas
    for k in range(result.n_branches):
        ax.plot(th, result.energies[k], lw=1.0, label=f"k = {result.row_labels(k)}")
    ax.plot(th, result.global_energy, color="k", lw=3.0, alpha=0.6, label="global minimum")
    for j, p in enumerate(result.first_order):
        ax.axvline(p.theta, color="grey", ls="--", lw=0.8,
                   label="first-order point" if j == 0 else None)
        ax.plot([p.theta], [p.energy], "kD", ms=5)
    if result.spinodals:
        ax.plot([s.theta for s in result.spinodals], [s.energy for s in result.spinodals],
                "o", mfc="none", mec="r", ms=7, label="spinodal point")
    ax.set_xlabel("theta")
    ax.set_ylabel("E / site (tree level)")
    ax.set_xlim(th[0], th[-1])
    ticks = np.arange(math.ceil(th[0] / np.pi), math.floor(th[-1] / np.pi) + 1) * np.pi
    ax.set_xticks(ticks)
    ax.set_xticklabels([{0: "0", 1: "pi"}.get(int(round(t / np.pi)), f"{int(round(t / np.pi))}pi")
                        for t in ticks])
    ax.set_title(f"{result.potential.describe()}, placement x={result.placement:g}\n"
                 "tree level, research toy", fontsize=10)
    ax.legend(fontsize=8, loc="best")
    return ax
