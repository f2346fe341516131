"""The exercise profile on real running records: IEEE Signal Processing Cup 2015 training
records 01-06 (Zhang, Pi & Liu, "TROIKA: a general framework for heart rate monitoring
using wrist-type photoplethysmographic signals during intensive physical exercise", IEEE
TBME 62(2):522-531, 2015; ``../shared/data/ieee_spc2015/SOURCE.md``).

Protocol (the data set's causal one, SOURCE.md): ``BPM0[k]`` is the mean chest-ECG
heart rate over samples ``[250 k, 250 k + 1000)`` at 125 Hz; the estimate for window
``k`` may use samples up to the end of that window only. With 8 s windows and a 0.25 s
hop the monitor emits a column whose newest sample is sample ``250 k + 999`` and whose
window is exactly window ``k``; the rate scored is the one shown then (a withheld
estimate leaves the last shown rate on screen). AAE = mean absolute error per record.
The ECG row is never given to the monitor.

Figures measured when the tests were written (one parameter set, profile
``exercise-wrist``; ``python -m bench.exercise_table`` prints the full table):

==============  =====  =====  =====  =====  =====  =====  =====
AAE (bpm)        01     02     03     04     05     06    mean
==============  =====  =====  =====  =====  =====  =====  =====
PPG1 alone      51.92  45.06  26.38   2.49   0.71   3.54  21.68
PPG1+PPG2       31.51  44.36  25.50   9.42   0.80  32.04  23.94
with acc         1.74   1.72   0.80   1.41   1.03   1.99   1.45
==============  =====  =====  =====  =====  =====  =====  =====

Published points (values from memory, as given to us): TROIKA 2.34 bpm over the 12
training records (Zhang et al. 2015), about 1.97 bpm online (Temko, IEEE TBME 2017).
The project target is a mean AAE of 1.5 bpm or less over records 01-06.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import io

from estimators.config import get_profile
from estimators.monitor import FUSED, RateMonitor

pytestmark = pytest.mark.data

FS = 125.0
WINDOW, SHIFT = 1000, 250
RECORDS = [f"DATA_{i:02d}_TYPE{'01' if i == 1 else '02'}" for i in range(1, 7)]
TARGET_AAE = 1.5
"""Project target for the mean AAE over records 01-06 (the issue; FINDINGS.md)."""
EXERCISE = get_profile("exercise-wrist")
ROWS = {"ppg1": 1, "ppg2": 2, "accx": 3, "accy": 4, "accz": 5}  # row 0 is the ECG
KINDS = {"ppg1": "ppg", "ppg2": "ppg", "accx": "acc", "accy": "acc", "accz": "acc"}
CONFIGS = {
    "ppg1 alone": (("ppg1",), "ppg1"),
    "ppg1+ppg2": (("ppg1", "ppg2"), FUSED),
    "with acc": (("ppg1", "ppg2", "accx", "accy", "accz"), FUSED),
}


def scored(sig: np.ndarray, bpm0: np.ndarray, channels, source) -> dict:
    samples = sig[[ROWS[c] for c in channels]].T
    t = np.arange(len(samples)) / FS
    estimates = RateMonitor([(c, KINDS[c]) for c in channels], FS, EXERCISE).update(samples, t)
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
    error = np.abs(shown - bpm0[:n])
    return {"error": error, "fresh": np.isfinite(rate[at_end]),
            "confidence": confidence[at_end]}


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
        out[name] = {config: scored(sig, bpm0, channels, source)
                     for config, (channels, source) in CONFIGS.items()}
    return out


def aae(results, config) -> np.ndarray:
    return np.array([np.nanmean(results[name][config]["error"]) for name in RECORDS])


def test_mean_aae_over_records_01_to_06_meets_the_target(results):
    per_record = aae(results, "with acc")
    print("AAE with acc per record:", np.round(per_record, 2), "mean", per_record.mean())
    assert per_record.mean() <= TARGET_AAE
    # Every record is tracked: no record is rescued by the others.
    assert per_record.max() <= 2.5


def test_accelerometer_aided_fused_beats_ppg_only(results):
    full = aae(results, "with acc")
    for config in ("ppg1 alone", "ppg1+ppg2"):
        ppg_only = aae(results, config)
        print(config, np.round(ppg_only, 2))
        # Several times better on the mean ...
        assert full.mean() < 0.2 * ppg_only.mean()
        # ... and on each record better, unless both are already within the target (record
        # 05, whose PPG is clean enough alone: 0.71 bpm against 1.03 with acc).
        for name, a, b in zip(RECORDS, full, ppg_only):
            assert a < b or max(a, b) <= TARGET_AAE, name


def test_estimates_are_shown_and_confidence_means_something(results):
    fresh = np.concatenate([results[n]["with acc"]["fresh"] for n in RECORDS])
    assert fresh.mean() >= 0.95  # withheld at fewer than 5 % of window ends
    error = np.concatenate([results[n]["with acc"]["error"] for n in RECORDS])
    confidence = np.concatenate([results[n]["with acc"]["confidence"] for n in RECORDS])
    good, bad = error < 3.0, error > 10.0
    assert bad.sum() >= 5
    assert confidence[bad].mean() < confidence[good].mean()
