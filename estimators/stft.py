"""Sliding short-time Fourier transform: one column per hop, and its batch twin.

Hop schedule
------------
With analysis rate ``fs_a`` and hop ``hop_s``, hop ``p = 1, 2, ...`` falls when the
analysis sample count reaches ``c_p = floor(p * hop_s * fs_a)``. Its column is taken
from the newest ``L_p = min(m, c_p)`` samples (``m = round(window_s * fs_a)``), with a
periodic Hann window of length ``L_p`` normalised to unit sum, zero-padded to
``n_fft``. Columns with ``c_p < m_min`` are not formed: at start-up the window grows
from ``m_min`` samples to ``m``, so the first column comes ``min_window_s`` after the
first sample. The schedule depends only on sample counts, never on chunk boundaries,
so any chunking gives the same columns.

Which instant a column refers to
--------------------------------
The window is symmetric, so a column describes the centre of its window:
``time_s = (t_first + t_last) / 2`` over the samples it used. ``emitted_s = t_last``
is the newest sample it used. Their difference (half a window) is the delay of the
estimate before any tracker lag.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import get_window

from estimators.errors import ParameterError


@dataclass(frozen=True)
class Columns:
    """Columns formed in one update.

    ``spectra`` (P, n_fft // 2 + 1) complex; ``spectra_dw`` the same with the window's
    time derivative (for reassignment), or None; ``time_s`` and ``emitted_s`` (P,);
    ``first_count`` and ``last_count`` (P,) the analysis-sample counts the frames
    span, ``(first, last]``.
    """

    spectra: np.ndarray
    spectra_dw: np.ndarray | None
    time_s: np.ndarray
    emitted_s: np.ndarray
    first_count: np.ndarray
    last_count: np.ndarray

    def __len__(self) -> int:
        return len(self.time_s)


def analysis_window(length: int) -> tuple[np.ndarray, np.ndarray]:
    """Periodic Hann of ``length`` samples normalised to unit sum, and its derivative
    with respect to the sample index (same normalisation)."""
    w = get_window("hann", length, fftbins=True)
    s = w.sum()
    n = np.arange(length)
    dw = np.pi / length * np.sin(2.0 * np.pi * n / length)
    return w / s, dw / s


def hop_counts(count_before: int, count_after: int, hop_samples: float) -> np.ndarray:
    """Analysis-sample counts ``c_p`` with ``count_before < c_p <= count_after``."""
    p_lo = int(np.floor(count_before / hop_samples)) - 1
    p_hi = int(np.floor(count_after / hop_samples)) + 2
    p = np.arange(max(p_lo, 1), p_hi + 1)
    c = np.floor(p * hop_samples + 1e-9).astype(np.int64)
    return c[(c > count_before) & (c <= count_after)]


class _WindowCache:
    def __init__(self):
        self._cache: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def get(self, length: int):
        if length not in self._cache:
            self._cache[length] = analysis_window(length)
        return self._cache[length]


def frames_to_columns(frames: list[tuple[np.ndarray, np.ndarray]], n_fft: int,
                      with_derivative: bool, windows: _WindowCache):
    """FFT of windowed frames; full-length frames are batched in one call."""
    n_bins = n_fft // 2 + 1
    spectra = np.empty((len(frames), n_bins), dtype=np.complex128)
    spectra_dw = np.empty_like(spectra) if with_derivative else None
    by_len: dict[int, list[int]] = {}
    for i, (values, _) in enumerate(frames):
        by_len.setdefault(len(values), []).append(i)
    for length, idx in by_len.items():
        w, dw = windows.get(length)
        block = np.stack([frames[i][0] for i in idx])
        spectra[idx] = np.fft.rfft(block * w, n_fft, axis=1)
        if with_derivative:
            spectra_dw[idx] = np.fft.rfft(block * dw, n_fft, axis=1)
    return spectra, spectra_dw


class SlidingSTFT:
    """Ring-buffered STFT of one analysis-rate signal.

    Parameters
    ----------
    window_samples, min_window_samples : ``m`` and ``m_min``.
    hop_samples : hop in analysis samples (may be fractional).
    n_fft : FFT length (>= ``window_samples``).
    with_derivative : also form the derivative-window columns (for reassignment).
    """

    def __init__(self, window_samples: int, min_window_samples: int, hop_samples: float,
                 n_fft: int, with_derivative: bool = False):
        if not 1 <= min_window_samples <= window_samples:
            raise ParameterError(
                f"min_window_samples={min_window_samples} must be in [1, {window_samples}]")
        if n_fft < window_samples:
            raise ParameterError(f"n_fft={n_fft} must be >= window_samples={window_samples}")
        if hop_samples <= 0:
            raise ParameterError(f"hop_samples={hop_samples} must be > 0")
        self.m, self.m_min, self.hop = window_samples, min_window_samples, hop_samples
        self.n_fft, self.with_derivative = n_fft, with_derivative
        self._windows = _WindowCache()
        self.reset()

    def reset(self) -> None:
        self.count = 0
        self._values = np.empty(0)
        self._times = np.empty(0)

    def update(self, values: np.ndarray, times: np.ndarray) -> Columns:
        """Append analysis samples; return the columns of the hops they complete."""
        before = self.count
        self.count += len(values)
        ext_v = np.concatenate((self._values, values))
        ext_t = np.concatenate((self._times, times))
        offset = before - len(self._values)  # count of samples before ext_v[0]
        counts = hop_counts(before, self.count, self.hop)
        counts = counts[counts >= self.m_min]
        frames, first = [], []
        for c in counts:
            length = min(self.m, int(c))
            end = int(c) - offset
            frames.append((ext_v[end - length:end], ext_t[end - length:end]))
            first.append(int(c) - length)
        keep = min(len(ext_v), self.m)
        self._values = ext_v[len(ext_v) - keep:].copy()
        self._times = ext_t[len(ext_t) - keep:].copy()
        return self._columns(frames, np.asarray(first, dtype=np.int64), counts)

    def _columns(self, frames, first, counts) -> Columns:
        if not frames:
            n_bins = self.n_fft // 2 + 1
            e = np.empty(0)
            return Columns(np.empty((0, n_bins), complex),
                           np.empty((0, n_bins), complex) if self.with_derivative else None,
                           e, e, first, counts)
        spectra, spectra_dw = frames_to_columns(frames, self.n_fft, self.with_derivative,
                                                self._windows)
        t_first = np.array([f[1][0] for f in frames])
        t_last = np.array([f[1][-1] for f in frames])
        return Columns(spectra, spectra_dw, 0.5 * (t_first + t_last), t_last, first, counts)


def stft_batch(values: np.ndarray, times: np.ndarray, window_samples: int,
               min_window_samples: int, hop_samples: float, n_fft: int,
               with_derivative: bool = False) -> Columns:
    """All columns of a whole signal in one call (the batch twin of :class:`SlidingSTFT`)."""
    counts = hop_counts(0, len(values), hop_samples)
    counts = counts[counts >= min_window_samples]
    lengths = np.minimum(window_samples, counts)
    frames = [(values[c - L:c], times[c - L:c]) for c, L in zip(counts, lengths)]
    sliding = SlidingSTFT(window_samples, min_window_samples, hop_samples, n_fft,
                          with_derivative)
    return sliding._columns(frames, (counts - lengths).astype(np.int64), counts)
