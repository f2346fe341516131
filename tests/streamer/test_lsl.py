"""LSL acquisition, publishing and the estimate outlet, on the loopback interface.

Every test uses its own stream names and source ids (uuid), so tests running at the
same time on this machine do not see each other's streams as matches. Waiting loops are
bounded by a watchdog that closes the source; the bounds are for hangs only, nothing
asserts on wall-clock time.
"""

from __future__ import annotations

import math
import threading
import time
import uuid

import numpy as np
import pylsl
import pytest

from estimators.errors import ParameterError
from estimators.estimate import Estimate
from streamer.errors import InputError
from streamer.sinks.outlet import FIELDS, EstimateOutlet, channel_labels
from streamer.sources.base import ChannelInfo, Chunk, SourceEvent, SourceInfo
from streamer.sources.lsl_publish import SamplePublisher, stream_type_for
from streamer.sources.lsl_source import (
    LslSource,
    SilenceCheck,
    TimingCheck,
    build_predicate,
    channels_from_info,
    kind_from_type,
)

FS = 125.0
CHANNELS = (
    ChannelInfo("PLETH", "ppg", "a.u."),
    ChannelInfo("ECG", "ecg", "mV"),
    ChannelInfo("ACC_X", "acc", "g"),
)


def unique(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:12]}"


def make_info(name: str, channels=CHANNELS, source_id: str = "") -> SourceInfo:
    return SourceInfo(name=name, fs=FS, channels=tuple(channels), source_id=source_id)


def synthetic(k0: int, n: int, n_channels: int = len(CHANNELS), offset: float = 0.0):
    """Samples whose values identify their index and channel, so any loss, duplicate
    or reordering shows up as a mismatch."""
    k = np.arange(k0, k0 + n, dtype=np.float64)
    samples = k[:, None] * 10.0 + np.arange(n_channels)[None, :] + offset
    return samples, k / FS


def publish_paced(publisher, k0, n, chunk_n=12, time_shift_s=0.0, offset=0.0, n_channels=3):
    """Push ``n`` samples from index ``k0`` in chunks, pacing real time."""
    for start in range(k0, k0 + n, chunk_n):
        m = min(chunk_n, k0 + n - start)
        samples, timestamps = synthetic(start, m, n_channels, offset)
        publisher.push_chunk(Chunk(samples, timestamps + time_shift_s))
        time.sleep(m / FS)


def collect(source: LslSource, done, max_s: float = 15.0) -> list:
    """Items from ``source.chunks()`` until ``done(items)``; a watchdog closes the
    source after ``max_s`` so a broken test fails instead of hanging."""
    watchdog = threading.Timer(max_s, source.close)
    watchdog.start()
    items = []
    try:
        for item in source.chunks():
            items.append(item)
            if done(items):
                break
    finally:
        watchdog.cancel()
    return items


def n_samples(items) -> int:
    return sum(len(i) for i in items if isinstance(i, Chunk))


def stacked(items):
    chunks = [i for i in items if isinstance(i, Chunk)]
    if not chunks:
        return np.empty((0, 0)), np.empty(0)
    return (
        np.concatenate([c.samples for c in chunks]),
        np.concatenate([c.timestamps for c in chunks]),
    )


def events(items, kind=None):
    return [i for i in items if isinstance(i, SourceEvent) and (kind is None or i.kind == kind)]


# -- pure helpers (no network) -----------------------------------------------------------


def test_kind_from_type_accepts_common_spellings():
    assert [kind_from_type(t) for t in ("PPG", "ekg", "ECG", "Resp", "RESP", "ACC")] == [
        "ppg", "ecg", "ecg", "resp", "resp", "acc",
    ]
    assert kind_from_type("Accelerometer") == "acc"
    assert kind_from_type("EEG") is None
    assert kind_from_type("") is None


def test_build_predicate_quotes_values():
    assert build_predicate(None, None, None) == ""
    assert build_predicate("a", "PPG", None) == "name='a' and type='PPG'"
    assert build_predicate("it's", None, None) == "name=\"it's\""
    with pytest.raises(InputError, match="LSL stream name .* contains both quote characters"):
        build_predicate("it's \"x\"", None, None)


def _desc_info(types, labels=None, stream_type="Physio"):
    info = pylsl.StreamInfo("meta", stream_type, len(types), FS, pylsl.cf_double64, "m")
    channels = info.desc().append_child("channels")
    for k, channel_type in enumerate(types):
        node = channels.append_child("channel")
        if labels is not None and labels[k] is not None:
            node.append_child_value("label", labels[k])
        if channel_type is not None:
            node.append_child_value("type", channel_type)
    return info


def test_channels_from_info_fills_missing_labels_and_kinds():
    got = channels_from_info(_desc_info(["EKG", None, "EEG"], ["A", None, "A"]))
    assert [c.name for c in got] == ["A", "ch1", "A_2"]
    assert [c.kind for c in got] == ["ecg", None, None]
    # No channel types at all: the stream's type applies to every channel.
    bare = pylsl.StreamInfo("bare", "PPG", 2, FS, pylsl.cf_double64, "b")
    assert [(c.name, c.kind) for c in channels_from_info(bare)] == [
        ("ch0", "ppg"), ("ch1", "ppg"),
    ]


def test_channels_from_info_applies_and_checks_overrides():
    info = _desc_info(["EEG", "EEG"], ["A", "B"])
    got = channels_from_info(info, {"B": "resp"})
    assert [c.kind for c in got] == [None, "resp"]
    with pytest.raises(InputError, match="LSL stream 'meta' has no channel 'C'; its channels are A, B"):
        channels_from_info(info, {"C": "ppg"})
    with pytest.raises(InputError, match="unknown signal kind 'pulse' for channel 'A'"):
        channels_from_info(info, {"A": "pulse"})


def _timing_reference(timestamps, fs, tolerance_s):
    """Slow, obviously correct twin of TimingCheck over a whole stream."""
    kept, gaps, newest = [], [], -math.inf
    for k, t in enumerate(timestamps):
        if not t > newest:
            continue
        if kept and t - timestamps[kept[-1]] > 2.5 / fs + tolerance_s:
            gaps.append((t, t - timestamps[kept[-1]] - 1 / fs))
        kept.append(k)
        newest = t
    return kept, gaps


def _irregular_timeline(rng):
    timestamps = np.arange(1000) / FS + rng.normal(0, 0.0005, 1000)
    timestamps[300:] += 0.7  # a gap
    timestamps[500] = timestamps[498]  # a duplicate
    timestamps[501] = timestamps[400]  # backwards
    timestamps[502] = np.nan
    timestamps[900:] += 0.05  # a step just above 2.5 periods + tolerance
    return timestamps


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_timing_check_matches_reference_for_any_chunking(seed):
    rng = np.random.default_rng(seed)
    timestamps = _irregular_timeline(rng)
    samples = np.arange(2000, dtype=np.float64).reshape(1000, 2)
    kept, gaps = _timing_reference(timestamps, FS, 0.01)
    sizes = [1] * 20 + list(rng.integers(1, 40, size=200))
    check = TimingCheck(FS, 0.01, "s")
    items, start = [], 0
    for size in sizes:
        if start >= len(timestamps):
            break
        items += check.check(samples[start : start + size], timestamps[start : start + size])
        start += size
    assert start >= len(timestamps)
    got_x, got_t = stacked(items)
    np.testing.assert_array_equal(got_t, timestamps[kept])
    np.testing.assert_array_equal(got_x, samples[kept])
    got_gaps = [(e.time_s, e.detail["missing_s"]) for e in events(items, "gap")]
    assert len(got_gaps) == len(gaps)
    np.testing.assert_allclose(np.array(got_gaps, dtype=float).reshape(-1, 2),
                               np.array(gaps, dtype=float).reshape(-1, 2), rtol=1e-6)
    # The 0.7 s gap, the hole left by the three dropped samples, and the 0.05 s step.
    assert len(gaps) == 3
    # Samples 500-502 are one episode of irregular timing: one event, not three.
    assert len(events(items, "irregular")) == 1
    # Each gap event sits right before the chunk that starts at its time.
    for k, item in enumerate(items):
        if isinstance(item, SourceEvent) and item.kind == "gap":
            assert items[k + 1].timestamps[0] == item.time_s


def test_timing_check_new_irregular_episode_after_a_regular_second():
    check = TimingCheck(FS, 0.0, "s")
    timestamps = np.arange(600) / FS
    timestamps[[100, 400]] = timestamps[[99, 399]]  # two glitches 300 samples apart
    items = check.check(np.zeros((600, 1)), timestamps)
    assert len(events(items, "irregular")) == 2
    with pytest.raises(ParameterError, match="fs=0.0 must be > 0"):
        TimingCheck(0.0)


def test_no_lsl_streams_at_all_is_one_clear_line(monkeypatch):
    monkeypatch.setattr(pylsl, "resolve_bypred", lambda *a, **k: [])
    monkeypatch.setattr(pylsl, "resolve_streams", lambda *a, **k: [])
    with pytest.raises(InputError, match=r"no LSL stream matches name='x'.*no LSL streams at all on this network"):
        LslSource(name="x", timeout_s=0.1)


# -- on the loopback network -------------------------------------------------------------


@pytest.mark.lsl
def test_samples_and_metadata_round_trip():
    name = unique("rw-roundtrip")
    publisher = SamplePublisher(make_info(name))
    source = LslSource(name=name, timeout_s=5.0, extra_wait_s=0.2)
    assert source.info.channels == CHANNELS
    assert source.info.fs == FS
    assert source.info.source_id == publisher.source_id
    n_pushed = int(2 * FS)
    thread = threading.Thread(target=publish_paced, args=(publisher, 0, n_pushed))
    thread.start()
    items = collect(source, lambda items: n_samples(items) >= n_pushed)
    thread.join()
    source.close()
    publisher.close()

    assert events(items) == []
    got_x, got_t = stacked(items)
    want_x, want_t = synthetic(0, n_pushed)
    assert got_x.dtype == np.float64 and got_t.dtype == np.float64
    np.testing.assert_array_equal(got_x, want_x)
    assert np.all(np.diff(got_t) > 0)
    # The publisher shifts by one constant and the loopback clock offset is tiny, so
    # received times are the pushed ones plus a constant (within 1 ms: local clock
    # offset estimates on one machine are microseconds, measured).
    shift = got_t - want_t
    assert np.ptp(shift) < 1e-3
    assert shift[-1] == pytest.approx(publisher.offset_s, abs=1e-3)


@pytest.mark.lsl
def test_no_matching_stream_lists_what_was_seen():
    name = unique("rw-present")
    with SamplePublisher(make_info(name), type="PPG"):
        missing = unique("rw-missing")
        with pytest.raises(
            InputError,
            match=rf"no LSL stream matches name='{missing}' within 0.3 s; streams seen: .*'{name}' \(type 'PPG', source_id '.+', 3 ch, 125 Hz\)",
        ):
            LslSource(name=missing, timeout_s=0.3)


@pytest.mark.lsl
def test_two_matching_streams_are_refused():
    stream_type = unique("RW")
    first = SamplePublisher(make_info(unique("rw-a")), type=stream_type)
    second = SamplePublisher(make_info(unique("rw-b")), type=stream_type)
    with pytest.raises(InputError, match=rf"2 LSL streams match type='{stream_type}': .*add --source-id") as raised:
        LslSource(type=stream_type, timeout_s=5.0)
    assert first.source_id in str(raised.value) and second.source_id in str(raised.value)
    # Naming the source id resolves the ambiguity.
    with LslSource(type=stream_type, source_id=second.source_id, extra_wait_s=0.2) as source:
        assert source.info.name == second.name
    first.close()
    second.close()


@pytest.mark.lsl
def test_skipped_timestamps_give_a_gap_event():
    name = unique("rw-gap")
    publisher = SamplePublisher(make_info(name))
    source = LslSource(name=name, extra_wait_s=0.2)
    half = int(0.5 * FS)

    def run():
        publish_paced(publisher, 0, half)
        publish_paced(publisher, half, half, time_shift_s=1.0)

    thread = threading.Thread(target=run)
    thread.start()
    items = collect(source, lambda items: n_samples(items) >= 2 * half)
    thread.join()
    source.close()
    publisher.close()

    gaps = events(items, "gap")
    assert len(gaps) == 1
    assert gaps[0].detail["missing_s"] == pytest.approx(1.0, abs=1e-3)
    assert events(items, "irregular") == events(items, "lost") == []
    got_x, got_t = stacked(items)
    np.testing.assert_array_equal(got_x, synthetic(0, 2 * half)[0])
    assert np.all(np.diff(got_t) > 0)


@pytest.mark.lsl
def test_lost_then_resumed_with_same_source_id():
    name = unique("rw-lost")
    source_id = unique("rw-sid")
    first = SamplePublisher(make_info(name), source_id=source_id)
    source = LslSource(source_id=source_id, extra_wait_s=0.2, lost_after_s=2.0)
    half = int(0.5 * FS)
    state = {}

    def sender():
        publish_paced(first, 0, half)
        first.close()
        # A stream with the same id but another layout must be refused...
        wrong = SamplePublisher(
            make_info(name, CHANNELS[:1]), source_id=source_id, type="PPG"
        )
        state["wrong"] = wrong
        while not state.get("refused"):
            time.sleep(0.02)
        # ...and one with the same layout taken up again.
        second = SamplePublisher(make_info(name), source_id=source_id)
        state["second"] = second
        if second.wait_for_consumers(10.0):
            publish_paced(second, 0, half, offset=0.25)

    def done(items):
        if any(e.kind == "lost" and "came back" in e.message for e in events(items)):
            state["refused"] = True
        return n_samples(items) >= 2 * half

    thread = threading.Thread(target=sender)
    thread.start()
    items = collect(source, done, max_s=20.0)
    state["refused"] = True  # let the sender finish even if the test failed
    thread.join()
    source.close()
    for key in ("wrong", "second"):
        if key in state:
            state[key].close()

    kinds = [e.kind for e in events(items)]
    assert kinds == ["lost", "lost", "resumed"]
    lost, refused, resumed = events(items)
    assert lost.message == f"stream '{name}' lost; waiting for it to come back"
    assert refused.message.startswith(
        f"stream '{name}' came back with 1 channel(s) at 125 Hz instead of 3 at 125 Hz"
    )
    assert resumed.detail["missing_s"] > 0
    after = items[items.index(resumed) + 1 :]
    before = items[: items.index(lost)]
    np.testing.assert_array_equal(stacked(before)[0], synthetic(0, half)[0])
    np.testing.assert_array_equal(stacked(after)[0], synthetic(0, half, offset=0.25)[0])


@pytest.mark.parametrize("pause_s, kinds", [(1.2, ["gap"]), (2.5, ["irregular", "gap"])])
@pytest.mark.lsl
def test_silent_stream_still_on_the_network_is_not_lost(pause_s, kinds):
    """A sender that stops sending but keeps its outlet is not lost: after the silence
    limit plus ``presence_s`` (0.3 + 1.5 s) one event says it is silent; the hole in its
    timestamps is a gap, and nothing is restarted."""
    name = unique("rw-silent")
    publisher = SamplePublisher(make_info(name))
    source = LslSource(name=name, extra_wait_s=0.2, lost_after_s=0.3, presence_s=1.5)
    part = int(0.4 * FS)

    def run():
        publish_paced(publisher, 0, part)
        time.sleep(pause_s)  # the outlet stays, it only stops sending
        publish_paced(publisher, part, part, time_shift_s=pause_s)

    thread = threading.Thread(target=run)
    thread.start()
    items = collect(source, lambda items: n_samples(items) >= 2 * part)
    thread.join()
    source.close()
    publisher.close()

    assert [e.kind for e in events(items)] == kinds
    if "irregular" in kinds:
        stalled = events(items, "irregular")[0]
        assert stalled.message == (f"stream '{name}' has sent no samples for 1.8 s but is "
                                   f"still on the network; waiting for more")
        assert stalled.detail["silent_s"] > 1.8
    gap = events(items, "gap")[0]
    assert gap.detail["missing_s"] == pytest.approx(pause_s, abs=1e-3)
    np.testing.assert_array_equal(stacked(items)[0], synthetic(0, 2 * part)[0])


def test_silence_check_learns_the_rhythm_of_a_bursty_sender():
    check = SilenceCheck(2.0, presence_s=3.0)
    # A pause after which the timestamps skip is a hole: it teaches nothing.
    check.delivered(10.0, continues=False)
    assert check.limit_s == 2.0
    assert check.verdict(1.9, present=False) is None
    assert check.verdict(2.1, present=False) == "lost"
    assert check.verdict(4.9, present=True) is None
    assert check.verdict(5.1, present=True) == "stalled"
    # Ten seconds of samples delivered every ten seconds: twice that is the limit.
    check.delivered(10.0, continues=True)
    check.delivered(0.01, continues=True)
    assert check.limit_s == 20.0
    assert check.verdict(19.0, present=False) is None
    assert check.verdict(21.0, present=False) == "lost"
    assert check.verdict(22.0, present=True) is None
    assert check.verdict(23.5, present=True) == "stalled"
    with pytest.raises(ParameterError, match="lost_after_s=0 must be > 0"):
        SilenceCheck(0)
    with pytest.raises(ParameterError, match="presence_s=-1 must be > 0"):
        SilenceCheck(1.0, presence_s=-1)


@pytest.mark.lsl
def test_close_ends_chunks_while_waiting():
    name = unique("rw-close")
    publisher = SamplePublisher(make_info(name))
    source = LslSource(name=name, extra_wait_s=0.2, lost_after_s=0.2)
    items = []
    consumer = threading.Thread(target=lambda: items.extend(source.chunks()))
    consumer.start()
    publisher.close()  # nothing will ever arrive: chunks() waits for a comeback
    while not events(items, "lost"):
        time.sleep(0.01)
        assert consumer.is_alive()
    source.close()
    consumer.join(timeout=5.0)  # a hang guard, not a timing check
    assert not consumer.is_alive()
    assert [e.kind for e in events(items)] == ["lost"]


def _open_estimates(source_id: str):
    found = pylsl.resolve_byprop("source_id", source_id, 1, 5.0)
    assert len(found) == 1
    inlet = pylsl.StreamInlet(found[0])
    inlet.open_stream(timeout=5.0)
    return inlet, inlet.info(timeout=5.0)


def _receive(inlet, n: int):
    received_x, received_t = [], []
    deadline = time.monotonic() + 5.0  # a hang guard only
    while len(received_t) < n and time.monotonic() < deadline:
        x, t = inlet.pull_chunk(timeout=0.1)
        received_x += x
        received_t += t
    return np.asarray(received_x), np.asarray(received_t)


@pytest.mark.lsl
def test_estimate_outlet_publishes_one_stream_per_pair():
    pairs = [("hr", "PLETH"), ("rr", "PLETH")]
    name = unique("rw-est")
    hops = {("hr", "PLETH"): 0.25, ("rr", "PLETH"): 0.5}
    outlet = EstimateOutlet(pairs, hop_s=hops, name=name, input_id=name)
    assert outlet.instance == 1
    assert outlet.names == {("hr", "PLETH"): f"{name} hr.PLETH",
                            ("rr", "PLETH"): f"{name} rr.PLETH"}
    hr_inlet, hr_info = _open_estimates(outlet.source_ids[("hr", "PLETH")])
    rr_inlet, rr_info = _open_estimates(outlet.source_ids[("rr", "PLETH")])
    assert (hr_info.name(), rr_info.name()) == (f"{name} hr.PLETH", f"{name} rr.PLETH")
    assert hr_info.channel_count() == rr_info.channel_count() == len(FIELDS) == 6
    assert (hr_info.nominal_srate(), rr_info.nominal_srate()) == (4.0, 2.0)
    assert hr_info.get_channel_labels() == channel_labels([("hr", "PLETH")])
    assert rr_info.get_channel_labels()[0] == "rr.PLETH.rate_per_min"
    assert hr_info.get_channel_units() == ["1/min", "1", "1", "s", "1/min", "1"]

    now = pylsl.local_clock()
    estimates = [
        Estimate("hr", "PLETH", now - 4.0, now, 72.5, 0.9, 0.8, (), 74.0, 0.85),
        # Breathing from a pulse reports hops when a beat completes them: two at once.
        Estimate("rr", "PLETH", now - 16.5, now, 15.0, 0.7, 0.6),
        Estimate("rr", "PLETH", now - 16.0, now, math.nan, 0.1, 0.2),
        Estimate("hr", "PLETH", now - 3.75, now + 0.25, math.nan, 0.1, 0.2),
    ]
    outlet.push(estimates)
    hr_x, hr_t = _receive(hr_inlet, 2)
    rr_x, rr_t = _receive(rr_inlet, 2)
    outlet.close()
    # One sample per estimate, in its own stream, NaN only where there is no rate.
    assert hr_t == pytest.approx([now, now + 0.25], abs=1e-9)
    assert rr_t == pytest.approx([now, now], abs=1e-9)
    np.testing.assert_allclose(hr_x, [[72.5, 0.9, 0.8, 4.0, 74.0, 0.85],
                                      [np.nan, 0.1, 0.2, np.nan, np.nan, np.nan]],
                               rtol=0, atol=1e-9)
    np.testing.assert_allclose(rr_x, [[15.0, 0.7, 0.6, 16.5, np.nan, np.nan],
                                      [np.nan, 0.1, 0.2, np.nan, np.nan, np.nan]],
                               rtol=0, atol=1e-9)
    with pytest.raises(ParameterError, match=r"estimate for \('hr', 'ECG'\) is not among"):
        outlet.rows([Estimate("hr", "ECG", 0.0, 1.0, 60.0, 1.0, 1.0)])
    with pytest.raises(ParameterError, match=r"hop_s=0 for \('hr', 'PLETH'\) must be > 0"):
        EstimateOutlet(pairs, hop_s=0)


@pytest.mark.lsl
def test_estimate_outlet_sends_nan_for_a_withheld_rate_and_keeps_a_greyed_one():
    name = unique("rw-rule")
    outlet = EstimateOutlet([("hr", "PLETH")], hop_s=0.25, name=name, input_id=name)
    try:
        samples, _ = outlet.rows([
            Estimate("hr", "PLETH", 0.0, 4.0, 150.0, 0.3, 0.9),    # withheld: P < 0.5
            Estimate("hr", "PLETH", 0.25, 4.25, 151.0, 0.6, 0.9),  # greyed
            Estimate("hr", "PLETH", 0.5, 4.5, 152.0, 0.9, 0.9),    # shown
        ])[("hr", "PLETH")]
    finally:
        outlet.close()
    np.testing.assert_array_equal(samples[:, 0], [np.nan, 151.0, 152.0])
    np.testing.assert_array_equal(samples[:, 1], [0.3, 0.6, 0.9])  # confidence says why
    np.testing.assert_array_equal(samples[:, 3], [np.nan, 4.0, 4.0])


@pytest.mark.lsl
def test_estimate_outlet_ids_are_stable_and_unique_per_instance():
    """Same inputs, same ids, so a recorder picks up a restarted run; but a second run at
    the same time takes the next instance number instead of sharing the first's ids."""
    pairs = [("hr", "PLETH"), ("rr", "PLETH")]
    input_id, name = unique("rw-input"), unique("rw-est")
    first = EstimateOutlet(pairs, 0.25, name=name, input_id=input_id)
    second = EstimateOutlet(pairs, 0.25, name=name, input_id=input_id)
    assert (first.instance, second.instance) == (1, 2)
    assert second.names[("hr", "PLETH")] == f"{name} (2) hr.PLETH"
    assert len(set(first.source_ids.values()) | set(second.source_ids.values())) == 4
    hr_id = first.source_ids[("hr", "PLETH")]
    assert second.source_ids[("hr", "PLETH")] == hr_id.replace(".hr.", "-2.hr.")
    first_ids = dict(first.source_ids)
    first.close()
    # The first run ended; a new run on the same input gets its ids back.
    again = EstimateOutlet(pairs, 0.25, name=name, input_id=input_id)
    assert again.instance == 1 and again.source_ids == first_ids
    # Other inputs or hops give other ids.
    other = EstimateOutlet(pairs, 0.5, name=name, input_id=input_id, claim_wait_s=0)
    assert set(other.source_ids.values()).isdisjoint(first_ids.values())
    for outlet in (second, again, other):
        outlet.close()


def test_stream_type_follows_channel_kinds():
    assert stream_type_for(make_info("x", CHANNELS[:1])) == "PPG"
    assert stream_type_for(make_info("x")) == "Physio"
