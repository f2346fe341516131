"""Several LSL streams in one run (:mod:`streamer.sources.lsl_session`), over real LSL on
loopback.

One lab session of our own design (:class:`streamer.simulation.WristRunSession`) is
published by three "devices" for about 40 s: a wrist band's PPG at 125 Hz (this
process), an accelerometer at 50 Hz from a second device (a subprocess whose clock runs
1000 s ahead, in a Linux time namespace, when the machine allows it; see
:mod:`tests.streamer.lsl_devices`) and a text marker stream. Two consumers follow it at
the same time: ``ridgewatch live --name ... --name ... --name ... --profile
exercise-wrist`` in a subprocess, and an :class:`LslSession` in this process. At session
second :data:`KILL_S` the accelerometer's process is killed, so both see one stream lost
while the others run. Nothing asserts on wall-clock time; waits are bounded for hangs only.
"""

from __future__ import annotations

import subprocess
import sys
import threading
import time
import uuid

import numpy as np
import pylsl
import pytest

from streamer.simulation import WristRunSession
from streamer.errors import InputError
from streamer.sinks.estimate_log import read_log
from streamer.sources.base import Chunk, Marker, SourceEvent
from streamer.sources.lsl_session import Criterion, LslSession
from tests.streamer.lsl_devices import clock_shift_prefix, publish, publish_markers
from tests.streamer.test_cli import HANG_S, cli_command, cli_env, run_cli

CLOCK_SHIFT_S = 1000.0
"""How far the accelerometer device's clock runs ahead of ours."""
START_S = 6.0
"""Wall-clock seconds from the fixture's start to session second 0 (the consumers
subscribe meanwhile; samples pushed before a consumer subscribes never reach it)."""
KILL_S = 26.0
"""Session second at which the accelerometer device's process is killed."""
SESSION_END_S = 34.0
"""Session second at which the in-process consumer stops."""
CLI_DURATION_S = 36.0
MARKERS = [
    (10.0, 'stage 2, "fast" start'),
    (12.0, "Pause – café, crème brûlée ✓"),
    (14.0, "it's \"quoted\", twice 'and' once"),
    (16.0, "段階 3 開始 😀"),
]
"""Texts with commas, both quote characters and non-ASCII (a CJK text, an emoji)."""
ALIGNMENT_LIMIT_MS = 4.0
"""Largest accepted misalignment between two merged streams: a tenth of one sample of
the heart-rate analysis grid (25 Hz, 40 ms), where motion references are used. Our own
choice."""
SESSION = WristRunSession()

pytestmark = [pytest.mark.lsl, pytest.mark.slow]


def ec13_ok(rate, truth):
    """Within +-10 % or +-5 bpm, whichever is greater (ANSI/AAMI EC13 heart-rate
    accuracy, cited from memory)."""
    return np.abs(rate - truth) <= np.maximum(0.1 * truth, 5.0)


def unique(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:10]}"


def wait_until_wall(t_s: float, stop: threading.Event | None = None) -> None:
    while time.time() < t_s and not (stop is not None and stop.is_set()):
        time.sleep(min(0.02, max(0.0, t_s - time.time())))


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lab")
    ppg, acc, markers = unique("rw-band-ppg"), unique("rw-arm-acc"), unique("rw-lab-markers")
    epoch = time.time() + START_S
    # Our LSL clock minus the wall clock: a session second on our LSL clock.
    lsl_minus_wall = pylsl.local_clock() - time.time()
    prefix = clock_shift_prefix(CLOCK_SHIFT_S)
    stop = threading.Event()
    device = subprocess.Popen(
        (prefix or []) + [sys.executable, "-m", "tests.streamer.lsl_devices", "--kind", "acc",
                          "--name", acc, "--source-id", unique("dev2"), "--fs", "50",
                          "--epoch", repr(epoch), "--duration", "60"], env=cli_env())
    threads = [
        threading.Thread(target=publish, daemon=True, args=(
            "ppg", ppg, unique("dev1"), 125.0, epoch, 60.0, SESSION, stop)),
        threading.Thread(target=publish_markers, daemon=True, args=(
            markers, unique("dev3"), epoch, MARKERS, stop)),
    ]
    for thread in threads:
        thread.start()
    log_path = folder / "live.csv"
    cli = subprocess.Popen(cli_command(
        "live", "--name", ppg, "--name", acc, "--name", markers, "--profile", "exercise-wrist",
        "--duration", CLI_DURATION_S, "--display", "none", "--log", log_path, "--timeout", 30),
        cwd=folder, env=cli_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    items: list = []
    corrections: list = []
    try:
        session = LslSession([Criterion(name=ppg), Criterion(name=acc), Criterion(name=markers)],
                             timeout_s=30.0)
        # The clock offset LSL measured for the accelerometer device (its inlet is open).
        corrections.append(session.streams[1]._inlet.time_correction(timeout=5.0))

        def consume():
            for item in session.chunks():
                items.append(item)

        reader = threading.Thread(target=consume, daemon=True)
        reader.start()
        wait_until_wall(epoch + KILL_S)
        device.kill()
        wait_until_wall(epoch + SESSION_END_S)
        session.close()
        reader.join(HANG_S)
        out, err = cli.communicate(timeout=HANG_S)
    finally:
        stop.set()
        for proc in (device, cli):
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    yield {"ppg": ppg, "acc": acc, "markers": markers, "epoch_lsl": epoch + lsl_minus_wall,
           "shifted": prefix is not None, "items": items, "corrections": corrections,
           "session": session, "cli": (cli.returncode, out, err), "log": log_path}


def _chunks(items):
    chunks = [i for i in items if isinstance(i, Chunk)]
    return (np.concatenate([c.samples for c in chunks]),
            np.concatenate([c.timestamps for c in chunks]))


def _model_shift_ms(values, model, session_s) -> float:
    """The delay (ms) that best fits ``values`` to the noise-free ``model`` of the session
    (least squares, to 0.01 ms): how far the merged channel sits from the truth."""
    ok = np.isfinite(values)
    values, session_s = values[ok], session_s[ok]
    best = 0.0
    for step in (1e-3, 1e-4, 1e-5):
        deltas = best + np.arange(-30, 31) * step
        sse = [np.sum((values - model(session_s - d)) ** 2) for d in deltas]
        best = float(deltas[int(np.argmin(sse))])
    return 1e3 * best


# -- the command line ------------------------------------------------------------------


def test_cli_follows_the_heart_rate_while_the_arm_swings_harder(lab):
    code, out, err = lab["cli"]
    assert code == 0, err
    table = read_log(lab["log"]).select("hr", "PPG")
    emitted = table.columns["emitted_s"] - lab["epoch_lsl"]
    rate = table.columns["rate_per_min"]
    before = (emitted < KILL_S) & np.isfinite(rate)
    assert before.sum() >= 40  # about 18 s of hops at 0.25 s, less start-up
    truth = SESSION.hr_bpm(table.columns["time_s"][before] - lab["epoch_lsl"])
    assert np.all(ec13_ok(rate[before], truth))
    header = read_log(lab["log"]).header
    assert header["channels"] == {"PPG": "ppg", "X": "acc", "Y": "acc", "Z": "acc"}


def test_cli_writes_every_marker_to_the_log(lab):
    markers = read_log(lab["log"]).markers
    assert [(m.text, m.source) for m in markers] == [(t, lab["markers"]) for _, t in MARKERS]
    at = np.array([m.time_s for m in markers]) - lab["epoch_lsl"]
    # The log keeps 4 decimals: 0.05 ms of rounding, well inside 2 ms.
    assert np.allclose(at, [s for s, _ in MARKERS], atol=2e-3)


def test_cli_carries_on_when_the_accelerometer_is_lost(lab):
    text = lab["log"].read_text(encoding="utf-8")
    message = (f"lost: stream '{lab['acc']}' lost; continuing without it (its channels read "
               f"NaN) and waiting for it to come back")
    assert any(line.startswith("# event ") and line.endswith(message)
               for line in text.splitlines())
    table = read_log(lab["log"]).select("hr", "PPG")
    after = table.columns["emitted_s"] - lab["epoch_lsl"] > KILL_S + 1.0
    assert after.sum() >= 10  # estimates go on (no restart: windows run on)
    assert np.isfinite(table.columns["rate_per_min"][after]).all()


def test_cli_names_a_missing_stream_in_one_line(tmp_path):
    present, missing = unique("rw-present"), unique("rw-absent")
    outlet = pylsl.StreamOutlet(pylsl.StreamInfo(present, "PPG", 1, 125.0,
                                                 pylsl.cf_double64, unique("dev")))
    try:
        result = run_cli("live", "--name", present, "--name", missing, "--timeout", "0.5",
                         "--display", "none", "--no-log", cwd=tmp_path)
    finally:
        del outlet
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1
    assert lines[0].startswith(f"ridgewatch: error: no LSL stream matches name='{missing}' "
                               f"within 0.5 s; streams seen: ")
    assert f"'{present}' (type 'PPG', source_id '" in lines[0]
    assert lines[0].endswith("; pick one with --name/--type/--source-id")


# -- the source ------------------------------------------------------------------------


def test_session_maps_an_offset_sender_clock_onto_ours(lab):
    if not lab["shifted"]:
        pytest.skip("this machine allows no time namespace (unshare --time), so no sender "
                    "with a different clock can be made here")
    # LSL measured the device's clock 1000 s ahead of ours (within a second: the offset
    # is exact by construction, the tolerance only covers the measurement).
    assert lab["corrections"] and abs(lab["corrections"][0] + CLOCK_SHIFT_S) < 1.0
    samples, times = _chunks(lab["items"])
    session_s = times - lab["epoch_lsl"]
    both = (session_s > 1.0) & (session_s < KILL_S - 1.0)
    ppg_ms = _model_shift_ms(samples[both, 0], lambda s: SESSION.ppg(s, noise=0.0),
                             session_s[both])
    acc_ms = _model_shift_ms(samples[both, 1], lambda s: SESSION.acc(s, noise=0.0)[:, 0],
                             session_s[both])
    print(f"\nmerged PPG {ppg_ms:+.2f} ms, accelerometer {acc_ms:+.2f} ms from the truth; "
          f"alignment error {acc_ms - ppg_ms:+.2f} ms")
    assert abs(acc_ms - ppg_ms) <= ALIGNMENT_LIMIT_MS
    assert abs(acc_ms) <= ALIGNMENT_LIMIT_MS


def test_session_gives_every_marker_unchanged(lab):
    markers = [i for i in lab["items"] if isinstance(i, Marker)]
    assert [(m.text, m.source) for m in markers] == [(t, lab["markers"]) for _, t in MARKERS]
    at = np.array([m.time_s for m in markers]) - lab["epoch_lsl"]
    assert np.allclose(at, [s for s, _ in MARKERS], atol=2e-3)


def test_session_reports_the_lost_stream_and_runs_on(lab):
    items = lab["items"]
    lost = [i for i in items if isinstance(i, SourceEvent) and i.kind == "lost"]
    assert [e.detail["stream"] for e in lost] == [lab["acc"]]
    assert lost[0].detail["others_running"] is True  # the displays keep the session on
    assert lost[0].message == (f"stream '{lab['acc']}' lost; continuing without it (its "
                               f"channels read NaN) and waiting for it to come back")
    after = items[items.index(lost[0]) + 1:]
    samples, times = _chunks(after)
    assert times[-1] - lab["epoch_lsl"] > SESSION_END_S - 2.0  # the merge went on
    settled = times - lab["epoch_lsl"] > KILL_S + 0.5
    assert np.isnan(samples[settled, 1:]).all()
    assert np.isfinite(samples[settled, 0]).all()
    assert np.all(np.diff(times) > 0)


def test_a_stream_that_never_sends_does_not_hold_the_others_back():
    ppg, silent = unique("rw-ppg"), unique("rw-silent-acc")
    stop = threading.Event()
    epoch = time.time() + 1.5
    outlet = pylsl.StreamOutlet(pylsl.StreamInfo(silent, "Accelerometer", 1, 50.0,
                                                 pylsl.cf_double64, unique("dev")))
    sender = threading.Thread(target=publish, daemon=True, args=(
        "ppg", ppg, unique("dev"), 125.0, epoch, 30.0, SESSION, stop))
    sender.start()
    items = []
    try:
        with LslSession([Criterion(name=ppg), Criterion(name=silent)], timeout_s=10.0,
                        lost_after_s=1.0) as session:
            for item in session.chunks():
                items.append(item)
                chunks = [i for i in items if isinstance(i, Chunk)]
                if sum(len(c) for c in chunks) >= 125 or len(items) > 10_000:
                    break
    finally:
        stop.set()
        del outlet
    events = [i for i in items if isinstance(i, SourceEvent)]
    assert [e.message for e in events] == [
        f"stream '{silent}' has sent no samples for 1 s; continuing with the other streams "
        f"without it"]
    samples, _ = _chunks(items)
    assert len(samples) >= 125
    assert np.isfinite(samples[:, 0]).all() and np.isnan(samples[:, 1]).all()


def test_a_lost_marker_stream_is_reported_and_estimation_goes_on():
    ppg, markers = unique("rw-ppg"), unique("rw-markers")
    stop = threading.Event()
    epoch = time.time() + 1.5
    outlet = pylsl.StreamOutlet(pylsl.StreamInfo(markers, "Markers", 1, pylsl.IRREGULAR_RATE,
                                                 pylsl.cf_string, unique("dev")))
    sender = threading.Thread(target=publish, daemon=True, args=(
        "ppg", ppg, unique("dev"), 125.0, epoch, 30.0, SESSION, stop))
    sender.start()
    items = []
    try:
        with LslSession([Criterion(name=ppg), Criterion(name=markers)],
                        timeout_s=10.0) as session:
            for item in session.chunks():
                items.append(item)
                if outlet is not None and sum(isinstance(i, Chunk) for i in items) >= 5:
                    outlet.push_sample(["before, \"the\" loss"])
                    time.sleep(0.2)
                    outlet = None  # the outlet is destroyed: its connections close
                lost = [i for i in items if isinstance(i, SourceEvent)]
                if lost and sum(isinstance(i, Chunk) for i in items[items.index(lost[0]):]) > 5:
                    break
    finally:
        stop.set()
    assert [i.text for i in items if isinstance(i, Marker)] == ['before, "the" loss']
    events = [i for i in items if isinstance(i, SourceEvent)]
    assert [(e.kind, e.message) for e in events] == [
        ("lost", f"marker stream '{markers}' lost; waiting for it to come back")]
    assert events[0].detail == {"stream": markers, "others_running": True}


def test_errors_name_every_missing_stream_and_a_markers_only_session():
    a, b = unique("rw-absent-a"), unique("rw-absent-b")
    with pytest.raises(InputError, match=rf"^no LSL stream matches name='{a}' nor "
                                         rf"name='{b}' within 0.3 s"):
        LslSession([Criterion(name=a), Criterion(name=b)], timeout_s=0.3)
    markers, device = unique("rw-markers-only"), unique("dev")
    outlet = pylsl.StreamOutlet(pylsl.StreamInfo(markers, "Markers", 1, pylsl.IRREGULAR_RATE,
                                                 pylsl.cf_string, device))
    try:
        with pytest.raises(InputError, match=rf"^the LSL streams found \('{markers}' \(type "
                                             rf"'Markers', source_id '{device}', 1 ch, irregular "
                                             rf"rate\)\) all carry markers; add a stream of "
                                             rf"samples \(PPG, ECG, respiration\) with "
                                             rf"--name/--type/--source-id$"):
            # Both options find the one marker stream, which is read once.
            LslSession([Criterion(name=markers), Criterion(source_id=device)], timeout_s=5.0)
    finally:
        del outlet
