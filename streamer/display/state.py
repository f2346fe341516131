"""What the displays show, kept without Qt: latest values, stream status, wording.

Both the terminal display and the window read the same :class:`DisplayState`, so the
words a user sees (quality, stream status, units) are decided in one place.
"""

from __future__ import annotations

import collections
import math
import time
from dataclasses import dataclass, field

from estimators.display_rule import UNUSABLE_QUALITY

QUALITY_WORDS = ((0.6, "good"), (UNUSABLE_QUALITY, "weak"), (0.0, "unusable"))
"""Thresholds of the quality index and the plain word shown with it (our own wording).
The ``unusable`` boundary is the display rule's: a rate beside that word is greyed at
best (:mod:`estimators.display_rule`)."""

UNITS = {"hr": "bpm", "rr": "breaths/min"}
"""Unit shown after a rate, per quantity."""

QUANTITY_NAMES = {"hr": "heart rate", "rr": "breathing rate"}
"""Plain name of each quantity."""

CHANNEL_QUANTITY = {"ppg": "hr", "ecg": "hr", "resp": "rr"}
"""Which estimate carries the quality of a channel of each kind (``acc`` has none: it
is only a motion reference)."""


MARKERS_KEPT = 200
"""Markers a display keeps: far more than a 5-minute rate history shows in a session."""


def marker_label(text: str, width: int = 32) -> str:
    """A marker's text for a display: on one line (line breaks and tabs as spaces),
    at most ``width`` characters (an ellipsis when cut). The log keeps the text whole.

    >>> marker_label("stage 2\\nstart"), marker_label("x" * 40, 8)
    ('stage 2 start', 'xxxxxxx…')
    """
    one_line = " ".join(str(text).split())
    return one_line if len(one_line) <= width else one_line[:width - 1] + "…"


def quality_word(quality: float) -> str:
    """Plain word for a quality index in [0, 1]: ``good``, ``weak`` or ``unusable``.

    NaN (no quality known) counts as ``unusable``.

    Examples
    --------
    >>> quality_word(0.9), quality_word(0.45), quality_word(0.1)
    ('good', 'weak', 'unusable')
    """
    for threshold, word in QUALITY_WORDS:
        if quality >= threshold:
            return word
    return "unusable"


def unit_of(quantity: str) -> str:
    """``bpm`` for heart rate, ``breaths/min`` for breathing rate."""
    return UNITS.get(quantity, "/min")


def quantity_name(quantity: str) -> str:
    """``heart rate`` or ``breathing rate``."""
    return QUANTITY_NAMES.get(quantity, quantity)


def format_rate(rate_per_min: float, digits: int = 0) -> str:
    """A rate for a readout; an em dash when there is no estimate (NaN)."""
    if rate_per_min is None or not math.isfinite(rate_per_min):
        return "\u2014"
    return f"{rate_per_min:.{digits}f}"


def format_duration(seconds: float) -> str:
    """Elapsed time as ``H:MM:SS`` (hours as many as needed); ``-:--:--`` when unknown.

    Examples
    --------
    >>> format_duration(0.4), format_duration(83.9), format_duration(90061)
    ('0:00:00', '0:01:23', '25:01:01')
    """
    if seconds is None or not math.isfinite(seconds):
        return "-:--:--"
    whole = int(max(0.0, seconds))
    return f"{whole // 3600}:{whole // 60 % 60:02d}:{whole % 60:02d}"


@dataclass
class SessionClock:
    """Elapsed session time and the wall-clock time, for every display.

    The session starts when the clock is made (the display opens with the run);
    ``wall`` is injectable so tests need no real time. The wall-clock time is local,
    as a lab notes it; the log's ``started`` header holds the same instant in UTC.
    """

    wall: object = time.time
    started: float = float("nan")

    def __post_init__(self):
        if not math.isfinite(self.started):
            self.started = self.wall()

    def elapsed_s(self) -> float:
        return self.wall() - self.started

    def text(self, sep: str = "  \u00b7  ") -> str:
        """``session 0:12:34 · 14:05:09`` (elapsed, then local time), parts joined by
        ``sep``."""
        now = self.wall()
        local = time.strftime("%H:%M:%S", time.localtime(now))
        return f"session {format_duration(now - self.started)}{sep}{local}"


def _speed_words(speed) -> str:
    try:
        speed = float(speed)
    except (TypeError, ValueError):
        return ""
    if math.isinf(speed):
        return "at full speed"
    return f"at {speed:g}x"


@dataclass
class DisplayState:
    """Latest estimate per (quantity, source) and the stream status.

    Attributes
    ----------
    latest : (quantity, source) -> newest :class:`~estimators.estimate.Estimate`.
    ever_rated : (quantity, source) pairs that have had a rate at least once (tells
        "warming up" from "no estimate now").
    status : the last event's message (or ``running`` once estimates flow).
    stream : short stream status: ``waiting for data``, ``connected``, ``stream lost``,
        ``replaying at 20x``, ``recording ended``.
    notice : the last gap or timing message, empty when there is none.
    dropped : updates the display skipped because its queue was full.
    newest_time_s : ``emitted_s`` of the newest estimate (NaN before the first).
    newest_sample_s : timestamp of the newest sample seen (NaN before the first).
    markers : the newest :data:`MARKERS_KEPT` markers (oldest first).
    markers_seen : how many markers came in all (tells a redraw that one came).
    lost_streams : names of the streams of a session that are lost while the others
        run (``detail["others_running"]`` of their ``lost`` event); ``stream`` stays
        ``connected`` for them, since the estimates go on (:meth:`stream_words`).
    """

    latest: dict = field(default_factory=dict)
    ever_rated: set = field(default_factory=set)
    status: str = "waiting for data"
    stream: str = "waiting for data"
    notice: str = ""
    dropped: int = 0
    newest_time_s: float = float("nan")
    newest_sample_s: float = float("nan")
    markers: collections.deque = field(
        default_factory=lambda: collections.deque(maxlen=MARKERS_KEPT))
    markers_seen: int = 0
    lost_streams: set = field(default_factory=set)

    def stream_words(self) -> str:
        """The stream status as the displays write it: :attr:`stream`, and the streams
        of a session lost while the others run.

        >>> state = DisplayState(stream="connected", lost_streams={"arm-acc"})
        >>> state.stream_words()
        "connected ('arm-acc' lost)"
        """
        if not self.lost_streams:
            return self.stream
        names = ", ".join(f"'{name}'" for name in sorted(self.lost_streams))
        return f"{self.stream} ({names} lost)"

    def apply(self, update) -> None:
        """Take one runner update (estimates, chunk, event, markers)."""
        for marker in getattr(update, "markers", ()):
            self.markers.append(marker)
            self.markers_seen += 1
        for est in update.estimates:
            key = (est.quantity, est.source)
            self.latest[key] = est
            if est.has_rate:
                self.ever_rated.add(key)
            self.newest_time_s = est.emitted_s
        chunk = update.chunk
        if chunk is not None and len(chunk):
            self.newest_sample_s = float(chunk.timestamps[-1])
            if self.stream == "waiting for data":
                # No "replaying" event came first, so this is a live stream.
                self.stream = "connected"
        event = update.event
        if event is not None:
            self.status = event.message
            if event.kind == "replaying":
                words = _speed_words(event.detail.get("speed"))
                self.stream = f"replaying {words}".strip()
            elif event.kind == "lost":
                if event.detail.get("others_running"):
                    # One device of a session: the estimates go on without it.
                    self.lost_streams.add(event.detail.get("stream", "?"))
                else:
                    self.stream = "stream lost"
                self.notice = event.message
            elif event.kind == "resumed":
                self.lost_streams.discard(event.detail.get("stream", "?"))
                self.stream = "connected"
                self.notice = event.message
            elif event.kind == "end":
                self.stream = "recording ended"
            elif event.kind in ("gap", "irregular"):
                self.notice = event.message
                if event.detail.get("restart"):
                    # The engine starts afresh: the values before the gap are not current.
                    self.latest.clear()
        elif update.estimates and self.status == "waiting for data":
            self.status = "running"

    def channel_estimate(self, name: str, kind: str):
        """The newest estimate that carries the quality of channel ``name`` of ``kind``
        (None for a motion reference or before the first estimate)."""
        quantity = CHANNEL_QUANTITY.get(kind)
        if quantity is None:
            return None
        return self.latest.get((quantity, name))
