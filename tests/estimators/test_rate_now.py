"""The rate now (estimators.rate_now): the per-hop forecast against its batch twin, and
the issue's checks on synthetic ramps, steps and a steady rate (bench.rate_now makes
the signals: our own synthetic PPG and ECG-like traces with exact truth)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimators import rate_now as now_mod
from estimators.monitor import RateMonitor, offline_estimates


def _random_track(rng, n=400):
    """A rate with ramps, jumps, jitter and missing hops, at a 0.25 s hop."""
    emitted = 10.0 + 0.25 * np.arange(n)
    rate = 80.0 + np.cumsum(rng.normal(0.0, 0.3, n))
    for at in rng.choice(n, 5, replace=False):
        rate[at:] += rng.choice([-30.0, 25.0])
    rate[rng.random(n) < 0.05] = np.nan
    delay = 4.0 + rng.uniform(0.0, 0.4, n)
    confidence = rng.uniform(0.3, 1.0, n)
    # the newest samples' peak: near the rate, with stretches of 1-6 hops far from it
    recent = rate + rng.normal(0.0, 2.0, n)
    for at in rng.choice(n - 6, 12, replace=False):
        recent[at:at + rng.integers(1, 7)] += rng.choice([-25.0, 30.0])
    recent[rng.random(n) < 0.05] = np.nan
    return emitted, rate, delay, confidence, recent


@pytest.mark.parametrize("quantity", ["hr", "rr"])
def test_per_hop_forecast_equals_its_batch_twin(rng, quantity):
    params = now_mod.params_for(quantity)
    emitted, rate, delay, confidence, recent = _random_track(rng)
    if quantity == "rr":  # breathing has no end-weighted column
        recent = np.full(len(rate), np.nan)
    state = now_mod.NowState()
    step = np.array([now_mod.rate_now_step(state, params, e, r, d, c, n)
                     for e, r, d, c, n in zip(emitted, rate, delay, confidence, recent)])
    now, conf = now_mod.rate_now_batch(emitted, rate, delay, confidence, params, recent)
    np.testing.assert_allclose(step[:, 0], now, rtol=0, atol=1e-9, equal_nan=True)
    # running sums (per hop) against a direct fit (batch): round-off only
    np.testing.assert_allclose(step[:, 1], conf, rtol=0, atol=1e-9, equal_nan=True)
    assert np.all(np.isnan(now) == np.isnan(rate))
    if quantity == "hr":  # the newest samples' peak took over somewhere, not everywhere
        taken = now == recent
        assert 0 < taken.sum() < np.isfinite(rate).sum() // 2


def test_forecast_rules():
    params = now_mod.HEART
    # a clean 2 bpm/s ramp is carried forward by slope x delay
    t = np.arange(20) * 0.25
    now, _ = now_mod.rate_now_batch(t, 80 + 2 * t, np.full(20, 4.0), np.ones(20), params)
    delta2 = params.shrink_per_s ** 2  # an exact line: its slope's standard error is 0
    assert now[-1] == pytest.approx(80 + 2 * t[-1] + 2.0 ** 3 / (4 + delta2) * 4.0)
    # a steady rate is left alone; a jump restarts the fit (no slope across it)
    steady, _ = now_mod.rate_now_batch(t, np.full(20, 72.0), np.full(20, 4.0), np.ones(20),
                                       params)
    np.testing.assert_allclose(steady, 72.0)
    jump = np.where(t < 2.5, 80.0, 120.0)
    now, _ = now_mod.rate_now_batch(t, jump, np.full(20, 4.0), np.ones(20), params)
    np.testing.assert_allclose(now, jump)
    # a slope beyond the physiological bound is limited to it
    now, _ = now_mod.rate_now_batch(t, 80 + 5.5 * t, np.full(20, 1.0), np.ones(20), params)
    assert now[-1] - (80 + 5.5 * t[-1]) == pytest.approx(params.max_slope_per_s, rel=1e-6)
    # the newest samples' peak replaces the forecast only after recent_hops hops in a
    # row more than the margin away from it, holding still within the spread; within the
    # margin it is never used
    hops, margin = params.recent_hops, params.recent_margin_per_min
    flat = np.full(20, 80.0)
    apart = 80.0 + margin + 0.5
    recent = np.full(20, apart)
    recent[hops - 1] = 80.0  # a run of hops - 1 apart, then one from hop `hops` on
    now, _ = now_mod.rate_now_batch(t, flat, np.full(20, 4.0), np.ones(20), params, recent)
    np.testing.assert_array_equal(now, np.where(np.arange(20) >= 2 * hops - 1, apart, 80.0))
    wander = apart + np.where(np.arange(20) % 2, params.recent_spread_per_min + 0.5, 0.0)
    now, _ = now_mod.rate_now_batch(t, flat, np.full(20, 4.0), np.ones(20), params, wander)
    np.testing.assert_array_equal(now, flat)
    close, _ = now_mod.rate_now_batch(t, flat, np.full(20, 4.0), np.ones(20), params,
                                      np.full(20, 80.0 + margin))
    np.testing.assert_array_equal(close, flat)
    # the forecast's own uncertainty lowers the confidence, never raises it
    assert now_mod.now_confidence(0.9, 0.0, 4.0, params) == 0.9
    assert now_mod.now_confidence(0.9, 1.0, 4.0, params) == pytest.approx(
        0.9 * math.erf(5.0 / (4.0 * math.sqrt(2))))


def test_offline_rate_now_is_the_centre_rate(rng):
    from tests import signals

    fs = 50.0
    t = np.arange(int(40 * fs)) / fs
    x = signals.rhythm(t, signals.ramp_rate(t, 70, 90), signals.dicrotic_pulse, rng=rng)
    est = offline_estimates(x[:, None], t, [("x", "ppg")], fs, "wrist")
    assert est and all((e.rate_now_per_min == e.rate_per_min
                        or (math.isnan(e.rate_now_per_min) and math.isnan(e.rate_per_min)))
                       and e.now_confidence == e.confidence for e in est)


def test_live_rate_now_is_chunk_invariant(rng):
    from tests import signals

    fs = 50.0
    t = np.arange(int(40 * fs)) / fs
    x = signals.rhythm(t, signals.ramp_rate(t, 70, 110), signals.dicrotic_pulse, rng=rng)
    one = RateMonitor([("x", "ppg")], fs, "wrist").update(x[:, None], t)
    monitor = RateMonitor([("x", "ppg")], fs, "wrist")
    parts = []
    for a in range(0, len(t), 37):
        parts += monitor.update(x[a:a + 37, None], t[a:a + 37])
    assert len(one) == len(parts)
    np.testing.assert_allclose([e.rate_now_per_min for e in parts],
                               [e.rate_now_per_min for e in one], equal_nan=True, atol=1e-9)


# ------------------------------------------------ the checks (bench.rate_now)

@pytest.fixture(scope="module")
def scenarios():
    from bench import rate_now as bench_now

    return bench_now


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
@pytest.mark.parametrize("slope", [1.0, -1.0, 2.0, -2.0])
def test_on_ramps_the_rate_now_follows_the_rate_at_the_newest_sample(scenarios, kind, slope):
    """Issue targets: MAE against the truth at emitted_s <= 2 bpm, >= 90 % within 5 bpm
    (5 bpm: the absolute part of the EC13 tolerance, from memory). Measured when
    written: MAE 0.34-0.72 bpm, 95-100 % within (the centre rate read as current:
    1.8-3.0 bpm, 64-100 %)."""
    scores = scenarios.ramp_scores(scenarios.run_scenario(kind, f"ramp:{slope:g}"))
    assert scores["now"]["mae"] <= 2.0
    assert scores["now"]["within_5"] >= 0.9
    assert scores["now"]["mae"] < scores["centre at emitted_s"]["mae"]


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
def test_at_a_steady_rate_the_rate_now_is_no_noisier(scenarios, kind):
    """Issue target: standard deviation <= 1.2 x the centre rate's (measured 1.03 PPG,
    1.11 ECG)."""
    scores = scenarios.steady_scores(scenarios.run_scenario(kind, "steady"))
    assert scores["now_sd"] <= 1.2 * scores["centre_sd"]


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
@pytest.mark.parametrize("after", [120.0, 40.0])
def test_after_a_step_the_rate_now_settles_within_the_target(scenarios, kind, after):
    """Issue targets: settled within 5 bpm in <= 4.5 s, overshoot <= 5 bpm. Measured when
    written: 2.2 / 2.7 s (PPG, 80 -> 120 / 40), 2.5 / 3.2 s (ECG), overshoot 2.3 bpm;
    the centre rate 5.2-6.7 s. Without the end-weighted column the rate now settled
    with the centre rate (the forecast cannot see a step before the tracker switches)."""
    scores = scenarios.step_scores(scenarios.run_scenario(kind, f"step:{after:g}"), after)
    assert scores["now"]["overshoot"] <= 5.0
    assert scores["now"]["settle_s"] <= 4.5
    assert scores["centre"]["settle_s"] > 4.5  # the step is one the centre rate lags
