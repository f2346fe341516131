"""Step response of the live heart-rate estimate.

The heart-rate meter test idea of ANSI/AAMI EC13 (cited from memory: a monitor should
follow a sudden step of the heart rate, e.g. 80 -> 120 and 80 -> 40 bpm, within about
10 s): synthetic PPG (:func:`streamer.simulation.pulse_train`, profile ``wrist``) and a
synthetic ECG-like signal (profile ``chest-ecg``) whose beat rate steps from 80 bpm to
120 or to 40 bpm. The signals are fed to :class:`RateMonitor` in hop-sized chunks, as
live.

Measures, counted from the step to the stream time at which the user sees the estimate
(``emitted_s``, the time of the newest sample it used):

* settling time: from the step until every later estimate is within 5 bpm of the new
  rate (a withheld estimate counts as outside);
* confidence recovery: from the step until every later confidence is >= 0.8.

"Every later" means up to the end of the record, ``post_s`` seconds after the step.
"""

from __future__ import annotations

import numpy as np

from bench import hop_bounds, measure, section

FS = 125.0
BEFORE_BPM = 80.0
AFTER_BPM = (120.0, 40.0)
TOLERANCE_BPM = 5.0
"""The absolute part of the EC13 heart-rate tolerance (cited from memory, see
:data:`estimators.metrics.HR_TOLERANCE_ABS`)."""
CONFIDENCE_LEVEL = 0.8
TARGET_S = 6.0
SIGNALS = {"ppg": "wrist", "ecg": "chest-ecg"}
"""Signal kind -> the profile it is estimated with."""


def ecg_like(fs: float, rate_bpm: np.ndarray, seed: int = 0, noise: float = 0.02) -> np.ndarray:
    """A synthetic ECG-like trace whose beats follow ``rate_bpm`` (one value per sample).

    Unlike a wave drawn in phase units, its P, QRS and T waves keep their duration in
    seconds whatever the rate, so a slow rhythm has narrow spikes far apart (strong
    harmonics), as a real ECG does. Offsets (s), widths (s) and heights below are
    round numbers chosen for a plausible shape, not measured values.
    """
    rng = np.random.default_rng(seed)
    rate_bpm = np.asarray(rate_bpm, dtype=np.float64)
    n = len(rate_bpm)
    t = np.arange(n) / fs
    phase = np.cumsum(rate_bpm / 60.0) / fs
    crossings = np.flatnonzero(np.diff(np.floor(phase)) > 0) + 1
    waves = ((-0.16, 0.025, 0.12), (-0.025, 0.008, -0.10), (0.0, 0.010, 1.00),
             (0.025, 0.008, -0.20), (0.25, 0.050, 0.30))
    x = np.zeros(n)
    reach = int(0.5 * fs)
    for k in crossings:
        a, b = max(0, k - reach), min(n, k + reach)
        local = t[a:b] - t[k]
        for offset, width, height in waves:
            x[a:b] += height * np.exp(-0.5 * ((local - offset) / width) ** 2)
    return x + noise * rng.standard_normal(n)


def settle_time(emitted_s: np.ndarray, ok: np.ndarray, step_s: float) -> float:
    """Seconds from ``step_s`` until ``ok`` holds for this and every later estimate;
    NaN when the last estimate is not ok.

    Examples
    --------
    >>> settle_time(np.array([10.5, 11.0, 11.5, 12.0]), np.array([False, True, False, True]), 10.0)
    2.0
    """
    after = emitted_s >= step_s
    emitted_s, ok = emitted_s[after], ok[after]
    if len(ok) == 0 or not ok[-1]:
        return float("nan")
    bad = np.flatnonzero(~ok)
    first_good = 0 if len(bad) == 0 else bad[-1] + 1
    return float(emitted_s[first_good] - step_s)


def step_trial(kind: str, after_bpm: float, before_s: float, post_s: float,
               fs: float = FS, seed: int = 2) -> dict:
    from estimators.config import get_profile
    from estimators.monitor import RateMonitor
    from streamer.simulation import pulse_train

    profile = get_profile(SIGNALS[kind])
    n = int(round((before_s + post_s) * fs))
    t = np.arange(n) / fs
    rate = np.where(t < before_s, BEFORE_BPM, after_bpm)
    x = pulse_train(fs, rate, seed=seed) if kind == "ppg" else ecg_like(fs, rate, seed=seed)
    monitor = RateMonitor([("x", kind)], fs, profile)
    bounds = hop_bounds(int(n // (profile.hr.hop_s * fs)), profile.hr.hop_s, fs)
    bounds[-1] = n
    estimates = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        estimates += [e for e in monitor.update(x[a:b, None], t[a:b]) if e.quantity == "hr"]
    emitted = np.array([e.emitted_s for e in estimates])
    shown = np.array([e.rate_per_min for e in estimates])
    confidence = np.array([e.confidence for e in estimates])
    with np.errstate(invalid="ignore"):
        within = np.abs(shown - after_bpm) <= TOLERANCE_BPM
        before = (emitted < before_s) & (emitted >= before_s - 5.0)
        error_before = float(np.nanmean(np.abs(shown[before] - BEFORE_BPM))) if before.any() \
            else float("nan")
    step_s = float(t[np.searchsorted(t, before_s)])
    return {"kind": kind, "profile": profile.name, "before_bpm": BEFORE_BPM,
            "after_bpm": after_bpm, "step_s": step_s,
            "settle_s": settle_time(emitted, within, step_s),
            "confidence_recovery_s": settle_time(emitted, confidence >= CONFIDENCE_LEVEL, step_s),
            "mae_last_5s_before_step": error_before,
            "confidence_before_step": float(np.mean(confidence[before])) if before.any()
            else float("nan"),
            "median_rate_last_5s": float(np.nanmedian(shown[emitted >= emitted[-1] - 5.0]))
            if np.isfinite(shown[emitted >= emitted[-1] - 5.0]).any() else float("nan"),
            "estimates": len(estimates)}


def run(quick: bool) -> dict:
    before_s, post_s = (30.0, 20.0) if quick else (40.0, 40.0)
    trials = [step_trial(kind, after, before_s, post_s) for kind in SIGNALS for after in AFTER_BPM]
    measures = []
    for r in trials:
        label = f"{r['kind'].upper()} ({r['profile']}) {BEFORE_BPM:g} -> {r['after_bpm']:g} bpm"
        measures.append(measure(f"{label}: settle within {TOLERANCE_BPM:g} bpm", r["settle_s"],
                                "s", f"<= {TARGET_S:g} s", "<=", TARGET_S,
                                note="" if np.isfinite(r["settle_s"]) else "never settled"))
        measures.append(measure(f"{label}: confidence back >= {CONFIDENCE_LEVEL}",
                                r["confidence_recovery_s"], "s",
                                note="" if np.isfinite(r["confidence_recovery_s"])
                                else "not recovered by the end"))
    method = (f"Synthetic signals at {FS:g} Hz, {BEFORE_BPM:g} bpm for {before_s:g} s, then a "
              f"step held for {post_s:g} s; RateMonitor fed hop-sized chunks; times from the "
              "step to emitted_s (the stream time the user sees the estimate). EC13 asks for "
              "about 10 s or less (cited from memory).")
    return section("Step response", measures, method, {"trials": trials})
