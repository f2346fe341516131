"""Artifact correction, HRV and DFA alpha1 (estimators/hrv.py): the slow DFA twin,
known scaling exponents, injected artifacts, and live == batch for every split."""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimators import hrv as H
from estimators.errors import ParameterError
from tests.beat_signals import ecg_from_beats, inject_artifacts, sinus_intervals_ms
from tests.reference.dfa_loop import dfa_alpha1_loop
from tests.signals import coloured_noise

# ------------------------------------------------------------------------ DFA


@pytest.mark.parametrize("n", [32, 33, 100, 257])
def test_dfa_matches_the_loop_twin(rng, n):
    x = 800.0 + 30.0 * rng.standard_normal(n)
    assert H.dfa_alpha1(x) == pytest.approx(dfa_alpha1_loop(x), rel=1e-9, abs=1e-12)


def test_dfa_twin_with_other_box_sizes(rng):
    x = np.cumsum(rng.standard_normal(300))
    assert H.dfa_alpha1(x, 5, 20) == pytest.approx(dfa_alpha1_loop(x, 5, 20), rel=1e-9)


def _mean_alpha(rng, make, repeats=20, n=1000):
    return float(np.mean([H.dfa_alpha1(make(rng, n)) for _ in range(repeats)]))


# Known values (common practice, from memory): white-noise intervals give alpha1 about
# 0.5, 1/f (pink) about 1.0, integrated (Brownian) about 1.5. With boxes of 4-16 beats
# DFA over-reads white noise a little (the detrending removes more of the fluctuation
# in small boxes; Kantelhardt et al., Physica A 295, 2001, from memory), hence 0.1.
# The spread of the mean of 20 series of 1000 intervals is about 0.01 (measured), far
# inside the tolerance.
@pytest.mark.parametrize("exponent, expected", [(0.0, 0.5), (1.0, 1.0), (2.0, 1.5)])
def test_dfa_known_scaling(rng, exponent, expected):
    alpha = _mean_alpha(rng, lambda g, n: 800.0 + 30.0 * coloured_noise(g, n, exponent))
    assert alpha == pytest.approx(expected, abs=0.1)


def test_dfa_too_short_or_flat_is_nan():
    assert math.isnan(H.dfa_alpha1(np.full(20, 800.0)))  # shorter than 2 x 16
    assert math.isnan(H.dfa_alpha1(np.full(100, 800.0)))  # no fluctuation


# ----------------------------------------------------------- artifact correction


def _score(injected, rows):
    """Sensitivity: artifacts with at least one spoiled interval flagged. Specificity:
    untouched intervals left ``ok``."""
    flag = {round(r.time_s, 9): r.flag for r in rows}
    hit = sum(any(flag[round(s, 9)] != "ok" for s in spoiled) for spoiled in injected.spoiled)
    spoiled = {round(s, 9) for group in injected.spoiled for s in group}
    clean = [f for t, f in flag.items() if t not in spoiled and f != "first"]
    return hit / len(injected.spoiled), sum(f == "ok" for f in clean) / len(clean)


def test_injected_artifacts_are_found_and_normal_beats_left_alone(rng):
    # Targets from the issue: sensitivity >= 97 %, specificity >= 99.9 % (for scale,
    # Lipponen & Tarvainen 2019 report 96.96 % and 99.94 % on real ectopic beats).
    hits, cleans = [], []
    for _ in range(4):
        times = np.cumsum(sinus_intervals_ms(rng, 6000)) / 1e3
        injected = inject_artifacts(rng, times, 90)
        se, sp = _score(injected, H.correct_batch(injected.times_s))
        hits.append(se)
        cleans.append(sp)
    assert min(hits) >= 0.97, hits
    assert min(cleans) >= 0.999, cleans


def test_each_artifact_kind_gets_its_flag_and_correction(rng):
    times = np.cumsum(sinus_intervals_ms(rng, 3000)) / 1e3
    injected = inject_artifacts(rng, times, 45)
    rows = {round(r.time_s, 9): r for r in H.correct_batch(injected.times_s)}
    for kind, spoiled in zip(injected.kinds, injected.spoiled):
        first = rows[round(spoiled[0], 9)]
        if kind == "missed":
            assert first.flag == "missed"
            assert first.nn_ms == pytest.approx(first.interval_ms / 2)
        elif kind == "extra":
            after = rows[round(spoiled[1], 9)]
            assert (first.flag, math.isnan(first.nn_ms)) == ("extra", True)
            # The real beat after the extra one carries the whole interval.
            assert after.nn_ms == pytest.approx(first.interval_ms + after.interval_ms)
        else:
            assert rows[round(spoiled[1], 9)].flag == "ectopic"


def test_regular_rhythm_is_not_flagged():
    rows = H.correct_batch(np.arange(200) * 0.75)
    assert [r.flag for r in rows] == ["first"] + ["ok"] * 199


@pytest.mark.parametrize("sizes", [[1], [7, 1, 30], [500]])
def test_correct_step_equals_batch_for_any_split(rng, sizes):
    times = np.cumsum(sinus_intervals_ms(rng, 800)) / 1e3
    injected = inject_artifacts(rng, times, 10)
    t = injected.times_s.copy()
    t[400:] += 5.0  # a gap: a second run
    ready = t + 0.3
    batch = H.correct_batch(t, ready)
    state, rows, k, i = H.correction_initial_state(), [], 0, 0
    while k < len(t):
        n = sizes[i % len(sizes)]
        state, part = H.correct_step(state, t[k:k + n], ready[k:k + n], H.CorrectionParams())
        # Every decided row is final: later beats never change it.
        rows += part
        k, i = k + n, i + 1
    state, part = H.correct_step(state, np.empty(0), np.empty(0), H.CorrectionParams(),
                                 final=True)
    rows += part
    assert [(r.time_s, r.flag) for r in rows] == [(r.time_s, r.flag) for r in batch]
    np.testing.assert_array_equal([r.nn_ms for r in rows], [r.nn_ms for r in batch])
    assert [r.flag for r in rows].count("first") == 2


def test_a_beat_is_decided_two_beats_later():
    t = np.arange(20) * 0.8
    rows = H.correct_step(H.correction_initial_state(), t, t + 0.3, H.CorrectionParams())[1]
    assert len(rows) == 18
    assert [r.decided_s for r in rows[1:]] == pytest.approx(list(t[3:] + 0.3))


@pytest.mark.parametrize("kwargs, message", [
    ({"spread_beats": 3}, "spread_beats=3 must be >= 4"),
    ({"median_beats": 10}, "median_beats=10 must be odd and >= 3"),
    ({"scale": 0.0}, "scale=0.0 must be > 0"),
])
def test_correction_parameters_are_checked(kwargs, message):
    with pytest.raises(ParameterError, match=f"^{message}$"):
        H.CorrectionParams(**kwargs)


@pytest.mark.parametrize("kwargs, message", [
    ({"hop_s": -1.0}, "hop_s=-1.0 must be > 0"),
    ({"box_min": 16}, "box_min=16, box_max=16: need 3 <= box_min < box_max"),
    ({"min_dfa_intervals": 10}, "min_dfa_intervals=10 must be >= 2 \\* box_max = 32"),
    ({"max_corrected_share": 2.0}, "max_corrected_share=2.0 must be in \\[0, 1\\]"),
])
def test_hrv_parameters_are_checked(kwargs, message):
    with pytest.raises(ParameterError, match=f"^{message}$"):
        H.HrvParams(**kwargs)


# ------------------------------------------------------------------------ HRV


def test_hrv_values_on_a_known_series():
    # Alternating 800/820 ms: successive differences are all 20 ms, so RMSSD is 20 ms;
    # SDNN of equal numbers of 800 and 820 is 10 ms (times n / (n - 1) under ddof=1).
    rr = np.tile([800.0, 820.0], 100)
    t = np.cumsum(rr) / 1e3
    rows = H.correct_batch(t)
    out = H.hrv_batch(rows, 0.0, float(t[-1]))
    last = out[-1]
    assert last.rmssd_ms == pytest.approx(20.0)
    n = last.n_intervals
    assert last.sdnn_ms == pytest.approx(10.0 * math.sqrt(n / (n - 1)), rel=0.01)
    assert last.mean_nn_ms == pytest.approx(810.0, abs=0.5)
    assert last.corrected_share == 0.0
    assert [r.emitted_s for r in out][:3] == [5.0, 10.0, 15.0]


def test_hrv_is_empty_with_too_few_beats_and_dfa_needs_clean_ones(rng):
    rr = sinus_intervals_ms(rng, 400)
    t = np.cumsum(rr) / 1e3
    out = H.hrv_batch(H.correct_batch(t), 0.0, float(t[-1]))
    early = [r for r in out if r.window_end_s < 15.0]  # under 20 intervals
    assert early and all(math.isnan(r.rmssd_ms) for r in early)
    late = [r for r in out if r.emitted_s > 130.0]
    assert all(np.isfinite(r.dfa_alpha1) for r in late)
    # 10 % of the beats made ectopic: corrected, but too many for alpha1 (limit 5 %).
    spoiled = t.copy()
    spoiled[5::10] -= 0.25 * rr[5::10] / 1e3
    out = H.hrv_batch(H.correct_batch(spoiled), 0.0, float(t[-1]))
    late = [r for r in out if r.emitted_s > 130.0]
    assert all(r.corrected_share > 0.05 for r in late)
    assert all(math.isnan(r.dfa_alpha1) and np.isfinite(r.rmssd_ms) for r in late)


def _hrv_tuple(rows):
    return [(r.emitted_s, r.window_end_s, r.rmssd_ms, r.sdnn_ms, r.mean_nn_ms,
             r.corrected_share, r.n_intervals, r.dfa_alpha1) for r in rows]


def test_beat_analysis_is_chunk_invariant_and_matches_the_batch_twins(rng):
    fs = 250.0
    times = 0.5 + np.cumsum(sinus_intervals_ms(rng, 260)) / 1e3
    injected = inject_artifacts(rng, times, 3, spacing=60)
    x, t = ecg_from_beats(injected.times_s, fs, float(times[-1]) + 1.0, rng)
    t = t.copy()
    t[len(t) // 2:] += 4.0  # a gap in the timestamps
    whole = H.BeatAnalysis("ecg", fs)
    rows, hrv_rows = whole.update(x, t)
    rows += whole.finish()
    sizes = rng.integers(1, 400, size=10_000)
    sizes[:50] = 1  # one-sample chunks at the start
    split = H.BeatAnalysis("ecg", fs)
    rows2, hrv2, k = [], [], 0
    for n in sizes:
        if k >= len(t):
            break
        a, b = split.update(x[k:k + n], t[k:k + n])
        rows2 += a
        hrv2 += b
        k += n
    rows2 += split.finish()
    assert [(r.time_s, r.flag, r.decided_s) for r in rows2] == \
        [(r.time_s, r.flag, r.decided_s) for r in rows]
    np.testing.assert_array_equal(_hrv_tuple(hrv2), _hrv_tuple(hrv_rows))
    # The HRV rows equal the batch twin over the decided beats.
    twin = H.hrv_batch([r for r in rows if r.decided_s <= t[-1]], float(t[0]), float(t[-1]))
    np.testing.assert_array_equal(_hrv_tuple(twin), _hrv_tuple(hrv_rows))
    # Both runs (before and after the gap) start with a 'first' beat.
    assert [r.flag for r in rows].count("first") == 2
    # Before the gap the beats are the drawn ones (within the causal filters' lag of a
    # few ms), and the artifacts are flagged.
    before = np.array([r.time_s for r in rows if r.time_s < t[len(t) // 2 - 1]])
    error = np.abs(before[:, None] - injected.times_s[None, :]).min(axis=1)
    assert np.median(error) < 0.01
    assert {"missed", "extra", "ectopic"} & {r.flag for r in rows}


def test_offline_twin_finds_the_same_beats_without_the_filter_lag(rng):
    fs = 250.0
    times = 0.5 + np.cumsum(sinus_intervals_ms(rng, 150)) / 1e3
    x, t = ecg_from_beats(times, fs, float(times[-1]) + 1.0, rng)
    live = H.BeatAnalysis("ecg", fs)
    rows = live.update(x, t)[0] + live.finish()
    offline, hrv_rows = H.BeatAnalysis("ecg", fs).offline(x, t)
    # The first candidate has no earlier beats to be measured against: zero-phase
    # filtering's edge transient can pass as one or two beats in the first second
    # (the correction sees them as the first, short intervals), so compare after it.
    live_s = np.array([r.time_s for r in rows if r.time_s > 1.0])
    offline_s = np.array([r.time_s for r in offline if r.time_s > 1.0])
    assert len(live_s) == len(offline_s) == len(times)
    lag_live = np.median(live_s - times)
    lag_offline = np.median(offline_s - times)
    assert abs(lag_offline) < 0.5 / fs <= abs(lag_live) + 0.5 / fs
    assert np.isfinite(hrv_rows[-1].rmssd_ms)
