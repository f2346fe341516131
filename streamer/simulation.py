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


class WristRunSession:
    """A synthetic two-device exercise session of our own design, as continuous functions
    of time, so each device can sample it at its own rate and on its own clock.

    A wrist band's PPG and a second device's three-axis accelerometer on the same arm.
    The heart rate ramps from ``hr_start_bpm`` to ``hr_end_bpm`` over ``ramp_s`` seconds
    and then holds; the arm swings at ``swing_per_min`` (a running stride) and the swing
    reaches the PPG as an artifact ``motion_gain`` times the pulse's own amplitude, with
    a second harmonic (the foot strikes): the strongest line in the PPG spectrum is the
    arm's, not the heart's. ``taps`` are brief knocks on the band (seconds): a sharp
    bump in the PPG and the accelerometer at the same instant, for checking how two
    streams line up. Everything is synthetic; the truth is exact.
    """

    def __init__(self, hr_start_bpm: float = 100.0, hr_end_bpm: float = 130.0,
                 ramp_s: float = 40.0, swing_per_min: float = 80.0, motion_gain: float = 2.0,
                 taps: tuple = (), seed: int = 11):
        self.hr_start_bpm, self.hr_end_bpm = float(hr_start_bpm), float(hr_end_bpm)
        self.ramp_s, self.swing_per_min = float(ramp_s), float(swing_per_min)
        self.motion_gain, self.taps = float(motion_gain), tuple(float(t) for t in taps)
        self.seed = seed

    def hr_bpm(self, t_s) -> np.ndarray:
        t = np.asarray(t_s, dtype=np.float64)
        frac = np.clip(t / self.ramp_s, 0.0, 1.0)
        return self.hr_start_bpm + (self.hr_end_bpm - self.hr_start_bpm) * frac

    def _beat_cycles(self, t: np.ndarray) -> np.ndarray:
        # The integral of hr_bpm / 60 (linear ramp, then constant).
        slope = (self.hr_end_bpm - self.hr_start_bpm) / self.ramp_s
        tr = np.clip(t, 0.0, self.ramp_s)
        ramp = self.hr_start_bpm * tr + 0.5 * slope * tr ** 2
        return (ramp + self.hr_end_bpm * np.maximum(t - self.ramp_s, 0.0)) / 60.0

    def _swing(self, t: np.ndarray) -> np.ndarray:
        return 2 * np.pi * self.swing_per_min / 60.0 * t

    def _tap(self, t: np.ndarray) -> np.ndarray:
        # 40 ms wide bumps: wide enough for a 50 Hz device to sample two or three times.
        out = np.zeros(len(t))
        for at in self.taps:
            out += np.exp(-0.5 * ((t - at) / 0.04) ** 2)
        return out

    def ppg(self, t_s, noise: float = 0.03) -> np.ndarray:
        """The band's PPG at times ``t_s`` (seconds of true time)."""
        t = np.asarray(t_s, dtype=np.float64)
        pos = self._beat_cycles(t) % 1.0
        pulse = np.exp(-0.5 * ((pos - 0.18) / 0.06) ** 2) \
            + 0.45 * np.exp(-0.5 * ((pos - 0.45) / 0.07) ** 2)
        # The pulse wave's fundamental has an amplitude of about 0.4 (of its 1.0 peak).
        phase = self._swing(t)
        artifact = 0.4 * self.motion_gain * (np.sin(phase) + 0.5 * np.sin(2 * phase + 0.7))
        rng = np.random.default_rng(self.seed)
        return pulse + artifact + 3.0 * self._tap(t) + noise * rng.standard_normal(len(t))

    def acc(self, t_s, noise: float = 0.02) -> np.ndarray:
        """The accelerometer's three axes (g) at times ``t_s``: the swing on x, the foot
        strikes on y, a mix on z, and the taps on every axis."""
        t = np.asarray(t_s, dtype=np.float64)
        phase = self._swing(t)
        rng = np.random.default_rng(self.seed + 1)
        tap = self._tap(t)
        x = np.sin(phase) + tap
        y = 0.5 * np.sin(2 * phase + 0.7) + tap
        z = 0.3 * np.sin(phase + 1.2) + 0.2 * np.sin(2 * phase) + tap
        return np.column_stack((x, y, z)) + noise * rng.standard_normal((len(t), 3))
