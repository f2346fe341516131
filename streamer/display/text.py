"""Terminal display: one refreshing line per quantity and source.

Works over SSH and in CI logs. On a terminal (a TTY) the block of lines is redrawn in
place a few times per second; otherwise a plain line is printed per refresh so logs
stay readable. It only draws: the runner hands it updates through a bounded queue and
never waits for it. Below the rates it lists the last few markers; a line typed on
stdin (:meth:`TextDisplay.read_markers`) becomes a marker of the user's own.
"""

from __future__ import annotations

import math
import os
import queue
import sys
import threading
import time

from estimators.display_rule import GREY, WITHHOLD
from streamer.display.hrv_view import format_hrv_line
from streamer.display.state import DisplayState, SessionClock, marker_label, quality_word, unit_of

CAUTION = "research tool, not a medical device"


GREY_NOTE = "  (uncertain)"
"""Said after a greyed estimate (:mod:`estimators.display_rule`): a terminal has no
grey that survives a log file."""
WITHHELD_NOTE = "  (not shown: likely outside tolerance)"
"""Said when the display rule withholds a rate the engine did find."""
NO_RATE_NOTE = "  (no estimate)"
"""Said when the engine found no rate (quality too low, a lost stream): no confidence is
printed then, since it would describe a rate that is not there."""


def format_line(key, est) -> str:
    """One line for the newest estimate ``est`` of ``key = (quantity, source)``, as the
    display rule decides (:mod:`estimators.display_rule`): the rate when shown, the rate
    and :data:`GREY_NOTE` when greyed, a dash when withheld; a dash for the confidence
    too when there is no rate at all.

    Examples
    --------
    >>> from estimators.estimate import Estimate
    >>> print(format_line(("hr", "PPG"), Estimate("hr", "PPG", 10.0, 14.0, 71.96, 0.9, 0.8)))
    heart rate PPG         72.0 bpm          confidence 0.90  quality 0.80 (good)  delay  4.0 s
    >>> print(format_line(("hr", "PPG"), Estimate("hr", "PPG", 10.0, 14.0, 71.96, 0.6, 0.8)))
    heart rate PPG         72.0 bpm          confidence 0.60  quality 0.80 (good)  delay  4.0 s  (uncertain)
    >>> print(format_line(("hr", "PPG"), Estimate("hr", "PPG", 10.0, 14.0, math.nan, 0.95, 0.0)))
    heart rate PPG           -- bpm          confidence   --  quality 0.00 (unusable)  delay  4.0 s  (no estimate)

    A live estimate also carries the rate now (the rate at its newest sample,
    :mod:`estimators.rate_now`), said after the window-centre rate with its own
    confidence and the same rule (``?`` when greyed, ``--`` when withheld):

    >>> print(format_line(("hr", "PPG"), Estimate("hr", "PPG", 10.0, 14.0, 71.96, 0.9, 0.8,
    ...                                           (), 75.04, 0.86)))
    heart rate PPG         72.0 bpm          confidence 0.90  quality 0.80 (good)  delay  4.0 s  now  75.0 bpm (0.86)
    """
    quantity, source = key
    unit = unit_of(quantity)
    label = "heart rate" if quantity == "hr" else "breathing"
    decision = est.display
    rate = "   --" if decision == WITHHOLD else f"{est.rate_per_min:5.1f}"
    confidence = f"{est.confidence:4.2f}" if est.has_rate else "  --"
    note = {GREY: GREY_NOTE,
            WITHHOLD: WITHHELD_NOTE if est.has_rate else NO_RATE_NOTE}.get(decision, "")
    return (f"{label:<10} {source:<10} {rate} {unit:<11}  confidence {confidence}  "
            f"quality {est.quality:4.2f} ({quality_word(est.quality)})  "
            f"delay {est.delay_s:4.1f} s{now_part(est)}{note}")


def now_part(est) -> str:
    """``"  now  75.0 bpm (0.86)"`` for an estimate with a rate now, else empty."""
    if math.isnan(est.rate_now_per_min):
        return ""
    decision = est.now_display
    rate = "   --" if decision == WITHHOLD else f"{est.rate_now_per_min:5.1f}"
    mark = "?" if decision == GREY else ""
    return (f"  now {rate}{mark} {unit_of(est.quantity)}"
            f" ({est.now_confidence:4.2f})")


def in_foreground(stream) -> bool:
    """Whether reading ``stream`` is safe: it is not a terminal, or this process is in
    the terminal's foreground. A background job (``ridgewatch ... &``) that reads its
    terminal is stopped by the system (SIGTTIN), so it never tries."""
    try:
        fd = stream.fileno()
    except (AttributeError, OSError, ValueError):
        return True  # not a file (a test's StringIO): readable
    try:
        if not os.isatty(fd):
            return True
        return os.tcgetpgrp(fd) == os.getpgrp()
    except OSError:
        return False


MARKERS_LISTED = 3
"""How many of the newest markers the text display lists."""


def format_marker_line(marker) -> str:
    """One line for a marker: stream time, source and text (on one line, cut to fit).

    >>> from streamer.sources.base import Marker
    >>> print(format_marker_line(Marker(75.25, "stage 2 start", "lab")))
    marker      75.2 s  lab: stage 2 start
    """
    return (f"marker   {marker.time_s:7.1f} s  {marker_label(marker.source, 16)}: "
            f"{marker_label(marker.text, 48)}")


class TextDisplay:
    """Drains a queue of runner updates and prints the latest value per quantity/source,
    under a header with the stream status and the session clock (``clock``; elapsed
    session time and local wall-clock time)."""

    def __init__(self, stream=None, refresh_s: float = 0.5, maxsize: int = 256,
                 clock: SessionClock | None = None):
        self.stream = stream or sys.stdout
        self.clock = clock or SessionClock()
        self.refresh_s = refresh_s
        self.queue: queue.Queue = queue.Queue(maxsize=maxsize)
        self.state = DisplayState()
        self.hrv_latest: dict = {}  # source -> newest HrvRow (--beats/--hrv runs)
        self._lines_drawn = 0
        self._last_draw = 0.0
        self._tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.typed: queue.SimpleQueue = queue.SimpleQueue()
        self.marker_sink = None

    def read_markers(self, lines, sink) -> threading.Thread | None:
        """Turn every line read from ``lines`` (stdin) into a marker: ``sink(text)`` (the
        runner's ``add_user_marker``) is called from :meth:`run_until`, so the reading
        thread only queues. An empty line adds a numbered marker (``user marker N``).
        Reading stops at the end of input, a read error (stdin closed or not readable)
        or when the process runs in the background of its terminal
        (:func:`in_foreground`); the thread is a daemon, so a terminal never keeps the
        run alive.
        Returns the thread (None when ``lines`` is None)."""
        if lines is None:
            return None
        self.marker_sink = sink

        def read():
            try:
                while in_foreground(lines):
                    line = lines.readline()
                    if not line:
                        return  # end of input
                    self.typed.put(line.rstrip("\r\n"))
            except (OSError, ValueError):  # closed, or not readable (e.g. under a test runner)
                pass

        thread = threading.Thread(target=read, name="ridgewatch-stdin-markers", daemon=True)
        thread.start()
        return thread

    def take_typed(self) -> int:
        """Hand typed lines to the marker sink; returns how many."""
        n = 0
        while True:
            try:
                text = self.typed.get_nowait()
            except queue.Empty:
                return n
            n += 1
            if self.marker_sink is not None:
                self.marker_sink(text.strip())

    def listener(self, update) -> None:
        """Runner-side hook: never blocks; drops the update when the queue is full."""
        try:
            self.queue.put_nowait(update)
        except queue.Full:
            self.state.dropped += 1

    def drain(self) -> None:
        while True:
            try:
                update = self.queue.get_nowait()
            except queue.Empty:
                return
            self.state.apply(update)
            for source, row in getattr(update, "hrv", ()):
                self.hrv_latest[source] = row

    def header(self) -> str:
        """The first line: caution, stream status, session and wall-clock time, and the
        last notice."""
        line = (f"ridgewatch ({CAUTION}) - {self.state.stream_words()} - "
                f"{self.clock.text(sep=' at ')}")
        if self.state.status not in (self.state.stream, "running", "waiting for data"):
            line += f" - {self.state.status}"
        if self.state.dropped:
            line += f" (display skipped {self.state.dropped} updates)"
        return line

    def draw(self, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self._last_draw < self.refresh_s:
            return
        self._last_draw = now
        lines = [self.header()]
        lines += [format_line(k, e) for k, e in sorted(self.state.latest.items())]
        lines += [format_hrv_line(s, row) for s, row in sorted(self.hrv_latest.items())]
        lines += [format_marker_line(m) for m in list(self.state.markers)[-MARKERS_LISTED:]]
        if self._tty and self._lines_drawn:
            self.stream.write(f"\x1b[{self._lines_drawn}F\x1b[J")
        self.stream.write("\n".join(lines) + "\n")
        self.stream.flush()
        self._lines_drawn = len(lines)

    def run_until(self, done) -> None:
        """Drain and draw until ``done()`` is true (called from the main thread)."""
        while not done():
            typed = self.take_typed()
            if typed and self._tty and self._lines_drawn:
                # The terminal echoed each typed line below the block: redraw over it.
                self._lines_drawn += typed
            self.drain()
            self.draw(force=bool(typed))
            time.sleep(0.05)
        self.take_typed()
        self.drain()
        self.draw(force=True)
