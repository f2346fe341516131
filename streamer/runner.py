"""Source -> engine -> sinks. Threads, shutdown and signals live here.

The :class:`Runner` pulls items from a source, feeds chunks to the engine
(:class:`estimators.monitor.RateMonitor`), writes every estimate to the log (flushed per
line) and the LSL outlet, and hands copies to listeners (the display) without ever
waiting for them. Text markers (:class:`~streamer.sources.base.Marker`) from the source
and from the user (:meth:`Runner.add_user_marker`) go to the log, the outlet and the
listeners in stream-time order with the rows (see :class:`MarkerQueue`). When the engine
restarts at a gap in the timestamps
(:func:`estimators.monitor.find_gaps`; any source, file replay included), a ``"gap"``
event goes into the log between the rows before and after it, unless the source
reported that hole itself. A stop request (Ctrl-C, SIGTERM, a closed window,
``--duration``) closes the source, so the loop ends at the next item or, when the source
is waiting for data (a lost stream), as soon as the source notices; the log is closed in
a ``finally`` block so it is complete up to the last hop processed.
"""

from __future__ import annotations

import logging
import math
import queue
import signal
import threading
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from estimators.config import Profile
from estimators.estimate import Estimate
from estimators.monitor import Gap, RateMonitor
from streamer.channels import Selected
from streamer.display.snapshot import DisplaySnapshot, take_snapshot
from streamer.sources.base import Chunk, Marker, SourceEvent

log = logging.getLogger("ridgewatch")

RATE_TOLERANCE = 0.01
"""Relative difference between the rate the timestamps show and the nominal rate above
which the user is warned. The engine counts samples at the nominal rate, so every rate
it reports is off by about the same fraction. Our own choice: a tenth of the heart-rate
tolerance of +-10 %."""


class RateCheck:
    """Compares the sampling rate the timestamps show with the nominal rate.

    Each ``window_s`` of samples, the rate is the number of regular steps (between 0
    and 2.5 sample periods, the gap rule of the LSL source) over their summed length:
    gaps, repeats and clock jumps are left out, and jitter cancels in the sum. When it
    differs from ``fs`` by more than :data:`RATE_TOLERANCE`, :meth:`update` returns one
    ``"irregular"`` event (once per run) saying how far the reported rates are off.
    """

    def __init__(self, fs: float, stream: str, window_s: float = 60.0):
        self.fs, self.stream = float(fs), stream
        self.window = max(2, int(window_s * fs))
        self.warned = False
        self._last_s, self._count, self._span_s = math.nan, 0, 0.0

    def update(self, timestamps: np.ndarray) -> SourceEvent | None:
        if self.warned or len(timestamps) == 0:
            return None
        steps = np.diff(np.concatenate(([self._last_s], timestamps)))
        self._last_s = float(timestamps[-1])
        regular = (steps > 0) & (steps <= 2.5 / self.fs)  # NaN steps compare False
        self._count += int(regular.sum())
        self._span_s += float(steps[regular].sum())
        if self._count < self.window:
            return None
        measured = self._count / self._span_s
        self._count, self._span_s = 0, 0.0
        if abs(measured / self.fs - 1.0) <= RATE_TOLERANCE:
            return None
        self.warned = True
        reads = self.fs / measured - 1.0  # a true rate f is reported as f * fs / measured
        return SourceEvent(
            "irregular",
            f"stream '{self.stream}' delivers {measured:.5g} samples per second of its own "
            f"timestamps, not its nominal {self.fs:g} Hz; rates are computed at the nominal "
            f"rate, so they read {100 * abs(reads):.1f} % {'low' if reads < 0 else 'high'}",
            float(timestamps[-1]), {"measured_fs": measured})


@dataclass
class RunStats:
    """What a run did, for the closing line and the tests."""

    chunks: int = 0
    samples: int = 0
    estimates: int = 0
    stream_start_s: float = math.nan
    stream_end_s: float = math.nan
    compute_s: float = 0.0
    stopped_by: str = ""
    events: list = field(default_factory=list)

    @property
    def stream_seconds(self) -> float:
        if math.isnan(self.stream_start_s):
            return 0.0
        return self.stream_end_s - self.stream_start_s


@dataclass(frozen=True)
class Update:
    """What listeners (the display) receive after each chunk, an event or markers."""

    estimates: list
    """The chunk's estimates, in the order they were logged."""
    chunk: Chunk | None
    """The chunk's samples of the selected channels (None for an event or markers)."""
    snapshot: DisplaySnapshot | None
    """What the engine made of the chunk (:mod:`streamer.display.snapshot`); None with
    no chunk."""
    event: SourceEvent | None = None
    markers: tuple = ()
    """Markers just written to the log (in stream-time order)."""
    hrv: tuple = ()
    """New ``(source, HrvRow)`` pairs of the beat session (``--beats``/``--hrv``)."""


USER_SOURCE = "user"
"""The ``source`` of markers the user adds during the run (a key in the window, a line
typed into the text display)."""


class MarkerQueue:
    """Markers waiting for the rows around them.

    A row's ``emitted_s`` is the time of the newest sample it used, and rows are written
    as their chunk is processed. A marker at time ``t`` is therefore written after every
    row with ``emitted_s <= t`` and before the first row with ``emitted_s > t``: it is
    held (:meth:`add`) until a row later than it is about to be written
    (:meth:`due` before it) or the samples have passed it (:meth:`due` after a chunk).
    A marker that arrives later than rows after it (a marker stream running behind the
    data) is written at once; its time still says where it belongs. A marker without a
    time (NaN) is never held.

    Examples
    --------
    >>> q = MarkerQueue()
    >>> q.add(Marker(5.0, "b")); q.add(Marker(2.0, "a")); q.add(Marker(9.0, "c"))
    >>> [m.text for m in q.due(4.0)], [m.text for m in q.due(5.0)], len(q)
    (['a'], ['b'], 1)
    >>> [m.text for m in q.due(math.inf)]
    ['c']
    """

    def __init__(self):
        self._held: list[Marker] = []

    def __len__(self) -> int:
        return len(self._held)

    def add(self, marker: Marker) -> None:
        """Hold ``marker``; markers come out by time, equal times in arrival order."""
        at = len(self._held)
        while at > 0 and not self._held[at - 1].time_s <= marker.time_s:
            at -= 1  # NaN compares False: a marker without a time goes first
        self._held.insert(at, marker)

    def due(self, until_s: float, inclusive: bool = True) -> list[Marker]:
        """Take the held markers with ``time_s <= until_s`` (``< until_s`` when not
        ``inclusive``) and those without a time, in order."""
        k = 0
        for marker in self._held:
            t = marker.time_s
            if math.isnan(t) or t < until_s or (inclusive and t == until_s):
                k += 1
            else:
                break
        taken, self._held = self._held[:k], self._held[k:]
        return taken


def gap_event(name: str, gap: Gap) -> SourceEvent:
    """The ``"gap"`` event of a hole in stream ``name``'s timestamps where the engine
    restarts: the same words in live, replay and offline logs."""
    return SourceEvent(
        "gap",
        f"stream '{name}' skipped {gap.missing_s:.3f} s of samples (timestamps jump "
        f"from {gap.before_s:.3f} s to {gap.after_s:.3f} s); estimates restart from the "
        f"samples after the gap",
        gap.after_s, {"missing_s": gap.missing_s, "before_s": gap.before_s, "restart": True})


class Runner:
    """Runs one source through the engine into the sinks.

    Parameters
    ----------
    source : any object following the source protocol.
    selected : channels chosen from the source (:func:`streamer.channels.select`).
    profile : engine profile.
    log : an :class:`~streamer.sinks.estimate_log.EstimateLog` or None.
    outlet : an estimate outlet with ``push(estimates)`` and ``close()``, or None.
    duration_s : stop after this many wall-clock seconds (None: run to the end), even
        while the source yields nothing (a lost stream).
    listeners : callables receiving an :class:`Update`; they must not block.
    clock : wall clock (injectable for tests).
    """

    def __init__(self, source, selected: list[Selected], profile: Profile, log=None,
                 outlet=None, duration_s: float | None = None,
                 listeners: list[Callable] | None = None, clock=time.monotonic):
        self.source, self.selected, self.profile = source, selected, profile
        self.log, self.outlet = log, outlet
        self.duration_s = duration_s
        self.listeners = list(listeners or [])
        self.clock = clock
        self.monitor = RateMonitor([(s.name, s.kind) for s in selected], source.info.fs, profile)
        self._columns = np.array([s.index for s in selected], dtype=np.int64)
        self.stop_event = threading.Event()
        self.stats = RunStats()
        self.stop_reason = ""
        self.rate_check = RateCheck(source.info.fs, source.info.name)
        self._announced_gap_s = math.nan  # time_s of the source's last "gap" event
        self.markers = MarkerQueue()
        self._user_markers: queue.SimpleQueue = queue.SimpleQueue()
        self._user_count = 0
        self._source_lost = False
        self.beat_session = None
        """A :class:`streamer.beat_session.BeatSession` (beats and HRV) or None."""

    def add_user_marker(self, text: str = "") -> None:
        """Add a marker of the user's own (source :data:`USER_SOURCE`). Safe from any
        thread (the window, a stdin reader): it only puts the text in a queue that the
        run loop drains before every item, stamping each marker with the stream time of
        the newest sample processed so far (so it falls in order with the rows, within
        one chunk of the call). Empty text becomes ``user marker N`` (N counts this
        run's user markers from 1). Markers added before the first sample wait for it;
        while the source yields nothing (a lost stream) they wait for its next item or
        the end of the run."""
        self._user_markers.put(str(text))

    def stop(self, reason: str = "stop requested") -> None:
        """Ask the loop to end at the next item (safe from any thread or signal handler)."""
        if not self.stop_event.is_set():
            self.stop_reason = reason
            self.stop_event.set()
        try:
            self.source.close()
        except Exception:  # closing is best effort; the loop ends on the event anyway
            pass

    def _notify(self, update: Update) -> None:
        # Over a copy: removing a broken listener must not skip the next one.
        for listener in list(self.listeners):
            try:
                listener(update)
            except Exception as exc:  # a broken display never stops estimation or logging
                log.warning("display listener failed and was removed: %s", exc)
                self.listeners.remove(listener)

    def _drain_user_markers(self, final: bool = False) -> None:
        if math.isnan(self.stats.stream_end_s) and not final:
            return  # no sample yet to stamp them with
        while True:
            try:
                text = self._user_markers.get_nowait()
            except queue.Empty:
                return
            self._user_count += 1
            self._handle_marker(Marker(self.stats.stream_end_s,
                                       text or f"user marker {self._user_count}", USER_SOURCE))

    def _handle_marker(self, marker: Marker) -> None:
        """Hold ``marker`` until the rows before it are written; write it at once when
        the samples have passed it, the source is lost (the next rows come after the
        comeback) or it has no time."""
        self.markers.add(marker)
        if self._source_lost:
            self._write_markers(self.markers.due(math.inf))
        else:
            self._write_markers(self.markers.due(self.stats.stream_end_s))

    def _write_markers(self, markers: list) -> None:
        if not markers:
            return
        for marker in markers:
            log.debug("marker %.3f %s: %s", marker.time_s, marker.source, marker.text)
            if self.log is not None:
                self.log.write_marker(marker)
        if self.outlet is not None and hasattr(self.outlet, "push_markers"):
            self.outlet.push_markers(markers, self.stats.stream_end_s)
        self._notify(Update([], None, None, markers=tuple(markers)))

    def _handle_chunk(self, chunk: Chunk) -> None:
        if len(chunk) == 0:
            return
        self._source_lost = False
        samples = chunk.samples[:, self._columns]
        start = time.perf_counter()
        estimates: list[Estimate] = self.monitor.update(samples, chunk.timestamps)
        elapsed = time.perf_counter() - start
        hrv = () if self.beat_session is None else tuple(
            self.beat_session.update(samples, chunk.timestamps))
        st = self.stats
        st.chunks += 1
        st.samples += len(chunk)
        st.compute_s += elapsed
        if math.isnan(st.stream_start_s):
            st.stream_start_s = float(chunk.timestamps[0])
        st.stream_end_s = float(chunk.timestamps[-1])
        rate_event = self.rate_check.update(chunk.timestamps)
        if rate_event is not None:
            self._handle_event(rate_event)
        hops = len({e.emitted_s for e in estimates}) or 1
        compute_ms = 1e3 * elapsed / hops
        written = 0
        for gap in self.monitor.last_gaps:
            # Rows from before the gap, then the gap, so the log reads in stream order.
            before = [e for e in estimates[written:] if e.emitted_s <= gap.before_s]
            self._write_estimates(before, compute_ms)
            written += len(before)
            self._engine_gap(gap)
        self._write_estimates(estimates[written:], compute_ms)
        self._write_markers(self.markers.due(st.stream_end_s))
        st.estimates += len(estimates)
        if self.listeners:
            view = Chunk(samples, chunk.timestamps)
            self._notify(Update(estimates, view, take_snapshot(self.monitor, estimates),
                                hrv=hrv))

    def _write_estimates(self, estimates: list, compute_ms: float) -> None:
        start = 0
        for k, est in enumerate(estimates):
            # Markers held for a time before this row go first, with the rows before them.
            markers = self.markers.due(est.emitted_s, inclusive=False) if len(
                self.markers) else []
            if markers:
                self._write_rows(estimates[start:k], compute_ms)
                start = k
                self._write_markers(markers)
        self._write_rows(estimates[start:], compute_ms)

    def _write_rows(self, estimates: list, compute_ms: float) -> None:
        if self.log is not None:
            for est in estimates:
                self.log.write(est, compute_ms)
        if self.outlet is not None and estimates:
            self.outlet.push(estimates)

    def _engine_gap(self, gap: Gap) -> None:
        """The engine restarted at a gap in the timestamps: a ``"gap"`` event in the log,
        unless the source reported this hole itself (the LSL source does). Either way the
        display hears that the estimates start afresh (``detail["restart"]``)."""
        event = gap_event(self.source.info.name, gap)
        self._write_markers(self.markers.due(gap.after_s, inclusive=False))
        if gap.before_s <= self._announced_gap_s <= gap.after_s:
            self._notify(Update([], None, None, event))
        else:
            self._handle_event(event)

    def _handle_event(self, event: SourceEvent) -> None:
        self.stats.events.append(event)
        if event.kind == "gap" and not event.detail.get("restart"):
            self._announced_gap_s = event.time_s
        if event.kind in ("lost", "resumed", "gap", "irregular"):
            log.warning("%s", event.message)
        else:
            log.info("%s", event.message)
        if self.log is not None and event.kind != "replaying":
            self.log.write_event(event.kind, event.message, event.time_s)
        if event.kind in ("lost", "end"):
            # No rows come before the comeback (or ever): held markers, all later than
            # the last sample, go now, after the event.
            self._source_lost = event.kind == "lost"
            self._write_markers(self.markers.due(math.inf))
        elif event.kind == "resumed":
            self._source_lost = False
        if event.kind == "resumed" and event.detail.get("restart", True):
            # The time axis may jump at a comeback (forwards over the loss, or backwards
            # for a restarted sender): windows must not straddle it, so estimation
            # starts afresh, as the LSL source asks of its consumers (not when a
            # session's motion-reference stream comes back: the time axis ran on).
            self.monitor.reset()
            if self.beat_session is not None:
                self.beat_session.restart()
        self._notify(Update([], None, None, event))

    def run(self) -> RunStats:
        """Process items until the source ends, a stop is requested or time is up."""
        started = self.clock()
        timer = None
        if self.duration_s is not None:
            # The check after each item below ends the run on the (injectable) clock; this
            # timer ends it on time when the source yields nothing at all, as a lost live
            # stream does while it waits for a comeback.
            timer = threading.Timer(self.duration_s, self.stop, args=(self._time_up(),))
            timer.daemon = True
            timer.start()
        try:
            for item in self.source.chunks():
                if self.stop_event.is_set():
                    break
                self._drain_user_markers()
                if isinstance(item, Chunk):
                    self._handle_chunk(item)
                elif isinstance(item, Marker):
                    self._handle_marker(item)
                else:
                    self._handle_event(item)
                    if item.kind == "end":
                        self.stop_reason = self.stop_reason or "end of recording"
                        break
                if self.duration_s is not None and self.clock() - started >= self.duration_s:
                    self.stop_reason = self.stop_reason or self._time_up()
                    break
        finally:
            if timer is not None:
                timer.cancel()
            self.stats.stopped_by = self.stop_reason or "source ended"
            self.close()
        return self.stats

    def _time_up(self) -> str:
        return f"--duration {self.duration_s:g} s reached"

    def close(self) -> None:
        try:
            # Markers still held (past the last sample) or typed at the very end.
            self._drain_user_markers(final=True)
            self._write_markers(self.markers.due(math.inf))
        except Exception as exc:
            log.warning("writing the last markers failed: %s", exc)
        for sink in (self.log, self.outlet, self.beat_session):
            if sink is not None:
                try:
                    sink.close()
                except Exception as exc:
                    log.warning("closing %s failed: %s", type(sink).__name__, exc)
        try:
            self.source.close()
        except Exception:
            pass


def install_signal_handlers(runner: Runner, also: Callable[[], None] | None = None):
    """SIGINT and SIGTERM ask the runner to stop (log closed cleanly). Returns a function
    restoring the previous handlers. Only callable from the main thread."""
    previous = {}

    def handler(signum, frame):
        runner.stop(f"stopped by {signal.Signals(signum).name}")
        if also is not None:
            also()

    for sig in (signal.SIGINT, signal.SIGTERM):
        previous[sig] = signal.signal(sig, handler)

    def restore():
        for sig, old in previous.items():
            signal.signal(sig, old)

    return restore
