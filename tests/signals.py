"""Synthetic test signals with a known, time-varying rate.

Every generator works on the *phase* of the rhythm in cycles,
``phi(t) = integral of rate(t) / 60 dt``, so the rate is known exactly at every
instant however it varies. A waveform is a periodic function of the fractional phase
``u = phi mod 1`` (one beat or breath per unit of ``u``); its shape sets the harmonic
content that the plain STFT and the de-shape filter see differently.

Shapes (our own constructions, not physiological models):

* :func:`sharp_pulse` - one narrow Gaussian per cycle: a comb of nearly equal harmonics.
* :func:`dicrotic_pulse` - a systolic peak and a large dicrotic wave half a cycle later,
  which cancels much of the fundamental: the second harmonic is the strongest.
* :func:`ecg_like` - P wave, narrow QRS (Q, R, S) and a broad T wave: the fundamental
  is weaker than several of its harmonics.

:func:`harmonic_amplitudes` measures a shape's Fourier-series magnitudes so that tests
can check (rather than assume) that a harmonic is stronger than the fundamental.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

Shape = Callable[[np.ndarray], np.ndarray]


def _wrapped_gaussian(u: np.ndarray, centre: float, width: float) -> np.ndarray:
    """Gaussian bump on the unit circle (distance taken modulo 1)."""
    d = (u - centre + 0.5) % 1.0 - 0.5
    return np.exp(-0.5 * (d / width) ** 2)


def sharp_pulse(u: np.ndarray) -> np.ndarray:
    """A narrow pulse per cycle (width 3 % of the period) sitting in a broad dip that
    takes most of the fundamental away."""
    return _wrapped_gaussian(u, 0.3, 0.03) - SHARP_DIP * _wrapped_gaussian(u, 0.3, 0.1)


SHARP_DIP = 0.25
"""Depth of the broad dip under the sharp pulse (0: a plain narrow pulse)."""


def dicrotic_pulse(u: np.ndarray) -> np.ndarray:
    """Pulse wave with a dicrotic notch: systolic peak, notch, dicrotic wave."""
    return (_wrapped_gaussian(u, 0.15, 0.06)
            + 0.5 * _wrapped_gaussian(u, 0.62, 0.07))


def ecg_like(u: np.ndarray) -> np.ndarray:
    """ECG-like beat: P wave, Q dip, tall narrow R, S dip and a broad T wave."""
    return (0.12 * _wrapped_gaussian(u, 0.10, 0.025)
            - 0.10 * _wrapped_gaussian(u, 0.235, 0.006)
            + 1.00 * _wrapped_gaussian(u, 0.25, 0.008)
            - 0.20 * _wrapped_gaussian(u, 0.265, 0.006)
            + 0.30 * _wrapped_gaussian(u, 0.60, 0.04))


SHAPES: dict[str, Shape] = {
    "sharp": sharp_pulse,
    "dicrotic": dicrotic_pulse,
    "ecg": ecg_like,
}


def harmonic_amplitudes(shape: Shape, n_harmonics: int = 8, n_points: int = 4096) -> np.ndarray:
    """Magnitudes of the Fourier-series coefficients 1..n_harmonics of ``shape``."""
    u = np.arange(n_points) / n_points
    c = np.fft.rfft(shape(u)) / n_points
    return np.abs(c[1:n_harmonics + 1])


def phase_cycles(rate_per_min: np.ndarray, fs: float) -> np.ndarray:
    """Cumulative phase (cycles) of a rate sampled at ``fs``: trapezoidal integral,
    starting at 0."""
    rate_hz = np.asarray(rate_per_min, dtype=np.float64) / 60.0
    steps = 0.5 * (rate_hz[1:] + rate_hz[:-1]) / fs
    return np.concatenate(([0.0], np.cumsum(steps)))


def sine_sweep_rate(t: np.ndarray, mean_per_min: float, swing_per_min: float,
                    period_s: float) -> np.ndarray:
    """A rate that swings sinusoidally: ``mean + swing * sin(2 pi t / period)``."""
    return mean_per_min + swing_per_min * np.sin(2.0 * np.pi * t / period_s)


def ramp_rate(t: np.ndarray, start_per_min: float, end_per_min: float) -> np.ndarray:
    """A rate rising (or falling) linearly from start to end over ``t``."""
    span = t[-1] - t[0] if len(t) > 1 else 1.0
    return start_per_min + (end_per_min - start_per_min) * (t - t[0]) / span


def coloured_noise(rng: np.random.Generator, n: int, exponent: float = 1.0) -> np.ndarray:
    """Unit-variance noise with power spectrum ``1 / f**exponent`` (1: pink, 2: brown),
    made by shaping white Gaussian noise in the frequency domain."""
    white = np.fft.rfft(rng.standard_normal(n))
    f = np.arange(len(white), dtype=np.float64)
    f[0] = 1.0
    shaped = np.fft.irfft(white / f ** (exponent / 2.0), n)
    shaped -= shaped.mean()
    return shaped / shaped.std()


def rhythm(t: np.ndarray, rate_per_min: np.ndarray, shape: Shape, *,
           am_depth: float = 0.0, am_rate_hz: float = 0.25,
           noise_std: float = 0.0, noise_exponent: float = 1.0,
           rng: np.random.Generator | None = None) -> np.ndarray:
    """A waveform of ``shape`` following ``rate_per_min`` (sampled at ``t``, uniform).

    Parameters
    ----------
    t : sample times (s), uniformly spaced.
    rate_per_min : rate at each sample (events per minute).
    shape : periodic function of the fractional phase.
    am_depth : depth of a sinusoidal amplitude modulation (e.g. breathing), at
        ``am_rate_hz``.
    noise_std : standard deviation of additive coloured noise, relative to the
        standard deviation of the clean waveform.
    noise_exponent : spectral exponent of the noise (see :func:`coloured_noise`).
    rng : needed when ``noise_std > 0``.
    """
    fs = 1.0 / (t[1] - t[0])
    phi = phase_cycles(rate_per_min, fs)
    x = band_limited(shape, phi, np.max(rate_per_min) / 60.0, fs)
    if am_depth:
        x = x * (1.0 + am_depth * np.sin(2.0 * np.pi * am_rate_hz * t))
    if noise_std:
        if rng is None:
            raise ValueError("rng is needed for noise")
        x = x + noise_std * x.std() * coloured_noise(rng, len(t), noise_exponent)
    return x


def band_limited(shape: Shape, phase: np.ndarray, max_rate_hz: float, fs: float,
                 n_points: int = 4096) -> np.ndarray:
    """``shape`` evaluated at ``phase`` (cycles) from its Fourier series, keeping only
    the harmonics that stay below 0.45 ``fs`` at the highest rate: sampling then
    aliases nothing (a narrow spike sampled directly folds its high harmonics back
    onto the band). The mean is removed."""
    coef = np.fft.rfft(shape(np.arange(n_points) / n_points)) / n_points
    top = int(np.floor(0.45 * fs / max_rate_hz))
    x = np.zeros(len(phase))
    for k in range(1, min(top, n_points // 2 - 1) + 1):
        x += 2.0 * np.real(coef[k] * np.exp(2j * np.pi * k * phase))
    return x


def window_mean_rate(t: np.ndarray, rate_per_min: np.ndarray, start_s: np.ndarray,
                     end_s: np.ndarray) -> np.ndarray:
    """Mean rate over each window ``[start_s, end_s]``: cycles completed divided by
    the window's duration (the rate a window-based estimate should report)."""
    fs = 1.0 / (t[1] - t[0])
    phi = phase_cycles(rate_per_min, fs)
    start = np.asarray(start_s, dtype=np.float64)
    end = np.asarray(end_s, dtype=np.float64)
    return 60.0 * (np.interp(end, t, phi) - np.interp(start, t, phi)) / (end - start)
