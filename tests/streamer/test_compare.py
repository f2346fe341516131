"""Tests of streamer.compare (loading references, pairing, metrics) and streamer.report."""

import csv
import math
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from estimators.estimate import Estimate
from estimators.metrics import agreement, rate_from_events
from streamer.compare import (
    EventTimes,
    OtherLog,
    RateSeries,
    add_overlay,
    compare,
    load_other,
    pair_up,
    summarize,
)
from streamer.errors import InputError
from streamer.report import DISCLAIMER, format_value, write_batch_summary, write_report
from streamer.sinks.estimate_log import EstimateLog, read_log
from tests.reference import wfdb_plain

ROOT = Path(__file__).resolve().parents[2]
DATA = ROOT / ".." / "shared" / "data"

DURATION_S = 120.0


def true_hr(t):
    return 70.0 + 10.0 * np.sin(2 * np.pi * t / 60.0)


def beat_times(duration_s=DURATION_S):
    # Beat k falls where the integrated rate (beats) reaches k + 0.5.
    t = np.arange(0.0, duration_s, 0.001)
    beats = np.cumsum(true_hr(t) / 60.0) * 0.001
    return np.interp(np.arange(0.5, beats[-1]), beats, t)


@pytest.fixture
def rng():
    return np.random.default_rng(7)


@pytest.fixture
def events():
    return beat_times()


@pytest.fixture
def log_path(tmp_path, events, rng):
    """A log with hr/PLETH (reference + 1 + noise, some gaps), hr/fused (the reference
    3 s late) and rr/RESP (about 15 per min)."""
    path = tmp_path / "live.csv"
    times = np.arange(4.0, DURATION_S - 4.0, 1.0)
    ref = rate_from_events(events, times, 8.0)
    ref_late = rate_from_events(events, times - 3.0, 8.0)
    with EstimateLog(path, "replay", "synthetic", {"PLETH": "ppg", "RESP": "resp"}, {}) as log:
        for k, t in enumerate(times):
            delay = 4.0 + 0.5 * (k % 3)
            pleth = np.nan if k % 10 == 7 else ref[k] + 1.0 + rng.normal(0, 0.5)
            conf = float(rng.uniform(0, 1))
            log.write(Estimate("hr", "PLETH", t, t + delay, pleth, conf, 0.9), 1.0)
            log.write(Estimate("hr", "fused", t, t + delay, ref_late[k], conf, 0.9), 1.0)
            log.write(Estimate("rr", "RESP", t, t + 16.0, 15.0 + rng.normal(0, 1), 0.5, 0.8))
    return path


def write_events_csv(path, times, header="beat_time_s"):
    lines = ([header] if header else []) + [repr(float(x)) for x in times]
    path.write_text("\n".join(lines) + "\n")
    return path


def write_mit_annotations(path, samples, codes):
    """MIT annotation words as SOURCE.md of record 100 describes them: code << 10 | increment,
    SKIP (59) + 32-bit increment (high word first) for long increments, 0 to end."""
    words, previous = [], 0
    for sample, code in zip(samples, codes):
        step = sample - previous
        if step > 1023:
            words += [59 << 10, (step >> 16) & 0xFFFF, step & 0xFFFF]
            step = 0
        words.append((code << 10) | step)
        previous = sample
    words.append(0)
    path.write_bytes(struct.pack(f"<{len(words)}H", *words))
    return path


# ---------------------------------------------------------------------------- loading


def test_load_other_recognises_each_type(tmp_path, log_path, events):
    other = load_other(log_path)
    assert isinstance(other, OtherLog) and other.table.pairs()[0] == ("hr", "PLETH")

    with_header = load_other(write_events_csv(tmp_path / "beats.csv", events[::-1]))
    assert isinstance(with_header, EventTimes) and with_header.quantity is None
    np.testing.assert_array_equal(with_header.times_s, events)  # sorted back
    no_header = load_other(write_events_csv(tmp_path / "beats.txt", events, header=None))
    np.testing.assert_array_equal(no_header.times_s, events)

    (tmp_path / "rate.csv").write_text("# monitor export\ntime_s,hr\n0,60\n1,\n2,62.5\n")
    rate = load_other(tmp_path / "rate.csv")
    assert isinstance(rate, RateSeries) and rate.name == "hr"
    np.testing.assert_array_equal(rate.time_s, [0.0, 1.0, 2.0])
    np.testing.assert_array_equal(rate.rate_per_min, [60.0, np.nan, 62.5])

    (tmp_path / "numerics.csv").write_text("Time [s], HR, PULSE, RESP\n0, 80, 81, 12\n1, NaN, 82, 13\n")
    chosen = load_other(tmp_path / "numerics.csv", column="resp")
    assert chosen.name == "RESP"
    np.testing.assert_array_equal(chosen.rate_per_min, [12.0, 13.0])


def test_load_wfdb_annotations_keeps_beats_only(tmp_path):
    # '+' (code 28) rhythm note at sample 18, then N (1), V (5), N beats at 360 Hz, one
    # after a long pause (> 1023 samples, stored with SKIP).
    (tmp_path / "rec.hea").write_text("rec 1 360 4000\nrec.dat 16 200 16 0 0 0 0 ECG\n")
    write_mit_annotations(tmp_path / "rec.atr", [18, 360, 720, 3600], [28, 1, 5, 1])
    other = load_other(tmp_path / "rec.atr")
    assert isinstance(other, EventTimes) and other.quantity == "hr"
    np.testing.assert_allclose(other.times_s, [1.0, 2.0, 10.0], rtol=1e-12)

    # Without a header the sampling rate must be given.
    write_mit_annotations(tmp_path / "alone.atr", [360, 720], [1, 1])
    np.testing.assert_allclose(load_other(tmp_path / "alone.atr", fs=180.0).times_s, [2.0, 4.0])
    with pytest.raises(InputError, match=r"alone.atr: the sampling rate of its sample numbers "
                                         r"is unknown; put the record header alone.hea"):
        load_other(tmp_path / "alone.atr")


def test_load_wfdb_annotations_without_beats_are_plain_events(tmp_path):
    (tmp_path / "b.hea").write_text("b 1 125 60000\nb.dat 16 200 16 0 0 0 0 RESP\n")
    # a note (code 22) at sample 0, then two non-beat annotations (code 27)
    write_mit_annotations(tmp_path / "b.breath", [0, 125, 625], [22, 27, 27])
    other = load_other(tmp_path / "b.breath")
    assert other.quantity is None
    np.testing.assert_allclose(other.times_s, [1.0, 5.0], rtol=1e-12)
    # a file of notes only: the notes are the events
    write_mit_annotations(tmp_path / "b.notes", [250, 500], [22, 22])
    np.testing.assert_allclose(load_other(tmp_path / "b.notes").times_s, [2.0, 4.0])


@pytest.mark.parametrize(
    "name, content, match",
    [
        ("x.edf", "whatever", r"x.edf: unknown file type '.edf'; pass an estimate log"),
        ("empty.csv", "# only a comment\n", r"empty.csv has no data rows"),
        ("three.csv", "t,a,b\n0,1,2\n", r"three.csv has 3 columns \(t, a, b\); expected 1"),
        ("ragged.csv", "t,hr\n0,60\n1\n", r"ragged.csv, line 3: 1 columns where 2 were expected"),
        ("word.csv", "t,hr\n0,60\n1,sixty\n", r"word.csv, line 3: 'sixty' in column 'hr' is not"),
        ("gap.csv", "beats\n0.5\n\n1.0\n,\n", r"gap.csv has 2 columns|gap.csv, line 5"),
        ("dup.csv", "0.5\n1.0\n1.0\n", r"dup.csv: two events at 1 s; remove the duplicate"),
        ("one.csv", "0.5\n", r"one.csv holds 1 events; at least 2 are needed"),
        ("back.csv", "t,hr\n0,60\n2,61\n1,62\n", r"back.csv, line 4: times in column 't' must be"),
        ("samples.csv", "breaths ann1 [signal sample no], breaths ann2 [signal sample no]\n"
                        "100,110\n400,420\n",
         r"column 'breaths ann1 \[signal sample no\]' holds sample numbers; give their "
         r"sampling rate \(--against-fs HZ\)"),
        ("big.csv", "0,100\n1,450\n", r"big.csv: column 'column 2' has values from 100 to 450, "
                                      r"not rates per minute"),
    ],
)
def test_load_other_errors(tmp_path, name, content, match):
    (tmp_path / name).write_text(content)
    with pytest.raises(InputError, match=match):
        load_other(tmp_path / name)


def test_sample_number_columns_become_event_times_with_their_rate(tmp_path):
    """The BIDMC breath files hold annotator columns of sample numbers, the shorter one
    padded with empty cells (see ../shared/data/bidmc/SOURCE.md); with the sampling rate
    they are event times: sample 250 at 125 Hz is 2 s."""
    path = tmp_path / "breaths.csv"
    path.write_text("breaths ann1 [signal sample no], breaths ann2 [signal sample no]\n"
                    "250,260\n750,760\n1250,\n")
    first = load_other(path, fs=125.0)
    np.testing.assert_allclose(first.times_s, [2.0, 6.0, 10.0])
    second = load_other(path, fs=125.0, column="breaths ann2 [signal sample no]")
    np.testing.assert_allclose(second.times_s, [260 / 125, 760 / 125])
    with pytest.raises(InputError, match=r"breaths.csv has no column 'ann3'"):
        load_other(path, fs=125.0, column="ann3")


def test_load_other_missing_file_and_unknown_column(tmp_path):
    with pytest.raises(InputError, match=r"nope.csv does not exist or is not a file"):
        load_other(tmp_path / "nope.csv")
    (tmp_path / "n.csv").write_text("time,HR\n0,60\n")
    with pytest.raises(InputError, match=r"n.csv has no rate column 'SpO2'; its columns are time, HR"):
        load_other(tmp_path / "n.csv", column="SpO2")
    (tmp_path / "m.csv").write_text("0,60\n")
    with pytest.raises(InputError, match=r"m.csv has no header row, so column 'HR' cannot be"):
        load_other(tmp_path / "m.csv", column="HR")


# ---------------------------------------------------------------------------- compare


def test_compare_with_events_matches_metrics(tmp_path, log_path, events):
    table = read_log(log_path)
    other = load_other(write_events_csv(tmp_path / "beats.csv", events))
    results = compare(table, other, quantity="hr")
    assert [(r["quantity"], r["source"]) for r in results] == [("hr", "PLETH"), ("hr", "fused")]
    for result in results:
        rows = table.select("hr", result["source"]).columns
        expected_ref = rate_from_events(events, rows["time_s"], 8.0)
        expected = agreement(rows["rate_per_min"], expected_ref)
        for key, value in expected.as_dict().items():
            assert result[key] == pytest.approx(value, rel=1e-12, nan_ok=True), key
        assert result["rows"] == rows["time_s"].size
        assert result["coverage"] == pytest.approx(np.mean(np.isfinite(rows["rate_per_min"])))
        assert result["delay_median_s"] == pytest.approx(np.median(rows["delay_s"]))
        assert result["delay_p95_s"] == pytest.approx(np.percentile(rows["delay_s"], 95))
        assert sum(b["count"] for b in result["calibration"]) == result["n"]
        assert result["window_s"] == 8.0 and result["reference_kind"] == "events"
    pleth, fused = results
    # hr/PLETH is the reference + 1 bpm + noise(0.5): bias near 1 (4 standard errors)
    assert abs(pleth["bias"] - 1.0) < 4 * 0.5 / math.sqrt(pleth["n"])
    assert pleth["coverage"] < 1.0  # every tenth row is empty
    # hr/fused shows the reference 3 s late
    assert fused["lag_s"] == 3.0
    assert pleth["lag_s"] == 0.0


def test_compare_breath_events_use_the_rr_window(tmp_path, log_path):
    breaths = np.arange(1.0, DURATION_S, 4.1)
    other = load_other(write_events_csv(tmp_path / "breaths.csv", breaths))
    [result] = compare(read_log(log_path), other, quantity="rr")
    rows = read_log(log_path).select("rr").columns
    reference = rate_from_events(breaths, rows["time_s"], 32.0)  # default rr window
    assert result["window_s"] == 32.0
    assert result["mae"] == pytest.approx(agreement(rows["rate_per_min"], reference).mae)
    # a window passed explicitly wins
    [result] = compare(read_log(log_path), other, quantity="rr", window_s={"rr": 20.0})
    assert result["window_s"] == 20.0
    # tolerance for breathing rate is +-2 per minute
    assert result["tolerance_abs"] == 2.0 and result["tolerance_rel"] == 0.0


def test_compare_quantity_errors(tmp_path, log_path, events):
    table = read_log(log_path)
    plain = load_other(write_events_csv(tmp_path / "ev.csv", events))
    with pytest.raises(InputError, match=r"ev.csv: cannot tell whether it is a heart-rate or a "
                                         r"breathing-rate reference while live.csv holds hr and rr"):
        compare(table, plain, log_name="live.csv")
    (tmp_path / "r.hea").write_text("r 1 100 100000\nr.dat 16 200 16 0 0 0 0 ECG\n")
    beats = load_other(write_mit_annotations(tmp_path / "r.atr", [100, 190, 285], [1, 1, 1]))
    with pytest.raises(InputError, match=r"r.atr holds beat annotations, a heart-rate \(hr\) "
                                         r"reference, not rr"):
        compare(table, beats, quantity="rr")
    # beat annotations imply hr: no quantity needed
    assert {r["quantity"] for r in compare(table, beats)} == {"hr"}
    with pytest.raises(InputError, match=r"^the estimate log: no source 'ECG' \(--source\); its "
                                         r"sources are PLETH, fused, RESP$"):
        compare(table, plain, quantity="hr", source="ECG")
    with pytest.raises(InputError, match=r"^the estimate log has no estimates for hr RESP; it "
                                         r"holds hr/PLETH, hr/fused, rr/RESP$"):
        compare(table, plain, quantity="hr", source="RESP")
    with pytest.raises(InputError, match=r"^--against-source PLETH needs an estimate log as the "
                                         r"reference; \S*ev.csv was read as events$"):
        compare(table, plain, quantity="hr", other_source="PLETH")
    with pytest.raises(InputError, match=r"unknown quantity 'spo2'; choose one of hr, rr"):
        compare(table, plain, quantity="spo2")


def test_compare_against_another_log(tmp_path, log_path):
    table = read_log(log_path)
    results = compare(table, load_other(log_path))
    assert [(r["quantity"], r["source"]) for r in results] == table.pairs()
    for r in results:
        rows = table.select(r["quantity"], r["source"]).columns
        assert r["n"] == np.isfinite(rows["rate_per_min"]).sum()
        assert r["mae"] == 0.0 and r["bias"] == 0.0 and r["lag_s"] == 0.0
        assert r["reference_kind"] == "estimate log"
    # compare hr/PLETH with the other log's hr/fused
    [r] = compare(table, load_other(log_path), source="PLETH", other_source="fused")
    assert r["reference"] == "live.csv (hr/fused)" and r["mae"] > 0
    with pytest.raises(InputError, match=r"^\S*live.csv: no source 'ECG' \(--against-source\); "
                                         r"its sources are PLETH, fused, RESP$"):
        compare(table, load_other(log_path), source="PLETH", other_source="ECG")
    # a source of the other log without the quantity asked for
    with pytest.raises(InputError, match=r"^\S*live.csv has none of hr/RESP to compare with; it "
                                         r"holds hr/PLETH, hr/fused, rr/RESP$"):
        compare(table, load_other(log_path), quantity="hr", source="PLETH",
                other_source="RESP")
    joined = tmp_path / "joined.csv"
    joined.write_text(log_path.read_text() + "".join(log_path.read_text().splitlines(True)[8:]))
    with pytest.raises(InputError, match=r"joined.csv: times of hr/PLETH are not strictly "
                                         r"increasing; is it several logs joined together\?"):
        compare(table, load_other(joined), source="PLETH")


def test_compare_against_rate_series(tmp_path, log_path):
    t = np.arange(0.0, DURATION_S, 0.5)
    lines = ["time_s,rate_per_min"] + [f"{float(x)!r},{float(60 + 0.25 * x)!r}" for x in t]
    (tmp_path / "rate.csv").write_text("\n".join(lines) + "\n")
    table = read_log(log_path)
    [paired] = pair_up(table, load_other(tmp_path / "rate.csv"), "hr", "PLETH")
    # the reference is linear in time, so interpolation at the log's times is exact
    np.testing.assert_allclose(paired.reference, 60 + 0.25 * paired.time_s, rtol=1e-12)
    assert paired.reference_label == "rate.csv (rate_per_min)"
    result = summarize(paired)
    assert result["reference_coverage"] == 1.0


# ----------------------------------------------------------------------------- report


def _png_is_drawn(path):
    from matplotlib import image

    pixels = image.imread(path)
    rgb = pixels[..., :3]
    return pixels.std() > 0 and not np.all(rgb == 1.0)


def test_write_report(tmp_path, log_path, events):
    table = read_log(log_path)
    other = load_other(write_events_csv(tmp_path / "beats.csv", events))
    series = pair_up(table, other, quantity="hr")
    add_overlay(series, "offline", table)  # a second log drawn in the rate figure
    assert series[0].extra_curves[0][0] == "offline"
    results = [summarize(s) for s in series]
    written = write_report(results, series, tmp_path / "report", "live vs beats")

    md = written["markdown"].read_text()
    page = written["html"].read_text()
    assert DISCLAIMER in md and DISCLAIMER in page
    assert len(written["figures"]) == 6
    for figure in written["figures"]:
        assert figure.is_file() and _png_is_drawn(figure)
        assert f"]({figure.name})" in md
    assert page.count("data:image/png;base64,") == 6
    for result, s in zip(results, series):
        expected = agreement(s.estimate, s.reference)
        section = md.split(f"## hr / {s.source} vs beats.csv")[1].split("## ")[0]
        assert f"| MAE (beats/min) | {format_value(expected.mae)} |" in section
        assert f"| RMSE (beats/min) | {format_value(expected.rmse)} |" in section
        assert f"| bias (estimate - reference) (beats/min) | {format_value(expected.bias)} |" in section
        assert f"| SD of differences (beats/min) | {format_value(expected.sd)} |" in section
        assert f"lower (beats/min) | {format_value(expected.loa_lower)} |" in section
        assert f"upper (beats/min) | {format_value(expected.loa_upper)} |" in section
        assert f"| MAPE (%) | {format_value(expected.mape_percent)} |" in section
        assert f"| Pearson r | {format_value(expected.pearson_r)} |" in section
        assert f"| fraction within tolerance | {format_value(expected.within_tolerance)} |" in section
        assert f"| pairs compared (n) | {expected.n} |" in section
        assert "| tolerance | max(5 beats/min, 10 % of reference) |" in section
        assert format_value(expected.mae) in page


def test_write_report_folder_error(tmp_path):
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match=r"cannot create the report folder .*file"):
        write_report([], [], tmp_path / "file", "t")


def test_write_batch_summary(tmp_path, log_path, events):
    table = read_log(log_path)
    other = load_other(write_events_csv(tmp_path / "beats.csv", events))
    rows = [{"recording": name, **r}
            for name in ("a", "b") for r in compare(table, other, quantity="hr")]
    written = write_batch_summary(rows, tmp_path / "batch")
    md = written["markdown"].read_text()
    assert DISCLAIMER in md and "calibration" not in md
    with open(written["csv"], newline="") as fh:
        back = list(csv.DictReader(fh))
    assert len(back) == 4 and back[3]["recording"] == "b"
    assert float(back[0]["mae"]) == rows[0]["mae"]  # full precision in the CSV
    assert f"| {format_value(rows[1]['rmse'])} |" in md


def test_importing_streamer_does_not_pull_matplotlib():
    code = ("import sys, streamer.compare, streamer.report; "
            "sys.exit(1 if any(m.startswith('matplotlib') for m in sys.modules) else 0)")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr


# ------------------------------------------------------------------------ real record


@pytest.mark.data
@pytest.mark.filterwarnings("ignore:The inplace keyword")  # raised inside the wfdb package
def test_record_100_beat_annotations():
    path = DATA / "physionet_wfdb" / "100.atr"
    if not path.is_file():
        pytest.skip(f"MIT-BIH record 100 not found at {path} (see /work/shared/data/README.md)")
    other = load_other(path)
    assert other.quantity == "hr"
    t = other.times_s
    # SOURCE.md of physionet_wfdb (MIT-BIH Arrhythmia Database, Moody & Mark 2001):
    # 2273 beats, mean heart rate 75.5 bpm, instantaneous 53-115 bpm.
    assert t.size == 2273
    assert 60.0 * (t.size - 1) / (t[-1] - t[0]) == pytest.approx(75.5, abs=0.1)
    # one window over the whole record (1 s to spare, so rounding keeps both ends inside)
    # gives the same mean rate
    whole = rate_from_events(t, [(t[0] + t[-1]) / 2], t[-1] - t[0] + 1.0)[0]
    assert whole == pytest.approx(60.0 * (t.size - 1) / (t[-1] - t[0]), rel=1e-12)
    inst = 60.0 / np.diff(t)
    assert round(inst.min()) == 53 and round(inst.max()) == 115
    # an independent reader (the byte-by-byte twin in tests/reference) gives the same
    # beat times
    plain = wfdb_plain.read_annotations(path, 360.0)
    np.testing.assert_allclose(t, plain.beat_times_s(), rtol=0, atol=1e-12)
    # and the beat codes are the beat symbols (WFDB symbol table, from memory)
    wfdb = pytest.importorskip("wfdb")
    ann = wfdb.rdann(str(path.with_suffix("")), "atr")
    is_beat = np.array([s in "NLRBAaJSVrFejnE/fQ?" for s in ann.symbol])
    np.testing.assert_allclose(t, np.asarray(ann.sample)[is_beat] / 360.0, rtol=0, atol=1e-12)
