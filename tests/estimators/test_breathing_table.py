"""Breathing rate on BIDMC records 01-26, cross-validated, and its calibrated confidence
(issue 15, item 5): the acceptance figures of ``python -m bench.breathing_table``.

Protocol, grid and folds are that module's (its docstring): live estimates from RESP,
PPG (``PLETH``) and ECG (``II``) against annotator 1's breaths over 32 s centred on each
estimate; the breathing-from-pulse settings are chosen per held-out record on the other
25 (leave one record out) and scored on it; the breathing confidence map is fitted
inside the same folds. Extraction per record is cached (keyed by a hash of the engine's
source, so a cached record is this code's output): about 3 minutes on two cores when
the engine changed, seconds after ``python -m bench.breathing_table`` has run.

Targets (issue 15): held-out median MAE from PPG <= 1.8 and from ECG <= 1.5 breaths/min
with >= 90 % of windows (pooled) carrying an estimate; RESP <= 0.5. Calibration (our
bar, as for heart rate in issue 13): out-of-fold ECE (10 bins) <= 0.05 per source, and
the estimates at confidence >= 0.8 within 2 breaths/min (common practice for a
clinically useful breathing rate) at least 80 % of the time.
"""

from __future__ import annotations

import numpy as np
import pytest

pytestmark = [pytest.mark.data, pytest.mark.slow]


@pytest.fixture(scope="module")
def result(shared_data):
    from bench import breathing_table as table

    folder = shared_data / "bidmc" / "bidmc_csv"
    missing = [r for r in table.RECORDS
               if not (folder / f"bidmc_{r:02d}_Signals.csv.gz").is_file()]
    if missing:
        pytest.skip(f"BIDMC records {missing} not found in {folder}")
    res = table.results(table.collect())
    print("\n" + table.table_text(res) + table.calibration_text(res["calibration"]))
    return res


@pytest.mark.parametrize("source, limit, coverage", [
    ("RESP", 0.5, None), ("PLETH", 1.8, 0.9), ("II", 1.5, 0.9)])
def test_held_out_breathing_rate_meets_the_targets(result, source, limit, coverage):
    # Measured when written (median / mean / worst record): RESP 0.41 / 0.67 / 15: 2.53;
    # PLETH 1.60 / 1.84 / 23: 6.98, coverage 0.909; II 1.38 / 1.57 / 23: 5.29, 0.981.
    s = result["summary"][source]
    assert s["median_mae"] <= limit
    assert s["records_without_estimate"] == []
    if coverage is not None:
        assert s["pooled_coverage"] >= coverage


def test_shipped_settings_are_the_point_chosen_on_all_records(result):
    assert result["chosen_on_all"] == result["shipped_point"]


@pytest.mark.parametrize("source", ["RESP", "PLETH", "II"])
def test_breathing_confidence_is_calibrated_out_of_fold(result, source):
    # Measured when written (ECE / share >= 0.8 / within 2 per minute of those):
    # RESP 0.013 / 0.89 / 0.96, PLETH 0.041 / 0.73 / 0.89, II 0.036 / 0.65 / 0.91.
    c = result["calibration"][source]
    assert c["ece"] <= 0.05
    assert c["share_confident"] > 0.3
    assert c["precision_confident"] >= 0.8
