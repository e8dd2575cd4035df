"""Local updates of the biased target exp(-S - W(x)) (numba, serial).

``x = X / V`` is a collective variable that is a sum of per-site terms,
``X = sum_s x_s(U_s)``:

mode 0 (``im_omega_h``)
    ``x_s = Im(e^{i theta_m} Tr U_s) / nf``, so ``x = Im omega_h`` of :data:`sigmasim.models.chiral.SERIES`;
mode 1 (``im_det``)
    ``x_s = Im(e^{i theta_a} det U_s)``, the anomaly term's phase direction;
mode 2 (``arg_omega_h``)
    not a sum: ``x = arg Z`` with ``Z = sum_s e^{i theta_m} Tr U_s / nf`` (the phase of omega_h,
    the branch angle), in (-pi, pi].  The kernels keep the complex running sum Z for every mode
    (``x = Im Z / V`` for modes 0 and 1), so the weight change of a move is exact here too.

``W`` is tabulated at the centres of ``nb`` bins of width ``dx`` starting at
``lo`` and interpolated linearly between them (constant in the outer half
bins); outside ``[lo, lo + nb dx]`` it continues linearly with slope ``wall``
per bin width (a steep but finite wall, so a chain started outside walks in).

Every move is a Metropolis step of the full target: a proposal ``U_s -> U_s'``
that is symmetric with respect to the Haar measure is accepted with
``min(1, exp(-dS - dW))``, where ``dW = W((X + dx_s) / V) - W(X / V)`` uses the
running sum ``X`` updated after every accepted move.  Because W couples all
sites, the sites are visited one after the other (single thread); they are
visited in the order of the plain kernels (colour 0, then colour 1), with the
plain kernels' keys and counters, so that with ``W = 0`` the chain is bit for
bit the one of :func:`sigmasim.kernels.general.metropolis` /
:func:`~sigmasim.kernels.general.overrelax` (tested).

Moves
-----
Metropolis
    ``U' = R U`` with R from the symmetric proposal table of the step
    (:func:`sigmasim.kernels.tables.rotation_table`), ``nhits`` hits per visit.
Overrelaxation
    each SU(2)-subgroup reflection of :func:`~sigmasim.kernels.general.overrelax`
    is an involution that keeps S; as a proposal it is accepted with
    ``min(1, exp(-dW))`` (exact: deterministic involutive proposal that
    preserves the Haar measure; common practice, no source).  The phase
    reflection (also an involution) is accepted with ``min(1, exp(-dS_det - dW))``.

Global phase move (:func:`global_phase_moves`, U(nf) only)
    ``U_x -> e^{i alpha} U_x`` on every site with alpha uniform in ``[-a, a]`` (a symmetric proposal
    on a one-parameter orbit of the global U(1); the product Haar measure is invariant).  The
    kinetic term is invariant, so with ``M = sum_x Tr(H U_x)`` and ``D = sum_x det U_x``
    ``dS = -Re((e^{i alpha} - 1) M) - 2 kappa Re(e^{i theta_a} (e^{i nf alpha} - 1) D)``, and
    ``Z -> e^{i alpha} Z`` (modes 0, 2) or ``e^{i nf alpha} Z`` (mode 1); so given the sums every
    hit costs O(1) and is accepted with ``min(1, exp(-dS - dW))``; the accepted angles add up and the
    field is rotated once (one pass) at the end.  In mode 2 the move shifts arg omega_h by alpha
    exactly.  SU(nf) has no such phase (det U = 1): the callers refuse it.

The variable X is recomputed from the field at the start of every colour
update, so the chain depends only on the field and the step counter (resumes
continue exactly), and rounding cannot accumulate.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sigmasim.kernels.general import _matmul, _retrace, _rotate_rows, _su2_direction, flavour_order, local_field
from sigmasim.kernels.general import reflection, rotation_action_change
from sigmasim.kernels.group import det, load, store
from sigmasim.kernels.tables import phase_table, rotation_table, step_key_nb
from sigmasim.rng import SITE_STRIDE, bits, uniform

__all__ = ["site_variable", "variable_sum", "collective", "weight_value", "biased_sweeps", "global_phase_moves",
           "MODES"]

MODES = {"im_omega_h": 0, "im_det": 1, "arg_omega_h": 2}
_ONE = np.uint64(1)
SALT_TABLE = 0x5EED  # the Metropolis table salt of sigmasim.updates (same tables as the plain chain)
SALT_GLOBAL = 0x6E0BA1  # the global phase move's draws (a stream of its own within a step)


@njit(cache=True, inline="always")
def site_variable(U, nf, mode, cvar, work):
    """z_s of the matrix ``U``: ``cvar Tr U / nf`` (modes 0, 2) or ``cvar det U`` (mode 1), complex;
    ``cvar`` = e^{i theta_m} or e^{i theta_a}."""
    if mode != 1:
        t = complex(0.0, 0.0)
        for a in range(nf):
            t += U[a, a]
        return cvar * t / nf
    return cvar * det(U, nf, work)


@njit(cache=True, inline="always")
def collective(zsum, vol, mode):
    """x from the complex sum Z = sum_s z_s: Im Z / V (modes 0, 1) or arg Z in (-pi, pi] (mode 2)."""
    if mode == 2:
        return np.arctan2(zsum.imag, zsum.real)
    return zsum.imag / vol


@njit(cache=True)
def variable_sum(re, im, nf, mode, cvar):
    """Z = sum_s z_s over all sites, in site order (complex128)."""
    v = re.shape[1]
    U = np.empty((nf, nf), dtype=np.complex128)
    work = np.empty((nf, nf), dtype=np.complex128)
    xs = complex(0.0, 0.0)
    for s in range(v):
        load(re, im, s, nf, U)
        xs += site_variable(U, nf, mode, cvar, work)
    return xs


@njit(cache=True, inline="always")
def weight_value(x, lo, dx, wtab, wall):
    """W(x): linear between bin centres, constant in the outer half bins, slope ``wall``/bin outside."""
    nb = wtab.shape[0]
    hi = lo + nb * dx
    if x < lo:
        return wtab[0] + wall * (lo - x) / dx
    if x > hi:
        return wtab[nb - 1] + wall * (x - hi) / dx
    t = (x - lo) / dx - 0.5
    if t <= 0.0:
        return wtab[0]
    if t >= nb - 1:
        return wtab[nb - 1]
    i = int(t)
    f = t - i
    return wtab[i] + f * (wtab[i + 1] - wtab[i])


@njit(cache=True, inline="always")
def _accept(d, u):
    return d <= 0.0 or u < np.exp(-d)


@njit(cache=True, inline="always")
def _rotated_variable(R, U, dnew, nf, mode, cvar):
    """z_s of R U without forming it: Tr(R U) = sum R[a, c] U[c, a]; det(R U) = ``dnew``."""
    if mode != 1:
        t = complex(0.0, 0.0)
        for a in range(nf):
            for c in range(nf):
                t += R[a, c] * U[c, a]
        return cvar * t / nf
    return cvar * dnew


@njit(cache=True)
def _metropolis_colour(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta, table, tdet, nhits, key,
                       mode, cvar, vol, xsum, lo, dx, wtab, wall, scratch):
    U, A, W, T, work = scratch[0], scratch[1], scratch[2], scratch[3], scratch[4]
    nt = table.shape[0]
    na = 0
    wcur = weight_value(collective(xsum, vol, mode), lo, dx, wtab, wall)
    for s in range(start, stop):
        load(re, im, s, nf, U)
        local_field(re, im, nbr, s, nf, beta, hdiag, A)
        _matmul(U, A, nf, W)
        trw = _retrace(W, nf)
        d = det(U, nf, work)
        xs = site_variable(U, nf, mode, cvar, work)
        n = np.uint64(s) * SITE_STRIDE
        for hit in range(nhits):
            idx = np.int64(bits(key, n) >> np.uint64(40)) % nt
            u = uniform(key, n + _ONE)
            n += np.uint64(2)
            R = table[idx]
            dS, dnew = rotation_action_change(W, trw, R, tdet[idx], d, nf, kappa, eta)
            xnew = _rotated_variable(R, U, dnew, nf, mode, cvar)
            wnew = weight_value(collective(xsum + xnew - xs, vol, mode), lo, dx, wtab, wall)
            if _accept(dS + (wnew - wcur), u):
                _matmul(R, U, nf, T)
                U[:, :] = T
                _matmul(R, W, nf, T)
                W[:, :] = T
                trw = _retrace(W, nf)
                d = dnew
                xsum += xnew - xs
                xs = xnew
                wcur = wnew
                na += 1
        store(re, im, s, nf, U)
    return na, xsum


@njit(cache=True)
def _overrelax_colour(re, im, nbr, start, stop, nf, special, beta, hdiag, kappa, eta, key, mode, cvar,
                      vol, xsum, lo, dx, wtab, wall, perm, scratch):
    U, A, W, T, work = scratch[0], scratch[1], scratch[2], scratch[3], scratch[4]
    flavour_order(key, nf, perm)
    na = 0
    tried = 0
    wcur = weight_value(collective(xsum, vol, mode), lo, dx, wtab, wall)
    for s in range(start, stop):
        load(re, im, s, nf, U)
        local_field(re, im, nbr, s, nf, beta, hdiag, A)
        _matmul(U, A, nf, W)
        xs = site_variable(U, nf, mode, cvar, work)
        n = np.uint64(s) * SITE_STRIDE
        for pi in range(nf):
            for pj in range(pi + 1, nf):
                i = perm[pi]
                j = perm[pj]
                k, al, be = _su2_direction(W, i, j)
                if k < 1e-300:
                    continue
                r00, r01, r10, r11 = reflection(al, be, k)
                T[:, :] = U
                _rotate_rows(T, i, j, r00, r01, r10, r11, nf)
                xnew = site_variable(T, nf, mode, cvar, work)
                wnew = weight_value(collective(xsum + xnew - xs, vol, mode), lo, dx, wtab, wall)
                n += _ONE
                tried += 1
                if _accept(wnew - wcur, uniform(key, n)):
                    U[:, :] = T
                    _rotate_rows(W, i, j, r00, r01, r10, r11, nf)
                    xsum += xnew - xs
                    xs = xnew
                    wcur = wnew
                    na += 1
        if not special:
            z = complex(0.0, 0.0)
            for a in range(nf):
                z += W[a, a]
            kz = abs(z)
            if kz > 1e-300:
                e = (z.conjugate() / kz) ** 2
                d = det(U, nf, work)
                dnew = e ** nf * d
                dS = -2.0 * kappa * (eta * (dnew - d)).real
                for a in range(nf):
                    for b in range(nf):
                        T[a, b] = U[a, b] * e
                xnew = site_variable(T, nf, mode, cvar, work)
                wnew = weight_value(collective(xsum + xnew - xs, vol, mode), lo, dx, wtab, wall)
                tried += 1
                # counter s * SITE_STRIDE: the plain kernel's phase-reflection draw
                if _accept(dS + (wnew - wcur), uniform(key, np.uint64(s) * SITE_STRIDE)):
                    U[:, :] = T
                    xsum += xnew - xs
                    xs = xnew
                    wcur = wnew
                    na += 1
        store(re, im, s, nf, U)
    return na, tried, xsum


@njit(cache=True)
def biased_sweeps(re, im, nbr, nf, special, beta, hdiag, kappa, eta, nhits, n_or, step_size, seed_hash,
                  step, nsweeps, mode, cvar, lo, dx, wtab, wall, wl_f, hist, xs_out, counts):
    """``nsweeps`` sweeps of the biased chain; returns the step counter after them.

    One sweep: a Metropolis colour update of colour 0 and of colour 1 (one step each), then
    ``n_or`` overrelaxation passes (one step per colour each).  After every sweep ``x = X / V``
    is written to ``xs_out[sweep]``, counted in ``hist`` (bin of x, when inside the grid) and,
    when ``wl_f > 0`` (Wang-Landau building), ``wtab[bin] += wl_f``; with ``wl_f = 0`` the
    weight is frozen and the chain is an exact Markov chain of exp(-S - W(x)).

    Parameters
    ----------
    re, im : float64 (nf*nf, V)
        The field (updated in place).
    nbr : int64 (2d, V)
        Neighbour table.
    hdiag : complex128 (nf,)
    eta : complex
        e^{i theta_a}.
    seed_hash : uint64
        ``rng.mix64_int(seed)``; the keys are ``step_key(seed, step)`` and the Metropolis tables
        those of ``step_key(seed, step, 0x5EED)`` as in :mod:`sigmasim.updates`.
    wtab : float64 (nb,)
        W at the bin centres (updated in place when ``wl_f > 0``).
    hist : int64 (nb,)
        Visits per bin (incremented).
    xs_out : float64 (>= nsweeps,)
    counts : int64 (4,)
        Incremented: [Metropolis accepted, tried, overrelaxation accepted, tried].
    """
    vol = re.shape[1]
    half = vol // 2
    nb = wtab.shape[0]
    scratch = np.empty((5, nf, nf), dtype=np.complex128)
    table = np.empty((16, nf, nf), dtype=np.complex128)
    tdet = np.empty(16, dtype=np.complex128)
    perm = np.empty(nf, dtype=np.int64)
    for sw in range(nsweeps):
        for colour in range(2):
            start = colour * half
            stop = half if colour == 0 else vol  # V = 1 (a one-site check): colour 1 is the site
            key = step_key_nb(seed_hash, step, 0)
            tkey = step_key_nb(seed_hash, step, SALT_TABLE)
            if nf == 1:
                tc, ts = phase_table(step_size, tkey, 16)
                for k in range(16):
                    table[k, 0, 0] = complex(tc[k], ts[k])
                    tdet[k] = table[k, 0, 0]
            else:
                rotation_table(nf, special, step_size, tkey, table, tdet)
            xsum = variable_sum(re, im, nf, mode, cvar)
            na, xsum = _metropolis_colour(re, im, nbr, start, stop, nf, beta, hdiag, kappa, eta,
                                          table, tdet, nhits, key, mode, cvar, vol, xsum, lo, dx, wtab,
                                          wall, scratch)
            counts[0] += na
            counts[1] += (stop - start) * nhits
            step += 1
        for rep in range(n_or):
            for colour in range(2):
                start = colour * half
                stop = half if colour == 0 else vol
                key = step_key_nb(seed_hash, step, 0)
                xsum = variable_sum(re, im, nf, mode, cvar)
                na, tried, xsum = _overrelax_colour(re, im, nbr, start, stop, nf, special, beta,
                                                    hdiag, kappa, eta, key, mode, cvar, vol, xsum, lo, dx,
                                                    wtab, wall, perm, scratch)
                counts[2] += na
                counts[3] += tried
                step += 1
        x = collective(variable_sum(re, im, nf, mode, cvar), vol, mode)
        xs_out[sw] = x
        t = (x - lo) / dx
        if 0.0 <= t < nb:
            b = int(t)
            hist[b] += 1
            if wl_f > 0.0:
                wtab[b] += wl_f
    return step


@njit(cache=True)
def global_phase_moves(re, im, nf, hdiag, kappa, eta, mode, cvar, lo, dx, wtab, wall, nhits, amax, seed_hash,
                       step, counts):
    """``nhits`` Metropolis hits of the global phase move ``U_x -> e^{i alpha} U_x`` (module notes),
    alpha uniform in ``[-amax, amax]``, accepted with ``min(1, exp(-dS - dW))``; then the field is
    rotated by the sum of the accepted angles.  U(nf) only.  The draws use the key
    ``step_key(seed, step, SALT_GLOBAL)`` (counters 0 .. nhits - 1), so the chain stays a function
    of the field and the step counter; ``step`` is not advanced.  ``counts`` (int64 (2,)) is
    incremented by [accepted, tried].  Returns the total angle applied."""
    vol = re.shape[1]
    U = np.empty((nf, nf), dtype=np.complex128)
    work = np.empty((nf, nf), dtype=np.complex128)
    msum = complex(0.0, 0.0)
    dsum = complex(0.0, 0.0)
    zsum = complex(0.0, 0.0)
    for s in range(vol):
        load(re, im, s, nf, U)
        t = complex(0.0, 0.0)
        m = complex(0.0, 0.0)
        for a in range(nf):
            t += U[a, a]
            m += hdiag[a] * U[a, a]
        msum += m
        d = det(U, nf, work)
        dsum += d
        zsum += cvar * d if mode == 1 else cvar * t / nf
    key = step_key_nb(seed_hash, step, SALT_GLOBAL)
    wcur = weight_value(collective(zsum, vol, mode), lo, dx, wtab, wall)
    total = 0.0
    for hit in range(nhits):
        alpha = amax * (2.0 * uniform(key, np.uint64(2 * hit)) - 1.0)
        e = complex(np.cos(alpha), np.sin(alpha))
        en = complex(np.cos(nf * alpha), np.sin(nf * alpha))
        dS = -((e - 1.0) * msum).real - 2.0 * kappa * (eta * (en - 1.0) * dsum).real
        znew = zsum * (en if mode == 1 else e)
        wnew = weight_value(collective(znew, vol, mode), lo, dx, wtab, wall)
        counts[1] += 1
        if _accept(dS + (wnew - wcur), uniform(key, np.uint64(2 * hit + 1))):
            msum *= e
            dsum *= en
            zsum = znew
            wcur = wnew
            total += alpha
            counts[0] += 1
    if total != 0.0:
        c = np.cos(total)
        sn = np.sin(total)
        rows = re.shape[0]
        for s in range(vol):
            for r in range(rows):
                a = re[r, s]
                b = im[r, s]
                re[r, s] = c * a - sn * b
                im[r, s] = sn * a + c * b
    return total
