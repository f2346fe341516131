"""Per-hop data-quality index in [0, 1].

The index is the product of three measures, each in [0, 1]:

``finite``
    ``clip(1 - 5 * nonfinite_fraction, 0, 1)``: a window with 20 % or more missing
    (NaN or infinite) samples is unusable. The factor 5 is our own choice.
``unstuck``
    ``clip(1 - 3 * stuck_fraction, 0, 1)``: samples that repeat one value for
    :data:`estimators.preprocess.STUCK_RUN_S` or longer are a flat line (sensor off) or
    clipping/saturation at a rail. Flat-line and clipping checks are common practice
    in PPG and ECG quality assessment (e.g. the review by Orphanidou et al., IEEE JBHI
    2015, cited from memory).
``concentration``
    the fraction of the de-shape spectrum's band energy within the confidence
    half-width of the tracked rate, rescaled so that the level expected of a flat
    spectrum maps to 0 and :data:`CONCENTRATION_FULL` or more maps to 1. A rhythm
    concentrates energy on its ridge; noise spreads it. Spectral-purity measures of
    this kind are common practice.

``finite * unstuck`` (the signal-integrity part) also tempers the tracker's emission,
so the tracker does not follow a window it cannot trust.
"""

from __future__ import annotations

import numpy as np

CONCENTRATION_FULL = 0.5


def integrity(nonfinite_fraction: np.ndarray, stuck_fraction: np.ndarray) -> np.ndarray:
    """Signal-integrity part of the quality index, per hop."""
    finite = np.clip(1.0 - 5.0 * np.asarray(nonfinite_fraction), 0.0, 1.0)
    unstuck = np.clip(1.0 - 3.0 * np.asarray(stuck_fraction), 0.0, 1.0)
    return finite * unstuck


def concentration_fraction(spectra: np.ndarray, centre_bins: np.ndarray,
                           halfwidth_bins: float) -> np.ndarray:
    """Fraction of each hop's band energy within ``halfwidth_bins`` of ``centre_bins``
    (P,) (float bins; NaN centres give 0)."""
    spectra = np.atleast_2d(spectra)
    idx = np.arange(spectra.shape[1])
    centre = np.nan_to_num(np.asarray(centre_bins, dtype=np.float64), nan=-1e9)
    near = np.abs(idx[None, :] - centre[:, None]) <= halfwidth_bins
    total = spectra.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, (spectra * near).sum(axis=1) / total, 0.0)


def concentration_score(fraction: np.ndarray, halfwidth_bins: float, n_bins: int) -> np.ndarray:
    """Rescale a concentration fraction: the level of a flat spectrum maps to 0,
    :data:`CONCENTRATION_FULL` or more to 1."""
    chance = min(1.0, (2.0 * halfwidth_bins + 1.0) / n_bins)
    scaled = (np.asarray(fraction) - chance) / max(CONCENTRATION_FULL - chance, 1e-9)
    return np.clip(scaled, 0.0, 1.0)


def concentration(spectra: np.ndarray, centre_bins: np.ndarray, halfwidth_bins: float) -> np.ndarray:
    """Rescaled fraction of each hop's band energy near ``centre_bins`` (P,)."""
    spectra = np.atleast_2d(spectra)
    return concentration_score(concentration_fraction(spectra, centre_bins, halfwidth_bins),
                               halfwidth_bins, spectra.shape[1])


def quality_index(integrity_part: np.ndarray, concentration_part: np.ndarray) -> np.ndarray:
    """The combined index: product of the measures, in [0, 1]."""
    return np.clip(np.asarray(integrity_part) * np.asarray(concentration_part), 0.0, 1.0)
