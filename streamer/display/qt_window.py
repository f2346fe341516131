"""The live window: raw traces, time-frequency images with the ridge, rate history and
large readouts.

Threading
---------
Qt lives in the main thread; :meth:`Runner.run` runs in a worker thread. The runner's
listener is :meth:`UpdateFeed.listener`, which only calls ``queue.put_nowait`` (and
counts what it drops), so the engine and the log never wait for the window. One
``QTimer`` drains the queue into :class:`DisplayBuffers` and redraws: the raw traces on
every tick (up to 30 per second), the rest at most five times a second. The engine
shares the interpreter with the drawing, so the timer slows down when drawing takes
more than half of one core (:class:`~streamer.display.buffers.FramePacer`).
Closing the window asks the runner to stop, waits for the worker (the log is then
complete) and returns the run's statistics. SIGINT and SIGTERM close the window the
same way; a second, slower timer gives the interpreter a chance to run Python signal
handlers while Qt's event loop holds the main thread. An error in the worker is shown
in the window and raised again in the main thread once the window has closed.

Layout (left to right, top to bottom): a header with the stream status and timing; a
column of readout cards, one per (quantity, source), with the rate in large digits;
the raw trace of every channel with its quality value and word; the rate history with
a confidence band; one time-frequency image per output with the tracked ridge on it.
The caution "research tool, not a medical device" is in the title and the status bar.

Markers (from the source, or the user's own: key :data:`MARKER_KEY`) are drawn as
labelled vertical lines on the rate history (:class:`MarkerLines`). The key only hands
a request to the runner (``Runner.add_user_marker``, a queue); the marker is drawn when
it comes back with the updates, so the window shows what the log holds.

Freezing (the key :data:`FREEZE_KEY` or the header's button) stops redrawing the plots
only: the feed is still drained into the buffers, the readout cards, stream status and
session clock go on, and estimation and logging never notice. Resuming redraws at once
from the buffers, so the plots catch up with the newest data.

Set the environment variable ``RIDGEWATCH_SCREENSHOT`` to a ``.png`` path to save the
window, as drawn just before it closes, to that file.
"""

from __future__ import annotations

import collections
import logging
import math
import os
import sys
import threading
import time

import numpy as np
import pyqtgraph as pg
from pyqtgraph.Qt import QtCore, QtGui, QtWidgets

from estimators.display_rule import GREY, GREY_CONFIDENCE, SHOW, SHOW_CONFIDENCE, WITHHOLD
from streamer.display.buffers import (DisplayBuffers, DisplayLayout, FramePacer, UpdateFeed,
                                      confidence_band, rate_axis_range)
from streamer.display.state import (QUALITY_WORDS, SessionClock, format_duration, format_rate,
                                    marker_label, quality_word, quantity_name, unit_of)
from streamer.errors import InputError

log = logging.getLogger("ridgewatch")

CAUTION = "research tool, not a medical device"
SCREENSHOT_ENV = "RIDGEWATCH_SCREENSHOT"
"""Environment variable: save the window to this PNG path just before it closes."""

FRAME_INTERVAL_MS = 33
"""Shortest redraw timer period (about 30 frames per second)."""

DRAW_SHARE = 0.5
"""Most of one core the window may use; beyond it the frame rate drops (see
:class:`~streamer.display.buffers.FramePacer`)."""

RATE_AXIS = {"hr": (20.0, 5.0), "rr": (8.0, 2.0)}
"""Least vertical span and rounding step of the rate plots, per quantity (per minute)."""

SIGNAL_POLL_MS = 100
"""How often the interpreter gets control to run Python signal handlers under Qt."""

SLOW_INTERVAL_S = 0.2
"""Least wall time between redraws of everything but the raw traces."""

FREEZE_KEY = "F"
"""Key that freezes and resumes the plots (the button in the header does the same)."""

TIME_AXIS_LABEL = "time before the newest sample (s)"
"""Label of every time axis: plots run in stream seconds, 0 at the newest sample."""

CARD_WIDTH = 300
"""Width of the readout cards (px): the digits, unit and two detail lines fit."""

COMPACT_TRACES = 2
"""With more channels than this, each raw-trace row gets a one-line label, so that
eight rows fit in a 1280 x 800 window."""


def _trace_stretch(n_channels: int) -> int:
    """Share of the plot column for the raw traces (the rates and the spectra get 4
    each): 4 for one or two channels, one more per two channels up to 7 for eight."""
    return 4 + max(0, min(n_channels, 8) - 1) // 2

# A colour-blind-safe qualitative palette (hex values from memory), reordered so the
# first colours stand out on a dark background. Colour is never the only carrier:
# every curve is also named in text and drawn with its own line style.
PALETTE = ("#56B4E9", "#E69F00", "#009E73", "#CC79A7", "#F0E442", "#D55E00", "#0072B2")
FUSED_COLOUR = "#F2F2F2"
MOTION_COLOUR = "#9AA0A6"
LINE_STYLES = (QtCore.Qt.PenStyle.SolidLine, QtCore.Qt.PenStyle.DashLine,
               QtCore.Qt.PenStyle.DashDotLine, QtCore.Qt.PenStyle.DotLine)
BACKGROUND = "#14181D"
PANEL = "#1D232A"
TEXT = "#E8EAED"
DIM = "#8A9199"
GRID = "#2E363F"
RIDGE = "#FF5CA8"
FROZEN_COLOUR = "#F5C26B"
WORD_COLOURS = {"good": TEXT, "weak": "#F5C26B", "unusable": "#FF8A80"}
"""The quality word's colour only repeats what the word says."""

MARKER_KEY = "M"
"""The key that adds a marker of the user's own."""
MARKER_COLOUR = "#E8EAED"
MARKER_LABEL_ROWS = (0.95, 0.83, 0.71, 0.59)
"""Heights (fractions of the plot, from the bottom) for marker labels. A new label takes
the row whose newest label is oldest, so markers close in time do not print over each
other (a label reaches left of its line, into the past)."""
MARKER_LABEL_CHARS = 26
"""Longest marker label on the plots (the tooltip and the log keep the whole text)."""

STYLE_SHEET = f"""
QMainWindow, QWidget#central {{ background: {BACKGROUND}; }}
QLabel {{ color: {TEXT}; }}
QFrame#card {{ background: {PANEL}; border-radius: 6px; }}
QStatusBar {{ background: {PANEL}; color: {TEXT}; font-size: 15px; }}
QStatusBar QLabel {{ font-size: 15px; }}
"""


def _source_colours(layout: DisplayLayout) -> dict:
    """One colour per source name (channels and outputs share it)."""
    colours, k = {}, 0
    for name, kind in layout.channels:
        if kind == "acc":
            colours[name] = MOTION_COLOUR
        else:
            colours[name] = PALETTE[k % len(PALETTE)]
            k += 1
    colours["fused"] = FUSED_COLOUR
    return colours


def _relative(times: np.ndarray, now_s: float) -> np.ndarray:
    """Stream times as seconds relative to the newest sample (0 = now, past < 0)."""
    return np.asarray(times, dtype=np.float64) - now_s


class BandItem(pg.GraphicsObject):
    """A filled band between two curves, broken where any value is NaN."""

    def __init__(self, brush):
        super().__init__()
        self._brush = pg.mkBrush(brush)
        self._path = QtGui.QPainterPath()
        self.x = self.lower = self.upper = np.empty(0)

    def setData(self, x, lower, upper) -> None:
        self.x, self.lower, self.upper = (np.asarray(a, dtype=np.float64)
                                          for a in (x, lower, upper))
        finite = np.isfinite(self.x) & np.isfinite(self.lower) & np.isfinite(self.upper)
        edges = np.flatnonzero(np.diff(np.concatenate(([0], finite.astype(np.int8), [0]))))
        xs, ys, connect = [], [], []
        for a, b in zip(edges[::2], edges[1::2]):
            # One closed outline per run of finite values: along the upper edge, back
            # along the lower one.
            xs += [self.x[a:b], self.x[a:b][::-1]]
            ys += [self.upper[a:b], self.lower[a:b][::-1]]
            run = np.ones(2 * (b - a), dtype=bool)
            run[-1] = False
            connect.append(run)
        self.prepareGeometryChange()
        if xs:
            self._path = pg.arrayToQPath(np.concatenate(xs), np.concatenate(ys),
                                         connect=np.concatenate(connect))
        else:
            self._path = QtGui.QPainterPath()
        self.update()

    def boundingRect(self):
        return self._path.boundingRect()

    def paint(self, painter, *args):
        painter.setPen(pg.mkPen(None))
        painter.setBrush(self._brush)
        painter.drawPath(self._path)


class MarkerLines:
    """Markers as labelled vertical lines on a set of plots sharing a time axis.

    Each marker gets one dashed line per plot, labelled with its text (one line, cut to
    :func:`~streamer.display.state.marker_label` width; the whole text and source in
    the line's tooltip) to the left of the line, where the history is. Lines follow
    the time axis (seconds before the newest sample) and are removed once they scroll
    out of ``span_s``.
    """

    def __init__(self, plots, span_s: float):
        self.plots = list(plots)
        self.span_s = span_s
        self.shown: collections.deque = collections.deque()  # (marker, lines)
        self.count = 0  # markers taken so far
        self._row_used_s = [-math.inf] * len(MARKER_LABEL_ROWS)  # newest marker per row

    def add(self, marker) -> None:
        k = min(range(len(MARKER_LABEL_ROWS)), key=lambda r: self._row_used_s[r])
        self._row_used_s[k] = marker.time_s
        row = MARKER_LABEL_ROWS[k]
        self.count += 1
        text = marker_label(marker.text, MARKER_LABEL_CHARS)
        lines = []
        font = QtGui.QFont()
        font.setPixelSize(14)
        for plot in self.plots:
            line = pg.InfiniteLine(
                pos=0.0, angle=90, movable=False,
                pen=pg.mkPen(MARKER_COLOUR, width=1.5, style=QtCore.Qt.PenStyle.DashLine),
                label=text, labelOpts={
                    "position": row, "color": TEXT, "fill": pg.mkBrush(PANEL + "C8"),
                    "anchors": [(1, 1), (1, 0)]})
            line.label.setFont(font)
            line.setToolTip(f"{marker.source}: {marker.text}")
            line.setZValue(15)
            plot.addItem(line, ignoreBounds=True)
            lines.append(line)
        self.shown.append((marker, lines))

    def draw(self, now_s: float) -> None:
        """Place every line at its time relative to ``now_s``; drop scrolled-out ones."""
        while self.shown and self.shown[0][0].time_s - now_s < -self.span_s:
            _, lines = self.shown.popleft()
            for plot, line in zip(self.plots, lines):
                plot.removeItem(line)
        for marker, lines in self.shown:
            for line in lines:
                line.setValue(marker.time_s - now_s)

    def take(self, markers, seen: int) -> None:
        """Add the markers of a :class:`~streamer.display.state.DisplayState` not taken
        yet: ``markers`` the kept ones (oldest first), ``seen`` how many came in all."""
        new = min(seen - self.count, len(markers))
        self.count = seen - new
        for marker in list(markers)[len(markers) - new:]:
            if math.isfinite(marker.time_s):
                self.add(marker)
            else:
                self.count += 1


class ReadoutCard(QtWidgets.QFrame):
    """One (quantity, source): the rate in large digits, its unit and the details.

    ``compact`` cards (when there are many outputs) use smaller digits and fold the
    details into two lines, so that more fit on the screen without scrolling.
    """

    def __init__(self, info, colour: str, compact: bool = False, headline: str = "now"):
        super().__init__()
        self.setObjectName("card")
        self.headline = headline  # "now": the rate now in large digits; "centre"
        self.quantity, self.source = info.quantity, info.source
        self.first_estimate_s = info.first_estimate_s
        self.compact = compact
        self.digits_px = 46 if compact else 64
        self.setStyleSheet(f"QFrame#card {{ border-left: 8px solid {colour}; }}")
        grid = QtWidgets.QGridLayout(self)
        grid.setContentsMargins(16, 6 if compact else 8, 12, 6 if compact else 8)
        grid.setVerticalSpacing(0)
        origin = " pulse" if info.from_pulse else ""
        name = "heart rate" if info.quantity == "hr" else "breathing"
        self.title = QtWidgets.QLabel(f"{name.upper()}  \u00b7  {info.source}{origin}")
        self.title.setToolTip(f"{quantity_name(info.quantity)} from {info.source}"
                              + (" (from the pulse)" if info.from_pulse else ""))
        self.title.setStyleSheet(f"font-size: 17px; font-weight: bold; color: {DIM};")
        self.value = QtWidgets.QLabel("\u2014")
        self.value.setStyleSheet(f"font-size: {self.digits_px}px; font-weight: bold;")
        self.value.setAlignment(QtCore.Qt.AlignmentFlag.AlignRight
                                | QtCore.Qt.AlignmentFlag.AlignVCenter)
        self.value.setMinimumWidth(130)
        self.unit = QtWidgets.QLabel(unit_of(info.quantity))
        self.unit.setStyleSheet("font-size: 20px;")
        self.unit.setAlignment(QtCore.Qt.AlignmentFlag.AlignLeft
                               | QtCore.Qt.AlignmentFlag.AlignBottom)
        self.detail = QtWidgets.QLabel("")
        # Compact cards put the delay on the first line: smaller type keeps it in the card.
        self.detail.setStyleSheet(f"font-size: {16 if compact else 18}px;")
        self.detail.setTextFormat(QtCore.Qt.TextFormat.RichText)
        grid.addWidget(self.title, 0, 0, 1, 2)
        grid.addWidget(self.value, 1, 0)
        grid.addWidget(self.unit, 1, 1)
        grid.addWidget(self.detail, 2, 0, 1, 2)
        grid.setColumnStretch(1, 1)
        self._shown = None
        self._dim = None

    def show_estimate(self, est, ever_rated: bool, stream_lost: bool = False) -> None:
        """Show ``est`` (None before the first) as the display rule decides
        (:mod:`estimators.display_rule`): the digits when shown, greyed digits when
        greyed, a dash when withheld or without a rate; the last value greyed while the
        stream is lost."""
        # The large digits are the rate now (live) unless the card was asked for the
        # window-centre rate; the other one is said beside the delay.
        use_now = (self.headline == "now" and est is not None
                   and not math.isnan(est.rate_now_per_min))
        decision = WITHHOLD if est is None else (est.now_display if use_now else est.display)
        key = (None if est is None else (est.rate_per_min, est.confidence, est.quality,
                                          est.delay_s, est.rate_now_per_min,
                                          est.now_confidence), ever_rated, stream_lost)
        if key == self._shown:
            return
        self._shown = key
        rate = math.nan if est is None else (est.rate_now_per_min if use_now
                                             else est.rate_per_min)
        confidence = math.nan if est is None else (est.now_confidence if use_now
                                                   else est.confidence)
        self.value.setText(format_rate(rate if decision != WITHHOLD else math.nan))
        dim = decision != SHOW or stream_lost
        if dim != self._dim:
            # Style sheets are costly to apply: only when the look changes.
            self._dim = dim
            grey = f"color: {DIM};" if dim else ""
            self.value.setStyleSheet(f"font-size: {self.digits_px}px; font-weight: bold; "
                                     f"{grey}")
            self.unit.setStyleSheet(f"font-size: 20px; {grey}")
        if est is None:
            self.detail.setText(f"warming up: first estimate after<br>"
                                f"{self.first_estimate_s:g} s of signal")
            return
        word = quality_word(est.quality)
        quality = (f"quality {est.quality:.2f} <b style='color:{WORD_COLOURS[word]}'>"
                   f"{word}</b>")
        other = ""  # the rate not in large digits, said beside
        if use_now:
            if est.display != WITHHOLD:
                other = f"centre {format_rate(est.rate_per_min)}"
            delay = "now" + (f" \u00b7 {other}, {est.delay_s:.1f} s ago" if other
                             else ", delay 0 s")
            short = "now"
        else:
            if not math.isnan(est.rate_now_per_min) and est.now_display != WITHHOLD:
                other = f"now {format_rate(est.rate_now_per_min)}"
            delay = f"delay {est.delay_s:.1f} s" + (f" \u00b7 {other}" if other else "")
            short = f"delay {est.delay_s:.1f} s"
        if stream_lost:
            first = "stream lost: last value shown"
        elif decision != WITHHOLD:
            first = f"confidence {100 * confidence:.0f} %"
            if decision == GREY:
                first += ": uncertain"
            if self.compact:
                first += f", {short}"
        elif not math.isnan(rate):
            first = f"not shown: confidence {100 * confidence:.0f} %"
        elif ever_rated:
            first = "no estimate: signal not usable"
        else:
            first = "warming up"
        if self.compact:
            self.detail.setText(f"{first}<br>{quality}" + (f" \u00b7 {other}" if other else ""))
        else:
            self.detail.setText(f"{first}<br>{quality}<br>{delay}")


class MonitorWindow(QtWidgets.QMainWindow):
    """The live window. It only draws: :meth:`refresh` drains ``feed`` and redraws.

    Parameters
    ----------
    layout : channels, outputs and grids of the engine.
    feed : where the runner's updates arrive.
    stats : the runner's :class:`~streamer.runner.RunStats` (read for the compute-time
        readout), or None.
    title : shown in the header (e.g. the source's name).
    trace_span_s, rate_span_s, image_span_s : seconds shown per kind of plot.
    clock : the session clock shown in the header (default: starts now).
    """

    closed = QtCore.Signal()

    def __init__(self, layout: DisplayLayout, feed: UpdateFeed, stats=None, title: str = "",
                 trace_span_s: float = 10.0, rate_span_s: float = 300.0,
                 image_span_s: float = 120.0, clock: SessionClock | None = None,
                 headline: str = "now"):
        super().__init__()
        self.headline = headline
        self.clock = clock or SessionClock()
        self.frozen = False
        self.frozen_at_s = math.nan
        self.layout_info = layout
        self.feed = feed
        self.stats = stats
        self.buffers = DisplayBuffers(layout, trace_span_s, rate_span_s, image_span_s)
        self.trace_span_s, self.rate_span_s, self.image_span_s = (
            trace_span_s, rate_span_s, image_span_s)
        self.colours = _source_colours(layout)
        self.on_close: list = []
        self.frames = 0
        self.paint_times: collections.deque = collections.deque(maxlen=240)
        self._timing: collections.deque = collections.deque(maxlen=200)
        self._raw_drawn = -1
        self._slow_drawn = None
        self._slow_drawn_at = -math.inf
        self._timing_drawn_at = -math.inf
        self._alarm_shown = False
        self._final = ""
        self._draw_failed = False
        self._closing = False

        self.setWindowTitle(f"ridgewatch \u2014 heart and breathing rate ({CAUTION})")
        self.setStyleSheet(STYLE_SHEET)
        self.resize(1600, 1000)
        central = QtWidgets.QWidget()
        central.setObjectName("central")
        self.setCentralWidget(central)
        outer = QtWidgets.QVBoxLayout(central)
        outer.setContentsMargins(10, 6, 10, 4)
        outer.addLayout(self._build_header(title))
        body = QtWidgets.QHBoxLayout()
        outer.addLayout(body, 1)
        cards = QtWidgets.QWidget()
        cards.setObjectName("central")
        cards.setLayout(self._build_cards())
        scroll = QtWidgets.QScrollArea()
        scroll.setWidget(cards)
        scroll.setWidgetResizable(True)
        scroll.setFrameShape(QtWidgets.QFrame.Shape.NoFrame)
        scroll.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        scroll.setFixedWidth(CARD_WIDTH + 20)  # many outputs scroll, digits stay large
        body.addWidget(scroll, 0)
        plots = QtWidgets.QVBoxLayout()
        body.addLayout(plots, 1)
        self._plots_layout = plots
        self.extra_views: list = []
        """Optional views fed every update (``apply``) and drawn with the slow plots
        (``draw(now_s)``): the HRV panel (:meth:`add_hrv`)."""
        # Every trace row keeps a readable height: more channels, more of the column.
        n = len(layout.channels)
        self.compact_traces = n > COMPACT_TRACES
        plots.addWidget(self._build_traces(), _trace_stretch(n))
        plots.addWidget(self._build_rates(), 4)
        plots.addWidget(self._build_images(), 4)
        self._build_status_bar()
        self._build_markers()
        shortcut = QtGui.QShortcut(QtGui.QKeySequence(FREEZE_KEY), self)
        shortcut.activated.connect(self.toggle_frozen)

        self.pacer = FramePacer(fastest_s=FRAME_INTERVAL_MS / 1e3, share=DRAW_SHARE)
        self.timer = QtCore.QTimer(self)
        self.timer.setInterval(FRAME_INTERVAL_MS)
        self.timer.timeout.connect(self.refresh)

    # ----------------------------------------------------------------- building
    def _build_header(self, title: str):
        row = QtWidgets.QHBoxLayout()
        name = QtWidgets.QLabel("ridgewatch")
        name.setStyleSheet("font-size: 24px; font-weight: bold;")
        self.source_label = QtWidgets.QLabel(title)
        self.source_label.setStyleSheet(f"font-size: 16px; color: {DIM};")
        # A long source name is cut rather than widening the window beyond the screen.
        self.source_label.setSizePolicy(QtWidgets.QSizePolicy.Policy.Ignored,
                                        QtWidgets.QSizePolicy.Policy.Preferred)
        self.stream_label = QtWidgets.QLabel("\u25cb waiting for data")
        self.stream_label.setStyleSheet("font-size: 20px; font-weight: bold;")
        self.clock_label = QtWidgets.QLabel(self.clock.text())
        self.clock_label.setStyleSheet("font-size: 18px;")
        self.clock_label.setToolTip("time since the session started, and the local time")
        self.frozen_label = QtWidgets.QLabel("")
        self.frozen_label.setToolTip("only the plots wait: the rates on the cards, the log "
                                     "and the outlet go on")
        self.frozen_label.setStyleSheet(f"font-size: 15px; font-weight: bold; "
                                        f"color: {FROZEN_COLOUR};")
        self.freeze_button = QtWidgets.QPushButton(f"Freeze plots ({FREEZE_KEY})")
        self.freeze_button.setCheckable(True)
        self.freeze_button.setFocusPolicy(QtCore.Qt.FocusPolicy.NoFocus)
        self.freeze_button.setToolTip("stop redrawing the plots to look at them; the rates, "
                                      "the log and the outlet go on")
        self.freeze_button.setStyleSheet(
            f"QPushButton {{ font-size: 15px; color: {TEXT}; background: {PANEL}; "
            f"border: 1px solid {DIM}; border-radius: 4px; padding: 3px 10px; }} "
            f"QPushButton:checked {{ color: {BACKGROUND}; background: {FROZEN_COLOUR}; }}")
        self.freeze_button.toggled.connect(self.set_frozen)
        row.addWidget(name)
        row.addSpacing(12)
        row.addWidget(self.source_label, 1)
        row.addWidget(self.stream_label)
        row.addSpacing(20)
        row.addWidget(self.clock_label)
        row.addSpacing(16)
        row.addWidget(self.frozen_label)
        row.addWidget(self.freeze_button)
        return row

    def add_hrv(self, sources) -> None:
        """An HRV card under the rate cards and a DFA alpha1 trend under the plots
        (:mod:`streamer.display.hrv_view`), for a run with ``--beats``/``--hrv``."""
        from streamer.display.hrv_view import make_hrv_panel
        panel = make_hrv_panel(sources, self.colours, CARD_WIDTH)
        self._cards_column.insertWidget(len(self.cards), panel.card)
        self._plots_layout.addWidget(panel.trend, 3)
        self.extra_views.append(panel)

    def _build_cards(self):
        column = QtWidgets.QVBoxLayout()
        self._cards_column = column
        column.setContentsMargins(0, 0, 0, 0)
        column.setSpacing(8)
        self.cards: dict = {}
        compact = len(self.layout_info.outputs) > 4
        for info in self.layout_info.outputs:
            card = ReadoutCard(info, self.colours.get(info.source, FUSED_COLOUR), compact,
                               self.headline)
            card.setFixedWidth(CARD_WIDTH)
            card.show_estimate(None, False)
            self.cards[info.key] = card
            column.addWidget(card)
        column.addStretch(1)
        guide = QtWidgets.QLabel(self._reading_guide() + " " + self._marker_hint())
        guide.setWordWrap(True)
        guide.setFixedWidth(CARD_WIDTH)
        guide.setStyleSheet(f"font-size: 14px; color: {DIM};")
        column.addWidget(guide)
        return column

    def _build_markers(self) -> None:
        """Marker lines on the rate plots and the key that adds a marker of one's own."""
        self.marker_lines = MarkerLines(self.rate_plots.values(), self.rate_span_s)
        self.marker_sink = None  # set by run_with_window: Runner.add_user_marker
        self.user_markers_requested = 0
        self.marker_shortcut = QtGui.QShortcut(QtGui.QKeySequence(MARKER_KEY), self)
        self.marker_shortcut.activated.connect(self.add_user_marker)

    def keyPressEvent(self, event) -> None:  # noqa: N802 (Qt's name)
        """The window's keys when no shortcut took them (e.g. the window is not the
        active one, as under an offscreen platform): the same actions."""
        key = event.text().upper()
        if key == MARKER_KEY:
            self.add_user_marker()
        elif key == FREEZE_KEY:
            self.toggle_frozen()
        else:
            super().keyPressEvent(event)

    def add_user_marker(self) -> None:
        """Key :data:`MARKER_KEY`: ask the runner for a marker ``user marker N`` at the
        newest sample. Never waits: the runner takes it from a queue."""
        if self.marker_sink is None:
            return
        self.user_markers_requested += 1
        self.marker_sink("")

    @staticmethod
    def _marker_hint() -> str:
        return (f"Key {MARKER_KEY}: add a marker of your own (\u201cuser marker N\u201d, "
                f"in the log and, with --publish, on the marker stream). Markers are the "
                f"dashed lines on the rate history.")

    def _reading_guide(self) -> str:
        """A few lines on what the readouts mean, from the same thresholds they use."""
        words = ", ".join(f"{word} \u2265 {threshold:.2f}" for threshold, word
                          in QUALITY_WORDS if threshold > 0)
        return (f"Quality (0 to 1): {words}, unusable below. A dash: no estimate, or one "
                f"more likely wrong than right. Heart-rate confidence (PPG): how often such "
                f"an estimate was within \u00b110 % or \u00b15 bpm on the development "
                f"recordings; below {SHOW_CONFIDENCE:.0%} the digits are grey, below "
                f"{GREY_CONFIDENCE:.0%} not shown. "
                + ("Large digits: the rate now (at the newest sample), forecast from the "
                   "window-centre rate, which is given beside it with its delay."
                   if self.headline == "now" else
                   "Large digits: the window-centre rate; delay: how far it lags the "
                   "newest sample; the rate now is given beside it."))

    def _plot_widget(self):
        widget = pg.GraphicsLayoutWidget()
        widget.setBackground(BACKGROUND)
        widget.ci.setContentsMargins(4, 4, 4, 4)
        return widget

    @staticmethod
    def _style_axes(plot, show_bottom: bool, left_label: str | None = None,
                    grid: bool = False, bottom_label: str | None = TIME_AXIS_LABEL):
        font = QtGui.QFont()
        font.setPixelSize(14)
        for side in ("left", "bottom"):
            axis = plot.getAxis(side)
            axis.setTextPen(pg.mkPen(TEXT))
            # With a grid the axis pen draws it: an opaque dark line is several times
            # cheaper to paint than a translucent light one.
            axis.setPen(pg.mkPen(GRID if grid else DIM))
            axis.setStyle(tickFont=font)
        if left_label:
            plot.setLabel("left", left_label, color=TEXT, **{"font-size": "15px"})
        if show_bottom and bottom_label:
            plot.setLabel("bottom", bottom_label, color=TEXT, **{"font-size": "13px"})
        if not show_bottom:
            plot.hideAxis("bottom")
        if grid:
            plot.showGrid(x=True, y=True, alpha=1.0)
        plot.setMenuEnabled(False)
        plot.hideButtons()

    def _build_traces(self):
        widget = self._plot_widget()
        self.traces_widget = widget
        self.trace_curves, self.channel_labels, self.trace_plots = [], [], []
        widget.ci.addLabel(f"raw signals, last {self.trace_span_s:g} s", row=0, col=0,
                           colspan=2, color=TEXT, size="12pt", justify="left")
        n = len(self.layout_info.channels)
        for i, (name, kind) in enumerate(self.layout_info.channels):
            label = widget.ci.addLabel("", row=i + 1, col=0, justify="left")
            label.setFixedWidth(255 if self.compact_traces else 175)
            plot = widget.ci.addPlot(row=i + 1, col=1)
            self._style_axes(plot, show_bottom=False)
            plot.hideAxis("left")
            plot.setXRange(-self.trace_span_s, 0, padding=0)
            plot.setMouseEnabled(x=False, y=False)
            plot.enableAutoRange(axis="y")
            # Thin cosmetic pens: the traces repaint on every frame.
            curve = plot.plot(pen=pg.mkPen(self.colours[name], width=1), connect="finite")
            curve.setDownsampling(auto=True, method="peak")
            curve.setClipToView(True)
            self.trace_plots.append(plot)
            self.trace_curves.append(curve)
            self.channel_labels.append(label)
        # One time axis under all traces, in a row of its own so that every trace gets
        # the same height.
        axis = pg.AxisItem("bottom")
        axis.linkToView(self.trace_plots[0].getViewBox())
        axis.setTextPen(pg.mkPen(TEXT))
        axis.setPen(pg.mkPen(DIM))
        font = QtGui.QFont()
        font.setPixelSize(13)
        axis.setStyle(tickFont=font)
        axis.setLabel(TIME_AXIS_LABEL, color=TEXT, **{"font-size": "13px"})
        widget.ci.addItem(axis, row=n + 1, col=1)
        self.trace_axis = axis
        # Rows close together: eight of them and the axis fit in a 1280 x 800 window.
        widget.ci.layout.setVerticalSpacing(2 if self.compact_traces else 6)
        for plot in self.trace_plots[1:]:
            plot.setXLink(self.trace_plots[0])
        for i in range(n):
            widget.ci.layout.setRowStretchFactor(i + 1, 1)
        # Count real paints of the busiest view: these are the frames a user sees.
        self._paint_counter = PaintCounter(self.paint_times)
        widget.viewport().installEventFilter(self._paint_counter)
        return widget

    def _build_rates(self):
        widget = self._plot_widget()
        self.rates_widget = widget
        self.rate_plots, self.rate_curves, self.band_items = {}, {}, {}
        quantities = list(dict.fromkeys(o.quantity for o in self.layout_info.outputs))
        minutes = self.rate_span_s / 60.0
        for col, quantity in enumerate(quantities):
            plot = widget.ci.addPlot(row=0, col=col)
            plot.setTitle(f"{quantity_name(quantity)}, last {minutes:g} min (band: "
                          f"confidence)", color=TEXT, size="12pt")
            self._style_axes(plot, show_bottom=True, grid=True, left_label=unit_of(quantity))
            plot.setXRange(-self.rate_span_s, 0, padding=0)
            plot.setMouseEnabled(x=False, y=False)
            plot.disableAutoRange()
            first = next(o for o in self.layout_info.outputs if o.quantity == quantity)
            plot.setYRange(*first.band_per_min, padding=0)  # until data come
            plot._y_range = None
            sharing = sum(o.quantity == quantity for o in self.layout_info.outputs)
            legend = plot.addLegend(offset=(6, 6), labelTextColor=TEXT,
                                    labelTextSize="13pt" if sharing <= 3 else "10pt",
                                    brush=pg.mkBrush(PANEL + "D0"), verSpacing=-6, horSpacing=14,
                                    colCount=1 if sharing <= 3 else 2)
            k = 0
            for info in self.layout_info.outputs:
                q, source = info.key
                if q != quantity:
                    continue
                colour = QtGui.QColor(self.colours.get(source, FUSED_COLOUR))
                fill = QtGui.QColor(colour)
                fill.setAlpha(max(25, 60 // sharing))  # overlapping bands stay readable
                band = BandItem(fill)
                plot.addItem(band, ignoreBounds=True)
                pen = pg.mkPen(colour, width=2.5, style=LINE_STYLES[k % len(LINE_STYLES)])
                name = f"{source} (pulse)" if info.from_pulse else source
                curve = plot.plot(pen=pen, connect="finite", name=name, antialias=True)
                self.rate_curves[(q, source)] = curve
                self.band_items[(q, source)] = band
                k += 1
            legend.setZValue(20)
            self.rate_plots[quantity] = plot
        return widget

    def _build_images(self):
        widget = self._plot_widget()
        self.images_widget = widget
        self.image_items, self.ridge_curves, self.image_plots = {}, {}, {}
        colormap = pg.colormap.get("viridis")
        outputs = [o for o in self.layout_info.outputs if o.grid is not None]
        spectra = "de-shape spectra" if all(o.deshape for o in outputs) else "spectra"
        widget.ci.addLabel(f"{spectra}, last {self.image_span_s / 60:g} min "
                           f"(brighter = stronger); pink line = tracked rate", row=0,
                           col=0, colspan=max(1, len(outputs)), color=TEXT, size="12pt",
                           justify="left")
        many = len(outputs) > 4
        previous = None
        for col, info in enumerate(outputs):
            quantity, source, grid = info.quantity, info.source, info.grid
            plot = widget.ci.addPlot(row=1, col=col)
            # Many images: the source names the plot, the unit on the left axis (at the
            # first of each quantity) says which rate it is.
            plot.setTitle(source if many else f"{source} \u00b7 {quantity_name(quantity)}",
                          color=TEXT, size="11pt" if many else "12pt")
            self._style_axes(plot, show_bottom=True, bottom_label="time (s)",
                             left_label=unit_of(quantity) if quantity != previous else None)
            previous = quantity
            plot.setMouseEnabled(x=False, y=False)
            step = float(grid[1] - grid[0]) if len(grid) > 1 else 1.0
            plot.setXRange(-self.image_span_s, 0, padding=0)
            plot.setYRange(grid[0] - step / 2, grid[-1] + step / 2, padding=0)
            plot.disableAutoRange()
            image = pg.ImageItem()
            image.setColorMap(colormap)
            plot.addItem(image)
            # The ridge sits on the brightest part of the image: a dark outline under a
            # light line keeps it visible on every colour of the map.
            under = plot.plot(pen=pg.mkPen("#000000", width=5), connect="finite")
            ridge = plot.plot(pen=pg.mkPen(RIDGE, width=2), connect="finite")
            self.image_items[(quantity, source)] = image
            self.ridge_curves[(quantity, source)] = (under, ridge)
            self.image_plots[(quantity, source)] = plot
        return widget

    def _build_status_bar(self):
        bar = self.statusBar()
        caution = QtWidgets.QLabel(f"ridgewatch is a {CAUTION}: not for diagnosis or "
                                   f"treatment")
        caution.setStyleSheet("font-weight: bold;")
        # The caution never shrinks; a long notice (a lost stream's message) is cut
        # instead, its whole text in the tooltip.
        caution.setMinimumWidth(caution.sizeHint().width())
        self.caution_label = caution
        bar.addWidget(caution)
        self.notice_label = QtWidgets.QLabel("")
        self.notice_label.setSizePolicy(QtWidgets.QSizePolicy.Policy.Ignored,
                                        QtWidgets.QSizePolicy.Policy.Preferred)
        bar.addWidget(self.notice_label, 1)
        self.timing_label = QtWidgets.QLabel("")
        bar.addPermanentWidget(self.timing_label)
        self.display_label = QtWidgets.QLabel("")
        bar.addPermanentWidget(self.display_label)

    # ------------------------------------------------------------------ drawing
    def refresh(self) -> None:
        """Timer slot: drain the feed and redraw what changed."""
        for update in self.feed.drain():
            self.buffers.apply(update)
            for view in self.extra_views:
                view.apply(update)
        self.buffers.state.dropped = self.feed.dropped
        if self._draw_failed:
            return
        try:
            self.draw()
        except Exception as exc:  # a drawing bug must not spam 30 tracebacks a second
            self._draw_failed = True
            log.exception("the window stopped drawing: %s", exc)
            self.notice_label.setText(f"display error, drawing stopped (estimation and "
                                      f"the log go on): {exc}")
        interval = self.pacer.tick(time.monotonic(), time.thread_time())
        self.timer.setInterval(int(round(1e3 * interval)))

    def _slow_versions(self):
        b = self.buffers
        return (tuple(r.version for r in b.rates.values()),
                tuple(i.version for i in b.images.values()), b.state.stream,
                b.state.notice, b.state.dropped, self._final, b.state.markers_seen)

    def draw(self, force: bool = False) -> None:
        """Redraw from the buffers.

        The raw traces move with every chunk and are redrawn on every tick that brought
        one. Everything else changes at most once per hop and scrolls by about a pixel
        per hop, so it is redrawn at most every :data:`SLOW_INTERVAL_S` seconds: painting
        is what costs, and the engine shares the interpreter with it. While
        :attr:`frozen`, the plots keep what they show; the cards, status and clock go on.
        """
        wall = time.monotonic()
        if force or wall - self._timing_drawn_at >= 0.5:
            self._timing_drawn_at = wall
            self._draw_timing()
            self._draw_clock()
        b = self.buffers
        now = b.now_s
        if not self.frozen and b.raw.version != self._raw_drawn and math.isfinite(now):
            self._raw_drawn = b.raw.version
            self.frames += 1
            t, x = b.raw.view()
            rel = _relative(t, now)
            for i, curve in enumerate(self.trace_curves):
                curve.setData(rel, x[:, i])
        versions = self._slow_versions()
        if versions == self._slow_drawn or (
                not force and wall - self._slow_drawn_at < SLOW_INTERVAL_S):
            return
        self._slow_drawn, self._slow_drawn_at = versions, wall
        self._draw_status()
        state = self.buffers.state
        lost = state.stream == "stream lost"
        for key, card in self.cards.items():
            card.show_estimate(state.latest.get(key), key in state.ever_rated, lost)
        self._draw_channel_labels()
        if self.frozen or not math.isfinite(now):
            return
        for key, curve in self.rate_curves.items():
            view = b.rates[key].view()
            lower, upper = confidence_band(view.rate_per_min, view.confidence,
                                           self.layout_info.output(key).halfwidth_per_min)
            rel = _relative(view.time_s, now)
            curve.setData(rel, view.rate_per_min)
            self.band_items[key].setData(rel, lower, upper)
            keep = rel >= -self.image_span_s
            for line in self.ridge_curves.get(key, ()):
                line.setData(rel[keep], view.rate_per_min[keep])
        self.marker_lines.take(state.markers, state.markers_seen)
        self.marker_lines.draw(now)
        for view in self.extra_views:
            view.draw(now)
        for quantity, plot in self.rate_plots.items():
            shown = [b.rates[k].view().rate_per_min for k in self.rate_curves
                     if k[0] == quantity]
            y_range = rate_axis_range(np.concatenate(shown), *RATE_AXIS.get(quantity,
                                                                             (10.0, 1.0)))
            if y_range is not None and y_range != plot._y_range:
                plot._y_range = y_range
                plot.setYRange(*y_range, padding=0)
        for key, item in self.image_items.items():
            ring = b.images[key]
            if ring.newest_bin is None:
                continue
            image, start_s, end_s = ring.image()
            if getattr(item, "_version", None) != ring.version:
                item.setImage(image, autoLevels=False, levels=(0.0, 1.0))
                item._version = ring.version
            grid = self.layout_info.output(key).grid
            step = float(grid[1] - grid[0]) if len(grid) > 1 else 1.0
            item.setRect(QtCore.QRectF(start_s - now, grid[0] - step / 2, end_s - start_s,
                                       len(grid) * step))

    def _draw_status(self) -> None:
        state = self.buffers.state
        symbol = {"connected": "\u25cf", "stream lost": "\u2716",
                  "recording ended": "\u25a0"}.get(state.stream, "\u25b6"
                                                   if state.stream.startswith("replaying")
                                                   else "\u25cb")
        if self._final:
            symbol = "\u25a0"
        text = self._final or state.stream_words()
        self.stream_label.setText(f"{symbol} {text}")
        alarm = (state.stream == "stream lost" or bool(state.lost_streams)
                 or self._final.startswith("engine stopped"))
        if alarm != self._alarm_shown:
            self._alarm_shown = alarm
            self.stream_label.setStyleSheet(
                "font-size: 22px; font-weight: bold;" + (" color: #FF8A80;" if alarm else ""))
        if state.notice:
            self.notice_label.setText(state.notice)
            self.notice_label.setToolTip(state.notice)

    def _draw_channel_labels(self) -> None:
        state = self.buffers.state
        # Compact rows: one line in smaller type (name, kind, word, value).
        big, small, word_pt = (12, 10, 11) if self.compact_traces else (15, 12, 14)
        for label, (name, kind) in zip(self.channel_labels, self.layout_info.channels):
            est = state.channel_estimate(name, kind)
            colour = self.colours[name]
            head = (f"<span style='font-size:{big}pt; font-weight:bold; color:{colour}'>"
                    f"{name}</span>&nbsp;<span style='font-size:{small - 1}pt; color:{DIM}'>"
                    f"{kind}</span>")
            if kind == "acc":
                body = f"<span style='font-size:{small}pt; color:{DIM}'>motion reference</span>"
            elif est is None:
                body = (f"<span style='font-size:{small}pt; color:{DIM}'>quality: warming "
                        f"up</span>")
            else:
                word = quality_word(est.quality)
                body = (f"<span style='font-size:{word_pt}pt; font-weight:bold; "
                        f"color:{WORD_COLOURS[word]}'>{word}</span>&nbsp;"
                        f"<span style='font-size:{small}pt; color:{TEXT}'>"
                        f"quality {est.quality:.2f}</span>")
            html = f"{head}{'&nbsp;&nbsp;' if self.compact_traces else '<br>'}{body}"
            if getattr(label, "_html", None) != html:
                label.setText(html)
                label._html = html

    def _draw_timing(self) -> None:
        """Compute time per hop and display frame rate, averaged over a few seconds."""
        wall = time.monotonic()
        fps = self.display_fps()
        dropped = self.buffers.state.dropped
        self.display_label.setText(f"display {fps:.0f} fps"
                                   + (f", skipped {dropped} updates" if dropped else ""))
        st = self.stats
        if st is None:
            return
        self._timing.append((wall, st.compute_s, st.stream_seconds))
        while len(self._timing) > 2 and wall - self._timing[0][0] > 5.0:
            self._timing.popleft()
        _, c0, s0 = self._timing[0]
        _, c1, s1 = self._timing[-1]
        if s1 - s0 <= 0:
            return
        load = (c1 - c0) / (s1 - s0)
        hop_s = min(o.hop_s for o in self.layout_info.outputs)
        faster = f"{1 / load:,.0f}x" if load > 0 else "\u221e x"
        self.timing_label.setText(f"compute {1e3 * load * hop_s:.1f} ms/hop "
                                  f"({faster} real time)")

    def _draw_clock(self) -> None:
        text = self.clock.text()
        if self.clock_label.text() != text:
            self.clock_label.setText(text)

    # ----------------------------------------------------------------- freezing
    def set_frozen(self, frozen: bool) -> None:
        """Freeze (True) or resume (False) the plots. Only drawing stops: the feed is
        still drained, so resuming redraws at once from up-to-date buffers."""
        frozen = bool(frozen)
        if frozen == self.frozen:
            return
        self.frozen = frozen
        if self.freeze_button.isChecked() != frozen:
            self.freeze_button.setChecked(frozen)  # its signal comes back here: no-op
        if frozen:
            self.frozen_at_s = self.clock.elapsed_s()
            self.frozen_label.setText(f"plots frozen at {format_duration(self.frozen_at_s)} ")
            self.freeze_button.setText(f"Resume plots ({FREEZE_KEY})")
        else:
            self.frozen_label.setText("")
            self.freeze_button.setText(f"Freeze plots ({FREEZE_KEY})")
            self._raw_drawn = -1
            self._slow_drawn = None
            self.draw(force=True)

    def toggle_frozen(self) -> None:
        """The freeze key's slot."""
        self.set_frozen(not self.frozen)

    def display_fps(self) -> float:
        """Paints per second of the trace view over the last two seconds."""
        times = [t for t in self.paint_times if t > time.monotonic() - 2.0]
        if len(times) < 2 or times[-1] <= times[0]:
            return 0.0
        return (len(times) - 1) / (times[-1] - times[0])

    # ---------------------------------------------------------------- lifecycle
    def set_final(self, message: str) -> None:
        """Show how the run ended (the window may stay open to look at the result)."""
        self._final = message

    def request_close(self) -> None:
        """Close soon, from the event loop (safe inside a signal handler)."""
        QtCore.QTimer.singleShot(0, self.close)

    def closeEvent(self, event) -> None:
        if not self._closing:
            self._closing = True
            self.timer.stop()
            self.refresh()
            self.draw(force=True)
            # Let pending layout requests (a longer status text) settle before the grab.
            QtCore.QCoreApplication.sendPostedEvents()
            path = os.environ.get(SCREENSHOT_ENV)
            if path:
                if not self.grab().save(path):
                    log.warning("could not save the window screenshot to %s", path)
            for callback in self.on_close:
                callback()
            self.closed.emit()
        event.accept()


class PaintCounter(QtCore.QObject):
    """Event filter recording the time of every paint event."""

    def __init__(self, times):
        super().__init__()
        self.times = times

    def eventFilter(self, obj, event):
        if event.type() == QtCore.QEvent.Type.Paint:
            self.times.append(time.monotonic())
        return False


def application():
    """The process's QApplication (created on first use).

    Qt is given only the program name, never the command line: Qt reads X11 options
    from its arguments, and ridgewatch's own ``--display qt`` would be taken as the X
    display to connect to.
    """
    app = QtWidgets.QApplication.instance()
    if app is None:
        app = QtWidgets.QApplication([sys.argv[0] if sys.argv and sys.argv[0] else "ridgewatch"])
        app.setApplicationName("ridgewatch")
    return app


def _binding_version() -> str:
    """Name and version of the Qt binding pyqtgraph uses, e.g. ``PySide6 6.12.0``."""
    name = pg.Qt.QT_LIB
    module = sys.modules.get(name)
    return f"{name} {getattr(module, '__version__', '')}".strip()


def binding_drops_none(calls: int = 64, probe=None) -> bool:
    """True when calls into the Qt binding release references to ``None`` they never
    took.

    PySide6 6.12.0 does so on every call returning nothing under Python 3.11 (measured
    on this project's machines: ``QObject.setObjectName`` lowers ``sys.getrefcount(None)``
    by one per call; 6.11.3 does not). On Python 3.11 ``None`` is reference counted, so a
    window running for minutes ends in "Fatal Python error: none_dealloc". From Python
    3.12 on ``None`` is immortal and the fault is harmless.

    Parameters
    ----------
    calls : how many probe calls to make.
    probe : a callable returning nothing to test (default: a Qt setter).
    """
    if sys.version_info >= (3, 12):
        return False
    if probe is None:
        target = QtCore.QObject()

        def probe():
            target.setObjectName("probe")
    probe()
    before = sys.getrefcount(None)
    for _ in range(calls):
        probe()
    return sys.getrefcount(None) <= before - calls // 2


def run_with_window(runner, profile=None, duration_s: float | None = None,
                    keep_open: bool | None = None, on_window=None, headline: str = "now"):
    """Run ``runner`` in a worker thread while the window draws its updates.

    Parameters
    ----------
    runner : a :class:`~streamer.runner.Runner` (its listeners get the window's feed).
    profile : the engine profile (the window reads it from ``runner.monitor``; kept for
        the caller's convenience).
    duration_s : close the window (and stop the runner) after this many seconds.
    keep_open : keep the window open after the source ends until the user closes it.
        Default: yes on a real screen without ``duration_s``; no offscreen, where
        nobody could close it.
    on_window : called with the :class:`MonitorWindow` once it is shown (benchmarks
        and tests use it to watch or close the window).

    Returns
    -------
    RunStats
        The runner's statistics; the log is complete when this returns.

    Raises
    ------
    InputError
        When the installed Qt binding would crash the interpreter (see
        :func:`binding_drops_none`); the log is closed first.
    BaseException
        Whatever the worker thread raised, re-raised here once the window has closed.
    """
    from streamer.runner import install_signal_handlers

    app = application()
    if binding_drops_none():
        runner.close()
        raise InputError(
            f"the installed {_binding_version()} releases references it never "
            f"took on Python {sys.version_info.major}.{sys.version_info.minor}, which "
            f"crashes the window; install another version (pip install "
            f"'PySide6-Essentials<6.12') or use --display text")
    layout = DisplayLayout.from_monitor(runner.monitor)
    feed = UpdateFeed()
    source_info = getattr(getattr(runner, "source", None), "info", None)
    title = str(getattr(source_info, "name", ""))
    if profile is not None and getattr(profile, "name", ""):
        title += f"  \u00b7  profile {profile.name}"
    window = MonitorWindow(layout, feed, stats=getattr(runner, "stats", None), title=title,
                           headline=headline)
    window.marker_sink = getattr(runner, "add_user_marker", None)
    if getattr(runner, "beat_session", None) is not None:
        window.add_hrv(runner.beat_session.sources)
    if keep_open is None:
        keep_open = duration_s is None and app.platformName() != "offscreen"

    outcome: dict = {}

    def work():
        try:
            outcome["stats"] = runner.run()
        except BaseException as exc:  # handed to the main thread, raised there
            outcome["error"] = exc

    worker = threading.Thread(target=work, name="ridgewatch-engine", daemon=True)
    loop = QtCore.QEventLoop()
    window.closed.connect(loop.quit)
    window.on_close.append(lambda: runner.stop("window closed"))

    def watch_worker():
        if worker.is_alive() or window._final:
            return
        if "error" in outcome:
            exc = outcome["error"]
            window.set_final(f"engine stopped with an error: {type(exc).__name__}: {exc}")
        else:
            window.set_final(f"stopped: {runner.stats.stopped_by}")
        window.refresh()
        window.draw(force=True)
        if not keep_open:
            window.request_close()

    def time_up():
        runner.stop(f"--duration {duration_s:g} s reached")
        window.request_close()

    watcher = QtCore.QTimer(window)
    watcher.setInterval(SIGNAL_POLL_MS)
    # Besides watching the worker, this timer hands control back to the interpreter
    # regularly so that Python-level SIGINT/SIGTERM handlers run under Qt's loop.
    watcher.timeout.connect(watch_worker)
    try:
        restore = install_signal_handlers(runner, also=window.request_close)
    except ValueError:  # not the main thread: no signal handlers (the caller owns them)
        restore = None
    runner.listeners.append(feed.listener)
    try:
        window.show()
        window.timer.start()
        watcher.start()
        if duration_s is not None:
            QtCore.QTimer.singleShot(max(0, int(round(duration_s * 1000))), time_up)
        worker.start()
        if on_window is not None:
            on_window(window)
        loop.exec()
    finally:
        watcher.stop()
        window.timer.stop()
        runner.stop("window closed")
        while worker.is_alive():
            worker.join(0.1)
        if feed.listener in runner.listeners:
            runner.listeners.remove(feed.listener)
        if restore is not None:
            restore()
        window.deleteLater()
        app.processEvents()
    if "error" in outcome:
        raise outcome["error"]
    return outcome["stats"]
