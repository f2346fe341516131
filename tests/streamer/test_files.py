"""File readers: CSV, WFDB (the wfdb package, checked against the plain reader in
tests/reference/wfdb_plain.py), EDF, XDF."""

from __future__ import annotations

import gzip
import logging
import struct
from pathlib import Path

import numpy as np
import pytest

from streamer.errors import InputError
from streamer.sources import wfdb_reader
from streamer.sources.base import Marker
from streamer.sources.files import read_recording
from tests.reference import wfdb_plain
from tests import xdf_writer

DATA = Path(__file__).resolve().parents[2] / ".." / "shared" / "data"
WFDB_DIR = DATA / "physionet_wfdb"
BIDMC_DIR = DATA / "bidmc" / "bidmc_csv"


@pytest.fixture
def rng():
    return np.random.default_rng(20240611)


def write_text(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def csv_text(header: list[str], rows: np.ndarray) -> str:
    lines = [", ".join(header)]
    lines += [",".join(repr(float(v)) for v in row) for row in rows]
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------- CSV


def test_csv_with_time_column_reads_values_times_and_rate(tmp_path, rng):
    n = 400
    t = 12.5 + np.arange(n) / 250.0
    x = rng.standard_normal((n, 2))
    path = write_text(tmp_path / "rec.csv", csv_text(["Time [s]", "PLETH", "RESP"],
                                                     np.column_stack([t, x])))
    rec = read_recording(path)
    # repr() round-trips float64 exactly, so the parse must too.
    np.testing.assert_array_equal(rec.samples, x)
    np.testing.assert_array_equal(rec.timestamps, t)
    assert rec.samples.dtype == np.float64 and rec.samples.flags.c_contiguous
    assert rec.info.fs == pytest.approx(250.0, rel=1e-9)
    assert rec.info.channel_names == ["PLETH", "RESP"]
    assert rec.info.name == str(path)
    assert rec.info.source_id == "file:rec.csv"
    assert rec.events == {}


def test_csv_gz_gives_the_same_recording(tmp_path, rng):
    x = rng.standard_normal((100, 3))
    text = csv_text(["a", "b", "c"], x)
    plain = read_recording(write_text(tmp_path / "r.csv", text), fs=50)
    with gzip.open(tmp_path / "r.csv.gz", "wt") as f:
        f.write(text)
    packed = read_recording(tmp_path / "r.csv.gz", fs=50)
    np.testing.assert_array_equal(plain.samples, packed.samples)
    np.testing.assert_array_equal(plain.timestamps, packed.timestamps)
    assert packed.info.source_id == "file:r.csv.gz"


def test_csv_gz_truncated_or_not_gzip_is_refused(tmp_path):
    packed = gzip.compress(("a\n" + "1\n" * 5000).encode())
    (tmp_path / "cut.csv.gz").write_bytes(packed[: len(packed) // 2])
    with pytest.raises(InputError, match=r"cut\.csv\.gz: the compressed file is truncated"):
        read_recording(tmp_path / "cut.csv.gz", fs=1)
    (tmp_path / "plain.csv.gz").write_bytes(b"a\n1\n")
    with pytest.raises(InputError, match=r"plain\.csv\.gz: cannot read: Not a gzipped file"):
        read_recording(tmp_path / "plain.csv.gz", fs=1)


def test_csv_without_time_column_uses_fs(tmp_path, rng):
    x = rng.standard_normal((64, 2))
    rec = read_recording(write_text(tmp_path / "r.csv", csv_text(["ppg", "ecg"], x)), fs=32.0)
    np.testing.assert_array_equal(rec.timestamps, np.arange(64) / 32.0)
    assert rec.info.fs == 32.0
    np.testing.assert_array_equal(rec.samples, x)


def test_csv_without_time_column_or_fs_is_refused(tmp_path):
    path = write_text(tmp_path / "r.csv", "ppg,ecg\n1,2\n3,4\n")
    with pytest.raises(InputError, match=r"r\.csv: no time column \(looked for .*\) and no "
                                         r"--fs given; add a time column or pass --fs HZ"):
        read_recording(path)


@pytest.mark.parametrize("name, size_s", [
    ("time", 1.0), ("t", 1.0), ("Timestamp", 1.0), ("TIME [s]", 1.0), ("time_s", 1.0),
    ("t (s)", 1.0), ("time_ms", 1e-3), ("Time(ms)", 1e-3), ("timestamp_us", 1e-6),
    ("time [\u00b5s]", 1e-6), ("time_ns", 1e-9), ("Time-msec", 1e-3)])
def test_csv_time_column_names_are_recognised(tmp_path, name, size_s):
    """The column is found by its name without the unit, and its unit (in brackets or
    after a separator) scales the times to seconds."""
    times = np.array([0.0, 0.01, 0.02]) / size_s
    path = write_text(tmp_path / "r.csv", f"x,{name}\n" + "".join(
        f"{5 + k},{float(t)!r}\n" for k, t in enumerate(times)))
    rec = read_recording(path)
    assert rec.info.channel_names == ["x"]
    np.testing.assert_allclose(rec.timestamps, [0.0, 0.01, 0.02], rtol=1e-12, atol=0)
    assert rec.info.fs == pytest.approx(100.0, rel=1e-9)


def test_csv_time_unit_option_and_time_column_option(tmp_path, caplog):
    path = write_text(tmp_path / "r.csv", "x,Elapsed,t [s]\n1,0,0\n2,4,4\n3,8,8\n")
    rec = read_recording(path, time_column="elapsed", time_unit="ms")
    assert rec.info.channel_names == ["x", "t [s]"]
    np.testing.assert_allclose(rec.timestamps, [0.0, 0.004, 0.008], rtol=1e-12, atol=0)
    assert rec.info.fs == pytest.approx(250.0)
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(path, time_unit="ms")  # the column named in seconds
    np.testing.assert_allclose(rec.timestamps, [0.0, 0.004, 0.008], rtol=1e-12, atol=0)
    assert "time column 't [s]' says s; reading it in ms as --time-unit says" in caplog.text
    with pytest.raises(InputError, match=r"r\.csv: --time-column 'when': no such column; "
                                         r"columns are: x, Elapsed, t \[s\]$"):
        read_recording(path, time_column="when")
    with pytest.raises(InputError, match=r"n\.csv: --time-unit ms given, but no time column "
                                         r"found \(looked for a column named time, t, timestamp "
                                         r"or starting with 'time'\); name it with "
                                         r"--time-column NAME$"):
        read_recording(write_text(tmp_path / "n.csv", "x\n1\n2\n"), fs=100, time_unit="ms")


def test_csv_time_column_in_ms_is_converted(tmp_path):
    rec = read_recording(write_text(tmp_path / "r.csv", "Time [ms],x\n0,1\n4,2\n8,3\n"))
    np.testing.assert_allclose(rec.timestamps, [0.0, 0.004, 0.008], rtol=0, atol=1e-15)
    assert rec.info.fs == pytest.approx(250.0)


def test_csv_time_column_with_unknown_unit_is_refused(tmp_path):
    path = write_text(tmp_path / "r.csv", "Time [min],x\n0,1\n1,2\n")
    with pytest.raises(InputError, match=r"time column 'Time \[min\]' has unit 'min'"):
        read_recording(path)


def test_csv_fs_within_1_percent_of_the_time_column_keeps_file_times(tmp_path):
    path = write_text(tmp_path / "r.csv", "t,x\n0,1\n0.01,2\n0.02,3\n")
    rec = read_recording(path, fs=100.9)
    np.testing.assert_array_equal(rec.timestamps, [0.0, 0.01, 0.02])
    assert rec.info.fs == 100.9


def test_csv_fs_that_contradicts_the_time_column_is_refused(tmp_path):
    path = write_text(tmp_path / "r.csv", "t,x\n0,1\n0.01,2\n0.02,3\n")
    with pytest.raises(InputError, match=r"^.*r\.csv: --fs 102 Hz contradicts time column 't', "
                                         r"which gives 100 Hz read as seconds; drop --fs, or "
                                         r"fix the time column$"):
        read_recording(path, fs=102.0)
    ms = write_text(tmp_path / "ms.csv", "t,x\n0,1\n10,2\n20,3\n")
    with pytest.raises(InputError, match=r"^.*ms\.csv: --fs 100 Hz contradicts time column 't', "
                                         r"which gives 0\.1 Hz read as seconds; if its times "
                                         r"are in ms, pass --time-unit ms$"):
        read_recording(ms, fs=100.0)
    np.testing.assert_allclose(read_recording(ms, fs=100.0, time_unit="ms").timestamps,
                               [0.0, 0.01, 0.02], rtol=1e-12, atol=0)


@pytest.mark.parametrize("name, times, message", [
    ("t", [0, 8, 16], r"time column 't' has no unit, and read as seconds it gives 0\.125 Hz, "
                      r"outside 4-100000 Hz; if its times are in ms, pass --time-unit ms or "
                      r"name the column time_ms$"),
    ("t", [0, 1, 2], r"time column 't' has no unit, and read as seconds it gives 1 Hz, outside "
                     r"4-100000 Hz; if its times are in ms, pass --time-unit ms or name the "
                     r"column time_ms$"),
    ("time_us", [0, 1, 2], r"time column 'time_us' in us gives 1e\+06 Hz, outside 1-100000 Hz; "
                           r"if its times are in ms, pass --time-unit ms$"),
    ("t", [5, 5, 5], r"time column 't' does not increase \(every row holds 5\.0\); fix the time "
                     r"column, or drop it and pass --fs HZ$"),
])
def test_csv_time_columns_that_give_no_usable_rate_are_refused(tmp_path, name, times, message):
    text = f"{name},x\n" + "".join(f"{t},1\n" for t in times)
    with pytest.raises(InputError, match=r"^.*r\.csv: " + message):
        read_recording(write_text(tmp_path / "r.csv", text))


def test_csv_slow_time_column_in_stated_seconds_is_read(tmp_path):
    """A 2 Hz record is plausible when the column says it is in seconds."""
    rec = read_recording(write_text(tmp_path / "r.csv", "time_s,x\n0,1\n0.5,2\n1.0,3\n"))
    assert rec.info.fs == 2.0


def test_csv_non_numeric_cell_names_line_and_column(tmp_path):
    path = write_text(tmp_path / "r.csv", "# a comment\nt,a,b\n0,1,2\n0.1,3,abc\n0.2,5,6\n")
    with pytest.raises(InputError, match=r"r\.csv: line 4, column 3 \('b'\): 'abc' is not a "
                                         r"number; fix the cell"):
        read_recording(path)


def test_csv_empty_cells_read_as_nan_and_other_cells_exactly(tmp_path, rng):
    x = rng.standard_normal((50, 3))
    lines = csv_text(["a", "b", "c"], x).splitlines()
    lines[7] = lines[7].split(",", 1)[0] + ",," + lines[7].split(",")[2]  # row 6, column b
    rec = read_recording(write_text(tmp_path / "r.csv", "\n".join(lines) + "\n"), fs=10)
    expected = x.copy()
    expected[6, 1] = np.nan
    np.testing.assert_array_equal(rec.samples, expected)


def test_csv_trailing_delimiter_column_is_ignored(tmp_path):
    rec = read_recording(write_text(tmp_path / "r.csv", "time,a,\n0,1,\n0.05,,\n0.1,3,\n"))
    assert rec.info.channel_names == ["a"]
    np.testing.assert_array_equal(rec.samples[:, 0], [1.0, np.nan, 3.0])


def test_csv_empty_file_and_header_only_are_refused(tmp_path):
    with pytest.raises(InputError, match=r"e\.csv: file is empty; expected a header row"):
        read_recording(write_text(tmp_path / "e.csv", "\n\n"))
    with pytest.raises(InputError, match=r"h\.csv: no data rows after the header"):
        read_recording(write_text(tmp_path / "h.csv", "time,x\n"))


def test_csv_without_header_is_refused(tmp_path):
    with pytest.raises(InputError, match=r"line 1 looks like data, not a header"):
        read_recording(write_text(tmp_path / "r.csv", "0,1\n1,2\n"), fs=1)


def test_csv_truncated_last_line_is_dropped_with_a_warning(tmp_path, caplog):
    path = write_text(tmp_path / "r.csv", "t,a,b\n0,1,2\n0.05,3,4\n0.1,5")
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(path)
    np.testing.assert_array_equal(rec.samples, [[1, 2], [3, 4]])
    np.testing.assert_array_equal(rec.timestamps, [0.0, 0.05])
    assert "r.csv: line 4 has 2 of 3 cells (truncated last line); dropped it" in caplog.text


def test_csv_short_line_in_the_middle_is_refused(tmp_path):
    path = write_text(tmp_path / "r.csv", "t,a,b\n0,1,2\n0.5,3\n1.0,5,6\n")
    with pytest.raises(InputError, match=r"line 3 has 2 cells but the header has 3"):
        read_recording(path)


def test_csv_time_that_goes_backwards_is_refused(tmp_path):
    path = write_text(tmp_path / "r.csv", "t,a\n0,1\n0.5,2\n0.25,3\n")
    with pytest.raises(InputError, match=r"time column 't' goes backwards at data row 3 "
                                         r"\(0\.5 then 0\.25\); sort the rows"):
        read_recording(path)


def test_csv_time_rounded_to_few_digits_becomes_a_regular_grid(tmp_path, rng, caplog):
    # As in the BIDMC CSV files: 125 Hz times written with 5 significant digits repeat
    # (100.02, 100.02) and their one-sample median step is 0.01 s, not 0.008 s.
    n = 20000
    true_times = np.arange(n) / 125.0
    x = rng.standard_normal(n)
    text = "Time [s],x\n" + "".join(f"{t:.5g},{float(v)!r}\n" for t, v in zip(true_times, x))
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(write_text(tmp_path / "r.csv", text))
    assert rec.info.fs == pytest.approx(125.0, rel=1e-6)
    np.testing.assert_allclose(rec.timestamps, true_times, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(rec.samples[:, 0], x)
    assert "repeats times (written with too few digits); using a regular 125 Hz grid" in caplog.text


def test_csv_repeated_times_off_a_regular_grid_are_refused(tmp_path):
    times = np.arange(1000) / 10.0
    times[2] = times[1]
    times[500:] += 5.0  # a gap: no regular grid explains the repeat
    text = "t,a\n" + "".join(f"{float(t)!r},1\n" for t in times)
    with pytest.raises(InputError, match=r"repeats the time 0\.1 at data row 3 and is not a "
                                         r"regular 10 Hz grid; fix the time column"):
        read_recording(write_text(tmp_path / "r.csv", text))


def test_csv_rate_ignores_gaps_and_times_with_gaps_are_kept(tmp_path):
    times = np.concatenate([np.arange(300) / 100.0, 5.0 + np.arange(300) / 100.0])
    text = "t,a\n" + "".join(f"{float(t)!r},1\n" for t in times)
    rec = read_recording(write_text(tmp_path / "r.csv", text))
    assert rec.info.fs == pytest.approx(100.0, rel=1e-9)
    np.testing.assert_array_equal(rec.timestamps, times)


def test_csv_single_row_needs_fs(tmp_path):
    with pytest.raises(InputError, match=r"only one row; cannot infer the sampling rate"):
        read_recording(write_text(tmp_path / "r.csv", "t,a\n0,1\n"))


@pytest.mark.parametrize("delimiter", [";", "\t"])
def test_csv_other_delimiters(tmp_path, delimiter):
    path = write_text(tmp_path / "r.tsv", delimiter.join(["t", "a"]) + "\n"
                      + "\n".join(f"{k / 4}{delimiter}{k}" for k in range(8)) + "\n")
    rec = read_recording(path)
    np.testing.assert_array_equal(rec.samples[:, 0], np.arange(8))
    assert rec.info.fs == 4.0


def test_channel_selection_by_name_index_and_order(tmp_path, rng):
    x = rng.standard_normal((20, 3))
    path = write_text(tmp_path / "r.csv", csv_text(["time", "a", "b", "c"],
                                                   np.column_stack([np.arange(20) / 10, x])))
    rec = read_recording(path, channels=["c", "0"])
    assert rec.info.channel_names == ["c", "a"]
    np.testing.assert_array_equal(rec.samples, x[:, [2, 0]])
    assert read_recording(path, channels="b, C").info.channel_names == ["b", "c"]
    with pytest.raises(InputError, match=r"r\.csv: no channel 'X'; channels are: a, b, c$"):
        read_recording(path, channels=["a", "X"])
    with pytest.raises(InputError, match=r"no channel '3'; channels are: a, b, c"):
        read_recording(path, channels=["3"])


def test_unknown_extension_missing_file_and_bad_fs(tmp_path):
    with pytest.raises(InputError, match=r"r\.wav: unknown file type; supported: \.csv, "
                                         r"\.csv\.gz, .*\.hea, \.edf, \.bdf, \.xdf"):
        read_recording(write_text(tmp_path / "r.wav", "x"))
    with pytest.raises(InputError, match=r"nope\.csv: no such file; check the path"):
        read_recording(tmp_path / "nope.csv")
    with pytest.raises(InputError, match=r"--fs -5 must be a positive number"):
        read_recording(write_text(tmp_path / "r.csv", "a\n1\n"), fs=-5)


def test_csv_fast_and_slow_paths_agree(tmp_path, rng):
    # Values over 16 decades, inf and nan go through the fast path; an empty cell in
    # the last row sends the second file through the line-by-line path.
    x = rng.standard_normal((300, 4)) * 10.0 ** rng.integers(-8, 8, (300, 4))
    x[5, 2] = np.inf
    x[9, 0] = np.nan
    text = csv_text(["a", "b", "c", "d"], x)
    fast = read_recording(write_text(tmp_path / "fast.csv", text), fs=1)
    lines = text.splitlines()
    lines[-1] = ",".join(lines[-1].split(",")[:3]) + ","
    slow = read_recording(write_text(tmp_path / "slow.csv", "\n".join(lines) + "\n"), fs=1)
    np.testing.assert_array_equal(fast.samples, x)
    np.testing.assert_array_equal(slow.samples[:-1], x[:-1])
    assert np.isnan(slow.samples[-1, 3])


@pytest.mark.data
def test_bidmc_csv_record():
    path = BIDMC_DIR / "bidmc_01_Signals.csv.gz"
    if not path.is_file():
        pytest.skip(f"shared data not found: {path}")
    rec = read_recording(path, channels=["PLETH", "II"])
    # BIDMC SOURCE.md: 60001 samples per record at 125 Hz, t = 0 ... 480 s.
    assert rec.samples.shape == (60001, 2)
    assert rec.info.fs == pytest.approx(125.0, rel=1e-9)
    assert rec.timestamps[0] == 0.0 and rec.timestamps[-1] == pytest.approx(480.0)
    assert rec.info.channel_names == ["PLETH", "II"]
    assert not np.isnan(rec.samples).any()  # SOURCE.md: no NaN in any Signals file


# ---------------------------------------------------------------------------- WFDB


def wfdb_or_skip():
    return pytest.importorskip("wfdb", reason="the wfdb package is a dependency of ridgewatch; "
                                              "install the project (pip install -e .)")


@pytest.mark.data
def test_wfdb_record_100_matches_the_plain_reader():
    if not (WFDB_DIR / "100.hea").is_file():
        pytest.skip(f"shared data not found: {WFDB_DIR} (see its SOURCE.md)")
    rec = read_recording(WFDB_DIR / "100.hea")
    header = wfdb_plain.read_header(WFDB_DIR / "100.hea")
    reference, n_declared = wfdb_plain.read_signals(header, WFDB_DIR)
    # SOURCE.md of physionet_wfdb: 650000 samples, 2 channels MLII, V5, fs 360 Hz.
    assert rec.samples.shape == (650000, 2) and n_declared == 650000
    assert rec.info.fs == 360.0
    assert rec.info.channel_names == ["MLII", "V5"]
    assert [c.unit for c in rec.info.channels] == ["mV", "mV"]
    np.testing.assert_array_equal(rec.samples, reference)
    np.testing.assert_array_equal(rec.timestamps, np.arange(650000) / 360.0)

    annotations = wfdb_reader.read_annotations(WFDB_DIR / "100.atr", 360.0)
    plain = wfdb_plain.read_annotations(WFDB_DIR / "100.atr", 360.0)
    assert len(annotations.samples) == 2274  # SOURCE.md: 2274 annotations
    np.testing.assert_array_equal(annotations.samples, plain.samples)
    np.testing.assert_array_equal(annotations.codes, plain.codes)
    assert rec.events.keys() == {"atr"}
    assert len(rec.events["atr"]) == 2273  # SOURCE.md: 2273 beats + 1 rhythm label '+'
    np.testing.assert_array_equal(rec.events["atr"], plain.beat_times_s())


@pytest.mark.data
def test_wfdb_records_of_bidmc_match_the_plain_reader():
    folder = DATA / "bidmc"
    headers = sorted(folder.rglob("*.hea"))[:3] if folder.is_dir() else []
    if not headers:
        pytest.skip(f"no WFDB records under {folder}: its SOURCE.md says the copy holds the CSV "
                    "version only (the WFDB files are not in the repository it came from)")
    for path in headers:
        rec = read_recording(path)
        header = wfdb_plain.read_header(path)
        signals, _ = wfdb_plain.read_signal_list(header, path.parent)
        rates = [header.fs * s.samples_per_frame for s in header.signals]
        expected, _, fs = wfdb_reader.on_fastest_grid(signals, rates)
        assert rec.info.fs == fs
        np.testing.assert_array_equal(rec.samples, expected)


@pytest.mark.data
def test_wfdb_record_can_be_named_by_dat_or_record_name():
    if not (WFDB_DIR / "100.hea").is_file():
        pytest.skip(f"shared data not found: {WFDB_DIR}")
    by_dat = read_recording(WFDB_DIR / "100.dat", channels=["V5"])
    by_name = read_recording(WFDB_DIR / "100", channels=["V5"])
    np.testing.assert_array_equal(by_dat.samples, by_name.samples)
    assert by_dat.info.source_id == "file:100.hea"


def _write_by_hand(directory: Path, fmt: str, d: np.ndarray, gains, baselines) -> None:
    """Formats the wfdb package reads but does not write: 61 and 160."""
    n, n_sig = d.shape
    raw = (d.astype(">i2") if fmt == "61" else (d + 32768).astype("<u2")).tobytes()
    (directory / "rec.dat").write_bytes(raw)
    lines = [f"rec {n_sig} 128 {n}"]
    lines += [f"rec.dat {fmt} {g}({b})/mV 16 0 0 0 0 s{i}"
              for i, (g, b) in enumerate(zip(gains, baselines))]
    write_text(directory / "rec.hea", "\n".join(lines) + "\n")


#: Resolution in bits of each format written below (WFDB signal formats, from memory).
FORMAT_BITS = {"16": 16, "61": 16, "80": 8, "160": 16, "212": 12, "24": 24, "32": 32,
               "508": 8, "516": 16, "524": 24}


@pytest.mark.parametrize("fmt, n_sig", [("16", 2), ("61", 2), ("80", 3), ("160", 2),
                                        ("212", 3), ("212", 2), ("24", 1), ("32", 2),
                                        ("508", 2), ("516", 3), ("524", 1)])
def test_wfdb_formats_match_the_written_samples_and_the_plain_reader(tmp_path, rng, fmt,
                                                                     n_sig):
    wfdb = wfdb_or_skip()
    bits = FORMAT_BITS[fmt]
    # The smallest value of a format is its invalid marker: written values stay above it.
    low, high = -(1 << (bits - 1)) + 1, (1 << (bits - 1)) - 1
    n = 1001  # odd: the last format-212 frame of an odd signal count ends mid-triplet
    d = rng.integers(low, high + 1, (n, n_sig))
    d[0] = low
    d[1] = high
    gains = [100.0 + i for i in range(n_sig)]
    baselines = [7 * i for i in range(n_sig)]
    if fmt in ("61", "160"):
        _write_by_hand(tmp_path, fmt, d, gains, baselines)
    else:
        wfdb.wrsamp("rec", fs=128, units=["mV"] * n_sig,
                    sig_name=[f"s{i}" for i in range(n_sig)], d_signal=d, fmt=[fmt] * n_sig,
                    adc_gain=gains, baseline=baselines, write_dir=str(tmp_path))
    rec = read_recording(tmp_path / "rec.hea")
    assert rec.samples.shape == (n, n_sig)
    assert rec.info.fs == 128.0
    np.testing.assert_array_equal(rec.samples, (d - np.array(baselines)) / np.array(gains))
    assert rec.events == {}
    if int(fmt) in wfdb_plain.SUPPORTED_FORMATS:  # the plain reader decodes no FLAC
        header = wfdb_plain.read_header(tmp_path / "rec.hea")
        reference, _ = wfdb_plain.read_signals(header, tmp_path)
        np.testing.assert_array_equal(rec.samples, reference)


@pytest.mark.parametrize("fmt", ["16", "516"])
def test_wfdb_invalid_marker_becomes_nan(tmp_path, fmt):
    wfdb = wfdb_or_skip()
    d = np.array([[200], [-32768], [-400]])
    wfdb.wrsamp("rec", fs=100, units=["mV"], sig_name=["x"], d_signal=d, fmt=[fmt],
                adc_gain=[200.0], baseline=[0], write_dir=str(tmp_path))
    rec = read_recording(tmp_path / "rec.hea")
    np.testing.assert_array_equal(rec.samples[:, 0], [1.0, np.nan, -2.0])


def test_wfdb_invalid_marker_becomes_nan_by_hand(tmp_path):
    header = "rec 1 100 3\nrec.dat 16 200(0)/mV 16 0 0 0 0 x\n"
    write_text(tmp_path / "rec.hea", header)
    (tmp_path / "rec.dat").write_bytes(np.array([200, -32768, -400], "<i2").tobytes())
    rec = read_recording(tmp_path / "rec.hea")
    np.testing.assert_array_equal(rec.samples[:, 0], [1.0, np.nan, -2.0])


def test_wfdb_skewed_signal_is_shifted_back_without_a_checksum_warning(tmp_path, caplog):
    wfdb_or_skip()
    # Signal b is skewed by 2 frames: its sample k is stored in frame k + 2. The header
    # declares 8 frames; wfdb reads no frame beyond them, so b's last 2 samples are
    # missing (NaN). Checksum of a: 0 + 2 + ... + 14 = 56.
    (tmp_path / "sk.dat").write_bytes(np.arange(20).astype("<i2").tobytes())
    write_text(tmp_path / "sk.hea", "sk 2 100 8\nsk.dat 16 200(0)/mV 16 0 0 56 0 a\n"
                                    "sk.dat 16:2 200(0)/mV 16 0 0 0 0 b\n")
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(tmp_path / "sk.hea")
    np.testing.assert_array_equal(rec.samples[:, 0], np.arange(0, 16, 2) / 200.0)
    np.testing.assert_array_equal(rec.samples[:, 1],
                                  np.array([5, 7, 9, 11, 13, 15, np.nan, np.nan]) / 200.0)
    assert caplog.text == ""


def test_wfdb_truncated_dat_gives_the_complete_frames_with_a_warning(tmp_path, rng, caplog):
    wfdb = wfdb_or_skip()
    d = rng.integers(-2000, 2000, (500, 2))
    wfdb.wrsamp("rec", fs=100, units=["mV", "mV"], sig_name=["a", "b"], d_signal=d,
                fmt=["212", "212"], adc_gain=[200.0, 200.0], baseline=[0, 0],
                write_dir=str(tmp_path))
    dat = tmp_path / "rec.dat"
    dat.write_bytes(dat.read_bytes()[: 3 * 300 + 2])  # 300 frames and a partial one
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(tmp_path / "rec.hea")
    np.testing.assert_array_equal(rec.samples, d[:300] / 200.0)
    assert "holds 300 of the 500 samples the header declares" in caplog.text


def test_wfdb_checksum_mismatch_is_reported(tmp_path, rng, caplog):
    wfdb = wfdb_or_skip()
    d = rng.integers(-2000, 2000, (50, 1))
    wfdb.wrsamp("rec", fs=100, units=["mV"], sig_name=["a"], d_signal=d, fmt=["16"],
                adc_gain=[200.0], baseline=[0], write_dir=str(tmp_path))
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        read_recording(tmp_path / "rec.hea")
    assert "checksum" not in caplog.text  # intact file: no warning
    dat = tmp_path / "rec.dat"
    raw = bytearray(dat.read_bytes())
    raw[10] ^= 0x01
    dat.write_bytes(bytes(raw))
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        read_recording(tmp_path / "rec.hea")
    assert "signal 'a' fails its header checksum" in caplog.text


def test_wfdb_errors(tmp_path):
    write_text(tmp_path / "a.hea", "a 1 100 10\na.dat 999 200 10 0 0 0 0 x\n")
    with pytest.raises(InputError, match=r"a\.hea: line 2: signal format 999 is not "
                                         r"supported; supported formats: 8, 16, 24, 32, 61, "
                                         r"80, 160, 212, 310, 311, 508, 516, 524; convert"):
        read_recording(tmp_path / "a.hea")
    write_text(tmp_path / "b.hea", "b 1 100 10\nb.dat 16 200 16 0 0 0 0 x\n")
    with pytest.raises(InputError, match=r"b\.hea: signal file .*b\.dat is missing"):
        read_recording(tmp_path / "b.hea")
    write_text(tmp_path / "c.hea", "c 2 100 10\nc.dat 16 200 16 0 0 0 0 x\n")
    with pytest.raises(InputError, match=r"declares 2 signals but has 1 signal lines"):
        read_recording(tmp_path / "c.hea")
    write_text(tmp_path / "d.hea", "d/2 2 100 10\nd_1 10\n")
    with pytest.raises(InputError, match=r"multi-segment WFDB records are not supported"):
        read_recording(tmp_path / "d.hea")
    write_text(tmp_path / "e.hea", "e 1 100 10\n")
    (tmp_path / "e.dat").write_bytes(b"")
    with pytest.raises(InputError, match=r"declares 1 signals but has 0"):
        read_recording(tmp_path / "e.hea")
    write_text(tmp_path / "f.hea", "f 1 100 10\nf.dat 16 200 16 0 0 0 0 x\n")
    (tmp_path / "f.dat").write_bytes(b"\x01")
    with pytest.raises(InputError, match=r"f\.hea: the signal file holds no complete sample"):
        read_recording(tmp_path / "f.hea")
    # wfdb itself reads these without complaint (measured with wfdb 4.3.1)
    write_text(tmp_path / "g.hea", "g 1 abc 10\ng.dat 16 200 16 0 0 0 0 x\n")
    with pytest.raises(InputError, match=r"g\.hea: line 1: cannot parse the record line "
                                         r"'g 1 abc 10'; expected 'name n_signals"):
        read_recording(tmp_path / "g.hea")
    write_text(tmp_path / "h.hea", "h 1 100 10\n~ 16 200 16 0 0 0 0 x\n")
    with pytest.raises(InputError, match=r"h\.hea: line 2: signal 0 has no signal file"):
        read_recording(tmp_path / "h.hea")
    # ... and this one with an IndexError of its own
    write_text(tmp_path / "i.hea", "this is not a WFDB header\n")
    with pytest.raises(InputError, match=r"i\.hea: line 1: cannot parse the record line"):
        read_recording(tmp_path / "i.hea")
    write_text(tmp_path / "j.hea", "j 1 100 10\nj.dat 16 2x0/mV 16 0 0 0 0 x\n")
    (tmp_path / "j.dat").write_bytes(b"\x00" * 20)
    with pytest.raises(InputError, match=r"j\.hea: line 2: cannot parse the gain field '2x0/mV'"):
        read_recording(tmp_path / "j.hea")  # wfdb 4.3.1 reads it as a gain of 2
    write_text(tmp_path / "k.hea", "k 1 100 10\nk.dat 16 200 16 0 0 q 0 x\n")
    with pytest.raises(InputError, match=r"k\.hea: line 2: cannot parse the checksum field 'q'"):
        read_recording(tmp_path / "k.hea")
    # What only wfdb finds wrong is passed on in one line.
    write_text(tmp_path / "m.hea", "m 1 100 10 25:61:00\nm.dat 16 200 16 0 0 0 0 x\n")
    (tmp_path / "m.dat").write_bytes(b"\x00" * 20)
    with pytest.raises(InputError, match=r"^\S*m\.hea: malformed WFDB header \(ValueError: time "
                                         r"data '25:61:00' does not match format '%H:%M:%S'\); "
                                         r"check the header against the WFDB format$"):
        read_recording(tmp_path / "m.hea")


def test_wfdb_truncated_flac_gives_the_decodable_frames_with_a_warning(tmp_path, rng, caplog):
    wfdb = wfdb_or_skip()
    d = rng.integers(-2000, 2000, (20000, 2))
    wfdb.wrsamp("rec", fs=100, units=["mV", "mV"], sig_name=["a", "b"], d_signal=d,
                fmt=["516", "516"], adc_gain=[200.0, 200.0], baseline=[0, 0],
                write_dir=str(tmp_path))
    dat = tmp_path / "rec.dat"
    intact = dat.read_bytes()
    dat.write_bytes(intact[: len(intact) // 2])
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(tmp_path / "rec.hea")
    n = len(rec.samples)
    # Random samples hardly compress: half the bytes hold about half the samples; what
    # is lost besides is at most the cut FLAC frame and one read block (1024 samples).
    assert 10000 - 4096 - 1024 <= n < 10000
    np.testing.assert_array_equal(rec.samples, d[:n] / 200.0)
    assert (f"rec.hea: the signal file holds {n} of the 20000 samples the header declares "
            f"(truncated file); reading the first {n} samples") in caplog.text


def test_wfdb_flac_errors(tmp_path, rng):
    wfdb = wfdb_or_skip()
    d = rng.integers(-2000, 2000, (5000, 1))
    wfdb.wrsamp("rec", fs=100, units=["mV"], sig_name=["a"], d_signal=d, fmt=["516"],
                adc_gain=[200.0], baseline=[0], write_dir=str(tmp_path))
    dat = tmp_path / "rec.dat"
    intact = dat.read_bytes()
    # A header naming two signals in a file of one FLAC channel: wfdb refuses it.
    write_text(tmp_path / "two.hea", "two 2 100 5000\nrec.dat 516 200 16 0 0 0 0 a\n"
                                     "rec.dat 516 200 16 0 0 0 0 b\n")
    with pytest.raises(InputError, match=r"two\.hea: cannot decode the signal file\(s\) "
                                         r"rec\.dat \(ValueError: wrong number of channels in "
                                         r".*\); the file is damaged or does not match its "
                                         r"header$"):
        read_recording(tmp_path / "two.hea")
    dat.write_bytes(b"RIFF" + intact[4:])
    with pytest.raises(InputError, match=r"rec\.dat: not a readable FLAC stream \(format 516: "
                                         r".*\); the file is damaged or is not the one the "
                                         r"header names$"):
        read_recording(tmp_path / "rec.hea")
    dat.write_bytes(intact[:100])  # the stream header and not one whole FLAC frame
    with pytest.raises(InputError, match=r"rec\.hea: the signal file holds no complete sample"):
        read_recording(tmp_path / "rec.hea")
    dat.write_bytes(b"")
    with pytest.raises(InputError, match=r"rec\.hea: the signal file holds no complete sample"):
        read_recording(tmp_path / "rec.hea")


def test_wfdb_annotations_with_skips_aux_and_non_beats_match_the_plain_reader(tmp_path, rng):
    wfdb = wfdb_or_skip()
    d = rng.integers(-100, 100, (200000, 1))
    wfdb.wrsamp("rec", fs=250, units=["mV"], sig_name=["ecg"], d_signal=d, fmt=["16"],
                adc_gain=[200.0], baseline=[0], write_dir=str(tmp_path))
    # Gaps above 1023 samples need SKIP words; aux text needs AUX words.
    sample = np.array([5, 300, 2000, 2001, 90000, 150000, 150010, 199999])
    symbol = ["N", "+", "V", "~", "N", "A", "|", "/"]
    aux = ["", "(AFIB", "", "", "odd", "", "", "x"]
    wfdb.wrann("rec", "qrs", sample, symbol=symbol, aux_note=aux, write_dir=str(tmp_path))
    ours = wfdb_reader.read_annotations(tmp_path / "rec.qrs", 250.0)
    plain = wfdb_plain.read_annotations(tmp_path / "rec.qrs", 250.0)
    np.testing.assert_array_equal(ours.samples, sample)
    np.testing.assert_array_equal(ours.samples, plain.samples)
    np.testing.assert_array_equal(ours.codes, plain.codes)
    rec = read_recording(tmp_path / "rec.hea", annotators=["qrs"])
    beats = [s for s, sym in zip(sample, symbol) if sym in "NVA/"]
    np.testing.assert_array_equal(rec.events["qrs"], np.array(beats) / 250.0)
    with pytest.raises(InputError, match=r"annotation file .*rec\.xyz not found; check the "
                                         r"annotator name 'xyz'"):
        read_recording(tmp_path / "rec.hea", annotators=["xyz"])


def test_wfdb_annotation_time_resolution_note_sets_the_rate(tmp_path):
    wfdb = wfdb_or_skip()
    # wrann with fs writes a "## time resolution" note before the annotations.
    wfdb.wrann("r", "atr", np.array([100, 300]), symbol=["N", "N"], fs=1000,
               write_dir=str(tmp_path))
    ann = wfdb_reader.read_annotations(tmp_path / "r.atr", 250.0)
    assert ann.fs == 1000.0
    np.testing.assert_array_equal(ann.beat_times_s(), [0.1, 0.3])
    assert wfdb_plain.read_annotations(tmp_path / "r.atr", 250.0).fs == 1000.0


@pytest.mark.parametrize("reader", [wfdb_reader, wfdb_plain], ids=["wfdb", "plain"])
def test_wfdb_truncated_annotation_file_keeps_what_was_read(tmp_path, caplog, reader):
    # Hand-made MIT words: N at 10, N at +20, then the file ends without the 0 word.
    words = np.array([(1 << 10) | 10, (1 << 10) | 20], dtype="<u2")
    (tmp_path / "r.atr").write_bytes(words.tobytes())
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        ann = reader.read_annotations(tmp_path / "r.atr", 100.0)
    np.testing.assert_array_equal(ann.samples, [10, 30])
    np.testing.assert_array_equal(ann.beat_times_s(), [0.1, 0.3])
    assert "r.atr: annotation file ends without its end marker (truncated?); using the 2 " \
           "annotations read" in caplog.text


def test_wfdb_damaged_annotation_file_is_one_error(tmp_path):
    # A SKIP word (code 59) whose 32-bit increment is cut off after one word.
    words = np.array([(1 << 10) | 10, 59 << 10, 0], dtype="<u2")
    (tmp_path / "r.atr").write_bytes(words.tobytes()[:-2])
    with pytest.raises(InputError, match=r"r\.atr: cannot decode the annotation file \(\w+: "
                                         r".*\); the file is damaged or not in the MIT "
                                         r"annotation format$"):
        wfdb_reader.read_annotations(tmp_path / "r.atr", 100.0)


# ---------------------------------------------------------------- multi-frequency WFDB


def write_multi_frequency(folder: Path, name: str, signals: list[np.ndarray],
                          samples_per_frame: list[int], fmt: str, frame_fs: float,
                          sig_name: list[str], gains: list[float], one_file: bool = False):
    """A record whose signals have different samples per frame, written by the wfdb
    package's own writer (``wfdb.io.record.Record.wrsamp`` with the expanded signals).

    A FLAC signal file holds signals of one rate only (the wfdb writer refuses others), so
    each signal gets its own file unless ``one_file``."""
    from wfdb.io.record import Record

    n_frames = len(signals[0]) // samples_per_frame[0]
    files = ([f"{name}.dat"] * len(signals) if one_file
             else [f"{name}_{s.lower()}.dat" for s in sig_name])
    record = Record(record_name=name, fs=frame_fs, n_sig=len(signals), sig_len=n_frames,
                    file_name=files, fmt=[fmt] * len(signals),
                    samps_per_frame=list(samples_per_frame),
                    e_d_signal=[np.asarray(x, dtype=np.int64) for x in signals],
                    sig_name=list(sig_name), units=["mV"] * len(signals),
                    adc_gain=list(gains), baseline=[0] * len(signals))
    record.set_d_features(expanded=True)
    record.set_defaults()
    record.wrsamp(expanded=True, write_dir=str(folder))
    return folder / f"{name}.hea"


@pytest.mark.parametrize("fmt, one_file", [("16", True), ("212", True), ("16", False),
                                           ("516", False)])
def test_wfdb_multi_frequency_record_keeps_each_rate_and_matches_the_plain_reader(
        tmp_path, rng, fmt, one_file):
    wfdb_or_skip()
    n_frames = 301
    fast = rng.integers(-2000, 2000, 4 * n_frames)
    slow = rng.integers(-2000, 2000, n_frames)
    mid = rng.integers(-2000, 2000, 2 * n_frames)
    path = write_multi_frequency(tmp_path, "mf", [slow, fast, mid], [1, 4, 2], fmt, 62.5,
                                 ["SLOW", "FAST", "MID"], [100.0, 200.0, 50.0], one_file)
    header = wfdb_reader.read_header(path)
    assert header.fs == 62.5 and header.signal_rates == (62.5, 250.0, 125.0)
    values = wfdb_reader.read_signals(header)
    np.testing.assert_array_equal(values[0], slow / 100.0)
    np.testing.assert_array_equal(values[1], fast / 200.0)
    np.testing.assert_array_equal(values[2], mid / 50.0)
    if int(fmt) in wfdb_plain.SUPPORTED_FORMATS:
        plain, n_declared = wfdb_plain.read_signal_list(wfdb_plain.read_header(path), tmp_path)
        assert n_declared == n_frames
        for ours, theirs in zip(values, plain):
            np.testing.assert_array_equal(ours, theirs)

    rec = read_recording(path)
    assert rec.info.fs == 250.0 and rec.info.channel_names == ["SLOW", "FAST", "MID"]
    np.testing.assert_array_equal(rec.timestamps, np.arange(4 * n_frames) / 250.0)
    np.testing.assert_array_equal(rec.samples[:, 1], fast / 200.0)
    # Every 4th grid point is a sample of SLOW, every 2nd one of MID: exactly theirs.
    np.testing.assert_array_equal(rec.samples[::4, 0], slow / 100.0)
    np.testing.assert_array_equal(rec.samples[::2, 2], mid / 50.0)
    # Between them, the straight line through the neighbours; NaN past the last sample.
    k = np.arange(4 * (n_frames - 1))
    left, frac = k // 4, (k % 4) / 4.0
    np.testing.assert_allclose(rec.samples[k, 0],
                               ((1 - frac) * slow[left] + frac * slow[left + 1]) / 100.0,
                               rtol=0, atol=1e-12)
    assert np.isnan(rec.samples[-3:, 0]).all() and np.isnan(rec.samples[-1, 2])

    # Selecting the slower signals puts them on their own fastest grid: no resampling.
    picked = read_recording(path, channels=["MID", "SLOW"])
    assert picked.info.fs == 125.0 and picked.info.channel_names == ["MID", "SLOW"]
    np.testing.assert_array_equal(picked.samples[:, 0], mid / 50.0)
    np.testing.assert_array_equal(picked.samples[::2, 1], slow / 100.0)
    only = read_recording(path, channels=["SLOW"])
    assert only.info.fs == 62.5
    np.testing.assert_array_equal(only.samples[:, 0], slow / 100.0)


def test_wfdb_multi_frequency_warns_about_resampling(tmp_path, rng, caplog):
    wfdb_or_skip()
    path = write_multi_frequency(tmp_path, "mf", [rng.integers(-99, 99, 200),
                                                  rng.integers(-99, 99, 100)], [2, 1], "16",
                                 125.0, ["ECG", "PLETH"], [200.0, 200.0], one_file=True)
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        read_recording(path)
    assert ("mf.hea: resampled PLETH (125 Hz) to 250 Hz by linear interpolation; select "
            "signals of one rate to avoid it") in caplog.text


def test_help_and_csv_replay_do_not_import_wfdb(tmp_path):
    """wfdb (and the pandas it imports) costs about 0.3 s to import (DEVELOPERS.md): only
    reading a WFDB record may pay for it."""
    import subprocess
    import sys

    write_text(tmp_path / "rec.csv", csv_text(["time", "PPG"], np.array([[0.0, 1.0],
                                                                          [0.01, 2.0]])))
    code = ("import sys, contextlib, io\n"
            "from streamer import cli\n"
            "from streamer.sources.files import read_recording\n"
            "with contextlib.redirect_stdout(io.StringIO()), contextlib.suppress(SystemExit):\n"
            "    cli.main(['--help'])\n"
            f"read_recording({str(tmp_path / 'rec.csv')!r})\n"
            "sys.exit(1 if {'wfdb', 'pandas', 'soundfile'} & set(sys.modules) else 0)")
    root = Path(__file__).resolve().parents[2]
    done = subprocess.run([sys.executable, "-c", code], cwd=root, capture_output=True,
                          text=True)
    assert done.returncode == 0, done.stderr


def test_on_fastest_grid_interpolates_slower_signals_over_their_own_times():
    slow = np.array([0.0, 3.0, np.nan, 9.0])  # at 2 Hz: 0, 0.5, 1.0, 1.5 s
    fast = np.arange(8.0)  # at 4 Hz
    samples, timestamps, fs = wfdb_reader.on_fastest_grid([slow, fast], [2.0, 4.0])
    assert fs == 4.0
    np.testing.assert_array_equal(timestamps, np.arange(8) / 4.0)
    np.testing.assert_array_equal(samples[:, 1], fast)
    # halfway between 0 and 3 is 1.5; a NaN sample spoils both intervals it bounds
    np.testing.assert_array_equal(samples[:, 0],
                                  [0.0, 1.5, 3.0, np.nan, np.nan, np.nan, 9.0, np.nan])


# ---------------------------------------------------------------------------- EDF


PHYSICAL_MIN, PHYSICAL_MAX, DIGITAL_MIN, DIGITAL_MAX = -5.0, 5.0, -32768, 32767


def write_edf(path: Path, digital: list[np.ndarray], labels: list[str], rates: list[int]):
    """Write digital values, so that the physical values expected back are exact."""
    from pyedflib import highlevel

    headers = [highlevel.make_signal_header(label, dimension="mV", sample_frequency=rate,
                                            physical_min=PHYSICAL_MIN,
                                            physical_max=PHYSICAL_MAX,
                                            digital_min=DIGITAL_MIN, digital_max=DIGITAL_MAX)
               for label, rate in zip(labels, rates)]
    highlevel.write_edf(str(path), [np.asarray(d, dtype=np.int32) for d in digital], headers,
                        digital=True)


def edf_physical(d: np.ndarray) -> np.ndarray:
    # EDF specification (from memory): physical is linear in digital, the two ranges'
    # end points corresponding.
    scale = (PHYSICAL_MAX - PHYSICAL_MIN) / (DIGITAL_MAX - DIGITAL_MIN)
    return PHYSICAL_MIN + (np.asarray(d, dtype=np.float64) - DIGITAL_MIN) * scale


def test_edf_round_trip(tmp_path, rng):
    pytest.importorskip("pyedflib")
    d = [rng.integers(DIGITAL_MIN, DIGITAL_MAX + 1, 2560) for _ in range(2)]
    write_edf(tmp_path / "r.edf", d, ["PPG", "ECG"], [256, 256])
    rec = read_recording(tmp_path / "r.edf")
    assert rec.info.channel_names == ["PPG", "ECG"]
    assert rec.info.fs == 256.0
    assert [c.unit for c in rec.info.channels] == ["mV", "mV"]
    assert rec.info.source_id == "file:r.edf"
    np.testing.assert_array_equal(rec.timestamps, np.arange(2560) / 256.0)
    np.testing.assert_allclose(rec.samples, np.column_stack([edf_physical(x) for x in d]),
                               rtol=1e-12, atol=1e-12)
    only_ecg = read_recording(tmp_path / "r.edf", channels=["1"])
    np.testing.assert_array_equal(only_ecg.samples[:, 0], rec.samples[:, 1])


def test_edf_mixed_rates_resample_to_the_highest(tmp_path, rng, caplog):
    pytest.importorskip("pyedflib")
    fast = rng.integers(DIGITAL_MIN, DIGITAL_MAX + 1, 2560)
    slow = rng.integers(DIGITAL_MIN, DIGITAL_MAX + 1, 320)
    write_edf(tmp_path / "r.edf", [fast, slow], ["PPG", "ACC X"], [256, 32])
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(tmp_path / "r.edf")
    assert "resampled ACC X (32 Hz) to 256 Hz by linear interpolation" in caplog.text
    assert rec.samples.shape == (2560, 2)
    assert rec.info.fs == 256.0
    np.testing.assert_allclose(rec.samples[:, 0], edf_physical(fast), rtol=1e-12, atol=1e-12)
    # Where the two time grids meet (every 8th fast sample) the slow channel is unchanged;
    # half-way between it is the mean of its neighbours; past its last sample it is NaN.
    slow_physical = edf_physical(slow)
    np.testing.assert_allclose(rec.samples[::8, 1], slow_physical, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(rec.samples[4:-8:8, 1],
                               (slow_physical[:-1] + slow_physical[1:]) / 2,
                               rtol=1e-12, atol=1e-12)
    assert np.isnan(rec.samples[-7:, 1]).all() and not np.isnan(rec.samples[:-7]).any()


def test_edf_selected_channels_of_one_rate_are_not_resampled(tmp_path, rng, caplog):
    pytest.importorskip("pyedflib")
    fast = rng.integers(DIGITAL_MIN, DIGITAL_MAX + 1, 2560)
    slow = rng.integers(DIGITAL_MIN, DIGITAL_MAX + 1, 320)
    write_edf(tmp_path / "r.edf", [fast, slow, slow[::-1]], ["PPG", "ACC X", "ACC Y"],
              [256, 32, 32])
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(tmp_path / "r.edf", channels=["ACC Y", "acc x"])
    assert caplog.records == []
    assert rec.info.fs == 32.0 and rec.info.channel_names == ["ACC Y", "ACC X"]
    np.testing.assert_allclose(rec.samples, edf_physical(np.column_stack([slow[::-1], slow])),
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(rec.timestamps, np.arange(320) / 32.0)
    with pytest.raises(InputError, match=r"r\.edf: no channel 'ACC Z'; channels are: PPG, "
                                         r"ACC X, ACC Y$"):
        read_recording(tmp_path / "r.edf", channels=["ACC Z"])


def test_edf_truncated_or_garbage_is_refused(tmp_path, rng):
    pytest.importorskip("pyedflib")
    write_edf(tmp_path / "r.edf", [np.zeros(2560, dtype=int)], ["PPG"], [256])
    raw = (tmp_path / "r.edf").read_bytes()
    (tmp_path / "cut.edf").write_bytes(raw[:-700])
    with pytest.raises(InputError, match=r"cut\.edf: EDF file is truncated \(\d+ of \d+ bytes"):
        read_recording(tmp_path / "cut.edf")
    (tmp_path / "junk.edf").write_bytes(b"not an edf file at all")
    with pytest.raises(InputError, match=r"junk\.edf: too short for an EDF/BDF header"):
        read_recording(tmp_path / "junk.edf")
    (tmp_path / "junk2.edf").write_bytes(b"x" * 600)
    with pytest.raises(InputError, match=r"junk2\.edf: malformed EDF/BDF header"):
        read_recording(tmp_path / "junk2.edf")


# ---------------------------------------------------------------------------- XDF
# Files written byte by byte with tests/xdf_writer.py (its docstring gives the layout).

_chunk, _stream_header, _samples, _footer = (xdf_writer.chunk, xdf_writer.stream_header,
                                             xdf_writer.samples_chunk, xdf_writer.footer)


def write_xdf(path: Path, rng, clock_offset: float | None = None):
    """Three streams: markers (strings), a 1-channel double stream and a 3-channel
    float32 PPG stream at 100 Hz whose samples come in 4 chunks, one sample without a
    timestamp. Returns the expected stamps and values of the PPG stream."""
    n, fs = 400, 100.0
    stamps = 1000.0 + np.arange(n) / fs + rng.uniform(-1e-3, 1e-3, n)
    values = rng.standard_normal((n, 3)).astype(np.float32)
    written = [float(s) for s in stamps]
    written_or_none = list(written)
    written_or_none[101] = None  # the reader deduces it: previous + 1/fs
    stamps[101] = stamps[100] + 1 / fs
    out = b"XDF:" + _chunk(1, b'<?xml version="1.0"?><info><version>1.0</version></info>')
    out += _stream_header(1, "Markers", "Markers", "string", 0, [("event", "", "")])
    out += _stream_header(2, "Temperature", "Temp", "double64", 1, [("temp", "", "C")])
    out += _stream_header(3, "Wrist", "PPG", "float32", fs,
                          [("green", "PPG", "au"), ("red", "", "au"), ("accx", "ACC", "g")])
    out += _samples(1, [1000.5], [["start"]], "string")
    out += _samples(2, [1000.0, 1001.0, 1002.0], [[36.5], [36.6], [36.7]], "double64")
    for a in range(0, n, 100):
        out += _samples(3, written_or_none[a:a + 100], values[a:a + 100], "float32")
        if clock_offset is not None:
            out += _chunk(4, struct.pack("<Idd", 3, 1000.0 + a / fs, clock_offset))
    out += _footer(1, 1000.5, 1000.5, 1)
    out += _footer(2, 1000.0, 1002.0, 3)
    out += _footer(3, written[0], written[-1], n)
    path.write_bytes(out)
    return stamps, values


def test_xdf_one_stream_keeps_its_own_stamps_and_the_markers(tmp_path, rng, caplog):
    pytest.importorskip("pyxdf")
    stamps, values = write_xdf(tmp_path / "r.xdf", rng)
    with caplog.at_level(logging.WARNING):
        rec = read_recording(tmp_path / "r.xdf", stream="Wrist")
    assert caplog.records == []  # an intact file reads without any warning
    assert rec.info.channel_names == ["green", "red", "accx"]
    assert [c.kind for c in rec.info.channels] == ["ppg", "ppg", "acc"]  # stream type PPG
    assert [c.unit for c in rec.info.channels] == ["au", "au", "g"]
    assert rec.info.fs == 100.0
    assert rec.info.source_id == "file:r.xdf"
    np.testing.assert_array_equal(rec.samples, values.astype(np.float64))
    np.testing.assert_allclose(rec.timestamps, stamps, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(np.delete(rec.timestamps, 101), np.delete(stamps, 101))
    # The text stream is read whichever numeric streams are chosen.
    assert rec.markers == (Marker(1000.5, "start", "Markers"),)


def test_xdf_every_numeric_stream_by_default_on_the_fastest_grid(tmp_path, rng, caplog):
    pytest.importorskip("pyxdf")
    stamps, values = write_xdf(tmp_path / "r.xdf", rng)
    with caplog.at_level(logging.WARNING):
        rec = read_recording(tmp_path / "r.xdf")
    assert caplog.records == []
    assert rec.info.channel_names == ["temp", "green", "red", "accx"]  # file order
    assert [c.kind for c in rec.info.channels] == [None, "ppg", "ppg", "acc"]
    assert rec.info.fs == 100.0 and rec.info.name == str(tmp_path / "r.xdf")
    assert rec.info.source_id == "file:r.xdf"
    # The grid of the fastest stream from its first stamp; each stream read there by
    # linear interpolation (numpy's interp is the reference), the 1 Hz stream NaN outside
    # its samples (1000.0 to 1002.0 s).
    grid = stamps[0] + np.arange(len(rec.timestamps)) / 100.0
    np.testing.assert_allclose(rec.timestamps, grid, rtol=0, atol=1e-9)
    assert rec.timestamps[-1] <= stamps[-1] < rec.timestamps[-1] + 0.01
    for c in range(3):
        np.testing.assert_allclose(rec.samples[:, 1 + c],
                                   np.interp(grid, stamps, values[:, c].astype(np.float64)),
                                   rtol=1e-9, atol=1e-6)
    inside = (grid >= 1000.0) & (grid <= 1002.0)
    np.testing.assert_allclose(rec.samples[inside, 0],
                               np.interp(grid[inside], [1000.0, 1001.0, 1002.0],
                                         [36.5, 36.6, 36.7]), rtol=1e-12)
    assert np.isnan(rec.samples[~inside, 0]).all() and (~inside).sum() > 0
    assert rec.markers == (Marker(1000.5, "start", "Markers"),)


def test_xdf_stream_by_name_and_unknown_stream(tmp_path, rng):
    pytest.importorskip("pyxdf")
    write_xdf(tmp_path / "r.xdf", rng)
    rec = read_recording(tmp_path / "r.xdf", stream="Temperature")
    np.testing.assert_array_equal(rec.samples[:, 0], [36.5, 36.6, 36.7])
    np.testing.assert_array_equal(rec.timestamps, [1000.0, 1001.0, 1002.0])
    assert rec.info.channel_names == ["temp"] and rec.info.channels[0].kind is None
    streams = (r"Markers \(type Markers, 1 x string, 1 samples\); Temperature \(type Temp, "
               r"1 x double64, 3 samples\); Wrist \(type PPG, 3 x float32, 400 samples\)$")
    with pytest.raises(InputError, match=r"r\.xdf: no stream named 'EEG'; streams are: "
                                         + streams):
        read_recording(tmp_path / "r.xdf", stream="EEG")
    with pytest.raises(InputError, match=r"r\.xdf: no stream named 'EEG'; streams are: "):
        read_recording(tmp_path / "r.xdf", stream=["Wrist", "EEG"])
    # Only the numeric streams are offered, not the marker stream that was refused.
    numeric = (r"Temperature \(type Temp, 1 x double64, 3 samples\); Wrist \(type PPG, 3 x "
               r"float32, 400 samples\)$")
    with pytest.raises(InputError, match=r"r\.xdf: stream 'Markers' holds no numeric samples "
                                         r"\(text markers, which are always read\); --stream "
                                         r"chooses among the numeric streams: " + numeric):
        read_recording(tmp_path / "r.xdf", stream="Markers")
    # Several streams in the order named; a name given twice counts once.
    rec = read_recording(tmp_path / "r.xdf", stream=["Wrist", "Temperature", "Wrist"])
    assert rec.info.channel_names == ["green", "red", "accx", "temp"]


def test_xdf_clock_offsets_are_applied(tmp_path, rng):
    pytest.importorskip("pyxdf")
    stamps, _ = write_xdf(tmp_path / "r.xdf", rng, clock_offset=0.25)
    rec = read_recording(tmp_path / "r.xdf", stream="Wrist")
    np.testing.assert_allclose(rec.timestamps, stamps + 0.25, rtol=0, atol=1e-9)


def test_xdf_truncated_file_keeps_complete_chunks_with_a_warning(tmp_path, rng, caplog):
    pytest.importorskip("pyxdf")
    stamps, values = write_xdf(tmp_path / "r.xdf", rng)
    raw = (tmp_path / "r.xdf").read_bytes()
    # Cut inside the last PPG samples chunk: samples 300-399 are lost with it.
    last_chunk = raw.rfind(b"\x03\x00\x03\x00\x00\x00") - 5  # [4][uint32 length][tag 3][id 3]
    cut = last_chunk + 200
    (tmp_path / "cut.xdf").write_bytes(raw[:cut])
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(tmp_path / "cut.xdf", stream="Wrist")
    np.testing.assert_array_equal(rec.samples, values[:300].astype(np.float64))
    np.testing.assert_array_equal(rec.timestamps[:100], stamps[:100])
    assert f"cut.xdf: XDF file ends inside a chunk at byte {last_chunk} of {cut}" in caplog.text
    assert "cut.xdf: XDF file looks truncated or damaged (no stream footer)" in caplog.text
    assert "using the 300 samples of stream 'Wrist'" in caplog.text


def test_xdf_cut_anywhere_gives_a_clean_prefix_or_an_input_error(tmp_path, rng):
    pytest.importorskip("pyxdf")
    stamps, values = write_xdf(tmp_path / "r.xdf", rng)
    raw = (tmp_path / "r.xdf").read_bytes()
    for cut in range(4, len(raw), 97):
        (tmp_path / "cut.xdf").write_bytes(raw[:cut])
        try:  # every numeric stream: a recording or one clear line, nothing else
            merged = read_recording(tmp_path / "cut.xdf")
            assert len(merged.timestamps) > 0
        except InputError:
            pass
        try:
            rec = read_recording(tmp_path / "cut.xdf", stream="Wrist")
        except InputError:
            try:
                rec = read_recording(tmp_path / "cut.xdf", stream="Temperature")
            except InputError:
                continue
        # Whatever is returned is a prefix of the PPG stream or of the 1-channel stream.
        n = len(rec.timestamps)
        if rec.info.channel_names == ["green", "red", "accx"]:
            np.testing.assert_array_equal(rec.samples, values[:n].astype(np.float64))
        else:
            np.testing.assert_array_equal(rec.samples[:, 0], [36.5, 36.6, 36.7][:n])


def test_xdfz_and_malformed_chunk(tmp_path, rng, caplog):
    pytest.importorskip("pyxdf")
    stamps, values = write_xdf(tmp_path / "r.xdf", rng)
    raw = (tmp_path / "r.xdf").read_bytes()
    (tmp_path / "r.xdfz").write_bytes(gzip.compress(raw))
    rec = read_recording(tmp_path / "r.xdfz", stream="Wrist")
    np.testing.assert_array_equal(rec.samples, values.astype(np.float64))
    # A NumLengthBytes of 3 is not allowed: reading stops before that chunk.
    last_chunk = raw.rfind(b"\x03\x00\x03\x00\x00\x00") - 5
    broken = raw[:last_chunk] + b"\x03" + raw[last_chunk + 1:]
    (tmp_path / "broken.xdf").write_bytes(broken)
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(tmp_path / "broken.xdf", stream="Wrist")
    assert f"XDF file has a malformed chunk at byte {last_chunk}" in caplog.text
    np.testing.assert_array_equal(rec.samples, values[:300].astype(np.float64))


def test_xdf_not_xdf_is_refused(tmp_path):
    pytest.importorskip("pyxdf")
    (tmp_path / "r.xdf").write_bytes(b"RIFF....")
    with pytest.raises(InputError, match=r"r\.xdf: cannot read as XDF \(no 'XDF:' magic at "
                                         r"the start\); the file is not XDF"):
        read_recording(tmp_path / "r.xdf")
    (tmp_path / "r.xdfz").write_bytes(b"XDF:....")
    with pytest.raises(InputError, match=r"r\.xdfz: cannot read: Not a gzipped file"):
        read_recording(tmp_path / "r.xdfz")


def test_xdf_without_numeric_streams_is_refused(tmp_path):
    pytest.importorskip("pyxdf")
    out = b"XDF:" + _chunk(1, b'<?xml version="1.0"?><info><version>1.0</version></info>')
    out += _stream_header(1, "Markers", "Markers", "string", 0, [("event", "", "")])
    out += _samples(1, [1.0], [["go"]], "string")
    out += _footer(1, 1.0, 1.0, 1)
    (tmp_path / "m.xdf").write_bytes(out)
    with pytest.raises(InputError, match=r"m\.xdf: no stream with numeric samples; streams "
                                         r"are: Markers"):
        read_recording(tmp_path / "m.xdf")


def test_xdf_irregular_stream_rate_from_median_step(tmp_path):
    pytest.importorskip("pyxdf")
    stamps = [10.0, 10.5, 11.0, 11.6, 12.1]
    out = b"XDF:" + _chunk(1, b'<?xml version="1.0"?><info><version>1.0</version></info>')
    out += _stream_header(1, "HR", "misc", "int16", 0, [("", "", "")])
    out += _samples(1, stamps, [[k] for k in range(5)], "int16")
    out += _footer(1, 10.0, 12.1, 5)
    (tmp_path / "i.xdf").write_bytes(out)
    rec = read_recording(tmp_path / "i.xdf")
    assert rec.info.fs == pytest.approx(2.0)
    assert rec.info.channel_names == ["ch0"]
    np.testing.assert_array_equal(rec.samples[:, 0], np.arange(5.0))



# ------------------------------------------------------------- CSV read in pieces


def _pieces_text(rng, n_rows=400):
    """A CSV exercising every path of the piece reader: comment and empty lines in the
    body, CRLF line ends, an empty cell (line-by-line parse of its piece only) and a
    truncated last line."""
    x = np.round(rng.standard_normal((n_rows, 2)), 6).tolist()
    lines = ["# exported", "time_s,a,b"]
    for k, row in enumerate(x):
        lines.append(f"{k / 100:.2f},{row[0]!r},{row[1]!r}")
        if k in (50, 51, 300):
            lines.append("# a note" if k != 51 else "")
    lines[200] = lines[200].rsplit(",", 1)[0] + ","  # an empty cell: NaN
    lines.append("4.00,1.5")  # truncated last line
    return "\r\n".join(lines) + "\r\n"


@pytest.mark.parametrize("piece_bytes", [1, 64, 1000, 1 << 22])
def test_csv_in_pieces_equals_one_piece(tmp_path, rng, monkeypatch, caplog, piece_bytes):
    # Pieces of 1 byte (one line each), 64 and 1000 bytes split the body everywhere;
    # 4 MiB holds the file whole, as the reader used to.
    from streamer.sources import files

    text = _pieces_text(rng)
    path = tmp_path / "r.csv.gz"
    with gzip.open(path, "wt", newline="") as f:
        f.write(text)
    monkeypatch.setattr(files, "CSV_PIECE_BYTES", 1 << 22)
    whole = read_recording(path)
    monkeypatch.setattr(files, "CSV_PIECE_BYTES", piece_bytes)
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        got = read_recording(path)
    assert got.samples.shape == (400, 2) and got.samples.flags.c_contiguous
    np.testing.assert_array_equal(got.samples, whole.samples)
    np.testing.assert_array_equal(got.timestamps, whole.timestamps)
    assert np.isnan(got.samples[:, 1]).sum() == 1
    assert "r.csv.gz: line 406 has 2 of 3 cells (truncated last line); dropped it" in caplog.text


@pytest.mark.parametrize("piece_bytes", [64, 1 << 22])
def test_csv_errors_in_a_later_piece_name_their_line(tmp_path, rng, monkeypatch, piece_bytes):
    from streamer.sources import files

    monkeypatch.setattr(files, "CSV_PIECE_BYTES", piece_bytes)
    lines = ["t,a"] + [f"{k / 10:.1f},{k}" for k in range(300)]
    lines[250] = "24.9,abc"
    with pytest.raises(InputError, match=r"/r\.csv: line 251, column 2 \('a'\): 'abc' is not "
                                         r"a number; fix the cell"):
        read_recording(write_text(tmp_path / "r.csv", "\n".join(lines) + "\n"))
    lines[250] = "24.9,7"
    lines[260] = "25.9"
    with pytest.raises(InputError, match=r"/r\.csv: line 261 has 1 cells but the header has 2"):
        read_recording(write_text(tmp_path / "r.csv", "\n".join(lines) + "\n"))
    text = ("\n".join(lines[:260]) + "\n").encode()
    (tmp_path / "n.csv").write_bytes(text + b"26.0,\x00\x00\n")
    with pytest.raises(InputError, match=rf"/n\.csv: byte {len(text) + 5} \(line 261\) is a "
                                         r"NUL byte, which a CSV file never holds"):
        read_recording(tmp_path / "n.csv")


def test_csv_lone_carriage_returns_read_as_line_ends(tmp_path):
    rec = read_recording(write_text(tmp_path / "m.csv", "time,a\r0,1\r0.1,2\r0.2,3\r"))
    np.testing.assert_array_equal(rec.samples[:, 0], [1.0, 2.0, 3.0])


def test_csv_reader_never_holds_the_text_and_the_table_together(tmp_path, rng, monkeypatch):
    # tracemalloc sees numpy's buffers and Python's bytes. 150,000 rows of two channels
    # (no time column, so no time checks allocate beside the table): 2.4 MB of table
    # from 5.7 MB of text. Reading the text whole, as before, peaks above text + table;
    # in 256 KiB pieces the peak is the table plus a few pieces' worth of buffers.
    import tracemalloc

    from streamer.sources import files

    n, piece = 150_000, 1 << 18
    x = rng.standard_normal((n, 2))
    values = x.tolist()
    path = tmp_path / "big.csv"
    with open(path, "w") as f:
        f.write("a,b\n")
        for k in range(0, n, 10_000):
            f.write("".join(f"{values[j][0]!r},{values[j][1]!r}\n"
                            for j in range(k, min(n, k + 10_000))))
    text_bytes, table_bytes = path.stat().st_size, x.nbytes
    monkeypatch.setattr(files, "CSV_PIECE_BYTES", piece)
    tracemalloc.start()
    try:
        rec = read_recording(path, fs=100.0)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    np.testing.assert_array_equal(rec.samples, x)
    bound = table_bytes + 8 * piece
    assert bound < text_bytes + table_bytes
    assert peak < bound, (peak, table_bytes, text_bytes)
