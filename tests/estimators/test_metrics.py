"""Tests of estimators.metrics: worked examples by hand, cross-checks with numpy/scipy."""

import math

import numpy as np
import pytest
from scipy import stats

from estimators.errors import ParameterError
from estimators.metrics import (
    Agreement,
    agreement,
    align,
    best_lag,
    calibration,
    coverage,
    instantaneous_rate,
    rate_from_events,
    time_to_steady,
    within_tolerance,
)


@pytest.fixture
def rng():
    return np.random.default_rng(20240601)


# ------------------------------------------------------------------------ agreement


def test_agreement_worked_example_constant_reference():
    a = agreement([60.0, 62.0, 65.0], [61.0, 61.0, 61.0])
    # errors = [60-61, 62-61, 65-61] = [-1, 1, 4]
    assert a.n == 3
    # MAE = (1 + 1 + 4) / 3 = 6 / 3 = 2
    assert a.mae == pytest.approx(2.0, abs=1e-12)
    # RMSE = sqrt((1 + 1 + 16) / 3) = sqrt(6)
    assert a.rmse == pytest.approx(math.sqrt(6.0), abs=1e-12)
    # MAPE = 100 * (1/61 + 1/61 + 4/61) / 3 = 100 * 6 / 183
    assert a.mape_percent == pytest.approx(600.0 / 183.0, abs=1e-12)
    # bias = (-1 + 1 + 4) / 3 = 4/3
    assert a.bias == pytest.approx(4.0 / 3.0, abs=1e-12)
    # deviations from 4/3: -7/3, -1/3, 8/3; squares sum to (49 + 1 + 64)/9 = 114/9;
    # divided by n - 1 = 2: 57/9 = 19/3, so SD = sqrt(19/3)
    sd = math.sqrt(19.0 / 3.0)
    assert a.sd == pytest.approx(sd, abs=1e-12)
    # limits of agreement = 4/3 -/+ 1.96 * sqrt(19/3)
    assert a.loa_lower == pytest.approx(4.0 / 3.0 - 1.96 * sd, abs=1e-12)
    assert a.loa_upper == pytest.approx(4.0 / 3.0 + 1.96 * sd, abs=1e-12)
    # a constant reference has no correlation
    assert math.isnan(a.pearson_r)
    # tolerance max(5, 0.1 * 61 = 6.1) = 6.1 >= |4|: all within
    assert a.within_tolerance == 1.0


def test_agreement_worked_example_tolerance_and_correlation():
    est = np.array([60.0, 70.0, 80.0, 100.0])
    ref = np.array([62.0, 68.0, 84.0, 90.0])
    a = agreement(est, ref)
    # errors = [-2, 2, -4, 10]; limits = max(5, 10 % of ref) = [6.2, 6.8, 8.4, 9.0]
    # only |10| > 9.0 fails: 3 of 4 within
    assert a.within_tolerance == pytest.approx(0.75)
    # MAE = (2 + 2 + 4 + 10) / 4 = 18 / 4 = 4.5; bias = (-2 + 2 - 4 + 10) / 4 = 1.5
    assert a.mae == pytest.approx(4.5)
    assert a.bias == pytest.approx(1.5)
    assert a.pearson_r == pytest.approx(np.corrcoef(est, ref)[0, 1], abs=1e-12)


def test_within_tolerance_boundary_is_inclusive():
    # reference 40: limit max(5, 4) = 5, so an error of exactly 5 is within, 5.001 is not;
    # reference 200: limit max(5, 20) = 20.
    got = within_tolerance([45.0, 45.001, 220.0, 220.5], [40.0, 40.0, 200.0, 200.0])
    assert got.tolist() == [True, False, True, False]


def test_agreement_drops_nan_pairs():
    a = agreement([60.0, np.nan, 65.0, 70.0], [61.0, 61.0, np.nan, 72.0])
    # pairs kept: (60, 61) and (70, 72): errors -1, -2
    assert a.n == 2
    assert a.mae == pytest.approx(1.5)
    assert a.bias == pytest.approx(-1.5)
    # SD of [-1, -2] with ddof 1: deviations +-0.5, (0.25 + 0.25) / 1 = 0.5
    assert a.sd == pytest.approx(math.sqrt(0.5))
    assert math.isnan(a.pearson_r)  # fewer than 3 pairs


def test_agreement_no_pairs_is_all_nan():
    a = agreement([np.nan, 60.0], [61.0, np.nan])
    assert a.n == 0
    assert all(math.isnan(getattr(a, k)) for k in ("mae", "rmse", "bias", "sd", "pearson_r",
                                                    "within_tolerance"))


def test_agreement_cross_checks_numpy_and_scipy(rng):
    ref = rng.uniform(50, 150, 500)
    est = ref + rng.normal(0.7, 3.0, 500)
    est[rng.choice(500, 40, replace=False)] = np.nan
    a = agreement(est, ref)
    keep = np.isfinite(est)
    err = est[keep] - ref[keep]
    assert a.n == keep.sum()
    assert a.mae == pytest.approx(np.mean(np.abs(err)), rel=1e-12)
    assert a.rmse == pytest.approx(np.sqrt(np.mean(err**2)), rel=1e-12)
    assert a.bias == pytest.approx(np.mean(err), rel=1e-12)
    assert a.sd == pytest.approx(np.std(err, ddof=1), rel=1e-12)
    assert a.mape_percent == pytest.approx(100 * np.mean(np.abs(err) / ref[keep]), rel=1e-12)
    assert a.pearson_r == pytest.approx(stats.pearsonr(est[keep], ref[keep]).statistic, abs=1e-12)
    assert a.pearson_r == pytest.approx(np.corrcoef(est[keep], ref[keep])[0, 1], abs=1e-12)


def test_agreement_custom_tolerance_and_as_dict():
    a = agreement([12.0, 15.0], [10.0, 10.0], tolerance_abs=2.0, tolerance_rel=0.0)
    # errors 2 (within 2) and 5 (not)
    assert a.within_tolerance == 0.5
    d = a.as_dict()
    assert d["n"] == 2 and d["tolerance_abs"] == 2.0 and set(d) == set(Agreement.__dataclass_fields__)


def test_agreement_rejects_mismatched_shapes():
    with pytest.raises(ParameterError, match=r"estimate \(3,\) and reference \(2,\) must match"):
        agreement([1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(ParameterError, match="estimate must be 1-D"):
        agreement([[1.0]], [1.0])


# ----------------------------------------------------------------------- references


def test_instantaneous_rate_worked_example():
    mid, rate = instantaneous_rate([10.0, 11.0, 11.5, 13.5])
    # intervals 1.0, 0.5, 2.0 s -> 60, 120, 30 per min, at midpoints 10.5, 11.25, 12.5
    assert mid.tolist() == [10.5, 11.25, 12.5]
    assert rate.tolist() == [60.0, 120.0, 30.0]
    mid, rate = instantaneous_rate([3.0])
    assert mid.size == 0 and rate.size == 0


def test_rate_from_events_evenly_spaced():
    events = np.arange(0.0, 60.0, 0.8)  # one event every 0.8 s = 60 / 0.8 = 75 per min
    grid = np.arange(5.0, 55.0, 1.0)
    rate = rate_from_events(events, grid, window_s=8.0)
    np.testing.assert_allclose(rate, 75.0, rtol=1e-12)


def test_rate_from_events_worked_examples():
    events = [0.0, 0.5, 1.5, 2.0, 5.0]
    grid = [1.0, 1.0, 3.5, 9.0]
    # t=1, window 4 -> [-1, 3]: events 0, 0.5, 1.5, 2.0: intervals 0.5, 1, 0.5,
    #   mean 2/3 s -> 90 per min
    # t=3.5, window 3 -> [2, 5] (closed): events 2.0 and 5.0: one interval of 3 s -> 20;
    #   the interval 1.5-2.0 is cut by the edge and left out
    # t=9, window 4 -> [7, 11]: no events -> NaN
    got = [rate_from_events(events, [grid[0]], 4.0)[0],
           rate_from_events(events, [grid[2]], 3.0)[0],
           rate_from_events(events, [grid[3]], 4.0)[0]]
    assert got[0] == pytest.approx(90.0)
    assert got[1] == pytest.approx(20.0)
    assert math.isnan(got[2])


def test_rate_from_events_matches_slow_twin(rng):
    events = np.cumsum(rng.uniform(0.4, 1.4, 200))
    grid = np.concatenate([rng.uniform(-5, events[-1] + 5, 300), [np.nan]])
    window = 6.0
    got = rate_from_events(events, grid, window)
    for t, value in zip(grid, got):
        inside = events[(events >= t - window / 2) & (events <= t + window / 2)]
        if inside.size < 2:
            assert math.isnan(value)
        else:
            assert value == pytest.approx(60.0 / np.mean(np.diff(inside)), rel=1e-12)


def test_rate_from_events_errors():
    with pytest.raises(ParameterError, match=r"strictly increasing; event 2 \(1.0 s\)"):
        rate_from_events([0.0, 1.0, 1.0], [0.5], 4.0)
    with pytest.raises(ParameterError, match="must be finite"):
        rate_from_events([0.0, np.nan], [0.5], 4.0)
    with pytest.raises(ParameterError, match="window_s=0.0 must be finite and > 0"):
        rate_from_events([0.0, 1.0], [0.5], 0.0)


# -------------------------------------------------------------------------- pairing


def test_align_worked_example():
    tb = [0.0, 1.0, 2.0, 3.0, 10.0]
    vb = [60.0, 62.0, np.nan, 66.0, 70.0]
    ta = [0.5, 1.0, 1.5, 2.5, 6.0, 10.0, 12.0]
    va, b = align(ta, [1, 2, 3, 4, 5, 6, 7], tb, vb, max_gap_s=1.0)
    assert va.tolist() == [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0]
    # 0.5: between 0 (60) and 1 (62), both within 1 s -> 61
    # 1.0: exact sample -> 62
    # 1.5: the NaN at 2.0 is no sample, next is 3.0 (1.5 s away) -> NaN
    # 2.5: previous sample 1.0 is 1.5 s away -> NaN
    # 6.0: 3 s and 4 s from its neighbours -> NaN (no bridging of the gap)
    # 10.0: exact -> 70; 12.0: after the last sample, no extrapolation -> NaN
    expected = [61.0, 62.0, np.nan, np.nan, np.nan, 70.0, np.nan]
    np.testing.assert_array_equal(b, expected)


def test_align_matches_numpy_interp_without_gaps(rng):
    tb = np.cumsum(rng.uniform(0.5, 1.0, 100))
    vb = rng.normal(70, 5, 100)
    ta = rng.uniform(tb[0], tb[-1], 200)
    _, b = align(ta, np.zeros(200), tb, vb, max_gap_s=1.0)
    np.testing.assert_allclose(b, np.interp(ta, tb, vb), rtol=1e-12)


def test_align_errors():
    with pytest.raises(ParameterError, match=r"times_a \(2,\) and values_a \(1,\) must match"):
        align([0.0, 1.0], [1.0], [0.0], [1.0], 1.0)
    with pytest.raises(ParameterError, match="times_b must be strictly increasing"):
        align([0.0], [1.0], [1.0, 0.0], [1.0, 2.0], 1.0)
    with pytest.raises(ParameterError, match="max_gap_s=-1.0 must be finite and >= 0"):
        align([0.0], [1.0], [0.0], [1.0], -1.0)


def _smooth_series(rng, n):
    # Low-pass random walk: broad autocorrelation, but a single clear peak at the true lag.
    x = np.cumsum(rng.normal(0, 1, n + 200))
    x = np.convolve(x - x.mean(), np.ones(9) / 9, mode="same")
    return x


@pytest.mark.parametrize("shift", [4, -3, 0])
def test_best_lag_recovers_known_shift(rng, shift):
    step = 0.5
    n = 400
    x = _smooth_series(rng, n)
    t = np.arange(n) * step
    k = np.arange(n) + 100
    a = x[k]                # reference
    b = x[k - shift]        # estimate: b(t) = a(t - shift * step), late for shift > 0
    b[50:70] = np.nan       # a gap must not matter
    assert best_lag(t, a, b, max_lag_s=10.0) == pytest.approx(shift * step, abs=1e-12)


def test_best_lag_sign_convention_late_estimate():
    t = np.arange(0.0, 100.0, 1.0)
    reference = np.where(t >= 50, 90.0, 60.0)
    estimate = np.where(t >= 53, 90.0, 60.0)   # the estimate sees the step 3 s later
    assert best_lag(t, reference, estimate, max_lag_s=8.0) == 3.0
    assert best_lag(t, estimate, reference, max_lag_s=8.0) == -3.0


def test_best_lag_uneven_times_resampled(rng):
    t = np.arange(0.0, 200.0, 1.0)
    x = np.sin(2 * np.pi * t / 37.0) + 0.5 * np.sin(2 * np.pi * t / 11.0)
    late = np.sin(2 * np.pi * (t - 2) / 37.0) + 0.5 * np.sin(2 * np.pi * (t - 2) / 11.0)
    drop = np.sort(rng.choice(np.arange(1, 199), 30, replace=False))
    keep = np.setdiff1d(np.arange(200), drop)  # uneven sampling, median step still 1 s
    assert best_lag(t[keep], x[keep], late[keep], 6.0, step_s=1.0) == 2.0


def test_best_lag_nothing_to_correlate_is_nan():
    t = np.arange(10.0)
    assert math.isnan(best_lag(t, np.full(10, np.nan), np.arange(10.0), 3.0))
    assert math.isnan(best_lag(t, np.full(10, 60.0), np.arange(10.0), 3.0))  # constant


def test_best_lag_series_shorter_than_the_lag_range():
    # 10 s of data, lags searched to +-32 s: shifts beyond the data have no overlap
    # (they once wrapped around and raised a broadcasting error)
    t = np.arange(0.0, 10.0, 1.0)
    a = np.sin(2 * np.pi * t / 6)
    b = np.sin(2 * np.pi * (t - 1) / 6)  # 1 s late
    assert best_lag(t, a, b, max_lag_s=32.0) == 1.0


def test_best_lag_errors():
    t = np.arange(5.0)
    with pytest.raises(ParameterError, match=r"t \(5,\), a \(4,\) and b \(5,\) must match"):
        best_lag(t, t[:4], t, 1.0)
    with pytest.raises(ParameterError, match="max_lag_s=0.0 must be finite and > 0"):
        best_lag(t, t, t, 0.0)
    with pytest.raises(ParameterError, match="t must be finite and strictly increasing"):
        best_lag(t[::-1], t, t, 1.0)


# ------------------------------------------------------------ coverage, calibration


def test_coverage():
    # 3 of 4 rows carry a rate
    assert coverage([60.0, np.nan, 61.0, 62.0]) == 0.75
    assert coverage([np.nan, np.nan]) == 0.0
    assert math.isnan(coverage([]))


def test_calibration_worked_example():
    errors = [4.0, -2.0, 0.5, 0.1, 7.0, np.nan]
    confidence = [0.1, 0.3, 0.8, 0.9, 1.0, 0.5]
    c = calibration(errors, confidence, bins=2)
    assert c.edges.tolist() == [0.0, 0.5, 1.0]
    # bin [0, 0.5): errors 4, -2 -> |e| 4, 2 -> median 3; both <= 5 -> 1.0
    # bin [0.5, 1]: 0.5, 0.1, 7 (confidence 1.0 joins the last bin; the NaN row is dropped)
    #   -> median 0.5; 7 > 5 -> 2/3 within
    assert c.count.tolist() == [2, 3]
    assert c.median_abs_error.tolist() == [3.0, 0.5]
    assert c.fraction_within.tolist() == pytest.approx([1.0, 2.0 / 3.0])
    # with a reference of 100 the tolerance is max(5, 10) = 10: 7 is within
    c = calibration(errors, confidence, bins=2, reference=[100.0] * 6)
    assert c.fraction_within.tolist() == [1.0, 1.0]
    rows = c.rows()
    assert rows[1] == {"confidence_low": 0.5, "confidence_high": 1.0, "count": 3,
                       "median_abs_error": 0.5, "fraction_within": 1.0}


def test_calibration_empty_bin_and_edges():
    c = calibration([1.0, 2.0], [0.05, 0.95], bins=[0.0, 0.1, 0.5, 1.0])
    assert c.count.tolist() == [1, 0, 1]
    assert math.isnan(c.median_abs_error[1]) and math.isnan(c.fraction_within[1])


def test_calibration_errors():
    with pytest.raises(ParameterError, match="bins=0 must be a positive integer"):
        calibration([1.0], [0.5], bins=0)
    with pytest.raises(ParameterError, match="bin edges must be at least 2 increasing"):
        calibration([1.0], [0.5], bins=[0.5, 0.2])
    with pytest.raises(ParameterError, match=r"errors \(1,\) and confidence \(2,\) must match"):
        calibration([1.0], [0.5, 0.6])


def test_agreement_pearson_nan_for_a_side_constant_to_rounding():
    # a rate that differs only in its last bit (as 60 / interval does after rounding)
    # is constant for all purposes; scipy flags r as meaningless there
    v = 60 / 4.1
    ref = np.array([v, np.nextafter(v, 100.0), v, np.nextafter(v, 0.0)])
    assert np.ptp(ref) > 0
    assert math.isnan(agreement([14.0, 15.0, 16.0, 17.0], ref).pearson_r)


# ------------------------------------------------------------------- time to steady


def _first_order_step(t, start_s, tau_s=10.0):
    """60 bpm, then from ``start_s`` a first-order approach to 100 bpm (time constant
    ``tau_s``)."""
    after = np.clip(t - start_s, 0.0, None)
    return 60.0 + 40.0 * (1.0 - np.exp(-after / tau_s))


def test_time_to_steady_first_order_step():
    t = np.arange(0.0, 350.0, 0.25)
    rate = _first_order_step(t, 50.0)
    # Within 5 bpm of the final 100 bpm once 40 exp(-s / 10) <= 5, i.e. s >= 10 ln 8 =
    # 20.79 s after the step; the median of what follows is 100 - 40 exp(-15) (its
    # middle sample, 150 s on), 1.2e-5 below 100, which cannot move the answer off the
    # grid point that follows 20.79 s: 21.0 s.
    assert 10.0 * math.log(8.0) == pytest.approx(20.794, abs=1e-3)
    assert time_to_steady(t, rate, 50.0, band=5.0, hold_s=30.0) == 21.0
    # a tighter band takes longer: 40 exp(-s / 10) <= 1 -> s >= 10 ln 40 = 36.89 -> 37.0
    assert time_to_steady(t, rate, 50.0, band=1.0, hold_s=30.0) == 37.0
    # rows before the start and without a rate are left out
    rate[::7] = np.nan
    assert time_to_steady(t, rate, 50.0, band=5.0, hold_s=30.0) == 21.0


def test_time_to_steady_outlier_and_hold():
    t = np.arange(0.0, 100.0, 1.0)
    rate = np.full(t.size, 80.0)
    assert time_to_steady(t, rate, 0.0, band=2.0, hold_s=30.0) == 0.0
    # one estimate 10 bpm off at 60 s: steady only from the next one, 61 s
    rate[60] = 90.0
    assert time_to_steady(t, rate, 0.0, band=2.0, hold_s=30.0) == 61.0
    # ... which needs the rest (61-99 s, 38 s) to last the hold: 40 s is too long
    assert math.isnan(time_to_steady(t, rate, 0.0, band=2.0, hold_s=40.0))
    # a rate that keeps swinging by +-10 never settles within +-5
    swing = 80.0 + 10.0 * np.sin(2 * np.pi * t / 20.0)
    assert math.isnan(time_to_steady(t, swing, 0.0, band=5.0, hold_s=30.0))
    assert math.isnan(time_to_steady([], [], 0.0, band=5.0, hold_s=30.0))


def test_time_to_steady_errors():
    with pytest.raises(ParameterError, match=r"time_s \(3,\) and rate \(2,\) must match"):
        time_to_steady([0.0, 1.0, 2.0], [60.0, 61.0], 0.0, 5.0, 30.0)
    with pytest.raises(ParameterError, match=r"band=-1.0 must be finite and >= 0"):
        time_to_steady([0.0], [60.0], 0.0, -1.0, 30.0)
    with pytest.raises(ParameterError, match=r"hold_s=nan must be finite and >= 0"):
        time_to_steady([0.0], [60.0], 0.0, 5.0, float("nan"))
