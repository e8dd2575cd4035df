"""Thermalisation (burn-in) check for a Monte Carlo time series.

Rule (common practice, no source; the error estimates use Wolff's Gamma
method, U. Wolff, Comput. Phys. Commun. 156 (2004) 143):

1. The last half of the series is the *reference*: mean ``m_ref``, variance
   ``v_ref``, integrated autocorrelation time ``tau_ref`` and error
   ``e_ref`` from :func:`sigmasim.analysis.gamma.gamma_analysis`.
2. The first half is split into ``n_blocks`` equal blocks of size ``b``.
   The error of a block mean is taken from the reference statistics,
   ``e_b = sqrt(2 tau_ref v_ref / b)`` (a Gamma analysis of a short,
   possibly drifting block would be unreliable).
3. Each block gets ``z_k = (mean_k - m_ref) / sqrt(e_b^2 + e_ref^2)``.
4. The cut is the start of the block after the *last* block with
   ``|z_k| > z_max`` (default 4); i.e. the leading part is removed as long as
   it drifts.  Taking the last (not the first) offending block is the
   conservative choice for slow, non-monotonic transients.
5. If the very last block of the first half still drifts, the series is
   flagged as not thermalised and the cut is ``N // 2``.
6. A drift that continues through the whole series inflates ``tau_ref`` and
   ``e_ref`` and can hide itself.  Therefore the series is also flagged as not
   thermalised (cut kept as found) when the reference half holds fewer than
   ``min_independent`` (default 50) effective independent samples
   ``N_ref / (2 tau_ref)``, or when the two quarters of the reference half
   disagree by more than ``z_max`` combined Gamma-method errors.

With ``z_max = 4`` and 20 blocks the probability of a spurious cut in a
stationary Gaussian series is about ``20 * 6.3e-5 ~ 1e-3``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .gamma import gamma_analysis

__all__ = ["ThermalisationResult", "thermalisation_cut"]


@dataclass(frozen=True, eq=False)
class ThermalisationResult:
    """Outcome of :func:`thermalisation_cut`.

    Attributes
    ----------
    cut : int
        Number of leading samples to discard.
    reason : str
        Human-readable explanation of the decision.
    thermalised : bool
        False if the drift persists through the whole first half.
    block_size : int
        Size ``b`` of the tested blocks.
    z_scores : numpy.ndarray
        ``float64``, shape ``(n_blocks,)``: deviation of each leading block
        from the reference in units of the combined error.
    tau_int_reference : float
        Gamma-method ``tau_int`` of the reference (last) half.
    """

    cut: int
    reason: str
    thermalised: bool
    block_size: int
    z_scores: np.ndarray
    tau_int_reference: float


def thermalisation_cut(
    series: np.ndarray,
    n_blocks: int = 20,
    z_max: float = 4.0,
    S: float = 1.5,
    min_independent: float = 50.0,
) -> ThermalisationResult:
    """Find how many leading samples to discard (rule in the module docstring).

    Parameters
    ----------
    series : array_like
        Real, shape ``(N,)``, in Monte Carlo order, ``N >= 4 * n_blocks``.
    n_blocks : int, default 20
        Number of blocks the first half is split into.
    z_max : float, default 4.0
        Threshold in units of the combined error.
    S : float, default 1.5
        Gamma-method windowing parameter for the reference half.
    min_independent : float, default 50
        Minimum ``N_ref / (2 tau_ref)`` for the reference half to be trusted.

    Returns
    -------
    ThermalisationResult

    Raises
    ------
    ValueError
        If the series is not 1-d or shorter than ``4 * n_blocks``.
    """
    x = np.asarray(series, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"thermalisation check needs a 1-d series, got shape {x.shape}")
    n = x.shape[0]
    if n_blocks < 1:
        raise ValueError(f"n_blocks must be >= 1, got {n_blocks}")
    if n < 4 * n_blocks:
        raise ValueError(
            f"series too short for the thermalisation check: N={n} < 4 * n_blocks = "
            f"{4 * n_blocks}"
        )
    half = n // 2
    ref = x[half:]
    b = half // n_blocks
    blocks = x[: n_blocks * b].reshape(n_blocks, b).mean(axis=1)
    g = gamma_analysis(ref, S=S)
    v_ref = float(np.var(ref))
    if g.error == 0.0 and v_ref == 0.0:
        # constant reference: any deviation at all is a drift
        z = np.where(blocks == g.value, 0.0, np.inf)
    else:
        e_b = np.sqrt(2.0 * g.tau_int * v_ref / b)
        z = (blocks - g.value) / np.hypot(e_b, g.error)
    bad = np.nonzero(np.abs(z) > z_max)[0]
    note = ""
    # rule 6: is the reference half itself trustworthy?
    q = ref.shape[0] // 2
    ref_ok = True
    if g.error > 0.0:
        g1, g2 = gamma_analysis(ref[:q], S=S), gamma_analysis(ref[q:], S=S)
        z_ref = (g1.value - g2.value) / max(np.hypot(g1.error, g2.error), np.finfo(float).tiny)
        if g.n_independent < min_independent:
            ref_ok = False
            note += (
                f" Not trusted: the last half holds only {g.n_independent:.3g} independent "
                f"samples (< {min_independent:g}); the run is too short or drifting throughout."
            )
        elif abs(z_ref) > z_max:
            ref_ok = False
            note += (
                f" Not trusted: the two quarters of the last half differ by {z_ref:.3g} sigma;"
                " the series still drifts."
            )
    if b < 2.0 * g.tau_int:
        note += (
            f" Warning: block size {b} is below 2 tau_int = {2 * g.tau_int:.3g}; "
            "the series is short compared with its autocorrelation time."
        )
    if bad.size == 0:
        return ThermalisationResult(
            0,
            f"no block of the first half deviates by more than {z_max:g} sigma from the "
            f"mean of the last half (max |z| = {np.max(np.abs(z)):.3g}); no cut." + note,
            ref_ok, b, z, g.tau_int,
        )
    last = int(bad[-1])
    if last == n_blocks - 1:
        return ThermalisationResult(
            half,
            f"the last block of the first half (samples {last * b}-{(last + 1) * b}) still "
            f"deviates by {z[last]:.3g} sigma from the mean of the last half: the series "
            "does not look thermalised; discarding the first half, consider a longer run."
            + note,
            False, b, z, g.tau_int,
        )
    cut = (last + 1) * b
    return ThermalisationResult(
        cut,
        f"block {last} (samples {last * b}-{cut}) deviates by {z[last]:.3g} sigma "
        f"(> {z_max:g}) from the mean of the last half; all later blocks agree. "
        f"Cutting the first {cut} samples." + note,
        ref_ok, b, z, g.tau_int,
    )
