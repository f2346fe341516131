"""Live timing over real LSL on loopback, met through the command line: the stream is
lost during ``--duration``, a sender delivers in bursts, a sender freezes, ``--publish``
runs twice at once on one input, and liblsl would print its own console lines.

Senders run in this process (the one that freezes, in a child process); ridgewatch runs
as ``python -m streamer.cli live`` in a subprocess, as a user runs it. The input is the
PPG of the synthetic cycling trial (rest: heart rate 68 bpm, breathing 12 per minute).
Stream names, source ids and LSL sessions are unique per test (uuid), so tests running
at the same time on this machine never see each other's streams. Waits have bounds for
hangs only; nothing asserts on wall-clock time.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path

import numpy as np
import pylsl
import pytest

from estimators.config import get_profile
from estimators.monitor import RateMonitor
from streamer import __version__
from streamer.cli import CAUTION
from streamer.simulation import cycling_trial
from streamer.sinks.estimate_log import read_log
from streamer.sinks.outlet import FIELDS, STREAM_TYPE, channel_labels
from streamer.sources.base import ChannelInfo, Chunk, SourceInfo
from streamer.sources.lsl_publish import SamplePublisher
from tests.streamer.test_cli import cli_command, cli_env

pytestmark = [pytest.mark.lsl]

FS = 125.0
PROFILE = get_profile("wrist")
HANG_S = 120.0
"""Bound on every wait for a subprocess or a stream: a guard against hangs only."""


def unique(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:12]}"


def trial_ppg(seconds: float) -> np.ndarray:
    return cycling_trial(FS, duration_s=seconds).samples[:, :1].copy()


def ppg_publisher(name: str) -> SamplePublisher:
    """An outlet with one PPG channel; timestamps are pushed as given (local clock)."""
    info = SourceInfo(name, FS, (ChannelInfo("PPG", "ppg", "a.u."),), unique("rw-sid"))
    return SamplePublisher(info, align_to_local_clock=False)


def push(publisher, x: np.ndarray, t: np.ndarray, speed: float = 1.0) -> None:
    """Push ``x`` stamped ``t`` in 40 ms chunks, ``speed`` times faster than real time."""
    step = int(0.04 * FS)
    for a in range(0, len(t), step):
        publisher.push_chunk(Chunk(x[a:a + step], t[a:a + step]))
        time.sleep(step / FS / speed)


def start_live(*args, cwd) -> subprocess.Popen:
    return subprocess.Popen(cli_command("live", *args), cwd=cwd, env=cli_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def finish(proc: subprocess.Popen) -> str:
    """The subprocess's stderr once it has ended (killed after ``HANG_S``)."""
    try:
        return proc.communicate(timeout=HANG_S)[1]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()


def wait_for(condition, what: str) -> None:
    give_up = time.monotonic() + HANG_S
    while not condition():
        if time.monotonic() > give_up:
            pytest.fail(f"gave up waiting for {what}")
        time.sleep(0.05)


def event_lines(path: Path) -> list[str]:
    return [line for line in path.read_text().splitlines() if line.startswith("# event ")]


def log_says(path: Path, text: str) -> bool:
    return path.exists() and text in path.read_text()


def header_lines(log: Path) -> list[str]:
    return [f"ridgewatch {__version__}: {CAUTION}",
            f"channels: PPG=ppg; profile wrist; log {log}"]


def test_liblsl_lines_stay_off_a_one_line_error(tmp_path):
    """With a user's lsl_api.cfg that says nothing about logging (here: its own LSL
    session), liblsl used to print 'Configuration loaded from lsl_api.cfg' before the
    error line. Now the error is the only line, and the user's settings still hold:
    the stream published in the default session is not seen from theirs."""
    name = unique("rw-cfg")
    (tmp_path / "lsl_api.cfg").write_text(f"[lab]\nSessionID = {unique('rw-session')}\n")
    publisher = ppg_publisher(name)
    try:
        done = subprocess.run(cli_command("live", "--name", name, "--timeout", "1",
                                          "--display", "none", "--no-log"),
                              cwd=tmp_path, env=cli_env(), capture_output=True, text=True,
                              timeout=HANG_S)
    finally:
        publisher.close()
    assert done.returncode == 2
    assert done.stderr.splitlines() == [
        f"ridgewatch: error: no LSL stream matches name='{name}' within 1 s, and there are "
        f"no LSL streams at all on this network; start the sender first"]
