"""The final refinement of the tracked heart rate (estimators/refine.py): its climb
against a slow twin, on spectra whose peak is known exactly, and in the monitor (live,
offline) on synthetic running signals with exact truth."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from estimators.config import RateSettings, get_profile
from estimators.errors import ParameterError
from estimators.monitor import FUSED, RateMonitor, offline_estimates
from estimators.refine import climb_to_peak, refine_rate
from tests.estimators.test_motion import ALL, FS, running_wrist
from tests.reference.refine_loop import climb_to_peak_loop

EXERCISE = get_profile("exercise-wrist")


def with_radius(radius_per_min: float):
    return dataclasses.replace(EXERCISE, hr=dataclasses.replace(
        EXERCISE.hr, refine_radius_per_min=radius_per_min))


def test_climb_matches_the_loop_twin(rng):
    rates = 40.0 + 0.75 * np.arange(60)
    for _ in range(30):
        n_hops = int(rng.integers(1, 12))
        # Smooth random spectra with several local maxima, plateaus and a non-finite bin.
        spectra = np.cumsum(rng.standard_normal((n_hops, 60)), axis=1)
        spectra = np.round(spectra - spectra.min(), 1)
        spectra[0, int(rng.integers(0, 60))] = np.nan
        start = rng.uniform(38.0, 86.0, n_hops)
        start[rng.random(n_hops) < 0.2] = np.nan
        radius = int(rng.integers(0, 7))
        np.testing.assert_allclose(climb_to_peak(spectra, rates, start, radius),
                                   climb_to_peak_loop(spectra, rates, start, radius),
                                   rtol=1e-12, atol=1e-12, equal_nan=True)


def hann_spectrum(rate_per_min: float, fs: float = 25.0, n: int = 200, n_fft: int = 2048):
    """|STFT| of a pure sine over one 8 s periodic-Hann window, zero-padded as the
    heart-rate path pads it (0.73 bpm bins)."""
    t = np.arange(n) / fs
    window = np.hanning(n + 1)[:-1]
    magnitude = np.abs(np.fft.rfft(np.sin(2 * np.pi * rate_per_min / 60.0 * t) * window,
                                   n_fft))
    return np.fft.rfftfreq(n_fft, 1.0 / fs) * 60.0, magnitude


@pytest.mark.parametrize("truth", [97.3, 131.3, 168.85])
def test_refinement_undoes_a_sloped_gain(truth):
    rates, magnitude = hann_spectrum(truth)
    # A gain rising across the pulse's main lobe (as the motion gain does where the
    # accelerometer's level falls off) moves the product's peak up.
    gain = np.clip((rates - truth + 30.0) / 60.0, 0.0, 1.0)
    gained = magnitude * gain
    top = int(np.argmax(gained))
    tracked = climb_to_peak(gained[None], rates, np.array([rates[top]]), 0)[0]
    assert tracked - truth > 1.0  # the gain moved the peak by more than a bpm
    refined = refine_rate(magnitude[None], rates, np.array([tracked]), 2.0)[0]
    # Parabolic interpolation of this main lobe errs by at most 5e-4 bpm (measured over
    # 41 sub-bin offsets while writing this test); 0.01 bpm leaves room for rounding.
    assert abs(refined - truth) < 0.01


def test_climb_stops_at_the_nearest_peak_and_within_the_radius():
    rates = np.arange(20.0)
    # A lower peak at bin 5 and a higher one (a motion line) at bin 12.
    spectrum = np.exp(-0.5 * ((rates - 5.0) / 1.5) ** 2) \
        + 2.0 * np.exp(-0.5 * ((rates - 12.0) / 1.5) ** 2)
    start = np.array([6.6, 7.0, 10.0])
    refined = climb_to_peak(spectrum[None].repeat(3, axis=0), rates, start, 10)
    assert abs(refined[0] - 5.0) < 0.1 and abs(refined[1] - 5.0) < 0.1  # never across
    assert abs(refined[2] - 12.0) < 0.1
    # With a radius of one bin the climb from 7.0 stops on the slope, at bin 6; the
    # parabola there points further down the slope's way up and is clipped to half a bin.
    assert climb_to_peak(spectrum[None], rates, np.array([7.0]), 1)[0] == pytest.approx(
        6.0 - 0.5, abs=1e-12)


def test_missing_rates_edges_and_no_spectra():
    rates = np.arange(10.0)
    spectrum = np.linspace(0.0, 1.0, 10)[None].repeat(3, axis=0)  # rises to the last bin
    start = np.array([np.nan, 7.0, 8.6])
    refined = climb_to_peak(spectrum, rates, start, 5)
    assert np.isnan(refined[0])
    np.testing.assert_array_equal(refined[1:], start[1:])  # ends on the edge: kept
    np.testing.assert_array_equal(refine_rate(None, rates, start[1:], 2.0), start[1:])
    # A radius under half a bin leaves the rate where the tracker read it.
    np.testing.assert_array_equal(refine_rate(spectrum[1:], rates, start[1:], 0.4), start[1:])


@pytest.mark.parametrize("args, message", [
    ((np.zeros((2, 5)), np.arange(5.0), np.zeros(2), -1),
     "radius_bins=-1 must be a whole number >= 0"),
    ((np.zeros((2, 5)), np.arange(5.0), np.zeros(2), 1.5),
     "radius_bins=1.5 must be a whole number >= 0"),
    ((np.zeros((2, 5)), np.arange(5.0), np.zeros(3), 1),
     r"rate_per_min.shape=\(3,\) must be \(2,\)"),
])
def test_climb_errors(args, message):
    with pytest.raises(ParameterError, match=f"^{message}$"):
        climb_to_peak(*args)


def test_settings_error():
    with pytest.raises(ParameterError,
                       match=r"^refine_radius_per_min=-1.0 must be >= 0$"):
        RateSettings(refine_radius_per_min=-1.0)


def window_mean(rate_fn, ends_s: np.ndarray, window_s: float = 8.0) -> np.ndarray:
    """The true mean rate over each window ending at ``ends_s`` (what a column sees)."""
    return np.array([rate_fn(np.linspace(e - window_s, e, 401)).mean() for e in ends_s])


def fused(estimates):
    mine = [e for e in estimates if e.quantity == "hr" and e.source == FUSED]
    return (np.array([e.emitted_s for e in mine]), np.array([e.time_s for e in mine]),
            np.array([e.rate_per_min for e in mine]))


def ramp_with_noisy_accelerometer(rng):
    """A pulse rising 0.8 bpm/s under a steady cadence; the accelerometer also carries
    broadband noise, so the motion gain is not flat across the pulse's peak."""
    rate_fn = lambda t: 80.0 + 0.8 * t  # noqa: E731
    t, x = running_wrist(rng, rate_fn, lambda t: 165.0 + 0.0 * t, duration_s=100.0,
                         motion_gain=1.0)
    x[:, 2:] += rng.standard_normal((len(t), 3))
    return rate_fn, t, x


@pytest.mark.parametrize("lag_hops", [0, 4])
def test_refinement_brings_the_live_rate_closer_to_the_truth(rng, lag_hops):
    rate_fn, t, x = ramp_with_noisy_accelerometer(rng)
    errors = {}
    for radius in (0.0, 2.0):
        profile = with_radius(radius)
        profile = dataclasses.replace(profile, hr=dataclasses.replace(profile.hr,
                                                                      lag_hops=lag_hops))
        monitor = RateMonitor(ALL, FS, profile)
        _, time_s, rate = fused(monitor.update(x, t))
        # The window of each estimate ends half a window and the filters' delay after
        # its time_s (with fixed-lag smoothing it is an earlier hop than the newest).
        ends = time_s + 4.0 + np.array([monitor.filter_delay_s("hr", FUSED, r) for r in rate])
        counted = ends > 25.0  # the canceller's warm-up (tests/estimators/test_motion.py)
        errors[radius] = np.abs(rate - window_mean(rate_fn, ends))[counted]
    # Measured when written: 0.49 bpm without the refinement, 0.17 with it (lag 4 hops:
    # 0.49 and 0.13; offline: 0.51 and 0.17).
    assert errors[2.0].mean() < 0.8 * errors[0.0].mean()
    assert errors[2.0].mean() < 0.2


def test_live_rate_is_the_climb_on_the_fused_residual_spectrum(rng):
    """The wiring: the refined estimate is exactly the unrefined one moved by the climb
    on the fused block's refinement spectra (the refinement feeds nothing back)."""
    rate_fn, t, x = ramp_with_noisy_accelerometer(rng)
    plain = RateMonitor(ALL, FS, with_radius(0.0))
    _, _, before = fused(plain.update(x, t))
    refined_monitor = RateMonitor(ALL, FS, with_radius(2.0))
    _, _, after = fused(refined_monitor.update(x, t))
    block = refined_monitor.last_blocks[("hr", FUSED)]
    assert block.refine is not None and block.refine.shape == block.spectra.shape
    grid = refined_monitor.grid("hr")
    lo, hi = EXERCISE.hr.band_per_min
    expected = np.clip(climb_to_peak(block.refine, grid, before, 3), lo, hi)
    assert np.array_equal(np.isnan(after), np.isnan(before))
    np.testing.assert_allclose(after, expected, rtol=0, atol=1e-9, equal_nan=True)
    assert np.mean(np.abs(after - before) > 0.05) > 0.2  # and it does move the rate


def test_offline_twin_is_refined_too(rng):
    rate_fn, t, x = ramp_with_noisy_accelerometer(rng)
    errors = {}
    for radius in (0.0, 2.0):
        _, time_s, rate = fused(offline_estimates(x, t, ALL, FS, with_radius(radius)))
        counted = time_s > 25.0
        # Offline estimates describe their window's centre.
        errors[radius] = np.abs(rate - window_mean(rate_fn, time_s + 4.0))[counted]
    assert errors[2.0].mean() < 0.8 * errors[0.0].mean()
