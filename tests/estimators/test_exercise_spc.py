"""The exercise profile on real running records: IEEE Signal Processing Cup 2015 training
records 01-12 (Zhang, Pi & Liu, "TROIKA: a general framework for heart rate monitoring
using wrist-type photoplethysmographic signals during intensive physical exercise", IEEE
TBME 62(2):522-531, 2015; ``../shared/data/ieee_spc2015/SOURCE.md``).

Protocol (the data set's causal one, SOURCE.md): ``BPM0[k]`` is the mean chest-ECG
heart rate over samples ``[250 k, 250 k + 1000)`` at 125 Hz; the estimate for window
``k`` may use samples up to the end of that window only. With 8 s windows and a 0.25 s
hop the monitor emits a column whose newest sample is sample ``250 k + 999`` and whose
window is exactly window ``k``; the rate scored is the one shown then (a withheld
estimate leaves the last shown rate on screen). AAE = mean absolute error per record.
The ECG row is never given to the monitor.

The shipped parameters were chosen on these records (``python -m bench.exercise_table``
prints the leave-one-record-out figures, which are the evidence); the assertions here
are guards: the bar the project was set for recordings it does not have (issue 13:
mean AAE <= 2.3 bpm, no record worse than 5 bpm), no lasting wrong lock, and confident
estimates that are right.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import io

from estimators.config import get_profile
from estimators.metrics import within_tolerance
from estimators.monitor import FUSED, RateMonitor

pytestmark = [pytest.mark.data, pytest.mark.slow]

FS = 125.0
WINDOW, SHIFT = 1000, 250
RECORDS = [f"DATA_{i:02d}_TYPE{'01' if i == 1 else '02'}" for i in range(1, 13)]
UNSEEN_MEAN_AAE, UNSEEN_WORST_AAE = 2.3, 5.0
"""Issue 13's bar for recordings the project does not have."""
EXERCISE = get_profile("exercise-wrist")
ROWS = {"ppg1": 1, "ppg2": 2, "accx": 3, "accy": 4, "accz": 5}  # row 0 is the ECG
KINDS = {"ppg1": "ppg", "ppg2": "ppg", "accx": "acc", "accy": "acc", "accz": "acc"}
CONFIGS = {
    "ppg1+ppg2": (("ppg1", "ppg2"), FUSED, EXERCISE),
    "with acc": (("ppg1", "ppg2", "accx", "accy", "accz"), FUSED, EXERCISE),
    # The same, with the rate read at the tracked (gained) peak (estimators/refine.py).
    "unrefined": (("ppg1", "ppg2", "accx", "accy", "accz"), FUSED, dataclasses.replace(
        EXERCISE, hr=dataclasses.replace(EXERCISE.hr, refine_radius_per_min=0.0))),
}


def scored(sig: np.ndarray, bpm0: np.ndarray, channels, source, profile=EXERCISE) -> dict:
    samples = sig[[ROWS[c] for c in channels]].T
    t = np.arange(len(samples)) / FS
    estimates = RateMonitor([(c, KINDS[c]) for c in channels], FS, profile).update(samples, t)
    mine = [e for e in estimates if e.quantity == "hr" and e.source == source]
    emitted = np.array([e.emitted_s for e in mine])
    rate = np.array([e.rate_per_min for e in mine])
    confidence = np.array([e.confidence for e in mine])
    n = min(len(bpm0), (len(samples) - WINDOW) // SHIFT + 1)
    ends = (np.arange(n) * SHIFT + WINDOW - 1) / FS
    # The column of window k is the one emitted exactly at the window's last sample.
    at_end = np.searchsorted(emitted, ends - 1e-9)
    assert np.allclose(emitted[at_end], ends, atol=1e-9)
    shown = rate[at_end].copy()
    for k in range(n):  # a withheld estimate leaves the last shown rate on screen
        if not np.isfinite(shown[k]):
            earlier = rate[:at_end[k]][np.isfinite(rate[:at_end[k]])]
            shown[k] = earlier[-1] if len(earlier) else np.nan
    return {"error": np.abs(shown - bpm0[:n]), "shown": shown, "truth": bpm0[:n],
            "fresh": np.isfinite(rate[at_end]), "confidence": confidence[at_end]}


@pytest.fixture(scope="module")
def results(shared_data):
    folder = shared_data / "ieee_spc2015" / "Training_data"
    out = {}
    for name in RECORDS:
        path = folder / f"{name}.mat"
        if not path.is_file():
            pytest.skip(f"SPC 2015 record {path} not found")
        sig = np.asarray(io.loadmat(path)["sig"], dtype=np.float64)
        bpm0 = np.asarray(io.loadmat(folder / f"{name}_BPMtrace.mat")["BPM0"],
                          dtype=np.float64).ravel()
        out[name] = {config: scored(sig, bpm0, channels, source, profile)
                     for config, (channels, source, profile) in CONFIGS.items()}
    return out


def aae(results, config) -> np.ndarray:
    return np.array([np.nanmean(results[name][config]["error"]) for name in RECORDS])


def test_every_record_is_tracked(results):
    per_record = aae(results, "with acc")
    print("AAE with acc per record:", np.round(per_record, 2), "mean", per_record.mean())
    assert per_record.mean() <= UNSEEN_MEAN_AAE
    assert per_record.max() <= UNSEEN_WORST_AAE


def test_no_lasting_wrong_lock(results):
    """Record 10 is the one where the tracker used to lock at half the rate for minutes
    (issue 13): on every record, no stretch longer than 10 s is more than 20 bpm off."""
    for name in RECORDS:
        off = results[name]["with acc"]["error"] > 20.0
        longest = run = 0
        for flag in off.tolist():
            run = run + 1 if flag else 0
            longest = max(longest, run)
        # Window ends are 2 s apart: a run of n windows spans (n - 1) * 2 s.
        assert (longest - 1) * SHIFT / FS <= 10.0, (name, longest)


def test_accelerometer_aided_fused_beats_ppg_only(results):
    full = aae(results, "with acc")
    ppg_only = aae(results, "ppg1+ppg2")
    print("ppg1+ppg2", np.round(ppg_only, 2))
    assert full.mean() < 0.2 * ppg_only.mean()
    # On each record better, unless both are already good (records 05, 07 and 09, whose
    # PPG is clean enough alone: 0.6-0.9 bpm against 0.8-1.3 with the accelerometer).
    for name, a, b in zip(RECORDS, full, ppg_only):
        assert a < b or max(a, b) <= 1.5, name


def test_refinement_lowers_the_error(results):
    """Reading the rate on the canceller's residual peak (estimators/refine.py) instead
    of the gained peak: measured when written, mean AAE 1.54 -> 1.18 bpm over records
    01-12, every record better (least: 01, 1.70 -> 1.64). The guard: at least 0.1 bpm
    better on the mean, and no record more than 0.1 bpm worse."""
    refined, unrefined = aae(results, "with acc"), aae(results, "unrefined")
    print("unrefined", np.round(unrefined, 2), "refined", np.round(refined, 2))
    assert refined.mean() <= unrefined.mean() - 0.1
    assert np.all(refined <= unrefined + 0.1)


def test_confident_estimates_are_within_tolerance(results):
    """Issue 13: confident estimates (>= 0.8) on the running records are within the
    heart-rate tolerance (+-10 % or +-5 bpm, whichever is greater; ANSI/AAMI EC13, from
    memory) at >= 95 %, and most estimates are confident."""
    confidence = np.concatenate([results[n]["with acc"]["confidence"] for n in RECORDS])
    shown = np.concatenate([results[n]["with acc"]["shown"] for n in RECORDS])
    truth = np.concatenate([results[n]["with acc"]["truth"] for n in RECORDS])
    fresh = np.concatenate([results[n]["with acc"]["fresh"] for n in RECORDS])
    assert fresh.mean() >= 0.95  # withheld at fewer than 5 % of window ends
    confident = confidence >= 0.8
    assert confident.mean() >= 0.5
    assert within_tolerance(shown[confident], truth[confident]).mean() >= 0.95
