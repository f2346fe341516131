"""The ``ridgewatch`` command line, end to end in a subprocess.

Every run uses ``sys.executable -m streamer.cli`` with the project root on
``PYTHONPATH`` and ``QT_QPA_PLATFORM=offscreen``. Replays use a 40 s cut of the demo
session written to a temporary CSV, so each run takes a few seconds. Nothing asserts on
wall-clock time; timeouts only guard against hangs.

The helpers here (:func:`run_cli`, :func:`check_log_format`, the ``short_csv`` and
``full_replay`` fixtures) are shared with ``test_signals.py`` and
``test_end_to_end_lsl.py``.
"""

from __future__ import annotations

import json
import logging
import math
import os
import subprocess
import sys
import uuid
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

from estimators.config import DEFAULT_PROFILE, PROFILES
from streamer import __version__, cli
from streamer.sinks.estimate_log import COLUMNS, drop_cell, read_log, rows_text
from streamer.sources.files import read_recording

REPO_ROOT = Path(__file__).resolve().parents[2]
DEMO = REPO_ROOT / "replay_files" / "cycling_trial.csv.gz"
WFDB_100 = REPO_ROOT / ".." / "shared" / "data" / "physionet_wfdb" / "100.hea"
SHORT_S = 40.0
HANG_S = 300.0
"""Subprocess timeout: only a guard against hangs on a loaded machine."""


def cli_env() -> dict:
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", PYTHONUNBUFFERED="1")
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    return env


def cli_command(*args) -> list[str]:
    return [sys.executable, "-m", "streamer.cli", *map(str, args)]


def run_cli(*args, cwd, timeout=HANG_S) -> subprocess.CompletedProcess:
    return subprocess.run(cli_command(*args), cwd=cwd, env=cli_env(), capture_output=True,
                          text=True, timeout=timeout)


def start_cli(*args, cwd) -> subprocess.Popen:
    return subprocess.Popen(cli_command(*args), cwd=cwd, env=cli_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def rows_without_compute(path) -> list[str]:
    """Data rows as text minus the compute_ms cell (the only run-dependent one)."""
    return [drop_cell(row) for row in rows_text(path)]


def check_log_format(path, mode: str, source: str, channels: dict):
    """The documented log format; returns the parsed table."""
    lines = Path(path).read_text().splitlines()
    assert lines[0] == "# ridgewatch estimate log"
    assert lines[1] == f"# version: {__version__}"
    assert lines[2] == f"# mode: {mode}"
    assert lines[3].startswith("# started: ")
    started = datetime.fromisoformat(lines[3][len("# started: "):])
    assert started.utcoffset() == timedelta(0)  # UTC, ISO 8601
    assert lines[4] == f"# source: {source}"
    assert lines[5].startswith("# channels: ")
    assert json.loads(lines[5][len("# channels: "):]) == channels
    assert lines[6].startswith("# config: ")
    config = json.loads(lines[6][len("# config: "):])
    assert set(config["profile"]) >= {"name", "hr", "rr"}
    assert lines[7] == ",".join(COLUMNS)
    body = [line for line in lines[8:] if not line.startswith("#")]
    assert body, f"{path} has no rows"
    assert all(len(line.split(",")) == len(COLUMNS) for line in body)

    table = read_log(path)
    assert table.header["config"] == config
    cols = table.columns
    assert len(table) == len(body)
    # Each of the three is written rounded to 4 decimals: at most 1.5e-4 apart.
    np.testing.assert_allclose(cols["delay_s"], cols["emitted_s"] - cols["time_s"], atol=1.5e-4)
    assert np.all(cols["delay_s"] > 0)
    for name in ("confidence", "quality"):
        assert np.all((cols[name] >= 0) & (cols[name] <= 1)), name
    assert np.all(np.isfinite(cols["compute_ms"]) & (cols["compute_ms"] >= 0))
    assert np.all(np.diff(cols["emitted_s"]) >= 0)
    assert set(cols["quantity"]) <= {"hr", "rr"}
    rates = cols["rate_per_min"]
    assert np.any(np.isfinite(rates))
    assert np.all(rates[np.isfinite(rates)] > 0)
    return table


_MADE: dict = {}
"""Files made once per test session and shared by the modules that import the fixtures
below (a fixture imported into another module would otherwise run again there)."""


@pytest.fixture(scope="session")
def short_csv(tmp_path_factory) -> Path:
    """The first 40 s of the demo session as a plain CSV (time column and 4 channels)."""
    if "short" not in _MADE:
        recording = read_recording(DEMO)
        n = int(round(SHORT_S * recording.info.fs))
        path = tmp_path_factory.mktemp("short") / f"short-{uuid.uuid4().hex[:8]}.csv"
        data = np.column_stack((recording.timestamps[:n], recording.samples[:n]))
        np.savetxt(path, data, fmt="%.5f", delimiter=",", comments="",
                   header="time_s," + ",".join(recording.info.channel_names))
        _MADE["short"] = path
    return _MADE["short"]


@pytest.fixture(scope="session")
def full_replay(short_csv, tmp_path_factory) -> Path:
    """The log of an uninterrupted replay of ``short_csv`` as fast as possible."""
    if "full" not in _MADE:
        folder = tmp_path_factory.mktemp("full")
        done = run_cli("replay", short_csv, "--speed", "max", "--display", "none",
                       "--log", folder / "full.csv", cwd=folder)
        assert done.returncode == 0, done.stderr
        _MADE["full"] = folder / "full.csv"
    return _MADE["full"]


SHORT_CHANNELS = {"PPG": "ppg", "ECG": "ecg", "RESP": "resp", "ACC_X": "acc"}


def test_replay_csv_writes_the_documented_log(full_replay, short_csv):
    table = check_log_format(full_replay, "replay", str(short_csv), SHORT_CHANNELS)

    pairs = table.pairs()
    assert {("hr", "ECG"), ("hr", "PPG"), ("hr", "fused"), ("rr", "RESP")} <= set(pairs)
    assert {s for _, s in pairs} <= set(SHORT_CHANNELS) | {"fused"}
    assert table.header["config"]["profile"]["name"] == DEFAULT_PROFILE
    assert table.header["config"]["speed"] == "max"
    # The whole file was replayed: the last hop used (nearly) the last sample.
    assert SHORT_S - 0.25 - 1e-4 <= table.columns["emitted_s"].max() <= SHORT_S
    last_s = SHORT_S - 1 / 125.0
    assert full_replay.read_text().endswith(f"# event {last_s:.4f} end: end of {short_csv}\n")


def test_replay_speed_does_not_change_the_estimates(full_replay, short_csv, tmp_path):
    done = run_cli("replay", short_csv, "--speed", "20", "--display", "none",
                   "--log", tmp_path / "x20.csv", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    paced = rows_without_compute(tmp_path / "x20.csv")
    assert len(paced) > 100
    assert paced == rows_without_compute(full_replay)
    assert read_log(tmp_path / "x20.csv").header["config"]["speed"] == 20.0


@pytest.fixture(autouse=True)
def keep_logger_level():
    """``cli.main`` sets the level of the "ridgewatch" logger (``-q``); tests that call
    it in this process must not change it for the tests that follow."""
    logger = logging.getLogger("ridgewatch")
    level = logger.level
    yield
    logger.setLevel(level)


@pytest.mark.lsl
def test_publish_carries_every_estimate_stream(short_csv, tmp_path, full_replay):
    """--publish builds its outlet before the first estimate: the breathing rows that PPG
    and ECG give after 24 s must fit it too (they once stopped the run)."""
    log = tmp_path / "published.csv"
    code = main_exit_code(["replay", short_csv, "--speed", "max", "--display", "none",
                           "--publish", "--log", log, "-q"])
    assert code == 0
    pairs = set(read_log(log).pairs())
    assert ("rr", "PPG") in pairs and ("hr", "fused") in pairs
    assert rows_without_compute(log) == rows_without_compute(full_replay)


# --------------------------------------------------------------------------- errors

def main_exit_code(argv) -> int:
    """``cli.main`` in this process: its return value, or the code argparse exits with
    (``python -m streamer.cli`` passes either to ``sys.exit``)."""
    try:
        return cli.main([str(a) for a in argv])
    except SystemExit as exc:
        return exc.code


@pytest.fixture
def error_folder(tmp_path):
    (tmp_path / "notes.txt").write_text("not a recording\n")
    (tmp_path / "broken.hea").write_text("this is not a WFDB header\n")
    (tmp_path / "a-file").write_text("x")
    return tmp_path


NO_STREAM = f"nothing-here-{uuid.uuid4().hex[:8]}"

ERROR_CASES = {
    "missing file": (["replay", "{dir}/missing.csv"], "{dir}/missing.csv: no such file"),
    "unknown channel": (["replay", "{short}", "--channel", "SpO2=ppg"],
                        "{short}: no channel 'SpO2'; channels are: PPG, ECG, RESP, ACC_X"),
    "text file": (["replay", "{dir}/notes.txt"], "{dir}/notes.txt: unknown file type"),
    "corrupt header": (["replay", "{dir}/broken.hea"], "{dir}/broken.hea: "),
    "no stream": (["live", "--name", NO_STREAM, "--timeout", "1"],
                  f"no LSL stream matches name='{NO_STREAM}' within 1 s"),
    "channel syntax": (["replay", "{short}", "--channel", "PPG"],
                       "--channel 'PPG': expected NAME=KIND"),
    "channel kind": (["replay", "{short}", "--channel", "PPG=eeg"],
                     "--channel 'PPG=eeg': kind 'eeg' is not one of ppg, ecg, resp, acc"),
    "speed text": (["replay", "{short}", "--speed", "quick"],
                   "argument --speed: 'quick' is not a speed"),
    "speed zero": (["replay", "{short}", "--speed", "0"], "argument --speed: '0' must be > 0"),
    "unknown profile": (["replay", "{short}", "--profile", "treadmill"],
                        "argument --profile: invalid choice: 'treadmill'"),
    "log not writable": (["replay", "{short}", "--log", "{dir}/a-file/log.csv"],
                         "cannot write the estimate log {dir}/a-file/log.csv"),
    "unknown command": (["estimate"], "argument COMMAND: invalid choice: 'estimate'"),
}


@pytest.mark.parametrize("case", list(ERROR_CASES))
def test_user_error_is_one_line(case, error_folder, short_csv, capfd):
    """In this process (fast); fd-level capture also sees what liblsl writes."""
    args, expected = ERROR_CASES[case]
    fill = {"dir": error_folder, "short": short_csv}
    argv = [a.format(**fill) for a in args]
    if argv[0] in ("replay", "live"):
        argv += ["--display", "none"]
    code = main_exit_code(argv)
    out, err = capfd.readouterr()
    assert code == 2, err
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("ridgewatch: error: ")
    assert expected.format(**fill) in lines[0]
    assert "Traceback" not in err
    assert out == ""


def test_user_error_through_the_real_entry_point(tmp_path):
    done = run_cli("replay", tmp_path / "missing.csv", "--display", "none", cwd=tmp_path)
    assert done.returncode == 2
    assert done.stderr == f"ridgewatch: error: {tmp_path / 'missing.csv'}: no such file; " \
                          "check the path\n"
    assert done.stdout == ""


# --------------------------------------------------------------------------- WFDB

WFDB_MINUTES = 5.0
"""How much of record 100 the replay covers. The whole record (30 min) took 37 s of
wall time and 16 s of CPU on the shared 2-core development machine (measured), too much
for this suite; the first 5 minutes exercise the same reader and engine."""


def first_minutes_of_record_100(folder: Path, minutes: float) -> Path:
    """A header for the first ``minutes`` of record 100, beside links to its signal and
    annotation files: nothing is copied. The header's sample count is cut, and each
    signal's checksum is recomputed for the samples kept, so the reader has nothing to
    warn about (the WFDB checksum is the 16-bit two's complement sum of the samples, as
    the reader implements it)."""
    recording = read_recording(WFDB_100)
    n = int(round(minutes * 60 * recording.info.fs))
    lines = []
    signal = 0
    for line in WFDB_100.read_text().splitlines():
        tokens = line.split()
        if tokens[:1] == ["100"]:  # record line: name, signals, rate, samples
            tokens[3] = str(n)
            line = " ".join(tokens)
        elif tokens[:1] == ["100.dat"]:  # signal line: file fmt gain res zero init checksum
            gain, baseline = float(tokens[2]), float(tokens[4])
            digital = np.rint(recording.samples[:n, signal] * gain + baseline).astype(np.int64)
            total = int(digital.sum()) & 0xFFFF
            tokens[6] = str(total - 0x10000 if total >= 0x8000 else total)
            line = " ".join(tokens)
            signal += 1
        lines.append(line)
    (folder / "100.hea").write_text("\n".join(lines) + "\n")
    for suffix in (".dat", ".atr"):
        (folder / f"100{suffix}").symlink_to(WFDB_100.with_suffix(suffix).resolve())
    return folder / "100.hea"


@pytest.mark.data
def test_replay_wfdb_record(tmp_path):
    """MIT-BIH Arrhythmia record 100 (Moody & Mark 2001, via PhysioNet; see
    ../shared/data/physionet_wfdb/SOURCE.md), its first minutes (:data:`WFDB_MINUTES`)."""
    if not WFDB_100.is_file():
        pytest.skip(f"real recordings not found at {WFDB_100.parent.resolve()}; data "
                    "tests need ../shared/data beside the project root")
    header = first_minutes_of_record_100(tmp_path, WFDB_MINUTES)
    done = run_cli("replay", header, "--channel", "MLII=ecg", "--profile", "chest-ecg",
                   "--speed", "max", "--display", "none", "--log", tmp_path / "100.csv",
                   cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr and "warning" not in done.stderr.lower()
    assert done.stderr.splitlines()[-1].startswith("done (end of recording): "
                                                   f"{60 * WFDB_MINUTES:.1f} s of signal")
    table = check_log_format(tmp_path / "100.csv", "replay", str(header), {"MLII": "ecg"})
    assert ("hr", "MLII") in table.pairs()
    assert {s for _, s in table.pairs()} == {"MLII"}
    assert table.header["config"]["fs"] == 360.0
    assert table.header["config"]["profile"]["name"] == "chest-ecg"

    # Reference: the cardiologist-reviewed beats of 100.atr, as the median beat-to-beat
    # rate inside each estimate's window.
    beats = read_recording(header).events["atr"]
    cols = table.select(quantity="hr").columns
    half = PROFILES["chest-ecg"].hr.window_s / 2
    reference = []
    for t in cols["time_s"]:
        inside = beats[(beats >= t - half) & (beats <= t + half)]
        reference.append(60.0 / np.median(np.diff(inside)) if len(inside) > 2 else math.nan)
    reference = np.array(reference)
    rate = cols["rate_per_min"]
    # Every hop after start-up: the first comes 8 s in, the last at the end (give or
    # take the boundary hop, placed on the decimated analysis grid).
    settings = PROFILES["chest-ecg"].hr
    assert abs(len(rate) - (60 * WFDB_MINUTES - settings.min_window_s) / settings.hop_s) <= 1
    ok = np.isfinite(rate) & np.isfinite(reference)
    assert ok.mean() >= 0.99
    # Heart-rate tolerance +-10 % or +-5 bpm, whichever is greater (ANSI/AAMI EC13,
    # cited from memory): record 100 is mostly sinus rhythm with a few premature beats.
    assert np.all(np.abs(rate[ok] - reference[ok]) <= np.maximum(0.1 * reference[ok], 5.0))


# --------------------------------------------------------------------------- demo, profiles

def test_demo_from_another_directory(tmp_path):
    done = run_cli("demo", "--speed", "max", "--display", "text", "--duration", "5",
                   cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert any(line.startswith("heart rate") for line in done.stdout.splitlines())
    assert "log complete" in done.stderr.splitlines()[-1]
    # The default log path is relative to the working directory.
    (log,) = (tmp_path / "ridgewatch-logs").glob("cycling_trial-*.csv")
    assert f"log complete: {Path('ridgewatch-logs') / log.name}" in done.stderr
    # Found beside the package, although the working directory has no replay_files/.
    table = check_log_format(log, "replay", str(DEMO), SHORT_CHANNELS)
    assert table.header["config"]["speed"] == "max"


def test_find_demo_prefers_the_working_directory(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert cli.find_demo() == DEMO
    (tmp_path / "replay_files").mkdir()
    (tmp_path / "replay_files" / DEMO.name).write_bytes(b"")
    assert cli.find_demo() == tmp_path / "replay_files" / DEMO.name


def test_demo_regenerates_the_session_without_the_file(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(cli, "find_demo", lambda: None)
    code = cli.main(["demo", "--speed", "max", "--display", "none", "--duration", "1",
                     "--log", str(tmp_path / "demo.csv")])
    assert code == 0
    assert "(regenerated)" in read_log(tmp_path / "demo.csv").header["source"]
    assert "log complete" in capsys.readouterr().err


def test_profiles_lists_every_profile(tmp_path):
    done = run_cli("profiles", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    names = [line.split(":")[0] for line in done.stdout.splitlines()
             if line and not line.startswith(" ")]
    assert names == [f"{n} (default)" if n == DEFAULT_PROFILE else n for n in sorted(PROFILES)]
    for name, profile in PROFILES.items():
        assert profile.description in done.stdout
        low, high = profile.hr.band_per_min
        assert f"band {low:g}-{high:g}/min" in done.stdout


def test_publish_samples_sends_the_selected_channels(short_csv, tmp_path, monkeypatch):
    """``--publish-samples`` with a subset of the channels, in another order: the
    published stream carries exactly those columns (a real LSL outlet; no inlet needed)."""
    from streamer.sources import lsl_publish

    made = []

    class Recorded(lsl_publish.SamplePublisher):
        def __init__(self, info, **kw):
            super().__init__(info, **kw)
            self.pushed = []
            made.append(self)

        def push_chunk(self, chunk):
            super().push_chunk(chunk)  # checks the shape against the stream's channels
            self.pushed.append(chunk)

    monkeypatch.setattr(lsl_publish, "SamplePublisher", Recorded)
    code = cli.main(["replay", str(short_csv), "--channel", "RESP=resp", "--channel", "PPG=ppg",
                     "--publish-samples", "--speed", "max", "--display", "none", "-q",
                     "--log", str(tmp_path / "log.csv")])
    assert code == 0
    (publisher,) = made
    assert [(c.name, c.kind) for c in publisher.info.channels] == [("RESP", "resp"),
                                                                   ("PPG", "ppg")]
    recording = read_recording(short_csv)
    sent = np.concatenate([c.samples for c in publisher.pushed])
    np.testing.assert_array_equal(sent, recording.samples[:, [2, 0]])
    np.testing.assert_array_equal(np.concatenate([c.timestamps for c in publisher.pushed]),
                                  recording.timestamps)


def test_default_log_names_are_plain_file_names():
    from streamer.cli import _default_log_path

    assert _default_log_path("cycling_trial.csv.gz (regenerated)").name.startswith(
        "cycling_trial-")
    assert _default_log_path("/data/rec 1.hea").name.startswith("rec_1-")
    assert _default_log_path("lab/ppg:stream").parent.name == "ridgewatch-logs"
    assert _default_log_path("???").name.startswith("stream-")


def test_exercise_profile_without_an_accelerometer_says_so(short_csv, tmp_path, capfd):
    """The exercise profile without an acc channel runs (at the confidence of its
    blind calibration) and tells the user, on the terminal and in the log."""
    log = tmp_path / "noacc.csv"
    code = cli.main(["replay", str(short_csv), "--channel", "PPG=ppg", "--profile",
                     "exercise-wrist", "--speed", "max", "--display", "none", "--duration",
                     "5", "--log", str(log)])
    err = capfd.readouterr().err
    expected = ("profile exercise-wrist suppresses motion with an accelerometer, but no "
                "channel is of kind acc: heart rate runs without it, at a lower "
                "confidence; add --channel NAME=acc for the accelerometer axes")
    assert code == 0
    assert f"ridgewatch: warning: {expected}" in err
    assert f"# event nan warning: {expected}" in log.read_text()
    code = cli.main(["replay", str(short_csv), "--channel", "PPG=ppg", "--channel",
                     "ACC_X=acc", "--profile", "exercise-wrist", "--speed", "max",
                     "--display", "none", "--duration", "5", "--log", str(tmp_path / "a.csv")])
    assert code == 0 and "warning" not in capfd.readouterr().err
