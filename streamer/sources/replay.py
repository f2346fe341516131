"""Replay a :class:`~streamer.sources.base.Recording` as a live source.

:class:`RecordingSource` cuts a recording into chunks of about ``chunk_s`` seconds and
yields them like a live stream would. At ``speed`` N it paces the chunks so that stream
time advances N times as fast as wall time; at ``speed=inf`` it never sleeps. The
chunk boundaries depend only on the recording and ``chunk_s``, never on the speed, so an
estimator fed by a replay gives identical results at every speed. The recording's text
markers come as :class:`~streamer.sources.base.Marker` items at their place in time:
just before the chunk holding their time, so the same sequence of items at every speed.

The clock and the sleep function are injectable so that tests replay at full speed
while checking the pacing they would have done.
"""

from __future__ import annotations

import math
import threading
import time
from typing import Callable, Iterator

import numpy as np

from streamer.errors import InputError
from streamer.sources.base import Chunk, Item, Marker, Recording, SourceEvent

#: Longest single sleep: close() from another thread takes effect within this (wall) time.
_MAX_SLEEP_S = 0.1
#: Least wall time between two progress callbacks (at most ~10 per second).
_PROGRESS_EVERY_S = 0.1


def marker_order(markers) -> list[Marker]:
    """``markers`` sorted by time (a stable sort: equal times keep the file's order),
    those without a time (NaN) last."""
    timed = [m for m in markers if not math.isnan(m.time_s)]
    return sorted(timed, key=lambda m: m.time_s) + [m for m in markers
                                                    if math.isnan(m.time_s)]


class RecordingSource:
    """A recording replayed as a :class:`~streamer.sources.base.Source`.

    Parameters
    ----------
    recording : Recording
        What to replay.
    speed : float, default inf
        Stream seconds per wall second (> 0); ``inf`` replays as fast as the consumer
        takes the chunks.
    chunk_s : float, default 0.1
        Chunk length in seconds (> 0); each chunk holds ``max(1, round(chunk_s * fs))``
        samples, the last one what is left.
    clock : callable, optional
        Wall clock in seconds; default :func:`time.monotonic`.
    sleep : callable, optional
        Sleeps its argument in seconds; default :func:`time.sleep`.
    progress : callable, optional
        Called with the fraction of samples delivered (0 to 1), at most about ten times
        per wall second, and once with 1.0 at the end.

    Raises
    ------
    InputError
        When ``speed`` or ``chunk_s`` is not a positive number.

    Notes
    -----
    Pacing: a chunk whose last sample has timestamp :math:`t_b` is released at wall time
    :math:`w_0 + (t_b - t_0 + 1/f_s)/\\mathrm{speed}`, where :math:`t_0` is the first
    timestamp and :math:`w_0` the wall time of the first chunk request, i.e. once the
    stream has been "recorded" up to the end of that sample. The schedule is absolute,
    so a slow consumer does not accumulate drift; gaps in the timestamps are replayed
    as gaps in time.

    Examples
    --------
    >>> import numpy as np
    >>> from streamer.sources.base import ChannelInfo, Recording, SourceInfo
    >>> info = SourceInfo("demo", 10.0, (ChannelInfo("x"),))
    >>> rec = Recording(np.zeros((25, 1)), np.arange(25) / 10.0, info)
    >>> [len(c) for c in RecordingSource(rec, chunk_s=1.0).chunks() if hasattr(c, "samples")]
    [10, 10, 5]
    """

    def __init__(
        self,
        recording: Recording,
        speed: float = math.inf,
        chunk_s: float = 0.1,
        clock: Callable[[], float] | None = None,
        sleep: Callable[[float], None] | None = None,
        progress: Callable[[float], None] | None = None,
    ) -> None:
        if not (isinstance(speed, (int, float)) and speed > 0 and not math.isnan(speed)):
            raise InputError(f"replay speed {speed!r} must be a positive number (or inf)")
        if not (isinstance(chunk_s, (int, float)) and math.isfinite(chunk_s) and chunk_s > 0):
            raise InputError(f"replay chunk_s={chunk_s!r} must be a positive number of seconds")
        self.recording = recording
        self.info = recording.info
        self.speed = float(speed)
        self.chunk_s = float(chunk_s)
        self.chunk_samples = max(1, round(self.chunk_s * recording.info.fs))
        self._clock = clock if clock is not None else time.monotonic
        self._sleep = sleep if sleep is not None else time.sleep
        self._progress = progress
        self._closed = threading.Event()

    def close(self) -> None:
        """Stop the replay; a running :meth:`chunks` returns at its next step."""
        self._closed.set()

    def _speed_text(self) -> str:
        return "full speed" if math.isinf(self.speed) else f"{self.speed:g}x"

    def chunks(self) -> Iterator[Item]:
        """Yield a ``"replaying"`` event, the chunks in order, then an ``"end"`` event.

        Each of the recording's markers comes just before the first chunk whose last
        sample is at or after its time (markers before the first sample right after the
        ``"replaying"`` event, those after the last sample, or without a time, just
        before ``"end"``), in time order. Nothing more is yielded once :meth:`close` has
        been called.
        """
        rec = self.recording
        name = rec.info.name
        samples = np.asarray(rec.samples, dtype=np.float64)
        timestamps = np.asarray(rec.timestamps, dtype=np.float64)
        n = len(timestamps)
        if self._closed.is_set():
            return
        start_s = float(timestamps[0]) if n else math.nan
        yield SourceEvent("replaying", f"replaying {name} at {self._speed_text()}", start_s,
                          {"speed": self.speed, "duration_s": rec.duration_s})
        wall_start = self._clock()
        last_progress = -math.inf
        period_s = 1.0 / rec.info.fs
        markers = marker_order(rec.markers)
        m = 0  # next marker to yield
        for a in range(0, n, self.chunk_samples):
            b = min(a + self.chunk_samples, n)
            # Before the chunk that holds their time, so they reach the consumer ahead of
            # the samples after them however fast or slow the replay runs.
            while m < len(markers) and markers[m].time_s <= timestamps[b - 1]:
                if self._closed.is_set():
                    return
                yield markers[m]
                m += 1
            if not math.isinf(self.speed):
                due = wall_start + (timestamps[b - 1] - start_s + period_s) / self.speed
                if not self._wait_until(due):
                    return
            if self._closed.is_set():
                return
            yield Chunk(samples[a:b].copy(), timestamps[a:b].copy())
            if self._closed.is_set():
                return
            if self._progress is not None and b < n:
                now = self._clock()
                if now - last_progress >= _PROGRESS_EVERY_S:
                    last_progress = now
                    self._progress(b / n)
        for marker in markers[m:]:
            if self._closed.is_set():
                return
            yield marker
        if self._progress is not None:
            self._progress(1.0)
        end_s = float(timestamps[-1]) if n else math.nan
        yield SourceEvent("end", f"end of {name}", end_s)

    def _wait_until(self, due: float) -> bool:
        """Sleep until the wall clock reaches ``due``; False when closed meanwhile."""
        while True:
            if self._closed.is_set():
                return False
            remaining = due - self._clock()
            if remaining <= 0:
                return True
            self._sleep(min(remaining, _MAX_SLEEP_S))
