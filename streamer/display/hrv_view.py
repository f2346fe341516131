"""Heart-rate variability on the displays: a text line per source, and for the window
an HRV card and a DFA alpha1 trend with reference lines at 0.75 and 0.5.

The lines at 0.75 and 0.5 mark where alpha1 has been reported to cross near the first
and second ventilatory thresholds during incremental exercise (Rogers et al., Front.
Physiol. 2021; from memory): research findings, not a diagnosis, and ridgewatch is a
research tool, not a medical device. Both views only draw what the runner hands them
(``Update.hrv``: ``(source, HrvRow)`` pairs).
"""

from __future__ import annotations

import collections
import math

import numpy as np

ALPHA1_LINES = (0.75, 0.5)
"""Reference lines of the alpha1 trend (see the module notes)."""

LINE_COLOURS = ("#F5C26B", "#FF8A80")
"""Colours of the 0.75 and 0.5 lines (apart from the grey grid)."""

HRV_CAUTION = "HRV: research measures, not a diagnosis"

TREND_SPAN_S = 1200.0
"""Seconds of alpha1 history the trend shows (an incremental test's stages)."""


def _cell(value: float, digits: int, unit: str = "") -> str:
    return "--" if not math.isfinite(value) else f"{value:.{digits}f}{unit}"


def format_hrv_line(source: str, row) -> str:
    """One text-display line for the newest :class:`estimators.hrv.HrvRow` of a source.

    Examples
    --------
    >>> from estimators.hrv import HrvRow
    >>> print(format_hrv_line("ECG", HrvRow(60.0, 59.2, 24.06, 39.5, 770.1, 0.025, 78, 0.81)))
    HRV        ECG        RMSSD 24.1 ms  SDNN 39.5 ms  DFA a1 0.81  corrected 2.5 %  (research measures, not a diagnosis)
    >>> print(format_hrv_line("ECG", HrvRow(5.0, 2.6, math.nan, math.nan, math.nan, 0.0, 3, math.nan)))
    HRV        ECG        RMSSD -- ms  SDNN -- ms  DFA a1 --  corrected 0.0 %  (research measures, not a diagnosis)
    """
    share = row.corrected_share
    return (f"{'HRV':<10} {source:<10} RMSSD {_cell(row.rmssd_ms, 1)} ms  "
            f"SDNN {_cell(row.sdnn_ms, 1)} ms  DFA a1 {_cell(row.dfa_alpha1, 2)}  "
            f"corrected {_cell(100 * share, 1)} %  (research measures, not a diagnosis)")


class HrvHistory:
    """The newest HRV row and the alpha1 history per source (no Qt)."""

    def __init__(self, span_s: float = TREND_SPAN_S, maxlen: int = 4096):
        self.span_s = span_s
        self.latest: dict = {}
        self.alpha1: dict = collections.defaultdict(lambda: collections.deque(maxlen=maxlen))
        self.version = 0

    def apply(self, update) -> None:
        for source, row in getattr(update, "hrv", ()):
            self.latest[source] = row
            self.alpha1[source].append((row.emitted_s, row.dfa_alpha1))
            self.version += 1

    def view(self, source: str) -> tuple[np.ndarray, np.ndarray]:
        points = np.array(self.alpha1.get(source, ()), dtype=np.float64).reshape(-1, 2)
        return points[:, 0], points[:, 1]


def make_hrv_panel(sources, colours: dict, card_width: int):
    """The window's HRV card and alpha1 trend (Qt is imported here, so the text display
    never loads it). Returns an object with ``card``, ``trend``, ``apply(update)`` and
    ``draw(now_s)``."""
    import pyqtgraph as pg
    from pyqtgraph.Qt import QtCore, QtGui, QtWidgets

    from streamer.display.qt_window import BACKGROUND, DIM, FUSED_COLOUR, GRID, PANEL, TEXT

    class HrvCard(QtWidgets.QFrame):
        """RMSSD, SDNN, mean interval, DFA alpha1 and the corrected share per source."""

        def __init__(self):
            super().__init__()
            self.setObjectName("card")
            self.setStyleSheet(f"QFrame#card {{ border-left: 8px solid {DIM}; }}")
            self.setFixedWidth(card_width)
            grid = QtWidgets.QVBoxLayout(self)
            grid.setContentsMargins(16, 8, 12, 8)
            title = QtWidgets.QLabel("HEART-RATE VARIABILITY")
            title.setStyleSheet(f"font-size: 17px; font-weight: bold; color: {DIM};")
            grid.addWidget(title)
            self.lines = {}
            for source in sources:
                label = QtWidgets.QLabel("")
                label.setTextFormat(QtCore.Qt.TextFormat.RichText)
                label.setStyleSheet("font-size: 17px;")
                grid.addWidget(label)
                self.lines[source] = label
            note = QtWidgets.QLabel(f"RMSSD, SDNN: last 60 s; DFA a1: last 120 s. "
                                    f"{HRV_CAUTION}.")
            note.setWordWrap(True)
            note.setStyleSheet(f"font-size: 13px; color: {DIM};")
            grid.addWidget(note)
            self.show_rows({})

        def show_rows(self, latest: dict) -> None:
            for source, label in self.lines.items():
                row = latest.get(source)
                colour = colours.get(source, FUSED_COLOUR)
                if row is None:
                    label.setText(f"<b style='color:{colour}'>{source}</b>: waiting for "
                                  "beats")
                    continue
                label.setText(
                    f"<b style='color:{colour}'>{source}</b><br>"
                    f"RMSSD <b>{_cell(row.rmssd_ms, 0)}</b> ms &nbsp; "
                    f"SDNN <b>{_cell(row.sdnn_ms, 0)}</b> ms<br>"
                    f"DFA a1 <b style='font-size:26px'>{_cell(row.dfa_alpha1, 2)}</b> &nbsp; "
                    f"mean NN {_cell(row.mean_nn_ms, 0)} ms<br>"
                    f"<span style='color:{DIM}'>corrected beats "
                    f"{_cell(100 * row.corrected_share, 1)} %</span>")

    class Panel:
        def __init__(self):
            self.history = HrvHistory()
            self.card = HrvCard()
            self.trend = pg.GraphicsLayoutWidget()
            self.trend.setBackground(BACKGROUND)
            plot = self.trend.ci.addPlot(row=0, col=0)
            plot.setTitle(f"DFA alpha1 (120 s), last {TREND_SPAN_S / 60:g} min; lines at "
                          f"0.75 and 0.5: reported near the ventilatory thresholds "
                          f"(research, not a diagnosis)", color=TEXT, size="11pt")
            font = QtGui.QFont()
            font.setPixelSize(14)
            for side in ("left", "bottom"):
                axis = plot.getAxis(side)
                axis.setTextPen(pg.mkPen(TEXT))
                axis.setPen(pg.mkPen(GRID))
                axis.setStyle(tickFont=font)
            plot.showGrid(x=True, y=True, alpha=1.0)
            plot.setLabel("left", "alpha1", color=TEXT, **{"font-size": "15px"})
            plot.setLabel("bottom", "time before the newest sample (s)", color=TEXT,
                          **{"font-size": "13px"})
            plot.setMenuEnabled(False)
            plot.hideButtons()
            plot.setMouseEnabled(x=False, y=False)
            plot.setXRange(-TREND_SPAN_S, 0, padding=0)
            plot.setYRange(0.2, 1.6, padding=0)
            for k, level in enumerate(ALPHA1_LINES):
                line = pg.InfiniteLine(pos=level, angle=0, movable=False,
                                       pen=pg.mkPen(LINE_COLOURS[k], width=2,
                                                    style=QtCore.Qt.PenStyle.DashLine),
                                       label=f"{level:g}",
                                       labelOpts={"color": TEXT, "position": 0.03 + 0.06 * k,
                                                  "fill": pg.mkBrush(PANEL)})
                plot.addItem(line)
            self.curves = {s: plot.plot(pen=pg.mkPen(colours.get(s, FUSED_COLOUR), width=2.5),
                                        symbol="o", symbolSize=5,
                                        symbolBrush=colours.get(s, FUSED_COLOUR),
                                        connect="finite", name=s) for s in sources}
            self.plot = plot
            self._drawn = -1

        def apply(self, update) -> None:
            self.history.apply(update)

        def draw(self, now_s: float) -> None:
            if self.history.version == self._drawn or not math.isfinite(now_s):
                return
            self._drawn = self.history.version
            self.card.show_rows(self.history.latest)
            for source, curve in self.curves.items():
                t, alpha = self.history.view(source)
                if not np.isfinite(alpha).any():  # nothing to draw (and no bounds)
                    t, alpha = t[:0], alpha[:0]
                curve.setData(t - now_s, alpha)

    return Panel()
