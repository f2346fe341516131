"""Tests of estimators.breathing_confidence (the calibrated breathing confidence), the
modulation tilt and the interval tolerance of breathing from a pulse."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

from estimators import breathing_confidence as B
from estimators import respiration as R
from estimators.config import BREATHING_FROM_PULSE, RateSettings
from estimators.errors import ParameterError
from estimators.monitor import RateMonitor
from tests.estimators.test_respiration import FS, rates, synthetic_pulse


def synthetic_rows(rng, n=4000):
    """Rows whose true probability of being right is a known function of the raw
    confidence and quality: ``p = 0.1 + 0.8 * raw * quality`` (our own construction)."""
    raw = rng.uniform(0.05, 0.95, n)
    quality = rng.uniform(0.0, 1.0, n)
    p = 0.1 + 0.8 * raw * quality
    return raw, quality, rng.uniform(size=n) < p, p


def test_fit_recovers_a_known_probability(rng):
    raw, quality, within, _ = synthetic_rows(rng)
    model = B.fit_kind(raw, quality, within)
    test_raw, test_quality, _, truth = synthetic_rows(np.random.default_rng(1), 2000)
    prob = model(test_raw, test_quality)
    # 4000 rows: the isotonic steps follow the truth to a few points (binomial noise of
    # about 0.5 / sqrt(4000 / 20 steps) = 0.035 per step).
    assert np.mean(np.abs(prob - truth)) <= 0.06
    assert np.corrcoef(prob, truth)[0, 1] >= 0.9
    assert np.all((prob >= B.PROB_FLOOR) & (prob <= B.PROB_CEIL))


def test_isotonic_steps_hold_enough_rows_and_stay_off_the_extremes(rng):
    # True probability 0.1 + 0.8 * score: a plain pool-adjacent-violators fit reads 0 and
    # 1 at the ends of the score's range from a few rows; every pooled step holds at
    # least MIN_STEP_ROWS rows, so its value stays near the truth there.
    from estimators.calibration import fit_isotonic
    score = rng.uniform(0.0, 1.0, 3000)
    within = rng.uniform(size=3000) < 0.1 + 0.8 * score
    plain = fit_isotonic(score, within)[1]
    assert plain[0] == 0.0 and plain[-1] == 1.0
    knots_score, knots_prob = B.fit_pooled_isotonic(score, within)
    assert np.all(np.diff(knots_prob) >= 0) and np.all(np.diff(knots_score) > 0)
    # Every step holds at least MIN_STEP_ROWS rows, so there are at most 30 steps.
    assert 1 < len(knots_prob) <= 3000 // B.MIN_STEP_ROWS
    # A step of >= 100 rows at either end: within 3 binomial standard errors
    # (sqrt(0.1 * 0.9 / 100) = 0.03) of the truth there, whose mean over the lowest or
    # highest 100 rows is within 0.03 of 0.1 or 0.9 (a larger end step: a little more).
    assert 0.1 - 0.09 <= knots_prob[0] <= 0.1 + 0.03 + 0.09
    assert 0.9 - 0.03 - 0.09 <= knots_prob[-1] <= 0.9 + 0.09


def test_map_round_trips_through_json(rng):
    raw, quality, within, _ = synthetic_rows(rng, 500)
    fitted = B.BreathingMap({"ppg": B.fit_kind(raw, quality, within)}, {"note": "test"})
    again = B.BreathingMap.from_dict(json.loads(json.dumps(fitted.to_dict())))
    np.testing.assert_array_equal(again("ppg", raw, quality), fitted("ppg", raw, quality))
    assert np.isnan(again("ecg", raw[:2], quality[:2])).all()


def test_a_map_of_another_format_is_refused():
    with pytest.raises(ParameterError, match="breathing confidence map: format 'x' is not "
                       "'ridgewatch breathing confidence map 1'"):
        B.BreathingMap.from_dict({"format": "x"})


def test_the_shipped_map_loads_and_covers_every_kind():
    assert B.MAP_PROBLEM == ""
    assert B.MAP is not None and set(B.MAP.models) == set(B.KINDS)


def test_without_a_map_the_raw_confidence_is_kept():
    empty = B.BreathingMap({}, {})
    raw = np.array([0.3, 0.9])
    np.testing.assert_array_equal(B.calibrated("ppg", raw, [0.5, 0.5], empty), raw)


def test_breathing_estimates_carry_the_calibrated_confidence():
    t, x, _ = synthetic_pulse("ppg", 72, 15, "intensity", duration_s=60.0)
    chain = R.PulseBreathing("p", "ppg", BREATHING_FROM_PULSE, FS)
    estimates = chain.update(x, t)
    shown, conf, quality = chain.last_modulations
    raw_rate, raw_conf, support = R.fuse_modulations(
        shown, conf, quality, BREATHING_FROM_PULSE.agreement_per_min,
        BREATHING_FROM_PULSE.min_agreeing, BREATHING_FROM_PULSE.min_support)
    got = np.array([e.confidence for e in estimates])
    np.testing.assert_allclose(got, B.calibrated("ppg", raw_conf, support))
    with_rate = np.isfinite(raw_rate)
    assert with_rate.any() and not np.allclose(got[with_rate], raw_conf[with_rate])


def test_respiration_channel_estimates_carry_the_calibrated_confidence():
    t = np.arange(int(60 * FS)) / FS
    resp = np.sin(2 * np.pi * 0.25 * t)
    plain = B.MAP
    try:
        B.MAP = None
        raw = RateMonitor([("belt", "resp")], FS, "resp-belt").update(resp[:, None], t)
    finally:
        B.MAP = plain
    got = RateMonitor([("belt", "resp")], FS, "resp-belt").update(resp[:, None], t)
    raw = [e for e in raw if e.quantity == "rr"]
    got = [e for e in got if e.quantity == "rr"]
    assert len(got) == len(raw) > 0 and all(e.has_rate for e in got)
    expected = B.calibrated("resp", [e.confidence for e in raw], [e.quality for e in raw])
    np.testing.assert_allclose([e.confidence for e in got], expected)
    assert [e.rate_per_min for e in got] == [e.rate_per_min for e in raw]


def test_tilt_leaves_the_reference_rate_and_scales_by_a_power():
    rates_per_min = np.array([5.0, 15.0, 45.0])
    out = R.tilt_spectra(np.ones((2, 3, 3)), rates_per_min, 0.5)
    np.testing.assert_allclose(out[1, 2], [np.sqrt(1 / 3), 1.0, np.sqrt(3)])
    assert R.tilt_spectra(np.ones(3), rates_per_min, 0.0) is not None


@pytest.mark.parametrize("tilt", [0.25, 0.5])
def test_tilt_keeps_the_synthetic_rates(tilt):
    settings = dataclasses.replace(BREATHING_FROM_PULSE, modulation_tilt=tilt)
    for heart, breath in ((60, 6), (100, 30)):
        t, x, _ = synthetic_pulse("ppg", heart, breath, "intensity")
        fused = rates(R.PulseBreathing("p", "ppg", settings, FS).update(x, t))
        settled = fused[len(fused) // 4:]
        assert np.mean(np.abs(settled - breath) <= 1.0) >= 0.9


def test_tilt_prefers_breathing_over_a_slow_drift_of_equal_size():
    # Intensity carries breathing at 18 per minute and a slow wave at 6 per minute of
    # 1.3 times its size (vasomotor-like; our own construction): plain spectra follow
    # the slow wave, a tilt of 0.5 lifts the breathing by sqrt(3) against it.
    t, x, _ = synthetic_pulse("ppg", 80, 18, "intensity")
    x = x + 1.3 * 0.2 * np.sin(2 * np.pi * 0.1 * t)  # the breathing sine is 0.2 deep
    own = {}
    for tilt in (0.0, 0.5):
        chain = R.PulseBreathing("p", "ppg", dataclasses.replace(BREATHING_FROM_PULSE,
                                                                 modulation_tilt=tilt), FS)
        chain.update(x, t)
        intensity = chain.last_modulations[0][:, 0]
        own[tilt] = np.nanmedian(intensity[len(intensity) // 4:])
    assert abs(own[0.0] - 6.0) <= 1.0
    assert abs(own[0.5] - 18.0) <= 1.0


def test_track_hops_equals_the_live_chain():
    t, x, _ = synthetic_pulse("ecg", 70, 14, "amplitude", duration_s=50.0)
    chain = R.PulseBreathing("e", "ecg", BREATHING_FROM_PULSE, FS)
    live = chain.update(x, t)
    rate, conf, quality = chain.track_hops(chain.hops_batch(x, t, zero_phase=False))
    np.testing.assert_allclose(quality, chain.last_modulations[2], rtol=1e-9, atol=1e-12)
    shown = np.where((quality >= BREATHING_FROM_PULSE.min_quality) & np.isfinite(rate), rate,
                     np.nan)
    np.testing.assert_allclose(shown, chain.last_modulations[0], rtol=1e-9, atol=1e-12)
    assert len(live) == len(rate)


def test_interval_tolerance_reaches_the_beat_detector():
    settings = dataclasses.replace(BREATHING_FROM_PULSE, beat_interval_tolerance=0.5)
    assert R.PulseBreathing("p", "ppg", settings, FS).beat_params.interval_tolerance == 0.5


@pytest.mark.parametrize("changes, message", [
    ({"modulation_tilt": -0.5}, "modulation_tilt=-0.5 must be in [0, 2]"),
    ({"beat_interval_tolerance": 1.0}, "beat_interval_tolerance=1.0 must be in (0, 1)"),
])
def test_bad_breathing_settings_are_refused(changes, message):
    with pytest.raises(ParameterError, match=message.replace("[", r"\[").replace("(", r"\(")
                       .replace(")", r"\)").replace("]", r"\]")):
        RateSettings(quantity="rr", band_per_min=(4.0, 60.0), window_s=32.0,
                     analysis_fs=5.0, **changes)


def test_harmonic_support_keeps_a_fundamental_against_its_stronger_harmonic():
    # A breathing modulation at 15 per minute whose second harmonic is 1.4 times as
    # strong (a peaked, non-sinusoidal breath; our own construction): plain and tilted
    # spectra follow 30 per minute, the capped harmonic support the breathing rate.
    t, x, _ = synthetic_pulse("ppg", 90, 15, None)
    x = x + 0.1 * np.sin(2 * np.pi * 0.25 * t) + 0.14 * np.sin(2 * np.pi * 0.5 * t)
    own = {}
    for weight in (0.0, 1.0):
        settings = dataclasses.replace(BREATHING_FROM_PULSE, harmonic_weight=weight)
        chain = R.PulseBreathing("p", "ppg", settings, FS)
        chain.update(x, t)
        intensity = chain.last_modulations[0][:, 0]
        own[weight] = np.nanmedian(intensity[len(intensity) // 4:])
    assert abs(own[0.0] - 30.0) <= 1.0
    assert abs(own[1.0] - 15.0) <= 1.0


def test_harmonic_support_lends_nothing_to_half_the_rate():
    rates_per_min = np.arange(4.0, 60.0, 0.5)
    spectrum = np.where(np.abs(rates_per_min - 20.0) < 0.3, 1.0, 0.0)[None, :]
    out = R.harmonic_support(spectrum, rates_per_min, 1.0, 1.0)
    # 10 per minute has no peak of its own, so the cap gives it none of the 20's.
    assert out[0, np.argmin(np.abs(rates_per_min - 10.0))] == 0.0
    assert out[0, np.argmin(np.abs(rates_per_min - 20.0))] == 1.0
