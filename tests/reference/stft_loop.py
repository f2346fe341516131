"""STFT columns by an explicit loop over hops and an explicit DFT sum.

Conventions (the engine's, see :mod:`estimators.stft`): hop ``p = 1, 2, ...`` falls at
analysis-sample count ``c_p = floor(p * hop_samples)``; its frame is the newest
``L_p = min(m, c_p)`` samples ``x[c_p - L_p : c_p]``; frames with ``c_p < m_min`` are
skipped. The window is the periodic Hann ``0.5 - 0.5 cos(2 pi n / L)``, ``n = 0..L-1``,
divided by its sum; the column is ``V(f) = sum_n x[n] w[n] exp(-2 pi i f n / n_fft)``
for ``f = 0 .. n_fft // 2``.
"""

from __future__ import annotations

import math

import numpy as np


def periodic_hann(length: int) -> np.ndarray:
    """Periodic Hann window of ``length`` samples, divided by its sum."""
    n = np.arange(length)
    w = 0.5 - 0.5 * np.cos(2.0 * np.pi * n / length)
    return w / w.sum()


def periodic_hann_derivative(length: int) -> np.ndarray:
    """Derivative of the unnormalised periodic Hann with respect to ``n``, divided by
    the same sum as :func:`periodic_hann`: ``(pi / L) sin(2 pi n / L) / sum(w)``."""
    n = np.arange(length)
    w = 0.5 - 0.5 * np.cos(2.0 * np.pi * n / length)
    return (np.pi / length) * np.sin(2.0 * np.pi * n / length) / w.sum()


def dft_one_sided(frame: np.ndarray, n_fft: int) -> np.ndarray:
    """``sum_n frame[n] exp(-2 pi i f n / n_fft)`` for ``f = 0 .. n_fft // 2``
    (zero padding is implied by summing over the frame only)."""
    n = np.arange(len(frame))
    f = np.arange(n_fft // 2 + 1)
    basis = np.exp(-2j * np.pi * np.outer(f, n) / n_fft)
    return basis @ frame


def hop_schedule(n_samples: int, hop_samples: float) -> list[int]:
    """Counts ``c_p = floor(p * hop_samples)`` for ``p = 1, 2, ...`` up to ``n_samples``.

    The tiny tolerance keeps products such as ``3 * 2.1`` from rounding below an
    integer they equal exactly in decimal."""
    counts = []
    p = 1
    while True:
        c = math.floor(p * hop_samples + 1e-9)
        if c > n_samples:
            return counts
        if c >= 1 and (not counts or c > counts[-1]):
            counts.append(c)
        p += 1


def stft_columns(values: np.ndarray, times: np.ndarray, window_samples: int,
                 min_window_samples: int, hop_samples: float, n_fft: int,
                 with_derivative: bool = False) -> dict:
    """All columns of ``values`` by a loop over hops.

    Returns a dict with ``spectra`` (P, n_fft // 2 + 1), ``spectra_dw`` (or None),
    ``time_s`` (window centre), ``emitted_s`` (newest sample), ``first_count`` and
    ``last_count`` (P,).
    """
    spectra, spectra_dw, time_s, emitted_s, first, last = [], [], [], [], [], []
    for c in hop_schedule(len(values), hop_samples):
        if c < min_window_samples:
            continue
        length = min(window_samples, c)
        frame = values[c - length:c]
        spectra.append(dft_one_sided(frame * periodic_hann(length), n_fft))
        if with_derivative:
            spectra_dw.append(dft_one_sided(frame * periodic_hann_derivative(length), n_fft))
        t_frame = times[c - length:c]
        time_s.append(0.5 * (t_frame[0] + t_frame[-1]))
        emitted_s.append(t_frame[-1])
        first.append(c - length)
        last.append(c)
    n_bins = n_fft // 2 + 1
    return {
        "spectra": np.array(spectra).reshape(-1, n_bins),
        "spectra_dw": np.array(spectra_dw).reshape(-1, n_bins) if with_derivative else None,
        "time_s": np.array(time_s),
        "emitted_s": np.array(emitted_s),
        "first_count": np.array(first, dtype=np.int64),
        "last_count": np.array(last, dtype=np.int64),
    }


def recent_columns(values: np.ndarray, window_samples: int, min_window_samples: int,
                   hop_samples: float, n_fft: int, recent_samples: int) -> np.ndarray:
    """The end-weighted columns by a loop over hops: the newest
    ``min(recent_samples, L_p)`` samples of each frame under their own periodic Hann
    (divided by its sum), by the explicit DFT sum. (P, n_fft // 2 + 1)."""
    out = []
    for c in hop_schedule(len(values), hop_samples):
        if c < min_window_samples:
            continue
        length = min(window_samples, c, recent_samples)
        out.append(dft_one_sided(values[c - length:c] * periodic_hann(length), n_fft))
    return np.array(out).reshape(-1, n_fft // 2 + 1)
