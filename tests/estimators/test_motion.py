"""Motion stage (accelerometer-aided suppression): the compiled canceller against a
plain numpy twin after every update, chunk invariance, each step's formula, the settings'
errors, and the whole exercise profile on synthetic running signals whose cadence
crosses the heart rate."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from estimators import motion
from estimators.config import PROFILES, RateSettings, get_profile
from estimators.errors import ParameterError
from estimators.evidence import FEATURES
from estimators.monitor import FUSED, RateMonitor, offline_estimates

FS = 125.0
EXERCISE = get_profile("exercise-wrist")
BAND = slice(40, 300)  # a band of bins for the unit tests (any slice inside n_bins)


# ----------------------------------------------------------------------- twins


def cancel_twin(x, y, forget, loading, independent_hops, gate):
    """Plain numpy version of :func:`motion.cancel_columns`: the same recursion with
    ``numpy.linalg.solve`` per bin (obviously correct, slow)."""
    n_hops, n_bins = x.shape
    n_refs = y.shape[2]
    cov = np.zeros((n_bins, n_refs, n_refs), complex)
    cross = np.zeros((n_bins, n_refs), complex)
    power = np.zeros(n_bins)
    count = 0.0
    out = np.empty_like(x)
    gates = np.empty(x.shape)
    eye = np.eye(n_refs)
    for p in range(n_hops):
        count = forget * count + 1.0
        chance = min(1.0, n_refs / (1.0 + count / independent_hops))
        yp = y[p]
        cov = forget * cov + np.conj(yp)[:, :, None] * yp[:, None, :]
        cross = forget * cross + np.conj(yp) * x[p][:, None]
        power = forget * power + np.abs(x[p]) ** 2
        load = loading * np.real(np.trace(cov, axis1=1, axis2=2)) / n_refs + motion.TINY
        w = np.linalg.solve(cov + load[:, None, None] * eye, cross[:, :, None])[:, :, 0]
        explained = np.real((np.conj(cross) * w).sum(axis=1))
        with np.errstate(invalid="ignore", divide="ignore"):
            coherence = np.where(power > 0, explained / power, 0.0)
        coherence = np.clip(coherence, 0.0, 1.0)
        corrected = (coherence - chance) / (1.0 - chance) if chance < 1 else 0.0 * coherence
        g = np.clip((corrected - gate[0]) / (gate[1] - gate[0]), 0.0, 1.0)
        out[p] = x[p] - g * (w * yp).sum(axis=1)
        gates[p] = g
    return out, gates


def random_columns(rng, n_hops, n_bins, n_refs, coherent=None):
    """Random complex columns where the PPG holds a fixed linear mix of the references
    plus independent noise; the coherent share is random per bin unless given."""
    if coherent is None:
        coherent = rng.random(n_bins)
    y = rng.standard_normal((n_hops, n_bins, n_refs)) + 1j * rng.standard_normal(
        (n_hops, n_bins, n_refs))
    mix = rng.standard_normal((n_bins, n_refs)) + 1j * rng.standard_normal((n_bins, n_refs))
    noise = rng.standard_normal((n_hops, n_bins)) + 1j * rng.standard_normal((n_hops, n_bins))
    x = coherent * (y * mix[None]).sum(axis=2) + (1 - coherent) * noise
    return x, y


def chunks(rng, n):
    """Random chunk boundaries covering ``range(n)``, single hops included."""
    edges, k = [0], 0
    while k < n:
        k = min(n, k + int(rng.choice([1, 1, 2, 3, 7, 13])))
        edges.append(k)
    return list(zip(edges[:-1], edges[1:]))


def params(**changes):
    settings = dataclasses.replace(EXERCISE.hr, **changes)
    return motion.motion_params(settings, BAND, 1024, settings.hop_s)


# ----------------------------------------------------------- step 1: canceller


@pytest.mark.parametrize("n_refs", [1, 2, 3])
def test_canceller_matches_numpy_twin_after_every_update(rng, n_refs):
    # A short memory and windows taken as independent every 2 hops keep the chance
    # coherence low enough for the gate to move within 60 hops.
    p = dataclasses.replace(params(motion_memory_s=4.0, motion_coherence_gate=(0.1, 0.6)),
                            independent_hops=2.0)
    n_bins = p.n_bins - p.band.start
    x, y = random_columns(rng, 60, n_bins, n_refs)
    want, want_gate = cancel_twin(x, y, p.forget, p.loading, p.independent_hops, p.gate)
    assert 0.05 < want_gate.mean() < 0.95  # the gate is neither shut nor wide open
    state = motion.initial_state(p, n_refs)
    for a, b in chunks(rng, len(x)):
        got = np.empty_like(x[a:b])
        gate = np.empty(got.shape)
        motion.cancel_columns(state.cov, state.cross, state.power, state.count,
                              np.ascontiguousarray(x[a:b]), np.ascontiguousarray(y[a:b]),
                              p.forget, p.loading, p.independent_hops, p.gate[0], p.gate[1],
                              got, gate)
        np.testing.assert_allclose(got, want[a:b], rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(gate, want_gate[a:b], rtol=1e-9, atol=1e-9)


def test_canceller_plain_path_equals_compiled(rng):
    p = params()
    x, y = random_columns(rng, 12, 30, 2)
    outs = []
    for fn in (motion.cancel_columns, motion.cancel_columns.py_func):
        state = motion.initial_state(dataclasses.replace(p, n_bins=30 + p.band.start), 2)
        out, gate = np.empty_like(x), np.empty(x.shape)
        fn(state.cov, state.cross, state.power, state.count, x, y, p.forget, p.loading,
           p.independent_hops, p.gate[0], p.gate[1], out, gate)
        outs.append((out, gate))
    np.testing.assert_allclose(outs[0][0], outs[1][0], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(outs[0][1], outs[1][1], rtol=1e-12, atol=1e-12)


def test_coherent_motion_is_removed_and_incoherent_power_kept(rng):
    # A 30 s memory holds about eight nearly independent windows, so the chance coherence
    # of three references (3 / 8) leaves the gate free to open fully; the profile's
    # shorter memory (cross-validated) trades some of that for a faster follow.
    p = params(motion_memory_s=30.0)
    n_bins = p.n_bins
    n_hops = 400  # 100 s at 0.25 s: long past the chance-coherence warm-up
    shape = (n_hops, n_bins)
    y = rng.standard_normal(shape + (3,)) + 1j * rng.standard_normal(shape + (3,))
    moving = (y * np.array([0.7, -0.4j, 0.2])).sum(axis=2)
    pulse = 0.1 * (rng.standard_normal(shape) + 1j * rng.standard_normal(shape))
    state = motion.initial_state(p, 3)
    _, residual, gate = motion.cancel_step(state, moving + pulse, y, p)
    late, inside = slice(200, None), slice(p.band.start, None)
    assert gate[late, inside].mean() > 0.95
    # The diagonal loading shrinks the weights by about 1 / (1 + loading): what is left
    # of the motion is near (loading / (1 + loading))^2 = 0.8 % of its power.
    left = residual - pulse
    share = (np.abs(left[late, inside]) ** 2).mean() / (np.abs(moving[late, inside]) ** 2).mean()
    assert share < 0.015
    # The incoherent part (the pulse) is what remains.
    kept = np.real(np.vdot(pulse[late, inside], residual[late, inside])) \
        / np.vdot(pulse[late, inside], pulse[late, inside]).real
    assert kept == pytest.approx(1.0, abs=0.1)
    # Bins below the band are left as they were.
    np.testing.assert_array_equal(residual[:, :p.band.start], (moving + pulse)[:, :p.band.start])


def test_incoherent_reference_opens_no_gate(rng):
    p = params()
    n_hops, n_bins = 300, p.n_bins
    y = rng.standard_normal((n_hops, n_bins, 3)) + 1j * rng.standard_normal((n_hops, n_bins, 3))
    x = rng.standard_normal((n_hops, n_bins)) + 1j * rng.standard_normal((n_hops, n_bins))
    state = motion.initial_state(p, 3)
    _, residual, gate = motion.cancel_step(state, x, y, p)
    # Chance coherence of 3 references is corrected for: the gate stays nearly shut.
    assert gate[:, p.band.start:].mean() < 0.05
    change = np.abs(residual - x)[:, p.band.start:].mean() / np.abs(x).mean()
    assert change < 0.05


def test_no_reference_or_no_memory_leaves_columns(rng):
    x, y = random_columns(rng, 5, params().n_bins, 2)
    for p, refs in ((params(), y[:, :, :0]), (params(motion_memory_s=0.0), y)):
        state = motion.initial_state(p, refs.shape[2])
        _, residual, gate = motion.cancel_step(state, x, refs, p)
        np.testing.assert_array_equal(residual, x)
        assert not gate.any()


# ----------------------------------------------------- steps 2 and 3, motion lines


def test_gain_follows_its_formula_in_any_chunking(rng):
    p = params(motion_gain=1.5)
    n_hops, n_bins = 40, p.n_bins
    mag = rng.random((n_hops, n_bins))
    ref = rng.random((n_hops, n_bins))
    a = p.gain_smoothing
    cleaned = mag / mag[:, p.band].max(axis=1, keepdims=True)
    ppg_mean, acc_mean = np.zeros(n_bins), np.zeros(n_bins)
    want = []
    for i in range(n_hops):
        ppg_mean = (1 - a) * ppg_mean + a * cleaned[i]
        acc_mean = (1 - a) * acc_mean + a * ref[i]
        g = cleaned[i] * ppg_mean / (ppg_mean + 1.5 * acc_mean)
        want.append(g / g[p.band].max())
    want = np.array(want)
    state = motion.initial_state(p, 0)
    for lo, hi in chunks(rng, n_hops):
        state, got = motion.gain_step(state, mag[lo:hi], ref[lo:hi], p)
        np.testing.assert_allclose(got, want[lo:hi], rtol=1e-12)


def test_gain_weight_zero_only_normalises(rng):
    p = params(motion_gain=0.0)
    mag = rng.random((6, p.n_bins))
    _, got = motion.gain_step(motion.initial_state(p, 0), mag, rng.random(mag.shape), p)
    np.testing.assert_allclose(got, mag / mag[:, p.band].max(axis=1, keepdims=True))


def test_harmonic_support_formula_and_the_stronger_second_harmonic():
    p = params(harmonic_weight=0.75)
    bins = p.band_bins
    mag = np.zeros((1, p.n_bins))
    fundamental = bins[20]
    mag[0, fundamental] = 0.8      # as SPC 2015 record 03 at rest: the harmonic is larger
    mag[0, 2 * fundamental] = 1.0
    h = motion.harmonic_support(mag, p)
    assert bins[np.argmax(h[0])] == fundamental
    # The formula, bin by bin, normalised to a peak of 1.
    double = np.where(2 * bins < p.n_bins, mag[0, np.minimum(2 * bins, p.n_bins - 1)], 0.0)
    direct = mag[0, bins] + 0.75 * np.minimum(p.harmonic_cap * mag[0, bins], double)
    np.testing.assert_allclose(h[0], direct / direct.max())
    # Without the harmonic term the doubled rate wins.
    plain = motion.harmonic_support(mag, params(harmonic_weight=0.0))
    assert bins[np.argmax(plain[0])] == 2 * fundamental


def test_harmonic_support_needs_a_peak_at_the_fundamental():
    """Running: the pulse at f, motion residue (the arm swing) at f / 2 with 40 % of the
    pulse's level. The plain harmonic sum would make f / 2 the peak (0.4 + 0.75 > 1);
    the harmonic only supports a fundamental up to 1.5 times its own level, so f stays
    the peak (0.4 + 0.75 * 0.6 < 1)."""
    p = params(harmonic_weight=0.75, harmonic_cap=1.5)
    bins = p.band_bins
    pulse = bins[60]
    assert pulse % 2 == 0 and pulse // 2 in bins
    mag = np.zeros((1, p.n_bins))
    mag[0, pulse] = 1.0
    mag[0, pulse // 2] = 0.4
    h = motion.harmonic_support(mag, p)
    assert bins[np.argmax(h[0])] == pulse


def test_motion_lines_mark_strong_peaks_only():
    p = params(motion_line_ratio=(10.0, 40.0))
    ref = np.ones((2, p.n_bins))
    ref[0, p.band.start + 50] = 25.0    # halfway between the start and full marks
    ref[0, p.band.start + 90] = 100.0   # a line
    ref[1] = 0.0                        # no reference: no lines
    lines = motion.motion_lines(ref, p)
    assert lines.shape == (2, p.band.stop - p.band.start)
    assert lines[0, 50] == pytest.approx(0.5)
    assert lines[0, 90] == 1.0
    assert np.count_nonzero(lines[0]) == 2
    assert not lines[1].any()


def test_overlap_confidence_lowers_only_rates_on_lines():
    grid = 40.0 + 0.75 * np.arange(100)
    lines = np.zeros((3, 100))
    lines[:, 40] = 1.0
    conf = np.array([0.8, 0.8, 0.8])
    rate = np.array([grid[40] + 0.2, grid[10], np.nan])
    got = motion.overlap_confidence(conf, rate, lines, grid, 0.5)
    np.testing.assert_allclose(got, [0.4, 0.8, 0.8])
    np.testing.assert_allclose(motion.overlap_confidence(conf, rate, lines, grid, 0.0), conf)


# ------------------------------------------------------------------ suppressor


def stft_columns(rng, n_hops, n_bins, n_refs):
    x, y = random_columns(rng, n_hops, n_bins, n_refs)
    return x, y


def test_suppressor_is_chunk_invariant(rng):
    settings = EXERCISE.hr
    n_fft = 2048
    band = slice(60, 300)
    x, y = stft_columns(rng, 50, n_fft // 2 + 1, 3)
    whole = motion.MotionSuppressor(settings, band, n_fft, 3)
    want_s, want_l = whole.update(x, y)
    parts = motion.MotionSuppressor(settings, band, n_fft, 3)
    for a, b in chunks(rng, len(x)):
        got_s, got_l = parts.update(x[a:b], y[a:b])
        np.testing.assert_allclose(got_s, want_s[a:b], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(got_l, want_l[a:b], rtol=1e-10, atol=1e-12)
    parts.reset()
    again_s, _ = parts.update(x, y)
    np.testing.assert_allclose(again_s, want_s, rtol=1e-12)


def test_suppressor_errors(rng):
    with pytest.raises(ParameterError, match=r"n_refs=-1 must be >= 0"):
        motion.MotionSuppressor(EXERCISE.hr, slice(60, 300), 2048, -1)
    sup = motion.MotionSuppressor(EXERCISE.hr, slice(60, 300), 2048, 3)
    x, y = stft_columns(rng, 4, 1025, 2)
    with pytest.raises(ParameterError, match=r"acc_columns.shape=\(4, \d+, 2\) must be "
                                             r"\(4, F, 3\)"):
        sup.update(x, y)


@pytest.mark.parametrize("change, message", [
    (dict(motion_memory_s=0.3), r"motion_memory_s=0.3 must be 0 \(off\) or >= 2 hops"),
    (dict(motion_loading=0.0), r"motion_loading=0.0 must be > 0"),
    (dict(motion_coherence_gate=(0.8, 0.3)),
     r"motion_coherence_gate=\(0.8, 0.3\) must be \(low, high\) with 0 <= low < high <= 1"),
    (dict(motion_coherence_gate=(0.1,)), r"motion_coherence_gate=\(0.1,\) must be"),
    (dict(motion_gain=-1.0), r"motion_gain=-1.0 must be >= 0"),
    (dict(motion_smoothing_s=0.0), r"motion_smoothing_s=0.0 must be > 0"),
    (dict(harmonic_weight=-0.1), r"harmonic_weight=-0.1 must be >= 0"),
    (dict(motion_line_ratio=(5.0, 5.0)),
     r"motion_line_ratio=\(5.0, 5.0\) must be \(start, full\) with 0 < start < full"),
    (dict(motion_confidence_penalty=1.5), r"motion_confidence_penalty=1.5 must be in \[0, 1\]"),
])
def test_settings_errors(change, message):
    with pytest.raises(ParameterError, match=message):
        RateSettings(**change)


def test_only_the_exercise_profile_uses_the_motion_stage(rng):
    assert EXERCISE.hr.motion and EXERCISE.hr.band_per_min[1] >= 220.0
    for name, profile in PROFILES.items():
        if name != "exercise-wrist":
            assert not profile.hr.motion, name
    t = np.arange(int(12 * FS)) / FS
    x = np.column_stack([np.sin(2 * np.pi * 1.3 * t), rng.standard_normal(len(t))])
    monitor = RateMonitor([("ppg", "ppg"), ("ax", "acc")], FS, "wrist")
    monitor.update(x, t)
    assert monitor.motion == {}
    assert monitor.last_blocks[("hr", "ppg")].columns is None
    assert monitor.last_blocks[("hr", "ppg")].motion_lines is None


# ------------------------------------------------- the profile on running signals


def running_wrist(rng, rate_fn, cadence_fn, duration_s=150.0, motion_gain=3.0):
    """Two wrist PPG channels and three accelerometer axes during running.

    The pulse has a second harmonic (a PPG is not a sine); the motion is a
    non-sinusoidal periodic signal at the step cadence with harmonics 2 and 3 that
    differ between axes; each PPG carries its own linear mix of the axes (one delayed by
    a few samples) at ``motion_gain`` times the pulse's amplitude, plus noise."""
    n = int(duration_s * FS)
    t = np.arange(n) / FS
    phi = 2 * np.pi * np.cumsum(rate_fn(t) / 60.0) / FS
    psi = 2 * np.pi * np.cumsum(cadence_fn(t) / 60.0) / FS
    pulse = np.sin(phi) + 0.5 * np.sin(2 * phi + 0.8)
    ax = np.sin(psi) + 0.6 * np.sin(2 * psi + 0.3) + 0.3 * np.sin(3 * psi + 1.0)
    ay = np.sin(psi + 0.5) + 0.2 * np.sin(2 * psi + 2.0) + 0.4 * np.sin(3 * psi)
    az = 0.3 * np.sin(psi + 1.2)
    ppg1 = pulse + motion_gain * (0.7 * ax + 0.5 * np.roll(ay, 5)) + 0.2 * rng.standard_normal(n)
    ppg2 = 0.8 * pulse + motion_gain * (0.5 * ax + 0.8 * np.roll(ay, 3)) \
        + 0.2 * rng.standard_normal(n)
    acc = np.column_stack([ax, ay, az]) + 0.05 * rng.standard_normal((n, 3))
    return t, np.column_stack([ppg1, ppg2, acc])


ALL = [("ppg1", "ppg"), ("ppg2", "ppg"), ("ax", "acc"), ("ay", "acc"), ("az", "acc")]
WARM_UP_S = 20.0
"""The canceller fits three weights per bin from nearly independent windows (half a
window apart): until about 2.5 windows' worth of them are in its memory the chance
coherence of three references stays high and the gate shut, so the first seconds of a
record that starts mid-run are not counted."""

CROSSINGS = {
    # rate and cadence as functions of time: the cadence (three times the pulse's
    # amplitude) crosses the heart rate mid-record in each.
    "both move": (lambda t: 95.0 + t / 3.0, lambda t: 165.0 - 0.4 * t),
    "steady cadence": (lambda t: 120.0 + t / 3.0, lambda t: 150.0 + 0.0 * t),
    "steady heart rate": (lambda t: 140.0 + 0.0 * t, lambda t: 170.0 - 0.4 * t),
}


def heart(estimates, source):
    est = [e for e in estimates if e.quantity == "hr" and e.source == source]
    return (np.array([e.time_s for e in est]), np.array([e.rate_per_min for e in est]),
            np.array([e.confidence for e in est]))


@pytest.mark.parametrize("case", sorted(CROSSINGS))
def test_a_cadence_crossing_the_heart_rate_is_tracked(rng, case):
    rate_fn, cadence_fn = CROSSINGS[case]
    t, x = running_wrist(rng, rate_fn, cadence_fn)
    time_s, rate, _ = heart(RateMonitor(ALL, FS, EXERCISE).update(x, t), FUSED)
    counted = time_s > WARM_UP_S
    crossing = counted & (np.abs(rate_fn(time_s) - cadence_fn(time_s)) < 10.0)
    assert crossing.sum() > 40  # the crossing is inside the counted part
    within = np.abs(rate - rate_fn(time_s)) < 5.0
    assert within[counted].mean() >= 0.9
    assert within[crossing].mean() >= 0.9
    # Without the accelerometer the stronger cadence wins: the references make the
    # difference.
    t2, x2 = running_wrist(np.random.default_rng(1), rate_fn, cadence_fn)
    time2, rate2, _ = heart(RateMonitor(ALL[:2], FS, EXERCISE).update(x2[:, :2], t2), FUSED)
    assert (np.abs(rate2 - rate_fn(time2)) < 5.0)[time2 > WARM_UP_S].mean() < 0.5


def test_a_wrong_lock_on_the_cadence_is_left(rng):
    # A record that starts mid-run: before the canceller has its references' statistics
    # the stronger cadence wins; the tracker must leave it once the pulse is clean.
    # Motion five times the pulse: at three times, the profile's motion gain (2 since
    # the leave-one-record-out choice of this round) keeps the cadence off from the
    # start, and there is no wrong lock to leave.
    rate_fn, cadence_fn = CROSSINGS["both move"]
    t, x = running_wrist(rng, rate_fn, cadence_fn, duration_s=60.0, motion_gain=5.0)
    time_s, rate, _ = heart(RateMonitor(ALL, FS, EXERCISE).update(x, t), FUSED)
    early = time_s < 12.0
    assert (np.abs(rate - cadence_fn(time_s)) < 5.0)[early].mean() > 0.5  # locked wrong
    within = np.abs(rate - rate_fn(time_s)) < 5.0
    assert within[time_s > WARM_UP_S].all()  # and recovered for good


def test_the_evidence_marks_where_pulse_and_cadence_overlap(rng):
    """Where the pulse sits on the cadence the evidence carries the motion-line mark
    (a measure the calibrated confidence weighs, estimators.evidence). The confidence
    itself is the calibrated probability of being within tolerance: on this crossing
    the rate stays right (see the crossing tests), so it must stay high there too
    rather than fall for the overlap alone."""
    rate_fn, cadence_fn = CROSSINGS["steady heart rate"]
    t, x = running_wrist(rng, rate_fn, cadence_fn)
    estimates = [e for e in RateMonitor(ALL, FS, EXERCISE).update(x, t)
                 if e.quantity == "hr" and e.source == FUSED]
    time_s = np.array([e.time_s for e in estimates])
    rate = np.array([e.rate_per_min for e in estimates])
    confidence = np.array([e.confidence for e in estimates])
    mark = np.array([e.evidence[FEATURES.index("motion_mark")] for e in estimates])
    gap = np.abs(rate_fn(time_s) - cadence_fn(time_s))
    counted = time_s > WARM_UP_S
    on_line = counted & (gap < 3.0)
    apart = counted & (gap > 15.0)
    assert on_line.sum() > 10 and apart.sum() > 100
    assert mark[on_line].mean() > 0.5 and mark[apart].mean() < 0.1
    right = np.abs(rate - rate_fn(time_s)) < 5.0
    assert right[on_line].all()
    assert np.mean(confidence[on_line] >= 0.8) >= 0.9


def test_monitor_with_motion_is_chunk_invariant(rng):
    rate_fn, cadence_fn = CROSSINGS["both move"]
    t, x = running_wrist(rng, rate_fn, cadence_fn, duration_s=30.0)
    whole = RateMonitor(ALL, FS, EXERCISE).update(x, t)
    monitor = RateMonitor(ALL, FS, EXERCISE)
    parts, k = [], 0
    while k < len(t):
        n = int(rng.integers(1, 400))
        parts.extend(monitor.update(x[k:k + n], t[k:k + n]))
        k += n
    assert len(parts) == len(whole) > 0
    for a, b in zip(whole, parts):
        assert (a.source, a.time_s) == (b.source, b.time_s)
        np.testing.assert_allclose([a.rate_per_min, a.confidence, a.quality],
                                   [b.rate_per_min, b.confidence, b.quality],
                                   rtol=1e-9, atol=1e-9)


def test_offline_twin_uses_the_motion_stage(rng):
    rate_fn, cadence_fn = CROSSINGS["steady cadence"]
    t, x = running_wrist(rng, rate_fn, cadence_fn, duration_s=90.0)
    time_s, rate, _ = heart(offline_estimates(x, t, ALL, FS, EXERCISE), FUSED)
    counted = time_s > WARM_UP_S
    assert (np.abs(rate - rate_fn(time_s)) < 5.0)[counted].mean() >= 0.9
