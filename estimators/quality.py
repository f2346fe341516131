"""Per-hop data-quality index in [0, 1].

The index is the product of three measures, each in [0, 1]:

``finite``
    ``clip(1 - 5 * rejected_fraction, 0, 1)``: a window with 20 % or more missing
    (NaN or infinite) samples, or samples rejected as outside the signal's running
    range (spikes, see :class:`estimators.preprocess.Limiter`), is unusable. The factor
    5 is our own choice.
``unstuck``
    ``clip(1 - 3 * stuck_fraction, 0, 1)``: samples that repeat one value for
    :data:`estimators.preprocess.STUCK_RUN_S` or longer are a flat line (sensor off) or
    clipping/saturation at a rail. Flat-line and clipping checks are common practice
    in PPG and ECG quality assessment (e.g. the review by Orphanidou et al., IEEE JBHI
    2015, cited from memory).
``concentration``
    how much of the band's power (plain STFT magnitude squared) lies within the
    confidence half-width of the reported rate and of its harmonics, against the share a
    flat spectrum would put there (:func:`estimators._kernels.harmonic_score`). A rhythm
    concentrates power on its fundamental and harmonics whatever its wave shape; noise
    spreads it. Spectral-concentration measures of this kind are common practice. A rate
    on the very edge of the band (a slope, not a peak) scores 0. The score is averaged
    causally over :data:`CONCENTRATION_SMOOTHING_S` seconds.

``finite * unstuck`` (the signal-integrity part) also tempers the tracker's emission,
so the tracker does not follow a window it cannot trust.
"""

from __future__ import annotations

import math

import numpy as np

from estimators import _kernels


def integrity(rejected_fraction: np.ndarray, stuck_fraction: np.ndarray) -> np.ndarray:
    """Signal-integrity part of the quality index, per hop, from the fractions of the
    window's raw samples that were rejected (non-finite or out of range) and stuck."""
    finite = np.maximum(1.0 - 5.0 * np.asarray(rejected_fraction), 0.0)
    unstuck = np.maximum(1.0 - 3.0 * np.asarray(stuck_fraction), 0.0)
    return np.minimum(finite * unstuck, 1.0)


CHANCE_FACTOR = 1.5
"""The concentration score starts at this multiple of the share a flat spectrum would
put on the harmonic family (white noise sits near 1x, with peak picking a little above).
Our own choice, from measurements on white and coloured noise."""
CONCENTRATION_SPAN = 0.3
"""Fraction above the start at which the concentration score is full."""


def harmonic_concentration(readout: np.ndarray, centre_bins: np.ndarray, offset_bins: float,
                           halfwidth_bins: float) -> np.ndarray:
    """Concentration score per hop: :func:`estimators._kernels.harmonic_score` of the band
    power ``readout ** 2`` on the harmonic family of the rate at ``centre_bins`` (P,);
    NaN centres and centres on the grid's edge bins give 0."""
    readout = np.atleast_2d(readout)
    out = np.zeros(len(readout))
    last = readout.shape[1] - 1
    for p, centre in enumerate(np.asarray(centre_bins, dtype=np.float64)):
        # As the live kernel: a rate on the grid's first or last bin is a slope, not a peak.
        if np.isfinite(centre) and 0 < int(round(centre)) < last:
            out[p] = _kernels.harmonic_score(np.ascontiguousarray(readout[p] ** 2), centre,
                                             float(offset_bins), float(halfwidth_bins),
                                             CHANCE_FACTOR, CONCENTRATION_SPAN)
    return out


CONCENTRATION_SMOOTHING_S = 3.0
"""Time constant (s) of the causal exponential average of the concentration score. A
rhythm persists while chance ridges of noise come and go: averaging over a few seconds
halves the share of white-noise hops that pass as a rhythm (measured: 8 % -> 3-5 %)
while real pulses keep their score. Integrity is not averaged: a flat line or missing
samples lower quality at once. Our own choice."""


def smooth_scores(values: np.ndarray, last: float | None, hop_s: float,
                  time_constant_s: float = CONCENTRATION_SMOOTHING_S):
    """Causal exponential average ``y_p = (1 - a) x_p + a y_{p-1}``, ``a = exp(-hop /
    tau)``, started at the first value. Returns ``(smoothed, last)`` to carry on; any
    chunking of the hops gives the same values."""
    values = np.asarray(values, dtype=np.float64)
    if len(values) == 0:
        return values, last
    a = math.exp(-hop_s / time_constant_s)
    b = 1.0 - a
    prev = float(values[0]) if last is None else last
    out = []
    for v in values.tolist():  # a handful of hops per call: a plain loop is cheapest
        prev = b * v + a * prev
        out.append(prev)
    return np.array(out), prev


def quality_index(integrity_part: np.ndarray, concentration_part: np.ndarray) -> np.ndarray:
    """The combined index: product of the measures, in [0, 1]."""
    return np.clip(np.asarray(integrity_part) * np.asarray(concentration_part), 0.0, 1.0)
