"""Tests of the displays: wording and state, the ring buffers behind the window, the
terminal display, and the Qt window (offscreen) with its threading and shutdown.

Buffers are checked against slow, obvious references (concatenate everything, keep
the tail); the window is checked by feeding it updates made by the real engine on
synthetic signals and reading back what its curves, images and labels hold.
"""

from __future__ import annotations

import io
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from estimators.config import get_profile
from estimators.estimate import Estimate
from estimators.monitor import RateMonitor
from streamer.display.buffers import (BAND_FLOOR, DisplayBuffers, DisplayLayout, FramePacer,
                                      RateHistory, RawTraceRing, SpectrogramRing, UpdateFeed,
                                      confidence_band, rate_axis_range)
from streamer.display.state import (DisplayState, SessionClock, format_rate, quality_word,
                                    quantity_name, unit_of)
from streamer.display.text import TextDisplay, format_line
from streamer.display.snapshot import DisplaySnapshot, take_snapshot
from streamer.runner import Runner, RunStats, Update
from streamer.sinks.estimate_log import COLUMNS, EstimateLog, read_log, rows_text
from streamer.sources.base import ChannelInfo, Chunk, Recording, SourceEvent, SourceInfo
from tests.signals import dicrotic_pulse, rhythm

REPO_ROOT = Path(__file__).resolve().parents[2]
FS = 50.0
CHANNELS = (("PPG", "ppg"), ("RESP", "resp"), ("ACC", "acc"))
DURATION_S = 40.0


# ----------------------------------------------------------------------------- signals


def synthetic(duration_s: float = DURATION_S, seed: int = 3):
    """PPG with a rate ramp 66 -> 84 bpm, a breathing belt at 15 /min and accelerometer
    noise, at 50 Hz: samples (n, 3) and timestamps (n,)."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(duration_s * FS)) / FS
    ppg = rhythm(t, 66.0 + 18.0 * t / duration_s, dicrotic_pulse, noise_std=0.05, rng=rng)
    resp = np.sin(2 * np.pi * 0.25 * t) + 0.05 * rng.standard_normal(len(t))
    acc = 0.1 * rng.standard_normal(len(t))
    return np.column_stack((ppg, resp, acc)), t


def engine_updates(chunk_n: int = 17, duration_s: float = DURATION_S):
    """The monitor, and runner-like updates it produces chunk by chunk."""
    samples, t = synthetic(duration_s)
    monitor = RateMonitor(CHANNELS, FS, "wrist")
    updates = []
    for a in range(0, len(t), chunk_n):
        x, ts = samples[a:a + chunk_n], t[a:a + chunk_n]
        estimates = monitor.update(x, ts)
        updates.append(Update(estimates, Chunk(x, ts), take_snapshot(monitor, estimates)))
    return monitor, updates, samples, t


@pytest.fixture(scope="module")
def fed():
    """One engine run shared by the tests that only read it."""
    return engine_updates()


def recording(duration_s: float = DURATION_S) -> Recording:
    samples, t = synthetic(duration_s)
    info = SourceInfo("synthetic test session", FS, tuple(
        ChannelInfo(name, kind) for name, kind in CHANNELS), "test:synthetic")
    return Recording(samples, t, info)


def check_complete_log(path: Path) -> int:
    """Every row of the log is a valid row and the file ends with a newline; returns
    the number of rows."""
    text = path.read_text()
    assert text.endswith("\n")
    rows = rows_text(path)
    for row in rows:
        cells = row.split(",")
        assert len(cells) == len(COLUMNS), row
        assert cells[2] in ("hr", "rr"), row
        float(cells[0]), float(cells[1])  # times are numbers
    table = read_log(path)
    assert len(table) == len(rows)
    return len(rows)


# -------------------------------------------------------------------- wording and state


@pytest.mark.parametrize("quality, word", [(1.0, "good"), (0.6, "good"), (0.59, "weak"),
                                           (0.3, "weak"), (0.29, "unusable"), (0.0, "unusable"),
                                           (math.nan, "unusable")])
def test_quality_word_thresholds(quality, word):
    assert quality_word(quality) == word


def test_units_names_and_dash():
    assert (unit_of("hr"), unit_of("rr")) == ("bpm", "breaths/min")
    assert (quantity_name("hr"), quantity_name("rr")) == ("heart rate", "breathing rate")
    assert format_rate(71.6) == "72"
    assert format_rate(math.nan) == "\u2014"


def _event(kind, message="msg", **detail):
    return Update([], None, None, SourceEvent(kind, message, 0.0, detail))


def test_stream_status_follows_the_events():
    state = DisplayState()
    assert state.stream == "waiting for data"
    state.apply(_event("replaying", "replaying x at 20x", speed=20.0))
    assert state.stream == "replaying at 20x"
    state.apply(_event("replaying", speed=math.inf))
    assert state.stream == "replaying at full speed"
    state.apply(_event("end", "end of x"))
    assert state.stream == "recording ended"
    assert state.status == "end of x"

    live = DisplayState()
    live.apply(Update([], Chunk(np.zeros((3, 1)), np.arange(3.0)), DisplaySnapshot.empty()))
    assert live.stream == "connected"
    assert live.newest_sample_s == 2.0
    live.apply(_event("lost", "stream 's' lost"))
    assert live.stream == "stream lost"
    live.apply(_event("gap", "stream 's' skipped 1.000 s of samples"))
    assert live.stream == "stream lost"  # a gap notice does not change the status
    assert live.notice == "stream 's' skipped 1.000 s of samples"
    live.apply(_event("resumed", "stream 's' is back"))
    assert live.stream == "connected"


def test_one_stream_of_a_session_lost_is_not_the_whole_session_lost():
    """A session's accelerometer (or marker) stream lost while the others run: the
    status stays connected and names the lost stream; only a loss with nothing left
    running says "stream lost"."""
    state = DisplayState()
    state.apply(Update([], Chunk(np.zeros((3, 1)), np.arange(3.0)), {}))
    message = ("stream 'arm-acc' lost; continuing without it (its channels read NaN) and "
               "waiting for it to come back")
    state.apply(_event("lost", message, stream="arm-acc", others_running=True))
    assert state.stream == "connected"
    assert state.stream_words() == "connected ('arm-acc' lost)"
    assert state.notice == message
    state.apply(_event("lost", "marker stream 'lab' lost; waiting for it to come back",
                       stream="lab", others_running=True))
    assert state.stream_words() == "connected ('arm-acc', 'lab' lost)"
    state.apply(_event("resumed", "stream 'arm-acc' is back", stream="arm-acc"))
    assert state.stream_words() == "connected ('lab' lost)"
    state.apply(_event("lost", "stream 'band-ppg' lost; waiting for it to come back",
                       stream="band-ppg", others_running=False))
    assert state.stream_words() == "stream lost ('lab' lost)"
    assert state.stream == "stream lost"


def test_text_header_names_the_lost_stream_of_a_session():
    out = io.StringIO()
    display = TextDisplay(stream=out, clock=SessionClock(wall=lambda: 65.0, started=0.0))
    display.state.apply(Update([], Chunk(np.zeros((3, 1)), np.arange(3.0)), {}))
    display.state.apply(_event("lost", "stream 'arm-acc' lost; continuing without it",
                               stream="arm-acc", others_running=True))
    assert display.header().startswith(
        "ridgewatch (research tool, not a medical device) - connected ('arm-acc' lost) - "
        "session 0:01:05 at ")


def test_state_tells_warming_up_from_no_estimate():
    state = DisplayState()
    nan = Estimate("hr", "PPG", 4.0, 8.0, math.nan, 0.1, 0.1)
    state.apply(Update([nan], None, None))
    assert ("hr", "PPG") not in state.ever_rated
    assert state.status == "running"
    state.apply(Update([Estimate("hr", "PPG", 4.25, 8.25, 70.0, 0.9, 0.9), nan], None, None))
    assert ("hr", "PPG") in state.ever_rated
    assert state.latest[("hr", "PPG")] is nan
    assert state.channel_estimate("PPG", "ppg") is nan
    assert state.channel_estimate("ACC", "acc") is None
    assert state.channel_estimate("RESP", "resp") is None


# --------------------------------------------------------------------- terminal display


def test_text_display_drops_instead_of_blocking_and_says_so():
    display = TextDisplay(stream=io.StringIO(), maxsize=2)
    for _ in range(5):
        display.listener(_event("gap"))
    assert display.state.dropped == 3
    display.drain()
    display.draw(force=True)
    assert "display skipped 3 updates" in display.stream.getvalue()
    assert "research tool, not a medical device" in display.stream.getvalue()


def test_text_line_shows_a_dash_without_rate():
    line = format_line(("rr", "RESP"), Estimate("rr", "RESP", 1.0, 17.0, math.nan, 0.2, 0.1))
    assert line == ("breathing  RESP          -- breaths/min  confidence   --  quality 0.10 "
                    "(unusable)  delay 16.0 s  (no estimate)")
    # A lost PPG: the engine's rows carry no rate but a confidence from before; the line
    # must not print a confidence beside the dash.
    line = format_line(("hr", "PPG"), Estimate("hr", "PPG", 1.0, 5.0, math.nan, 0.95, 0.0))
    assert "0.95" not in line


@pytest.mark.parametrize("rate, confidence, quality, shown, note", [
    (72.0, 0.93, 0.85, " 72.0 bpm", ""),
    (72.0, 0.65, 0.85, " 72.0 bpm", "  (uncertain)"),
    (174.0, 0.9, 0.18, "174.0 bpm", "  (uncertain)"),
    (174.0, 0.3, 0.7, "   -- bpm", "  (not shown: likely outside tolerance)"),
    (math.nan, 0.9, 0.9, "   -- bpm", "  (no estimate)"),
])
def test_text_line_follows_the_display_rule(rate, confidence, quality, shown, note):
    line = format_line(("hr", "PPG"), Estimate("hr", "PPG", 1.0, 5.0, rate, confidence, quality))
    assert f"PPG        {shown}" in line
    assert line.endswith("delay  4.0 s" + note)


def test_text_display_runs_until_done():
    display = TextDisplay(stream=io.StringIO(), refresh_s=0.0)
    updates = [Update([Estimate("hr", "PPG", 1.0, 5.0, 72.0, 0.9, 0.8)], None, None)]
    for u in updates:
        display.listener(u)
    display.run_until(lambda: True)
    assert "heart rate PPG" in display.stream.getvalue()


# ----------------------------------------------------------------------------- buffers


def test_update_feed_never_blocks_and_counts_drops():
    feed = UpdateFeed(maxsize=3)
    for k in range(10):
        feed.listener(k)
    assert feed.dropped == 7
    assert feed.drain(limit=2) == [0, 1]
    assert feed.drain() == [2]
    assert feed.drain() == []


@pytest.mark.parametrize("max_chunk", [1, 7, 64, 1000])
def test_raw_ring_equals_the_tail_of_everything_pushed(rng, max_chunk):
    fs, span_s = 20.0, 3.0
    n = 400
    x = rng.standard_normal((n, 2))
    t = np.arange(n) / fs
    ring = RawTraceRing(2, fs, span_s)
    a = 0
    while a < n:
        b = min(n, a + int(rng.integers(1, max_chunk + 1)))
        ring.push(x[a:b], t[a:b])
        a = b
        # The reference: every sample so far within span_s of the newest.
        keep = (t[:b] > t[b - 1] - span_s)
        got_t, got_x = ring.view()
        np.testing.assert_array_equal(got_t, t[:b][keep])
        np.testing.assert_array_equal(got_x, x[:b][keep])
        assert ring.newest_s == t[b - 1]


def test_raw_ring_trims_by_time_across_a_gap():
    ring = RawTraceRing(1, 10.0, 2.0)
    ring.push(np.ones((5, 1)), np.arange(5) / 10.0)
    ring.push(np.full((3, 1), 2.0), 100.0 + np.arange(3) / 10.0)
    t, x = ring.view()
    np.testing.assert_array_equal(t, 100.0 + np.arange(3) / 10.0)
    assert np.all(x == 2.0)


def test_raw_ring_rejects_bad_shapes():
    with pytest.raises(ValueError, match=r"n_channels=0 must be >= 1"):
        RawTraceRing(0, 10.0)
    with pytest.raises(ValueError, match=r"fs=nan must be a finite rate"):
        RawTraceRing(1, math.nan)
    with pytest.raises(ValueError, match=r"span_s=0 must be > 0"):
        RawTraceRing(1, 10.0, span_s=0)
    with pytest.raises(ValueError, match=r"samples.shape=\(2, 3\) must be \(2, 2\)"):
        RawTraceRing(2, 10.0).push(np.zeros((2, 3)), np.arange(2.0))


def test_rate_history_keeps_the_span_and_wraps(rng):
    history = RateHistory(span_s=10.0, hop_s=0.5)
    times = np.arange(200) * 0.5
    rates = rng.uniform(50, 90, 200)
    rates[[3, 195]] = np.nan
    for a in range(0, 200, 13):
        history.push(times[a:a + 13], rates[a:a + 13], np.full(len(times[a:a + 13]), 0.5),
                     np.full(len(times[a:a + 13]), 0.9))
    view = history.view()
    keep = times > times[-1] - 10.0
    np.testing.assert_array_equal(view.time_s, times[keep])
    np.testing.assert_array_equal(view.rate_per_min, rates[keep])
    assert np.isnan(view.rate_per_min[view.time_s == 97.5]).all()
    assert np.isnan(view.rate_per_min).sum() == 1
    history.push(1000.0, 70.0, 1.0, 1.0)  # one scalar estimate
    assert len(history.view()) == 1
    with pytest.raises(ValueError, match=r"span_s=0 and hop_s=1 must be > 0"):
        RateHistory(span_s=0, hop_s=1)


def test_spectrogram_ring_places_scaled_columns_by_time():
    ring = SpectrogramRing(3, span_s=2.0, bin_s=0.5)  # 4 bins
    assert ring.n_bins == 4
    ring.push(np.array([10.0, 10.5]), np.array([[1.0, 2.0, 4.0], [0.0, 0.0, 0.0]]))
    image, start_s, end_s = ring.image()
    assert (start_s, end_s) == (9.0, 11.0)
    np.testing.assert_allclose(image[-2], [0.25, 0.5, 1.0])
    np.testing.assert_array_equal(image[-1], 0.0)  # an all-zero column stays zero
    # A skip of one bin repeats the newer column; a longer one leaves empty bins.
    ring.push(np.array([11.5]), np.array([[3.0, 0.0, np.nan]]))
    image, _, end_s = ring.image()
    assert end_s == 12.0
    np.testing.assert_allclose(image[-2:], [[1.0, 0.0, 0.0]] * 2)
    ring.push(np.array([13.5]), np.array([[0.0, 5.0, 0.0]]))
    image, _, _ = ring.image()
    np.testing.assert_allclose(image, [[0, 0, 0]] * 3 + [[0, 1, 0]])
    # A clock far in the past (a new stream) starts afresh.
    ring.push(np.array([1.0]), np.array([[0.0, 0.0, 2.0]]))
    image, start_s, end_s = ring.image()
    assert end_s == 1.5
    np.testing.assert_allclose(image, [[0, 0, 0]] * 3 + [[0, 0, 1]])
    with pytest.raises(ValueError, match=r"spectra.shape=\(1, 2\) must be \(1, 3\)"):
        ring.push(np.array([2.0]), np.zeros((1, 2)))


def test_confidence_band_widens_as_confidence_falls():
    rate = np.array([60.0, 60.0, 60.0, np.nan])
    conf = np.array([1.0, 0.5, 0.0, 1.0])
    lower, upper = confidence_band(rate, conf, 4.0)
    np.testing.assert_allclose(upper - rate, [4.0, 8.0, 4.0 / BAND_FLOOR, np.nan])
    np.testing.assert_allclose(rate - lower, upper - rate)


def test_rate_axis_range_rounds_and_keeps_a_least_span():
    assert rate_axis_range(np.array([np.nan]), 20.0, 5.0) is None
    # 100..160 with a 10 % margin is 94..166, rounded out to multiples of 5.
    assert rate_axis_range(np.array([100.0, np.nan, 160.0]), 20.0, 5.0) == (90.0, 170.0)
    # One value: the least span (8) around it, 11..19, rounded out to multiples of 2.
    assert rate_axis_range(np.array([15.0]), 8.0, 2.0) == (10.0, 20.0)


def test_frame_pacer_slows_down_when_drawing_takes_too_much():
    pacer = FramePacer(fastest_s=0.04, slowest_s=0.2, share=0.5)
    wall = cpu = 0.0
    for _ in range(40):  # drawing uses 90 % of a core
        wall += pacer.interval_s
        cpu += 0.9 * pacer.interval_s
        pacer.tick(wall, cpu)
    assert pacer.interval_s == 0.2
    for _ in range(80):  # drawing now uses 10 %
        wall += pacer.interval_s
        cpu += 0.1 * pacer.interval_s
        pacer.tick(wall, cpu)
    assert pacer.interval_s == 0.04
    with pytest.raises(ValueError, match=r"share=0 must be in \(0, 1\]"):
        FramePacer(share=0)
    with pytest.raises(ValueError, match=r"fastest_s=0.5 and slowest_s=0.1"):
        FramePacer(fastest_s=0.5, slowest_s=0.1)


def test_buffers_hold_what_the_engine_produced(fed):
    monitor, updates, samples, t = fed
    layout = DisplayLayout.from_monitor(monitor)
    reported = {(e.quantity, e.source) for u in updates for e in u.estimates}
    assert set(layout.keys) == reported  # every output the engine reports is shown
    assert layout.keys[0] == ("hr", "PPG")
    np.testing.assert_array_equal(layout.output(("hr", "PPG")).grid, monitor.grid("hr"))
    buffers = DisplayBuffers(layout, trace_span_s=5.0, rate_span_s=20.0, image_span_s=10.0)
    for u in updates:
        buffers.apply(u)
    assert buffers.now_s == t[-1]
    got_t, got_x = buffers.raw.view()
    keep = t > t[-1] - 5.0
    np.testing.assert_array_equal(got_x, samples[keep])
    for key in layout.keys:
        est = [e for u in updates for e in u.estimates if (e.quantity, e.source) == key]
        assert est, key
        times = np.array([e.time_s for e in est])
        rates = np.array([e.rate_per_min for e in est])
        view = buffers.rates[key].view()
        near = times > times[-1] - 20.0
        np.testing.assert_array_equal(view.time_s, times[near])
        np.testing.assert_array_equal(view.rate_per_min, rates[near])
        if key not in monitor.outputs:  # breathing from the pulse: no spectra exposed
            assert key not in buffers.images
            continue
        # The newest image column is the newest band spectrum scaled to a peak of 1.
        last = next(u.snapshot.spectra[key] for u in reversed(updates)
                    if len(u.snapshot.spectra.get(key, ())))
        image, _, end_s = buffers.images[key].image()
        spectrum = last.spectra[-1]
        np.testing.assert_allclose(image[-1], spectrum / spectrum.max())
        assert end_s - layout.output(key).hop_s <= last.time_s[-1] < end_s


def test_a_display_that_never_drains_does_not_stall_the_runner(tmp_path):
    """A frozen window: its feed fills up and drops, the run and its log complete."""
    from streamer.channels import Selected
    from streamer.sources.replay import RecordingSource

    rec = recording(30.0)
    selected = [Selected(i, name, kind) for i, (name, kind) in enumerate(CHANNELS)]
    log = EstimateLog(tmp_path / "frozen.csv", "replay", "test", dict(CHANNELS), {})
    runner = Runner(RecordingSource(rec, chunk_s=0.1), selected, get_profile("wrist"), log=log)
    feed = UpdateFeed(maxsize=4)
    runner.listeners.append(feed.listener)
    stats = runner.run()
    assert feed.dropped > 0
    assert stats.stopped_by == "end of recording"
    assert check_complete_log(tmp_path / "frozen.csv") == stats.estimates > 0


# ------------------------------------------------------------------------------ window


@pytest.fixture(scope="module")
def qt():
    """The window module with an offscreen QApplication."""
    previous = os.environ.get("QT_QPA_PLATFORM")
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    qw = pytest.importorskip("streamer.display.qt_window")
    qw.application()
    yield qw
    if previous is None:
        os.environ.pop("QT_QPA_PLATFORM", None)
    else:
        os.environ["QT_QPA_PLATFORM"] = previous


def _window(qt, monitor, updates, **spans):
    feed = UpdateFeed()
    window = qt.MonitorWindow(DisplayLayout.from_monitor(monitor), feed, **spans)
    window.show()
    for u in updates:
        feed.listener(u)
    window.refresh()
    window.draw(force=True)
    qt.application().processEvents()
    return window


@pytest.mark.gui
def test_window_curves_hold_the_estimates_fed(qt, fed):
    monitor, updates, samples, t = fed
    window = _window(qt, monitor, updates)
    try:
        now = t[-1]
        for key, curve in window.rate_curves.items():
            est = [e for u in updates for e in u.estimates if (e.quantity, e.source) == key]
            times = np.array([e.time_s for e in est])
            rates = np.array([e.rate_per_min for e in est])
            conf = np.array([e.confidence for e in est])
            np.testing.assert_allclose(curve.xData, times - now)
            np.testing.assert_array_equal(curve.yData, rates)
            settings = (monitor.outputs[key].settings if key in monitor.outputs
                        else monitor.pulse_breathing[key[1]].settings)
            halfwidth = settings.confidence_halfwidth_per_min
            lower, upper = confidence_band(rates, conf, halfwidth)
            band = window.band_items[key]
            np.testing.assert_array_equal(band.lower, lower)
            np.testing.assert_array_equal(band.upper, upper)
            # The readout shows the newest estimate's rate now (the default headline) in
            # whole units, or a dash when the display rule withholds it.
            shown = est[-1].now_display != "withhold"
            assert window.cards[key].value.text() == format_rate(
                est[-1].rate_now_per_min if shown else math.nan)
            if key not in window.image_items:
                continue
            for line in window.ridge_curves[key]:  # the ridge is the same track
                np.testing.assert_array_equal(line.yData, rates)
            image = window.image_items[key].image
            np.testing.assert_array_equal(image, window.buffers.images[key].image()[0])
            assert image.max() == 1.0
        for i, curve in enumerate(window.trace_curves):
            keep = t > t[-1] - window.trace_span_s
            np.testing.assert_array_equal(curve.yData, samples[keep, i])
            np.testing.assert_allclose(curve.xData, t[keep] - now)
        labels = [label.text for label in window.channel_labels]
        ppg_quality = window.buffers.state.latest[("hr", "PPG")].quality
        assert quality_word(ppg_quality) in labels[0]
        assert f"quality {ppg_quality:.2f}" in labels[0]
        assert "motion reference" in labels[2]
        caution = "research tool, not a medical device"
        assert caution in window.windowTitle()
        assert any(caution in w.text() for w in window.statusBar().findChildren(
            qt.QtWidgets.QLabel))
    finally:
        window.close()


@pytest.mark.gui
def test_window_shows_a_dash_and_greys_without_a_rate(qt, fed):
    monitor, updates, _, t = fed
    key = ("hr", "PPG")
    withheld = Estimate("hr", "PPG", t[-1] - 4, t[-1], math.nan, 0.1, 0.05)
    window = _window(qt, monitor, list(updates) + [Update([withheld], None, None)])
    try:
        card = window.cards[key]
        assert card.value.text() == "\u2014"
        assert "no estimate" in card.detail.text()
        assert "unusable" in card.detail.text()
        assert "color" in card.value.styleSheet()  # greyed
        assert "unusable" in window.channel_labels[0].text
        # The stream is lost: the last value stays, greyed, and the header says so.
        window.feed.listener(Update([], None, None, SourceEvent("lost", "stream 'x' lost")))
        window.refresh()
        window.draw(force=True)
        assert "stream lost" in window.stream_label.text()
        assert "stream lost" in window.cards[("rr", "RESP")].detail.text()
    finally:
        window.close()


@pytest.mark.gui
def test_window_keeps_the_cards_live_when_one_stream_of_a_session_is_lost(qt, fed):
    monitor, updates, _, _ = fed
    window = _window(qt, monitor, list(updates))
    try:
        window.feed.listener(Update([], None, None, SourceEvent(
            "lost", "stream 'arm-acc' lost; continuing without it", 0.0,
            {"stream": "arm-acc", "others_running": True})))
        window.refresh()
        window.draw(force=True)
        assert window.stream_label.text() == "\u25cf connected ('arm-acc' lost)"
        for card in window.cards.values():
            assert "stream lost" not in card.detail.text()
    finally:
        window.close()


@pytest.mark.gui
def test_a_long_notice_never_cuts_the_caution_in_the_status_bar(qt, fed):
    monitor, updates, _, _ = fed
    window = _window(qt, monitor, list(updates))
    try:
        window.resize(1280, 800)
        message = ("stream 'arm-acc' lost; continuing without it (its channels read NaN) and "
                   "waiting for it to come back")
        window.feed.listener(Update([], None, None, SourceEvent(
            "lost", message, 0.0, {"stream": "arm-acc", "others_running": True})))
        window.refresh()
        window.draw(force=True)
        qt.application().processEvents()
        caution = window.caution_label
        assert caution.text() == ("ridgewatch is a research tool, not a medical device: not "
                                  "for diagnosis or treatment")
        assert caution.width() >= caution.sizeHint().width()
        assert window.notice_label.toolTip() == message
        assert not caution.geometry().intersects(window.notice_label.geometry())
    finally:
        window.close()


@pytest.mark.gui
@pytest.mark.parametrize("rate, confidence, quality, text, grey, detail", [
    (72.0, 0.93, 0.85, "72", False, "confidence 93 %"),
    (72.0, 0.65, 0.85, "72", True, "confidence 65 %: uncertain"),
    # The case of issue 13: a confident rate beside quality 0.18 ('unusable') is greyed.
    (174.0, 0.9, 0.18, "174", True, "confidence 90 %: uncertain"),
    (174.0, 0.3, 0.7, "\u2014", True, "not shown: confidence 30 %"),
])
def test_window_card_follows_the_display_rule(qt, fed, rate, confidence, quality, text, grey,
                                              detail):
    monitor, updates, _, t = fed
    newest = Estimate("hr", "PPG", t[-1] - 4, t[-1], rate, confidence, quality)
    window = _window(qt, monitor, list(updates) + [Update([newest], None, None)])
    try:
        card = window.cards[("hr", "PPG")]
        assert card.value.text() == text
        assert ("color" in card.value.styleSheet()) == grey
        assert detail in card.detail.text()
    finally:
        window.close()


@pytest.mark.gui
def test_window_picture_is_not_blank(qt, fed, tmp_path):
    monitor, updates, _, _ = fed
    window = _window(qt, monitor, updates)
    try:
        path = tmp_path / "window.png"
        assert window.grab().save(str(path))
    finally:
        window.close()
    _assert_not_blank(path)


def _assert_not_blank(path: Path) -> None:
    from matplotlib.image import imread

    pixels = imread(str(path))[..., :3]
    assert pixels.shape[0] > 300 and pixels.shape[1] > 500
    assert pixels.std() > 0.05
    rgb = (pixels.reshape(-1, 3) * 255).round().astype(np.int64)
    colours = np.unique((rgb[:, 0] << 16) | (rgb[:, 1] << 8) | rgb[:, 2])
    assert len(colours) > 100


def _runner_on(rec, tmp_path, speed: float, name: str):
    from streamer.channels import Selected
    from streamer.sources.replay import RecordingSource

    selected = [Selected(i, n, k) for i, (n, k) in enumerate(CHANNELS)]
    log = EstimateLog(tmp_path / name, "replay", "test", dict(CHANNELS), {})
    return Runner(RecordingSource(rec, speed=speed, chunk_s=0.1), selected,
                  get_profile("wrist"), log=log)


@pytest.mark.gui
def test_closing_the_window_mid_run_leaves_a_complete_log(qt, tmp_path):
    runner = _runner_on(recording(), tmp_path, speed=2.0, name="closed.csv")

    def on_window(window):
        def close_after_first_estimate():
            if window.buffers.state.latest:
                window.close()
        poll = qt.QtCore.QTimer(window)
        poll.timeout.connect(close_after_first_estimate)
        poll.start(50)

    stats = qt.run_with_window(runner, runner.profile, on_window=on_window)
    assert stats.stopped_by == "window closed"
    assert check_complete_log(tmp_path / "closed.csv") == stats.estimates > 0


@pytest.mark.gui
def test_duration_closes_the_window_by_itself(qt, tmp_path):
    runner = _runner_on(recording(), tmp_path, speed=1.0, name="timed.csv")
    stats = qt.run_with_window(runner, runner.profile, duration_s=0.5)
    assert stats.stopped_by == "--duration 0.5 s reached"
    check_complete_log(tmp_path / "timed.csv")


@pytest.mark.gui
def test_window_can_stay_open_after_the_end_until_closed(qt, tmp_path):
    runner = _runner_on(recording(30.0), tmp_path, speed=math.inf, name="ended.csv")
    seen = {}

    def on_window(window):
        def close_once_finished():
            if window._final and "final" not in seen:
                seen["final"] = window._final
                seen["stream"] = window.stream_label.text()
                window.close()
        poll = qt.QtCore.QTimer(window)
        poll.timeout.connect(close_once_finished)
        poll.start(50)

    stats = qt.run_with_window(runner, runner.profile, keep_open=True, on_window=on_window)
    assert stats.stopped_by == "end of recording"
    assert seen["final"] == "stopped: end of recording"
    assert "stopped: end of recording" in seen["stream"]
    assert check_complete_log(tmp_path / "ended.csv") == stats.estimates > 0


class _BrokenRunner:
    """Enough of a Runner for the window; its run raises."""

    def __init__(self):
        self.monitor = RateMonitor(CHANNELS, FS, "wrist")
        self.listeners = []
        self.stats = RunStats()
        self.closed = False

    def run(self):
        raise RuntimeError("engine broke on purpose")

    def stop(self, reason=""):
        pass

    def close(self):
        self.closed = True


@pytest.mark.gui
def test_an_engine_error_is_shown_then_raised_in_the_main_thread(qt):
    seen = {}
    with pytest.raises(RuntimeError, match="engine broke on purpose"):
        qt.run_with_window(_BrokenRunner(), on_window=lambda w: seen.setdefault("w", w))
    assert seen["w"]._final == ("engine stopped with an error: RuntimeError: engine broke "
                                "on purpose")


@pytest.mark.gui
def test_a_binding_that_would_crash_is_refused_with_one_line(qt, monkeypatch):
    from streamer.errors import InputError

    monkeypatch.setattr(qt, "binding_drops_none", lambda: True)
    runner = _BrokenRunner()
    with pytest.raises(InputError, match=r"releases references it never took on Python "
                                         r"\d+\.\d+, which crashes the window; install "
                                         r"another version .* or use --display text"):
        qt.run_with_window(runner)
    assert runner.closed


@pytest.mark.gui
@pytest.mark.skipif(sys.version_info >= (3, 12), reason="None is immortal from 3.12 on")
def test_binding_check_detects_lost_references(qt):
    import ctypes

    decref = ctypes.pythonapi.Py_DecRef
    incref = ctypes.pythonapi.Py_IncRef
    decref.argtypes = incref.argtypes = [ctypes.py_object]
    decref.restype = incref.restype = None
    calls = []

    def faulty():
        calls.append(1)
        decref(None)

    try:
        assert qt.binding_drops_none(probe=faulty)
    finally:
        for _ in calls:
            incref(None)
    keep = []
    assert not qt.binding_drops_none(probe=lambda: keep.append(None))
    assert not qt.binding_drops_none()  # the installed binding


# ------------------------------------------------------------------ command line (Qt)


def _cli_env(**extra) -> dict:
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", **extra)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    return env


@pytest.mark.gui
@pytest.mark.slow
def test_demo_in_the_window_logs_and_leaves_a_picture(tmp_path):
    log = tmp_path / "demo.csv"
    picture = tmp_path / "demo.png"
    done = subprocess.run(
        [sys.executable, "-m", "streamer.cli", "demo", "--display", "qt", "--speed", "20",
         "--duration", "4", "--log", str(log)], cwd=REPO_ROOT, capture_output=True, text=True,
        env=_cli_env(RIDGEWATCH_SCREENSHOT=str(picture)), timeout=180)
    assert done.returncode == 0, done.stderr
    assert "log complete" in done.stderr
    assert check_complete_log(log) > 0
    _assert_not_blank(picture)


@pytest.mark.gui
@pytest.mark.slow
def test_sigint_closes_the_window_and_completes_the_log(tmp_path):
    log = tmp_path / "interrupted.csv"
    proc = subprocess.Popen(
        [sys.executable, "-m", "streamer.cli", "demo", "--display", "qt", "--speed", "20",
         "--log", str(log)], cwd=REPO_ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        text=True, env=_cli_env())
    try:
        deadline = time.monotonic() + 120  # a guard against hangs, not a measurement
        while time.monotonic() < deadline and proc.poll() is None:
            if log.exists() and len(rows_text(log)) > 0:
                break
            time.sleep(0.1)
        assert proc.poll() is None, "the run ended before it could be interrupted"
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert "stopped by SIGINT" in err
    assert check_complete_log(log) > 0
