"""The runner: source -> engine -> log, outlet and listeners; events, stop and duration.

A fake source yields synthetic PPG chunks and status events in a fixed order, so every
test knows exactly what the runner saw. Nothing here asserts on wall-clock time; one
``--duration`` test injects its own clock, the other waits half a second of real time
for a source that yields nothing.
"""

from __future__ import annotations

import logging
import math
import threading

import numpy as np
import pytest

from estimators.config import get_profile
from streamer.channels import Selected
from streamer.runner import Runner, Update
from streamer.simulation import pulse_train
from streamer.sinks.estimate_log import EstimateLog, read_log
from streamer.sources.base import ChannelInfo, Chunk, SourceEvent, SourceInfo

FS = 125.0
RATE_BPM = 72.0
CHUNK_N = 25  # 0.2 s: not a multiple of the 0.25 s hop, so hops fall inside chunks
PROFILE = get_profile("wrist")
MIN_WINDOW_S = PROFILE.hr.min_window_s
INFO = SourceInfo("fake", FS, (ChannelInfo("PLETH", "ppg", "a.u."),
                               ChannelInfo("MARKER", None, "")), "fake-id")
SELECTED = [Selected(0, "PLETH", "ppg")]


def ppg_chunks(start_s: float, duration_s: float, seed: int = 0) -> list[Chunk]:
    """Chunks of a constant-rate pulse train (plus a junk second column) from ``start_s``."""
    n = int(round(duration_s * FS))
    x = pulse_train(FS, np.full(n, RATE_BPM), seed=seed)
    samples = np.column_stack((x, np.full(n, -1.0)))
    t = start_s + np.arange(n) / FS
    return [Chunk(samples[a:a + CHUNK_N], t[a:a + CHUNK_N]) for a in range(0, n, CHUNK_N)]


class FakeSource:
    """Yields ``items`` in order (then, when ``endless``, more chunks until closed)."""

    def __init__(self, items, endless: bool = False):
        self.info = INFO
        self.items = list(items)
        self.endless = endless
        self.closed = threading.Event()
        self.yielded = 0

    def chunks(self):
        for item in self.items:
            if self.closed.is_set():
                return
            self.yielded += 1
            yield item
        start = float(self.items[-1].timestamps[-1]) + 1 / FS if self.items else 0.0
        while self.endless and not self.closed.is_set():
            for chunk in ppg_chunks(start, 10.0, seed=self.yielded):
                if self.closed.is_set():
                    return
                self.yielded += 1
                yield chunk
            start += 10.0

    def close(self):
        self.closed.set()


def new_log(tmp_path, name="run.csv") -> EstimateLog:
    return EstimateLog(tmp_path / name, "replay", "fake", {"PLETH": "ppg"}, {"test": True})


def body_lines(path) -> list[str]:
    """Rows and event lines after the header row, in file order."""
    lines = path.read_text().splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("emitted_s,"))
    return lines[start + 1:]


def test_events_are_logged_in_stream_order(tmp_path):
    before = ppg_chunks(0.0, 12.0)
    after = ppg_chunks(15.0, 12.0, seed=1)
    items = (before
             + [SourceEvent("lost", "stream 'fake' lost; waiting for it to come back", 11.992),
                SourceEvent("resumed", "stream 'fake' is back", 15.0, {"missing_s": 3.0})]
             + after + [SourceEvent("end", "end of fake", 26.992)])
    log = new_log(tmp_path)
    stats = Runner(FakeSource(items), SELECTED, PROFILE, log=log).run()

    body = body_lines(log.path)
    events = [line for line in body if line.startswith("#")]
    assert events == ["# event 11.9920 lost: stream 'fake' lost; waiting for it to come back",
                      "# event 15.0000 resumed: stream 'fake' is back",
                      "# event 26.9920 end: end of fake"]
    lost_at = body.index(events[0])
    emitted = [float(line.split(",")[0]) for line in body if not line.startswith("#")]
    rows_before = [float(line.split(",")[0]) for line in body[:lost_at]
                   if not line.startswith("#")]
    assert rows_before and max(rows_before) <= 12.0
    assert len(rows_before) < len(emitted)
    assert [e.kind for e in stats.events] == ["lost", "resumed", "end"]
    assert stats.stopped_by == "end of recording"
    table = read_log(log.path)  # event lines are skipped by the reader
    assert len(table) == stats.estimates == len(emitted)


@pytest.mark.parametrize("resume_s", [15.0, 2.0], ids=["forward", "backward"])
def test_resumed_stream_restarts_estimation(tmp_path, resume_s):
    """After a loss the time axis jumps (forwards over the loss, or backwards for a
    restarted sender with its own clock). Estimates after "resumed" must come from new
    samples only: the first needs a full start-up window of them, and every one refers
    to the centre of a window of new samples."""
    before = ppg_chunks(0.0, 12.0)
    after = ppg_chunks(resume_s, 12.0, seed=1)
    items = before + [SourceEvent("lost", "lost", 11.992),
                      SourceEvent("resumed", "back", resume_s)] + after
    log = new_log(tmp_path)
    Runner(FakeSource(items), SELECTED, PROFILE, log=log).run()

    body = body_lines(log.path)
    resumed_at = next(i for i, line in enumerate(body) if " resumed: " in line)
    rows = np.array([[float(v or "nan") for v in (r[0], r[1], r[4], r[7])] for r in
                     (line.split(",") for line in body[resumed_at + 1:]
                      if not line.startswith("#"))])
    assert len(rows), "no estimates after the stream came back"
    emitted, time_s, rate, delay = rows.T
    last_s = resume_s + 12.0 - 1 / FS
    assert emitted[0] >= resume_s + MIN_WINDOW_S - 1 / FS - 1e-4
    assert np.all(emitted <= last_s + 1e-4)
    assert np.all(np.diff(emitted) > 0)
    # A full window of new samples, as before the loss: the estimate refers to its
    # centre, about half a window back (the analysis runs at a decimated rate), less the
    # causal filters' group delay at the rate (estimators.monitor.filter_delay_s).
    from estimators.monitor import RateMonitor

    steady = float(next(line for line in reversed(body[:resumed_at])
                        if not line.startswith("#")).split(",")[7])
    filters = RateMonitor([("PPG", "ppg")], FS, PROFILE).filter_delay_s("hr", "PPG", RATE_BPM)
    assert abs(steady - PROFILE.hr.window_s / 2 - filters) < 0.05
    # (the filters' delay follows the rate: +-5 bpm around 72 moves it by about 20 ms)
    np.testing.assert_allclose(delay, steady, atol=0.02)
    np.testing.assert_allclose(rate, RATE_BPM, atol=max(0.1 * RATE_BPM, 5.0))


def test_listener_that_raises_is_removed_and_estimation_goes_on(tmp_path, caplog):
    calls = {"bad": 0}
    seen: list[Update] = []

    def bad(update):
        calls["bad"] += 1
        raise RuntimeError("display exploded")

    items = ppg_chunks(0.0, 12.0) + [SourceEvent("end", "end of fake", 11.992)]
    log = new_log(tmp_path)
    runner = Runner(FakeSource(items), SELECTED, PROFILE, log=log, listeners=[bad, seen.append])
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        stats = runner.run()

    assert calls["bad"] == 1
    assert runner.listeners == [seen.append]
    assert "display listener failed and was removed: display exploded" in caplog.text
    # The good listener saw every chunk and the event, including the update that broke
    # the bad one.
    assert len(seen) == len(items)
    assert sum(len(u.estimates) for u in seen) == stats.estimates > 0
    assert len(read_log(log.path)) == stats.estimates
    assert all(u.chunk.samples.shape[1] == 1 for u in seen if u.chunk is not None)


def test_stop_from_another_thread_ends_an_endless_run(tmp_path):
    source = FakeSource([], endless=True)
    log = new_log(tmp_path)
    chunks_seen = threading.Event()
    counter = {"n": 0}

    def count(update):
        counter["n"] += 1
        if counter["n"] >= 80:
            chunks_seen.set()

    runner = Runner(source, SELECTED, PROFILE, log=log, listeners=[count])
    stopper = threading.Thread(target=lambda: chunks_seen.wait() and runner.stop("test stop"))
    stopper.start()
    # Guards against a hang only: a stop that never works fails the test below.
    watchdog = threading.Timer(60.0, source.close)
    watchdog.start()
    try:
        stats = runner.run()
    finally:
        watchdog.cancel()
        chunks_seen.set()
        stopper.join()
    assert stats.stopped_by == "test stop"
    assert source.closed.is_set()
    assert stats.chunks >= 80
    assert log._file.closed
    assert len(read_log(log.path)) == stats.estimates > 0


def test_duration_stops_the_run_on_the_injected_clock(tmp_path):
    ticks = iter(np.arange(0.0, 1000.0, 0.5))
    source = FakeSource([], endless=True)
    log = new_log(tmp_path)
    stats = Runner(source, SELECTED, PROFILE, log=log, duration_s=3.0,
                   clock=lambda: float(next(ticks))).run()
    # The clock reads 0 at the start and 0.5 more after each item: the sixth item
    # brings it to 3.0 s.
    assert stats.chunks == 6
    assert stats.stopped_by == "--duration 3 s reached"
    assert source.closed.is_set()
    assert log._file.closed


class WaitingSource(FakeSource):
    """Yields its items, then nothing until closed: a lost live stream waiting for a
    comeback."""

    def chunks(self):
        yield from self.items
        self.closed.wait()


def test_duration_ends_the_run_while_the_source_yields_nothing(tmp_path):
    # Nothing at all arrives, so only a timer can end the run.
    source = WaitingSource([])
    log = new_log(tmp_path)
    watchdog = threading.Timer(60.0, source.close)  # a hang guard only
    watchdog.start()
    try:
        stats = Runner(source, SELECTED, PROFILE, log=log, duration_s=0.5).run()
    finally:
        watchdog.cancel()
    assert stats.stopped_by == "--duration 0.5 s reached"
    assert source.closed.is_set()
    assert log._file.closed
    assert stats.chunks == 0


class FakeOutlet:
    def __init__(self):
        self.pushed = []
        self.closed = False

    def push(self, estimates):
        self.pushed.append(list(estimates))

    def close(self):
        self.closed = True


def test_outlet_gets_every_logged_estimate(tmp_path):
    outlet = FakeOutlet()
    log = new_log(tmp_path)
    stats = Runner(FakeSource(ppg_chunks(0.0, 14.0)), SELECTED, PROFILE, log=log,
                   outlet=outlet).run()
    pushed = [e for batch in outlet.pushed for e in batch]
    assert outlet.closed
    assert all(batch for batch in outlet.pushed)  # never an empty push
    assert len(pushed) == stats.estimates > 0
    table = read_log(log.path)
    np.testing.assert_allclose(table.columns["emitted_s"], [e.emitted_s for e in pushed],
                               atol=5e-5)
    rates = np.array([e.rate_per_min for e in pushed])
    np.testing.assert_allclose(table.columns["rate_per_min"], rates, atol=5e-4)
    # Synthetic truth: a constant 72 bpm pulse train. Tolerance: +-10 % or +-5 bpm,
    # whichever is greater (ANSI/AAMI EC13 heart-rate accuracy, cited from memory).
    assert np.all(np.abs(rates - RATE_BPM) <= max(0.1 * RATE_BPM, 5.0))


def test_crashing_source_leaves_a_closed_valid_log(tmp_path):
    class Broken(FakeSource):
        def chunks(self):
            yield from super().chunks()
            raise OSError("device unplugged")

    log = new_log(tmp_path)
    source = Broken(ppg_chunks(0.0, 10.0))
    with pytest.raises(OSError, match="device unplugged"):
        Runner(source, SELECTED, PROFILE, log=log).run()
    assert log._file.closed
    table = read_log(log.path)
    assert len(table) == log.rows_written > 0
    assert np.all(np.diff(table.columns["emitted_s"]) >= 0)
    assert math.isclose(table.columns["emitted_s"][0], MIN_WINDOW_S - 1 / FS, abs_tol=0.01)
