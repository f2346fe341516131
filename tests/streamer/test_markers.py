"""Text markers: from sources and replay, and the user's own, into the log (in stream
order with the rows), the listeners, the display and the LSL outlet.

A small test source yields chunks of a synthetic pulse and markers in a fixed order, so
every test knows what the runner saw. The order check is a slow obvious twin: for every
marker line of the log, every row before it is no later than the marker and every row
after it later.
"""

from __future__ import annotations

import io
import math
import os
import threading
import time
import uuid
from pathlib import Path

import numpy as np
import pytest

from estimators.config import get_profile
from estimators.estimate import Estimate
from estimators.monitor import offline_estimates
from streamer.channels import Selected
from streamer.display.buffers import DisplayLayout, UpdateFeed
from streamer.display.state import DisplayState, marker_label
from streamer.display.text import TextDisplay, format_marker_line, in_foreground
from streamer.display.snapshot import DisplaySnapshot, take_snapshot
from streamer.runner import USER_SOURCE, MarkerQueue, Runner, Update
from streamer.simulation import pulse_train
from streamer.sinks.estimate_log import (EstimateLog, parse_marker, read_log,
                                         write_offline_rows)
from streamer.sources.base import ChannelInfo, Chunk, Marker, Recording, SourceEvent, SourceInfo
from streamer.sources.replay import RecordingSource, marker_order

FS = 50.0
RATE_BPM = 72.0
PROFILE = get_profile("wrist")
INFO = SourceInfo("marker test", FS, (ChannelInfo("PLETH", "ppg", "a.u."),), "test:markers")
SELECTED = [Selected(0, "PLETH", "ppg")]

AWKWARD = (
    'stage 2, "fast"',              # comma and quotes: CSV and JSON escaping both matter
    "line one\nline two",            # a line break inside a marker
    "Übung \u00e9t\u00e9 \u6b65\u884c \U0001f3c3",  # non-ASCII, a character beyond the BMP
    " leading and trailing ",        # spaces a strip() would lose
    "",                              # an empty marker text
    "# event 1.0 lost: not an event",  # looks like a status line
    "tab\there; semicolon; \\backslash",
)


def pulse(duration_s: float, start_s: float = 0.0, seed: int = 0):
    n = int(round(duration_s * FS))
    x = pulse_train(FS, np.full(n, RATE_BPM), seed=seed)
    return x[:, None], start_s + np.arange(n) / FS


def chunks_of(samples, timestamps, chunk_n: int = 12) -> list[Chunk]:
    return [Chunk(samples[a:a + chunk_n], timestamps[a:a + chunk_n])
            for a in range(0, len(timestamps), chunk_n)]


class ItemSource:
    """Yields ``items`` (chunks, markers, events) in order. ``gate``: before the item at
    that index, wait (at most ``wait_s``, a hang guard) until ``release`` is set."""

    def __init__(self, items, gate: int | None = None, wait_s: float = 20.0):
        self.info = INFO
        self.items = list(items)
        self.gate, self.wait_s = gate, wait_s
        self.release = threading.Event()
        self.closed = threading.Event()

    def chunks(self):
        for k, item in enumerate(self.items):
            if k == self.gate:
                self.release.wait(self.wait_s)
            if self.closed.is_set():
                return
            yield item

    def close(self):
        self.closed.set()
        self.release.set()


def new_log(tmp_path, name="markers.csv") -> EstimateLog:
    return EstimateLog(tmp_path / name, "replay", INFO.name, {"PLETH": "ppg"}, {})


def body(path) -> list:
    """The log body in file order: ("row", emitted_s, time_s) and ("marker", Marker)."""
    text = Path(path).read_text(encoding="utf-8")
    lines = text.split("\n")
    start = next(i for i, line in enumerate(lines) if line.startswith("emitted_s,"))
    out = []
    for line in lines[start + 1:]:
        if line.startswith("# marker "):
            out.append(("marker", parse_marker(line)))
        elif line and not line.startswith("#"):
            cells = line.split(",")
            out.append(("row", float(cells[0]), float(cells[1])))
    return out


def assert_markers_between_rows(items, by: int = 1) -> None:
    """Every marker after every row no later than it and before every row later than
    it; ``by`` picks the row time (1: emitted_s, 2: time_s)."""
    for k, item in enumerate(items):
        if item[0] != "marker" or math.isnan(item[1].time_s):
            continue
        t = item[1].time_s
        before = [r[by] for r in items[:k] if r[0] == "row"]
        after = [r[by] for r in items[k + 1:] if r[0] == "row"]
        # Times in the log have 4 decimals.
        assert all(x <= t + 5e-5 for x in before), (item, max(before))
        assert all(x > t - 5e-5 for x in after), (item, min(after))


# ------------------------------------------------------------------------ the queue


def test_marker_queue_releases_by_time_and_keeps_arrival_order_at_equal_times():
    q = MarkerQueue()
    for t, text in [(5.0, "b"), (2.0, "a"), (5.0, "b2"), (math.nan, "untimed"), (9.0, "c")]:
        q.add(Marker(t, text))
    assert [m.text for m in q.due(math.nan)] == ["untimed"]
    assert [m.text for m in q.due(5.0, inclusive=False)] == ["a"]
    assert [m.text for m in q.due(5.0)] == ["b", "b2"]
    assert len(q) == 1
    assert q.due(8.999) == []
    assert [m.text for m in q.due(math.inf)] == ["c"] and len(q) == 0


def test_marker_order_sorts_stably_with_untimed_last():
    markers = [Marker(3.0, "x"), Marker(math.nan, "n"), Marker(1.0, "y"), Marker(3.0, "z")]
    assert [m.text for m in marker_order(markers)] == ["y", "x", "z", "n"]


# ------------------------------------------------------------------------ the runner


def session_items():
    """Chunks from 0 to 12 s, a gap to 20 s, chunks to 30 s; markers before the first
    chunk, at chunk edges, inside chunks, in the gap, after the last sample, and one
    arriving late (after rows later than it, as a marker stream running behind)."""
    x1, t1 = pulse(12.0)
    x2, t2 = pulse(10.0, 20.0, seed=1)
    first, second = chunks_of(x1, t1), chunks_of(x2, t2)
    items = [SourceEvent("replaying", "replaying marker test", 0.0),
             Marker(-1.0, AWKWARD[0], "lab, room 2"), *first[:400 // 12]]
    now = float(first[400 // 12 - 1].timestamps[-1])
    items += [Marker(now + 0.01, AWKWARD[1], "lab"), Marker(now + 0.5, AWKWARD[2], "lab"),
              Marker(now + 0.5, AWKWARD[3], "a: b"), *first[400 // 12:],
              Marker(15.0, AWKWARD[4], "lab"), Marker(16.0, AWKWARD[5], "lab"),
              *second[:20], Marker(9.0, AWKWARD[6], "late")]
    items += [*second[20:], Marker(31.0, "after the last sample", "lab"),
              SourceEvent("end", "end of marker test", float(t2[-1]))]
    return items


def test_runner_writes_markers_in_stream_order_with_the_rows(tmp_path):
    items = session_items()
    sent = [i for i in items if isinstance(i, Marker)]
    log = new_log(tmp_path)
    heard = []
    pushed = []

    class Outlet:
        def push(self, estimates):
            pass

        def push_markers(self, markers, newest_s):
            pushed.extend(markers)

        def close(self):
            pass

    runner = Runner(ItemSource(items), SELECTED, PROFILE, log=log, outlet=Outlet(),
                    listeners=[lambda u: heard.extend(u.markers)])
    stats = runner.run()
    assert stats.stopped_by == "end of recording"
    table = read_log(log.path)
    # Every marker exactly as sent (text and source), each once.
    assert sorted(table.markers, key=repr) == sorted(sent, key=repr)
    assert heard == pushed == table.markers  # the same markers, in the log's order
    lines = body(log.path)
    late = Marker(9.0, AWKWARD[6], "late")
    assert_markers_between_rows([i for i in lines if i[0] == "row" or i[1] != late])
    # The late marker is written when it arrives: after rows later than it.
    k = lines.index(("marker", late))
    assert max(r[1] for r in lines[:k] if r[0] == "row") > late.time_s
    # The markers in the gap sit between the last row before it and the first after it.
    rows = [r[1] for r in lines if r[0] == "row"]
    assert any(r < 12.0 for r in rows) and any(r > 20.0 for r in rows)
    assert table.markers[-1] == Marker(31.0, "after the last sample", "lab")


def test_a_marker_before_any_sample_waits_for_the_first_rows(tmp_path):
    x, t = pulse(10.0, 100.0)
    items = [Marker(50.0, "before everything", "lab"), Marker(99.0, "just before", "lab"),
             *chunks_of(x, t)]
    log = new_log(tmp_path)
    Runner(ItemSource(items), SELECTED, PROFILE, log=log).run()
    lines = body(log.path)
    assert [i[0] for i in lines[:2]] == ["marker", "marker"]
    assert lines[2][0] == "row"
    assert [m.text for m in read_log(log.path).markers] == ["before everything", "just before"]


def test_markers_held_when_the_stream_is_lost_are_written_at_once(tmp_path):
    """A marker from another stream, ahead of the samples, waits for them; when the data
    stream is lost it is written at once (the next rows come after the comeback)."""
    x, t = pulse(10.0)
    items = [*chunks_of(x, t), Marker(12.0, "ahead of the samples", "lab"),
             SourceEvent("lost", "stream 'x' lost; waiting for it to come back", 9.98),
             Marker(13.0, "during the loss", "lab")]
    log = new_log(tmp_path)
    source = ItemSource(items + chunks_of(*pulse(1.0, 20.0)), gate=len(items))  # waits
    runner = Runner(source, SELECTED, PROFILE, log=log,
                    listeners=[lambda u: len(u.markers) and u.markers[-1].text ==
                               "during the loss" and runner.stop("seen")])
    runner.run()
    texts = [i[1].text for i in body(log.path) if i[0] == "marker"]
    assert texts == ["ahead of the samples", "during the loss"]
    event = log.path.read_text().index("# event 9.9800 lost")
    assert log.path.read_text().index("ahead of the samples") > event


# ----------------------------------------------------------------------- replay


def recording_with_markers(duration_s: float = 30.0) -> Recording:
    x, t = pulse(duration_s, 5.0)
    markers = (Marker(20.0, AWKWARD[2], "xdf markers"), Marker(5.0, AWKWARD[0], "lab"),
               Marker(12.345, AWKWARD[1], "annotations"), Marker(1.0, "before the start", "lab"),
               Marker(20.0, AWKWARD[3], "a: b"), Marker(34.99, AWKWARD[5], "lab"),
               Marker(80.0, AWKWARD[6], "lab"), Marker(17.0, AWKWARD[4], "lab"))
    return Recording(x, t, INFO, markers=markers)


class FakeTime:
    """A wall clock that only moves when slept on."""

    def __init__(self):
        self.now = 1000.0

    def clock(self):
        return self.now

    def sleep(self, seconds):
        self.now += seconds


@pytest.mark.parametrize("speed", [math.inf, 1.0, 7.5])
def test_replay_yields_markers_before_the_chunk_holding_their_time(speed):
    rec = recording_with_markers()
    fake = FakeTime()
    items = list(RecordingSource(rec, speed=speed, chunk_s=0.3, clock=fake.clock,
                                 sleep=fake.sleep).chunks())
    reference = list(RecordingSource(rec, chunk_s=0.3).chunks())
    assert [type(i).__name__ for i in items] == [type(i).__name__ for i in reference]
    assert [i for i in items if isinstance(i, Marker)] == marker_order(rec.markers)
    for k, item in enumerate(items):
        if not isinstance(item, Marker):
            continue
        later = next((i for i in items[k:] if isinstance(i, Chunk)), None)
        earlier = next((i for i in reversed(items[:k]) if isinstance(i, Chunk)), None)
        if later is not None:
            assert item.time_s <= later.timestamps[-1]
        else:
            assert item.time_s > rec.timestamps[-1]
            assert isinstance(items[-1], SourceEvent) and items[-1].kind == "end"
        if earlier is not None:
            assert item.time_s > earlier.timestamps[-1]
        else:
            assert items[0].kind == "replaying"


def test_replay_markers_reach_the_log_exactly_between_rows(tmp_path):
    rec = recording_with_markers()
    log = new_log(tmp_path)
    Runner(RecordingSource(rec, chunk_s=0.25), SELECTED, PROFILE, log=log).run()
    table = read_log(log.path)
    assert table.markers == marker_order(rec.markers)
    assert [m.text for m in table.markers if m.source == "lab"][1:3] == [AWKWARD[0],
                                                                          AWKWARD[4]]
    assert_markers_between_rows(body(log.path))
    assert len(table) > 0


def test_offline_log_places_markers_by_window_centre(tmp_path):
    rec = recording_with_markers()
    estimates = offline_estimates(rec.samples, rec.timestamps, [("PLETH", "ppg")], FS,
                                  PROFILE)
    with EstimateLog(tmp_path / "offline.csv", "offline", INFO.name, {"PLETH": "ppg"},
                     {}) as out:
        write_offline_rows(out, estimates, rec.markers, 0.1)
    table = read_log(tmp_path / "offline.csv")
    assert table.markers == marker_order(rec.markers)
    assert len(table) == len(estimates)
    assert_markers_between_rows(body(tmp_path / "offline.csv"), by=2)


# ------------------------------------------------------------------ user markers


def test_user_markers_from_another_thread_are_stamped_and_logged(tmp_path):
    x, t = pulse(30.0)
    chunks = chunks_of(x, t)
    source = ItemSource(chunks, gate=100)
    log = new_log(tmp_path)
    runner = Runner(source, SELECTED, PROFILE, log=log)
    runner.add_user_marker("typed before the first sample")
    worker = threading.Thread(target=runner.run)
    worker.start()
    # The source holds item 100 back until released: the runner has processed 100
    # chunks and waits, as it would for a live stream's next chunk.
    while runner.stats.chunks < 100 and worker.is_alive():
        time.sleep(0.01)
    runner.add_user_marker("")
    runner.add_user_marker('cough, "loud"')
    source.release.set()
    worker.join(30.0)
    assert not worker.is_alive()
    table = read_log(log.path)
    assert [(m.text, m.source) for m in table.markers] == [
        ("typed before the first sample", USER_SOURCE), ("user marker 2", USER_SOURCE),
        ('cough, "loud"', USER_SOURCE)]
    # Stamped with the newest sample the runner had when it took them: the first with
    # the first chunk's, the others with the last sample before the held-back item.
    assert table.markers[0].time_s == pytest.approx(chunks[0].timestamps[-1], abs=5e-5)
    held_s = chunks[99].timestamps[-1]
    assert [m.time_s for m in table.markers[1:]] == pytest.approx([held_s] * 2, abs=5e-5)
    assert_markers_between_rows(body(log.path))


def test_a_user_marker_while_the_source_yields_nothing_is_written_at_the_end(tmp_path):
    x, t = pulse(10.0)
    chunks = chunks_of(x, t)
    source = ItemSource(chunks + chunks_of(*pulse(1.0, 30.0)), gate=len(chunks))
    log = new_log(tmp_path)
    runner = Runner(source, SELECTED, PROFILE, log=log)
    worker = threading.Thread(target=runner.run)
    worker.start()
    while runner.stats.chunks < len(chunks) and worker.is_alive():
        time.sleep(0.01)
    runner.add_user_marker("sensor fell off")  # the source is silent (a lost stream)
    runner.stop("stopped by SIGTERM")
    worker.join(30.0)
    assert read_log(log.path).markers == [Marker(round(t[-1], 4), "sensor fell off", "user")]


def test_stdin_is_read_only_when_it_is_safe():
    read_end, write_end = os.pipe()
    try:
        with os.fdopen(os.dup(read_end)) as pipe:
            assert in_foreground(pipe)  # piped input: always read
    finally:
        os.close(read_end)
        os.close(write_end)
    assert in_foreground(io.StringIO("x\n"))
    # A terminal that is not this process's controlling terminal has no foreground
    # group of ours: a background job must not read it.
    controller, terminal = os.openpty()
    try:
        with os.fdopen(os.dup(terminal)) as tty:
            assert not in_foreground(tty)
    finally:
        os.close(controller)
        os.close(terminal)
    display = TextDisplay(stream=io.StringIO())
    got = []
    display.read_markers(io.StringIO("one\r\n\ntwo"), got.append).join(5.0)
    assert display.take_typed() == 3 and got == ["one", "", "two"]


def test_lines_typed_into_the_text_display_become_markers(tmp_path, capsys, monkeypatch):
    """The text display reads stdin lines in a thread of its own and hands them to the
    runner; the run (in its worker thread) logs them as user markers."""
    from streamer import cli
    from streamer.runner import install_signal_handlers

    typed = 'stage 2, "fast"\n\nÜbung \u6b65\u884c\n'
    monkeypatch.setattr("sys.stdin", io.StringIO(typed))
    x, t = pulse(30.0)
    source = ItemSource(chunks_of(x, t), gate=100)
    log = new_log(tmp_path)
    runner = Runner(source, SELECTED, PROFILE, log=log)
    taken = []
    add = runner.add_user_marker

    def add_then_release(text):  # the run goes on once the three lines are handed over
        add(text)
        taken.append(text)
        if len(taken) == 3:
            source.release.set()

    runner.add_user_marker = add_then_release
    stats = cli._run_threaded(runner, "text", install_signal_handlers)
    assert stats.stopped_by == "source ended"
    markers = read_log(log.path).markers
    assert [(m.text, m.source) for m in markers] == [
        ('stage 2, "fast"', "user"), ("user marker 2", "user"), ("Übung \u6b65\u884c", "user")]
    out = capsys.readouterr().out
    assert format_marker_line(markers[-1]) in out  # listed by the display


def test_text_display_lists_the_newest_markers():
    display = TextDisplay(stream=io.StringIO())
    markers = [Marker(float(k), f"m{k}", "lab") for k in range(5)]
    display.listener(Update([], None, None, markers=tuple(markers)))
    display.drain()
    display.draw(force=True)
    out = display.stream.getvalue().splitlines()
    assert out[-3:] == [format_marker_line(m) for m in markers[-3:]]
    assert format_marker_line(Marker(75.25, "a\nb", "lab")) == "marker      75.2 s  lab: a b"
    assert marker_label("x" * 40) == "x" * 31 + "\u2026"


def test_display_state_keeps_the_newest_markers():
    state = DisplayState()
    state.apply(Update([], None, None, markers=tuple(Marker(k, str(k)) for k in range(250))))
    assert state.markers_seen == 250
    assert [m.text for m in state.markers] == [str(k) for k in range(50, 250)]


# ------------------------------------------------------------------------- window


@pytest.fixture(scope="module")
def qt():
    previous = os.environ.get("QT_QPA_PLATFORM")
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    qw = pytest.importorskip("streamer.display.qt_window")
    qw.application()
    yield qw
    if previous is None:
        os.environ.pop("QT_QPA_PLATFORM", None)
    else:
        os.environ["QT_QPA_PLATFORM"] = previous


def _session_updates(duration_s: float = 60.0):
    """Updates of the real engine over a PPG and a breathing belt, and the monitor."""
    from estimators.monitor import RateMonitor

    n = int(duration_s * FS)
    t = np.arange(n) / FS
    ppg = pulse_train(FS, 66.0 + 18.0 * t / duration_s, seed=3)
    resp = np.sin(2 * np.pi * 0.25 * t)
    samples = np.column_stack((ppg, resp))
    monitor = RateMonitor((("PPG", "ppg"), ("RESP", "resp")), FS, "wrist")
    updates = []
    for a in range(0, n, 25):
        x, ts = samples[a:a + 25], t[a:a + 25]
        estimates = monitor.update(x, ts)
        updates.append(Update(estimates, Chunk(x, ts), take_snapshot(monitor, estimates)))
    return monitor, updates, t


@pytest.mark.gui
def test_window_draws_markers_as_labelled_lines_and_saves_a_picture(qt, tmp_path):
    """docs/window-markers.png is this picture (RIDGEWATCH_MARKER_PICTURE=docs/... to
    write it there)."""
    monitor, updates, t = _session_updates()
    markers = (Marker(12.0, "rest ends", "lab"), Marker(30.5, 'stage 2, "fast"', "lab"),
               Marker(31.5, "user marker 1", "user"),
               Marker(48.0, "Übung \u00e9t\u00e9: a rather long marker text that is cut",
                      "annotations"))
    feed = UpdateFeed()
    window = qt.MonitorWindow(DisplayLayout.from_monitor(monitor), feed,
                              title="synthetic session with markers")
    window.resize(1600, 1000)
    window.show()
    for k, u in enumerate(updates):
        feed.listener(u)
        for m in markers:  # each marker arrives with the chunk that reaches it
            if u.chunk.timestamps[0] <= m.time_s <= u.chunk.timestamps[-1]:
                feed.listener(Update([], None, None, markers=(m,)))
    window.refresh()
    window.draw(force=True)
    qt.application().processEvents()
    try:
        now = t[-1]
        shown = window.marker_lines.shown
        assert [m for m, _ in shown] == list(markers)
        # Four markers within 36 s take four label rows: no label hides another.
        rows = {lines[0].label.orthoPos for _, lines in shown}
        assert len(rows) == 4
        for marker, lines in shown:
            assert len(lines) == len(window.rate_plots) == 2
            for line in lines:
                assert line.value() == pytest.approx(marker.time_s - now)
                assert line.label.toPlainText() == marker_label(marker.text,
                                                                qt.MARKER_LABEL_CHARS)
                assert marker.text in line.toolTip()
        path = os.environ.get("RIDGEWATCH_MARKER_PICTURE") or tmp_path / "markers.png"
        assert window.grab().save(str(path))
        # Scrolled out of the 5-minute history: the lines go.
        later = Estimate("hr", "PPG", now + 396.0, now + 400.0, 80.0, 0.9, 0.9)
        feed.listener(Update([later], Chunk(np.zeros((1, 2)), np.array([now + 400.0])),
                                   DisplaySnapshot.empty()))
        window.refresh()
        window.draw(force=True)
        assert len(window.marker_lines.shown) == 0
        assert all(not isinstance(item, qt.pg.InfiniteLine)
                   for plot in window.rate_plots.values() for item in plot.items)
    finally:
        window.close()


@pytest.mark.gui
def test_key_m_in_the_window_adds_a_logged_user_marker(qt, tmp_path):
    from pyqtgraph.Qt import QtCore, QtTest

    x, t = pulse(30.0)
    source = ItemSource(chunks_of(x, t), gate=100)
    log = new_log(tmp_path)
    runner = Runner(source, SELECTED, PROFILE, log=log)
    add = runner.add_user_marker

    def add_then_release(text):
        add(text)
        source.release.set()

    runner.add_user_marker = add_then_release
    state = {}

    def on_window(window):
        state["hint"] = any(f"Key {qt.MARKER_KEY}: add a marker" in w.text()
                            for w in window.findChildren(qt.QtWidgets.QLabel))

        def press_once_data_flow():
            if runner.stats.chunks >= 100 and "requested" not in state:
                window.activateWindow()
                QtTest.QTest.keyClick(window, QtCore.Qt.Key.Key_M)
                state["requested"] = window.user_markers_requested
        poll = qt.QtCore.QTimer(window)
        poll.timeout.connect(press_once_data_flow)
        poll.start(20)

    stats = qt.run_with_window(runner, runner.profile, on_window=on_window)
    assert stats.stopped_by == "source ended"
    assert state["hint"] and state["requested"] == 1
    markers = read_log(log.path).markers
    assert [(m.text, m.source) for m in markers] == [("user marker 1", "user")]
    assert markers[0].time_s == pytest.approx(t[100 * 12 - 1], abs=5e-5)


# ---------------------------------------------------------------------------- LSL


def _marker_inlet(source_id: str):
    import pylsl

    found = pylsl.resolve_byprop("source_id", source_id, 1, 5.0)
    assert len(found) == 1
    inlet = pylsl.StreamInlet(found[0])
    inlet.open_stream(timeout=5.0)
    return inlet, inlet.info(timeout=5.0)


def _pull(inlet, n: int):
    samples, stamps = [], []
    deadline = time.monotonic() + 5.0  # a hang guard only
    while len(samples) < n and time.monotonic() < deadline:
        x, ts = inlet.pull_chunk(timeout=0.1)
        samples += x
        stamps += ts
    return samples, stamps


@pytest.mark.lsl
def test_published_marker_stream_carries_the_texts_unchanged():
    import pylsl

    from streamer.sinks.outlet import EstimateOutlet

    name = f"rw-markers-{uuid.uuid4().hex[:12]}"
    outlet = EstimateOutlet([("hr", "PLETH")], hop_s=0.25, name=name, input_id=name,
                            claim_wait_s=0)
    try:
        assert outlet.marker_name == f"{name} markers"
        inlet, info = _marker_inlet(outlet.marker_source_id)
        assert (info.name(), info.type(), info.channel_count()) == (
            f"{name} markers", "Markers", 2)
        assert info.nominal_srate() == pylsl.IRREGULAR_RATE
        assert info.channel_format() == pylsl.cf_string
        assert info.get_channel_labels() == ["text", "source"]
        now = pylsl.local_clock()
        sent = [Marker(now - 1.0 + 0.1 * k, text, "user" if k % 2 else "lab, room 2")
                for k, text in enumerate(AWKWARD)]
        outlet.push_markers(sent)
        samples, stamps = _pull(inlet, len(sent))
    finally:
        outlet.close()
    assert samples == [[m.text, m.source] for m in sent]
    assert stamps == pytest.approx([m.time_s for m in sent], abs=1e-6)


@pytest.mark.lsl
def test_replay_with_an_outlet_publishes_every_logged_marker(tmp_path):
    """Runner and a real outlet in replay mode: the marker stream receives the log's
    markers in the log's order, stamped on the local clock with the distances between
    them kept."""
    import pylsl

    from streamer.sinks.outlet import EstimateOutlet

    name = f"rw-replay-markers-{uuid.uuid4().hex[:12]}"
    rec = recording_with_markers(20.0)
    log = new_log(tmp_path)
    runner = Runner(RecordingSource(rec, chunk_s=0.25), SELECTED, PROFILE, log=log)
    runner.outlet = EstimateOutlet(runner.monitor.streams, 0.25, name=name, input_id=name,
                                   use_stream_time=False, claim_wait_s=0)
    inlet, _ = _marker_inlet(runner.outlet.marker_source_id)
    runner.run()
    table = read_log(log.path)
    samples, stamps = _pull(inlet, len(table.markers))
    assert samples == [[m.text, m.source] for m in table.markers]
    assert max(stamps) <= pylsl.local_clock()
    # Replay stamps carry the marker's distance to the newest sample onto the local
    # clock (never into the future): markers at the same time share a stamp, and the
    # one before the first sample (released with the first chunk, 4.25 s before its
    # end) is stamped that much before the one released with it.
    first = [stamps[k] for k, m in enumerate(table.markers) if m.time_s in (1.0, 5.0)]
    assert first[1] - first[0] == pytest.approx(4.0, abs=1e-6)
    same = [stamps[k] for k, m in enumerate(table.markers) if m.time_s == 20.0]
    assert len(same) == 2 and same[0] == same[1]


# ---------------------------------------------------------------------- command line


@pytest.mark.parametrize("command", ["replay", "offline"])
def test_replay_and_offline_commands_log_the_recordings_markers(command, tmp_path,
                                                                monkeypatch):
    """The readers fill ``Recording.markers``; here a reader stand-in does, so the
    commands are checked on their own."""
    from streamer import cli
    from streamer.sources import files

    rec = recording_with_markers(20.0)
    monkeypatch.setattr(files, "read_recording", lambda *a, **k: rec)
    log = tmp_path / f"{command}.csv"
    extra = ["--speed", "max", "--display", "none"] if command == "replay" else []
    assert cli.main([command, str(tmp_path / "session.csv"), "--log", str(log), "-q",
                     *extra]) == 0
    table = read_log(log)
    assert table.markers == marker_order(rec.markers)
    assert_markers_between_rows(body(log), by=1 if command == "replay" else 2)
