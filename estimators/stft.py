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
import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy.signal import get_window

from estimators.errors import ParameterError
from estimators.stage import concat_fields


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

    def channel(self, c: int) -> "Columns":
        """Channel ``c`` of columns with a channel axis (views)."""
        pick = (lambda a: None if a is None else a[c])
        return Columns(pick(self.spectra), pick(self.spectra_dw), self.time_s,
                       self.emitted_s, self.first_count, self.last_count,
                       self.aux_before[:, c], self.aux_last[:, c], pick(self.recent))

    def hops(self, index) -> "Columns":
        """The hops ``index`` (a slice or index array) of columns with a channel axis."""
        pick = (lambda a: None if a is None else a[:, index])
        return Columns(pick(self.spectra), pick(self.spectra_dw), self.time_s[index],
                       self.emitted_s[index], self.first_count[index],
                       self.last_count[index], self.aux_before[:, :, index],
                       self.aux_last[:, :, index], pick(self.recent))

    @staticmethod
    def concat(parts) -> "Columns":
        """Columns (with a channel axis) one after the other in time."""
        return concat_fields(parts, {"spectra": 1, "spectra_dw": 1, "time_s": 0,
                                     "emitted_s": 0, "first_count": 0, "last_count": 0,
                                     "aux_before": 2, "aux_last": 2, "recent": 1})


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
    if p_hi - p_lo < 8:  # a live step: a hop or two, cheaper without arrays
        found = [c for c in (math.floor(p * hop_samples + 1e-9)
                             for p in range(max(p_lo, 1), p_hi + 1))
                 if count_before < c <= count_after]
        return np.array(found, dtype=np.int64)
    p = np.arange(max(p_lo, 1), p_hi + 1)
    c = np.floor(p * hop_samples + 1e-9).astype(np.int64)
    return c[(c > count_before) & (c <= count_after)]


FFT_ROWS = 32
"""Rows per FFT call when many columns are transformed at once: numpy's FFT costs
about a third as much per row in calls of 16-64 rows as in single calls, but more again
in calls of hundreds of rows (whose arrays leave the cache; measured on 2048-point
transforms on the development machine). Each row is its own transform, so the
grouping never changes a value."""


def fft_rows(transform, x: np.ndarray, n: int) -> np.ndarray:
    """``transform(x, n, axis=-1)`` (``np.fft.rfft`` or ``np.fft.irfft``) in calls of at
    most :data:`FFT_ROWS` rows written in place; ``x`` has any leading axes."""
    n_rows = x.size // x.shape[-1] if x.shape[-1] else 0
    if n_rows <= FFT_ROWS:
        return transform(x, n, axis=-1)
    rows = x.reshape(n_rows, x.shape[-1])
    complex_out = transform is np.fft.rfft
    out = np.empty((n_rows, n // 2 + 1 if complex_out else n),
                   dtype=np.complex128 if complex_out else np.float64)
    for a in range(0, n_rows, FFT_ROWS):
        transform(rows[a:a + FFT_ROWS], n, axis=-1, out=out[a:a + FFT_ROWS])
    return out.reshape(x.shape[:-1] + out.shape[-1:])


@functools.lru_cache(maxsize=64)
def _window(length: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`analysis_window`, computed once per length (read-only arrays)."""
    w, dw = analysis_window(length)
    w.flags.writeable = False
    dw.flags.writeable = False
    return w, dw


@dataclass(frozen=True)
class Samples:
    """Input of the STFT stage: ``values`` (C, n) of C channels on one time axis,
    ``timestamps`` (n,), and ``aux`` (A, C, n) auxiliary series carried beside the
    frames (running counts). :class:`estimators.preprocess.Analysis` has the same
    attributes and is what a path feeds."""

    values: np.ndarray
    timestamps: np.ndarray
    aux: np.ndarray

    def __len__(self) -> int:
        return len(self.timestamps)


@dataclass
class SpectrumState:
    """Samples seen (``count``) and the newest ``m + 1`` of them (values (C, K), times
    (K,), aux (A, C, K)); None before the first input."""

    count: int = 0
    values: np.ndarray | None = None
    times: np.ndarray | None = None
    aux: np.ndarray | None = None


@dataclass(frozen=True)
class SpectrumStage:
    """Stage (:mod:`estimators.stage`): the sliding STFT of C channels on one time axis.

    Input :class:`Samples` (or :class:`estimators.preprocess.Analysis`); output
    :class:`Columns` with a leading channel axis (``spectra`` (C, P, n_fft // 2 + 1),
    ``aux_before``/``aux_last`` (A, C, P)); all channels' frames of a step go through
    one FFT call per frame length. :meth:`batch` forms every column of a whole record
    from its hop schedule (:func:`hop_counts`); :meth:`blocks` the same in blocks.

    Parameters
    ----------
    window_samples, min_window_samples : ``m`` and ``m_min``.
    hop_samples : hop in analysis samples (may be fractional).
    n_fft : FFT length (>= ``window_samples``).
    with_derivative : also form the derivative-window columns (for reassignment).
    recent_samples : also form the end-weighted column of the newest this many samples
        of each frame (0: none; see the module notes).
    """

    window_samples: int
    min_window_samples: int
    hop_samples: float
    n_fft: int
    with_derivative: bool = False
    recent_samples: int = 0

    def __post_init__(self):
        window, min_window = self.window_samples, self.min_window_samples
        # A periodic Hann of one sample is all zero, so frames need at least two.
        if not 2 <= min_window <= window:
            raise ParameterError(
                f"min_window_samples={min_window} must be in [2, {window}]")
        if self.n_fft < window:
            raise ParameterError(f"n_fft={self.n_fft} must be >= window_samples={window}")
        if self.hop_samples <= 0:
            raise ParameterError(f"hop_samples={self.hop_samples} must be > 0")
        if self.recent_samples != 0 and not 2 <= self.recent_samples <= window:
            raise ParameterError(
                f"recent_samples={self.recent_samples} must be 0 or in [2, {window}]")

    def initial_state(self) -> SpectrumState:
        return SpectrumState()

    @staticmethod
    def _arrays(x) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        values = np.asarray(x.values, dtype=np.float64)
        values = values[None] if values.ndim == 1 else values
        aux = np.asarray(x.aux, dtype=np.float64)
        aux = aux.reshape(len(aux), len(values), values.shape[1])
        return values, np.asarray(x.timestamps, dtype=np.float64), aux

    def step(self, state: SpectrumState, x) -> tuple[SpectrumState, "Columns"]:
        values, times, aux = self._arrays(x)
        if state.values is not None:
            if state.aux.shape[:2] != aux.shape[:2] or len(state.values) != len(values):
                raise ParameterError("the number of channels and of auxiliary series must "
                                     "not change")
            values = np.concatenate((state.values, values), axis=1)
            times = np.concatenate((state.times, times))
            aux = np.concatenate((state.aux, aux), axis=2)
        else:  # the state must not hold views of the caller's arrays
            values, times, aux = values.copy(), times.copy(), aux.copy()
        before = state.count
        count = before + len(x.timestamps)
        counts = hop_counts(before, count, self.hop_samples)
        counts = counts[counts >= self.min_window_samples]
        offset = count - values.shape[1]  # samples before index 0 of the buffer
        n_buffer = values.shape[1]
        keep = min(n_buffer, self.window_samples + 1)
        # The buffer was made here (concatenated), so the new state may hold views of
        # it; a copy only when most of it would otherwise be kept alive for nothing.
        tail = ((lambda a: a[..., n_buffer - keep:].copy()) if n_buffer > 2 * keep + 64
                else (lambda a: a[..., n_buffer - keep:]))
        new = SpectrumState(count, tail(values), tail(times), tail(aux))
        lengths = np.minimum(self.window_samples, counts)
        return new, self.columns(values, times, aux, counts - offset, lengths, counts)

    def _plan(self, x):
        values, times, aux = self._arrays(x)
        counts = hop_counts(0, values.shape[1], self.hop_samples)
        counts = counts[counts >= self.min_window_samples]
        return values, times, aux, counts, np.minimum(self.window_samples, counts)

    def batch(self, x) -> "Columns":
        values, times, aux, counts, lengths = self._plan(x)
        return self.columns(values, times, aux, counts, lengths, counts)

    def blocks(self, x, block_hops: int | None = None):
        """The columns of :meth:`batch` in consecutive blocks of at most ``block_hops``
        hops (default :data:`BATCH_BLOCK_HOPS`): a generator of :class:`Columns`."""
        block_hops = BATCH_BLOCK_HOPS if block_hops is None else int(block_hops)
        if block_hops < 1:
            raise ParameterError(f"block_hops={block_hops} must be >= 1")
        values, times, aux, counts, lengths = self._plan(x)
        for a in range(0, len(counts), block_hops):
            part = slice(a, a + block_hops)
            yield self.columns(values, times, aux, counts[part], lengths[part], counts[part])

    def split(self, x, bounds) -> list:
        return split_last_axis(x, bounds)

    def join(self, parts) -> "Columns":
        return Columns.concat(parts)

    def columns(self, values, times, aux, ends, lengths, counts) -> "Columns":
        """The columns whose frames end (exclusive) at buffer indices ``ends`` with
        ``lengths`` samples, at sample counts ``counts``: one FFT call per frame length
        for every channel's frames."""
        n_channels, n_bins, n_hops = len(values), self.n_fft // 2 + 1, len(counts)
        parts = {"spectra": [], "spectra_dw": [], "recent": []}
        # Frame lengths never decrease with the hop (the window grows, then stays), so
        # hops of one length are consecutive: one run each.
        cuts = ([0, n_hops] if n_hops < 2 or lengths[0] == lengths[-1] else
                [0, *(np.flatnonzero(np.diff(lengths)) + 1).tolist(), n_hops])
        for a, b in zip(cuts[:-1], cuts[1:]):
            if b == a:
                continue
            length = int(lengths[a])
            w, dw = _window(length)
            if b - a == 1:  # the live case: one hop, a view of the buffer
                end = int(ends[a])
                frames = values[:, None, end - length:end]
            else:
                frames = values[:, (ends[a:b] - length)[:, None] + np.arange(length)]
            parts["spectra"].append(fft_rows(np.fft.rfft, frames * w, self.n_fft))
            if self.with_derivative:
                parts["spectra_dw"].append(fft_rows(np.fft.rfft, frames * dw, self.n_fft))
            if self.recent_samples:
                r = min(self.recent_samples, length)
                parts["recent"].append(fft_rows(np.fft.rfft, frames[:, :, length - r:]
                                                * _window(r)[0], self.n_fft))

        def joined(name, wanted):
            if not wanted:
                return None
            if not parts[name]:
                return np.empty((n_channels, 0, n_bins), dtype=np.complex128)
            return (parts[name][0] if len(parts[name]) == 1
                    else np.concatenate(parts[name], axis=1))

        spectra = joined("spectra", True)
        spectra_dw = joined("spectra_dw", self.with_derivative)
        recent = joined("recent", self.recent_samples)
        starts = ends - lengths
        first = counts - lengths
        if n_hops:
            t_first, t_last = times[starts], times[ends - 1]
            aux_last = aux[:, :, ends - 1]
            aux_before = np.where(first > 0, aux[:, :, np.maximum(starts - 1, 0)], 0.0)
        else:
            t_first = t_last = np.empty(0)
            aux_last = aux_before = np.empty(aux.shape[:2] + (0,))
        return Columns(spectra, spectra_dw, 0.5 * (t_first + t_last), t_last, first,
                       np.asarray(counts, dtype=np.int64), aux_before, aux_last, recent)


def split_last_axis(x, bounds) -> list:
    """Cut a dataclass of arrays whose last axis is time at ``bounds`` (the ``split``
    of stages fed :class:`Samples` or :class:`estimators.preprocess.Analysis`)."""
    n = len(x.timestamps)
    edges = [0, *[int(b) for b in bounds], n]
    return [type(x)(**{f.name: getattr(x, f.name)[..., lo:hi]
                       for f in dataclasses.fields(x)})
            for lo, hi in zip(edges[:-1], edges[1:])]


def _single(values, times, aux) -> Samples:
    """One channel's samples and auxiliary series as the stage's input."""
    values = np.asarray(values, dtype=np.float64)
    aux = (np.stack([np.asarray(a, dtype=np.float64) for a in aux])[:, None, :] if len(aux)
           else np.empty((0, 1, len(values))))
    return Samples(values[None], np.asarray(times, dtype=np.float64), aux)


class SlidingSTFT:
    """Owns the state of a one-channel :class:`SpectrumStage`:
    ``update(values, times, aux=()) -> Columns`` (one channel: ``spectra`` (P, F),
    ``aux_before``/``aux_last`` (A, P)). Parameters as :class:`SpectrumStage`."""

    def __init__(self, window_samples: int, min_window_samples: int, hop_samples: float,
                 n_fft: int, with_derivative: bool = False, recent_samples: int = 0):
        self.stage = SpectrumStage(window_samples, min_window_samples, hop_samples, n_fft,
                                   with_derivative, int(recent_samples))
        self.m, self.m_min, self.hop = window_samples, min_window_samples, hop_samples
        self.n_fft, self.with_derivative = n_fft, with_derivative
        self.recent = int(recent_samples)
        self.reset()

    @property
    def count(self) -> int:
        return self.state.count

    def reset(self) -> None:
        self.state = self.stage.initial_state()

    def update(self, values: np.ndarray, times: np.ndarray, aux=()) -> "Columns":
        """Append analysis samples (and auxiliary series of the same length); return the
        columns of the hops they complete."""
        self.state, columns = self.stage.step(self.state, _single(values, times, aux))
        return columns.channel(0)


BATCH_BLOCK_HOPS = 1024
"""Hops per block of :func:`stft_blocks`. A block of complex columns holds
``BATCH_BLOCK_HOPS * (n_fft // 2 + 1)`` complex values (17 MB for the heart-rate grid's
2048-point FFT), however long the record; a caller keeps only what it makes of each
block (band spectra), so the whole-record columns (about 1 GB per hour of
heart-rate hops at 0.25 s) never exist at once. Columns are computed row by row, so
the block size does not change any value. Our own choice: large enough that the
per-block Python overhead is negligible (about 4 minutes of hops per block)."""


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
    stage = SpectrumStage(window_samples, min_window_samples, hop_samples, n_fft,
                          with_derivative, int(recent_samples))
    for block in stage.blocks(_single(values, times, aux), block_hops):
        yield block.channel(0)


def stft_batch(values: np.ndarray, times: np.ndarray, window_samples: int,
               min_window_samples: int, hop_samples: float, n_fft: int,
               with_derivative: bool = False, aux=(), recent_samples: int = 0) -> "Columns":
    """All columns of a whole signal in one call (the batch twin of :class:`SlidingSTFT`).

    It holds every complex column at once; :func:`stft_blocks` gives the same columns
    block by block for long records."""
    stage = SpectrumStage(window_samples, min_window_samples, hop_samples, n_fft,
                          with_derivative, int(recent_samples))
    return stage.batch(_single(values, times, aux)).channel(0)


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
