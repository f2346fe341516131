"""Every stage of heart rate from PPG/ECG, breathing from a belt and the exercise path's
motion stage, and their compositions, pass the conformance checks of
:mod:`tests.stage_checks` (batch parity, 1-sample and random chunks, purity, pickled
state round trip), with the JIT on and off.

A case is a module-level function returning ``(stage, x)``. Inputs are a few tens of
seconds of synthetic signal with the faults the stages must carry through chunking
(non-finite samples, a spike, a flat run), several channels where the stage batches
channels. Inputs of later stages are made by the batch twins of the earlier ones, so
each stage is checked on what it is fed in a run."""

from __future__ import annotations

import dataclasses
from functools import lru_cache

import numpy as np
import pytest

from estimators import motion as motion_mod
from estimators import rate_now as now_mod
from estimators.config import get_profile
from estimators.monitor import (ChannelGroup, ExerciseHops, GroupReport, GroupTracking,
                                RateMonitor, Report, tracker_stage)
from estimators.tracker import LagTrack, TrackInput
from estimators.stage import Chain, Parallel
from tests import signals
from tests.stage_checks import assert_same, check_all, check_without_jit

FS = 125.0
SECONDS = 24.0
"""Long enough for the 8 s heart-rate window to fill and slide for 16 s (64 hops)."""
EXERCISE_SECONDS = 40.0
"""Room for the references to be lost, come back after a window, and be trusted again
a window later."""
BREATHING_SECONDS = 48.0
"""The breathing window is 32 s: 16 s of hops after it fills."""

WRIST = get_profile("wrist")
HR, RR = WRIST.hr, WRIST.rr
EXERCISE = get_profile("exercise-wrist").hr


def _dirty(x: np.ndarray, seed: int) -> np.ndarray:
    """``x`` with a short NaN burst, a lone spike and a flat run, placed by ``seed``."""
    x = x.copy()
    rng = np.random.default_rng(seed)
    n = len(x)
    a = int(rng.integers(n // 4, n // 2))
    x[a:a + 12] = np.nan
    x[a + 300] = 1e6 * np.nanmax(np.abs(x))
    x[a + 700:a + 760] = x[a + 700]
    return x


@lru_cache(maxsize=None)
def _signals(kind: str, n_channels: int, seconds: float) -> tuple[np.ndarray, np.ndarray]:
    """``(samples (n, C), t (n,))``: pulses (PPG or ECG shape) around 70 + 9 c bpm, or
    breathing around 14 + 2 c per minute, with noise and faults."""
    t = np.arange(int(seconds * FS)) / FS
    rng = np.random.default_rng(7)
    columns = []
    for c in range(n_channels):
        if kind == "resp":
            rate = 14.0 + 2.0 * c + 2.0 * np.sin(2 * np.pi * t / 40.0)
            shape = signals.dicrotic_pulse
        else:
            rate = 70.0 + 9.0 * c + 8.0 * np.sin(2 * np.pi * t / 30.0 + c)
            shape = signals.ecg_like if kind == "ecg" else signals.dicrotic_pulse
        clean = signals.rhythm(t, rate, shape, noise_std=0.2, rng=rng)
        columns.append(_dirty(clean, c) if kind != "acc" else clean)
    return np.column_stack(columns), t


def _group(kind: str, n_channels: int, settings=HR, keep_columns: bool = False,
           chain_kind: str | None = None) -> ChannelGroup:
    return ChannelGroup([f"{kind}{c}" for c in range(n_channels)], kind, settings, FS,
                        chain_kind, keep_columns)


def _seconds(settings) -> float:
    return BREATHING_SECONDS if settings.quantity == "rr" else SECONDS


def _analysis(kind: str, n_channels: int, settings=HR):
    group = _group(kind, n_channels, settings)
    return group.front.batch(_signals(kind, n_channels, _seconds(settings)))


def _columns(kind: str, n_channels: int, settings=HR):
    group = _group(kind, n_channels, settings)
    return group.spectrum.batch(_analysis(kind, n_channels, settings))


def _blocks(kind: str, n_channels: int, settings=HR):
    group = _group(kind, n_channels, settings)
    return group.transform.batch(_columns(kind, n_channels, settings))


# ------------------------------------------------------------------ front end


def front_end_ppg():
    return _group("ppg", 2).front, _signals("ppg", 2, SECONDS)


def front_end_ecg():
    return _group("ecg", 1).front, _signals("ecg", 1, SECONDS)


def front_end_resp():
    return _group("resp", 1, RR).front, _signals("resp", 1, BREATHING_SECONDS)


# ------------------------------------------------------------------ sliding STFT


def spectrum_ppg():
    return _group("ppg", 2).spectrum, _analysis("ppg", 2)


def spectrum_sharpened():
    settings = dataclasses.replace(HR, sharpen=True)
    return _group("ppg", 2, settings).spectrum, _analysis("ppg", 2, settings)


def spectrum_resp():
    return _group("resp", 1, RR).spectrum, _analysis("resp", 1, RR)


# ------------------------------------------------------------------ transforms


def transform_deshape():
    return _group("ppg", 2).transform, _columns("ppg", 2)


def transform_plain():
    settings = dataclasses.replace(HR, deshape=False)
    return _group("ppg", 2, settings).transform, _columns("ppg", 2, settings)


def transform_sharpened():
    settings = dataclasses.replace(HR, sharpen=True)
    return _group("ppg", 2, settings).transform, _columns("ppg", 2, settings)


def transform_keeps_columns():
    group = _group("ppg", 1, keep_columns=True)
    return group.transform, _columns("ppg", 1)


def motion_stage():
    """The motion stage of one PPG channel with three accelerometer references, and an
    expected pulse that moves over the band (as the tracker's posterior does)."""
    names = ["ppg0", "acc0", "acc1", "acc2"]
    samples, t = _signals("ppg", 1, SECONDS)
    acc, _ = _signals("acc", 3, SECONDS)
    group = ChannelGroup(names[:1], "ppg", EXERCISE, FS, keep_columns=True)
    refs = ChannelGroup(names[1:], "acc", EXERCISE, FS, "acc", keep_columns=True)
    ppg = group.transform.batch(group.spectrum.batch(group.front.batch((samples, t))))
    mixed = acc + 0.3 * samples  # references that share part of the pulse channel
    ref = refs.transform.batch(refs.spectrum.batch(refs.front.batch((mixed, t))))
    params = motion_mod.motion_params(EXERCISE, group.grid.band, group.geometry.n_fft,
                                      EXERCISE.hop_s)
    n_hops, n_band = len(ppg), len(group.grid.freqs_hz)
    centre = (np.arange(n_hops) * 0.3) % n_band
    expected = np.exp(-0.5 * ((np.arange(n_band)[None, :] - centre[:, None]) / 3.0) ** 2)
    x = (ppg.columns[0], np.moveaxis(ref.columns, 0, -1), expected)
    return motion_mod.MotionStage(params, 3), x


def _exercise(n_ppg: int, lag_hops: int = 0):
    """The exercise path's tracking stage of a monitor with ``n_ppg`` PPG channels and a
    three-axis accelerometer, and its input: the accelerometer (which carries part of
    the first PPG channel) is lost for 2 s, so the references go missing and come back
    (trackers restart, the motion stage trusts no track for a window)."""
    profile = get_profile("exercise-wrist")
    if lag_hops:
        profile = dataclasses.replace(profile, hr=dataclasses.replace(profile.hr,
                                                                      lag_hops=lag_hops))
    ppg, t = _signals("ppg", n_ppg, EXERCISE_SECONDS)
    acc, _ = _signals("acc", 3, EXERCISE_SECONDS)
    acc = acc + 0.3 * ppg[:, :1]
    acc[int(9 * FS):int(11 * FS)] = np.nan
    channels = ([(f"ppg{c}", "ppg") for c in range(n_ppg)]
                + [(f"acc{a}", "acc") for a in range(3)])
    monitor = RateMonitor(channels, FS, profile)

    def blocks(gid, samples):
        group = monitor.groups[gid]
        grouped = group.transform.batch(group.spectrum.batch(group.front.batch((samples, t))))
        return {name: grouped.channel(c) for c, name in enumerate(group.names)}

    hr = {("hr", name): b for name, b in blocks(("hr", "ppg"), ppg).items()}
    return monitor.motion_tracking, ExerciseHops(hr, blocks(("acc", "acc"), acc))


def exercise_tracking_one_ppg():
    return _exercise(1)


def exercise_tracking_fused():
    return _exercise(2)


def exercise_tracking_lagged():
    return _exercise(1, lag_hops=2)


# ------------------------------------------------------------------ tracker, reports


def tracker_ppg():
    blocks = _blocks("ppg", 3)
    stage = tracker_stage(HR, _group("ppg", 3).grid.rates_per_min, 3)
    return stage, TrackInput(blocks.spectra, blocks.integrity, blocks.magnitude)


def tracker_lagged():
    blocks = _blocks("ppg", 1)
    base = tracker_stage(HR, _group("ppg", 1).grid.rates_per_min, 1)
    params = dataclasses.replace(base.params, lag_hops=3)
    stage = LagTrack(base.rates, params, base.power, True, base.chance_factor, base.span)
    return stage, TrackInput(blocks.spectra[0], blocks.integrity[0], blocks.magnitude[0])


def group_tracking_ppg():
    grid = _group("ppg", 3).grid.rates_per_min
    return GroupTracking(tracker_stage(HR, grid, 3)), _blocks("ppg", 3)


def _report(kind: str, settings, source: str = "x", calibrate: bool = True):
    group = _group(kind, 1, settings)
    grid = group.grid.rates_per_min
    delay = group.group_delay_s(grid / 60.0)
    return Report(settings.quantity, source, grid, settings, calibrate, delay), group


def report_heart_rate():
    stage, group = _report("ppg", HR)
    tracking = GroupTracking(tracker_stage(HR, group.grid.rates_per_min, 1))
    return stage, tracking.batch(_blocks("ppg", 1))[0]


def report_fused():
    """A fused output's report reads the channels' rates (their spread is evidence)."""
    stage, group = _report("ppg", HR, "fused")
    tracking = GroupTracking(tracker_stage(HR, group.grid.rates_per_min, 2))
    tracked = tracking.batch(_blocks("ppg", 2))
    rates = np.array([t.rate for t, _ in tracked])
    return stage, (tracked[0][0], rates)


def report_ecg():
    stage, group = _report("ecg", HR, calibrate=False)
    tracking = GroupTracking(tracker_stage(HR, group.grid.rates_per_min, 1))
    return stage, tracking.batch(_blocks("ecg", 1))[0]


def report_breathing():
    stage, group = _report("resp", RR)
    tracking = GroupTracking(tracker_stage(RR, group.grid.rates_per_min, 1))
    return stage, tracking.batch(_blocks("resp", 1, RR))[0]


def group_report_ppg():
    """The reports of three channels, calibrated in one call."""
    group = _group("ppg", 3)
    grid = group.grid.rates_per_min
    delay = group.group_delay_s(grid / 60.0)
    reports = tuple(Report("hr", name, grid, HR, True, delay) for name in group.names)
    tracking = GroupTracking(tracker_stage(HR, grid, 3))
    return GroupReport(reports), tracking.batch(_blocks("ppg", 3))


def rate_now_heart_rate():
    stage, x = report_heart_rate()
    return now_mod.RateNow(now_mod.HEART), stage.batch(x)


# ------------------------------------------------------------------ compositions


def _path(kind: str, n_channels: int, settings, calibrate: bool) -> Chain:
    """A whole path of ``n_channels`` channels: front end, STFT, transform, one tracker
    call, the channels' reports (one calibration call) and the rate now per channel."""
    group = _group(kind, n_channels, settings)
    grid = group.grid.rates_per_min
    delay = group.group_delay_s(grid / 60.0)
    reports = tuple(Report(settings.quantity, name, grid, settings, calibrate, delay)
                    for name in group.names)
    now = now_mod.RateNow(now_mod.params_for(settings.quantity))
    return Chain((group.front, group.spectrum, group.transform,
                  GroupTracking(tracker_stage(settings, grid, n_channels)),
                  GroupReport(reports), Parallel((now,) * n_channels)))


def channel_group_chain():
    return _group("ppg", 3).chain, _signals("ppg", 3, SECONDS)


def heart_rate_path_ppg():
    return _path("ppg", 2, HR, True), _signals("ppg", 2, SECONDS)


def heart_rate_path_ecg():
    return _path("ecg", 1, HR, False), _signals("ecg", 1, SECONDS)


def breathing_path_belt():
    return _path("resp", 2, RR, True), _signals("resp", 2, BREATHING_SECONDS)


CASES = [front_end_ppg, front_end_ecg, front_end_resp, spectrum_ppg, spectrum_sharpened,
         spectrum_resp, transform_deshape, transform_plain, transform_sharpened,
         transform_keeps_columns, motion_stage, exercise_tracking_one_ppg,
         exercise_tracking_fused, exercise_tracking_lagged, tracker_ppg, tracker_lagged,
         group_tracking_ppg,
         report_heart_rate, report_fused, report_ecg, report_breathing, group_report_ppg,
         rate_now_heart_rate, channel_group_chain, heart_rate_path_ppg,
         heart_rate_path_ecg, breathing_path_belt]


@pytest.mark.parametrize("case", CASES, ids=lambda case: case.__name__)
def test_conformance(case, rng):
    check_all(case, rng, one_sample_limit=300)


@pytest.mark.parametrize("case", [front_end_ppg, tracker_ppg, heart_rate_path_ppg,
                                  motion_stage, exercise_tracking_fused],
                         ids=lambda case: case.__name__)
def test_conformance_without_jit(case):
    check_without_jit(__name__, case.__name__)


def test_the_exercise_case_loses_and_regains_its_references():
    stage, x = exercise_tracking_one_ppg()
    state, _ = stage.step(stage.initial_state(), x)
    reference = np.min([b.integrity for b in x.references.values()], axis=0)
    assert reference.min() < 0.5 and reference[-1] > 0.9  # lost, then back
    tracked, blocks = stage.batch(x)
    marks = blocks[("hr", "ppg0")].reference_integrity
    assert np.any(marks == 0.0) and marks[-1] > 0.9  # the blind stretch, then trusted


def test_lagged_exercise_outputs_keep_their_motion_lines():
    """With fixed-lag smoothing each output refers to an earlier hop, and carries that
    hop's motion-line marks (the reports lower the confidence of a rate on a line)."""
    stage, x = exercise_tracking_lagged()
    tracked, blocks = stage.batch(x)
    lagged, hops = tracked[("hr", "ppg0")], blocks[("hr", "ppg0")]
    # Two hops wait for their smoothing at the start, and again after the trackers
    # restart when the references come back.
    assert len(lagged) == len(x) - 4
    at = np.searchsorted(hops.time_s, lagged.block.time_s)
    np.testing.assert_array_equal(hops.time_s[at], lagged.block.time_s)
    assert np.all(np.diff(at) >= 1) and at[-1] == len(x) - 3
    np.testing.assert_array_equal(lagged.block.motion_lines, hops.motion_lines[at])
    assert lagged.block.motion_lines.max() > 0.0  # the accelerometer marks some lines


def test_rate_now_changes_only_the_rate_now_fields():
    """The rate-now stage builds new records field by field: every other field is the
    input's (a field added to the record and forgotten there would fail here)."""
    stage, x = rate_now_heart_rate()
    for before, after in zip(x, stage.batch(x)):
        assert_same(after, dataclasses.replace(before, rate_now_per_min=after.rate_now_per_min,
                                               now_confidence=after.now_confidence))
        assert np.isnan(before.rate_now_per_min)


def test_cases_are_not_empty():
    # A case whose input gives no hop would pass every check vacuously.
    for case in (heart_rate_path_ppg, heart_rate_path_ecg, breathing_path_belt):
        stage, x = case()
        per_channel = stage.batch(x)
        assert all(len(estimates) >= 40 for estimates in per_channel), case.__name__
        assert all(sum(e.has_rate for e in estimates) >= 20 for estimates in per_channel)


def test_the_path_chain_is_what_the_monitor_reports():
    """The composed heart-rate path over two PPG channels gives the monitor's
    per-channel estimates (the monitor runs the same stages, plus the fused output)."""
    samples, t = _signals("ppg", 2, SECONDS)
    path = _path("ppg", 2, HR, True)
    chained = path.batch((samples, t))
    profile = dataclasses.replace(WRIST, breathing_from_pulse=False)
    monitor = RateMonitor([("ppg0", "ppg"), ("ppg1", "ppg")], FS, profile)
    estimates = monitor.update(samples, t)
    for c, name in enumerate(("ppg0", "ppg1")):
        mine = [e for e in estimates if e.source == name]
        assert len(mine) >= 40
        assert_same(mine, list(chained[c]), name)
