"""Sessions of several devices in one file: XDF files with several numeric streams at
their own rates and clocks plus marker streams, EDF+ files with signals at different
rates and annotations; ``--stream`` on the command line; the exercise profile fed by an
accelerometer that arrives as its own stream.

Every XDF file is written here byte by byte (tests/xdf_writer.py), every EDF+ by
pyedflib, so the truth (times, clock offsets, texts) is known exactly.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pytest

from estimators.config import get_profile
from streamer import cli
from streamer.errors import InputError
from streamer.sources.base import Marker
from streamer.sources.files import read_recording
from tests.xdf_writer import Stream, write_streams

pytest.importorskip("pyxdf")

PPG_FS, ACC_FS = 125.0, 50.0
T0 = 4000.0
"""Start of the session on the recording computer's clock (LSL clocks count seconds
since boot; any value will do)."""

MARKER_TEXTS = ('stage 2 start, "fast"', "Übung ½ — Schritt; 'links'", "a,b,,c\t\"", "🏃 end")


def bump(t: np.ndarray, centre_s: float, half_width_s: float = 0.4) -> np.ndarray:
    """A triangle of height 1 at ``centre_s``: linear flanks, which linear
    interpolation reproduces exactly, so its half-height crossing is a sharp marker of
    where a stream's samples were put in time."""
    return np.clip(1.0 - np.abs(t - centre_s) / half_width_s, 0.0, None)


def half_rise(t: np.ndarray, x: np.ndarray, after_s: float) -> float:
    """Time where ``x`` first reaches 0.5 after ``after_s`` (linear between samples)."""
    k = int(np.argmax((t > after_s) & (x >= 0.5)))
    return float(t[k - 1] + (0.5 - x[k - 1]) / (x[k] - x[k - 1]) * (t[k] - t[k - 1]))


def two_device_file(path: Path, events_s=(8.0, 15.0), acc_offset_s=7.3,
                    acc_drift=1e-4, ppg_offset_s=0.5, marker_offset_s=-2.0,
                    duration_s=20.0) -> Path:
    """A wrist band's PPG (125 Hz), its accelerometer as a second device (50 Hz, three
    axes) and a marker stream, each on its own clock.

    True time (the recording computer's clock) is ``T0 + s``. Every device's stamps are
    its own clock: true time minus its offset. The accelerometer's clock is
    ``acc_offset_s`` behind and runs slow by ``acc_drift`` (100 ppm: offset grows
    0.1 ms per second); its ClockOffset chunks say so. A bump at each of ``events_s``
    is in the PPG and in every accelerometer axis; the markers sit at the same times.
    """
    t_ppg = T0 + np.arange(int(duration_s * PPG_FS)) / PPG_FS
    ppg = sum(bump(t_ppg, T0 + e) for e in events_s)[:, None]

    # Accelerometer: regular on its own clock c; true time = c + offset(c), with
    # offset(c) = acc_offset_s + acc_drift * (c - c0) (a line, as pyxdf fits it).
    c0 = T0 - acc_offset_s
    c = c0 + np.arange(int(duration_s * ACC_FS)) / ACC_FS

    def acc_offset(clock):
        return acc_offset_s + acc_drift * (clock - c0)

    t_acc = c + acc_offset(c)
    acc = np.column_stack([sum(bump(t_acc, T0 + e) for e in events_s) * gain
                           for gain in (1.0, 0.8, 1.2)])
    offsets_at = c0 + np.arange(0.0, duration_s, 2.0)

    marker_times = [T0 + events_s[0], T0 + events_s[0] + 0.004, T0 + events_s[1],
                    T0 + duration_s - 1.0]
    streams = [
        Stream("wristband-ppg", "PPG", "float32", PPG_FS, [("PPG", "PPG", "a.u.")],
               t_ppg - ppg_offset_s, ppg,
               [(T0 - ppg_offset_s + s, ppg_offset_s) for s in np.arange(0.0, duration_s, 5.0)]),
        Stream("wristband-acc", "ACC", "float32", ACC_FS,
               [("X", "ACC", "g"), ("Y", "ACC", "g"), ("Z", "ACC", "g")], c, acc,
               [(when, acc_offset(when)) for when in offsets_at]),
        Stream("lab-events", "Markers", "string", 0.0, [("event", "Marker", "")],
               np.array(marker_times) - marker_offset_s, [[text] for text in MARKER_TEXTS],
               [(T0 - marker_offset_s + s, marker_offset_s)
                for s in np.arange(0.0, duration_s, 5.0)]),
    ]
    return write_streams(path, streams)


# ---------------------------------------------------------------------------- XDF


def test_streams_on_their_own_clocks_line_up_after_the_clock_offsets(tmp_path, caplog):
    path = two_device_file(tmp_path / "session.xdf")
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(path)
    assert caplog.records == []
    assert rec.info.channel_names == ["PPG", "X", "Y", "Z"]
    assert [c.kind for c in rec.info.channels] == ["ppg", "acc", "acc", "acc"]
    assert rec.info.fs == PPG_FS
    # The grid is the PPG's (the fastest), on the recording computer's clock.
    np.testing.assert_allclose(rec.timestamps[:3], T0 + np.arange(3) / PPG_FS, atol=1e-9)
    sample_s = 1.0 / PPG_FS
    for event in (8.0, 15.0):  # the second one after 7 s of drift (0.7 ms)
        t_ppg = half_rise(rec.timestamps, rec.samples[:, 0], T0 + event - 1.0)
        assert t_ppg == pytest.approx(T0 + event - 0.2, abs=1e-6)  # exact on its own grid
        for axis, gain in zip((1, 2, 3), (1.0, 0.8, 1.2)):
            t_acc = half_rise(rec.timestamps, rec.samples[:, axis] / gain, T0 + event - 1.0)
            assert abs(t_acc - t_ppg) < sample_s, (event, axis, t_acc - t_ppg)
    # Without the correction the accelerometer's bumps would be 7.3 s early: the check
    # above can fail. Read with pyxdf's own reader and no synchronisation to be sure
    # the file says so.
    import pyxdf
    raw, _ = pyxdf.load_xdf(str(path), synchronize_clocks=False, dejitter_timestamps=False)
    acc = next(s for s in raw if s["info"]["name"][0] == "wristband-acc")
    first = acc["time_stamps"][np.argmax(acc["time_series"][:, 0] >= 0.5)]
    assert first == pytest.approx(T0 + 8.0 - 0.2 - 7.3, abs=0.03)


def test_marker_texts_come_through_unchanged_on_the_file_clock(tmp_path):
    rec = read_recording(two_device_file(tmp_path / "session.xdf"))
    assert [m.text for m in rec.markers] == list(MARKER_TEXTS)
    assert {m.source for m in rec.markers} == {"lab-events"}
    np.testing.assert_allclose([m.time_s for m in rec.markers],
                               [T0 + 8.0, T0 + 8.004, T0 + 15.0, T0 + 19.0], rtol=0, atol=1e-6)
    # Choosing numeric streams does not drop the markers.
    only_ppg = read_recording(tmp_path / "session.xdf", stream="wristband-ppg")
    assert only_ppg.info.channel_names == ["PPG"] and only_ppg.markers == rec.markers
    # Nor does choosing channels.
    assert read_recording(tmp_path / "session.xdf", channels="Z,PPG").markers == rec.markers


def test_multichannel_marker_streams_irregular_and_empty_numeric_streams(tmp_path, caplog):
    stamps = T0 + np.arange(500) / 100.0
    streams = [
        Stream("band", "PPG", "double64", 100.0, [("PPG", "PPG", "")], stamps,
               np.sin(stamps)[:, None]),
        # Event codes sent as numbers at no fixed rate: left out unless named.
        Stream("codes", "Markers", "int32", 0.0, [("code", "", "")],
               T0 + np.array([0.5, 0.51, 3.0]), np.array([[1], [2], [3]])),
        Stream("never-sent", "ACC", "float32", 50.0, [("X", "ACC", "g")], np.zeros(0),
               np.zeros((0, 1))),
        Stream("notes", "Markers", "string", 0.0, [("who", "", ""), ("what", "", "")],
               T0 + np.array([1.0, 2.0, 2.0]),
               [["anna", "sits down"], ["", "stands, up"], ["  ", ""]]),
    ]
    path = write_streams(tmp_path / "s.xdf", streams)
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(path)
    assert rec.info.channel_names == ["PPG"]
    lines = [r.getMessage() for r in caplog.records]
    assert lines == [f"{path}: stream 'never-sent' has no samples; left out",
                     f"{path}: stream 'codes' has no nominal rate (irregular samples); left "
                     "out, name it with --stream to read it"]
    # One marker per non-blank value; a stream of several channels names the channel.
    assert rec.markers == (Marker(T0 + 1.0, "anna", "notes/who"),
                           Marker(T0 + 1.0, "sits down", "notes/what"),
                           Marker(T0 + 2.0, "stands, up", "notes/what"))
    both = read_recording(path, stream=["band", "codes"])
    assert both.info.channel_names == ["PPG", "code"]
    assert both.info.fs == 100.0  # the regular stream's grid, not the codes' median step
    with pytest.raises(InputError, match=rf"^{path}: stream 'never-sent' holds no numeric "
                                         r"samples \(no samples\); --stream chooses among "
                                         r"the numeric streams: band \(type PPG"):
        read_recording(path, stream="never-sent")


def test_stream_option_is_for_xdf_files_only(tmp_path):
    path = tmp_path / "r.csv"
    path.write_text("time,PPG\n0,1\n0.01,2\n0.02,3\n")
    with pytest.raises(InputError, match=rf"^{path}: --stream applies to XDF files only; this "
                                         r"file has one set of channels \(choose them with "
                                         r"--channel\)$"):
        read_recording(path, stream="PPG")


# ---------------------------------------------------------------------------- EDF+


def test_edf_plus_two_rates_and_annotations(tmp_path, caplog):
    pyedflib = pytest.importorskip("pyedflib")
    from pyedflib import highlevel

    # EDF physical values are linear in the digital ones (EDF specification, from
    # memory): with physical range [-1, 1] over digital [-32768, 32767] a digital value
    # d reads back as (2 d + 1) / 65535.
    seconds = 10
    k_fast, k_slow = np.arange(256 * seconds), np.arange(32 * seconds)
    fast = (k_fast % 200 - 100) * 100
    slow = (k_slow % 20 - 10) * 1000
    headers = [highlevel.make_signal_header(label, dimension="a.u.", sample_frequency=rate,
                                            physical_min=-1.0, physical_max=1.0,
                                            digital_min=-32768, digital_max=32767)
               for label, rate in (("PPG", 256), ("ACC X", 32))]
    header = highlevel.make_header()
    header["annotations"] = [[1.5, -1, 'stage 2 start, "fast"'], [3.25, 2.0, "Übung ½ — 🏃"],
                             [4.0, 1.0, ""], [5.0, -1, "   "], [0.75, -1, "a;b,c"]]
    path = tmp_path / "r.edf"
    highlevel.write_edf(str(path), [fast.astype(np.int32), slow.astype(np.int32)], headers,
                        header, digital=True)
    assert pyedflib.EdfReader(str(path)).filetype == pyedflib.FILETYPE_EDFPLUS

    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        rec = read_recording(path)
    assert [r.getMessage() for r in caplog.records] == [
        f"{path}: resampled ACC X (32 Hz) to 256 Hz by linear interpolation; select channels "
        "of one rate to avoid it"]
    assert rec.info.fs == 256.0 and rec.info.channel_names == ["PPG", "ACC X"]
    physical_fast = (2 * fast + 1) / 65535
    physical_slow = (2 * slow + 1) / 65535
    np.testing.assert_allclose(rec.samples[:, 0], physical_fast, rtol=0, atol=1e-12)
    grid = np.arange(256 * seconds) / 256.0
    np.testing.assert_array_equal(rec.timestamps, grid)
    inside = grid <= k_slow[-1] / 32.0
    np.testing.assert_allclose(rec.samples[inside, 1],
                               np.interp(grid[inside], k_slow / 32.0, physical_slow),
                               rtol=0, atol=1e-12)
    assert np.isnan(rec.samples[~inside, 1]).all()
    # Annotations in time order, text unchanged; empty and blank ones (a bare duration)
    # are skipped.
    assert rec.markers == (Marker(0.75, "a;b,c", "annotations"),
                           Marker(1.5, 'stage 2 start, "fast"', "annotations"),
                           Marker(3.25, "Übung ½ — 🏃", "annotations"))
    # One channel: no resampling, no warning, the annotations still there.
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        slow_only = read_recording(path, channels=["ACC X"])
    assert caplog.records == [] and slow_only.info.fs == 32.0
    assert slow_only.markers == rec.markers


def test_unreadable_edf_annotations_leave_the_signals(caplog):
    """pyedflib reads the signals and the annotations separately; should the second
    fail, the signals are still read, with a warning."""
    from streamer.sources.files import _edf_markers

    class Reader:
        def readAnnotations(self):
            raise ValueError("could not convert string to float: 'x'")

    with caplog.at_level(logging.WARNING, logger="ridgewatch"):
        assert _edf_markers(Reader(), "r.edf") == ()
    assert [r.getMessage() for r in caplog.records] == [
        "r.edf: EDF+ annotations could not be read (could not convert string to float: 'x'); "
        "reading the signals without them"]


# ---------------------------------------------------------------------------- command line


def test_replay_and_offline_stream_option(tmp_path, capsys):
    path = two_device_file(tmp_path / "session.xdf")
    code = cli.main(["replay", str(path), "--stream", "wristband", "--display", "none", "-q",
                     "--no-log"])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"ridgewatch: error: {path}: no stream named 'wristband'; streams are: "
                   "wristband-ppg (type PPG, 1 x float32, 2500 samples); wristband-acc (type "
                   "ACC, 3 x float32, 1000 samples); lab-events (type Markers, 1 x string, 4 "
                   "samples)"]
    code = cli.main(["offline", str(path), "--stream", "lab-events", "--log",
                     str(tmp_path / "o.csv"), "-q"])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith(
        f"ridgewatch: error: {path}: stream 'lab-events' holds no numeric samples (text "
        "markers, which are always read); --stream chooses among the numeric streams: ")
    assert not (tmp_path / "o.csv").exists()


# ------------------------------------------------- the exercise profile, two devices

RUN_S = 60.0
WARM_UP_S = 20.0
"""As in tests/estimators/test_motion.py: the motion canceller needs about 2.5 windows
of its references' statistics before its gate opens, so the first 20 s of a session
that starts mid-run are not counted."""


def heart_rate_per_min(t):
    return 120.0 + t / 3.0


def running_session(rng, times_ppg, times_acc):
    """A wrist PPG during running whose arm-swing artifact is three times the pulse
    (cadence 150 steps/min, a non-sinusoidal motion with harmonics 2 and 3), and the
    three accelerometer axes that see the swing, sampled at their own times (seconds
    from the start). Phases are closed-form integrals of the rates, so a stream can be
    sampled at any times. Returns (ppg (n,), acc (m, 3))."""
    def pulse(t):
        phi = 2 * np.pi * (120.0 * t + t ** 2 / 6.0) / 60.0  # integral of heart_rate_per_min
        return np.sin(phi) + 0.5 * np.sin(2 * phi + 0.8)

    def axes(t):
        psi = 2 * np.pi * 150.0 / 60.0 * t
        return np.column_stack([
            np.sin(psi) + 0.6 * np.sin(2 * psi + 0.3) + 0.3 * np.sin(3 * psi + 1.0),
            np.sin(psi + 0.5) + 0.2 * np.sin(2 * psi + 2.0) + 0.4 * np.sin(3 * psi),
            0.3 * np.sin(psi + 1.2)])

    swing = axes(times_ppg)
    delayed = axes(times_ppg - 0.04)  # the skin sees one axis a little later
    ppg = pulse(times_ppg) + 3.0 * (0.7 * swing[:, 0] + 0.5 * delayed[:, 1]) \
        + 0.2 * rng.standard_normal(len(times_ppg))
    acc = axes(times_acc) + 0.05 * rng.standard_normal((len(times_acc), 3))
    return ppg, acc


def replay_heart_rate(path: Path, log: Path, *extra: str):
    code = cli.main(["replay", str(path), "--profile", "exercise-wrist", "--display", "none",
                     "-q", "--log", str(log), *extra])
    assert code == 0
    from streamer.sinks.estimate_log import read_log
    table = read_log(log).select("hr", "PPG")
    return table.columns["time_s"], table.columns["rate_per_min"], table.columns["emitted_s"]


def test_exercise_profile_uses_an_accelerometer_from_its_own_stream(tmp_path):
    """The same running session as one XDF stream (PPG and accelerometer at 125 Hz) and
    as two devices (PPG at 125 Hz; accelerometer at 50 Hz on a clock 7.3 s behind): the
    heart rates agree, both follow the truth, and without the accelerometer stream the
    arm swing wins (so the engine did use the second stream)."""
    rng = np.random.default_rng(20261203)
    t_ppg = np.arange(int(RUN_S * PPG_FS)) / PPG_FS
    t_acc = np.arange(int(RUN_S * ACC_FS)) / ACC_FS
    ppg, acc_fast = running_session(rng, t_ppg, t_ppg)
    _, acc_slow = running_session(rng, t_ppg[:1], t_acc)
    axes = [("X", "ACC", "g"), ("Y", "ACC", "g"), ("Z", "ACC", "g")]
    one = write_streams(tmp_path / "one.xdf", [
        Stream("wristband", "PPG", "float32", PPG_FS, [("PPG", "PPG", "a.u.")] + axes,
               T0 + t_ppg, np.column_stack([ppg, acc_fast]))])
    acc_clock = T0 - 7.3 + t_acc
    two = write_streams(tmp_path / "two.xdf", [
        Stream("wristband-ppg", "PPG", "float32", PPG_FS, [("PPG", "PPG", "a.u.")],
               T0 + t_ppg, ppg[:, None]),
        Stream("wristband-acc", "ACC", "float32", ACC_FS, axes, acc_clock, acc_slow,
               [(when, 7.3) for when in acc_clock[::250]])])

    time_one, rate_one, emitted_one = replay_heart_rate(one, tmp_path / "one.csv")
    time_two, rate_two, emitted_two = replay_heart_rate(two, tmp_path / "two.csv")
    time_ppg, rate_ppg, _ = replay_heart_rate(two, tmp_path / "ppg.csv", "--stream",
                                              "wristband-ppg")
    # the same hops (time_s also holds the filters' delay at each run's own rate)
    np.testing.assert_allclose(emitted_two, emitted_one, rtol=0, atol=1e-6)
    counted = time_two - T0 > WARM_UP_S
    assert counted.sum() > 100
    # The accelerometer reaches the engine sampled at 50 Hz with its own noise and
    # interpolated onto the PPG's grid, so the two runs differ in the references'
    # details only: their rates may differ by a spectral bin (the profile's grid step,
    # 0.75 /min; up to two where the peak's interpolation tips over), and on most hops by
    # far less.
    step = get_profile("exercise-wrist").hr.grid_step_per_min
    difference = np.abs(rate_two - rate_one)[counted]
    assert difference.max() <= 2 * step and np.median(difference) <= step / 2
    # Both follow the truth within 5 /min (the trade's usual tolerance for heart rate),
    within = {name: (np.abs(rate - heart_rate_per_min(time - T0)) < 5.0)[time - T0 > WARM_UP_S]
              for name, time, rate in (("one", time_one, rate_one), ("two", time_two, rate_two),
                                       ("ppg only", time_ppg, rate_ppg))}
    assert within["one"].mean() >= 0.9 and within["two"].mean() >= 0.9
    # and without the accelerometer stream the three-times-stronger arm swing wins.
    assert within["ppg only"].mean() < 0.5
