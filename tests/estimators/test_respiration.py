"""Tests of estimators.respiration: breathing rate from a pulse (PPG or ECG), and the
breathing-rate paths of :class:`RateMonitor` (respiration channel and pulse channels).

Synthetic signals with known truth (our own constructions, not physiological models):

* beats fall where the integral of the heart rate crosses a whole number of cycles;
* a PPG beat is a skewed systolic wave (rise 5 %, fall 14 % of the mean period) with a
  dicrotic wave of a quarter of its height at 45 % of the period; an ECG beat has a P
  wave, a narrow QRS (R wave 12 ms wide) and a T wave, of fixed durations;
* breathing at ``breath_per_min`` enters in exactly one way: ``intensity`` adds a
  baseline sine, ``amplitude`` scales each beat by ``1 + depth sin`` at its time,
  ``frequency`` modulates the heart rate by ``1 + depth sin`` (sinus arrhythmia);
* white noise of 1 % of the beat height is added.

The heart rate is at least 2.5 times the breathing rate in every case: a once-per-beat
series cannot show breathing faster than half the beat rate (Nyquist), and the chain
masks those rates out (:func:`estimators.respiration.nyquist_mask`).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from estimators import respiration as R
from estimators.config import BREATHING, BREATHING_FROM_PULSE, RateSettings, get_profile
from estimators.errors import ParameterError
from estimators.monitor import RateMonitor, offline_estimates

FS = 125.0
TOLERANCE_PER_MIN = 1.0
"""A rate within this of the truth is right: half the confidence half-width of the
breathing settings (2 per minute); a tone's peak, read by parabolic interpolation on a
0.15-per-minute grid, is far closer, so anything beyond is a lock on something else."""

CASES = [(50, 6), (60, 12), (75, 20), (100, 30), (120, 40), (180, 40), (180, 6), (50, 18)]
"""(heart rate, breathing rate) per minute: breathing 6-40 under heart rates 50-180."""


def _gauss(x):
    return np.exp(-0.5 * x * x)


def beat_times(t: np.ndarray, heart_per_min: np.ndarray) -> np.ndarray:
    """Times where the integral of the rate crosses a whole cycle (linear within a
    sample)."""
    phase = np.concatenate(([0.0], np.cumsum(0.5 * (heart_per_min[1:] + heart_per_min[:-1])
                                             / 60.0 / FS)))
    k = np.flatnonzero(np.diff(np.floor(phase)) > 0) + 1
    frac = (np.floor(phase[k]) - phase[k - 1]) / (phase[k] - phase[k - 1])
    return t[k - 1] + frac / FS


def synthetic_pulse(kind: str, heart_per_min: float, breath_per_min: float,
                    modulation: str | None, duration_s: float = 90.0, depth: float | None = None,
                    noise: float = 0.01, seed: int = 0):
    """``(t, x, beats)``: a PPG or ECG with breathing in one modulation (see module
    notes); ``modulation=None`` gives none."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(round(duration_s * FS))) / FS
    breath = lambda tt: np.sin(2 * np.pi * breath_per_min / 60.0 * tt)  # noqa: E731
    heart = np.full_like(t, float(heart_per_min))
    if modulation == "frequency":
        heart = heart * (1.0 + (depth or 0.05) * breath(t))
    beats = beat_times(t, heart)
    gain = np.ones(len(beats))
    if modulation == "amplitude":
        gain = 1.0 + (depth or 0.2) * breath(beats)
    x = np.zeros_like(t)
    period = 60.0 / heart_per_min
    for when, g in zip(beats, gain):
        m = (t > when - 0.5) & (t < when + 1.5)
        d = t[m] - when
        if kind == "ppg":
            rise = 0.15 * period
            systolic = np.where(d < rise, _gauss((d - rise) / (0.05 * period)),
                                _gauss((d - rise) / (0.14 * period)))
            x[m] += g * (systolic + 0.25 * _gauss((d - 0.45 * period) / (0.08 * period)))
        else:
            x[m] += (0.12 * _gauss((d + 0.16) / 0.025)
                     + g * (_gauss(d / 0.012) - 0.15 * _gauss((d + 0.025) / 0.01)
                            - 0.25 * _gauss((d - 0.03) / 0.012))
                     + 0.3 * _gauss((d - 0.25 * min(1.0, period) ** 0.5) / 0.045))
    if modulation == "intensity":
        x = x + (depth or 0.2) * breath(t)
    return t, x + noise * rng.standard_normal(len(t)), beats


def rates(estimates) -> np.ndarray:
    return np.array([e.rate_per_min for e in estimates])


def as_rows(estimates) -> np.ndarray:
    return np.array([[e.time_s, e.emitted_s, e.rate_per_min, e.confidence, e.quality]
                     for e in estimates]).reshape(-1, 5)


def chunked(n: int, rng: np.random.Generator, ones: int = 400) -> list[slice]:
    """Chunk boundaries: ``ones`` 1-sample chunks, then random sizes (not multiples of
    the decimation or the hop)."""
    bounds = list(range(min(ones, n) + 1))
    while bounds[-1] < n:
        bounds.append(min(n, bounds[-1] + int(rng.choice([1, 2, 7, 24, 25, 26, 63, 311, 1000]))))
    return [slice(a, b) for a, b in zip(bounds[:-1], bounds[1:])]


# ------------------------------------------------------------------ beat detection


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
@pytest.mark.parametrize("heart", [50, 75, 180])
def test_beats_are_found_once_each_with_their_intervals(kind, heart):
    t, x, truth = synthetic_pulse(kind, heart, 12, "frequency")
    beats = R.detect_batch(x, t, R.beat_params(kind, FS))
    times = beats.position / FS
    settled = truth[(truth > 3.0) & (truth < t[-1] - 1.0)]
    # Each true beat has its own detection, at a fixed lag (the PPG detection marks the
    # steepest upstroke, before the systolic peak; both sit behind causal filters).
    nearest = np.argmin(np.abs(times[None, :] - settled[:, None]), axis=1)
    assert len(np.unique(nearest)) == len(settled)
    lag = times[nearest] - settled
    assert np.max(np.abs(lag - np.median(lag))) < 0.01 and 0.0 <= np.median(lag) < 0.15
    detected = times[(times > 3.0 + np.median(lag)) & (times < t[-1] - 1.0)]
    assert len(detected) <= len(settled) + 1
    # Sub-sample positions: the intervals match the true ones to within half a sample
    # (4 ms) typically, since every beat of a kind has the same shape and filter delay.
    mine = beats.features[:, 2]
    matched = np.argmin(np.abs(times[:, None] - truth[None, :]), axis=1)
    ok = np.isfinite(mine) & (times > 3.0) & (matched > 0)
    true_interval = truth[matched[ok]] - truth[matched[ok] - 1]
    assert np.median(np.abs(mine[ok] - true_interval)) < 0.5 / FS


def test_ectopic_beat_drops_its_interval_and_shape():
    t, x, truth = synthetic_pulse("ecg", 75, 12, None, duration_s=30.0, noise=0.0)
    # Move one beat 40 % earlier: a premature beat and a compensatory pause.
    k = np.argmin(np.abs(t - truth[15]))
    early = int(round(0.4 * 0.8 * FS))
    y = x.copy()
    seg = slice(k - 50, k + 50)
    y[seg] -= x[seg]
    y[k - 50 - early:k + 50 - early] += x[seg]
    beats = R.detect_batch(y, t, R.beat_params("ecg", FS))
    times = beats.position / FS
    premature = np.argmin(np.abs(times - (truth[15] - early / FS)))
    assert np.isnan(beats.features[premature]).all()  # shape and interval dropped
    assert np.isnan(beats.features[premature + 1, 2])  # the pause after it too
    assert np.isfinite(beats.features[premature + 2]).all()


def test_flat_and_missing_stretches_leave_a_gap():
    t, x, _ = synthetic_pulse("ppg", 75, 12, None, duration_s=45.0)
    x[int(10 * FS):int(20 * FS)] = np.nan
    x[int(20 * FS):int(30 * FS)] = 0.3
    params = R.beat_params("ppg", FS)
    beats = R.detect_batch(x, t, params)
    times = beats.position / FS
    inside = times[(times > 10.5) & (times < 30.0)]
    # At most a lone detection at the step where the held value meets the flat line,
    # too far from any beat to pair with one.
    assert len(inside) <= 1
    assert np.sum(times < 9.5) >= 10 and np.sum(times > 31.0) >= 15
    samples = R.resample_batch(beats, t, 25, params)
    during = (samples.time_s > 10.0) & (samples.time_s < 30.0)
    assert np.isnan(samples.values[during]).all()
    assert np.isfinite(samples.values[samples.time_s > 33.0]).all()


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
def test_detect_step_any_chunking_equals_batch(kind, rng):
    t, x, _ = synthetic_pulse(kind, 90, 15, "amplitude", duration_s=30.0)
    x[1000:1100] = np.nan
    params = R.beat_params(kind, FS)
    batch = R.detect_batch(x, t, params)
    state = R.beat_initial_state(params)
    parts = []
    for s in chunked(len(x), rng):
        state, beats = R.detect_step(state, x[s], t[s], params)
        parts.append(beats)
        # Checked after every update: nothing decided so far differs from the batch.
        so_far = R.Beats.concat(parts)
        np.testing.assert_array_equal(so_far.index, batch.index[:len(so_far)])
    got = R.Beats.concat(parts)
    np.testing.assert_array_equal(got.index, batch.index)
    np.testing.assert_array_equal(got.ready, batch.ready)
    np.testing.assert_array_equal(got.position, batch.position)
    np.testing.assert_array_equal(got.ready_s, batch.ready_s)
    np.testing.assert_array_equal(got.features, batch.features)
    assert np.all(got.ready_s == t[got.ready - 1])


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
def test_zero_phase_beats_sit_on_the_same_beats(kind):
    t, x, truth = synthetic_pulse(kind, 75, 12, None, duration_s=30.0)
    params = R.beat_params(kind, FS)
    live = R.detect_batch(x, t, params).position / FS
    offline = R.detect_batch(x, t, params, zero_phase=True).position / FS
    inner = offline[(offline > 3.0) & (offline < 27.0)]
    # Same beats; the offline ones have no filter delay, so they sit a little earlier.
    gap = inner[:, None] - live[None, :]
    assert np.all(np.min(np.abs(gap), axis=1) < 0.1)


# ------------------------------------------------------------------- resampling


def resample_reference(beats: R.Beats, t: np.ndarray, decimation: int, max_gap: int):
    """Slow, obvious twin: every grid sample from the beats around it."""
    out = []
    for k in range(decimation - 1, len(t), decimation):
        after = np.flatnonzero(beats.position > k)
        before = np.flatnonzero(beats.position <= k)
        if len(after) == 0:
            break  # not decided yet by the end of the record
        if len(before) == 0:
            out.append((t[k], np.full(3, np.nan)))
            continue
        i, j = before[-1], after[0]
        if beats.index[j] - beats.index[i] > max_gap:
            out.append((t[k], np.full(3, np.nan)))
            continue
        w = (k - beats.position[i]) / (beats.position[j] - beats.position[i])
        out.append((t[k], (1 - w) * beats.features[i] + w * beats.features[j]))
    return np.array([o[0] for o in out]), np.array([o[1] for o in out])


def test_resample_matches_its_reference_and_any_chunking(rng):
    t, x, _ = synthetic_pulse("ppg", 70, 15, "intensity", duration_s=40.0)
    x[2000:2600] = np.nan  # a 4.8 s gap: longer than max_gap, so NaN there
    params = R.beat_params("ppg", FS)
    beats = R.detect_batch(x, t, params)
    batch = R.resample_batch(beats, t, 25, params)
    ref_t, ref_v = resample_reference(beats, t, 25, params.max_gap)
    n = min(len(ref_t), len(batch))
    assert len(batch) >= len(ref_t) - 1  # the gap rule may emit at most up to the end
    np.testing.assert_array_equal(batch.time_s[:n], ref_t[:n])
    np.testing.assert_allclose(batch.values[:n], ref_v[:n], rtol=1e-12, atol=1e-12)
    assert np.isnan(batch.values[(batch.time_s > 17.0) & (batch.time_s < 20.0)]).all()
    # The value at a grid sample is known only once the next beat is decided.
    assert np.all(batch.ready_s >= batch.time_s) and np.all(np.diff(batch.ready_s) >= 0)
    # Chunked, with the beats each chunk yields.
    state_b, state_r = R.beat_initial_state(params), R.resample_initial_state()
    parts = []
    for s in chunked(len(x), rng):
        state_b, b = R.detect_step(state_b, x[s], t[s], params)
        state_r, out = R.resample_step(state_r, b, t[s], 25, params)
        parts.append(out)
    values = np.concatenate([p.values for p in parts])
    np.testing.assert_array_equal(values, batch.values)
    np.testing.assert_array_equal(np.concatenate([p.time_s for p in parts]), batch.time_s)
    np.testing.assert_array_equal(np.concatenate([p.ready_s for p in parts]), batch.ready_s)


# ------------------------------------------------------------- spectra and quality


def test_nyquist_mask_and_scores():
    mask = R.nyquist_mask(np.ones((2, 4)), np.array([10.0, 20.0, 30.0, 40.0]),
                          np.array([60.0, np.nan]))
    assert mask.tolist() == [[1.0, 1.0, 0.0, 0.0], [1.0, 1.0, 1.0, 1.0]]
    flat = np.ones((1, 101))
    tone = np.zeros((1, 101))
    tone[0, 50] = 1.0
    assert R.peak_concentration(flat, np.array([50.0]), 2.0)[0] == 0.0
    assert R.peak_concentration(tone, np.array([50.0]), 2.0)[0] == 1.0
    # On the first or last open bin it is a slope out of the band, not a peak.
    edge = np.zeros((1, 101))
    edge[0, 0] = 1.0
    assert R.peak_concentration(edge, np.array([0.0]), 2.0)[0] == 0.0
    assert R.peak_concentration(tone, np.array([50.0]), 2.0, np.array([51]))[0] == 0.0
    # A half-filled spectrum: the share near the peak is 5 of 20 bins (0.25); chance
    # over 20 open bins is 5/20 too, so nothing; over 101 bins 5/101, so some.
    half = np.zeros((1, 101))
    half[0, :20] = 1.0
    assert R.peak_concentration(half, np.array([10.0]), 2.0, np.array([20]))[0] == 0.0
    expected = (0.25 - 5 / 101) / (R.CONCENTRATION_FULL - 5 / 101)
    assert R.peak_concentration(half, np.array([10.0]), 2.0)[0] == pytest.approx(expected)
    assert R.depth_score(np.array([R.DEPTH_FLOOR, R.DEPTH_FULL])).tolist() == [0.0, 1.0]


def test_modulation_bank_any_chunking_equals_batch(rng):
    t, x, _ = synthetic_pulse("ecg", 80, 15, "amplitude", duration_s=45.0)
    params = R.beat_params("ecg", FS)
    samples = R.resample_batch(R.detect_batch(x, t, params), t, 25, params)
    bank = R.ModulationBank(BREATHING_FROM_PULSE, 5.0)
    batch = bank.batch(samples, zero_phase=False)
    bank.reset()
    parts, start = [], 0
    while start < len(samples):
        stop = min(len(samples), start + int(rng.choice([1, 1, 3, 8, 40])))
        parts.append(bank.update(R.ModulationSamples(samples.values[start:stop],
                                                     samples.time_s[start:stop],
                                                     samples.ready_s[start:stop])))
        start = stop
    got = R.ModulationHops.concat([p for p in parts if len(p)])
    assert len(got) == len(batch) > 0
    for name in ("spectra", "integrity", "depth", "beat_rate"):
        np.testing.assert_allclose(getattr(got, name), getattr(batch, name), rtol=1e-9,
                                   atol=1e-12)
    np.testing.assert_array_equal(got.time_s, batch.time_s)
    np.testing.assert_array_equal(got.emitted_s, batch.emitted_s)
    # The depth of the amplitude modulation (RMS of 0.2 sin over the beat amplitude,
    # about 0.2 / sqrt(2) / 1.x after the band-pass) dwarfs the other two.
    settled = batch.depth[len(batch) // 2:]
    assert np.all(settled[:, 1] > 5 * settled[:, 0]) and np.all(settled[:, 1] > 0.05)
    assert np.allclose(batch.beat_rate[len(batch) // 2:], 80.0, atol=1.0)


# ------------------------------------------------------------------------- fusion


def test_fusion_worked_examples():
    ones = np.ones((1, 3))
    # All three agree (spread 2 <= 4): quality-weighted mean, full agreement.
    r, c, q = R.fuse_modulations(np.array([[15.0, 16.0, 17.0]]), ones,
                                 np.array([[0.5, 0.5, 0.5]]), 4.0, 1, 0.3)
    assert r[0] == pytest.approx(16.0) and c[0] == pytest.approx(1.0) and q[0] == 1.0
    # Two agree, one far off: the pair (support 0.6 + 0.5 = 1.1) beats the single
    # (0.2); rate (0.6 * 15 + 0.5 * 16) / 1.1; confidence times the pair's share of
    # the support, 1.1 / 1.3.
    r, c, q = R.fuse_modulations(np.array([[15.0, 16.0, 30.0]]), 0.8 * ones,
                                 np.array([[0.6, 0.5, 0.2]]), 4.0, 1, 0.3)
    assert r[0] == pytest.approx(17.0 / 1.1) and c[0] == pytest.approx(0.8 * 1.1 / 1.3)
    # The all-three rule of Karlen et al.: no estimate when they disagree.
    r, c, q = R.fuse_modulations(np.array([[15.0, 16.0, 30.0]]), ones,
                                 np.array([[0.6, 0.5, 0.2]]), 4.0, 3, 0.0)
    assert np.isnan(r[0]) and c[0] == 0.0
    # One strong modulation outweighs two weak ones that agree (0.9 > 0.3 + 0.3).
    r, _, _ = R.fuse_modulations(np.array([[10.0, 20.0, 21.0]]), ones,
                                 np.array([[0.9, 0.3, 0.3]]), 4.0, 1, 0.3)
    assert r[0] == pytest.approx(10.0)
    # Withheld modulations (NaN) do not vote; a spread of exactly the threshold agrees.
    r, _, _ = R.fuse_modulations(np.array([[np.nan, 12.0, 16.0]]), ones,
                                 np.array([[0.9, 0.4, 0.4]]), 4.0, 2, 0.3)
    assert r[0] == pytest.approx(14.0)
    # Too little support: no estimate.
    r, c, q = R.fuse_modulations(np.array([[12.0, np.nan, np.nan]]), ones,
                                 np.array([[0.2, 0.0, 0.0]]), 4.0, 1, 0.3)
    assert np.isnan(r[0]) and q[0] == pytest.approx(0.2)


# -------------------------------------------------------- the whole chain, synthetic


@pytest.mark.parametrize("modulation", R.MODULATIONS)
@pytest.mark.parametrize("kind", ["ppg", "ecg"])
@pytest.mark.parametrize("heart,breath", CASES)
def test_each_modulation_alone_gives_the_breathing_rate(kind, heart, breath, modulation):
    t, x, _ = synthetic_pulse(kind, heart, breath, modulation)
    chain = R.PulseBreathing("finger", kind, BREATHING_FROM_PULSE, FS)
    estimates = chain.update(x, t)
    assert all(e.quantity == "rr" and e.source == "finger" for e in estimates)
    column = R.MODULATIONS.index(modulation)
    own = chain.last_modulations[0][:, column]
    fused = rates(estimates)
    # Windows after the first quarter: full-length, filters settled.
    settled = slice(len(fused) // 4, None)
    own_ok = np.abs(own[settled] - breath) <= TOLERANCE_PER_MIN
    fused_ok = np.abs(fused[settled] - breath) <= TOLERANCE_PER_MIN
    assert own_ok.mean() >= 0.95
    assert fused_ok.mean() >= 0.9
    assert np.nanmedian(np.abs(fused[settled] - breath)) <= 0.3


def test_no_breathing_modulation_gives_no_estimate():
    # A steady pulse with noise only: every modulation is noise of 1 % or less.
    t, x, _ = synthetic_pulse("ppg", 72, 15, None, noise=0.002)
    estimates = R.PulseBreathing("finger", "ppg", BREATHING_FROM_PULSE, FS).update(x, t)
    assert np.mean(np.isfinite(rates(estimates))) < 0.1


def test_estimates_describe_their_window_centre_and_wait_for_beats():
    t, x, _ = synthetic_pulse("ppg", 60, 12, "intensity", duration_s=60.0)
    s = BREATHING_FROM_PULSE
    breathing = R.PulseBreathing("finger", "ppg", s, FS)
    estimates = breathing.update(x, t)
    rows = as_rows(estimates)
    assert np.all(np.diff(rows[:, 0]) > 0) and np.all(np.diff(rows[:, 1]) >= 0)
    delay = rows[:, 1] - rows[:, 0]
    full = rows[:, 0] >= s.window_s / 2 + 1.0
    # Half a window, plus the wait for the beat after the newest grid sample (up to a
    # beat interval, 1 s here) and the detector's look-ahead (0.25 s), plus the causal
    # modulation filters' group delay at the rate (0.41 s at 12 /min; computed from the
    # designed filters, estimators.preprocess.chain_group_delay_s).
    grid = breathing.bank.grid.rates_per_min
    filters = np.interp(12.0, grid, breathing.bank.filter_delay_s)
    assert 0.3 < filters < 0.5
    assert np.all(delay[full] >= s.window_s / 2 + filters - 0.2)
    assert np.all(delay[full] <= s.window_s / 2 + filters + 1.0 + 0.25 + 0.2)
    hops = np.diff(rows[:, 0])
    assert np.allclose(hops, s.hop_s, atol=0.21)  # hop, on the 5 Hz grid
    assert np.all((rows[:, 3] >= 0) & (rows[:, 3] <= 1) & (rows[:, 4] >= 0) & (rows[:, 4] <= 1))


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
@pytest.mark.parametrize("lag_hops", [0, 3])
def test_pulse_breathing_any_chunking_equals_one_call(kind, lag_hops, rng):
    settings = dataclasses.replace(BREATHING_FROM_PULSE, lag_hops=lag_hops)
    t, x, _ = synthetic_pulse(kind, 85, 18, "amplitude", duration_s=40.0)
    x[3000:3200] = np.nan
    one = as_rows(R.PulseBreathing("p", kind, settings, FS).update(x, t))
    chain = R.PulseBreathing("p", kind, settings, FS)
    parts = []
    for s in chunked(len(x), rng):
        parts.extend(chain.update(x[s], t[s]))
        got = as_rows(parts)
        np.testing.assert_allclose(got, one[:len(got)], rtol=1e-9, atol=1e-12)
    assert len(parts) == len(one) > 0
    # After reset the chain starts over and gives the same estimates again.
    chain.reset()
    np.testing.assert_allclose(as_rows(chain.update(x, t)), one, rtol=1e-9, atol=1e-12)


def test_lag_refers_to_earlier_hops():
    t, x, _ = synthetic_pulse("ppg", 80, 15, "intensity", duration_s=40.0)
    plain = as_rows(R.PulseBreathing("p", "ppg", BREATHING_FROM_PULSE, FS).update(x, t))
    settings = dataclasses.replace(BREATHING_FROM_PULSE, lag_hops=4)
    lagged = as_rows(R.PulseBreathing("p", "ppg", settings, FS).update(x, t))
    assert len(lagged) == len(plain) - 4
    np.testing.assert_array_equal(lagged[:, 0], plain[:-4, 0])  # same windows
    np.testing.assert_array_equal(lagged[:, 1], plain[4:, 1])  # emitted 4 hops later
    ok = np.isfinite(lagged[:, 2])
    assert np.all(np.abs(lagged[ok, 2] - 15.0) <= TOLERANCE_PER_MIN)


def test_hops_batch_is_the_causal_twin():
    t, x, _ = synthetic_pulse("ecg", 70, 14, "intensity", duration_s=40.0)
    chain = R.PulseBreathing("e", "ecg", BREATHING_FROM_PULSE, FS)
    batch = chain.hops_batch(x, t, zero_phase=False)
    chain.update(x, t)
    samples = R.resample_batch(R.detect_batch(x, t, chain.beat_params), t, chain.decimation,
                               chain.beat_params)
    live = chain.bank.__class__(BREATHING_FROM_PULSE, chain.bank.fs_analysis).update(samples)
    np.testing.assert_allclose(batch.spectra, live.spectra, rtol=1e-9, atol=1e-12)
    np.testing.assert_array_equal(batch.emitted_s, live.emitted_s)


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
def test_offline_twin_finds_the_rate(kind):
    t, x, _ = synthetic_pulse(kind, 66, 16, "amplitude", duration_s=60.0)
    estimates = R.PulseBreathing("p", kind, BREATHING_FROM_PULSE, FS).offline(x, t)
    r = rates(estimates)
    assert all(e.emitted_s == t[-1] for e in estimates)
    assert np.mean(np.abs(r - 16.0) <= TOLERANCE_PER_MIN) >= 0.9
    # Zero-phase filters delay nothing: each estimate describes its window centre.
    breathing = R.PulseBreathing("p", kind, BREATHING_FROM_PULSE, FS)
    centres = breathing.hops_batch(x, t, zero_phase=True).time_s
    np.testing.assert_array_equal(np.sort([e.time_s for e in estimates]), np.sort(centres))


def test_gap_lowers_quality_then_recovers():
    t, x, _ = synthetic_pulse("ppg", 75, 15, "intensity", duration_s=100.0)
    x[int(50 * FS):int(60 * FS)] = np.nan
    rows = as_rows(R.PulseBreathing("p", "ppg", BREATHING_FROM_PULSE, FS).update(x, t))
    inside = (rows[:, 0] > 45) & (rows[:, 0] < 65)  # windows holding much of the gap
    before = (rows[:, 0] > 25) & (rows[:, 0] < 30)
    after = rows[:, 0] > 78  # windows that no longer touch the gap
    assert np.median(rows[inside, 4]) < 0.5 * np.median(rows[before, 4])
    assert np.all(np.abs(rows[after, 2] - 15.0) <= TOLERANCE_PER_MIN)


# ----------------------------------------------------------------- the monitor


def test_monitor_pulse_channel_gives_heart_and_breathing_rates():
    t, x, _ = synthetic_pulse("ppg", 72, 15, "intensity", duration_s=60.0)
    estimates = RateMonitor([("PLETH", "ppg")], FS, "fingertip-rest").update(x[:, None], t)
    hr = [e for e in estimates if e.quantity == "hr"]
    rr = [e for e in estimates if e.quantity == "rr"]
    assert hr and rr and {e.source for e in rr} == {"PLETH"}
    assert np.mean(np.abs(rates(rr) - 15.0) <= TOLERANCE_PER_MIN) >= 0.9
    assert abs(np.nanmedian(rates(hr)) - 72.0) < 2.0
    emitted = [e.emitted_s for e in estimates]
    assert emitted == sorted(emitted)


def test_monitor_respects_breathing_from_pulse_switch():
    t, x, _ = synthetic_pulse("ecg", 72, 15, "amplitude", duration_s=40.0)
    profile = dataclasses.replace(get_profile("chest-ecg"), breathing_from_pulse=False)
    estimates = RateMonitor([("II", "ecg")], FS, profile).update(x[:, None], t)
    assert estimates and all(e.quantity == "hr" for e in estimates)


def test_monitor_reports_both_breathing_sources_and_resets(rng):
    t, x, _ = synthetic_pulse("ppg", 72, 15, "intensity", duration_s=45.0)
    resp = np.sin(2 * np.pi * 15 / 60 * t) + 0.01 * rng.standard_normal(len(t))
    samples = np.column_stack([resp, x])
    monitor = RateMonitor([("RESP", "resp"), ("PLETH", "ppg")], FS, "resp-belt")
    first = monitor.update(samples, t)
    sources = {e.source for e in first if e.quantity == "rr"}
    assert sources == {"RESP", "PLETH"}
    for source in sources:
        r = rates([e for e in first if e.quantity == "rr" and e.source == source])
        assert np.mean(np.abs(r - 15.0) <= TOLERANCE_PER_MIN) >= 0.8
    monitor.reset()
    again = monitor.update(samples, t)
    assert [(e.quantity, e.source, e.time_s) for e in again] == \
        [(e.quantity, e.source, e.time_s) for e in first]
    np.testing.assert_allclose(rates(again), rates(first), rtol=1e-9)


def test_monitor_any_chunking_gives_the_same_breathing_rates(rng):
    t, x, _ = synthetic_pulse("ppg", 90, 20, "frequency", duration_s=40.0)
    channels = [("PLETH", "ppg")]
    one = [e for e in RateMonitor(channels, FS, "fingertip-rest").update(x[:, None], t)
           if e.quantity == "rr"]
    monitor = RateMonitor(channels, FS, "fingertip-rest")
    parts = []
    for s in chunked(len(x), rng, ones=100):
        parts.extend(e for e in monitor.update(x[s, None], t[s]) if e.quantity == "rr")
    np.testing.assert_allclose(as_rows(parts), as_rows(one), rtol=1e-9, atol=1e-12)


def test_offline_estimates_include_breathing_from_the_pulse():
    t, x, _ = synthetic_pulse("ppg", 70, 12, "intensity", duration_s=60.0)
    estimates = offline_estimates(x[:, None], t, [("PLETH", "ppg")], FS, "fingertip-rest")
    rr = [e for e in estimates if e.quantity == "rr"]
    assert rr and all(e.source == "PLETH" and e.emitted_s == t[-1] for e in rr)
    assert np.mean(np.abs(rates(rr) - 12.0) <= TOLERANCE_PER_MIN) >= 0.9


# -------------------------------------------------- the respiration channel itself


def breathing_signal(t, breath_per_min, heart_per_min, cardiac=0.15):
    """Impedance-like breathing: quick inspiration (35 % of the breath), slow
    expiration, so harmonics are strong; plus a cardiac ripple at the heart rate."""
    u = (t * breath_per_min / 60.0) % 1.0
    wave = np.where(u < 0.35, np.sin(np.pi * u / 0.7) ** 2, np.cos(np.pi * (u - 0.35) / 1.3) ** 2)
    return wave + cardiac * np.sin(2 * np.pi * heart_per_min / 60.0 * t)


@pytest.mark.parametrize("breath,heart", [(8, 70), (15, 70), (24, 110), (35, 150)])
def test_respiration_ridge_locks_on_neither_harmonics_nor_cardiac_subharmonics(breath, heart,
                                                                               rng):
    t = np.arange(int(90 * FS)) / FS
    x = breathing_signal(t, breath, heart) + 0.01 * rng.standard_normal(len(t))
    estimates = RateMonitor([("RESP", "resp")], FS, "resp-belt").update(x[:, None], t)
    r = rates(estimates)[len(estimates) // 4:]
    wrong = [2 * breath, breath / 2, heart / 2, heart / 3]
    assert np.mean(np.abs(r - breath) <= TOLERANCE_PER_MIN) >= 0.95
    for w in wrong:
        assert np.mean(np.abs(r - w) <= TOLERANCE_PER_MIN) == 0.0


def test_clipped_respiration_is_not_a_flat_line(rng):
    # Clipped at both rails for ~1.5 s per breath (as BIDMC record 05 is): the rate is
    # plain, so integrity must stay whole and the estimate be shown.
    t = np.arange(int(60 * FS)) / FS
    x = np.clip(1.6 * np.sin(2 * np.pi * 12 / 60 * t), -1.0, 1.0)
    monitor = RateMonitor([("RESP", "resp")], FS, "resp-belt")
    estimates = monitor.update(x[:, None], t)
    assert np.all(monitor.last_blocks[("rr", "RESP")].integrity == 1.0)
    r = rates(estimates)[len(estimates) // 4:]
    assert np.mean(np.abs(r - 12.0) <= TOLERANCE_PER_MIN) >= 0.9
    # A real flat line (sensor off for 20 s) still counts as stuck.
    x[int(20 * FS):int(40 * FS)] = 0.0
    monitor.reset()
    monitor.update(x[:, None], t)
    assert np.min(monitor.last_blocks[("rr", "RESP")].integrity) < 0.5


# ----------------------------------------------------------------- bad parameters


def test_bad_parameters_are_refused_with_one_clear_message():
    with pytest.raises(ParameterError, match=r"kind='resp' must be one of ppg, ecg"):
        R.beat_params("resp", FS)
    with pytest.raises(ParameterError, match=r"fs=20\.0 must be at least 40 Hz"):
        R.beat_params("ppg", 20.0)
    with pytest.raises(ParameterError, match=r"settings.quantity='hr' must be 'rr'"):
        R.PulseBreathing("p", "ppg", RateSettings(), FS)
    chain = R.PulseBreathing("p", "ppg", BREATHING_FROM_PULSE, FS)
    with pytest.raises(ParameterError, match=r"x.shape=\(3,\) and t.shape=\(2,\) must be"):
        chain.update(np.zeros(3), np.zeros(2))
    with pytest.raises(ParameterError, match=r"agreement_per_min=0.0 must be > 0"):
        dataclasses.replace(BREATHING, agreement_per_min=0.0)
    with pytest.raises(ParameterError, match=r"min_agreeing=4 must be 1, 2 or 3"):
        dataclasses.replace(BREATHING, min_agreeing=4)
    with pytest.raises(ParameterError, match=r"min_support=-1.0 must be in \[0, 3\]"):
        dataclasses.replace(BREATHING, min_support=-1.0)
    with pytest.raises(ParameterError, match=r"stuck_run_s=0.0 must be > 0"):
        dataclasses.replace(BREATHING, stuck_run_s=0.0)


def test_profiles_carry_pulse_breathing_settings():
    profile = get_profile("wrist")
    assert profile.breathing_from_pulse and profile.rr_pulse == BREATHING_FROM_PULSE
    assert profile.with_hop(0.5).rr_pulse.hop_s == 0.5
    assert profile.to_dict()["rr_pulse"]["deshape"] is False
