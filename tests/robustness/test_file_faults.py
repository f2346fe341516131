"""Damaged and unusable recordings through the command line, as a user meets them.

Every case runs ``python -m streamer.cli replay ...`` in a fresh process and checks
what the user sees: either exactly one line ``ridgewatch: error: ...`` (exit code 2)
naming the file and what to do, or a warning and a valid, shorter log whose rows are
the first rows of the intact file's log (the engine is causal, so the estimates before
the cut cannot depend on what was cut). Never a traceback.
"""

from __future__ import annotations

import gzip
import os
import re
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from estimators.config import DEFAULT_PROFILE, get_profile
from streamer.channels import select
from streamer.runner import Runner
from streamer.sinks.estimate_log import EstimateLog, drop_cell, read_log, rows_text
from streamer.sources.files import read_recording
from streamer.sources.replay import RecordingSource
from tests.robustness.faults import pulse_signal, pulse_wave, within_ec13

REPO_ROOT = Path(__file__).resolve().parents[2]
FS = 100.0
DURATION_S = 30.0


def ridgewatch(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    """The command line in a fresh interpreter; the timeout guards against hangs only."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    return subprocess.run([sys.executable, "-m", "streamer.cli", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=600)


def replay(cwd: Path, file: str, *extra: str) -> subprocess.CompletedProcess:
    return ridgewatch(cwd, "replay", file, "--display", "none", "--log", "out.csv", *extra)


def assert_one_error_line(done: subprocess.CompletedProcess, pattern: str) -> None:
    lines = done.stderr.strip().splitlines()
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr
    assert len(lines) == 1, done.stderr
    assert lines[0].startswith("ridgewatch: error: ")
    assert re.search(pattern, lines[0]), lines[0]


def assert_valid_prefix_log(done: subprocess.CompletedProcess, cwd: Path,
                            full_rows: list[str], warning: str) -> list[str]:
    """Exit 0, the warning shown, no traceback; the log reads back and its rows are the
    first rows of the intact file's log (all columns but the compute time)."""
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert warning in done.stderr, done.stderr
    table = read_log(cwd / "out.csv")
    rows = [drop_cell(r) for r in rows_text(cwd / "out.csv")]
    assert len(table) == len(rows) > 0
    assert len(rows) < len(full_rows)
    assert rows == full_rows[:len(rows)]
    return rows


def pulse() -> tuple[np.ndarray, np.ndarray]:
    x, t, _, _ = pulse_signal(DURATION_S, FS, 72.0, seed=8)
    return x, t


def full_rows(tmp_path: Path, name: str) -> list[str]:
    """Rows (without compute time) of the log of the intact file ``name``, written
    in-process the way ``replay`` writes it (same reader, runner and log)."""
    recording = read_recording(tmp_path / name)
    source = RecordingSource(recording, chunk_s=0.25)
    selected = select(recording.info, None)
    path = tmp_path / "intact.csv"
    log = EstimateLog(path, "replay", name, {s.name: s.kind for s in selected}, {})
    Runner(source, selected, get_profile(DEFAULT_PROFILE), log=log).run()
    rows = [drop_cell(r) for r in rows_text(path)]
    assert len(rows) > 50
    return rows


# -- CSV ---------------------------------------------------------------------------------


def csv_text(x, t) -> str:
    return "time,PPG\n" + "".join(f"{a:.3f},{b:.6f}\n" for a, b in zip(t, x))


def test_truncated_csv_gives_a_warning_and_a_shorter_valid_log(tmp_path):
    x, t = pulse()
    text = csv_text(x, t)
    (tmp_path / "rec.csv").write_text(text)
    rows = full_rows(tmp_path, "rec.csv")
    # A recorder killed mid-line: the file ends inside the time cell of data row 2001.
    cut = text.index(f"\n{t[2000]:.3f},") + 1 + 4
    (tmp_path / "cut.csv").write_text(text[:cut])
    done = replay(tmp_path, "cut.csv")
    assert_valid_prefix_log(done, tmp_path, rows,
                            "ridgewatch: cut.csv: line 2002 has 1 of 2 cells (truncated last "
                            "line); dropped it")


def test_truncated_gzip_csv_is_one_error_line(tmp_path):
    x, t = pulse()
    raw = gzip.compress(csv_text(x, t).encode())
    (tmp_path / "cut.csv.gz").write_bytes(raw[: len(raw) // 2])
    assert_one_error_line(replay(tmp_path, "cut.csv.gz"),
                          r"cut\.csv\.gz: the compressed file is truncated; decompress what "
                          r"is left with 'gzip -dc'")


def test_non_numeric_cell_is_one_error_line_naming_line_and_column(tmp_path):
    x, t = pulse()
    lines = csv_text(x, t).splitlines(keepends=True)
    lines[1234] = f"{t[1233]:.3f},n/a\n"
    (tmp_path / "bad.csv").write_text("".join(lines))
    assert_one_error_line(replay(tmp_path, "bad.csv"),
                          r"bad\.csv: line 1235, column 2 \('PPG'\): 'n/a' is not a number; "
                          r"fix the cell or leave it empty")
    assert not (tmp_path / "out.csv").exists()


def test_no_time_column_and_no_fs_is_one_error_line(tmp_path):
    x, _ = pulse()
    (tmp_path / "notime.csv").write_text("PPG\n" + "".join(f"{v:.6f}\n" for v in x))
    assert_one_error_line(replay(tmp_path, "notime.csv"),
                          r"notime\.csv: no time column .* and no --fs given; add a time "
                          r"column or pass --fs HZ")


def test_unknown_channel_is_one_error_line_listing_the_channels(tmp_path):
    x, t = pulse()
    (tmp_path / "rec.csv").write_text(csv_text(x, t))
    assert_one_error_line(replay(tmp_path, "rec.csv", "--channel", "PLETH=ppg"),
                          r"rec\.csv: no channel 'PLETH'; channels are: PPG")
    assert not (tmp_path / "out.csv").exists()


@pytest.mark.parametrize("content, pattern", [
    ("", r"empty\.csv: file is empty; expected a header row"),
    ("time,PPG\n", r"empty\.csv: no data rows after the header"),
])
def test_empty_file_is_one_error_line(tmp_path, content, pattern):
    (tmp_path / "empty.csv").write_text(content)
    assert_one_error_line(replay(tmp_path, "empty.csv"), pattern)


# -- WFDB, EDF, XDF -----------------------------------------------------------------------


def test_truncated_wfdb_signal_file_gives_a_warning_and_a_shorter_valid_log(tmp_path):
    wfdb = pytest.importorskip("wfdb")
    x, _ = pulse()
    digital = np.round(x * 1000).astype(np.int64)[:, None]
    wfdb.wrsamp("rec", fs=FS, units=["au"], sig_name=["PLETH"], d_signal=digital, fmt=["16"],
                adc_gain=[1000.0], baseline=[0], write_dir=str(tmp_path))
    rows = full_rows(tmp_path, "rec.hea")
    dat = tmp_path / "rec.dat"
    dat.write_bytes(dat.read_bytes()[: 2 * 2000 + 1])  # 2000 samples and half of one
    done = replay(tmp_path, "rec.hea")
    assert_valid_prefix_log(done, tmp_path, rows,
                            "holds 2000 of the 3000 samples the header declares")


def test_truncated_edf_is_one_error_line(tmp_path):
    highlevel = pytest.importorskip("pyedflib.highlevel")
    x, _ = pulse()
    header = highlevel.make_signal_header("PPG", dimension="au", sample_frequency=FS,
                                          physical_min=-2.0, physical_max=2.0)
    highlevel.write_edf(str(tmp_path / "rec.edf"), [x], [header])
    raw = (tmp_path / "rec.edf").read_bytes()
    (tmp_path / "cut.edf").write_bytes(raw[: len(raw) - 777])
    assert_one_error_line(replay(tmp_path, "cut.edf"),
                          r"cut\.edf: EDF file is truncated \(\d+ of \d+ bytes that its "
                          r"header declares for 30 data records\); repair the file")


def xdf_bytes(x, t) -> bytes:
    """A one-stream XDF file (XDF 1.0 layout, from memory: magic, then chunks of
    [length-byte count][length][uint16 tag][content]; tags 1 file header, 2 stream
    header, 3 samples, 6 stream footer), one samples chunk per second of data."""
    def chunk(tag, content):
        return struct.pack("<BI", 4, len(content) + 2) + struct.pack("<H", tag) + content

    info = ('<?xml version="1.0"?><info><name>wrist</name><type>PPG</type>'
            "<channel_count>1</channel_count><nominal_srate>100</nominal_srate>"
            "<channel_format>double64</channel_format><desc><channels><channel>"
            "<label>PPG</label><type>PPG</type><unit>au</unit></channel></channels></desc>"
            "</info>")
    out = b"XDF:" + chunk(1, b'<?xml version="1.0"?><info><version>1.0</version></info>')
    out += chunk(2, struct.pack("<I", 1) + info.encode())
    step = int(FS)
    for a in range(0, len(t), step):
        body = struct.pack("<I", 1) + struct.pack("<BI", 4, len(t[a:a + step]))
        for stamp, value in zip(t[a:a + step], x[a:a + step]):
            body += b"\x08" + struct.pack("<d", stamp) + struct.pack("<d", value)
        out += chunk(3, body)
    footer = (f'<?xml version="1.0"?><info><first_timestamp>{t[0]}</first_timestamp>'
              f"<last_timestamp>{t[-1]}</last_timestamp><sample_count>{len(t)}"
              f"</sample_count></info>")
    return out + chunk(6, struct.pack("<I", 1) + footer.encode())


def test_truncated_xdf_gives_a_warning_and_a_shorter_valid_log(tmp_path):
    pytest.importorskip("pyxdf")
    x, t = pulse()
    raw = xdf_bytes(x, t + 500.0)
    (tmp_path / "rec.xdf").write_bytes(raw)
    rows = full_rows(tmp_path, "rec.xdf")
    (tmp_path / "cut.xdf").write_bytes(raw[: int(len(raw) * 0.6)])
    done = replay(tmp_path, "cut.xdf")
    kept = assert_valid_prefix_log(done, tmp_path, rows,
                                   "cut.xdf: XDF file ends inside a chunk at byte")
    assert "looks truncated or damaged (no stream footer)" in done.stderr
    assert len(kept) > 20


# -- a long file ------------------------------------------------------------------------


PEAK_RSS = """
import resource, subprocess, sys
done = subprocess.run(sys.argv[1:], capture_output=True, text=True)
sys.stderr.write(done.stderr)
print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)
sys.exit(done.returncode)
"""


@pytest.mark.slow
def test_one_hour_at_500_hz_with_8_channels_replays_in_bounded_memory(tmp_path):
    """1 h at 500 Hz, 8 channels plus time (a 1.8 M-row CSV of about 140 MB), replayed
    at full speed with one channel feeding the engine. The peak resident memory of the
    replaying process (measured by the kernel, Linux reports kilobytes) stays below
    3 times the in-memory size of the samples plus 400 MB for the interpreter and its
    libraries: reading may hold the text and the parsed table at once, never more."""
    fs, hours, n_channels = 500.0, 1.0, 8
    n = int(hours * 3600 * fs)
    path = tmp_path / "long.csv"
    rng = np.random.default_rng(9)
    with open(path, "w") as f:
        f.write("time," + ",".join(["PPG"] + [f"aux{i}" for i in range(1, n_channels)]) + "\n")
        phase = 0.0
        block = 200_000
        for a in range(0, n, block):
            t = np.arange(a, min(a + block, n)) / fs
            ppg, phase = pulse_wave(fs, np.full(len(t), 66.0), a, phase)
            table = np.column_stack([t, ppg, rng.standard_normal((len(t), n_channels - 1))])
            np.savetxt(f, table, fmt=["%.3f"] + ["%.4f"] * n_channels, delimiter=",")
    array_mb = n * n_channels * 8 / 1e6
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    done = subprocess.run(
        [sys.executable, "-c", PEAK_RSS, sys.executable, "-m", "streamer.cli", "replay",
         str(path), "--channel", "PPG=ppg", "--speed", "max", "--display", "none", "--log",
         "out.csv"], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr
    peak_mb = int(done.stdout.strip().splitlines()[-1]) / 1e3
    print(f"\nlong replay: file {path.stat().st_size / 1e6:.0f} MB, samples in memory "
          f"{array_mb:.0f} MB, peak RSS {peak_mb:.0f} MB")
    assert "Traceback" not in done.stderr
    assert peak_mb < 3 * array_mb + 400
    table = read_log(tmp_path / "out.csv")
    hr = table.select("hr", "PPG")
    assert hr.columns["emitted_s"][-1] > 3590
    assert np.nanmedian(np.abs(hr.columns["rate_per_min"] - 66.0)) < 2.0


# -- time columns ------------------------------------------------------------------------


def assert_error_is(done: subprocess.CompletedProcess, expected: str) -> None:
    """Exit code 2 and exactly one line on stderr: ``expected``."""
    assert done.returncode == 2, done.stderr
    assert done.stderr == expected + "\n"
    assert done.stdout == ""


def ms_csv(path: Path, header: str = "time") -> Path:
    """The 72 bpm pulse at 100 Hz with its times in integer milliseconds."""
    x, t = pulse()
    path.write_text(f"{header},PPG\n" + "".join(f"{round(a * 1000)},{b:.6f}\n"
                                                for a, b in zip(t, x)))
    return path


def check_rates_and_seconds(log: Path, causal: bool = True) -> None:
    """Every heart rate within the EC13 tolerance of 72 bpm and the times in seconds:
    within the 30 s recording and, live, half the 8 s window behind the newest sample."""
    table = read_log(log).select("hr", "PPG")
    cols = table.columns
    assert len(table) > 50 and within_ec13(cols["rate_per_min"], 72.0).all()
    assert 0.0 <= cols["time_s"].min() and cols["emitted_s"].max() <= DURATION_S
    if causal:
        from estimators.monitor import RateMonitor

        assert cols["emitted_s"].min() >= 8.0 - 0.05
        # half the window (on whole 25 Hz analysis samples: 3.98 s) plus the causal
        # filters' group delay at 72 bpm
        delay = RateMonitor([("PPG", "ppg")], FS, "wrist").filter_delay_s("hr", "PPG", 72.0)
        np.testing.assert_allclose(cols["delay_s"], 3.98 + delay, atol=0.05)


def test_time_column_in_ms_without_a_unit_is_one_clear_refusal(tmp_path):
    ms_csv(tmp_path / "ms.csv")
    assert_error_is(replay(tmp_path, "ms.csv"),
                    "ridgewatch: error: ms.csv: time column 'time' has no unit, and read as "
                    "seconds it gives 0.1 Hz, outside 4-100000 Hz; if its times are in ms, "
                    "pass --time-unit ms or name the column time_ms")
    assert_error_is(replay(tmp_path, "ms.csv", "--fs", "100"),
                    "ridgewatch: error: ms.csv: --fs 100 Hz contradicts time column 'time', "
                    "which gives 0.1 Hz read as seconds; if its times are in ms, pass "
                    "--time-unit ms")
    assert not (tmp_path / "out.csv").exists()


@pytest.mark.parametrize("header, extra", [
    ("time", ["--time-unit", "ms"]),
    ("time", ["--time-unit", "ms", "--fs", "100"]),
    ("time_ms", []),
    ("Time [ms]", []),
    ("Zeit", ["--time-column", "zeit", "--time-unit", "ms"]),
])
def test_time_column_in_ms_gives_right_rates_and_times_in_seconds(tmp_path, header, extra):
    ms_csv(tmp_path / "ms.csv", header)
    done = replay(tmp_path, "ms.csv", *extra)
    assert done.returncode == 0, done.stderr
    check_rates_and_seconds(tmp_path / "out.csv")


def test_offline_reads_time_units_too(tmp_path):
    ms_csv(tmp_path / "ms.csv", "timestamp_ms")
    done = ridgewatch(tmp_path, "offline", "ms.csv", "--log", "out.csv", "-q")
    assert done.returncode == 0, done.stderr
    check_rates_and_seconds(tmp_path / "out.csv", causal=False)


def test_fs_that_contradicts_the_time_column_is_one_error_line(tmp_path):
    """Before: a warning, then 144 bpm for 72 (the samples counted at twice their rate)."""
    x, t = pulse()
    (tmp_path / "rec.csv").write_text(csv_text(x, t))
    assert_error_is(replay(tmp_path, "rec.csv", "--fs", "200"),
                    "ridgewatch: error: rec.csv: --fs 200 Hz contradicts time column 'time', "
                    "which gives 100 Hz read as seconds; drop --fs, or fix the time column")
    assert replay(tmp_path, "rec.csv", "--fs", "100.5").returncode == 0  # within 1 %


@pytest.mark.parametrize("times, expected", [
    (lambda t: np.full_like(t, 12.5), "time column 'time' does not increase (every row holds "
                                      "12.5); fix the time column, or drop it and pass --fs HZ"),
    (lambda t: np.floor(t / 10) * 10,
     "time column 'time' does not increase (most rows repeat the time before them); fix the "
     "time column, or drop it and pass --fs HZ"),
])
def test_time_column_that_does_not_increase_is_one_error_line(tmp_path, times, expected):
    x, t = pulse()
    (tmp_path / "rec.csv").write_text(csv_text(x, times(t)))
    assert_error_is(replay(tmp_path, "rec.csv"), f"ridgewatch: error: rec.csv: {expected}")


# -- files that are not text ----------------------------------------------------------------


def test_random_bytes_are_one_error_line(tmp_path):
    rng = np.random.default_rng(5)
    raw = bytearray(rng.integers(0, 256, 4096, dtype=np.uint8).tobytes())
    raw[:20] = b"time,PPG\n0.0,1.0\n0.01"  # looks like a CSV at first
    raw[20] = 0x07
    (tmp_path / "rec.csv").write_bytes(bytes(raw))
    assert_error_is(replay(tmp_path, "rec.csv"),
                    "ridgewatch: error: rec.csv: byte 20 (line 3) is the control character "
                    "0x07, which a CSV file never holds; the file is binary or damaged: check "
                    "that it is the right file")


def test_nul_bytes_deep_in_a_csv_are_one_error_line(tmp_path):
    """The hole a crashed writer may leave: NUL bytes after the first 64 KiB."""
    x, t, _, _ = pulse_signal(4 * DURATION_S, FS, 72.0, seed=8)
    text = csv_text(x, t).encode()
    at = text.index(b"\n", 100_000) + 1
    line = text.count(b"\n", 0, at) + 1
    (tmp_path / "rec.csv").write_bytes(text[:at] + b"\0" * 512 + text[at + 512:])
    assert_error_is(replay(tmp_path, "rec.csv"),
                    f"ridgewatch: error: rec.csv: byte {at} (line {line}) is a NUL byte, which "
                    "a CSV file never holds; the file is binary or damaged: check that it is "
                    "the right file")


def test_utf16_csv_is_one_error_line(tmp_path):
    x, t = pulse()
    (tmp_path / "rec.csv").write_bytes(csv_text(x, t).encode("utf-16"))
    assert_error_is(replay(tmp_path, "rec.csv"),
                    "ridgewatch: error: rec.csv: the file is UTF-16 text; save it as UTF-8 (or "
                    "ASCII) CSV")


@pytest.mark.parametrize("line_end", ["\r", "\r\n"])
def test_cr_line_ends_read_like_newlines(tmp_path, line_end):
    x, t = pulse()
    (tmp_path / "rec.csv").write_text(csv_text(x, t))
    rows = full_rows(tmp_path, "rec.csv")
    (tmp_path / "cr.csv").write_bytes(csv_text(x, t).replace("\n", line_end).encode())
    done = replay(tmp_path, "cr.csv")
    assert done.returncode == 0, done.stderr
    assert [drop_cell(r) for r in rows_text(tmp_path / "out.csv")] == rows
