"""Final refinement of a tracked heart rate on a less processed spectrum.

In the exercise profile the tracker follows the motion stage's output
(:mod:`estimators.motion`): the canceller's residual times a Wiener-like motion gain,
then a harmonic sum. The gain is what keeps the track off the motion lines, but it is
not flat across the pulse's main lobe (about +-15 bpm wide with an 8 s Hann window), so
the product's peak sits off the pulse's own peak, pulled towards where the gain is
larger. Reading the rate at the gained peak therefore carries the gain's slope as an
error of up to a couple of bpm, even when the track is right.

The refinement separates the two jobs. The gained spectrum picks *which* peak is the
pulse (the tracker's rate); the canceller's residual, harmonic-summed like the tracked
spectrum but with no gain, says *where* that peak is: from the bin nearest the tracked
rate, the rate climbs uphill on the residual spectrum to its nearest local maximum,
at most ``refine_radius_per_min`` away (a setting of
:class:`~estimators.config.RateSettings`; 2 bpm in the exercise profile), and is read there by parabolic interpolation. A
motion line that the gain suppressed further away cannot capture the rate, since the
climb stops at the first local maximum and never travels further than the radius.

Measured on IEEE SPC 2015 training records 01-12 (``python -m bench.exercise_table``,
ablation ``without refinement``): see the table in the README.
"""

from __future__ import annotations

import numpy as np

from estimators.errors import ParameterError

def climb_to_peak(spectra: np.ndarray, rates: np.ndarray, rate_per_min: np.ndarray,
                  radius_bins: int) -> np.ndarray:
    """The rate of the nearest local maximum of each hop's spectrum, uphill from
    ``rate_per_min``.

    Parameters
    ----------
    spectra : (P, F) spectra on the grid ``rates`` (F,) (evenly spaced, per minute).
    rate_per_min : (P,) starting rates; NaN stays NaN.
    radius_bins : the climb moves at most this many bins (>= 0).

    Returns
    -------
    (P,) rates: from the bin ``j`` nearest the starting rate, ``j`` moves one bin
    towards its higher neighbour while that neighbour is strictly higher than ``S[j]``
    (up first when both are, and only if the upper one is at least the lower one), at
    most ``radius_bins`` times; the rate is then ``rates[j] + delta * step`` with the
    parabolic offset ``delta = (S[j-1] - S[j+1]) / (2 (S[j-1] - 2 S[j] + S[j+1]))``
    clipped to +-0.5 (0 where the parabola does not open downwards). Where ``j`` ends on
    the grid's first or last bin, or the spectrum there is not finite, the starting rate
    is kept.

    Notes
    -----
    A climb never turns back (moving up means ``S[j+1] > S[j]``, so at the new bin the
    lower neighbour is not higher), so the loop over ``radius_bins`` steps is exact.
    Parabolic interpolation of a peak on a zero-padded spectrum: e.g. Smith & Serra,
    "PARSHL: an analysis/synthesis program for non-harmonic sounds based on a
    sinusoidal representation", Proc. ICMC 1987 (cited from memory).

    Examples
    --------
    >>> rates = np.arange(8.0)
    >>> spectra = np.array([[0.0, 1.0, 2.0, 3.0, 2.0, 1.0, 0.0, 0.0]])
    >>> climb_to_peak(spectra, rates, np.array([1.2]), 4).tolist()
    [3.0]
    >>> climb_to_peak(spectra, rates, np.array([1.2]), 1).tolist()  # stopped on the slope
    [2.0]
    """
    spectra = np.atleast_2d(np.asarray(spectra, dtype=np.float64))
    rate_per_min = np.asarray(rate_per_min, dtype=np.float64)
    if radius_bins < 0 or int(radius_bins) != radius_bins:
        raise ParameterError(f"radius_bins={radius_bins} must be a whole number >= 0")
    n_hops, n_bins = spectra.shape
    if rate_per_min.shape != (n_hops,):
        raise ParameterError(f"rate_per_min.shape={rate_per_min.shape} must be ({n_hops},)")
    if n_hops == 0 or n_bins < 3:
        return rate_per_min.copy()
    step = float(rates[1] - rates[0])
    finite = np.isfinite(rate_per_min)
    rows = np.arange(n_hops)
    j = np.clip(np.round((np.where(finite, rate_per_min, rates[0]) - rates[0]) / step),
                0, n_bins - 1).astype(np.int64)
    for _ in range(int(radius_bins)):
        inner = (j > 0) & (j < n_bins - 1)
        left = spectra[rows, np.maximum(j - 1, 0)]
        mid = spectra[rows, j]
        right = spectra[rows, np.minimum(j + 1, n_bins - 1)]
        up = inner & (right > mid) & (right >= left)
        down = inner & ~up & (left > mid)
        if not (up.any() or down.any()):
            break
        j = j + up - down
    inner = (j > 0) & (j < n_bins - 1)
    left = spectra[rows, np.maximum(j - 1, 0)]
    mid = spectra[rows, j]
    right = spectra[rows, np.minimum(j + 1, n_bins - 1)]
    denom = left - 2.0 * mid + right
    with np.errstate(invalid="ignore", divide="ignore"):
        delta = np.where(denom < 0, 0.5 * (left - right) / denom, 0.0)
    delta = np.clip(np.nan_to_num(delta), -0.5, 0.5)
    usable = finite & inner & np.isfinite(left + mid + right)
    return np.where(usable, rates[j] + delta * step, rate_per_min)


def refine_rate(refine_spectra: np.ndarray | None, rates: np.ndarray,
                rate_per_min: np.ndarray, radius_per_min: float) -> np.ndarray:
    """The tracked rates refined on ``refine_spectra`` (P, F) by :func:`climb_to_peak`
    within ``radius_per_min`` (rounded to whole bins of ``rates``); unchanged when
    there are none (None) or the radius is below half a bin.

    >>> rates = np.arange(60.0, 68.0)
    >>> spectra = np.array([[0.0, 1.0, 2.0, 3.0, 2.0, 1.0, 0.0, 0.0]])
    >>> refine_rate(spectra, rates, np.array([61.0]), 2.0).tolist()
    [63.0]
    >>> refine_rate(None, rates, np.array([61.0]), 2.0).tolist()
    [61.0]
    """
    rate_per_min = np.asarray(rate_per_min, dtype=np.float64)
    if refine_spectra is None or len(rate_per_min) == 0:
        return rate_per_min
    radius_bins = int(round(radius_per_min / float(rates[1] - rates[0])))
    if radius_bins == 0:
        return rate_per_min
    return climb_to_peak(refine_spectra, rates, rate_per_min, radius_bins)
