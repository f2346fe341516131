"""Ctrl-C (SIGINT) and SIGTERM: the run stops cleanly and the log is a valid prefix.

The subprocess test replays the 40 s cut of the demo session at 4x real time (10 s of
wall time), waits until rows are in the log, sends the signal and compares the cut log
with an uninterrupted run of the same file. Timeouts only guard against hangs.
"""

from __future__ import annotations

import os
import signal
import time

import pytest

from streamer.runner import install_signal_handlers
from streamer.sinks.estimate_log import read_log, rows_text
from tests.streamer.test_cli import (  # noqa: F401  (fixtures shared with test_cli)
    HANG_S,
    full_replay,
    rows_without_compute,
    short_csv,
    start_cli,
)

ROWS_BEFORE_SIGNAL = 12
"""Rows to wait for before the signal: a few hops into the estimates."""


def wait_for_rows(path, proc, n: int) -> None:
    deadline = time.monotonic() + HANG_S
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            pytest.fail(f"replay ended before the signal: {proc.communicate()[1]}")
        if path.exists() and len(rows_text(path)) >= n:
            return
        time.sleep(0.05)
    pytest.fail("no rows in the log: the replay hangs")


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_signal_mid_replay_leaves_a_prefix_of_the_full_log(signum, short_csv, full_replay,
                                                           tmp_path):
    log = tmp_path / "cut.csv"
    proc = start_cli("replay", short_csv, "--speed", "4", "--display", "none", "--log", log,
                     cwd=tmp_path)
    try:
        wait_for_rows(log, proc, ROWS_BEFORE_SIGNAL)
        proc.send_signal(signum)
        _out, err = proc.communicate(timeout=HANG_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    assert "Traceback" not in err
    last = err.splitlines()[-1]
    assert last.startswith(f"done (stopped by {signum.name}): ")
    assert last.endswith(f"log complete: {log}")

    table = read_log(log)
    cut = rows_without_compute(log)
    full = rows_without_compute(full_replay)
    assert len(table) == len(cut)
    assert ROWS_BEFORE_SIGNAL <= len(cut) < len(full)
    assert cut == full[:len(cut)]
    assert log.read_text().endswith("\n")  # no half-written last row


class FakeRunner:
    def __init__(self):
        self.reasons = []

    def stop(self, reason):
        self.reasons.append(reason)


def test_handlers_ask_the_runner_to_stop_and_are_restored():
    before = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    runner = FakeRunner()
    also = []
    restore = install_signal_handlers(runner, also=lambda: also.append(1))
    try:
        os.kill(os.getpid(), signal.SIGTERM)
        signal.raise_signal(signal.SIGINT)
        # The handlers run in the main thread between bytecodes; give them a moment.
        for _ in range(100):
            if len(runner.reasons) == 2:
                break
            time.sleep(0.01)
    finally:
        restore()
    assert runner.reasons == ["stopped by SIGTERM", "stopped by SIGINT"]
    assert also == [1, 1]
    assert {s: signal.getsignal(s) for s in before} == before
