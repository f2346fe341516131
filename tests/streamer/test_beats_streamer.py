"""Beats and HRV through the command line, the files, compare, the LSL streams and the
displays (synthetic ECG with known beat times; our own scenario)."""

from __future__ import annotations

import math
import os
import time

import numpy as np
import pytest

from estimators.hrv import FLAGS, HrvRow
from streamer import cli
from streamer.runner import Update
from streamer.sinks.beats_log import (BEAT_COLUMNS, BEATS_MAGIC, HRV_COLUMNS, HRV_MAGIC,
                                      read_beats)
from tests.beat_signals import ecg_from_beats, inject_artifacts, sinus_intervals_ms

FS = 250.0
DURATION_S = 150.0


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    """A CSV recording of ECG (with one missed, extra or ectopic beat per ~minute) and a
    resp channel, and a CSV of the true beat times."""
    rng = np.random.default_rng(11)
    folder = tmp_path_factory.mktemp("beats")
    # The recording starts mid-rhythm (a first beat at 0.3 s), as a real one does:
    # before its first beat the detector has nothing to measure candidates against.
    times = 0.3 + np.cumsum(np.concatenate(([0.0], sinus_intervals_ms(rng, 200)))) / 1e3
    times = times[times < DURATION_S - 1.0]
    injected = inject_artifacts(rng, times, 2, spacing=50)
    ecg, t = ecg_from_beats(injected.times_s, FS, DURATION_S, rng)
    resp = np.sin(2 * np.pi * 0.25 * t)
    path = folder / "session.csv"
    np.savetxt(path, np.column_stack((t, ecg, resp)), delimiter=",", fmt="%.6f",
               header="time,ECG,RESP", comments="")
    truth = folder / "truth.csv"
    np.savetxt(truth, injected.times_s, fmt="%.6f", header="beat_s", comments="")
    return folder, path, truth, injected


def _main(argv, capsys):
    try:
        code = cli.main([str(a) for a in argv])
    except SystemExit as exc:
        code = exc.code
    out = capsys.readouterr()
    return code, out.out, out.err


def _replay(session, tmp_path, capsys, *more):
    _, path, _, _ = session
    return _main(["replay", path, "--channel", "ECG=ecg", "--channel", "RESP=resp",
                  "--display", "none", "--no-log", *more], capsys)


def test_replay_writes_beats_and_hrv_files(session, tmp_path, capsys):
    code, _, err = _replay(session, tmp_path, capsys, "--beats", tmp_path / "b.csv",
                           "--hrv", tmp_path / "h.csv")
    assert code == 0, err
    assert f"beats {tmp_path / 'b.csv'}; HRV {tmp_path / 'h.csv'}" in err
    beats_text = (tmp_path / "b.csv").read_text().splitlines()
    assert beats_text[0] == BEATS_MAGIC
    assert ",".join(BEAT_COLUMNS) in beats_text
    table = read_beats(tmp_path / "b.csv")
    assert set(table.columns["flag"]) <= set(FLAGS)
    assert table.sources() == ["ECG"]  # the resp channel gives no beats
    assert np.all(np.diff(table.columns["time_s"]) > 0)
    hrv_text = (tmp_path / "h.csv").read_text().splitlines()
    assert hrv_text[0] == HRV_MAGIC
    header = hrv_text.index(",".join(HRV_COLUMNS))
    rows = [line.split(",") for line in hrv_text[header + 1:]]
    # Every 5 s of stream time; RMSSD once 20 intervals are in; alpha1 after 64.
    emitted = [float(r[0]) for r in rows]
    # (the last sample is at 150 s - 1 / fs: the row at 150 s is not due yet)
    assert emitted[:2] == [5.0, 10.0] and len(emitted) == int(DURATION_S // 5) - 1
    assert rows[1][3] == "" and rows[-1][3] != "" and rows[-1][8] != ""


def test_compare_scores_the_beats_against_the_truth(session, tmp_path, capsys):
    folder, _, truth, injected = session
    _replay(session, tmp_path, capsys, "--beats", tmp_path / "b.csv")
    code, out, err = _main(["compare", tmp_path / "b.csv", "--against", truth], capsys)
    assert code == 0, err
    line = out.strip().splitlines()[0]
    assert line.startswith(f"beats ECG vs truth.csv: detected {len(injected.times_s)}, "
                           f"reference {len(injected.times_s)}; sensitivity 100.00 % "
                           "positive predictivity 100.00 % (within 150 ms)")
    assert "RMSSD median rel. error" in line and "DFA alpha1 median |diff|" in line


def test_offline_writes_the_same_kind_of_files(session, tmp_path, capsys):
    _, path, truth, injected = session
    code, _, err = _main(["offline", path, "--channel", "ECG=ecg", "--log", tmp_path / "l.csv",
                          "--beats", tmp_path / "b.csv", "--hrv", tmp_path / "h.csv"], capsys)
    assert code == 0, err
    table = read_beats(tmp_path / "b.csv")
    assert table.header["mode"] == "offline"
    # Beyond the first second (see test_hrv: the zero-phase filters' edge) the beats
    # are the drawn ones, to within two samples.
    detected = table.columns["time_s"]
    late, truth_late = detected[detected > 1.0], injected.times_s[injected.times_s > 1.0]
    assert len(late) == len(truth_late)
    assert np.abs(late - truth_late).max() < 2.0 / FS


@pytest.mark.parametrize("args, message", [
    (["--channel", "RESP=resp", "--beats", "{tmp}/b.csv"],
     "ridgewatch: error: --beats needs a PPG or ECG channel; '{path}' gives RESP=resp "
     "(choose one with --channel NAME=ppg or NAME=ecg)"),
    (["--channel", "ECG=ecg", "--hrv", "{tmp}/x.csv", "--beats", "{tmp}/x.csv"],
     "ridgewatch: error: --hrv {tmp}/x.csv is also the --beats file; give each output its "
     "own path"),
    (["--channel", "ECG=ecg", "--beats", "{tmp}/exists.csv"],
     "ridgewatch: error: the beats file {tmp}/exists.csv already exists; give another "
     "--beats path, or add --overwrite to replace an earlier ridgewatch beats file"),
    (["--channel", "ECG=ecg", "--overwrite", "--hrv", "{tmp}/exists.csv"],
     "ridgewatch: error: {tmp}/exists.csv is not a ridgewatch HRV file (its first line is "
     "not '# ridgewatch hrv'); --overwrite only replaces HRV files: give another --hrv path"),
    (["--channel", "ECG=ecg", "--beats", "{path}"],
     "ridgewatch: error: --beats {path} is the input file {path}; the beats file would "
     "destroy it: give another --beats path"),
])
def test_bad_beat_options_give_one_line(session, tmp_path, capsys, args, message):
    _, path, _, _ = session
    (tmp_path / "exists.csv").write_text("keep me\n")
    args = [a.format(tmp=tmp_path, path=path) for a in args]
    code, out, err = _main(["replay", path, "--display", "none", "--no-log", *args], capsys)
    assert code == 2
    assert err.strip().splitlines()[-1] == message.format(tmp=tmp_path, path=path)
    assert (tmp_path / "exists.csv").read_text() == "keep me\n"
    assert not (tmp_path / "b.csv").exists()


def test_low_rate_is_refused_for_beats(tmp_path, capsys):
    t = np.arange(0, 60, 1 / 25.0)
    path = tmp_path / "slow.csv"
    np.savetxt(path, np.column_stack((t, np.sin(t))), delimiter=",", header="time,PPG",
               comments="")
    code, _, err = _main(["replay", path, "--channel", "PPG=ppg", "--display", "none",
                          "--no-log", "--beats", tmp_path / "b.csv"], capsys)
    assert code == 2
    assert err.strip().splitlines()[-1] == (
        f"ridgewatch: error: --beats: '{path}' is sampled at 25 Hz; beats need at least 40 Hz")


def test_compare_of_beats_needs_reference_beat_times(session, tmp_path, capsys):
    _, path, _, _ = session
    _replay(session, tmp_path, capsys, "--beats", tmp_path / "b.csv")
    _main(["replay", path, "--channel", "ECG=ecg", "--display", "none",
           "--log", tmp_path / "l.csv"], capsys)
    code, _, err = _main(["compare", tmp_path / "b.csv", "--against", tmp_path / "l.csv"],
                         capsys)
    assert code == 2
    assert err.strip() == (f"ridgewatch: error: {tmp_path / 'l.csv'} is an estimate log; a "
                           "beats file is compared with reference beat times (WFDB "
                           "annotations or a CSV of times)")
    code, _, err = _main(["compare", tmp_path / "b.csv", "--against", session[2],
                          "--source", "PPG"], capsys)
    assert code == 2
    assert err.strip() == (f"ridgewatch: error: {tmp_path / 'b.csv'} has no beats of "
                           "source 'PPG'; it has ECG")


def test_text_display_lists_hrv():
    from streamer.display.text import TextDisplay
    import io
    stream = io.StringIO()
    text = TextDisplay(stream=stream)
    row = HrvRow(60.0, 59.0, 31.25, 40.0, 800.0, 0.0125, 75, 0.82)
    text.listener(Update([], None, None, hrv=(("ECG", row),)))
    text.drain()
    text.draw(force=True)
    assert ("HRV        ECG        RMSSD 31.2 ms  SDNN 40.0 ms  DFA a1 0.82  corrected 1.2 %  "
            "(research measures, not a diagnosis)") in stream.getvalue()


@pytest.fixture
def qt():
    previous = os.environ.get("QT_QPA_PLATFORM")
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    qw = pytest.importorskip("streamer.display.qt_window")
    qw.application()
    yield qw
    if previous is None:
        os.environ.pop("QT_QPA_PLATFORM", None)
    else:
        os.environ["QT_QPA_PLATFORM"] = previous


@pytest.mark.gui
def test_window_shows_the_hrv_card_and_alpha1_trend(qt, tmp_path):
    import pyqtgraph as pg
    from estimators.config import get_profile
    from estimators.monitor import RateMonitor
    from streamer.display.buffers import DisplayLayout, UpdateFeed
    monitor = RateMonitor([("ECG", "ecg")], FS, get_profile("wrist"))
    feed = UpdateFeed()
    window = qt.MonitorWindow(DisplayLayout.from_monitor(monitor), feed)
    window.add_hrv(["ECG"])
    window.show()
    rows = [HrvRow(5.0 * k, 5.0 * k - 1, 30.0, 40.0, 800.0, 0.0, 70, 1.0 - 0.004 * k)
            for k in range(1, 120)]
    x = np.zeros((int(FS), 1))
    feed.listener(Update([], None, None, hrv=tuple(("ECG", r) for r in rows)))
    feed.listener(Update([], _chunk(x, 595.0 + np.arange(len(x)) / FS), None))
    window.refresh()
    window.draw(force=True)
    qt.application().processEvents()
    try:
        panel = window.extra_views[0]
        card = panel.card.lines["ECG"].text()
        assert "RMSSD <b>30</b> ms" in card and ">0.52<" in card  # 1 - 0.004 * 119
        levels = sorted(item.value() for item in panel.plot.items
                        if isinstance(item, pg.InfiniteLine))
        assert levels == [0.5, 0.75]
        curve = panel.curves["ECG"]
        np.testing.assert_allclose(curve.yData, [r.dfa_alpha1 for r in rows])
        assert window.grab().save(str(tmp_path / "hrv.png"))
    finally:
        window.close()


def _chunk(x, t):
    from streamer.sources.base import Chunk
    return Chunk(x, t)


@pytest.mark.lsl
def test_publish_streams_beats_and_hrv():
    import pylsl
    from estimators.hrv import BeatRow
    from streamer.sinks.beats_outlet import BEAT_FIELDS, BeatOutlet
    name = f"beats-test-{os.getpid()}-{time.monotonic_ns()}"
    outlet = BeatOutlet(["ECG", "PPG"], name=name, input_id=name, use_stream_time=True)
    try:
        found = pylsl.resolve_byprop("name", f"{name} beats", 1, 5.0)
        assert len(found) == 1
        inlet = pylsl.StreamInlet(found[0])
        inlet.open_stream(timeout=5.0)
        info = inlet.info(timeout=5.0)
        assert info.nominal_srate() == pylsl.IRREGULAR_RATE
        assert info.channel_count() == len(BEAT_FIELDS)
        hrv_found = pylsl.resolve_byprop("name", f"{name} hrv", 1, 5.0)
        hrv_inlet = pylsl.StreamInlet(hrv_found[0])
        hrv_inlet.open_stream(timeout=5.0)
        time.sleep(0.5)  # let both inlets connect before the push
        rows = [("PPG", BeatRow(10.0, 800.0, "missed", 400.0, 12.0)),
                ("ECG", BeatRow(10.5, 790.0, "ok", 790.0, 12.5))]
        hrv = [("ECG", HrvRow(15.0, 14.0, 30.0, 40.0, 800.0, 0.0, 70, 0.9))]
        outlet.push(rows, hrv, 15.0)
        got, stamps = [], []
        deadline = time.monotonic() + 5.0  # a hang guard only
        while len(got) < 2 and time.monotonic() < deadline:
            x, t = inlet.pull_chunk(timeout=0.1)
            got += x
            stamps += t
        assert np.array(got).tolist() == [[1.0, 800.0, 400.0, FLAGS.index("missed"), 2.0],
                                          [0.0, 790.0, 790.0, 0.0, 2.0]]
        assert stamps == pytest.approx([10.0, 10.5])
        sample, stamp = hrv_inlet.pull_sample(timeout=5.0)
        assert sample[:5] == [30.0, 40.0, 800.0, 0.0, pytest.approx(0.9)]
        assert all(math.isnan(v) for v in sample[5:])
        assert stamp == pytest.approx(15.0)
    finally:
        outlet.close()
