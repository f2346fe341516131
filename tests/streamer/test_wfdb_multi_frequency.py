"""A multi-frequency, FLAC-compressed WFDB record through the command line.

The record is synthetic (the cycling-trial generator of :mod:`streamer.simulation` at a
steady 72 bpm) and written by the wfdb package's own writer into ``tmp_path``: an ECG at
250 Hz (2 samples per frame) and a pleth at 125 Hz (1 sample per frame), frames at
125 Hz, format 516 (16-bit FLAC), one signal file per signal (a FLAC signal file holds
signals of one rate only).
"""

from __future__ import annotations

import numpy as np
import pytest

from streamer.simulation import cycling_trial
from streamer.sources.files import read_recording
from tests.streamer.test_cli import check_log_format, run_cli
from tests.streamer.test_files import write_multi_frequency

HEART_BPM = 72.0
DURATION_S = 40.0
ECG_FS, PLETH_FS = 250.0, 125.0
GAIN = 1000.0  # adu per unit: 16-bit samples resolve 1 mV / 1000 (quantisation 0.5e-3)


def synthetic_signals():
    """ECG at 250 Hz and pleth at 125 Hz of one synthetic session (the pleth is the
    generator's 250 Hz wave taken at every second sample), as digital samples."""
    steady = ((0.0, HEART_BPM, 12.0, 0.0), (DURATION_S, HEART_BPM, 12.0, 0.0))
    trial = cycling_trial(fs=ECG_FS, duration_s=DURATION_S, seed=3, schedule=steady)
    ecg = np.rint(trial.samples[:, trial.names.index("ECG")] * GAIN).astype(np.int64)
    pleth = np.rint(trial.samples[::2, trial.names.index("PPG")] * GAIN).astype(np.int64)
    return ecg, pleth, trial


@pytest.fixture
def flac_record(tmp_path):
    pytest.importorskip("wfdb")
    ecg, pleth, trial = synthetic_signals()
    path = write_multi_frequency(tmp_path, "ward", [ecg, pleth], [2, 1], "516", PLETH_FS,
                                 ["ECG", "PLETH"], [GAIN, GAIN])
    return path, ecg, pleth, trial


def test_flac_record_equals_the_same_record_in_format_16(flac_record, tmp_path):
    path, ecg, pleth, _ = flac_record
    plain = write_multi_frequency(tmp_path, "ward16", [ecg, pleth], [2, 1], "16", PLETH_FS,
                                  ["ECG", "PLETH"], [GAIN, GAIN], one_file=True)
    flac_rec, plain_rec = read_recording(path), read_recording(plain)
    assert "516" in path.read_text() and "516" not in plain.read_text()
    assert flac_rec.info.fs == plain_rec.info.fs == ECG_FS
    # Lossless: the same samples exactly, and those are the written ones (the digital
    # values divided by the gain, i.e. the signal up to the ADC quantisation).
    np.testing.assert_array_equal(flac_rec.samples, plain_rec.samples)
    np.testing.assert_array_equal(flac_rec.timestamps, plain_rec.timestamps)
    np.testing.assert_array_equal(flac_rec.samples[:, 0], ecg / GAIN)
    np.testing.assert_array_equal(flac_rec.samples[::2, 1], pleth / GAIN)


def test_replay_multi_frequency_flac_record_gives_agreeing_heart_rates(flac_record, tmp_path):
    path, _, _, trial = flac_record
    log = tmp_path / "ward.csv"
    done = run_cli("replay", path, "--channel", "ECG=ecg", "--channel", "PLETH=ppg",
                   "--speed", "max", "--display", "none", "--log", log, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert ("ward.hea: resampled PLETH (125 Hz) to 250 Hz by linear interpolation"
            in done.stderr)
    table = check_log_format(log, "replay", str(path), {"ECG": "ecg", "PLETH": "ppg"})
    assert table.header["config"]["fs"] == ECG_FS

    def heart_rate(source):
        cols = table.select(quantity="hr", source=source).columns
        return cols["time_s"], cols["rate_per_min"], cols["emitted_s"]

    t_ecg, hr_ecg, emitted_ecg = heart_rate("ECG")
    t_pleth, hr_pleth, emitted_pleth = heart_rate("PLETH")
    # one grid, one hop schedule (time_s differs by each chain's group delay)
    np.testing.assert_array_equal(emitted_ecg, emitted_pleth)
    assert len(t_ecg) >= (DURATION_S - 10.0) / 0.25  # every hop after start-up
    ok = np.isfinite(hr_ecg) & np.isfinite(hr_pleth)
    assert ok.mean() >= 0.95
    # Tolerance: +-10 % or +-5 bpm, whichever is greater (ANSI/AAMI EC13 for heart-rate
    # meters, cited from memory); the truth is the generator's instantaneous rate (72 bpm
    # with +-2 bpm of respiratory sinus arrhythmia) at each estimate's time.
    truth = np.interp(t_ecg[ok], trial.timestamps, trial.hr_bpm)
    tolerance = np.maximum(5.0, 0.1 * truth)
    assert np.all(np.abs(hr_ecg[ok] - truth) <= tolerance)
    assert np.all(np.abs(hr_pleth[ok] - truth) <= tolerance)
    assert np.all(np.abs(hr_ecg[ok] - hr_pleth[ok]) <= tolerance)
