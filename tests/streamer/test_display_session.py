"""The displays during a session: elapsed session time and wall-clock time, time axes
with units, freezing the plots (never estimation or logging), and a window whose rows
fit with up to eight channels at 1280 x 800."""

from __future__ import annotations

import io
import math
import time

import numpy as np
import pytest

from estimators.monitor import RateMonitor
from streamer.display.buffers import DisplayLayout, UpdateFeed
from streamer.display.state import SessionClock, format_duration
from streamer.display.text import TextDisplay
from streamer.display.snapshot import take_snapshot
from streamer.runner import Update
from streamer.sources.base import Chunk
from tests.streamer.test_display import (_runner_on, check_complete_log, engine_updates,  # noqa: F401
                                         qt, recording)


class FakeWall:
    """A wall clock the test moves by hand (epoch seconds)."""

    def __init__(self, start: float = 1_700_000_000.0):
        self.now = start

    def __call__(self) -> float:
        return self.now


def local(epoch_s: float) -> str:
    return time.strftime("%H:%M:%S", time.localtime(epoch_s))


# ------------------------------------------------------------------- session clock


def test_session_clock_gives_elapsed_and_local_time():
    wall = FakeWall()
    clock = SessionClock(wall=wall)
    assert clock.text() == f"session 0:00:00  \u00b7  {local(wall.now)}"
    wall.now += 2 * 3600 + 3 * 60 + 4.9
    assert clock.elapsed_s() == pytest.approx(7384.9)
    assert clock.text(sep=" at ") == f"session 2:03:04 at {local(wall.now)}"
    assert format_duration(math.nan) == "-:--:--"


def test_text_display_header_shows_session_and_wall_clock():
    wall = FakeWall()
    display = TextDisplay(stream=io.StringIO(), refresh_s=0.0,
                          clock=SessionClock(wall=wall))
    wall.now += 65.0
    display.draw(force=True)
    first = display.stream.getvalue().splitlines()[0]
    assert first == (f"ridgewatch (research tool, not a medical device) - waiting for data - "
                     f"session 0:01:05 at {local(wall.now)}")


# --------------------------------------------------------------------------- window


def window_on(qt, layout, clock=None, size=(1280, 800)):
    window = qt.MonitorWindow(layout, UpdateFeed(maxsize=100_000), clock=clock)
    window.resize(*size)
    window.show()
    qt.application().processEvents()
    return window


def feed(qt, window, updates) -> None:
    for u in updates:
        window.feed.listener(u)
    window.refresh()
    window.draw(force=True)
    qt.application().processEvents()


def curve_data(curve) -> tuple:
    return tuple(np.empty(0) if a is None else np.array(a, dtype=np.float64, copy=True)
                 for a in curve.getData())


def plot_data(window) -> dict:
    """What the plots hold: trace curves, rate curves and bands, spectrogram images."""
    data = {}
    for i, curve in enumerate(window.trace_curves):
        data[("trace", i)] = curve_data(curve)
    for key, curve in window.rate_curves.items():
        data[("rate", key)] = curve_data(curve)
        band = window.band_items[key]
        data[("band", key)] = (band.x.copy(), band.lower.copy(), band.upper.copy())
    for key, item in window.image_items.items():
        data[("image", key)] = None if item.image is None else np.array(item.image, copy=True)
    return data


def same(a: dict, b: dict) -> bool:
    def equal(x, y):
        if x is None or y is None:
            return x is y
        if isinstance(x, tuple):
            return len(x) == len(y) and all(equal(p, q) for p, q in zip(x, y))
        return x.shape == y.shape and np.array_equal(x, y, equal_nan=True)
    return a.keys() == b.keys() and all(equal(a[k], b[k]) for k in a)


def assert_plots_show_the_buffers(window) -> None:
    """The plots hold exactly what the buffers hold now (nothing older)."""
    b = window.buffers
    t, x = b.raw.view()
    for i, curve in enumerate(window.trace_curves):
        cx, cy = curve.getData()
        np.testing.assert_array_equal(cx, t - b.now_s)
        np.testing.assert_array_equal(cy, x[:, i])
    for key, curve in window.rate_curves.items():
        view = b.rates[key].view()
        cx, cy = curve.getData()
        np.testing.assert_array_equal(cx, view.time_s - b.now_s)
        np.testing.assert_array_equal(cy, view.rate_per_min)


@pytest.mark.gui
def test_the_window_shows_session_and_wall_clock(qt, fed_layout):
    wall = FakeWall()
    window = window_on(qt, fed_layout, clock=SessionClock(wall=wall))
    try:
        wall.now += 3 * 60 + 7.2
        window.draw(force=True)
        assert window.clock_label.text() == f"session 0:03:07  \u00b7  {local(wall.now)}"
    finally:
        window.close()


@pytest.mark.gui
def test_every_time_axis_says_its_unit(qt, fed_layout):
    window = window_on(qt, fed_layout)
    try:
        axes = [window.trace_axis] + [p.getAxis("bottom") for p in window.rate_plots.values()]
        axes += [p.getAxis("bottom") for p in window.image_plots.values()]
        assert len(axes) == 1 + len(window.rate_plots) + len(window.image_plots) > 3
        for axis in axes:
            assert axis.isVisible() and axis.labelText.endswith("(s)"), axis.labelText
    finally:
        window.close()


@pytest.fixture(scope="module")
def fed_layout():
    monitor, _, _, _ = engine_updates(duration_s=10.0)
    return DisplayLayout.from_monitor(monitor)


@pytest.mark.gui
def test_frozen_plots_keep_still_then_catch_up(qt):
    """Updates keep flowing into the buffers while frozen; the plots do not move and
    the cards do; resuming draws the newest data at once."""
    monitor, updates, _, _ = engine_updates()
    window = window_on(qt, DisplayLayout.from_monitor(monitor))
    try:
        half = len(updates) // 2
        feed(qt, window, updates[:half])
        window.set_frozen(True)
        assert window.freeze_button.isChecked() and "frozen" in window.frozen_label.text()
        before = plot_data(window)
        card = window.cards[("hr", "PPG")]
        card_before = card.value.text(), card.detail.text()
        now_before = window.buffers.now_s
        feed(qt, window, updates[half:])
        assert window.buffers.now_s > now_before + 10.0  # the buffers kept up
        assert same(plot_data(window), before)
        latest = window.buffers.state.latest[("hr", "PPG")]
        assert (card.value.text(), card.detail.text()) != card_before
        # the card follows the newest estimate (its centre rate's age beside the rate now)
        assert f"{latest.delay_s:.1f} s ago" in card.detail.text()
        window.set_frozen(False)
        assert not window.freeze_button.isChecked() and window.frozen_label.text() == ""
        assert not same(plot_data(window), before)
        assert_plots_show_the_buffers(window)
    finally:
        window.close()


@pytest.mark.gui
def test_freezing_never_pauses_the_engine_or_the_log(qt, tmp_path):
    """A real run in the window: the freeze key during the run; the runner keeps
    writing rows while the plots stay as they were; the button resumes them and they
    catch up with the newest data."""
    from pyqtgraph.Qt import QtCore, QtTest

    runner = _runner_on(recording(40.0), tmp_path, speed=8.0, name="frozen.csv")
    seen: dict = {}

    def on_window(window):
        def step():
            b = window.buffers
            if "frozen" not in seen:
                if ("hr", "PPG") in b.state.ever_rated:
                    QtTest.QTest.keyClick(window, QtCore.Qt.Key.Key_F)
                    seen.update(frozen=plot_data(window), rows=runner.log.rows_written,
                                now=b.now_s, is_frozen=window.frozen)
            elif "resumed" not in seen:
                if runner.log.rows_written >= seen["rows"] + 40 and b.now_s >= seen["now"] + 3:
                    window.refresh()
                    seen.update(still=plot_data(window), rows_still=runner.log.rows_written)
                    window.freeze_button.click()
                    seen.update(resumed=plot_data(window), is_resumed=not window.frozen)
                    assert_plots_show_the_buffers(window)
                    seen["caught_up"] = True
                    window.close()

        poll = qt.QtCore.QTimer(window)
        poll.timeout.connect(step)
        poll.start(30)

    stats = qt.run_with_window(runner, runner.profile, on_window=on_window)
    assert seen["is_frozen"] and seen["is_resumed"] and seen.get("caught_up")
    assert seen["rows_still"] >= seen["rows"] + 40
    assert same(seen["still"], seen["frozen"])
    assert not same(seen["resumed"], seen["frozen"])
    assert stats.stopped_by == "window closed"
    assert check_complete_log(tmp_path / "frozen.csv") == stats.estimates >= seen["rows_still"]


# --------------------------------------------------------------------------- layout


def eight_channel_layout():
    channels = [(f"PPG{k}", "ppg") for k in range(4)] + [("ECG", "ecg"), ("RESP", "resp"),
                                                          ("ACC_X", "acc"), ("ACC_Y", "acc")]
    monitor = RateMonitor(channels, 50.0, "wrist")
    return monitor, DisplayLayout.from_monitor(monitor)


@pytest.mark.gui
@pytest.mark.parametrize("n_channels", [1, 4, 8])
def test_rows_fit_at_1280_by_800(qt, n_channels, rng):
    monitor, layout = eight_channel_layout()
    if n_channels < 8:
        channels = list(monitor.channels)[:n_channels]
        monitor = RateMonitor(channels, 50.0, "wrist")
        layout = DisplayLayout.from_monitor(monitor)
    window = window_on(qt, layout)
    try:
        t = np.arange(500) / 50.0
        x = rng.standard_normal((len(t), n_channels))
        estimates = monitor.update(x, t)
        feed(qt, window, [Update(estimates, Chunk(x, t), take_snapshot(monitor, estimates))])
        for frozen in (False, True):
            window.set_frozen(frozen)
            qt.application().processEvents()
            assert (window.width(), window.height()) == (1280, 800)
            view = window.traces_widget.viewport().rect()
            rows = [p.mapRectToScene(p.boundingRect()) for p in window.trace_plots]
            rows.append(window.trace_axis.mapRectToScene(window.trace_axis.boundingRect()))
            for rect in rows:
                assert rect.top() >= 0 and rect.bottom() <= view.height() + 0.5
            # Each trace is tall enough to read a waveform (20 px: our own choice).
            assert min(r.height() for r in rows[:-1]) >= 20
            for widget, plots in ((window.rates_widget, window.rate_plots),
                                  (window.images_widget, window.image_plots)):
                width = widget.viewport().rect().width()
                for plot in plots.values():
                    rect = plot.mapRectToScene(plot.boundingRect())
                    assert rect.left() >= 0 and rect.right() <= width + 0.5
    finally:
        window.close()
