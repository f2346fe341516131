"""Damaged timing: holes in the time axis, dropped chunks, duplicated and out-of-order
timestamps, a sender clock that jumps, and a device whose actual rate is 5 % off its
nominal rate.

What ridgewatch does:

* the engine places its hops by sample count at the nominal rate; timestamps label the
  estimates, and a label never goes backwards (``RateMonitor.update`` labels a late
  timestamp with the newest one seen), so ``emitted_s`` in the log never decreases and
  ``time_s <= emitted_s`` whatever a source delivers;
* a forward step of the timestamps longer than ``max(3 sample periods, 0.25 s)`` is a
  gap (``estimators.monitor.find_gaps``): the engine restarts every path there, so no
  window spans it, nothing is dated inside it, and the first estimates after it come
  from samples after it only, one start-up window later -- exactly those of a fresh
  engine fed the samples after the gap. The offline twin cuts the record there. The
  runner writes a ``gap`` event into the log (file replay too);
* the LSL source drops samples whose timestamps do not increase and reports gaps
  (:class:`streamer.sources.lsl_source.TimingCheck`), so on the live path duplicates
  cost nothing and a hole is announced in the log once;
* a device whose timestamps show a rate off nominal gives rates off by the same
  fraction; the runner says so once, in the log (:class:`streamer.runner.RateCheck`).
"""

from __future__ import annotations

import numpy as np
import pytest

from estimators.config import get_profile
from estimators.monitor import (GAP_MIN_S, GAP_PERIODS, RateMonitor, find_gaps,
                                gap_threshold_s, offline_estimates)
from streamer.channels import Selected
from streamer.runner import RATE_TOLERANCE, Runner
from streamer.sinks.estimate_log import EstimateLog, read_log
from streamer.sources.base import ChannelInfo, Chunk, Recording, SourceEvent, SourceInfo
from streamer.sources.lsl_source import TimingCheck
from streamer.sources.replay import RecordingSource
from tests.robustness.faults import (Fault, actual_rate_stream, assert_log_invariants,
                                     breathing_pulse, chunked, columns, feed, inject,
                                     pulse_signal, pulse_wave, within_ec13)

FS = 125.0
PROFILE = get_profile("wrist")
HR = PROFILE.hr
DURATION_S = 80.0
FAULT_START_S, FAULT_S = 35.0, 3.0
FAULT_END_S = FAULT_START_S + FAULT_S
CHUNK = 16  # samples per chunk, about what an LSL sender pushes at 125 Hz
RECOVERED_S = HR.window_s + 2 * HR.hop_s


def truth_per_min(t):
    return 75.0 + 10.0 * np.sin(2 * np.pi * t / 80.0)


@pytest.fixture(scope="module")
def clean():
    x, t, _, _ = pulse_signal(DURATION_S, FS, truth_per_min, seed=4)
    return x, t


@pytest.fixture(scope="module")
def clean_estimates(clean):
    return run_engine(chunked(*clean, CHUNK))


def run_engine(chunks):
    estimates = feed(RateMonitor([("finger", "ppg")], FS, PROFILE), chunks)
    assert_log_invariants(estimates, PROFILE)
    return estimates


def assert_same_estimates(got, want) -> None:
    """Equal row by row (NaN equal to NaN)."""
    assert [(e.quantity, e.source) for e in got] == [(e.quantity, e.source) for e in want]
    for key in ("time_s", "emitted_s", "rate", "confidence", "quality"):
        np.testing.assert_array_equal(columns(got, None)[key], columns(want, None)[key])


def assert_close_estimates(got, want) -> None:
    """Row by row: the same streams and times, values equal to rounding (chunks of other
    sizes batch the FFTs differently, so the last bit may differ; NaN equal to NaN)."""
    assert [(e.quantity, e.source) for e in got] == [(e.quantity, e.source) for e in want]
    for key in ("time_s", "emitted_s"):
        np.testing.assert_array_equal(columns(got, None)[key], columns(want, None)[key])
    for key in ("rate", "confidence", "quality"):
        np.testing.assert_allclose(columns(got, None)[key], columns(want, None)[key],
                                   rtol=1e-9, atol=1e-12)


def faulty(clean, *faults):
    return inject(chunked(*clean, CHUNK), list(faults))


def assert_recovers(c, clean_time_after_s: float) -> None:
    """Every estimate whose window is clear of the fault is within tolerance."""
    after = c["emitted_s"] >= clean_time_after_s + RECOVERED_S
    assert after.sum() >= 50
    truth = truth_per_min(c["time_s"][after])
    assert within_ec13(c["rate"][after], truth).all()


# -- straight into the engine ---------------------------------------------------------


@pytest.mark.parametrize("kind", ["duplicate", "reorder"])
def test_engine_keeps_estimating_through_chunk_faults(clean, kind):
    """Resent or swapped chunks straight into the engine: no exception, labels never go
    backwards, and every estimate is back within tolerance one window after the fault.
    Swapped chunks (a forward step of one chunk, 0.13 s, below the gap threshold)
    splice the same rhythm, so whatever is shown meanwhile is right too; resent chunks
    repeat samples, which the engine cannot tell from signal (the live source removes
    them first, see below)."""
    assert (CHUNK + 1) / FS < gap_threshold_s(FS)
    c = columns(run_engine(faulty(clean, Fault(kind, FAULT_START_S, FAULT_S))))
    shown = ~np.isnan(c["rate"])
    assert shown.mean() > 0.8
    if kind != "duplicate":
        assert within_ec13(c["rate"][shown], truth_per_min(c["time_s"][shown])).all()
    assert_recovers(c, FAULT_END_S)


def fresh_estimates(chunks, profile=PROFILE, channels=(("finger", "ppg"),), fs=FS):
    """Estimates of a new engine fed ``chunks``."""
    monitor = RateMonitor(list(channels), fs, profile)
    estimates = feed(monitor, chunks)
    assert_log_invariants(estimates, profile)
    return estimates


def test_dropped_chunks_restart_the_engine_after_the_hole(clean, clean_estimates):
    """Dropping 3 s of chunks leaves a hole in the timestamps: estimates before it are
    those of the clean stream, none is dated in it or formed across it, and those after
    it are exactly a fresh engine's on the samples after the hole (the first one start-up
    window after it)."""
    pieces = list(faulty(clean, Fault("drop", FAULT_START_S, FAULT_S)))
    times = np.concatenate([t for _, t in pieces])
    (k,) = find_gaps(times, FS)
    before_s, after_s = times[k - 1], times[k]
    assert after_s - before_s == pytest.approx(FAULT_S, abs=2 * CHUNK / FS)
    got = run_engine(pieces)
    c = columns(got)
    assert not ((c["time_s"] > before_s) & (c["time_s"] < after_s)).any()
    want_before = [e for e in clean_estimates if e.emitted_s <= before_s]
    assert_same_estimates([e for e in got if e.emitted_s <= before_s], want_before)
    after = [e for e in got if e.emitted_s >= after_s]
    x = np.concatenate([p for p, _ in pieces])
    assert_same_estimates(after, fresh_estimates(chunked(x[k:], times[k:], CHUNK)))
    assert min(e.emitted_s for e in after) >= after_s + HR.min_window_s - 1.0 / FS
    assert_recovers(c, after_s + HR.min_window_s - RECOVERED_S)


def test_clock_stepped_back_changes_only_the_labels(clean, clean_estimates):
    """A sender clock stepped 30 s back: the rates, confidences and quality are exactly
    those of the clean stream (the engine counts samples, and a step back is never a
    gap); labels hold at the newest time seen until the clock passes it again."""
    jump_s = -30.0
    jumped = run_engine(faulty(clean, Fault("clock_jump", FAULT_START_S, value=jump_s)))
    assert len(jumped) == len(clean_estimates)
    for key in ("rate", "confidence", "quality"):
        np.testing.assert_array_equal(columns(jumped)[key], columns(clean_estimates)[key])
    got, want = columns(jumped)["emitted_s"], columns(clean_estimates)["emitted_s"]
    late = want >= FAULT_START_S
    np.testing.assert_allclose(got[~late], want[~late])
    np.testing.assert_allclose(got[late], np.maximum(want[late] + jump_s,
                                                     want[~late].max()), atol=1e-9)


def test_clock_stepped_forward_is_a_gap(clean, clean_estimates):
    """A sender clock stepped 120 s forward looks exactly like a 120 s hole: the engine
    restarts there (it cannot tell a clock step from lost samples, and either way the
    rate may have moved on), so the estimates after it are a fresh engine's on the
    samples from the step on, with the stepped labels."""
    pieces = list(faulty(clean, Fault("clock_jump", FAULT_START_S, value=120.0)))
    x = np.concatenate([p for p, _ in pieces])
    times = np.concatenate([t for _, t in pieces])
    (k,) = find_gaps(times, FS)
    assert times[k] == pytest.approx(FAULT_START_S + 120.0, abs=1.0 / FS)
    got = run_engine(pieces)
    assert_same_estimates([e for e in got if e.emitted_s < times[k]],
                          [e for e in clean_estimates if e.emitted_s < times[k - 1] + 1e-9])
    assert_same_estimates([e for e in got if e.emitted_s >= times[k]],
                          fresh_estimates(chunked(x[k:], times[k:], CHUNK)))


def test_fast_sender_clock_changes_only_the_labels(clean, clean_estimates):
    """Timestamps that run 5 % fast over the same samples: same estimates, and labels
    that follow the sender's clock."""
    fast = run_engine(faulty(clean, Fault("rate", 0.0, value=1.05)))
    np.testing.assert_array_equal(columns(fast)["rate"], columns(clean_estimates)["rate"])
    np.testing.assert_allclose(columns(fast)["emitted_s"],
                               1.05 * columns(clean_estimates)["emitted_s"])


@pytest.mark.parametrize("factor", [1.05, 0.95])
def test_actual_rate_off_nominal_scales_the_rates_by_the_same_factor(factor):
    """A device that declares 125 Hz but samples 5 % faster (or slower): the engine
    counts samples at the nominal rate, so a true rate f is reported as f / factor --
    still within the heart-rate tolerance at these rates, and said in the log (see the
    runner test below)."""
    x, t = actual_rate_stream(60.0, FS, factor, truth_per_min,
                              lambda fs, r: pulse_wave(fs, r, seed=5)[0])
    c = columns(run_engine(chunked(x, t, CHUNK)))
    truth = truth_per_min(c["time_s"])
    ratio = np.median(c["rate"] / truth)
    assert abs(ratio * factor - 1.0) < 0.01
    assert within_ec13(c["rate"], truth).all()


# -- a long hole in the time axis ------------------------------------------------------

HOLE_S = 600.0
STRETCH_S = 60.0
BEFORE, AFTER = (72.0, 12.0), (120.0, 24.0)
"""Heart rate (bpm) and breathing rate (per minute) before and after the hole."""
HOLE_CHANNELS = (("green", "ppg"), ("red", "ppg"), ("belt", "resp"), ("wrist", "acc"))


def stretch(start_s, heart_per_min, breaths_per_min, seed):
    t = start_s + np.arange(int(STRETCH_S * FS)) / FS
    breath = np.sin(2 * np.pi * breaths_per_min / 60.0 * (t - t[0]))
    cadence = np.sin(2 * np.pi * 2.6 * t)  # an arm swinging at 156 per minute
    heart = np.full(len(t), heart_per_min)
    return np.column_stack([breathing_pulse(FS, heart, breaths_per_min, seed),
                            breathing_pulse(FS, heart, breaths_per_min, seed + 1),
                            breath, cadence]), t


@pytest.fixture(scope="module")
def hole_record():
    """60 s at 72 bpm and 12 breaths/min, then no samples for 10 minutes, then 60 s at
    120 bpm and 24 breaths/min. Returns samples, timestamps and the index of the first
    sample after the hole."""
    x1, t1 = stretch(0.0, *BEFORE, seed=11)
    x2, t2 = stretch(STRETCH_S + HOLE_S, *AFTER, seed=21)
    return np.vstack([x1, x2]), np.concatenate([t1, t2]), len(t1)


def hole_chunks(rng, n):
    """Random chunk sizes with runs of single samples; one chunk holds the hole inside."""
    sizes = []
    while sum(sizes) < n:
        sizes += [1] * int(rng.integers(0, 5)) + [int(rng.integers(2, 400))]
    return sizes


def assert_nothing_inside(estimates, before_s, after_s):
    c = columns(estimates, None)
    for key in ("time_s", "emitted_s"):
        inside = (c[key] > before_s) & (c[key] < after_s)
        assert not inside.any(), [e for e, i in zip(estimates, inside) if i][:3]


@pytest.mark.parametrize("profile_name,channels", [
    ("wrist", HOLE_CHANNELS[:3]),  # heart rate, fused, belt and pulse breathing
    ("exercise-wrist", HOLE_CHANNELS)])  # the motion stage with its accelerometer
def test_a_long_hole_restarts_every_path(rng, hole_record, profile_name, channels):
    """The issue's case: the rate goes from 72 to 120 bpm across a 10-minute hole. No
    estimate is dated inside the hole or uses samples from both sides: every estimate
    after it (heart rate per channel and fused, breathing from the belt and from each
    pulse, the motion stage) is exactly what a new engine gives for the samples after
    the hole alone, whatever the chunking; the estimates before it are untouched."""
    profile = get_profile(profile_name)
    x, t, k = hole_record
    x = x[:, :len(channels)]
    sizes = hole_chunks(rng, len(t))
    got = fresh_estimates(chunked(x, t, sizes), profile, channels)
    assert_nothing_inside(got, t[k - 1], t[k])
    after = [e for e in got if e.emitted_s >= t[k]]
    assert_close_estimates(after, fresh_estimates([(x[k:], t[k:])], profile, channels))
    assert_close_estimates([e for e in got if e.emitted_s < t[k]],
                           fresh_estimates([(x[:k], t[:k])], profile, channels))
    streams = {(e.quantity, e.source) for e in after}
    want = {("hr", "green"), ("hr", "red"), ("hr", "fused"), ("rr", "belt")}
    if profile.breathing_from_pulse:
        want |= {("rr", "green"), ("rr", "red")}
    assert streams == want
    for quantity, source in streams:
        c = columns(after, quantity, source)
        settings = profile.hr if quantity == "hr" else (
            profile.rr if source == "belt" else profile.rr_pulse)
        # The first estimate waits for a start-up window of samples after the hole.
        assert c["emitted_s"].min() >= t[k] + settings.min_window_s - 1.0 / FS
        shown = ~np.isnan(c["rate"])
        assert shown.mean() > 0.8, (quantity, source)
        truth = AFTER[0] if quantity == "hr" else AFTER[1]
        tolerance = 5.0 if quantity == "hr" else 2.0
        assert np.all(np.abs(c["rate"][shown] - truth) <= tolerance), (quantity, source)


def test_the_monitor_says_where_it_restarted(hole_record):
    x, t, k = hole_record
    monitor = RateMonitor([HOLE_CHANNELS[0]], FS, PROFILE)
    monitor.update(x[:k - 5, :1], t[:k - 5])
    assert monitor.last_gaps == []
    monitor.update(x[k - 5:k + 5, :1], t[k - 5:k + 5])
    (gap,) = monitor.last_gaps
    assert (gap.before_s, gap.after_s) == (t[k - 1], t[k])
    assert gap.missing_s == pytest.approx(HOLE_S)
    monitor.update(x[k + 5:k + 9, :1], t[k + 5:k + 9])
    assert monitor.last_gaps == []
    # A hole exactly between two chunks is found too, once.
    monitor = RateMonitor([HOLE_CHANNELS[0]], FS, PROFILE)
    monitor.update(x[:k, :1], t[:k])
    monitor.update(x[k:k + 9, :1], t[k:k + 9])
    assert [(g.before_s, g.after_s) for g in monitor.last_gaps] == [(t[k - 1], t[k])]


def test_the_gap_threshold_is_three_periods_or_a_quarter_second():
    """Steps up to ``max(3 / fs, 0.25 s)`` are not gaps (jitter, a dropped sample or
    two); longer ones are."""
    assert (GAP_PERIODS, GAP_MIN_S) == (3.0, 0.25)
    assert gap_threshold_s(125.0) == 0.25
    assert gap_threshold_s(10.0) == pytest.approx(0.3)
    for fs, step in ((125.0, 0.25), (10.0, 0.3)):
        t = np.concatenate([np.arange(50) / fs, 49 / fs + step + np.arange(50) / fs])
        assert find_gaps(t, fs).tolist() == []
        t[50:] += 1e-3
        assert find_gaps(t, fs).tolist() == [50]
        # Against the newest time seen before the chunk too.
        assert find_gaps(t[50:], fs, newest_s=t[49]).tolist() == [0]
        assert find_gaps(t[50:], fs, newest_s=np.nan).tolist() == []


def test_a_short_hole_is_spliced_without_a_restart(clean):
    """A hole of 0.2 s (under the threshold) does not restart the engine: estimates keep
    coming every hop and stay within tolerance."""
    x, t = clean
    keep = (t < 40.0) | (t >= 40.2)
    estimates = run_engine(chunked(x[keep], t[keep], CHUNK))
    c = columns(estimates)
    steps = np.diff(c["emitted_s"])
    assert steps.max() < 0.5  # no start-up pause
    assert within_ec13(c["rate"], truth_per_min(c["time_s"])).all()


def test_the_offline_twin_is_cut_at_the_hole(hole_record):
    """Offline, the record is cut at the hole and each stretch estimated on its own:
    nothing is dated inside the hole, and each side equals the offline estimates of that
    side alone."""
    x, t, k = hole_record
    channels = HOLE_CHANNELS[:3]
    x = x[:, :3]
    got = offline_estimates(x, t, channels, FS, PROFILE)
    assert_nothing_inside(got, t[k - 1], t[k])

    def by_time(estimates):
        return sorted(estimates, key=lambda e: (e.time_s, e.quantity, e.source))

    assert_same_estimates(by_time([e for e in got if e.time_s < t[k]]),
                          by_time(offline_estimates(x[:k], t[:k], channels, FS, PROFILE)))
    after = by_time([e for e in got if e.time_s > t[k - 1]])
    assert_same_estimates(after, by_time(offline_estimates(x[k:], t[k:], channels, FS,
                                                           PROFILE)))
    hr = columns(after, "hr", "fused")
    assert np.all(np.abs(hr["rate"] - AFTER[0]) <= 5.0)


# -- the LSL timing check in front of the engine ---------------------------------------


def through_timing_check(chunks):
    check = TimingCheck(FS, stream="sensor")
    items = []
    for x, t in chunks:
        items.extend(check.check(x, t))
    return items


def test_live_path_drops_duplicates_so_estimates_equal_the_clean_stream(clean,
                                                                         clean_estimates):
    """A sender that resends 3 s of chunks: the LSL source drops the repeats with one
    'irregular' event, and the engine's estimates equal those of the clean stream."""
    items = through_timing_check(faulty(clean, Fault("duplicate", FAULT_START_S, FAULT_S)))
    events = [i for i in items if isinstance(i, SourceEvent)]
    assert [e.kind for e in events] == ["irregular"]
    assert "sent timestamps that do not increase" in events[0].message
    estimates = run_engine((i.samples, i.timestamps) for i in items if isinstance(i, Chunk))
    assert_same_estimates(estimates, clean_estimates)


@pytest.mark.parametrize("kind", ["drop", "reorder"])
def test_live_path_reports_a_hole_as_a_gap_and_recovers(clean, kind):
    """Dropped chunks, or late chunks the LSL source discards: a 'gap' event says how
    much is missing; estimation continues and recovers one window later."""
    items = through_timing_check(faulty(clean, Fault(kind, FAULT_START_S, FAULT_S)))
    gaps = [i for i in items if isinstance(i, SourceEvent) and i.kind == "gap"]
    assert gaps and all(g.detail["missing_s"] > 0 for g in gaps)
    if kind == "drop":
        assert len(gaps) == 1
        assert gaps[0].detail["missing_s"] == pytest.approx(FAULT_S, abs=CHUNK / FS)
    estimates = run_engine((i.samples, i.timestamps) for i in items if isinstance(i, Chunk))
    assert_recovers(columns(estimates), FAULT_END_S)


# -- through the runner into the log ---------------------------------------------------


def run_to_log(tmp_path, samples, timestamps, fs_nominal=FS):
    info = SourceInfo("sensor", fs_nominal, (ChannelInfo("PPG", "ppg"),), "test:sensor")
    source = RecordingSource(Recording(samples[:, None], timestamps, info), chunk_s=0.1)
    path = tmp_path / "log.csv"
    log = EstimateLog(path, "replay", info.name, {"PPG": "ppg"}, {})
    stats = Runner(source, [Selected(0, "PPG", "ppg")], PROFILE, log=log).run()
    return stats, read_log(path), path.read_text()


def test_out_of_order_file_timestamps_leave_a_log_whose_times_never_go_back(tmp_path,
                                                                            clean):
    """A recording whose timestamps go backwards in places (an XDF file may; the reader
    warns and keeps them): every row of the log still satisfies the log's rules."""
    pieces = list(faulty(clean, Fault("reorder", 20.0, 10.0),
                         Fault("clock_jump", 50.0, value=-5.0)))
    x = np.concatenate([p for p, _ in pieces])
    t = np.concatenate([p for _, p in pieces])
    assert (np.diff(t) < 0).sum() >= 10
    _, table, _ = run_to_log(tmp_path, x[:, 0], t)
    assert len(table) > 200
    assert (np.diff(table.columns["emitted_s"]) >= 0).all()
    assert (table.columns["emitted_s"] >= table.columns["time_s"]).all()


@pytest.mark.parametrize("factor", [1.05, 0.95])
def test_runner_says_once_in_the_log_when_the_actual_rate_is_off(tmp_path, factor):
    x, t = actual_rate_stream(150.0, FS, factor, 72.0,
                              lambda fs, r: pulse_wave(fs, r, seed=6)[0])
    stats, table, text = run_to_log(tmp_path, x, t)
    warnings = [e for e in stats.events if e.kind == "irregular"]
    assert len(warnings) == 1
    assert warnings[0].detail["measured_fs"] == pytest.approx(factor * FS, rel=1e-6)
    direction = "low" if factor > 1 else "high"
    reads = abs(1 / factor - 1) * 100
    assert (f"irregular: stream 'sensor' delivers {factor * FS:.5g} samples per second of "
            f"its own timestamps, not its nominal 125 Hz; rates are computed at the nominal "
            f"rate, so they read {reads:.1f} % {direction}") in text
    rates = table.select("hr").columns["rate_per_min"]
    assert np.nanmedian(rates) * factor == pytest.approx(72.0, rel=0.01)


def test_runner_stays_quiet_when_the_rate_is_within_tolerance(tmp_path):
    """Timestamps 0.5 % off nominal (a drifting crystal): below RATE_TOLERANCE, no
    event."""
    assert 0.005 < RATE_TOLERANCE
    x, t = actual_rate_stream(150.0, FS, 1.005, 72.0,
                              lambda fs, r: pulse_wave(fs, r, seed=6)[0])
    stats, _, text = run_to_log(tmp_path, x, t)
    assert not [e for e in stats.events if e.kind == "irregular"]
    assert "irregular" not in text


def log_lines(text: str) -> list[str]:
    """The body of a log: rows and event lines after the column header, in order."""
    lines = text.splitlines()
    header = next(i for i, line in enumerate(lines) if line.startswith("emitted_s,"))
    return [line for line in lines[header + 1:] if line]


def test_file_replay_writes_a_gap_event_between_the_rows_around_the_hole(tmp_path,
                                                                         hole_record):
    """Replaying a file with a 10-minute hole: one ``gap`` event, after every row from
    before the hole and before every row after it; no row is dated inside it, and the
    heart rate after it is the new one from its first row on."""
    x, t, k = hole_record
    stats, table, text = run_to_log(tmp_path, x[:, 0], t)
    gaps = [e for e in stats.events if e.kind == "gap"]
    assert len(gaps) == 1 and gaps[0].detail["restart"]
    message = (f"gap: stream 'sensor' skipped 600.000 s of samples (timestamps jump from "
               f"{t[k - 1]:.3f} s to {t[k]:.3f} s); estimates restart from the samples after "
               f"the gap")
    lines = log_lines(text)
    (at,) = [i for i, line in enumerate(lines) if line.startswith("# event") and " gap: " in line]
    assert lines[at] == f"# event {t[k]:.4f} {message}"
    rows_before = [line for line in lines[:at] if not line.startswith("#")]
    rows_after = [line for line in lines[at + 1:] if not line.startswith("#")]
    assert all(float(r.split(",")[0]) <= t[k - 1] for r in rows_before)
    assert all(float(r.split(",")[0]) >= t[k] + HR.min_window_s - 1 / FS for r in rows_after)
    for key in ("time_s", "emitted_s"):
        assert not ((table.columns[key] > t[k - 1]) & (table.columns[key] < t[k])).any()
    hr = table.select("hr").columns
    after = hr["emitted_s"] > t[k]
    assert after.sum() > 150 and np.all(np.abs(hr["rate_per_min"][after] - AFTER[0]) <= 5.0)


def test_the_offline_log_holds_the_same_gap_event_where_its_twin_restarts(tmp_path,
                                                                          hole_record):
    """``offline`` of a CSV with a 10-minute hole: the twin restarts there like live,
    and its log says so with the replay's words, between the rows from before the hole
    and the rows after it (offline rows are dated by their window centre)."""
    from streamer import cli

    x, t, k = hole_record
    csv_path = tmp_path / "sensor.csv"
    np.savetxt(csv_path, np.column_stack([t, x[:, 0]]), delimiter=",", header="time_s,PPG",
               comments="", fmt="%.6f")
    log_path = tmp_path / "offline.csv"
    assert cli.main(["offline", str(csv_path), "--channel", "PPG=ppg", "--log",
                     str(log_path), "-q"]) == 0
    lines = log_lines(log_path.read_text())
    gap_lines = [i for i, line in enumerate(lines)
                 if line.startswith("# event") and " gap: " in line]
    assert len(gap_lines) == 1
    at = gap_lines[0]
    # A CSV recording is named by its path, in replay as here.
    assert lines[at] == (f"# event {t[k]:.4f} gap: stream '{csv_path}' skipped 600.000 s of "
                         f"samples (timestamps jump from {t[k - 1]:.3f} s to {t[k]:.3f} s); "
                         f"estimates restart from the samples after the gap")
    time_col = log_lines_header(log_path.read_text()).index("time_s")
    rows_before = [line for line in lines[:at] if not line.startswith("#")]
    rows_after = [line for line in lines[at + 1:] if not line.startswith("#")]
    assert rows_before and rows_after
    assert all(float(r.split(",")[time_col]) <= t[k - 1] for r in rows_before)
    assert all(float(r.split(",")[time_col]) >= t[k] for r in rows_after)


def log_lines_header(text: str) -> list[str]:
    """The column names of a log."""
    return next(line for line in text.splitlines() if line.startswith("emitted_s,")).split(",")


class AnnouncingSource:
    """A live-like source: its chunks go through the LSL source's timing check, which
    announces the hole itself."""

    def __init__(self, x, t):
        self.info = SourceInfo("sensor", FS, (ChannelInfo("PPG", "ppg"),), "test:sensor")
        self._x, self._t = x, t

    def chunks(self):
        check = TimingCheck(FS, stream="sensor")
        for x, t in chunked(self._x, self._t, CHUNK):
            yield from check.check(x, t)
        yield SourceEvent("end", "end of sensor", float(self._t[-1]))

    def close(self):
        pass


def test_a_hole_the_source_announced_is_logged_once_and_clears_the_display(tmp_path,
                                                                            hole_record):
    """The LSL source reports a hole itself: the log holds its one ``gap`` line, not a
    second one from the engine's restart; the display still hears of the restart and
    drops the values from before the hole (no stale rate on screen)."""
    from streamer.display.state import DisplayState

    x, t, k = hole_record
    path = tmp_path / "log.csv"
    log = EstimateLog(path, "live", "sensor", {"PPG": "ppg"}, {})
    display = DisplayState()
    seen = []

    def listener(update):
        display.apply(update)
        if update.event is not None and update.event.kind == "gap":
            seen.append((update.event.detail.get("restart", False), dict(display.latest)))

    Runner(AnnouncingSource(x[:, 0], t), [Selected(0, "PPG", "ppg")], PROFILE, log=log,
           listeners=[listener]).run()
    text = path.read_text()
    assert text.count(" gap: ") == 1
    assert f"gap: stream 'sensor' skipped {HOLE_S:.3f} s of samples\n" in text
    assert [restart for restart, _ in seen] == [False, True]
    assert seen[0][1] and not seen[1][1]  # values shown before the restart, none after


def test_command_line_replay_and_offline_of_a_file_with_a_hole(tmp_path, hole_record):
    """``replay`` and ``offline`` of a CSV whose time column has a 10-minute hole: exit
    code 0, the ``gap`` line in the replay log and on stderr, no row dated inside the
    hole in either log, and after it only the new heart rate."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    x, t, k = hole_record
    csv = tmp_path / "hole.csv"
    np.savetxt(csv, np.column_stack([t, x[:, 0]]), delimiter=",", header="time,PPG",
               comments="", fmt="%.6f")
    root = Path(__file__).resolve().parents[2]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        filter(None, [str(root), os.environ.get("PYTHONPATH")])))
    for command in ("replay", "offline"):
        args = [sys.executable, "-m", "streamer.cli", command, str(csv), "--log",
                f"{command}.csv"]
        if command == "replay":
            args += ["--speed", "max", "--display", "none"]
        done = subprocess.run(args, cwd=tmp_path, env=env, capture_output=True, text=True,
                              timeout=600)  # a guard against hangs only
        assert done.returncode == 0, done.stderr
        assert "Traceback" not in done.stderr
        if command == "replay":
            assert f"stream '{csv}' skipped 600.000 s of samples" in done.stderr
        table = read_log(tmp_path / f"{command}.csv")
        for key in ("time_s", "emitted_s"):
            assert not ((table.columns[key] > t[k - 1]) & (table.columns[key] < t[k])).any()
        hr = table.select("hr").columns
        after = hr["time_s"] > t[k]
        assert after.sum() > 150
        assert np.all(np.abs(hr["rate_per_min"][after] - AFTER[0]) <= 5.0), command
    gap = (f"gap: stream '{csv}' skipped 600.000 s of samples (timestamps jump from "
           f"{t[k - 1]:.3f} s to {t[k]:.3f} s); estimates restart from the samples after the "
           f"gap")
    assert f"# event {t[k]:.4f} {gap}" in (tmp_path / "replay.csv").read_text()
