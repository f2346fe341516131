"""Synthetic beat series with known truth: realistic intervals, injected artifacts, and
an ECG-like signal drawn from beat times (all our own scenarios)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tests.signals import coloured_noise


def sinus_intervals_ms(rng: np.random.Generator, n: int, mean_ms: float = 800.0) -> np.ndarray:
    """Intervals of a resting sinus rhythm: respiratory sinus arrhythmia (0.25 Hz,
    20 ms), 1/f wander (25 ms) and 5 ms of beat-to-beat jitter (sizes of our own, within
    the ranges of resting adults)."""
    t = np.arange(n) * mean_ms / 1e3
    return (mean_ms + 20.0 * np.sin(2 * np.pi * 0.25 * t) + 25.0 * coloured_noise(rng, n)
            + rng.normal(0.0, 5.0, n))


@dataclass
class Injected:
    """Beat times with artifacts, and per artifact the beat times whose interval it
    spoils (``spoiled``: one list per artifact) with its kind."""

    times_s: np.ndarray
    kinds: list
    spoiled: list


def inject_artifacts(rng: np.random.Generator, times_s: np.ndarray, count: int,
                     spacing: int = 60) -> Injected:
    """``count`` artifacts at least ``spacing`` beats apart: a missed beat (removed), an
    extra one (inside an interval, 30-70 % along it) or an ectopic one (premature by
    12-35 % of its interval, with the compensatory pause)."""
    n = len(times_s)
    where = np.sort(rng.choice(np.arange(spacing, n - spacing, spacing), size=count,
                               replace=False))
    kinds = rng.choice(["missed", "extra", "ectopic"], size=count).tolist()
    times = times_s.copy()
    removed, added, spoiled = set(), [], []
    for kind, p in zip(kinds, where):
        if kind == "missed":
            removed.add(p)
            spoiled.append([times_s[p + 1]])
        elif kind == "extra":
            extra = times_s[p - 1] + rng.uniform(0.3, 0.7) * (times_s[p] - times_s[p - 1])
            added.append(extra)
            spoiled.append([extra, times_s[p]])
        else:
            times[p] = times_s[p] - rng.uniform(0.12, 0.35) * (times_s[p] - times_s[p - 1])
            spoiled.append([times[p], times_s[p + 1]])
    kept = [times[i] for i in range(n) if i not in removed]
    return Injected(np.array(sorted(kept + added)), kinds, spoiled)


def ecg_from_beats(beat_times_s: np.ndarray, fs: float, duration_s: float,
                   rng: np.random.Generator | None = None, noise: float = 0.01):
    """An ECG-like trace with an R wave (narrow, 8 ms) at each beat time, small Q and S
    dips and a T wave 0.25 s later; returns ``(x, t)``."""
    t = np.arange(int(round(duration_s * fs))) / fs
    x = np.zeros_like(t)
    for b in beat_times_s:
        lo, hi = int((b - 0.1) * fs), int((b + 0.45) * fs)
        k = slice(max(lo, 0), min(hi, len(t)))
        u = t[k] - b
        x[k] += (np.exp(-0.5 * (u / 0.008) ** 2) - 0.1 * np.exp(-0.5 * ((u + 0.015) / 0.006) ** 2)
                 - 0.2 * np.exp(-0.5 * ((u - 0.015) / 0.006) ** 2)
                 + 0.3 * np.exp(-0.5 * ((u - 0.25) / 0.04) ** 2))
    if rng is not None:
        x += rng.normal(0.0, noise, len(t))
    return x, t
