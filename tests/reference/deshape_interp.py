"""De-shape by the definition, one column at a time, with ``np.interp``.

For a one-sided magnitude column ``|V(f_j)|``, ``f_j = j fs / n_fft``:

1. soft log ``S = |V| ** gamma``;
2. cepstrum ``C = Re(ifft(S_two_sided))`` where the two-sided spectrum mirrors ``S``
   (``S[n_fft - j] = S[j]``);
3. inverse-quefrency read-out ``U(f) = max(C(fs / f), 0)`` for ``f`` in the band, with
   ``C`` linearly interpolated at the fractional quefrency ``fs / f`` (samples);
4. ``W(f) = |V(f)| U(f)``.

Band bins are those with ``lo <= f_j <= hi`` (inclusive).

Synchrosqueezing twin: each bin's magnitude moves to the bin nearest its reassigned
frequency ``f - (n_fft / 2 pi) Im(V_dw / V)``, by a Python loop.
"""

from __future__ import annotations

import math

import numpy as np


def band_bins(fs: float, n_fft: int, band_hz: tuple) -> np.ndarray:
    """Indices ``j`` of one-sided bins with ``lo <= j fs / n_fft <= hi``."""
    step = fs / n_fft
    j = np.arange(n_fft // 2 + 1)
    f = j * step
    tol = 1e-9 * step
    return j[(f >= band_hz[0] - tol) & (f <= band_hz[1] + tol)]


def deshape_column(magnitude: np.ndarray, fs: float, n_fft: int, band_hz: tuple,
                   gamma: float) -> np.ndarray:
    """De-shape spectrum of one column over the band's bins."""
    soft = np.asarray(magnitude, dtype=np.float64) ** gamma
    two_sided = np.concatenate((soft, soft[-2:0:-1]))
    assert len(two_sided) == n_fft
    cepstrum = np.real(np.fft.ifft(two_sided))
    bins = band_bins(fs, n_fft, band_hz)
    quefrency = fs / (bins * fs / n_fft)
    u = np.interp(quefrency, np.arange(n_fft), cepstrum)
    return magnitude[bins] * np.maximum(u, 0.0)


def deshape_columns(magnitude: np.ndarray, fs: float, n_fft: int, band_hz: tuple,
                    gamma: float) -> np.ndarray:
    """:func:`deshape_column` for every row of ``magnitude`` (P, n_fft // 2 + 1)."""
    return np.array([deshape_column(row, fs, n_fft, band_hz, gamma) for row in magnitude])


def squeeze_column(spectrum: np.ndarray, spectrum_dw: np.ndarray, n_fft: int,
                   small: float = 1e-8) -> np.ndarray:
    """Synchrosqueezed magnitude of one column; bins with magnitude below
    ``small * max`` are dropped, as are targets outside the grid."""
    mag = np.abs(spectrum)
    out = np.zeros(len(mag))
    for f in range(len(mag)):
        if mag[f] < small * (mag.max() + 1e-300):
            continue
        target = f - n_fft / (2.0 * math.pi) * (spectrum_dw[f] / spectrum[f]).imag
        if not math.isfinite(target):
            continue
        i = math.floor(target + 0.5)
        if 0 <= i < len(mag):
            out[i] += mag[f]
    return out
