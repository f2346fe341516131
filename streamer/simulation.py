"""Synthetic physiological signals with known rates (for the demo session, `simulate`,
tests and benchmarks).

Everything here is synthetic and says so. The scenario of the demo session is a
**cycling bench trial** of our own design: seated rest, a pedalling warm-up, a ramp,
two hard intervals with easy spells between, and recovery. Heart rate, breathing rate
and pedalling cadence follow smooth schedules; the signals are built from them:

* fingertip PPG: a systolic wave plus a delayed dicrotic wave per beat (so the wave is
  not a cosine and has strong harmonics), amplitude and baseline modulated by
  breathing, a small motion artifact at the pedalling cadence, coloured noise;
* ECG: P, QRS and T waves as Gaussians per beat, baseline wander from breathing;
* respiration belt: an asymmetric breath (faster inspiration than expiration);
* one accelerometer axis: the pedalling cadence with two harmonics.

Beat and breath times are integrated from the instantaneous rates, so the ground truth
is exact: :func:`cycling_trial` returns it with the signals.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# (time_s, heart rate bpm, breathing /min, cadence rpm): the schedule's knots.
CYCLING_SCHEDULE = (
    (0.0, 68.0, 12.0, 0.0),
    (40.0, 70.0, 12.0, 0.0),
    (50.0, 88.0, 15.0, 70.0),
    (100.0, 95.0, 16.0, 75.0),
    (160.0, 140.0, 26.0, 90.0),
    (170.0, 150.0, 30.0, 95.0),
    (200.0, 152.0, 30.0, 95.0),
    (215.0, 120.0, 22.0, 70.0),
    (245.0, 115.0, 20.0, 70.0),
    (255.0, 155.0, 32.0, 100.0),
    (285.0, 160.0, 34.0, 100.0),
    (300.0, 120.0, 24.0, 0.0),
    (360.0, 92.0, 16.0, 0.0),
)


@dataclass(frozen=True)
class Synthetic:
    """Signals (n, channels), channel names and kinds, timestamps, and ground truth."""

    timestamps: np.ndarray
    samples: np.ndarray
    names: tuple
    kinds: tuple
    units: tuple
    hr_bpm: np.ndarray
    rr_per_min: np.ndarray
    cadence_rpm: np.ndarray
    beat_times: np.ndarray
    breath_times: np.ndarray


def _events(phase_cycles: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Times where the cumulative phase crosses whole cycles (linear interpolation)."""
    k = np.floor(phase_cycles)
    idx = np.nonzero(np.diff(k) > 0)[0]
    frac = (k[idx + 1] - phase_cycles[idx]) / (phase_cycles[idx + 1] - phase_cycles[idx])
    return t[idx] + frac * (t[idx + 1] - t[idx])


def _coloured_noise(rng, n: int, fs: float, corner_hz: float) -> np.ndarray:
    from scipy.signal import butter, sosfilt
    sos = butter(1, corner_hz, fs=fs, output="sos")
    noise = sosfilt(sos, rng.standard_normal(n))
    return noise / (noise.std() + 1e-12)


def cycling_trial(fs: float = 125.0, duration_s: float | None = None, seed: int = 7,
                  schedule=CYCLING_SCHEDULE) -> Synthetic:
    """The synthetic cycling bench trial sampled at ``fs`` Hz."""
    knots = np.array(schedule, dtype=np.float64)
    end = knots[-1, 0] if duration_s is None else duration_s
    t = np.arange(int(round(end * fs))) / fs
    hr = np.interp(t, knots[:, 0], knots[:, 1])
    rr = np.interp(t, knots[:, 0], knots[:, 2])
    cad = np.interp(t, knots[:, 0], knots[:, 3])
    rng = np.random.default_rng(seed)
    breath_phase = np.cumsum(rr / 60.0) / fs
    resp_wave = np.sin(2 * np.pi * breath_phase)
    # Respiratory sinus arrhythmia: heart rate rises on inspiration by a few bpm.
    hr_inst = hr + 2.0 * resp_wave
    beat_phase = np.cumsum(hr_inst / 60.0) / fs
    cad_phase = np.cumsum(cad / 60.0) / fs
    pos = beat_phase % 1.0
    systolic = np.exp(-0.5 * ((pos - 0.18) / 0.06) ** 2)
    dicrotic = 0.45 * np.exp(-0.5 * ((pos - 0.45) / 0.07) ** 2)
    ppg = (1.0 + 0.15 * resp_wave) * (systolic + dicrotic) + 0.2 * resp_wave
    ppg += 0.12 * np.sin(2 * np.pi * cad_phase) * (cad > 0)
    ppg += 0.03 * _coloured_noise(rng, len(t), fs, 5.0)
    ecg = (0.12 * np.exp(-0.5 * ((pos - 0.10) / 0.020) ** 2)
           - 0.10 * np.exp(-0.5 * ((pos - 0.19) / 0.006) ** 2)
           + 1.00 * np.exp(-0.5 * ((pos - 0.20) / 0.008) ** 2)
           - 0.20 * np.exp(-0.5 * ((pos - 0.215) / 0.008) ** 2)
           + 0.25 * np.exp(-0.5 * ((pos - 0.45) / 0.040) ** 2))
    ecg += 0.1 * resp_wave + 0.02 * rng.standard_normal(len(t))
    bpos = breath_phase % 1.0
    # Inspiration over the first 40 % of the breath, expiration over the rest.
    resp = np.where(bpos < 0.4, np.sin(np.pi * bpos / 0.8) ** 2,
                    np.cos(np.pi * (bpos - 0.4) / 1.2) ** 2)
    resp += 0.03 * _coloured_noise(rng, len(t), fs, 2.0)
    acc = (cad > 0) * (0.5 * np.sin(2 * np.pi * cad_phase)
                       + 0.25 * np.sin(4 * np.pi * cad_phase + 0.5)
                       + 0.1 * np.sin(6 * np.pi * cad_phase + 1.0))
    acc += 0.02 * rng.standard_normal(len(t))
    samples = np.column_stack((ppg, ecg, resp, acc))
    return Synthetic(t, samples, ("PPG", "ECG", "RESP", "ACC_X"), ("ppg", "ecg", "resp", "acc"),
                     ("a.u.", "mV", "a.u.", "g"), hr_inst, rr, cad,
                     _events(beat_phase, t), _events(breath_phase, t))


def pulse_train(fs: float, rate_bpm: np.ndarray, seed: int = 0, noise: float = 0.02) -> np.ndarray:
    """A PPG-like pulse train following ``rate_bpm`` (one value per sample)."""
    rng = np.random.default_rng(seed)
    pos = (np.cumsum(np.asarray(rate_bpm) / 60.0) / fs) % 1.0
    wave = np.exp(-0.5 * ((pos - 0.18) / 0.06) ** 2) + 0.45 * np.exp(-0.5 * ((pos - 0.45) / 0.07) ** 2)
    return wave + noise * rng.standard_normal(len(pos))
