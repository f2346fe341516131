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

The newest part of the window
-----------------------------
With ``recent_samples = r > 0`` each hop also gets a second, end-weighted column: the
newest ``min(r, L_p)`` samples of the same frame under their own periodic Hann (unit
sum), zero-padded to the same ``n_fft`` (so it lies on the same frequency grid). It
describes the centre of that short span, ``r / 2`` samples before the newest one
instead of ``m / 2``: when the rate changes, its peak moves there seconds before the
full column's does (:mod:`estimators.rate_now` uses it to see a new rate early).
"""

from __future__ import annotations

import dataclasses
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
    span, ``(first, last]``. ``aux_before`` and ``aux_last`` (A, P) hold the values of
    carried auxiliary series (running counts) at the sample just before each frame (0
    when the frame starts at the first sample) and at its last sample. ``recent``
    (P, n_fft // 2 + 1) complex: the end-weighted columns of the newest part of each
    frame (see the module notes), or None when not asked for.
    """

    spectra: np.ndarray
    spectra_dw: np.ndarray | None
    time_s: np.ndarray
    emitted_s: np.ndarray
    first_count: np.ndarray
    last_count: np.ndarray
    aux_before: np.ndarray | None = None
    aux_last: np.ndarray | None = None
    recent: np.ndarray | None = None

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
    if len(frames) == 1 and not with_derivative:  # the live case: one hop per update
        w, _ = windows.get(len(frames[0][0]))
        return np.fft.rfft(frames[0][0] * w, n_fft)[None, :], None
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
    recent_samples : also form the end-weighted column of the newest this many samples
        of each frame (0: none; see the module notes).
    """

    def __init__(self, window_samples: int, min_window_samples: int, hop_samples: float,
                 n_fft: int, with_derivative: bool = False, recent_samples: int = 0):
        # A periodic Hann of one sample is all zero, so frames need at least two.
        if not 2 <= min_window_samples <= window_samples:
            raise ParameterError(
                f"min_window_samples={min_window_samples} must be in [2, {window_samples}]")
        if n_fft < window_samples:
            raise ParameterError(f"n_fft={n_fft} must be >= window_samples={window_samples}")
        if hop_samples <= 0:
            raise ParameterError(f"hop_samples={hop_samples} must be > 0")
        if recent_samples != 0 and not 2 <= recent_samples <= window_samples:
            raise ParameterError(
                f"recent_samples={recent_samples} must be 0 or in [2, {window_samples}]")
        self.recent = int(recent_samples)
        self.m, self.m_min, self.hop = window_samples, min_window_samples, hop_samples
        self.n_fft, self.with_derivative = n_fft, with_derivative
        self._windows = _WindowCache()
        self.reset()

    def reset(self) -> None:
        self.count = 0
        self._rows = 0  # 2 + number of auxiliary series, fixed at the first update
        self._buf = np.empty((0, 0))
        self._len = 0

    def _append(self, rows: list) -> None:
        n = len(rows[0])
        if self._buf.shape[0] != len(rows):
            if self.count:
                raise ParameterError("the number of auxiliary series must not change")
            self._buf = np.empty((len(rows), 2 * self.m + 256))
            self._len = 0
        if self._len + n > self._buf.shape[1]:
            keep = min(self._len, self.m + 1)
            cap = max(self._buf.shape[1], 2 * (keep + n))
            buf = np.empty((len(rows), cap))
            buf[:, :keep] = self._buf[:, self._len - keep:self._len]
            self._buf, self._len = buf, keep
        for i, row in enumerate(rows):
            self._buf[i, self._len:self._len + n] = row
        self._len += n

    def update(self, values: np.ndarray, times: np.ndarray, aux=()) -> Columns:
        """Append analysis samples (and auxiliary series of the same length); return the
        columns of the hops they complete."""
        before = self.count
        self._append([values, times, *aux])
        self.count += len(values)
        offset = self.count - self._len  # count of samples before buffer index 0
        counts = []
        p = max(1, int(before // self.hop))
        while True:
            c = int(np.floor(p * self.hop + 1e-9))
            if c > self.count:
                break
            if c > before and c >= self.m_min:
                counts.append(c)
            p += 1
        counts = np.array(counts, dtype=np.int64)
        lengths = np.minimum(self.m, counts)
        ends = counts - offset
        return self._columns(self._buf, ends, lengths, counts)

    def _columns(self, buf, ends, lengths, counts) -> Columns:
        n_bins = self.n_fft // 2 + 1
        n_aux = buf.shape[0] - 2
        if len(counts) == 0:
            e = np.empty(0)
            return Columns(np.empty((0, n_bins), complex),
                           np.empty((0, n_bins), complex) if self.with_derivative else None,
                           e, e, counts, counts, np.empty((n_aux, 0)), np.empty((n_aux, 0)),
                           np.empty((0, n_bins), complex) if self.recent else None)
        frames = [(buf[0, e - L:e], buf[1, e - L:e]) for e, L in zip(ends, lengths)]
        spectra, spectra_dw = frames_to_columns(frames, self.n_fft, self.with_derivative,
                                                self._windows)
        recent = None
        if self.recent:
            tails = [(values[-self.recent:], times[-self.recent:]) for values, times in frames]
            recent, _ = frames_to_columns(tails, self.n_fft, False, self._windows)
        starts = ends - lengths
        t_first = buf[1, starts]
        t_last = buf[1, ends - 1]
        first = counts - lengths
        aux_last = buf[2:, ends - 1]
        aux_before = np.where(first > 0, buf[2:, np.maximum(starts - 1, 0)], 0.0)
        return Columns(spectra, spectra_dw, 0.5 * (t_first + t_last), t_last, first, counts,
                       aux_before, aux_last, recent)


BATCH_BLOCK_HOPS = 1024
"""Hops per block of :func:`stft_blocks`. A block of complex columns holds
``BATCH_BLOCK_HOPS * (n_fft // 2 + 1)`` complex values (17 MB for the heart-rate grid's
2048-point FFT), however long the record; a caller keeps only what it makes of each
block (band spectra), so the whole-record columns (about 1 GB per hour of
heart-rate hops at 0.25 s) never exist at once. Columns are computed row by row, so
the block size does not change any value. Our own choice: large enough that the
per-block Python overhead is negligible (about 4 minutes of hops per block)."""


def _batch_plan(values, times, window_samples: int, min_window_samples: int,
                hop_samples: float, n_fft: int, with_derivative: bool, aux,
                recent_samples: int = 0):
    """The validated :class:`SlidingSTFT`, the signal buffer and the hop counts and
    window lengths of every column of a whole record."""
    sliding = SlidingSTFT(window_samples, min_window_samples, hop_samples, n_fft,
                          with_derivative, recent_samples)  # validates the parameters first
    counts = hop_counts(0, len(values), hop_samples)
    counts = counts[counts >= min_window_samples]
    lengths = np.minimum(window_samples, counts)
    buf = np.vstack([np.asarray(values, dtype=np.float64), np.asarray(times, dtype=np.float64),
                     *[np.asarray(a, dtype=np.float64) for a in aux]]) if len(values) else \
        np.empty((2 + len(aux), 0))
    return sliding, buf, counts, lengths


def batch_hop_count(n_values: int, min_window_samples: int, hop_samples: float) -> int:
    """How many columns :func:`stft_batch` forms from ``n_values`` analysis samples."""
    counts = hop_counts(0, n_values, hop_samples)
    return int(np.count_nonzero(counts >= min_window_samples))


def stft_blocks(values: np.ndarray, times: np.ndarray, window_samples: int,
                min_window_samples: int, hop_samples: float, n_fft: int,
                with_derivative: bool = False, aux=(), block_hops: int | None = None,
                recent_samples: int = 0):
    """The columns of :func:`stft_batch` in consecutive blocks of at most
    ``block_hops`` hops (default :data:`BATCH_BLOCK_HOPS`): a generator of
    :class:`Columns`, in hop order. Concatenated, the blocks are :func:`stft_batch`'s
    columns exactly (each column is its own FFT). Nothing is yielded when the record
    has no column."""
    block_hops = BATCH_BLOCK_HOPS if block_hops is None else int(block_hops)
    if block_hops < 1:
        raise ParameterError(f"block_hops={block_hops} must be >= 1")
    sliding, buf, counts, lengths = _batch_plan(values, times, window_samples,
                                                min_window_samples, hop_samples, n_fft,
                                                with_derivative, aux, recent_samples)
    for a in range(0, len(counts), block_hops):
        part = slice(a, a + block_hops)
        yield sliding._columns(buf, counts[part], lengths[part], counts[part])


def stft_batch(values: np.ndarray, times: np.ndarray, window_samples: int,
               min_window_samples: int, hop_samples: float, n_fft: int,
               with_derivative: bool = False, aux=(), recent_samples: int = 0) -> Columns:
    """All columns of a whole signal in one call (the batch twin of :class:`SlidingSTFT`).

    It holds every complex column at once; :func:`stft_blocks` gives the same columns
    block by block for long records."""
    sliding, buf, counts, lengths = _batch_plan(values, times, window_samples,
                                                min_window_samples, hop_samples, n_fft,
                                                with_derivative, aux, recent_samples)
    return sliding._columns(buf, counts, lengths, counts)


class HopGatherer:
    """Consecutive blocks of per-hop records (frozen dataclasses whose array fields
    have the hop on their first axis; None fields stay None) written into arrays of
    ``n_hops`` hops allocated at the first block: the record is held once, where a
    list of blocks and its concatenation would hold it twice.

    ``add(block)`` for each block in hop order, then ``result(empty)`` (``empty``: what
    to return when no block came)."""

    def __init__(self, n_hops: int):
        self.n_hops, self._filled, self._out = int(n_hops), 0, None

    def add(self, block) -> None:
        if self._out is None:
            self._out = {}
            for field in dataclasses.fields(block):
                part = getattr(block, field.name)
                self._out[field.name] = None if part is None else np.empty(
                    (self.n_hops,) + part.shape[1:], part.dtype)
        p, n = self._filled, len(block)
        for name, array in self._out.items():
            if array is not None:
                array[p:p + n] = getattr(block, name)
        self._filled += n

    def result(self, empty):
        if self._out is None:
            return empty
        if self._filled != self.n_hops:  # an inconsistent plan would leave garbage rows
            raise RuntimeError(f"{self._filled} hops gathered where {self.n_hops} were "
                               "planned")
        return type(empty)(**self._out)


def gather_hops(n_hops: int, blocks, empty):
    """The blocks of an iterable (consumed once) gathered by :class:`HopGatherer`."""
    gatherer = HopGatherer(n_hops)
    for block in blocks:
        gatherer.add(block)
    return gatherer.result(empty)
