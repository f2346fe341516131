"""Replay of a recording as a live source: chunking, pacing, progress and close."""

from __future__ import annotations

import math

import numpy as np
import pytest

from streamer.errors import InputError
from streamer.sources.base import ChannelInfo, Chunk, Recording, SourceEvent, SourceInfo
from streamer.sources.replay import RecordingSource


@pytest.fixture
def rng():
    return np.random.default_rng(7)


def make_recording(rng, n=1234, fs=50.0, start=100.0, channels=2) -> Recording:
    info = SourceInfo("demo.csv", fs, tuple(ChannelInfo(f"c{i}") for i in range(channels)),
                      "file:demo.csv")
    return Recording(rng.standard_normal((n, channels)), start + np.arange(n) / fs, info)


class FakeTime:
    """A wall clock that only moves when slept on; records every requested sleep."""

    def __init__(self, start: float = 5000.0) -> None:
        self.now = start
        self.sleeps: list[float] = []

    def clock(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        assert seconds > 0
        self.sleeps.append(seconds)
        self.now += seconds


def split(items):
    chunks = [i for i in items if isinstance(i, Chunk)]
    events = [i for i in items if isinstance(i, SourceEvent)]
    return chunks, events


def test_chunks_cover_the_recording_in_order_with_events_around(rng):
    rec = make_recording(rng)
    items = list(RecordingSource(rec, chunk_s=0.3).chunks())
    chunks, events = split(items)
    assert isinstance(items[0], SourceEvent) and items[0].kind == "replaying"
    assert items[0].message == "replaying demo.csv at full speed"
    assert isinstance(items[-1], SourceEvent) and items[-1].kind == "end"
    assert items[-1].time_s == rec.timestamps[-1]
    assert [e.kind for e in events] == ["replaying", "end"]
    assert [len(c) for c in chunks[:-1]] == [15] * (len(chunks) - 1)  # round(0.3 * 50)
    assert 1 <= len(chunks[-1]) <= 15
    np.testing.assert_array_equal(np.concatenate([c.samples for c in chunks]), rec.samples)
    np.testing.assert_array_equal(np.concatenate([c.timestamps for c in chunks]), rec.timestamps)
    for c in chunks:
        assert c.samples.dtype == np.float64 and c.samples.shape == (len(c), 2)


def test_chunks_are_copies(rng):
    rec = make_recording(rng)
    before = rec.samples.copy()
    for item in RecordingSource(rec).chunks():
        if isinstance(item, Chunk):
            item.samples[:] = 0.0
    np.testing.assert_array_equal(rec.samples, before)


def test_chunk_boundaries_do_not_depend_on_speed(rng):
    rec = make_recording(rng)
    fast = list(RecordingSource(rec, chunk_s=0.25).chunks())
    fake = FakeTime()
    paced = list(RecordingSource(rec, speed=20, chunk_s=0.25, clock=fake.clock,
                                 sleep=fake.sleep).chunks())
    fast_chunks, _ = split(fast)
    paced_chunks, _ = split(paced)
    assert len(fast_chunks) == len(paced_chunks) > 1
    for a, b in zip(fast_chunks, paced_chunks):
        np.testing.assert_array_equal(a.samples, b.samples)
        np.testing.assert_array_equal(a.timestamps, b.timestamps)
    assert paced[0].message == "replaying demo.csv at 20x"
    assert fake.sleeps  # the paced replay did wait


@pytest.mark.parametrize("speed", [1.0, 7.5, 20.0])
def test_pacing_follows_stream_time(rng, speed):
    rec = make_recording(rng, n=1000, fs=50.0)
    fake = FakeTime()
    wall_start = fake.now
    source = RecordingSource(rec, speed=speed, chunk_s=0.2, clock=fake.clock, sleep=fake.sleep)
    for item in source.chunks():
        if isinstance(item, Chunk):
            # A chunk is released once the stream has run up to the end of its last sample.
            due = (item.timestamps[-1] - rec.timestamps[0] + 1 / rec.info.fs) / speed
            # Each fake sleep rounds the clock by at most one unit in its last place.
            rounding = (len(fake.sleeps) + 1) * np.spacing(fake.now)
            assert fake.now - wall_start == pytest.approx(due, rel=0, abs=rounding)
    rounding = (len(fake.sleeps) + 1) * np.spacing(fake.now)
    assert sum(fake.sleeps) == pytest.approx(rec.duration_s / speed, rel=0, abs=rounding)
    assert max(fake.sleeps) <= 0.1 + 1e-12  # short sleeps keep close() responsive


def test_pacing_does_not_drift_behind_a_slow_consumer(rng):
    rec = make_recording(rng, n=500, fs=50.0)
    fake = FakeTime()
    source = RecordingSource(rec, speed=1.0, chunk_s=0.1, clock=fake.clock, sleep=fake.sleep)
    items = source.chunks()
    next(items)  # replaying event
    next(items)
    fake.now += 3.0  # the consumer stalls for 3 s of wall time
    slept_before = sum(fake.sleeps)
    for _ in range(15):  # stream time 0.2 ... 1.6 s is already due: no sleeping
        next(items)
    assert sum(fake.sleeps) == slept_before
    for _ in items:
        pass
    # The schedule is absolute: the end comes at the stream duration, not 3 s later.
    rounding = (len(fake.sleeps) + 1) * np.spacing(fake.now)
    assert fake.now - 5000.0 == pytest.approx(rec.duration_s, rel=0, abs=rounding)


def test_speed_inf_never_sleeps(rng):
    rec = make_recording(rng)

    def no_sleep(_):
        raise AssertionError("slept at infinite speed")

    assert len(list(RecordingSource(rec, sleep=no_sleep).chunks())) > 2


def test_close_stops_iteration(rng):
    rec = make_recording(rng)
    source = RecordingSource(rec, chunk_s=0.1)
    items = source.chunks()
    assert next(items).kind == "replaying"
    assert isinstance(next(items), Chunk)
    source.close()
    with pytest.raises(StopIteration):
        next(items)
    assert list(source.chunks()) == []


def test_close_during_a_sleep_ends_the_replay(rng):
    rec = make_recording(rng, n=1000)
    fake = FakeTime()
    sources = []

    def sleep_then_close(seconds):
        fake.sleep(seconds)
        if fake.now - 5000.0 > 2.0:
            sources[0].close()  # as another thread would, while the replay waits

    source = RecordingSource(rec, speed=1.0, chunk_s=0.5, clock=fake.clock,
                             sleep=sleep_then_close)
    sources.append(source)
    chunks, events = split(list(source.chunks()))
    assert 1 <= len(chunks) <= 5  # stream time 0.5 ... 2.5 s at most
    assert [e.kind for e in events] == ["replaying"]  # no "end" after close


def test_progress_is_rate_limited_monotonic_and_ends_at_one(rng):
    rec = make_recording(rng, n=2000, fs=100.0)  # 20 s
    fake = FakeTime()
    calls: list[tuple[float, float]] = []
    source = RecordingSource(rec, speed=2.0, chunk_s=0.01, clock=fake.clock, sleep=fake.sleep,
                             progress=lambda f: calls.append((fake.now, f)))
    list(source.chunks())
    fractions = [f for _, f in calls]
    assert fractions[-1] == 1.0
    assert fractions == sorted(fractions) and 0 < fractions[0]
    wall_s = fake.now - 5000.0  # 10 s at 2x
    assert len(calls) <= 10 * wall_s + 2
    assert len(calls) >= 10 * wall_s * 0.9  # and it does report regularly
    gaps = np.diff([t for t, _ in calls[:-1]])
    assert gaps.min() >= 0.1 - 1e-9


def test_progress_at_infinite_speed_with_a_still_clock_is_called_rarely(rng):
    rec = make_recording(rng, n=2000, fs=100.0)
    calls = []
    list(RecordingSource(rec, chunk_s=0.01, clock=lambda: 1.0,
                         progress=calls.append).chunks())
    assert calls == [pytest.approx(1 / 2000), 1.0]


def test_source_protocol_info(rng):
    rec = make_recording(rng)
    source = RecordingSource(rec)
    assert source.info is rec.info
    assert source.info.source_id == "file:demo.csv"


def test_empty_recording_yields_only_events():
    info = SourceInfo("empty", 10.0, (ChannelInfo("x"),))
    rec = Recording(np.empty((0, 1)), np.empty(0), info)
    items = list(RecordingSource(rec, speed=3.0, clock=lambda: 0.0, sleep=lambda s: None).chunks())
    assert [i.kind for i in items] == ["replaying", "end"]
    assert math.isnan(items[-1].time_s)


@pytest.mark.parametrize("speed", [0, -1, float("nan")])
def test_bad_speed_is_refused(rng, speed):
    with pytest.raises(InputError, match=r"replay speed .* must be a positive number \(or inf\)"):
        RecordingSource(make_recording(rng), speed=speed)


@pytest.mark.parametrize("chunk_s", [0, -0.1, float("inf")])
def test_bad_chunk_length_is_refused(rng, chunk_s):
    with pytest.raises(InputError, match=r"replay chunk_s=.* must be a positive number of seconds"):
        RecordingSource(make_recording(rng), chunk_s=chunk_s)
