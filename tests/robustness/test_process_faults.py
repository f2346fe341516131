"""Faults of the running process and its surroundings: an LSL stream that disappears
and returns, two streams matching the query, a stream that returns with another
layout, SIGTERM during ``live``, and the disk filling up while logging.

In every case the estimate log stays valid (it reads back with
:func:`streamer.sinks.estimate_log.read_log`, ``emitted_s`` never decreases) and the
user sees one plain line, never a traceback.

LSL tests use their own stream names and source ids (uuid), so tests running at the
same time on this machine do not see each other's streams. Waiting loops have bounds
for hangs only; nothing asserts on wall-clock time.
"""

from __future__ import annotations

import errno
import io
import os
import re
import signal
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path

import numpy as np
import pytest

from estimators.config import get_profile
from streamer.channels import Selected
from streamer.errors import InputError
from streamer.runner import Runner
from streamer.sinks import estimate_log
from streamer.sinks.estimate_log import EstimateLog, drop_cell, read_log, rows_text
from streamer.sources.base import ChannelInfo, Chunk, Recording, SourceInfo
from streamer.sources.replay import RecordingSource
from tests.robustness.faults import pulse_signal, pulse_wave, within_ec13

REPO_ROOT = Path(__file__).resolve().parents[2]
FS = 125.0
PROFILE = get_profile("wrist")
RATE = 72.0


def unique(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:12]}"


def wait_for(condition, max_s: float = 20.0, what: str = "") -> None:
    """Poll ``condition`` until true; fail after ``max_s`` (a hang guard, not a timing
    requirement)."""
    give_up = time.monotonic() + max_s
    while not condition():
        if time.monotonic() > give_up:
            pytest.fail(f"gave up waiting for {what or condition}")
        time.sleep(0.02)


def cli_env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    return env


class Sender:
    """Pushes a 72 bpm pulse wave to an LSL outlet, ``speed`` times faster than real
    time, with timestamps on one continuous axis that survives a restart of the
    outlet (like a device that reconnects)."""

    def __init__(self, name: str, source_id: str, n_channels: int = 1, speed: float = 8.0):
        from streamer.sources.lsl_publish import SamplePublisher

        self.info = SourceInfo(name, FS, tuple(ChannelInfo(f"PPG{i}" if i else "PPG", "ppg", "au")
                                               for i in range(n_channels)), source_id)
        self.publisher = SamplePublisher(self.info, align_to_local_clock=False)
        self.speed = speed
        self.n_channels = n_channels

    def push(self, start_s: float, seconds: float, t0: float, phase0: float = 0.0) -> float:
        """Push ``seconds`` of signal stamped ``t0 + start_s + k / FS``; returns the
        phase at the end (to continue the wave)."""
        n = int(seconds * FS)
        x, phase = pulse_wave(FS, np.full(n, RATE), seed=int(start_s), phase0=phase0)
        t = t0 + start_s + np.arange(n) / FS
        step = 16
        for a in range(0, n, step):
            block = np.repeat(x[a:a + step, None], self.n_channels, axis=1)
            self.publisher.push_chunk(Chunk(block, t[a:a + step]))
            time.sleep(step / FS / self.speed)
        return phase

    def close(self) -> None:
        self.publisher.close()


def start_runner(source, tmp_path: Path, n_channels: int = 1):
    selected = [Selected(0, source.info.channels[0].name, "ppg")]
    log = EstimateLog(tmp_path / "live.csv", "live", source.info.name,
                      {s.name: s.kind for s in selected}, {})
    runner = Runner(source, selected, PROFILE, log=log)
    result = {}

    def work():
        try:
            result["stats"] = runner.run()
        except BaseException as exc:  # noqa: BLE001 - reported by the test
            result["error"] = exc

    thread = threading.Thread(target=work, daemon=True)
    thread.start()
    return runner, thread, result


def events_of(runner, kind):
    return [e for e in list(runner.stats.events) if e.kind == kind]


# -- LSL ---------------------------------------------------------------------------------


@pytest.mark.lsl
def test_stream_lost_and_back_gives_event_lines_and_estimates_resume(tmp_path):
    from streamer.sources.lsl_source import LslSource

    import pylsl

    name, source_id = unique("rw-robust"), unique("rw-sid")
    sender = Sender(name, source_id)
    source = LslSource(name=name, extra_wait_s=0.2, lost_after_s=0.5)
    runner, thread, result = start_runner(source, tmp_path)
    try:
        assert sender.publisher.wait_for_consumers(10.0)
        t0 = pylsl.local_clock()
        phase = sender.push(0.0, 12.0, t0)
        wait_for(lambda: runner.stats.estimates > 0, what="first estimates")
        sender.close()  # the sender vanishes
        wait_for(lambda: events_of(runner, "lost"), what="the lost event")
        before = runner.stats.estimates
        sender = Sender(name, source_id)  # ... and comes back, same source_id
        assert sender.publisher.wait_for_consumers(10.0)
        sender.push(15.0, 12.0, t0, phase)
        wait_for(lambda: events_of(runner, "resumed") and runner.stats.estimates > before + 8,
                 what="estimates after the comeback")
    finally:
        runner.stop("test over")
        thread.join(10.0)
        sender.close()
    assert "error" not in result, result.get("error")
    text = (tmp_path / "live.csv").read_text()
    assert f"lost: stream '{name}' lost; waiting for it to come back\n" in text
    assert f"resumed: stream '{name}' is back\n" in text
    table = read_log(tmp_path / "live.csv")
    emitted = table.columns["emitted_s"]
    assert (np.diff(emitted) >= 0).all() and (emitted >= table.columns["time_s"]).all()
    resumed_at = events_of(runner, "resumed")[0].time_s
    after = emitted >= resumed_at
    # Estimation starts afresh at the comeback: the first window after it is full
    # of new samples, and the estimates are right again.
    assert after.sum() >= 8 and len(emitted) - after.sum() >= 8
    assert emitted[after][0] >= resumed_at + PROFILE.hr.min_window_s - 2 / FS
    assert within_ec13(table.select("hr").columns["rate_per_min"], RATE).all()


@pytest.mark.lsl
def test_stream_back_with_another_channel_count_is_said_in_the_log(tmp_path):
    from streamer.sources.lsl_source import LslSource

    import pylsl

    name, source_id = unique("rw-robust"), unique("rw-sid")
    sender = Sender(name, source_id)
    source = LslSource(name=name, extra_wait_s=0.2, lost_after_s=0.5)
    runner, thread, result = start_runner(source, tmp_path)
    other = None
    try:
        assert sender.publisher.wait_for_consumers(10.0)
        sender.push(0.0, 10.0, pylsl.local_clock())
        wait_for(lambda: runner.stats.estimates > 0, what="first estimates")
        sender.close()
        wait_for(lambda: events_of(runner, "lost"), what="the lost event")
        other = Sender(name, source_id, n_channels=2)
        wait_for(lambda: len(events_of(runner, "lost")) >= 2, what="the refusal")
    finally:
        runner.stop("test over")
        thread.join(10.0)
        sender.close()
        if other is not None:
            other.close()
    assert not thread.is_alive()
    assert "error" not in result, result.get("error")
    refusal = (f"lost: stream '{name}' came back with 2 channel(s) at 125 Hz instead of 1 at "
               f"125 Hz; not reading it, restart ridgewatch to use it\n")
    assert refusal in (tmp_path / "live.csv").read_text()
    assert len(read_log(tmp_path / "live.csv")) == runner.stats.estimates > 0


@pytest.mark.lsl
def test_two_matching_streams_are_one_error_line(tmp_path):
    name = unique("rw-twin")
    first = Sender(name, unique("rw-sid-a"))
    second = Sender(name, unique("rw-sid-b"))
    try:
        done = subprocess.run([sys.executable, "-m", "streamer.cli", "live", "--name", name,
                               "--timeout", "3", "--display", "none", "--no-log"],
                              cwd=tmp_path, env=cli_env(), capture_output=True, text=True,
                              timeout=120)
    finally:
        first.close()
        second.close()
    lines = done.stderr.strip().splitlines()
    assert done.returncode == 2 and len(lines) == 1, done.stderr
    assert lines[0].startswith(f"ridgewatch: error: 2 LSL streams match name='{name}': ")
    assert lines[0].endswith("; add --source-id to choose one")


@pytest.mark.lsl
def test_sigterm_during_live_leaves_a_complete_log(tmp_path):
    import pylsl

    name = unique("rw-term")
    sender = Sender(name, unique("rw-sid"), speed=4.0)
    stop = threading.Event()

    def send():
        if not sender.publisher.wait_for_consumers(60.0):
            return
        t0, start, phase = pylsl.local_clock(), 0.0, 0.0
        while not stop.is_set():
            phase = sender.push(start, 1.0, t0, phase)
            start += 1.0

    thread = threading.Thread(target=send, daemon=True)
    thread.start()
    log_path = tmp_path / "live.csv"
    child = subprocess.Popen([sys.executable, "-m", "streamer.cli", "live", "--name", name,
                              "--display", "none", "--log", str(log_path)], cwd=tmp_path,
                             env=cli_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             text=True)
    try:
        wait_for(lambda: log_path.exists() and len(rows_text(log_path)) >= 20 or
                 child.poll() is not None, max_s=90.0, what="20 rows in the live log")
        assert child.poll() is None, child.communicate()[1]
        child.send_signal(signal.SIGTERM)
        _, stderr = child.communicate(timeout=30)
    finally:
        stop.set()
        if child.poll() is None:
            child.kill()
        thread.join(10.0)
        sender.close()
    assert child.returncode == 0, stderr
    assert "Traceback" not in stderr
    assert "done (stopped by SIGTERM)" in stderr
    assert f"log complete: {log_path}" in stderr
    text = log_path.read_text()
    assert text.endswith("\n")
    table = read_log(log_path)
    assert len(table) >= 20
    assert (np.diff(table.columns["emitted_s"]) >= 0).all()
    assert within_ec13(table.select("hr").columns["rate_per_min"], RATE).all()


# -- disk full ----------------------------------------------------------------------------


class FillingDisk(io.RawIOBase):
    """A file on a disk with ``room`` bytes left: the write that does not fit stores
    what fits, then fails with ENOSPC, as a full disk does."""

    def __init__(self, fd: int, room: int):
        self._file = open(fd, "wb")
        self.room = room

    def writable(self) -> bool:
        return True

    def write(self, data) -> int:
        data = bytes(data)
        if len(data) > self.room:
            self._file.write(data[: self.room])
            self._file.flush()
            self.room = 0
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        self._file.write(data)
        self._file.flush()
        self.room -= len(data)
        return len(data)

    def fileno(self) -> int:
        return self._file.fileno()

    def close(self) -> None:
        if not self.closed:
            self._file.close()
        super().close()


def open_on_filling_disk(room: int):
    """Stands in for ``open`` in the estimate log module, which opens the file
    descriptor it created exclusively."""
    def opener(fd, mode="r", encoding=None, newline=None, **_):
        assert "w" in mode and isinstance(fd, int)
        return io.TextIOWrapper(io.BufferedWriter(FillingDisk(fd, room)),
                                encoding=encoding, newline=newline)
    return opener


def recording_file(tmp_path: Path) -> Path:
    x, t, _, _ = pulse_signal(40.0, FS, RATE, seed=11)
    path = tmp_path / "rec.csv"
    path.write_text("time,PPG\n" + "".join(f"{a:.3f},{b:.6f}\n" for a, b in zip(t, x)))
    return path


ON_FILLING_DISK = """
import sys
from streamer import cli
from streamer.sinks import estimate_log
from tests.robustness.test_process_faults import open_on_filling_disk
estimate_log.open = open_on_filling_disk(int(sys.argv[1]))
sys.exit(cli.main(sys.argv[2:]))
"""


def test_disk_full_while_logging_stops_with_one_line_and_keeps_the_rows(tmp_path):
    """The disk fills up after about 60 rows: replay stops with one error line that
    says how many rows are complete, and nothing else; the file holds exactly those
    rows (and maybe a cut line, which readers skip), the first rows of a full run."""
    rec = recording_file(tmp_path)
    args = ["replay", str(rec), "--display", "none", "--log"]
    room = 10**9
    full = subprocess.run([sys.executable, "-c", ON_FILLING_DISK, str(room), *args,
                           str(tmp_path / "full.csv")], cwd=tmp_path, env=cli_env(),
                          capture_output=True, text=True, timeout=300)
    assert full.returncode == 0, full.stderr
    full_rows = rows_text(tmp_path / "full.csv")
    header = (tmp_path / "full.csv").read_text().split("emitted_s,")[0]
    room = len(header) + len("emitted_s,") + 60 * len(full_rows[0]) + 25
    done = subprocess.run([sys.executable, "-c", ON_FILLING_DISK, str(room), *args,
                           str(tmp_path / "out.csv")], cwd=tmp_path, env=cli_env(),
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    lines = [ln for ln in done.stderr.splitlines() if ln.startswith("ridgewatch: ")]
    assert len(lines) == 1, done.stderr
    match = re.fullmatch(
        r"ridgewatch: error: writing the estimate log .*out\.csv failed \(No space left on "
        r"device\); the (\d+) rows written before are complete", lines[0])
    assert match, lines[0]
    n_complete = int(match.group(1))
    assert 50 <= n_complete <= 60
    assert len(read_log(tmp_path / "out.csv")) == n_complete

    def without_compute_time(rows):
        return [drop_cell(r) for r in rows]

    assert (without_compute_time(rows_text(tmp_path / "out.csv"))[:n_complete]
            == without_compute_time(full_rows)[:n_complete])


def test_disk_full_from_the_start_is_one_error_line(tmp_path):
    """``/dev/full`` fails every write with ENOSPC."""
    if not os.path.exists("/dev/full"):
        pytest.skip("/dev/full is not available on this system")
    rec = recording_file(tmp_path)
    done = subprocess.run([sys.executable, "-m", "streamer.cli", "replay", str(rec),
                           "--display", "none", "--log", "/dev/full"], cwd=tmp_path,
                          env=cli_env(), capture_output=True, text=True, timeout=300)
    lines = done.stderr.strip().splitlines()
    assert done.returncode == 2 and len(lines) == 1, done.stderr
    assert lines[0] == ("ridgewatch: error: writing the estimate log /dev/full failed (No space "
                        "left on device); the 0 rows written before are complete")


def test_runner_with_a_full_disk_raises_input_error_and_closes_the_source(tmp_path,
                                                                          monkeypatch):
    """The same through the runner alone: the error is an InputError (one line), and
    the source is closed."""
    x, t, _, _ = pulse_signal(30.0, FS, RATE, seed=12)
    info = SourceInfo("sensor", FS, (ChannelInfo("PPG", "ppg"),))
    source = RecordingSource(Recording(x[:, None], t, info))
    monkeypatch.setattr(estimate_log, "open", open_on_filling_disk(2000), raising=False)
    log = EstimateLog(tmp_path / "out.csv", "replay", "sensor", {"PPG": "ppg"}, {})
    runner = Runner(source, [Selected(0, "PPG", "ppg")], PROFILE, log=log)
    with pytest.raises(InputError, match=r"writing the estimate log .*out\.csv failed \(No "
                                         r"space left on device\); the \d+ rows written"):
        runner.run()
    assert list(source.chunks()) == []  # the source was closed
    monkeypatch.undo()
    assert len(read_log(tmp_path / "out.csv")) == log.rows_written
