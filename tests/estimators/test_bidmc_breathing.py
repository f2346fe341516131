"""Breathing rate on real recordings: BIDMC records 01-12, live monitor, three sources.

Data: BIDMC PPG and Respiration Dataset (Pimentel et al., "Towards a Robust Estimation
of Respiratory Rate from Pulse Oximeters", IEEE TBME 64(8):1914-1923, 2017; PhysioNet
``bidmc`` 1.0.0), CSV version in ``../shared/data/bidmc`` (see its SOURCE.md): impedance
respiration ``RESP``, fingertip PPG ``PLETH`` and ECG lead ``II`` at 125 Hz, 8 minutes
each; columns are selected by name after stripping the header's spaces.

Reference: the manual breath annotations, annotator 1 (annotator 2 as a cross-check).
For an estimate at ``time_s`` (the centre of its 32 s window) the reference is 60 / mean
breath interval of the annotated breaths inside ``[time_s - 16, time_s + 16]``
(:func:`estimators.metrics.rate_from_events`). MAE is over the windows that carry both.

Targets (the project's): RESP median MAE over records <= 1.0 breaths/min; PLETH alone
<= 3.0 with >= 90 % of windows (pooled over records) carrying an estimate; II alone
<= 3.0. Published point: about 4.0 breaths/min median MAE from PPG with 32 s windows
(Pimentel et al. 2017, as given to us).

Measured when these tests were written (live, annotator 1): RESP 0.35 (every record
carries estimates, record 05 at 6 per minute included), PLETH 1.82 with 0.93 of
windows, II 1.34;
per-record figures come from ``python -m bench.breathing_table``.

The monitor gets each record in one call: its estimates do not depend on the chunking
(``tests/estimators/test_respiration.py`` checks that), and one call is fastest.
"""

from __future__ import annotations


import numpy as np
import pytest

from bench.breathing_table import load_record  # one BIDMC loader for tests and bench
from estimators.metrics import rate_from_events
from estimators.monitor import RateMonitor

pytestmark = [pytest.mark.data, pytest.mark.slow]

FS = 125.0
WINDOW_S = 32.0
RECORDS = tuple(range(1, 13))
SOURCES = (("RESP", "resp"), ("PLETH", "ppg"), ("II", "ecg"))  # load_record's column order


@pytest.fixture(scope="module")
def scores(shared_data):
    folder = shared_data / "bidmc" / "bidmc_csv"
    if not (folder / "bidmc_01_Signals.csv.gz").is_file():
        pytest.skip(f"BIDMC records not found in {folder}")
    out = {}
    for record in RECORDS:
        t, samples, ann1, ann2 = load_record(record, folder)
        ann = [ann1, ann2]
        estimates = RateMonitor(list(SOURCES), FS, "resp-belt").update(samples, t)
        for name, _ in SOURCES:
            rows = [e for e in estimates if e.quantity == "rr" and e.source == name]
            time_s = np.array([e.time_s for e in rows])
            rate = np.array([e.rate_per_min for e in rows])
            for a, breaths in enumerate(ann, start=1):
                ref = rate_from_events(breaths, time_s, WINDOW_S)
                both = np.isfinite(ref) & np.isfinite(rate)
                out[(name, record, a)] = (
                    float(np.mean(np.abs(rate[both] - ref[both]))) if both.any() else np.nan,
                    int(np.isfinite(ref).sum()), int(both.sum()))
    return out


def median_mae(scores, name: str, annotator: int = 1) -> float:
    return float(np.nanmedian([scores[(name, r, annotator)][0] for r in RECORDS]))


def pooled_coverage(scores, name: str) -> float:
    with_ref = sum(scores[(name, r, 1)][1] for r in RECORDS)
    with_both = sum(scores[(name, r, 1)][2] for r in RECORDS)
    return with_both / with_ref


@pytest.mark.parametrize("annotator", [1, 2])
def test_respiration_channel_within_one_breath_per_minute(scores, annotator):
    mae = median_mae(scores, "RESP", annotator)
    print(f"RESP median MAE (annotator {annotator}): {mae:.2f}")
    assert mae <= 1.0
    # Every record carries estimates, record 05 (breathing at 6 per minute, the impedance
    # clipped at both rails) included: the harmonic family of the quality index stops at
    # the fourth multiple, so a slow rate's chance share does not fill the band.
    missing = [r for r in RECORDS if np.isnan(scores[("RESP", r, annotator)][0])]
    assert missing == []


@pytest.mark.parametrize("annotator", [1, 2])
def test_ppg_alone_within_three_breaths_per_minute_on_nine_in_ten_windows(scores, annotator):
    mae = median_mae(scores, "PLETH", annotator)
    coverage = pooled_coverage(scores, "PLETH")
    print(f"PLETH median MAE (annotator {annotator}): {mae:.2f}, coverage {coverage:.3f}")
    assert mae <= 3.0
    assert coverage >= 0.90
    assert all(np.isfinite(scores[("PLETH", r, annotator)][0]) for r in RECORDS)


@pytest.mark.parametrize("annotator", [1, 2])
def test_ecg_alone_within_three_breaths_per_minute(scores, annotator):
    mae = median_mae(scores, "II", annotator)
    print(f"II median MAE (annotator {annotator}): {mae:.2f}, "
          f"coverage {pooled_coverage(scores, 'II'):.3f}")
    assert mae <= 3.0
    assert all(np.isfinite(scores[("II", r, annotator)][0]) for r in RECORDS)
