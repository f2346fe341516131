"""The whole live path over real LSL on the loopback interface.

A test outlet publishes synthetic PPG at 125 Hz in real time (a pulse train whose rate
ramps slowly, so the truth is known at every instant). Two consumers follow it at the
same time, which keeps the real-time part to one stretch of about 20 s:

(a) ``python -m streamer.cli live --name ... --publish`` in a subprocess;
(b) the Python API: :class:`LslSource` + :class:`Runner` with a log and an
    :class:`EstimateOutlet`.

Test inlets receive the estimates both publish. Stream names and source ids are unique
per run, so other tests on this machine never match them. Nothing asserts on wall-clock
time; the bounds on waits are for hangs only.
"""

from __future__ import annotations

import threading
import time
import uuid

import numpy as np
import pylsl
import pytest

from estimators.config import get_profile
from estimators.monitor import RateMonitor
from streamer.channels import select
from streamer.runner import Runner
from streamer.simulation import pulse_train
from streamer.sinks.estimate_log import EstimateLog
from streamer.sinks.outlet import FIELDS, EstimateOutlet, channel_labels
from streamer.sources.base import ChannelInfo, Chunk, SourceInfo
from streamer.sources.lsl_publish import SamplePublisher
from streamer.sources.lsl_source import LslSource
from tests.streamer.test_cli import HANG_S, check_log_format, start_cli

pytestmark = [pytest.mark.lsl, pytest.mark.slow]

FS = 125.0
RUN_S = 16.0
"""``--duration`` of both consumers: the first estimate comes 8 s after the first
sample, so this leaves about 8 s (32 hops) of estimates."""
PUBLISH_MAX_S = 90.0
"""The publisher stops by itself after this long (a guard against hangs only)."""
PROFILE = get_profile("wrist")


def truth_bpm(t_s):
    """The synthetic heart rate: 66 bpm, then up by 0.8 bpm per second (well inside the
    profile's limit on changes), capped at 96 bpm."""
    return np.minimum(66.0 + 0.8 * np.asarray(t_s, dtype=np.float64), 96.0)


def ec13_ok(rate, truth):
    """Within +-10 % or +-5 bpm, whichever is greater (ANSI/AAMI EC13 heart-rate
    accuracy, cited from memory)."""
    return np.abs(rate - truth) <= np.maximum(0.1 * truth, 5.0)


class Publisher(threading.Thread):
    """Pushes the pulse train in 40 ms chunks on an absolute real-time schedule."""

    def __init__(self, info: SourceInfo):
        super().__init__(daemon=True)
        n = int(PUBLISH_MAX_S * FS)
        self.times = np.arange(n) / FS
        self.samples = pulse_train(FS, truth_bpm(self.times), seed=3)[:, None]
        self.outlet = SamplePublisher(info)
        self.stop = threading.Event()

    def run(self):
        step = 5
        start = time.monotonic()
        try:
            for a in range(0, len(self.times), step):
                due = start + (a + step) / FS
                while not self.stop.is_set() and time.monotonic() < due:
                    self.stop.wait(min(0.01, max(0.0, due - time.monotonic())))
                if self.stop.is_set():
                    return
                self.outlet.push_chunk(Chunk(self.samples[a:a + step],
                                             self.times[a:a + step]))
        finally:
            self.outlet.close()


class Collector(threading.Thread):
    """Opens an inlet on the first stream matching ``prop=value`` and keeps pulling."""

    def __init__(self, prop: str, value: str):
        super().__init__(daemon=True)
        self.prop, self.value = prop, value
        self.opened = threading.Event()
        self.stop = threading.Event()
        self.samples: list = []
        self.stamps: list = []
        self.labels: list[str] = []

    def run(self):
        deadline = time.monotonic() + HANG_S
        found = []
        while not found and not self.stop.is_set() and time.monotonic() < deadline:
            found = pylsl.resolve_byprop(self.prop, self.value, timeout=0.5)
        if not found:
            return
        inlet = pylsl.StreamInlet(found[0], max_buflen=60)
        inlet.open_stream(timeout=10.0)
        info = inlet.info(timeout=10.0)
        node = info.desc().child("channels").child("channel")
        while not node.empty():
            self.labels.append(node.child_value("label"))
            node = node.next_sibling("channel")
        self.opened.set()
        quiet_since = None
        while True:
            try:
                samples, stamps = inlet.pull_chunk(timeout=0.2)
            except pylsl.util.LostError:
                break
            self.samples.extend(samples)
            self.stamps.extend(stamps)
            if stamps:
                quiet_since = None
            elif self.stop.is_set():
                # Stopped: keep draining until nothing more arrives for a while.
                quiet_since = quiet_since or time.monotonic()
                if time.monotonic() - quiet_since > 1.0:
                    break
        inlet.close_stream()


def unique(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:12]}"


@pytest.fixture(scope="module")
def live_session(tmp_path_factory):
    folder = tmp_path_factory.mktemp("live")
    name, source_id = unique("rw-e2e-ppg"), unique("rw-e2e-src")
    info = SourceInfo(name, FS, (ChannelInfo("PLETH", "ppg", "a.u."),), source_id)
    publisher = Publisher(info)
    publisher.start()

    # (a) the command line, in a subprocess
    cli_log = folder / "cli.csv"
    proc = start_cli("live", "--name", name, "--timeout", "20", "--display", "none",
                     "--duration", RUN_S, "--log", cli_log, "--publish", cwd=folder)
    # The command line publishes one stream per stream its engine emits (here heart
    # rate and breathing rate from the PPG), named after its input.
    streams = RateMonitor([("PLETH", "ppg")], FS, PROFILE).streams
    assert ("hr", "PLETH") in streams
    cli_estimates = Collector("name", f"ridgewatch {name} hr.PLETH")
    cli_estimates.start()

    # (b) the Python API, in this process
    api_log = folder / "api.csv"
    api = {}
    api_name = unique("rw-e2e-estimates")
    api_estimates = Collector("name", f"{api_name} hr.PLETH")
    api_estimates.start()

    def run_api():
        try:
            source = LslSource(name=name, timeout_s=20.0)
            selected = select(source.info, None)
            log = EstimateLog(api_log, "live", name, {s.name: s.kind for s in selected},
                              {"profile": PROFILE.to_dict(), "fs": source.info.fs})
            runner = Runner(source, selected, PROFILE, log=log, duration_s=RUN_S)
            runner.outlet = EstimateOutlet(runner.monitor.streams, PROFILE.hr.hop_s,
                                           name=api_name,
                                           source_id=unique("rw-e2e-api-estimates"))
            api_estimates.opened.wait(20.0)
            api["stats"] = runner.run()
        except BaseException as exc:  # reported by the tests
            api["error"] = exc

    api_thread = threading.Thread(target=run_api, daemon=True)
    api_thread.start()
    try:
        out, err = proc.communicate(timeout=HANG_S)
        api_thread.join(HANG_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            out, err = proc.communicate()
        publisher.stop.set()
        publisher.join(10.0)
        for collector in (cli_estimates, api_estimates):
            collector.stop.set()
            collector.join(30.0)
    return {"name": name, "offset_s": publisher.outlet.offset_s, "folder": folder,
            "cli": (proc.returncode, out, err, cli_log, cli_estimates),
            "api": (api, api_log, api_estimates)}


def check_estimates(log_path, collector, offset_s, name, all_published: bool):
    """Log format, published estimates and accuracy of one consumer's run.

    ``all_published``: the test inlet subscribed before the first estimate was pushed.
    Otherwise it may have missed a leading run: liblsl only delivers samples pushed
    after an inlet subscribed, and the command line subscribes to its input before it
    creates its outlet, so the input queued meanwhile gives a burst of estimates at once.
    """
    table = check_log_format(log_path, "live", name, {"PLETH": "ppg"})
    assert ("hr", "PLETH") in table.pairs()
    cols = table.select("hr", "PLETH").columns
    n = len(cols["time_s"])
    # The run lasted RUN_S of wall time; the first estimate comes 8 s after the first
    # sample, so at least a few seconds of hops follow.
    assert n >= 8

    # Published: the heart-rate stream has one sample per row of the log, stamped with
    # emitted_s (live input: the local LSL clock), carrying what the log says.
    assert collector.labels == channel_labels([("hr", "PLETH")])
    got = np.array(collector.samples, dtype=np.float64).reshape(-1, len(FIELDS))
    stamps = np.array(collector.stamps)
    if all_published:
        assert len(got) == n
    else:  # every estimate from the first one received on, and 2 s of hops at least
        assert 8 <= len(got) <= n
    tail = slice(n - len(got), n)
    # The log keeps 4 decimals of times and fractions, 3 of rates: half a unit in the
    # last place is its round-off.
    np.testing.assert_allclose(stamps, cols["emitted_s"][tail], atol=5e-5)
    np.testing.assert_allclose(got[:, 0], cols["rate_per_min"][tail], atol=5e-4,
                               equal_nan=True)
    np.testing.assert_allclose(got[:, 1], cols["confidence"][tail], atol=5e-5)
    np.testing.assert_allclose(got[:, 2], cols["quality"][tail], atol=5e-5)
    np.testing.assert_allclose(got[:, 3], cols["delay_s"][tail], atol=1.5e-4)
    np.testing.assert_allclose(got[:, 4], cols["rate_now_per_min"][tail], atol=5e-4,
                               equal_nan=True)
    np.testing.assert_allclose(got[:, 5], cols["now_confidence"][tail], atol=5e-5)

    # Accurate at every hop: start-up (the first 8 s window) gives no estimate at all,
    # so the check covers every row. Truth at the window centre, mapped back onto the
    # publisher's time axis.
    truth = truth_bpm(cols["time_s"] - offset_s)
    rate = cols["rate_per_min"]
    assert np.all(np.isfinite(rate))
    assert np.all(ec13_ok(rate, truth)), np.column_stack((rate, truth))
    return table


def test_live_through_the_command_line(live_session):
    code, out, err, log_path, collector = live_session["cli"]
    assert code == 0, err
    assert "Traceback" not in err
    last = err.splitlines()[-1]
    assert last.startswith(f"done (--duration {RUN_S:g} s reached): ")
    assert last.endswith(f"log complete: {log_path}")
    table = check_estimates(log_path, collector, live_session["offset_s"],
                            live_session["name"], all_published=False)
    assert table.header["config"]["mode"] == "live"


def test_live_through_the_python_api(live_session):
    api, log_path, collector = live_session["api"]
    if "error" in api:
        raise api["error"]
    stats = api["stats"]
    assert stats.stopped_by == f"--duration {RUN_S:g} s reached"
    assert [e.kind for e in stats.events] == []  # no loss, gap or irregular timing
    table = check_estimates(log_path, collector, live_session["offset_s"],
                            live_session["name"], all_published=True)
    assert stats.estimates == len(table)
    assert stats.samples >= RUN_S * FS * 0.5
