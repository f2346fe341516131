"""Ring buffers behind the live window, kept without Qt so they can be tested alone.

The window's timer drains runner updates into a :class:`DisplayBuffers` and draws what
it holds:

* :class:`RawTraceRing` - the last ``span_s`` seconds of raw samples of every channel;
* :class:`RateHistory` - per (quantity, source), the rates of the last minutes with
  their confidence and quality;
* :class:`SpectrogramRing` - per (quantity, source), a scrolling time-frequency image
  of the band spectra the ridge tracker saw, on a fixed time grid.

:class:`UpdateFeed` is the bounded hand-over between the engine thread and the window:
the engine side only calls ``put_nowait`` and counts what it had to drop, so a slow,
frozen or closed window never holds up estimation or the log.

All times are stream seconds (the source's clock). The window draws them relative to
the newest sample, so the right edge of every plot is "now".
"""

from __future__ import annotations

import math
import queue
import threading
from dataclasses import dataclass, field

import numpy as np

from streamer.display.snapshot import OutputInfo, describe_outputs  # noqa: F401 (re-export)
from streamer.display.state import DisplayState

TRACE_SPAN_S = 10.0
"""Seconds of raw signal shown per channel."""

RATE_SPAN_S = 300.0
"""Seconds of rate history shown (five minutes)."""

IMAGE_SPAN_S = 120.0
"""Seconds of time-frequency image shown."""

BAND_FLOOR = 0.25
"""Lowest confidence used to widen the confidence band (caps the band at four times
the profile's confidence half-width)."""


def confidence_band(rate: np.ndarray, confidence: np.ndarray,
                    halfwidth_per_min: float) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper edge of the band drawn around a rate curve.

    The engine's confidence ``c`` is the tracker's posterior mass within
    ``+-halfwidth_per_min`` of the reported rate. The band is drawn as
    ``rate +- halfwidth_per_min / max(c, BAND_FLOOR)``: as wide as that interval when the
    tracker is sure, wider as its mass spreads. It is a visual cue of our own making,
    not a calibrated interval.

    Parameters
    ----------
    rate : rates per minute (NaN where there is no estimate).
    confidence : confidences in [0, 1], same shape.
    halfwidth_per_min : the profile's ``confidence_halfwidth_per_min``.

    Returns
    -------
    lower, upper : arrays like ``rate``; NaN where ``rate`` is NaN.

    Examples
    --------
    >>> lo, hi = confidence_band(np.array([60.0, 60.0]), np.array([1.0, 0.5]), 4.0)
    >>> lo.tolist(), hi.tolist()
    ([56.0, 52.0], [64.0, 68.0])
    """
    rate = np.asarray(rate, dtype=np.float64)
    conf = np.nan_to_num(np.asarray(confidence, dtype=np.float64), nan=0.0)
    half = halfwidth_per_min / np.maximum(conf, BAND_FLOOR)
    return rate - half, rate + half


def rate_axis_range(rates: np.ndarray, min_span: float, step: float) -> tuple | None:
    """Vertical range for a rate plot: the finite ``rates`` with a margin, at least
    ``min_span`` wide, its ends rounded out to multiples of ``step`` (so the axis only
    moves when the data leave it). None when there is no finite rate.

    Examples
    --------
    >>> rate_axis_range(np.array([71.0, 74.0, np.nan]), 20.0, 5.0)
    (60.0, 85.0)
    """
    finite = np.asarray(rates, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    if len(finite) == 0:
        return None
    lo, hi = float(finite.min()), float(finite.max())
    margin = 0.1 * (hi - lo)
    lo, hi = lo - margin, hi + margin
    if hi - lo < min_span:
        centre = 0.5 * (lo + hi)
        lo, hi = centre - min_span / 2, centre + min_span / 2
    return (math.floor(lo / step) * step, math.ceil(hi / step) * step)


class FramePacer:
    """Chooses the window's redraw interval so that it uses at most ``share`` of one
    core: the engine runs in the same interpreter and must keep real time.

    Give it, on every tick, the wall clock and the drawing thread's CPU clock
    (:func:`time.thread_time`); it lengthens the interval by a quarter while the recent
    CPU share is above ``share`` and shortens it by a tenth while it is below
    ``0.7 * share``, between ``fastest_s`` and ``slowest_s``.

    Examples
    --------
    >>> pacer = FramePacer(fastest_s=0.04, slowest_s=0.5, share=0.5)
    >>> [round(pacer.tick(0.1 * k, 0.09 * k), 3) for k in range(4)]  # drawing uses 90 %
    [0.04, 0.05, 0.062, 0.078]
    """

    def __init__(self, fastest_s: float = 1 / 30, slowest_s: float = 0.5,
                 share: float = 0.5, window_s: float = 1.0):
        if not 0 < fastest_s <= slowest_s:
            raise ValueError(f"{fastest_s=} and {slowest_s=} must satisfy 0 < fastest <= slowest")
        if not 0 < share <= 1:
            raise ValueError(f"{share=} must be in (0, 1]")
        self.fastest_s, self.slowest_s, self.share = fastest_s, slowest_s, share
        self.window_s = window_s
        self.interval_s = fastest_s
        self._history: list = []

    def tick(self, wall_s: float, cpu_s: float) -> float:
        """Record one tick; return the interval until the next one (seconds)."""
        self._history.append((wall_s, cpu_s))
        while len(self._history) > 2 and wall_s - self._history[1][0] >= self.window_s:
            self._history.pop(0)
        (w0, c0), (w1, c1) = self._history[0], self._history[-1]
        if w1 > w0:
            used = (c1 - c0) / (w1 - w0)
            if used > self.share:
                self.interval_s = min(self.interval_s * 1.25, self.slowest_s)
            elif used < 0.7 * self.share:
                self.interval_s = max(self.interval_s / 1.1, self.fastest_s)
        return self.interval_s


class UpdateFeed:
    """Bounded, never-blocking hand-over of runner updates to the window.

    Parameters
    ----------
    maxsize : updates held at most; further ones are dropped and counted.

    Examples
    --------
    >>> feed = UpdateFeed(maxsize=2)
    >>> for k in range(5):
    ...     feed.listener(k)
    >>> feed.drain(), feed.dropped
    ([0, 1], 3)
    """

    def __init__(self, maxsize: int = 1024):
        self._queue: queue.Queue = queue.Queue(maxsize=maxsize)
        self._lock = threading.Lock()
        self.dropped = 0

    def listener(self, update) -> None:
        """Engine-side hook: ``put_nowait``, or count a drop when the queue is full."""
        try:
            self._queue.put_nowait(update)
        except queue.Full:
            with self._lock:
                self.dropped += 1

    def drain(self, limit: int | None = None) -> list:
        """Everything queued now (at most ``limit`` items), oldest first."""
        items = []
        while limit is None or len(items) < limit:
            try:
                items.append(self._queue.get_nowait())
            except queue.Empty:
                break
        return items


class RawTraceRing:
    """The last ``span_s`` seconds of samples of every channel.

    Parameters
    ----------
    n_channels : columns of the chunks pushed.
    fs : nominal sampling rate (Hz); with ``span_s`` it sets the capacity.
    span_s : seconds kept.
    """

    def __init__(self, n_channels: int, fs: float, span_s: float = TRACE_SPAN_S):
        if n_channels < 1:
            raise ValueError(f"{n_channels=} must be >= 1")
        if not (math.isfinite(fs) and fs > 0):
            raise ValueError(f"{fs=} must be a finite rate > 0 Hz")
        if not span_s > 0:
            raise ValueError(f"{span_s=} must be > 0")
        self.span_s = float(span_s)
        # 5 % more than the nominal count: a stream running a little fast still fills
        # the whole span.
        self.capacity = int(math.ceil(1.05 * span_s * fs)) + 2
        self._x = np.full((self.capacity, n_channels), np.nan)
        self._t = np.full(self.capacity, np.nan)
        self.count = 0  # samples pushed since the start
        self.version = 0  # bumped on every push (the window redraws when it changes)

    def push(self, samples: np.ndarray, timestamps: np.ndarray) -> None:
        """Append a chunk ``(n, n_channels)`` with timestamps ``(n,)``."""
        samples = np.asarray(samples, dtype=np.float64)
        timestamps = np.asarray(timestamps, dtype=np.float64)
        n = len(timestamps)
        if n == 0:
            return
        if samples.shape != (n, self._x.shape[1]):
            raise ValueError(f"samples.shape={samples.shape} must be ({n}, {self._x.shape[1]})")
        if n > self.capacity:
            samples, timestamps = samples[-self.capacity:], timestamps[-self.capacity:]
            self.count += n - self.capacity
            n = self.capacity
        start = self.count % self.capacity
        first = min(n, self.capacity - start)
        self._x[start:start + first] = samples[:first]
        self._t[start:start + first] = timestamps[:first]
        self._x[:n - first] = samples[first:]
        self._t[:n - first] = timestamps[first:]
        self.count += n
        self.version += 1

    @property
    def newest_s(self) -> float:
        """Timestamp of the newest sample (NaN before the first)."""
        if self.count == 0:
            return math.nan
        return float(self._t[(self.count - 1) % self.capacity])

    def view(self) -> tuple[np.ndarray, np.ndarray]:
        """``(timestamps (K,), samples (K, n_channels))`` of the last ``span_s``
        seconds, oldest first (copies)."""
        held = min(self.count, self.capacity)
        order = (np.arange(self.count - held, self.count)) % self.capacity
        t, x = self._t[order], self._x[order]
        if held:
            keep = t > t[-1] - self.span_s
            t, x = t[keep], x[keep]
        return t, x


@dataclass
class RateView:
    """The part of a :class:`RateHistory` inside its span, oldest first."""

    time_s: np.ndarray
    rate_per_min: np.ndarray
    confidence: np.ndarray
    quality: np.ndarray

    def __len__(self) -> int:
        return len(self.time_s)


class RateHistory:
    """Rates of one (quantity, source) over the last ``span_s`` seconds.

    Parameters
    ----------
    span_s : seconds kept, counted back from the newest estimate's ``time_s``.
    hop_s : the output's hop; with ``span_s`` it sets the capacity (twice the hops in
        the span, since hops on a decimated grid may come closer than ``hop_s``).
    """

    def __init__(self, span_s: float = RATE_SPAN_S, hop_s: float = 0.25):
        if not span_s > 0 or not hop_s > 0:
            raise ValueError(f"{span_s=} and {hop_s=} must be > 0")
        self.span_s = float(span_s)
        self.capacity = int(math.ceil(2 * span_s / hop_s)) + 16
        self._data = np.full((4, self.capacity), np.nan)
        self.count = 0
        self.version = 0

    def push(self, time_s, rate_per_min, confidence, quality) -> None:
        """Append estimates (arrays of equal length, in time order)."""
        rows = np.array([time_s, rate_per_min, confidence, quality], dtype=np.float64)
        rows = rows.reshape(4, -1)
        n = rows.shape[1]
        if n == 0:
            return
        if n > self.capacity:
            rows = rows[:, -self.capacity:]
            self.count += n - self.capacity
            n = self.capacity
        idx = (self.count + np.arange(n)) % self.capacity
        self._data[:, idx] = rows
        self.count += n
        self.version += 1

    def push_estimates(self, estimates) -> None:
        """Append :class:`~estimators.estimate.Estimate` records (one output's, in order)."""
        if estimates:
            self.push(*zip(*((e.time_s, e.rate_per_min, e.confidence, e.quality)
                             for e in estimates)))

    def view(self) -> RateView:
        held = min(self.count, self.capacity)
        order = np.arange(self.count - held, self.count) % self.capacity
        data = self._data[:, order]
        if held:
            data = data[:, data[0] > data[0, -1] - self.span_s]
        return RateView(*data)


class SpectrogramRing:
    """A scrolling time-frequency image on a fixed grid of time bins.

    Each pushed column (one hop's band spectrum) is scaled to a peak of 1 and written
    into the bin of its time, ``floor(time_s / bin_s)``. Bins skipped by at most
    ``hold_bins`` (hops that are not a whole number of bins apart) repeat the newer
    column, so the image has no stripes; longer skips (a gap in the stream) stay empty.

    Parameters
    ----------
    n_freqs : bins of each spectrum.
    span_s : seconds shown.
    bin_s : width of a time bin (the output's hop).
    hold_bins : longest skip filled by repeating a column.
    """

    def __init__(self, n_freqs: int, span_s: float = IMAGE_SPAN_S, bin_s: float = 0.25,
                 hold_bins: int = 2):
        if n_freqs < 1:
            raise ValueError(f"{n_freqs=} must be >= 1")
        if not span_s > 0 or not bin_s > 0:
            raise ValueError(f"{span_s=} and {bin_s=} must be > 0")
        self.bin_s = float(bin_s)
        self.n_bins = max(2, int(math.ceil(span_s / bin_s)))
        self.hold_bins = int(hold_bins)
        self._image = np.zeros((self.n_bins, n_freqs))
        self.newest_bin: int | None = None
        self.version = 0

    def push(self, time_s: np.ndarray, spectra: np.ndarray) -> None:
        """Add columns ``spectra (P, n_freqs)`` at ``time_s (P,)`` (in time order)."""
        time_s = np.asarray(time_s, dtype=np.float64)
        spectra = np.asarray(spectra, dtype=np.float64)
        if len(time_s) == 0:
            return
        if spectra.shape != (len(time_s), self._image.shape[1]):
            raise ValueError(f"spectra.shape={spectra.shape} must be "
                             f"({len(time_s)}, {self._image.shape[1]})")
        clean = np.nan_to_num(spectra, nan=0.0, posinf=0.0, neginf=0.0)
        peak = clean.max(axis=1, keepdims=True)
        scaled = np.where(peak > 0, clean / np.where(peak > 0, peak, 1.0), 0.0)
        for t, column in zip(time_s, scaled):
            if math.isfinite(t):
                self._put(int(math.floor(t / self.bin_s)), column)
        self.version += 1

    def _put(self, b: int, column: np.ndarray) -> None:
        n = self.n_bins
        newest = self.newest_bin
        if newest is None or b >= newest + n or b <= newest - n:
            # First column, a skip longer than the image, or a clock that went back a
            # whole image (a new stream): start afresh.
            self._image[:] = 0.0
            self.newest_bin = newest = b
        elif b > newest:
            skipped = np.arange(newest + 1, b) % n
            self._image[skipped] = column if b - newest - 1 <= self.hold_bins else 0.0
            self.newest_bin = b
        self._image[b % n] = column

    def image(self) -> tuple[np.ndarray, float, float]:
        """``(image (n_bins, n_freqs), start_s, end_s)``: oldest bin first; the image
        covers stream times ``[start_s, end_s)``. Before the first push, an image of
        zeros with NaN times."""
        if self.newest_bin is None:
            return self._image.copy(), math.nan, math.nan
        n = self.n_bins
        order = np.arange(self.newest_bin + 1, self.newest_bin + 1 + n) % n
        end_s = (self.newest_bin + 1) * self.bin_s
        return self._image[order], end_s - n * self.bin_s, end_s


@dataclass(frozen=True)
class DisplayLayout:
    """What the window lays out: the channels and the outputs of the engine.

    Attributes
    ----------
    channels : ``(name, kind)`` in the column order of ``Update.chunk``.
    fs : sampling rate of the channels (Hz).
    outputs : :class:`OutputInfo` per reported (quantity, source): heart rates first
        (the fused one last among them), then breathing rates.
    """

    channels: tuple
    fs: float
    outputs: tuple

    @property
    def keys(self) -> tuple:
        """The (quantity, source) pairs, in display order."""
        return tuple(o.key for o in self.outputs)

    def output(self, key) -> OutputInfo:
        return next(o for o in self.outputs if o.key == tuple(key))

    @classmethod
    def from_monitor(cls, monitor) -> "DisplayLayout":
        """The layout of a :class:`~estimators.monitor.RateMonitor`
        (:func:`streamer.display.snapshot.describe_outputs`)."""
        return cls(tuple(monitor.channels), float(monitor.fs), describe_outputs(monitor))


class DisplayBuffers:
    """Everything the window draws, fed by runner updates.

    Parameters
    ----------
    layout : what the engine produces.
    trace_span_s, rate_span_s, image_span_s : seconds shown by each kind of plot.
    """

    def __init__(self, layout: DisplayLayout, trace_span_s: float = TRACE_SPAN_S,
                 rate_span_s: float = RATE_SPAN_S, image_span_s: float = IMAGE_SPAN_S):
        self.layout = layout
        self.state = DisplayState()
        self.raw = RawTraceRing(len(layout.channels), layout.fs, trace_span_s)
        self.rates = {o.key: RateHistory(rate_span_s, o.hop_s) for o in layout.outputs}
        self.images = {o.key: SpectrogramRing(len(o.grid), image_span_s, o.hop_s)
                       for o in layout.outputs if o.grid is not None}

    @property
    def now_s(self) -> float:
        """Stream time of the newest sample: the right edge of every plot."""
        return self.raw.newest_s

    def apply(self, update) -> None:
        """Take one runner update."""
        self.state.apply(update)
        if update.chunk is not None and len(update.chunk):
            self.raw.push(update.chunk.samples, update.chunk.timestamps)
        if update.snapshot is not None:
            for key, band in update.snapshot.spectra.items():
                if key in self.images and len(band):
                    self.images[key].push(band.time_s, band.spectra)
        by_output: dict = {}
        for est in update.estimates:
            by_output.setdefault((est.quantity, est.source), []).append(est)
        for key, estimates in by_output.items():
            if key in self.rates:
                self.rates[key].push_estimates(estimates)
