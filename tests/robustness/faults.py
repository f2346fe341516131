"""Fault injection for robustness tests: wraps a chunk iterator and damages it.

A test builds a clean signal, cuts it into chunks (:func:`chunked`), and passes the
chunks through :func:`inject` with a list of :class:`Fault` descriptions. Every fault
acts on a window of the *clean* stream time ``[start_s, start_s + duration_s)``, so a
test knows exactly which estimates the fault can reach.

Sample faults (the values are damaged, the timing is clean):

``nan``
    every sample of the channel in the window is NaN (a dropped-out sensor that the
    driver reports as missing).
``inf``
    the same with alternating ``+inf`` and ``-inf`` (an overflowing converter).
``flat``
    the channel holds the last value before the window (a sensor that stopped
    updating, or was taken off and reads a constant).
``clip``
    the channel is clipped to ``[low, high]`` (saturation at the converter's rails;
    ``low`` and ``high`` are given by the test in signal units).
``dc``
    ``value`` is added to the channel from ``start_s`` for ``duration_s`` (a sensor
    re-seated: the baseline jumps; give ``duration_s=inf`` for a lasting jump).
``zero``
    the channel is exactly 0 (a channel that is not connected).
``spike``
    the samples in the window are ``+value``, ``-value``, ``+value``, ... (a glitching
    converter or a loose contact: a few samples far outside the signal; give a window of
    two or three sample periods).

Timing faults (the values are clean, the timing is damaged):

``drop``
    chunks whose first sample falls in the window are not delivered (timestamps jump
    over the hole, as after a radio drop-out).
``duplicate``
    chunks in the window are delivered twice (the sender resent them): samples and
    timestamps repeat.
``reorder``
    pairs of consecutive chunks in the window are delivered in swapped order, so
    timestamps go backwards at every swap.
``clock_jump``
    ``value`` seconds are added to every timestamp from ``start_s`` on (a sender clock
    that was stepped; negative values jump backwards).
``rate``
    timestamps from ``start_s`` on advance ``value`` times as fast as the clean ones,
    i.e. the sender's clock runs ``value`` times fast. To simulate a device whose
    *actual* rate is off nominal, generate the signal at the actual rate instead (see
    :func:`actual_rate_stream`).

The helper is deterministic: the same chunks and faults give the same output.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable, Iterator, Sequence

import numpy as np

SAMPLE_FAULTS = ("nan", "inf", "flat", "clip", "dc", "zero", "spike")
TIMING_FAULTS = ("drop", "duplicate", "reorder", "clock_jump", "rate")
KINDS = SAMPLE_FAULTS + TIMING_FAULTS


@dataclass(frozen=True)
class Fault:
    """One fault on the clean stream-time window ``[start_s, start_s + duration_s)``.

    ``channel`` is the column it damages (None: every column; sample faults only).
    ``value`` is the DC step (``dc``), the spike height (``spike``), the clock step in
    seconds (``clock_jump``) or the clock-speed factor (``rate``). ``low`` and ``high``
    are the rails of ``clip``.
    """

    kind: str
    start_s: float
    duration_s: float = math.inf
    channel: int | None = None
    value: float = 0.0
    low: float = -math.inf
    high: float = math.inf

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"kind={self.kind!r} must be one of {', '.join(KINDS)}")
        if not self.duration_s >= 0:
            raise ValueError(f"duration_s={self.duration_s} must be >= 0")

    @property
    def end_s(self) -> float:
        return self.start_s + self.duration_s

    def covers(self, t: np.ndarray) -> np.ndarray:
        """Which clean timestamps fall in the fault's window."""
        return (t >= self.start_s) & (t < self.end_s)


def chunked(samples: np.ndarray, timestamps: np.ndarray,
            sizes: int | Sequence[int]) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Cut a record into chunks of ``sizes`` samples (an int, or a sequence cycled)."""
    samples = np.asarray(samples, dtype=np.float64)
    if samples.ndim == 1:
        samples = samples[:, None]
    cycle = [int(sizes)] if np.isscalar(sizes) else [int(s) for s in sizes]
    if not cycle or min(cycle) < 1:
        raise ValueError(f"sizes={sizes!r} must be >= 1")
    a, i = 0, 0
    while a < len(timestamps):
        b = min(a + cycle[i % len(cycle)], len(timestamps))
        yield samples[a:b], np.asarray(timestamps[a:b], dtype=np.float64)
        a, i = b, i + 1


def _damage_samples(x: np.ndarray, t: np.ndarray, faults: Sequence[Fault],
                    held: dict) -> np.ndarray:
    """Apply the sample faults to one chunk; ``held`` carries the last clean value per
    (fault, channel) so a flat line continues across chunks."""
    x = x.copy()
    for i, fault in enumerate(faults):
        if fault.kind not in SAMPLE_FAULTS:
            continue
        inside = fault.covers(t)
        columns = range(x.shape[1]) if fault.channel is None else [fault.channel]
        for c in columns:
            if fault.kind == "flat":
                # The last value before the window, carried between chunks.
                before = ~inside & (t < fault.start_s)
                if before.any():
                    held[(i, c)] = x[np.flatnonzero(before)[-1], c]
            if not inside.any():
                continue
            if fault.kind == "nan":
                x[inside, c] = np.nan
            elif fault.kind == "inf":
                k = np.flatnonzero(inside)
                x[k, c] = np.where(k % 2 == 0, np.inf, -np.inf)
            elif fault.kind == "flat":
                x[inside, c] = held.get((i, c), 0.0)
            elif fault.kind == "clip":
                x[inside, c] = np.clip(x[inside, c], fault.low, fault.high)
            elif fault.kind == "dc":
                x[inside, c] += fault.value
            elif fault.kind == "zero":
                x[inside, c] = 0.0
            elif fault.kind == "spike":
                k = np.flatnonzero(inside)
                x[k, c] = np.where(k % 2 == 0, fault.value, -fault.value)
    return x


def _retime(t: np.ndarray, faults: Sequence[Fault]) -> np.ndarray:
    """Timestamps after the clock faults (jumps and a fast or slow clock)."""
    out = t.copy()
    for fault in faults:
        if fault.kind == "clock_jump":
            out = np.where(t >= fault.start_s, out + fault.value, out)
        elif fault.kind == "rate":
            out = np.where(t >= fault.start_s, out + (fault.value - 1.0) * (t - fault.start_s),
                           out)
    return out


def inject(chunks: Iterable[tuple[np.ndarray, np.ndarray]],
           faults: Sequence[Fault]) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Yield the chunks of ``chunks`` with ``faults`` applied (see the module notes).

    The fault windows refer to the clean timestamps of the incoming chunks.
    """
    faults = list(faults)
    held: dict = {}
    swap_pending: tuple[np.ndarray, np.ndarray] | None = None
    for x, t in chunks:
        x = np.asarray(x, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        t = np.asarray(t, dtype=np.float64)
        first = t[:1]
        x = _damage_samples(x, t, faults, held)
        t_out = _retime(t, faults)
        if any(f.kind == "drop" and f.covers(first).any() for f in faults):
            continue
        repeat = 2 if any(f.kind == "duplicate" and f.covers(first).any() for f in faults) else 1
        reorder = any(f.kind == "reorder" and f.covers(first).any() for f in faults)
        if reorder and swap_pending is None:
            swap_pending = (x, t_out)  # held back, delivered after the next chunk
            continue
        for _ in range(repeat):
            yield x, t_out
        if swap_pending is not None:
            yield swap_pending
            swap_pending = None
    if swap_pending is not None:
        yield swap_pending


def actual_rate_stream(duration_s: float, nominal_fs: float, factor: float, rate_per_min,
                       make_signal) -> tuple[np.ndarray, np.ndarray]:
    """Samples of a device that declares ``nominal_fs`` but samples at
    ``factor * nominal_fs``, with truthful timestamps.

    ``make_signal(fs, rate_per_min_array)`` builds the clean waveform at a given rate;
    ``rate_per_min`` is a constant or a function of time (seconds).
    """
    fs = factor * nominal_fs
    t = np.arange(int(round(duration_s * fs))) / fs
    rate = rate_per_min(t) if callable(rate_per_min) else np.full(len(t), float(rate_per_min))
    return make_signal(fs, rate), t


def within_ec13(estimate: np.ndarray, truth: np.ndarray) -> np.ndarray:
    """Whether each heart-rate estimate is within +-10 % or +-5 bpm of the truth,
    whichever is greater (the ANSI/AAMI EC13 tolerance for heart-rate meters, cited
    from memory). NaN estimates are not within."""
    estimate = np.asarray(estimate, dtype=np.float64)
    truth = np.asarray(truth, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        return np.abs(estimate - truth) <= np.maximum(5.0, 0.1 * truth)


# ---------------------------------------------------------------------- shared test helpers


def pulse_wave(fs: float, rate_per_min: np.ndarray, seed: int = 0,
               phase0: float = 0.0) -> tuple[np.ndarray, float]:
    """A PPG-like pulse wave (systolic and dicrotic Gaussians per beat, as
    :func:`streamer.simulation.pulse_train`, plus 2 % white noise) following
    ``rate_per_min`` (one value per sample). Returns the wave and the phase (cycles) at
    its end, so that a next segment can continue without a phase jump."""
    rng = np.random.default_rng(seed)
    phase = phase0 + np.cumsum(np.asarray(rate_per_min, dtype=np.float64) / 60.0) / fs
    u = phase % 1.0
    x = (np.exp(-0.5 * ((u - 0.18) / 0.06) ** 2)
         + 0.45 * np.exp(-0.5 * ((u - 0.45) / 0.07) ** 2)
         + 0.02 * rng.standard_normal(len(u)))
    return x, float(phase[-1]) if len(phase) else phase0


def pulse_signal(duration_s: float, fs: float, rate_per_min, seed: int = 0,
                 phase0: float = 0.0) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """:func:`pulse_wave` over ``duration_s`` from time 0; ``rate_per_min`` is a constant
    or a function of time (s). Returns ``(x, t, truth_per_min, phase_end)``."""
    t = np.arange(int(round(duration_s * fs))) / fs
    truth = rate_per_min(t) if callable(rate_per_min) else np.full(len(t), float(rate_per_min))
    x, phase_end = pulse_wave(fs, truth, seed, phase0)
    return x, t, truth, phase_end


def breathing_pulse(fs: float, heart_per_min: np.ndarray, breaths_per_min: float,
                    seed: int = 0) -> np.ndarray:
    """:func:`pulse_wave` whose amplitude (by 20 %) and baseline (by a tenth of the pulse)
    follow a breathing rhythm, so that breathing shows in the pulse's modulations."""
    breath = np.sin(2 * np.pi * breaths_per_min / 60.0 * np.arange(len(heart_per_min)) / fs)
    x, _ = pulse_wave(fs, heart_per_min, seed=seed)
    return (1.0 + 0.2 * breath) * x + 0.1 * breath


def feed(monitor, chunks) -> list:
    """Every estimate ``monitor`` returns for ``chunks``, in order."""
    out = []
    for x, t in chunks:
        out.extend(monitor.update(x, t))
    return out


def columns(estimates, quantity: str | None = "hr", source: str | None = None) -> dict:
    """Arrays ``time_s``, ``emitted_s``, ``rate``, ``confidence``, ``quality`` of the
    estimates of one quantity (heart rate by default) and source (None: all)."""
    picked = [e for e in estimates if (quantity is None or e.quantity == quantity)
              and (source is None or e.source == source)]
    return {
        "time_s": np.array([e.time_s for e in picked]),
        "emitted_s": np.array([e.emitted_s for e in picked]),
        "rate": np.array([e.rate_per_min for e in picked]),
        "confidence": np.array([e.confidence for e in picked]),
        "quality": np.array([e.quality for e in picked]),
    }


def assert_log_invariants(estimates, profile) -> None:
    """What every row of the estimate log must satisfy (see
    :mod:`streamer.sinks.estimate_log`): confidence and quality in [0, 1], the estimate
    refers to a time not after the newest sample it used, ``emitted_s`` never
    decreases, and a rate is either absent (NaN) or inside the profile's band."""
    if not estimates:
        return
    c = columns(estimates, quantity=None)
    assert np.all((c["confidence"] >= 0) & (c["confidence"] <= 1)), c["confidence"]
    assert np.all((c["quality"] >= 0) & (c["quality"] <= 1)), c["quality"]
    assert np.all(c["emitted_s"] >= c["time_s"])
    assert np.all(np.diff(c["emitted_s"]) >= 0)
    bands = {"hr": [profile.hr.band_per_min],
             # breathing comes from a respiration channel or, on its own settings, from
             # the modulations of a pulse
             "rr": [profile.rr.band_per_min,
                    getattr(profile, "rr_pulse", profile.rr).band_per_min]}
    for e in estimates:
        assert math.isnan(e.rate_per_min) or any(
            lo <= e.rate_per_min <= hi for lo, hi in bands[e.quantity]), e
