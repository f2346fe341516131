"""The calibrated heart-rate confidence on real records (issue 13's acceptance figures).

Rows, folds and scoring are those of ``python -m bench.calibration`` (its docstring says
how the SPC 2015 and BIDMC 01-26 rows and their references are made): one run of every
record in one module-scoped fixture, then the leave-one-record-out fits (seconds).

Targets (issue 13, per data set, pooled over the folds): expected calibration error
(10 bins) <= 0.05; area under the ROC curve of the confidence for telling errors > 10
bpm from the rest >= 0.9; at least half of the estimates at confidence >= 0.8, and at
least 95 % of those within tolerance (10 % or 5 bpm, ANSI/AAMI EC13, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest

from estimators import calibration

pytestmark = [pytest.mark.data, pytest.mark.slow]

CHECKED = ("spc exercise-wrist", "bidmc wrist", "bidmc fingertip-rest")
"""The data sets and profiles the targets apply to; ``spc wrist`` (the default profile
on running records, mostly locked on the wrong rate) is printed, and checked only for
what a calibration can promise there."""


@pytest.fixture(scope="module")
def table(shared_data):
    from bench import calibration as bench_calibration

    # No cache: the rows come from this code, whatever an earlier run left in /tmp.
    return bench_calibration.collect(shared_data, use_cache=False)


@pytest.fixture(scope="module")
def out_of_fold(table):
    from bench import calibration as bench_calibration

    prob = bench_calibration.out_of_fold(table)
    result = bench_calibration.report(table, prob)
    print("\n" + bench_calibration.text(result, "calibrated confidence, out of fold"))
    return prob, result


@pytest.mark.parametrize("group", CHECKED)
def test_out_of_fold_calibration_meets_the_targets(out_of_fold, group):
    _, result = out_of_fold
    pooled = result[group]["pooled"]
    # Measured when written: ECE 0.037 / 0.028 / 0.032, AUROC 0.927 / 0.908 / 0.915,
    # share >= 0.8 0.957 / 0.915 / 0.909, within tolerance of those 0.966 / 0.977 / 0.977
    # (SPC exercise-wrist / BIDMC wrist / BIDMC fingertip-rest).
    assert pooled["ece"] <= 0.05
    assert pooled["auroc"] >= 0.9
    assert pooled["share_confident"] >= 0.5
    assert pooled["precision_confident"] >= 0.95


def test_confident_estimates_on_the_running_records_are_within_tolerance(table, out_of_fold):
    """SPC 2015 windows that lie wholly in the running part (after the 30 s rest at the
    start, before the 30 s at the end; SOURCE.md), profile exercise-wrist: estimates at
    confidence >= 0.8 are within tolerance at >= 95 %, out of fold and with the shipped
    map (which saw these records)."""
    prob, _ = out_of_fold
    sel = table.group == "spc exercise-wrist"
    running = np.zeros(len(sel), dtype=bool)
    for record in np.unique(table.record[sel]):
        rows = sel & (table.record == record)
        start = table.time_s[rows] - 4.0  # a window of 8 s centred on time_s
        end = table.time_s[rows] + 4.0
        running[np.flatnonzero(rows)] = (start >= 30.0) & (end <= end.max() + 4.0 - 30.0)
    assert running.sum() > 1000
    within = table.within
    for name, confidence in (("out of fold", prob),
                             ("shipped", calibration.MAP(table.evidence))):
        confident = running & (confidence >= 0.8)
        print(f"\nrunning windows, {name}: {confident.sum()} of {running.sum()} at >= 0.8, "
              f"{within[confident].mean():.3f} of them within tolerance")
        # Measured when written: out of fold 1359 of 1421 at >= 0.8, 0.960 of them
        # within tolerance; shipped map 1315 of 1421, 0.996.
        assert within[confident].mean() >= 0.95
        assert confident.sum() >= 0.5 * running.sum()


def test_the_default_profile_on_running_records_no_longer_trusts_its_wrong_locks(table,
                                                                                 out_of_fold):
    """Profile wrist on SPC 2015 (running, no motion stage): most estimates are far off.
    Before calibration 94 % of the estimates more than 10 bpm off had confidence >= 0.8
    (issue 13); a calibrated confidence must not say that of a wrong lock."""
    prob, result = out_of_fold
    sel = table.group == "spc wrist"
    big = sel & table.big_error
    share = float(np.mean(prob[big] >= 0.8))
    print(f"\nspc wrist: {big.sum()} estimates > 10 bpm off, {share:.3f} of them at >= 0.8")
    # Measured: 0.139 out of fold (1043 such estimates), ECE 0.11. This group is the
    # default profile misused on running records (no motion stage; 38 % of its estimates
    # within tolerance), and the map is shared with the resting records. Two choices
    # made for those cost it calibration, both measured: half- and double-rate ratios
    # read on the tracked (de-shape) spectrum rather than the plain magnitude (else
    # correct pulses with a strong second harmonic were withheld; here 0.082 and ECE
    # 0.042 before), and the leakage margin estimators.calibration.HARMONIC_LEAK (else a
    # clean synthetic ramp was greyed at 0.68; here ECE 0.087 before). What the issue
    # reported for this group was 94 % of such wrong locks at >= 0.8; it must stay low.
    assert share <= 0.15
    assert result["spc wrist"]["pooled"]["ece"] <= 0.15


def test_without_the_accelerometer_the_exercise_confidence_says_so(table, out_of_fold):
    """SPC 2015 with the exercise profile and the accelerometer missing (its channels
    NaN, as from a lost or absent accelerometer stream): 34-65 % of the estimates were
    within tolerance on five of the twelve records, yet the confidence stayed at 0.98
    (measured before the ``blind`` family, estimators.calibration.FAMILIES). Out of fold
    the confidence must now rarely reach the "show" level there and not claim more than
    the outcome rate overall."""
    prob, result = out_of_fold
    blind = table.group == "spc exercise-wrist no-acc"
    with_acc = table.group == "spc exercise-wrist"
    assert blind.sum() > 1000
    share = float(np.mean(prob[blind] >= 0.8))
    print(f"\nno accelerometer: {share:.3f} at >= 0.8, mean confidence "
          f"{prob[blind].mean():.3f} (with it {prob[with_acc].mean():.3f}); within "
          f"tolerance {table.within[blind].mean():.3f}")
    # Measured when written: 0.021 at >= 0.8; mean 0.68 (0.99 with the accelerometer);
    # 0.665 within tolerance; ECE 0.12.
    assert share <= 0.05
    assert prob[blind].mean() <= table.within[blind].mean() + 0.05
    assert prob[blind].mean() < prob[with_acc].mean() - 0.2
