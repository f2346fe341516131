"""Damaged timing: dropped chunks, duplicated and out-of-order timestamps, a sender
clock that jumps, and a device whose actual rate is 5 % off its nominal rate.

What ridgewatch does (decided here, documented in ``docs_what_happens_when.md``):

* the engine places its hops by sample count at the nominal rate; timestamps only
  label the estimates, and a label never goes backwards (``RateMonitor.update`` labels
  a late timestamp with the newest one seen), so ``emitted_s`` in the log never
  decreases and ``time_s <= emitted_s`` whatever a source delivers;
* the LSL source drops samples whose timestamps do not increase and reports gaps
  (:class:`streamer.sources.lsl_source.TimingCheck`), so on the live path duplicates
  cost nothing and a hole is announced in the log;
* a device whose timestamps show a rate off nominal gives rates off by the same
  fraction; the runner says so once, in the log (:class:`streamer.runner.RateCheck`).
"""

from __future__ import annotations

import numpy as np
import pytest

from estimators.config import get_profile
from estimators.monitor import RateMonitor
from streamer.channels import Selected
from streamer.runner import RATE_TOLERANCE, Runner
from streamer.sinks.estimate_log import EstimateLog, read_log
from streamer.sources.base import ChannelInfo, Chunk, Recording, SourceEvent, SourceInfo
from streamer.sources.lsl_source import TimingCheck
from streamer.sources.replay import RecordingSource
from tests.robustness.faults import (Fault, actual_rate_stream, assert_log_invariants,
                                     chunked, columns, feed, inject, pulse_signal, pulse_wave,
                                     within_ec13)

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


def faulty(clean, *faults):
    return inject(chunked(*clean, CHUNK), list(faults))


def assert_recovers(c, clean_time_after_s: float) -> None:
    """Every estimate whose window is clear of the fault is within tolerance."""
    after = c["emitted_s"] >= clean_time_after_s + RECOVERED_S
    assert after.sum() >= 50
    truth = truth_per_min(c["time_s"][after])
    assert within_ec13(c["rate"][after], truth).all()


# -- straight into the engine ---------------------------------------------------------


@pytest.mark.parametrize("kind", ["drop", "duplicate", "reorder"])
def test_engine_keeps_estimating_through_chunk_faults(clean, kind):
    """Dropped, resent or swapped chunks straight into the engine: no exception, labels
    never go backwards, and every estimate is back within tolerance one window after
    the fault. Dropped or swapped chunks splice the same rhythm, so whatever is shown
    meanwhile is right too; resent chunks repeat samples, which the engine cannot tell
    from signal (the live source removes them first, see below)."""
    c = columns(run_engine(faulty(clean, Fault(kind, FAULT_START_S, FAULT_S))))
    shown = ~np.isnan(c["rate"])
    assert shown.mean() > 0.8
    if kind != "duplicate":
        assert within_ec13(c["rate"][shown], truth_per_min(c["time_s"][shown])).all()
    assert_recovers(c, FAULT_END_S)


def test_engine_hops_follow_sample_counts_not_timestamps(clean, clean_estimates):
    """Dropping 3 s of chunks removes 3 s worth of hops: the schedule counts samples."""
    c = columns(run_engine(faulty(clean, Fault("drop", FAULT_START_S, FAULT_S))))
    dropped = sum(len(t) for _, t in chunked(*clean, CHUNK)) - sum(
        len(t) for _, t in faulty(clean, Fault("drop", FAULT_START_S, FAULT_S)))
    hops_lost = len(columns(clean_estimates)["rate"]) - len(c["rate"])
    assert abs(hops_lost - dropped / FS / HR.hop_s) <= 1


@pytest.mark.parametrize("jump_s", [120.0, -30.0])
def test_clock_jump_changes_only_the_labels(clean, clean_estimates, jump_s):
    """A sender clock stepped forwards or backwards: the rates, confidences and quality
    are exactly those of the clean stream (the engine counts samples); labels jump
    forwards with the clock, or hold at the newest time seen until the clock passes it
    again."""
    jumped = run_engine(faulty(clean, Fault("clock_jump", FAULT_START_S, value=jump_s)))
    assert len(jumped) == len(clean_estimates)
    for key in ("rate", "confidence", "quality"):
        np.testing.assert_array_equal(columns(jumped)[key], columns(clean_estimates)[key])
    got, want = columns(jumped)["emitted_s"], columns(clean_estimates)["emitted_s"]
    late = want >= FAULT_START_S
    np.testing.assert_allclose(got[~late], want[~late])
    np.testing.assert_allclose(got[late], np.maximum(want[late] + jump_s,
                                                     want[~late].max()), atol=1e-9)


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
