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
    """The subprocess's stderr once it has ended; killed when it has not ended after
    ``HANG_S`` (its return code then says so)."""
    try:
        return proc.communicate(timeout=HANG_S)[1]
    except subprocess.TimeoutExpired:
        proc.kill()
        return proc.communicate()[1]


def stop(proc: subprocess.Popen) -> None:
    """SIGTERM, as a user stops a run without --duration (a no-op once it has ended)."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)


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


def test_duration_holds_while_the_stream_is_lost(tmp_path):
    """The sender goes away for good after 3 s: the run still ends at --duration with a
    complete log and exit code 0, and stderr holds ridgewatch's own lines only (liblsl
    used to add 'Stream transmission broke off' there)."""
    name = unique("rw-gone")
    publisher = ppg_publisher(name)
    log = tmp_path / "live.csv"
    proc = start_live("--name", name, "--timeout", "60", "--display", "none",
                      "--duration", "6", "--log", log, cwd=tmp_path)
    try:
        assert publisher.wait_for_consumers(HANG_S)
        n = int(3 * FS)
        push(publisher, trial_ppg(3.0), pylsl.local_clock() + np.arange(n) / FS)
    finally:
        publisher.close()
    err = finish(proc)
    lines = err.splitlines()
    assert proc.returncode == 0, err
    assert lines[:2] == header_lines(log)
    assert lines[2] == f"ridgewatch: stream '{name}' lost; waiting for it to come back"
    assert lines[3].startswith("done (--duration 6 s reached): 3.0 s of signal, ")
    assert lines[3].endswith(f"; log complete: {log}")
    assert len(lines) == 4, err
    text = log.read_text()
    assert text.endswith(f" lost: stream '{name}' lost; waiting for it to come back\n")
    assert read_log(log).header["source"] == name


def test_bursty_sender_is_not_lost(tmp_path):
    """A sender that delivers 8 s of samples at a time, with 3 s between deliveries
    (faster than real time so the test stays short; only the pauses matter), is not
    lost: the engine never restarts, so every hop of the 40 s is estimated, breathing
    included, exactly as the engine estimates the same samples in one go."""
    name = unique("rw-burst")
    publisher = ppg_publisher(name)
    log = tmp_path / "live.csv"
    x = trial_ppg(40.0)
    proc = start_live("--name", name, "--timeout", "60", "--display", "none",
                      "--log", log, cwd=tmp_path)
    try:
        assert publisher.wait_for_consumers(HANG_S)
        t = pylsl.local_clock() + np.arange(len(x)) / FS
        burst = int(8 * FS)
        for a in range(0, len(x), burst):
            if a:
                time.sleep(3.0)
            publisher.push_chunk(Chunk(x[a:a + burst], t[a:a + burst]))
        time.sleep(1.0)
        publisher.close()  # the end: now the stream is lost, which ends the test
        lost = f" lost: stream '{name}' lost; waiting for it to come back"
        wait_for(lambda: log_says(log, lost), "the lost line at the end")
    finally:
        publisher.close()
        stop(proc)
    err = finish(proc)
    assert proc.returncode == 0, err
    assert [line.split(" ", 3)[3] for line in event_lines(log)] == [lost.lstrip()]
    table = read_log(log)
    want = RateMonitor([("PPG", "ppg")], FS, PROFILE).update(x, t)
    assert {(e.quantity, e.source) for e in want} == {("hr", "PPG"), ("rr", "PPG")}
    for pair in (("hr", "PPG"), ("rr", "PPG")):
        rows = table.select(*pair).columns
        mine = [e for e in want if (e.quantity, e.source) == pair]
        assert len(rows["rate_per_min"]) == len(mine)
        # The log keeps 3 decimals of rates and 4 of times: half a unit in the last
        # place is its round-off.
        np.testing.assert_allclose(rows["rate_per_min"], [e.rate_per_min for e in mine],
                                   atol=5e-4, equal_nan=True)
        # The inlet adds its clock-offset estimate (microseconds on one machine).
        np.testing.assert_allclose(rows["emitted_s"], [e.emitted_s for e in mine], atol=1e-3)
    breathing = table.select("rr", "PPG").columns["rate_per_min"]
    assert np.isfinite(breathing).sum() >= 20


FROZEN_SENDER = """
import os, signal, sys, time
import numpy as np, pylsl
pylsl.set_config_content("[log]\\nlevel = -3\\n")
name, fs = sys.argv[1], 125.0
info = pylsl.StreamInfo(name, "PPG", 1, fs, pylsl.cf_double64, name + "-sid")
outlet = pylsl.StreamOutlet(info)
outlet.wait_for_consumers(120.0)
t0 = pylsl.local_clock()
for k in range(0, int(3 * fs), 5):
    phase = 1.2 * (t0 + (k + np.arange(5)) / fs)
    outlet.push_chunk(np.sin(2 * np.pi * phase)[:, None].tolist(), (t0 + (k + np.arange(5)) / fs).tolist())
    time.sleep(5 / fs)
os.kill(os.getpid(), signal.SIGSTOP)
"""


def test_frozen_sender_is_lost(tmp_path):
    """A sender that freezes (its process stopped, as a machine that drops off the
    network) keeps its connection open, so liblsl reports nothing; it stops answering
    on the network, so it is lost, and --duration still ends the run."""
    name = unique("rw-frozen")
    sender = subprocess.Popen([sys.executable, "-c", FROZEN_SENDER, name])
    log = tmp_path / "live.csv"
    try:
        proc = start_live("--name", name, "--timeout", "60", "--display", "none",
                          "--duration", "9", "--log", log, cwd=tmp_path)
        err = finish(proc)
    finally:
        sender.kill()  # SIGKILL ends a stopped process too
        sender.wait(HANG_S)
    lines = err.splitlines()
    assert proc.returncode == 0, err
    # The sender describes no channels: its one channel is named by position and
    # takes the stream's type.
    assert lines[:2] == [header_lines(log)[0], f"channels: ch0=ppg; profile wrist; log {log}"]
    assert lines[2] == f"ridgewatch: stream '{name}' lost; waiting for it to come back"
    assert lines[3].startswith("done (--duration 9 s reached): 3.0 s of signal, ")
    assert len(lines) == 4, err


class EstimateCollector(threading.Thread):
    """Subscribes to every estimate stream whose name starts with ``prefix`` and keeps
    everything each one sends."""

    def __init__(self, prefix: str):
        super().__init__(daemon=True)
        self.prefix = prefix
        self.streams: dict = {}
        self.stop = threading.Event()

    def names(self) -> set:
        """Names of the streams subscribed to and not lost."""
        return {s["name"] for s in list(self.streams.values()) if not s["lost"]}

    def run(self):
        inlets = {}
        quiet_since = None
        while True:
            if not self.stop.is_set():
                for info in pylsl.resolve_byprop("type", STREAM_TYPE, minimum=0, timeout=0.2):
                    if info.name().startswith(self.prefix) and info.uid() not in inlets:
                        inlet = pylsl.StreamInlet(info, max_buflen=60)
                        try:
                            inlet.open_stream(timeout=10.0)
                            full = inlet.info(timeout=10.0)
                        except (pylsl.util.LostError, pylsl.util.TimeoutError):
                            continue  # gone already (a run that took the next number)
                        inlets[info.uid()] = inlet
                        self.streams[info.uid()] = {
                            "name": info.name(), "source_id": info.source_id(),
                            "srate": info.nominal_srate(), "lost": False,
                            "labels": full.get_channel_labels(), "x": [], "t": []}
            got = 0
            for uid, inlet in inlets.items():
                if self.streams[uid]["lost"]:
                    continue
                try:
                    x, t = inlet.pull_chunk(timeout=0.0)
                except pylsl.util.LostError:
                    self.streams[uid]["lost"] = True
                    continue
                self.streams[uid]["x"] += x
                self.streams[uid]["t"] += t
                got += len(t)
            if self.stop.is_set():
                # Stopped: keep draining until nothing more arrives for a while.
                quiet_since = None if got else quiet_since or time.monotonic()
                if quiet_since is not None and time.monotonic() - quiet_since > 1.0:
                    return
            time.sleep(0.02)


def test_publish_sends_one_sample_per_log_row_per_stream(tmp_path):
    """Two ``live --publish`` runs at once on one input: each publishes one stream per
    estimate stream of its log, at the nominal rate 1 / hop, with exactly the log's
    rows (NaN only where the log has no rate); the two runs' names and source ids
    differ."""
    name = unique("rw-pub")
    publisher = ppg_publisher(name)
    collector = EstimateCollector(f"ridgewatch {name} ")
    collector.start()
    logs = [tmp_path / "a.csv", tmp_path / "b.csv"]
    procs = [start_live("--name", name, "--timeout", "60", "--display", "none", "--publish",
                        "--log", log, cwd=tmp_path) for log in logs]
    x = trial_ppg(40.0)
    try:
        # Both runs publish two streams (heart and breathing rate) once they have
        # subscribed to the input; the collector subscribes to all four before the
        # first sample is sent, so it misses nothing.
        wait_for(lambda: len(collector.names()) == 4, "four estimate streams")
        push(publisher, x, pylsl.local_clock() + np.arange(len(x)) / FS, speed=4.0)
        time.sleep(1.0)
        publisher.close()
        lost = f" lost: stream '{name}' lost; waiting for it to come back"
        wait_for(lambda: all(log_says(log, lost) for log in logs), "the lost lines")
    finally:
        publisher.close()
        for proc in procs:
            stop(proc)
        errs = [finish(proc) for proc in procs]
        collector.stop.set()
        collector.join(HANG_S)
    assert [proc.returncode for proc in procs] == [0, 0], errs

    instance = {}
    for log, err in zip(logs, errs):
        line = err.splitlines()[1]
        for base in (f"ridgewatch {name}", f"ridgewatch {name} (2)"):
            if line == (f"{header_lines(log)[1]}; publishing LSL streams "
                        f"'{base} hr.PPG', '{base} rr.PPG', '{base} markers'"):
                instance[log] = base
    assert sorted(instance.values()) == [f"ridgewatch {name}", f"ridgewatch {name} (2)"], errs
    # A run that found its ids taken dropped its first streams before sending anything.
    streams = {s["name"]: s for s in collector.streams.values() if s["t"]}
    assert len(streams) == len({s["source_id"] for s in streams.values()}) == 4

    for log, base in instance.items():
        table = read_log(log)
        assert set(table.pairs()) == {("hr", "PPG"), ("rr", "PPG")}
        for quantity, source in table.pairs():
            stream = streams[f"{base} {quantity}.{source}"]
            # The declared rate is 1 / hop (the wrist profile's 0.25 s for both).
            assert stream["srate"] == 1.0 / PROFILE.hr.hop_s == 1.0 / PROFILE.rr_pulse.hop_s
            assert stream["labels"] == channel_labels([(quantity, source)])
            got = np.array(stream["x"], dtype=np.float64).reshape(-1, len(FIELDS))
            cols = table.select(quantity, source).columns
            assert len(got) == len(cols["rate_per_min"]) > 0
            # The log keeps 4 decimals of times and fractions, 3 of rates: half a unit
            # in the last place is its round-off.
            np.testing.assert_allclose(stream["t"], cols["emitted_s"], atol=5e-5)
            np.testing.assert_allclose(got[:, 0], cols["rate_per_min"], atol=5e-4,
                                       equal_nan=True)
            np.testing.assert_allclose(got[:, 1], cols["confidence"], atol=5e-5)
            np.testing.assert_allclose(got[:, 2], cols["quality"], atol=5e-5)
            np.testing.assert_array_equal(np.isnan(got[:, 3]), np.isnan(cols["rate_per_min"]))
            shown = ~np.isnan(got[:, 3])
            np.testing.assert_allclose(got[shown, 3], cols["delay_s"][shown], atol=1.5e-4)
            assert not np.isnan(got[:, 1:3]).any()


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
