"""Raw evidence behind each heart-rate estimate, the input of the calibrated confidence.

The tracker's posterior mass near its mode says how sure the filter is, but not how
often such an estimate is right: overlapping windows make it over-confident at rest, and
the motion stage's penalty makes it under-confident while running. The calibration
(:mod:`estimators.calibration`) turns the measures below into the probability that the
estimate is within the heart-rate tolerance; they stay on every estimate
(:attr:`estimators.estimate.Estimate.evidence`, in :data:`FEATURES` order) for
diagnostics.

Measures per hop (``r`` the reported rate, ``h`` the confidence half-width in bins):

``posterior_mass``
    posterior mass within ``h`` of the posterior mode (the tracker's confidence, before
    any motion penalty).
``motion_mark``
    the motion-line mark in [0, 1] at ``r`` (0 without the motion stage).
``quality``, ``integrity``, ``concentration``
    the quality index, its signal-integrity part and the harmonic concentration at ``r``
    of this hop alone (the quality index uses its running average).
``rival_ratio``
    the highest value of the tracked spectrum more than ``2 h`` away from ``r`` over the
    highest value within ``h`` of ``r`` (0: no rival; 1: a rival as strong as the
    chosen peak). It is the spectral margin to the best separated hypothesis,
    half and double rates included.
``half_ratio``, ``double_ratio``
    the tracked spectrum's highest value within ``h`` of ``r / 2`` (of ``2 r``) over
    its value at ``r``; 0 where that rate is outside the grid. A strong ``r / 2`` hints
    at a lock on the second harmonic; a weak ``r`` against ``2 r`` at a sub-harmonic.
    The tracked spectrum is the de-shape spectrum (or the motion stage's harmonic sum),
    which keeps a pulse's fundamental and drops its harmonics: on the plain magnitude, a
    correct rate whose pulse has a second harmonic 1.5 times its fundamental looked
    like a sub-harmonic lock and was withheld (confidence 0.03-0.13 at 50-100 bpm).
    Measured out of fold (``python -m bench.calibration``): BIDMC AUROC for errors over
    10 bpm 0.91 -> 0.96; on the ``wrist`` profile during running (SPC 2015, where de-shape
    follows the motion) the plain spectrum had told more (ECE 0.04 -> 0.09).
``jumpiness``
    running mean (time constant :data:`JUMPINESS_TIME_CONSTANT_S`) of ``|r_p - r_{p-1}|``
    per second, in per-minute-per-second: a track that wanders is less trustworthy.
``channel_spread``
    for a ``fused`` estimate, the spread (max - min) of the channels' own rates at the
    same hop (per minute); 0 for a single channel.
``motion_profile``
    1 when the settings run the motion stage (exercise), else 0: the same spectral
    evidence means something else after motion suppression.
``reference_integrity``
    with the motion stage, the lowest integrity (share of accepted samples, as in the
    quality index) of the motion references' windows at this hop: 0 while the
    accelerometer is missing (a lost stream, NaN samples, no accelerometer channel at
    all), 1 when every reference is whole; 1 without the motion stage. Without it a
    lost accelerometer left the confidence at 0.98 while the running estimates fell to
    34-65 % within tolerance on five of the twelve SPC 2015 records (measured with the
    accelerometer set to NaN after 60 s).
"""

from __future__ import annotations

import math

import numpy as np

from estimators import _kernels

FEATURES = ("posterior_mass", "motion_mark", "quality", "integrity", "concentration",
            "rival_ratio", "half_ratio", "double_ratio", "jumpiness", "channel_spread",
            "motion_profile", "reference_integrity")
"""Names of the evidence measures, in the order of the evidence vectors."""

JUMPINESS_TIME_CONSTANT_S = 4.0
"""Memory of the jumpiness average: half a window, so a jump is remembered about as
long as the window that caused it still holds the change. Our own choice."""


def _band_max(spectra: np.ndarray, centre: np.ndarray, halfwidth: float,
              outside: bool = False) -> np.ndarray:
    """Per row, the highest value within ``halfwidth`` bins of ``centre`` (P,) (or
    farther than ``halfwidth`` with ``outside``); 0 where no bin qualifies or the centre
    is not finite."""
    n_bins = spectra.shape[1]
    distance = np.abs(np.arange(n_bins)[None, :] - centre[:, None])
    with np.errstate(invalid="ignore"):
        near = distance > halfwidth if outside else distance <= halfwidth
    near &= np.isfinite(centre)[:, None]
    return np.where(near, np.nan_to_num(spectra, nan=0.0), 0.0).max(axis=1, initial=0.0)


def _ratio(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(denominator > 0, numerator / np.where(denominator > 0, denominator, 1.0),
                       0.0)
    return np.clip(out, 0.0, 10.0)


def spectral_margins(spectra: np.ndarray, readout: np.ndarray, rate_bins: np.ndarray,
                     offset_bins: float, halfwidth_bins: float) -> tuple:
    """``(rival_ratio, half_ratio, double_ratio)`` per hop (see the module notes), in
    one compiled pass (:func:`estimators._kernels.spectral_margins`; its batch twin is
    :func:`spectral_margins_batch`).

    ``rate_bins`` (P,) is the rate in fractional bins of the grid whose bin ``f`` has
    rate ``(f + offset_bins) * step``.

    Examples
    --------
    >>> s = np.zeros((1, 40)); s[0, 10] = 1.0; s[0, 30] = 0.5
    >>> [round(float(v[0]), 2) for v in spectral_margins(s, s, np.array([10.0]), 0.0, 2.0)]
    [0.5, 0.0, 0.0]
    """
    spectra = np.ascontiguousarray(np.atleast_2d(spectra), dtype=np.float64)
    readout = np.ascontiguousarray(np.atleast_2d(readout), dtype=np.float64)
    rate_bins = np.ascontiguousarray(rate_bins, dtype=np.float64)
    out = np.empty((len(spectra), 3))
    _kernels.spectral_margins(spectra, readout, rate_bins, float(offset_bins),
                              float(halfwidth_bins), out)
    return out[:, 0], out[:, 1], out[:, 2]


def spectral_margins_batch(spectra: np.ndarray, readout: np.ndarray, rate_bins: np.ndarray,
                           offset_bins: float, halfwidth_bins: float) -> tuple:
    """Array twin of :func:`spectral_margins` (masks over all hops and bins at once)."""
    spectra = np.atleast_2d(spectra)
    readout = np.atleast_2d(readout)
    rate_bins = np.asarray(rate_bins, dtype=np.float64)
    at_rate = _band_max(spectra, rate_bins, halfwidth_bins)
    rival = _band_max(spectra, rate_bins, 2.0 * halfwidth_bins, outside=True)
    read_at = _band_max(readout, rate_bins, halfwidth_bins)
    half = (rate_bins + offset_bins) / 2.0 - offset_bins
    double = (rate_bins + offset_bins) * 2.0 - offset_bins
    last = readout.shape[1] - 1
    with np.errstate(invalid="ignore"):
        half = np.where(half >= 0, half, np.nan)
        double = np.where(double <= last, double, np.nan)
    return (_ratio(rival, at_rate), _ratio(_band_max(readout, half, halfwidth_bins), read_at),
            _ratio(_band_max(readout, double, halfwidth_bins), read_at))


def jumpiness(rate_per_min: np.ndarray, hop_s: float, state: dict) -> np.ndarray:
    """Running mean of ``|r_p - r_{p-1}| / hop_s`` (causal exponential average, time
    constant :data:`JUMPINESS_TIME_CONSTANT_S`). Non-finite rates leave the average
    and the last rate as they were. ``state`` (a dict, updated in place) carries
    ``last_rate`` and ``jumpiness`` between calls, so any chunking gives the same values.

    Examples
    --------
    >>> s = {}
    >>> [round(v, 3) for v in jumpiness(np.array([60.0, 60.0, 61.0]), 1.0, s).tolist()]
    [0.0, 0.0, 0.221]
    """
    a = math.exp(-hop_s / JUMPINESS_TIME_CONSTANT_S)
    last = state.get("last_rate", math.nan)
    level = state.get("jumpiness", 0.0)
    out = []
    for r in np.asarray(rate_per_min, dtype=np.float64).tolist():
        if math.isfinite(r):
            if math.isfinite(last):
                level = a * level + (1.0 - a) * abs(r - last) / hop_s
            last = r
        out.append(level)
    state["last_rate"], state["jumpiness"] = last, level
    return np.array(out)


def channel_spread(channel_rates: np.ndarray | None, n_hops: int) -> np.ndarray:
    """Max - min of the channels' rates (C, P) per hop, ignoring non-finite ones; 0 with
    fewer than two finite rates, and everywhere when the rates do not cover ``n_hops``
    hops."""
    rates = None if channel_rates is None else np.asarray(channel_rates, dtype=np.float64)
    if rates is None or rates.ndim != 2 or rates.shape[1] != n_hops:
        return np.zeros(n_hops)
    finite = np.isfinite(rates)
    hi = np.where(finite, rates, -np.inf).max(axis=0)
    lo = np.where(finite, rates, np.inf).min(axis=0)
    return np.where(finite.sum(axis=0) >= 2, hi - lo, 0.0)
