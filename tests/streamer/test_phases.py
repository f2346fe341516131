"""Phases cut at markers: compare (report and terminal), offline, and the phase rows.

The synthetic session (all values exact by construction, written to a log at 0.5 s):
phase 0 (0-60 s) is 60 bpm; a marker "exercise" at 60 s starts a 20-s ramp to 100 bpm,
held to the next marker "recovery" at 120 s, after which the rate swings +-10 bpm around
85 bpm with a 20-s period and never settles. The estimate is the truth plus a per-phase
offset (0, +2, -1 bpm), so each phase's MAE and bias are known.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from estimators.estimate import Estimate
from streamer import cli
from streamer.compare import (
    FIRST_PHASE,
    STEADY,
    Phase,
    load_other,
    log_phases,
    pair_up,
    phases_of,
    split_phases,
)
from streamer.sinks.estimate_log import EstimateLog, read_log
from streamer.sources.base import ChannelInfo, Marker, Recording, SourceInfo

STEP_S = 0.5
TIMES = np.arange(0.0, 180.0, STEP_S)
MARKERS = (Marker(60.0, "exercise", "lab-markers"), Marker(120.0, "recovery", "lab-markers"))
OFFSETS = (0.0, 2.0, -1.0)


def truth(t):
    t = np.asarray(t, dtype=np.float64)
    ramp = 60.0 + 40.0 * np.clip((t - 60.0) / 20.0, 0.0, 1.0)
    swing = 85.0 + 10.0 * np.sin(2 * np.pi * (t - 120.0) / 20.0)
    return np.where(t < 60.0, 60.0, np.where(t < 120.0, ramp, swing))


def offset(t):
    return np.where(t < 60.0, OFFSETS[0], np.where(t < 120.0, OFFSETS[1], OFFSETS[2]))


def write_session(path, markers=MARKERS):
    rates = truth(TIMES) + offset(TIMES)
    pending = list(markers)
    with EstimateLog(path, "replay", "synthetic session", {"PPG": "ppg"}, {}) as log:
        for t, rate in zip(TIMES, rates):
            while pending and pending[0].time_s <= t:
                log.write_marker(pending.pop(0))
            log.write(Estimate("hr", "PPG", t, t + 4.0, float(rate), 0.9, 0.9), 1.0)
    return path


def write_reference(path):
    lines = ["time_s,rate_per_min"] + [f"{float(t)!r},{float(r)!r}" for t, r in zip(TIMES, truth(TIMES))]
    path.write_text("\n".join(lines) + "\n")
    return path


# Expected per phase, by hand from the construction above:
# durations: 60 (0-60), 60 (60-120), 59.5 (120 to the last estimate at 179.5);
# mean of phase 1: the ramp's 40 samples average (60 + 99) / 2 = 79.5, the 80 held
# samples are 100: (40 * 79.5 + 80 * 100) / 120; the swing's mean over its three whole
# periods (40 samples each) is 85; plus each phase's offset.
EXPECTED = [
    (FIRST_PHASE, 0.0, 60.0, 60.0, 60.0 + OFFSETS[0]),
    ("exercise", 60.0, 120.0, 60.0, (40 * 79.5 + 80 * 100.0) / 120 + OFFSETS[1]),
    ("recovery", 120.0, 179.5, 59.5, 85.0 + OFFSETS[2]),
]


def test_split_phases_cuts_at_markers_and_drops_empty_ones():
    phases = split_phases(MARKERS, 0.0, 179.5)
    assert [(p.label, p.start_s, p.end_s, p.marker_source) for p in phases] == [
        (FIRST_PHASE, 0.0, 60.0, ""), ("exercise", 60.0, 120.0, "lab-markers"),
        ("recovery", 120.0, 179.5, "lab-markers")]
    # out of order in, time order out; a marker at the session's start leaves no empty
    # first phase; two markers at one time leave one phase; one after the end, none
    odd = [Marker(90.0, "b"), Marker(0.0, "a"), Marker(90.0, "c"), Marker(200.0, "late")]
    assert [(p.label, p.start_s, p.end_s) for p in split_phases(odd, 0.0, 179.5)] == [
        ("a", 0.0, 90.0), ("c", 90.0, 179.5)]
    assert split_phases([], 0.0, 179.5) == []
    assert Phase("x", 3.0, 10.5).duration_s == 7.5


def test_compare_report_has_one_row_per_phase(tmp_path):
    table = read_log(write_session(tmp_path / "live.csv"))
    assert [m.text for m in table.markers] == ["exercise", "recovery"]
    series = pair_up(table, load_other(write_reference(tmp_path / "ref.csv")))
    phases = phases_of(series, table)
    rows = phases[("hr", "PPG")]
    assert len(rows) == 3
    for row, (label, start, end, duration, mean) in zip(rows, EXPECTED):
        assert (row["phase"], row["start_s"], row["end_s"]) == (label, start, end)
        assert row["duration_s"] == pytest.approx(duration, abs=1e-9)
        # rates are logged to 3 decimals: each row is off by at most 5e-4
        assert row["mean_rate"] == pytest.approx(mean, abs=5e-4)
    for row, bias in zip(rows, OFFSETS):
        assert row["mae"] == pytest.approx(abs(bias), abs=5e-4)
        assert row["bias"] == pytest.approx(bias, abs=5e-4)
        assert row["n"] == row["estimates"] == 120  # 0.5-s rows; the last phase keeps its end
        assert row["within_tolerance"] == 1.0
    # the ramp ends within 5 bpm of 100 at 60 + 20 * 35 / 40 = 77.5 s: 17.5 s after the
    # marker; the held first phase is steady at once; the swing never settles
    assert STEADY["hr"] == (5.0, 30.0)
    assert [row["time_to_steady_s"] for row in rows[:2]] == [0.0, 17.5]
    assert math.isnan(rows[2]["time_to_steady_s"])


def test_compare_cli_writes_phase_tables(tmp_path, capsys):
    log = write_session(tmp_path / "live.csv")
    ref = write_reference(tmp_path / "ref.csv")
    code = cli.main(["compare", str(log), "--against", str(ref), "--report",
                     str(tmp_path / "report"), "-q"])
    out, err = capsys.readouterr()
    assert code == 0, err
    lines = out.splitlines()
    start = lines.index("hr PPG by phase (beats/min):")
    assert lines[start + 1].split() == ["phase", "start", "s", "length", "s", "rows", "mean",
                                        "ref", "mean", "pairs", "MAE", "bias", "LoA", "low",
                                        "LoA", "high", "within", "steady", "after", "s"]
    assert lines[start + 3].split() == ["exercise", "60.000", "60.000", "120", "95.167",
                                        "93.167", "120", "2.000", "2.000", "2.000", "2.000",
                                        "1.000", "17.500"]
    assert lines[start + 4].split()[:3] == ["recovery", "120.000", "59.500"]
    assert lines[start + 4].split()[-1] == "n/a"
    md = (tmp_path / "report" / "summary.md").read_text()
    assert "| exercise | 60.000 | 60.000 | 120 | 95.167 | 93.167 | 120 | 2.000 | 2.000 |" in md
    assert md.count("| recovery | 120.000 | 59.500 |") == 1
    assert "Time to steady: from the phase's start" in md
    page = (tmp_path / "report" / "summary.html").read_text()
    assert "<td>exercise</td><td>60.000</td><td>60.000</td>" in page
    csv_rows = (tmp_path / "report" / "phases.csv").read_text().splitlines()
    assert csv_rows[0].startswith("quantity,source,phase,marker_source,start_s,end_s,"
                                  "duration_s,estimates,mean_rate,reference_mean,n,mae")
    assert len(csv_rows) == 4 and csv_rows[2].startswith("hr,PPG,exercise,lab-markers,60.0,")


def test_nothing_changes_without_markers(tmp_path, capsys):
    log = write_session(tmp_path / "live.csv", markers=())
    ref = write_reference(tmp_path / "ref.csv")
    code = cli.main(["compare", str(log), "--against", str(ref), "--report",
                     str(tmp_path / "report"), "-q"])
    out, _ = capsys.readouterr()
    assert code == 0
    assert len(out.splitlines()) == 1 and out.startswith("hr PPG vs ref.csv (rate_per_min): ")
    assert not (tmp_path / "report" / "phases.csv").exists()
    assert "Phases" not in (tmp_path / "report" / "summary.md").read_text()
    assert phases_of(pair_up(read_log(log), load_other(ref)), read_log(log)) == {}


def test_log_phases_without_reference_have_no_agreement_columns(tmp_path):
    rows = log_phases(read_log(write_session(tmp_path / "live.csv")))[("hr", "PPG")]
    assert [r["phase"] for r in rows] == [e[0] for e in EXPECTED]
    assert "mae" not in rows[0] and "reference_mean" not in rows[0]
    assert rows[1]["time_to_steady_s"] == 17.5


def test_offline_prints_phases_and_logs_markers(tmp_path, capsys, monkeypatch):
    """offline over a recording whose reader found markers: the markers go into the log
    and the phase table to stdout (a reader that fills markers is stood in for here)."""
    import streamer.sources.files as files

    fs = 125.0
    t = np.arange(0.0, 90.0, 1 / fs)
    # a pulse-like PPG: 70 bpm for 45 s, then 100 bpm (phase-continuous)
    rate_hz = np.where(t < 45.0, 70.0, 100.0) / 60.0
    ppg = np.sin(2 * np.pi * np.cumsum(rate_hz) / fs)
    info = SourceInfo("session.csv", fs, (ChannelInfo("PPG", "ppg", ""),), "file:session")
    markers = (Marker(45.0, "fast, \"hard\" — stage 2", "lab"),)
    recording = Recording(ppg[:, None].copy(), t, info, markers=markers)
    monkeypatch.setattr(files, "read_recording", lambda *a, **k: recording)
    monkeypatch.setattr(files, "recording_files", lambda *a, **k: [])
    log = tmp_path / "offline.csv"
    code = cli.main(["offline", "session.csv", "--log", str(log), "-q"])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert read_log(log).markers == list(markers)
    lines = out.splitlines()
    start = lines.index("hr PPG by phase (beats/min):")
    assert lines[start + 1].split()[:7] == ["phase", "start", "s", "length", "s", "rows", "mean"]
    first, second = lines[start + 2], lines[start + 3]
    assert first.startswith(FIRST_PHASE) and second.startswith(markers[0].text)
    # the rate each phase was built with, to within the EC13-style 5 bpm (cited from
    # memory) over a phase's mean, transitions included
    assert abs(float(first.split()[-2]) - 70.0) < 5.0
    assert abs(float(second.split()[-2]) - 100.0) < 5.0
    assert "ref" not in lines[start + 1]
    assert any(line.startswith("Time to steady:") for line in lines)
