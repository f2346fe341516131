"""Causal pre-processing: the compiled chunk pass equals scipy over the whole record
and a plain-loop twin, after every update and for any chunking; the chains do what
they are designed for; bad data is flagged, never raised."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import signal

from estimators.errors import ParameterError
from estimators.preprocess import (
    LIMIT_BLOCK_S,
    MAX_ABS,
    NO_LIMIT,
    STUCK_RUN_S,
    Limiter,
    Preprocessor,
    design_chain,
    initial_state,
    limit_batch,
    limit_step,
    preprocess_batch,
    preprocess_step,
)
from tests import signals
from tests.reference import preprocess_loop

FS = 125.0


def dirty_signal(rng, n, kind="ppg"):
    """A pulse-like signal with a NaN burst, a lone inf, spikes of 1e6 to 1e308, a flat
    run and a clipped run."""
    t = np.arange(n) / FS
    shape = signals.ecg_like if kind == "ecg" else signals.dicrotic_pulse
    x = signals.rhythm(t, np.full(n, 75.0), shape, noise_std=0.1, rng=rng)
    x[n // 5:n // 5 + 40] = np.nan
    x[n // 3] = np.inf
    x[n // 3 + 7:n // 3 + 10] = [1e6, -1e15, 1e30]
    x[n // 3 + 500:n // 3 + 502] = [1e308, -1e308]
    x[n // 2:n // 2 + 60] = x[n // 2]  # flat line
    x[2 * n // 3:] = np.minimum(x[2 * n // 3:], 0.3)  # clipping at a rail
    return t, x


def chunks(rng, n):
    sizes = [1] * 9 + [0, 2, 3]
    while sum(sizes) < n:
        sizes.append(int(rng.integers(1, 300)))
    sizes[-1] -= sum(sizes) - n
    return sizes


def assert_analysis(got, want, label):
    scale = max(1e-300, float(np.max(np.abs(want["values"]), initial=0.0)))
    np.testing.assert_allclose(got.values, want["values"], rtol=0, atol=1e-12 * scale,
                               err_msg=f"values {label}")
    np.testing.assert_array_equal(got.timestamps, want["timestamps"], err_msg=label)
    np.testing.assert_array_equal(got.cum_rejected, want["cum_rejected"], err_msg=label)
    np.testing.assert_array_equal(got.cum_stuck, want["cum_stuck"], err_msg=label)


def as_dict(analysis):
    return {"values": analysis.values, "timestamps": analysis.timestamps,
            "cum_rejected": analysis.cum_rejected, "cum_stuck": analysis.cum_stuck}


@pytest.mark.parametrize("kind,quantity,decimation,window_s",
                         [("ppg", "hr", 5, 8.0), ("ecg", "hr", 5, 8.0), ("resp", "rr", 25, 32.0),
                          ("acc", "hr", 1, 8.0), ("ppg", "hr", 3, 8.0), ("ppg", "hr", 5, None)])
def test_streaming_equals_batch_and_loop_after_every_update(rng, kind, quantity, decimation,
                                                            window_s):
    """With the running range of the path's window (None: without one), chunks of every
    size including single samples."""
    n = 4000
    t, x = dirty_signal(rng, n, kind)
    limiter = NO_LIMIT if window_s is None else Limiter.for_window(window_s, FS)
    pre = Preprocessor(kind, quantity, FS, decimation, limiter)
    loop = preprocess_loop.preprocess(x, t, pre.chain, decimation, pre.min_run,
                                      None if window_s is None else limiter)
    batch = preprocess_batch(x, t, pre.chain, decimation, pre.min_run, limiter=limiter)
    assert_analysis(batch, loop, "batch vs loop")
    assert_analysis(pre.batch(x, t), loop, "Preprocessor.batch vs loop")
    got = []
    k = 0
    for size in chunks(rng, n):
        got.append(pre.update(x[k:k + size], t[k:k + size]))
        k += size
        so_far = SimpleNamespace(**{f: np.concatenate([getattr(a, f) for a in got]) for f in
                                    ("values", "timestamps", "cum_rejected", "cum_stuck")})
        done = k // decimation
        assert len(so_far.values) == done
        assert_analysis(so_far, {f: v[:done] for f, v in loop.items()}, f"after {k} samples")
    assert pre.state.count == n
    assert np.all(np.isfinite(np.concatenate([a.values for a in got])))


def test_zero_phase_batch_is_scipy_filtfilt(rng):
    t, x = dirty_signal(rng, 3000)
    x = np.nan_to_num(x, nan=0.0, posinf=0.0)
    x[np.abs(x) > 10.0] = 0.0  # the spikes: nothing for the batch path to reject
    chain = design_chain("ppg", "hr", FS, 25.0)
    out = preprocess_batch(x, t, chain, 5, 15, zero_phase=True)
    want = signal.sosfiltfilt(chain.pre, x)[4::5]
    np.testing.assert_allclose(out.values, want, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("n", [1, 2, 7, 20, 21, 22])
def test_zero_phase_batch_accepts_records_shorter_than_the_filter_padding(rng, n):
    """scipy's ``sosfiltfilt`` pads 3 (2 S + 1) samples at each edge (21 for the pulse
    chain) and refuses shorter records; the batch path shortens the padding instead."""
    chain = design_chain("ppg", "hr", FS, 25.0)
    x = rng.standard_normal(n)
    out = preprocess_batch(x, np.arange(n) / FS, chain, 1, 15, zero_phase=True)
    assert len(out.values) == n and np.all(np.isfinite(out.values))
    np.testing.assert_allclose(out.values, signal.sosfiltfilt(chain.pre, x, padlen=min(21, n - 1)),
                               rtol=1e-12, atol=1e-14)


def test_reset_starts_afresh(rng):
    t, x = dirty_signal(rng, 1000)
    pre = Preprocessor("ppg", "hr", FS, 5)
    first = pre.update(x, t)
    pre.reset()
    assert pre.state.count == 0
    again = pre.update(x, t)
    assert_analysis(again, as_dict(first), "after reset")


def test_step_returns_state_and_accepts_empty_chunks():
    chain = design_chain("ppg", "hr", FS, 25.0)
    state = initial_state(chain)
    state, out = preprocess_step(state, np.empty(0), np.empty(0), chain, 5, 15)
    assert len(out.values) == 0 and state.count == 0
    state, out = preprocess_step(state, np.ones(7), np.arange(7.0), chain, 5, 15)
    assert state.count == 7 and out.timestamps.tolist() == [4.0]


# ------------------------------------------------------------------- the chains


def gain_at(sos, fs, freq):
    _, h = signal.sosfreqz(sos, worN=[freq], fs=fs)
    return float(np.abs(h[0]))


def test_pulse_chain_keeps_the_heart_band_and_its_harmonics():
    chain = design_chain("ppg", "hr", FS, 25.0)
    assert chain.post is None and not chain.envelope
    # Butterworth pass band: gain ~1 well inside the edges (0.5-8 Hz), -3 dB at them;
    # an order-3 response still passes 94 % at 6 Hz (the 4th harmonic of 90 per minute).
    for f in (1.0, 2.0, 4.0):
        assert gain_at(chain.pre, FS, f) == pytest.approx(1.0, abs=0.01)
    assert gain_at(chain.pre, FS, 6.0) > 0.9
    assert gain_at(chain.pre, FS, 8.0) == pytest.approx(2 ** -0.5, abs=0.01)
    assert gain_at(chain.pre, FS, 0.5) == pytest.approx(2 ** -0.5, abs=0.01)
    assert gain_at(chain.pre, FS, 0.05) < 1e-2
    assert gain_at(chain.pre, FS, 30.0) < 0.05


def test_ecg_envelope_has_the_beat_rate_as_fundamental(rng):
    """The raw ECG-like beat has harmonics stronger than its fundamental; the energy
    envelope (band-pass, squared difference, low-pass) is a pulse train at the beat
    rate whose strongest in-band component is the fundamental."""
    rate = 66.0
    t = np.arange(int(40 * FS)) / FS
    x = signals.rhythm(t, np.full(len(t), rate), signals.ecg_like)
    amps = signals.harmonic_amplitudes(signals.ecg_like)
    assert amps[1] > amps[0]
    pre = Preprocessor("ecg", "hr", FS, 5)
    y = pre.update(x, t).values[200:]  # after the filters settle
    spectrum = np.abs(np.fft.rfft((y - y.mean()) * np.hanning(len(y))))
    freqs = np.fft.rfftfreq(len(y), 1 / 25.0)
    band = (freqs > 0.5) & (freqs < 200 / 60)
    peak_hz = freqs[band][np.argmax(spectrum[band])]
    assert peak_hz == pytest.approx(rate / 60, abs=freqs[1])


def test_respiration_chain_passes_breathing_band():
    chain = design_chain("resp", "rr", FS, 5.0)
    assert gain_at(chain.pre, FS, 0.25) == pytest.approx(1.0, abs=0.05)
    assert gain_at(chain.pre, FS, 0.005) < 0.02


def test_stuck_run_length_follows_the_sampling_rate():
    assert Preprocessor("ppg", "hr", 125.0, 5).min_run == round(STUCK_RUN_S * 125.0)
    assert Preprocessor("ppg", "hr", 10.0, 1).min_run == 3  # never shorter than 3


def test_flat_and_nonfinite_samples_are_counted(rng):
    n = 2000
    t = np.arange(n) / FS
    x = rng.standard_normal(n)
    x[100:150] = np.nan          # 50 non-finite
    x[400:500] = 2.5             # 100 identical: stuck from the min_run-th on
    pre = Preprocessor("ppg", "hr", FS, 1)
    out = pre.update(x, t)
    assert out.cum_rejected[-1] == 50
    assert out.cum_stuck[-1] == 100 - pre.min_run + 1


# ------------------------------------------------------------------ the running range


def pulse(rng, seconds, rate=75.0, shape=signals.dicrotic_pulse, noise=0.05):
    t = np.arange(int(seconds * FS)) / FS
    return t, signals.rhythm(t, np.full(len(t), rate), shape, noise_std=noise, rng=rng)


@pytest.mark.parametrize("amplitude", [1e6, 1e15, 1e30, 1e308])
def test_spikes_are_rejected_and_counted_and_the_filters_stay_finite(rng, amplitude):
    """Three samples of +-amplitude after the range is learnt: exactly they are rejected
    (held at the last accepted value, counted), and the filtered signal equals that of
    the record with those three samples replaced by the held value."""
    t, x = pulse(rng, 20.0)
    k = int(12.0 * FS)
    spiky = x.copy()
    spiky[k:k + 3] = [amplitude, -amplitude, amplitude]
    held = x.copy()
    held[k:k + 3] = x[k - 1]
    for kind in ("ppg", "ecg"):
        pre = Preprocessor(kind, "hr", FS, 5, Limiter.for_window(8.0, FS))
        out = pre.update(spiky, t)
        assert np.all(np.isfinite(out.values))
        assert out.cum_rejected[-1] == 3
        clean = Preprocessor(kind, "hr", FS, 5, NO_LIMIT).update(held, t)
        np.testing.assert_allclose(out.values, clean.values, rtol=1e-12, atol=1e-15)


def test_samples_beyond_max_abs_are_rejected_from_the_first_sample(rng):
    """No history is needed to refuse a value no signal can have: the filters never see
    it, even before the range is learnt."""
    t, x = pulse(rng, 3.0)
    x[[0, 5, 6]] = [1e308, -1e200, 2 * MAX_ABS]
    x[7] = MAX_ABS  # the bound itself is accepted
    accepted = limit_batch(Limiter.for_window(8.0, FS), x)
    assert np.flatnonzero(~accepted).tolist() == [0, 5, 6]
    out = Preprocessor("ecg", "hr", FS, 5, NO_LIMIT).update(x, t)
    assert np.all(np.isfinite(out.values)) and out.cum_rejected[-1] == 3


@pytest.mark.parametrize("kind,shape,rate,window_s", [
    ("ppg", signals.dicrotic_pulse, 75.0, 8.0), ("ppg", signals.sharp_pulse, 40.0, 8.0),
    ("ecg", signals.ecg_like, 30.0, 8.0), ("ecg", signals.ecg_like, 180.0, 8.0),
    ("resp", signals.dicrotic_pulse, 4.0, 32.0), ("resp", signals.dicrotic_pulse, 40.0, 32.0)])
def test_clean_rhythms_lose_no_sample(rng, kind, shape, rate, window_s):
    """A clean rhythm at the slow and fast ends of its band, whose amplitude and level
    also drift by half over the record, keeps every sample: the range never rejects
    normal signal (ECG at 30 per minute: a narrow R wave in one block of eight)."""
    t = np.arange(int(120 * FS)) / FS
    drift = 1.0 + 0.5 * np.sin(2 * np.pi * t / 60.0)
    x = drift * signals.rhythm(t, np.full(len(t), rate), shape, noise_std=0.02, rng=rng) \
        + 0.5 * np.sin(2 * np.pi * t / 45.0)
    assert limit_batch(Limiter.for_window(window_s, FS), x).all()


def test_a_lasting_jump_is_rejected_for_at_most_rank_blocks_then_followed(rng):
    """A sensor re-seated far off the old level: rejected (held) until the third block of
    the new level completes, then followed; the old level's blocks need not leave the
    memory first."""
    t, x = pulse(rng, 30.0)
    k = int(15.0 * FS) + 7  # inside a block
    x[k:] += 500.0
    limiter = Limiter.for_window(8.0, FS)
    accepted = limit_batch(limiter, x)
    first_block_after = (k // limiter.block + 1) * limiter.block
    rejected = np.flatnonzero(~accepted)
    assert rejected[0] == k and accepted[:k].all()
    # The block holding the jump and the next two complete the third block of the new level.
    assert rejected[-1] == first_block_after + 2 * limiter.block - 1
    assert accepted[rejected[-1] + 1:].all()


def test_limit_step_equals_limit_batch_for_any_chunking(rng):
    t, x = dirty_signal(rng, 5000)
    limiter = Limiter.for_window(8.0, FS)
    want = limit_batch(limiter, x)
    state = limiter.initial_state()
    got, k = [], 0
    for size in chunks(rng, len(x)):
        got.append(limit_step(limiter, state, x[k:k + size]))
        k += size
    np.testing.assert_array_equal(np.concatenate(got), want)
    assert (~want).sum() >= 45  # the NaN burst, the inf, the five spikes


def test_limiter_learns_over_one_window():
    assert LIMIT_BLOCK_S == 0.25
    assert Limiter.for_window(8.0, 125.0) == Limiter(31, 32)
    assert Limiter.for_window(32.0, 125.0) == Limiter(31, 128)
    assert Limiter.for_window(8.0, 2.0) == Limiter(1, 32)  # never shorter than a sample
    with pytest.raises(ParameterError, match=r"limiter Limiter\(block=4, blocks=2, rank=3, "
                                             r"margin=6.0\) must have block >= 0, blocks >= "
                                             r"rank >= 1 and margin >= 0"):
        Limiter(4, blocks=2)


# ------------------------------------------------------------------ parameter errors


def test_design_chain_errors():
    with pytest.raises(ParameterError, match=r"fs=0.0 must be a finite rate > 0 Hz"):
        design_chain("ppg", "hr", 0.0, 25.0)
    with pytest.raises(ParameterError, match=r"fs=nan must be a finite rate > 0 Hz"):
        design_chain("ppg", "hr", float("nan"), 25.0)
    with pytest.raises(ParameterError, match=r"fs=30.0 Hz is too low for ECG \(need >= 40 Hz\)"):
        design_chain("ecg", "hr", 30.0, 30.0)
    with pytest.raises(ParameterError,
                       match=r"no pre-processing for kind='resp', quantity='hr'"):
        design_chain("resp", "hr", FS, 25.0)
    with pytest.raises(ParameterError,
                       match=r"no pre-processing for kind='ppg', quantity='rr'"):
        design_chain("ppg", "rr", FS, 5.0)
    with pytest.raises(ParameterError, match=r"fs=1.0 Hz is too low for a 0.5-0.4 Hz band"):
        design_chain("ppg", "hr", 1.0, 1.0)
