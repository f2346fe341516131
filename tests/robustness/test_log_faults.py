"""The estimate log never destroys or mixes data, through the command line.

Every case runs ``python -m streamer.cli`` in a fresh process, as a user would: a
``--log`` that names the recording (or a link to it, or a WFDB signal file) or any
other existing file is refused in one line (exit code 2) and the file keeps every
byte; ``--overwrite`` replaces only an earlier ridgewatch log; of two runs writing one
path, one writes a complete, readable log and the other is refused in one line; runs
that start together get a default log each; odd channel and file names read back.
Nothing asserts on wall-clock time; timeouts only guard against hangs.
"""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

from streamer.sinks.estimate_log import COLUMNS, drop_cell, read_log, rows_text
from tests.robustness.faults import pulse_signal, within_ec13

REPO_ROOT = Path(__file__).resolve().parents[2]
FS = 100.0
RATE = 72.0


def env() -> dict:
    out = dict(os.environ)
    out["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), out.get("PYTHONPATH")]))
    return out


def command(*args) -> list[str]:
    return [sys.executable, "-m", "streamer.cli", *map(str, args)]


def ridgewatch(cwd: Path, *args) -> subprocess.CompletedProcess:
    return subprocess.run(command(*args), cwd=cwd, env=env(), capture_output=True, text=True,
                          timeout=600)


def one_error_line(done: subprocess.CompletedProcess) -> str:
    """The one line the user sees, after checking it is the only one and exit code 2."""
    lines = done.stderr.strip().splitlines()
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr and len(lines) == 1, done.stderr
    assert done.stdout == ""
    return lines[0]


def recording(folder: Path, name: str = "rec.csv", header: str = "time,PPG",
              duration_s: float = 30.0) -> Path:
    """A 72 bpm pulse in every column after the time column (as many as ``header``
    names)."""
    x, t, _, _ = pulse_signal(duration_s, FS, RATE, seed=21)
    n_channels = len(next(csv.reader([header]))) - 1
    path = folder / name
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(header + "\n" + "".join(f"{a:.3f}" + f",{b:.6f}" * n_channels + "\n"
                                         for a, b in zip(t, x)))
    return path


def replay(cwd: Path, file, *extra) -> subprocess.CompletedProcess:
    return ridgewatch(cwd, "replay", file, "--display", "none", "-q", *extra)


# -- the recording and other files stay untouched -----------------------------------------


@pytest.mark.parametrize("command_name", ["replay", "offline"])
@pytest.mark.parametrize("overwrite", [False, True])
def test_log_that_is_the_recording_is_refused_and_the_recording_untouched(tmp_path,
                                                                          command_name,
                                                                          overwrite):
    rec = recording(tmp_path)
    (tmp_path / "sub").mkdir()
    (tmp_path / "link.csv").symlink_to(rec)
    before = rec.read_bytes()
    for log in ("rec.csv", "./sub/../rec.csv", "link.csv", str(rec)):
        extra = ["--overwrite"] if overwrite else []
        args = [command_name, "rec.csv", "--log", log, "-q", *extra]
        if command_name == "replay":
            args += ["--display", "none"]
        line = one_error_line(ridgewatch(tmp_path, *args))
        assert line == (f"ridgewatch: error: --log {Path(log)} is the input file rec.csv; the "
                        "log would destroy it: give another --log path")
        assert rec.read_bytes() == before


def test_log_that_is_a_wfdb_signal_file_is_refused(tmp_path):
    wfdb = pytest.importorskip("wfdb")
    x, _, _, _ = pulse_signal(30.0, FS, RATE, seed=22)
    wfdb.wrsamp("rec", fs=FS, units=["au"], sig_name=["PLETH"],
                d_signal=np.round(x * 1000).astype(np.int64)[:, None], fmt=["16"],
                adc_gain=[1000.0], baseline=[0], write_dir=str(tmp_path))
    files = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    for given, log in (("rec.hea", "rec.dat"), ("rec", "rec.hea"), ("rec.dat", "rec.dat")):
        line = one_error_line(replay(tmp_path, given, "--log", log, "--overwrite"))
        assert line.endswith(f"is the input file {log}; the log would destroy it: give "
                             "another --log path"), line
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == files


def test_an_existing_file_is_never_replaced_without_overwrite(tmp_path):
    rec = recording(tmp_path)
    notes = tmp_path / "notes.csv"
    notes.write_text("my notes\n")
    line = one_error_line(replay(tmp_path, rec, "--log", "notes.csv"))
    assert line == ("ridgewatch: error: the estimate log notes.csv already exists; give "
                    "another --log path, or add --overwrite to replace an earlier ridgewatch log")
    line = one_error_line(replay(tmp_path, rec, "--log", "notes.csv", "--overwrite"))
    assert line == ("ridgewatch: error: notes.csv is not a ridgewatch estimate log (its first "
                    "line is not '# ridgewatch estimate log'); --overwrite only replaces logs: "
                    "give another --log path")
    line = one_error_line(ridgewatch(tmp_path, "offline", rec, "--log", "notes.csv", "-q"))
    assert "the estimate log notes.csv already exists" in line
    assert notes.read_text() == "my notes\n"


def hop_s(log: Path) -> float:
    """The median time between heart-rate estimates (on the 25 Hz analysis grid)."""
    return float(np.median(np.diff(read_log(log).select("hr", "PPG").columns["emitted_s"])))


def test_overwrite_replaces_an_earlier_log(tmp_path):
    rec = recording(tmp_path)
    assert replay(tmp_path, rec, "--log", "out.csv").returncode == 0
    assert hop_s(tmp_path / "out.csv") == pytest.approx(0.25, abs=0.02)
    again = replay(tmp_path, rec, "--log", "out.csv", "--overwrite", "--hop", "0.5")
    assert again.returncode == 0, again.stderr
    # Replaced, not appended to or mixed: one header, and only the second run's hops.
    assert (tmp_path / "out.csv").read_text().count("# ridgewatch estimate log") == 1
    table = read_log(tmp_path / "out.csv")
    assert table.header["config"]["profile"]["hr"]["hop_s"] == 0.5
    assert hop_s(tmp_path / "out.csv") == pytest.approx(0.5, abs=0.02)


# -- two runs, one path ---------------------------------------------------------------------


def wait_for_rows(path: Path, proc: subprocess.Popen, max_s: float = 120.0) -> None:
    give_up = time.monotonic() + max_s
    while not (path.exists() and len(rows_text(path)) > 0):
        assert proc.poll() is None, proc.communicate()
        if time.monotonic() > give_up:
            pytest.fail(f"no rows in {path} (hang guard)")
        time.sleep(0.05)


@pytest.mark.parametrize("second", [[], ["--overwrite"]])
def test_two_runs_on_one_log_give_one_log_and_one_refusal(tmp_path, second):
    """The first run writes at real time; the second starts while it does, is refused
    in one line, and the first, stopped by SIGTERM afterwards, leaves a log that reads
    back with only its own rows."""
    rec = recording(tmp_path)
    log = tmp_path / "shared.csv"
    first = subprocess.Popen(command("replay", rec, "--display", "none", "-q", "--speed", "1",
                                     "--log", log), cwd=tmp_path, env=env(),
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        wait_for_rows(log, first)
        line = one_error_line(replay(tmp_path, rec, "--log", log, *second))
        if second:
            assert line == (f"ridgewatch: error: the estimate log {log} is being written by "
                            "another ridgewatch run; give another --log path")
        else:
            assert line == (f"ridgewatch: error: the estimate log {log} already exists; give "
                            "another --log path, or add --overwrite to replace an earlier "
                            "ridgewatch log")
    finally:
        first.send_signal(signal.SIGTERM)
        _, err = first.communicate(timeout=120)
    assert first.returncode == 0, err
    text = log.read_bytes()
    assert b"\0" not in text and text.count(b"# ridgewatch estimate log") == 1
    table = read_log(log)
    assert len(table) > 0 and np.all(np.diff(table.columns["emitted_s"]) >= 0)
    # The rows are the first rows of an undisturbed run.
    assert replay(tmp_path, rec, "--log", "alone.csv").returncode == 0
    rows = [drop_cell(r) for r in rows_text(log)]
    alone = [drop_cell(r) for r in rows_text(tmp_path / "alone.csv")]
    assert rows == alone[:len(rows)]


def test_runs_started_together_get_a_default_log_each(tmp_path):
    """Two runs of one recording started at once (same second, same default name
    before the process id was part of it): a complete log each."""
    rec = recording(tmp_path)
    runs = [subprocess.Popen(command("replay", rec, "--display", "none"), cwd=tmp_path,
                             env=env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             text=True) for _ in range(2)]
    errors = [run.communicate(timeout=600)[1] for run in runs]
    assert [run.returncode for run in runs] == [0, 0], errors
    logs = sorted((tmp_path / "ridgewatch-logs").glob("rec-*.csv"))
    assert len(logs) == 2
    for log in logs:
        assert sum(f"log complete: {Path('ridgewatch-logs') / log.name}" in e
                   for e in errors) == 1
    rows = [[drop_cell(r) for r in rows_text(log)] for log in logs]
    assert len(rows[0]) > 50 and rows[0] == rows[1]


# -- names -------------------------------------------------------------------------------


def test_odd_names_read_back_with_the_log_reader_and_the_csv_module(tmp_path):
    """Channel names with a comma, quotes and non-ASCII letters (from the CSV header)
    and a file name with a line break, a comma and quotes (the log's source)."""
    header = 'time,"PPG, left","the ""finger"" PPG",Pulsoxymeter Ohr \u00e4\u00df\u2764'
    name = 'rec\nwith, "odd" name.csv'
    rec = recording(tmp_path, name, header)
    before = datetime.now(timezone.utc)
    done = replay(tmp_path, rec.name, "--log", "odd.csv",
                  "--channel", "PPG, left=ppg", "--channel", 'the "finger" PPG=ppg',
                  "--channel", "Pulsoxymeter Ohr \u00e4\u00df\u2764=ppg")
    assert done.returncode == 0, done.stderr
    names = ["PPG, left", 'the "finger" PPG', "Pulsoxymeter Ohr \u00e4\u00df\u2764"]
    table = read_log(tmp_path / "odd.csv")
    assert table.header["source"] == name
    assert table.header["channels"] == {n: "ppg" for n in names}
    assert {s for _, s in table.pairs()} == set(names) | {"fused"}
    for source in names:
        rates = table.select("hr", source).columns["rate_per_min"]
        assert np.isfinite(rates).any() and within_ec13(rates[np.isfinite(rates)], RATE).all()
    # The run's wall-clock start, in UTC (written to the millisecond).
    started = datetime.fromisoformat(table.header["started"])
    assert started.utcoffset().total_seconds() == 0
    after = datetime.now(timezone.utc)
    assert before.timestamp() - 1e-3 <= started.timestamp() <= after.timestamp()

    with open(tmp_path / "odd.csv", encoding="utf-8", newline="") as fh:
        rows = [r for r in csv.reader(fh) if r and not r[0].startswith("#")]
    assert tuple(rows[0]) == COLUMNS and len(rows) == 1 + len(table)
    assert [r[3] for r in rows[1:]] == list(table.columns["source"])
    text = (tmp_path / "odd.csv").read_text(encoding="utf-8")
    assert '# source: "rec\\nwith, \\"odd\\" name.csv"\n' in text


# -- batch ---------------------------------------------------------------------------------


def test_a_second_batch_into_the_same_folder_is_refused(tmp_path):
    folder = tmp_path / "recordings"
    folder.mkdir()
    recording(folder)
    args = ["batch", "recordings", "--out", "results", "--jobs", "1", "-q", "--no-report"]
    assert ridgewatch(tmp_path, *args).returncode == 0
    logs = {p: p.read_bytes() for p in (tmp_path / "results" / "rec").glob("*.csv")}
    assert sorted(p.name for p in logs) == ["live.csv", "offline.csv"]
    line = one_error_line(ridgewatch(tmp_path, *args))
    assert line == ("ridgewatch: error: results: holds the logs of an earlier batch "
                    f"({Path('results/rec/live.csv')} and 1 more); give another --out folder, "
                    "or add --overwrite to replace them")
    assert {p: p.read_bytes() for p in logs} == logs
    again = ridgewatch(tmp_path, *args, "--overwrite")
    assert again.returncode == 0, again.stderr
    for path in logs:
        assert path.read_text().count("# ridgewatch estimate log") == 1
        assert len(read_log(path)) > 0
    (tmp_path / "file").write_text("x")
    line = one_error_line(ridgewatch(tmp_path, "batch", "recordings", "--out", "file", "-q"))
    assert line == ("ridgewatch: error: --out file: is a file, not a folder; give a folder for "
                    "the logs and reports")


# -- live ------------------------------------------------------------------------------------


@pytest.mark.lsl
def test_live_stream_with_odd_names_gives_a_log_that_reads_back(tmp_path):
    """An LSL stream whose name holds a line break and quotes, with channel labels that
    hold a comma, quotes, a line break and non-ASCII letters; found by its source_id."""
    import threading
    import uuid

    import pylsl

    from streamer.sources.base import ChannelInfo, Chunk, SourceInfo
    from streamer.sources.lsl_publish import SamplePublisher
    from tests.robustness.faults import pulse_wave

    labels = ["PPG, left", 'PPG "right"\nfinger', "Pulsoxymeter \u00e4\u00df"]
    name = f'ward 3\n"bed, 7" {uuid.uuid4().hex[:8]}'
    source_id = f"rw-odd-{uuid.uuid4().hex[:12]}"
    publisher = SamplePublisher(SourceInfo(name, FS, tuple(ChannelInfo(label, "ppg", "au")
                                                          for label in labels), source_id),
                                align_to_local_clock=False)
    stop = threading.Event()

    def send():
        if not publisher.wait_for_consumers(60.0):
            return
        t0, k = pylsl.local_clock(), 0
        while not stop.is_set():
            x, _ = pulse_wave(FS, np.full(16, RATE), seed=k)
            t = t0 + (k + np.arange(16)) / FS
            publisher.push_chunk(Chunk(np.repeat(x[:, None], len(labels), axis=1), t))
            k += 16
            time.sleep(16 / FS / 8)  # 8 x real time

    thread = threading.Thread(target=send, daemon=True)
    thread.start()
    try:
        done = ridgewatch(tmp_path, "live", "--source-id", source_id, "--timeout", "10",
                          "--display", "none", "--duration", "8", "--log", "live.csv")
    finally:
        stop.set()
        thread.join(10)
        publisher.close()
    assert done.returncode == 0, done.stderr
    table = read_log(tmp_path / "live.csv")
    assert table.header["source"] == name and table.header["mode"] == "live"
    assert table.header["channels"] == {label: "ppg" for label in labels}
    assert datetime.fromisoformat(table.header["started"]).utcoffset().total_seconds() == 0
    assert set(labels) <= {s for _, s in table.pairs()} <= set(labels) | {"fused"}
    with open(tmp_path / "live.csv", encoding="utf-8", newline="") as fh:
        rows = [r for r in csv.reader(fh) if r and not r[0].startswith("#")]
    assert [r[3] for r in rows[1:]] == list(table.columns["source"])
