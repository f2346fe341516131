"""Calibrated confidence: the fit code, the shipped map, the evidence measures and the
display rule (real-record figures are in test_calibration_records.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from estimators import _kernels, calibration, evidence
from estimators.display_rule import (GREY, GREY_CONFIDENCE, SHOW, SHOW_CONFIDENCE,
                                     UNUSABLE_QUALITY, WITHHOLD, decide)
from estimators.errors import ParameterError
from estimators.estimate import Estimate
from estimators.monitor import RateMonitor
from tests.signals import dicrotic_pulse, rhythm


# --------------------------------------------------------------------- fit code


def test_logistic_fit_matches_a_general_optimiser(rng):
    """The IRLS fit against scipy's BFGS on the same penalised log-likelihood."""
    x = rng.normal(size=(400, 3))
    truth = np.array([0.3, 1.5, -2.0, 0.0])
    y = rng.uniform(size=400) < 1 / (1 + np.exp(-(truth[0] + x @ truth[1:])))
    w = rng.uniform(0.5, 2.0, size=400)
    l2 = 2.0

    def loss(beta):
        z = beta[0] + x @ beta[1:]
        return np.sum(w * (np.logaddexp(0, z) - y * z)) + 0.5 * l2 * np.sum(beta[1:] ** 2)

    expected = optimize.minimize(loss, np.zeros(4), method="BFGS", options={"gtol": 1e-9}).x
    np.testing.assert_allclose(calibration.fit_logistic(x, y, w, l2), expected, atol=1e-5)


def test_isotonic_knots_are_block_means_and_rise():
    score = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 5.0])
    y = np.array([0, 1, 0, 0, 1, 1])
    knots_s, knots_p = calibration.fit_isotonic(score, y)
    # Pool-adjacent-violators by hand: [0] [1, 2, 3] -> 1/3, then [4] [5] -> 1, 1, which
    # pool into one block of mean 1.
    np.testing.assert_allclose(knots_p, [0.0, 1 / 3, 1.0])
    np.testing.assert_allclose(knots_s, [0.0, 2.0, 4.5])


def test_expected_calibration_error_and_auroc_by_hand():
    prob = np.array([0.05, 0.15, 0.15, 0.95, 0.95, 0.95, 0.95])
    outcome = np.array([0, 1, 0, 1, 1, 1, 0])
    # Bins: [0.05] -> |0 - 0.05|; [0.15, 0.15] -> |0.5 - 0.15|; four at 0.95 -> |0.75 - 0.95|.
    want = (1 * 0.05 + 2 * 0.35 + 4 * 0.2) / 7
    assert calibration.expected_calibration_error(prob, outcome) == pytest.approx(want)
    score = np.array([0.2, 0.9, 0.4, 0.4, 0.7])
    positive = np.array([False, True, True, False, False])
    u = stats.mannwhitneyu(score[positive], score[~positive]).statistic
    assert calibration.auroc(score, positive) == pytest.approx(u / (2 * 3))
    assert math.isnan(calibration.auroc(score, np.zeros(5, dtype=bool)))


def test_a_fitted_map_recovers_known_probabilities(rng):
    """Rows whose outcome probability is a known function of the posterior mass: the
    fitted map gives back that probability (a calibrated map of a calibrated input)."""
    n = 20000
    measures = np.zeros((n, len(evidence.FEATURES)))
    mass = rng.uniform(0.05, 0.95, n)
    measures[:, evidence.FEATURES.index("posterior_mass")] = mass
    measures[:, evidence.FEATURES.index("quality")] = rng.uniform(size=n)
    outcome = rng.uniform(size=n) < mass
    fitted = calibration.fit_map(measures, outcome, l2=1.0)
    assert set(fitted.models) == {"still"}
    probe = np.zeros((3, len(evidence.FEATURES)))
    probe[:, 0] = [0.2, 0.5, 0.8]
    probe[:, evidence.FEATURES.index("quality")] = 0.5
    # 20000 Bernoulli rows: a few per cent of sampling error per isotonic block.
    np.testing.assert_allclose(fitted(probe), [0.2, 0.5, 0.8], atol=0.05)
    assert calibration.expected_calibration_error(fitted(measures), outcome) < 0.02


# ------------------------------------------------------------------ shipped map


def test_the_shipped_map_loads_with_every_family():
    shipped = calibration.MAP
    assert shipped is not None, f"no map at {calibration.MAP_PATH}"
    assert set(shipped.models) == set(calibration.FAMILIES)
    for family, model in shipped.models.items():
        if calibration.FAMILY_DESIGN[family] == "constant":  # no measure, no knots
            assert len(model.knots_score) == 0
            value = float(shipped.models[family](np.zeros((1, len(calibration.FEATURES))))[0])
            assert 0.5 < value < 0.8  # the base rate of the running records without acc
            continue
        assert np.all(np.diff(model.knots_score) > 0)
        assert np.all(np.diff(model.knots_prob) >= 0)  # isotonic: never falls
        assert 0.0 <= model.knots_prob[0] and model.knots_prob[-1] <= 1.0
    assert calibration.load_map(calibration.MAP_PATH.with_name("absent.json")) is None


def test_shipped_confidence_rises_with_the_score_and_stays_a_probability(rng):
    rows = np.column_stack([rng.uniform(0, 1, 500), rng.uniform(0, 1, 500),
                            rng.uniform(0, 1, 500), np.ones(500), rng.uniform(0, 1, 500),
                            rng.uniform(0, 2, 500), rng.uniform(0, 2, 500),
                            rng.uniform(0, 2, 500), rng.uniform(0, 10, 500),
                            rng.uniform(0, 40, 500), (rng.uniform(size=500) < 0.5) * 1.0,
                            rng.uniform(0, 1, 500)])
    prob = calibration.MAP(rows)
    assert np.all((prob >= calibration.PROB_FLOOR) & (prob <= calibration.PROB_CEIL))
    families = calibration.family_of(rows)
    assert set(families) == set(calibration.FAMILIES)
    for family in calibration.FAMILIES:
        sel = families == family
        score = calibration.MAP.models[family].score(rows[sel])
        assert np.all(np.diff(prob[sel][np.argsort(score)]) >= -1e-12)


def test_a_map_of_another_version_is_refused():
    data = calibration.MAP.to_dict()
    data["features"] = data["features"][:-1]
    with pytest.raises(ParameterError, match="its features do not match"):
        calibration.ConfidenceMap.from_dict(data)
    data = calibration.MAP.to_dict()
    data["models"]["still"]["beta"] = data["models"]["still"]["beta"][:-1]
    with pytest.raises(ParameterError, match="array sizes do not match the design"):
        calibration.ConfidenceMap.from_dict(data)


def test_estimates_carry_the_calibrated_confidence_and_their_evidence(rng):
    fs = 50.0
    t = np.arange(int(40 * fs)) / fs
    x = np.column_stack([rhythm(t, np.full(len(t), 130.0), dicrotic_pulse, noise_std=0.05,
                                rng=rng) for _ in range(2)])
    est = RateMonitor([("a", "ppg"), ("b", "ppg")], fs, "wrist").update(x, t)
    hr = [e for e in est if e.quantity == "hr"]
    assert {e.source for e in hr} == {"a", "b", "fused"}
    rows = np.array([e.evidence for e in hr])
    assert rows.shape == (len(hr), len(evidence.FEATURES))
    np.testing.assert_allclose([e.confidence for e in hr], calibration.MAP(rows))
    fused = rows[[e.source == "fused" for e in hr]]
    assert np.all(fused[:, evidence.FEATURES.index("channel_spread")] >= 0)
    assert all(e.evidence == () for e in est if e.quantity == "rr")


def test_ecg_heart_rate_keeps_the_raw_confidence(rng):
    fs = 50.0
    t = np.arange(int(30 * fs)) / fs
    x = rhythm(t, np.full(len(t), 70.0), dicrotic_pulse, noise_std=0.05, rng=rng)
    hr = [e for e in RateMonitor([("ecg", "ecg")], fs, "chest-ecg").update(x[:, None], t)
          if e.quantity == "hr"]
    mass = np.array([e.evidence[evidence.FEATURES.index("posterior_mass")] for e in hr])
    np.testing.assert_allclose([e.confidence for e in hr], mass)


# ---------------------------------------------------------------- evidence


def test_spectral_margins_kernel_matches_its_batch_twin_and_plain_path(rng):
    spectra = rng.uniform(size=(60, 220))
    readout = rng.uniform(size=(60, 220))
    spectra[3, 5] = np.nan
    readout[7, :] = 0.0
    rate_bins = rng.uniform(-3.0, 225.0, 60)
    rate_bins[4] = np.nan
    args = (spectra, readout, rate_bins, 53.3, 5.3)
    batch = evidence.spectral_margins_batch(*args)
    for got in (evidence.spectral_margins(*args),):
        for a, b in zip(got, batch):
            np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)
    out = np.empty((60, 3))
    _kernels.spectral_margins.py_func(*args, out)
    np.testing.assert_allclose(out.T, np.array(batch), rtol=0, atol=1e-12)


def test_jumpiness_does_not_depend_on_the_chunking(rng):
    rates = 70 + np.cumsum(rng.normal(0, 1, 300))
    rates[[10, 11, 50]] = np.nan
    whole = evidence.jumpiness(rates, 0.25, {})
    state, parts = {}, []
    cuts = np.sort(rng.choice(np.arange(1, 300), 20, replace=False))
    for part in np.split(rates, cuts):
        parts.append(evidence.jumpiness(part, 0.25, state))
    np.testing.assert_allclose(np.concatenate(parts), whole, rtol=0, atol=1e-12)


def test_channel_spread():
    rates = np.array([[70.0, 80.0, np.nan, 60.0], [72.0, np.nan, np.nan, 90.0]])
    np.testing.assert_array_equal(evidence.channel_spread(rates, 4), [2.0, 0.0, 0.0, 30.0])
    np.testing.assert_array_equal(evidence.channel_spread(rates, 3), [0.0, 0.0, 0.0])
    np.testing.assert_array_equal(evidence.channel_spread(None, 2), [0.0, 0.0])


def test_evidence_does_not_depend_on_the_chunking(rng):
    fs = 50.0
    t = np.arange(int(30 * fs)) / fs
    x = np.column_stack([rhythm(t, 70 + 20 * t / 30, dicrotic_pulse, noise_std=0.2, rng=rng)
                         for _ in range(2)])
    channels = [("a", "ppg"), ("b", "ppg")]
    whole = RateMonitor(channels, fs, "wrist").update(x, t)
    monitor, parts = RateMonitor(channels, fs, "wrist"), []
    bounds = np.concatenate(([0], np.sort(rng.choice(np.arange(1, len(t)), 40, replace=False)),
                             [len(t)]))
    for a, b in zip(bounds[:-1], bounds[1:]):
        parts += monitor.update(x[a:b], t[a:b])
    assert len(parts) == len(whole)
    for got, want in zip(parts, whole):
        np.testing.assert_allclose(got.evidence, want.evidence, rtol=1e-9, atol=1e-9)
        assert got.confidence == pytest.approx(want.confidence, abs=1e-9)


# ------------------------------------------------------------------ the rule


def test_display_rule_thresholds():
    assert (SHOW_CONFIDENCE, GREY_CONFIDENCE, UNUSABLE_QUALITY) == (0.8, 0.5, 0.3)
    assert decide("hr", 70.0, 0.8, 0.3) == SHOW
    assert decide("hr", 70.0, np.nextafter(0.8, 0), 0.9) == GREY
    assert decide("hr", 70.0, 0.5, 0.9) == GREY
    assert decide("hr", 70.0, np.nextafter(0.5, 0), 0.9) == WITHHOLD
    assert decide("hr", 70.0, 0.99, np.nextafter(0.3, 0)) == GREY
    assert decide("hr", 70.0, 0.4, 0.05) == WITHHOLD
    assert decide("hr", math.nan, 0.99, 0.99) == WITHHOLD
    assert decide("hr", 70.0, math.nan, 0.9) == WITHHOLD
    # Breathing: confidence not calibrated, only the quality counts.
    assert decide("rr", 15.0, 0.1, 0.3) == SHOW
    assert decide("rr", 15.0, 0.99, 0.29) == GREY
    assert decide("rr", math.nan, 0.99, 0.99) == WITHHOLD
    assert Estimate("hr", "PPG", 0.0, 4.0, 174.0, 0.9, 0.18).display == GREY


@pytest.mark.parametrize("rates, harmonic", [((60.0, 90.0), 0.5), ((72.0, 72.0), 1.5),
                                             ((140.0, 110.0), 1.0)])
def test_a_clean_pulse_is_shown_confidently(rates, harmonic):
    """A clean PPG-like pulse, steady or ramping at 0.5 bpm/s, with its second harmonic
    up to 1.5 times its fundamental (a dicrotic pulse): the rate is right, so the
    calibrated confidence must say so (before the harmonic-leakage margin, a clean ramp
    was greyed at 0.68; before reading the half/double ratios on the tracked spectrum, a
    strong harmonic was withheld at 0.03-0.13)."""
    fs = 125.0
    t = np.arange(int(60 * fs)) / fs
    rate = np.linspace(rates[0], rates[1], len(t))
    phase = 2 * np.pi * np.cumsum(rate / 60.0) / fs
    x = np.sin(phase) + harmonic * np.sin(2 * phase + 0.8)
    estimates = [e for e in RateMonitor([("p", "ppg")], fs, "wrist").update(x[:, None], t)
                 if e.quantity == "hr" and e.time_s > 10.0]
    truth = np.interp([e.time_s for e in estimates], t, rate)
    assert np.all(np.abs([e.rate_per_min for e in estimates] - truth) < 3.0)
    confidence = np.array([e.confidence for e in estimates])
    assert np.median(confidence) >= 0.9
    assert np.mean(confidence >= 0.8) >= 0.9
