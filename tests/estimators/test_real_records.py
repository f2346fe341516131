"""The engine on real recordings from ``../shared/data`` with their published references.

Datasets (see each folder's SOURCE.md):

* MIT-BIH Arrhythmia Database record 100 (Moody & Mark, IEEE EMB Mag. 20(3):45-50,
  2001; PhysioNet): ECG lead MLII at 360 Hz; reference = 60 / mean R-R of the
  cardiologist-reviewed beat annotations inside each estimate's window.
* IEEE Signal Processing Cup 2015 training records 01-06 (Zhang, Pi & Liu, IEEE TBME
  62(2):522-531, 2015): wrist PPG at 125 Hz; reference ``BPM0`` = ECG heart rate over
  8 s windows ``[250 k, 250 k + 1000)`` samples, 2 s apart.
* BIDMC PPG and Respiration Dataset records 01-12 (Pimentel et al., IEEE TBME
  64(8):1914-1923, 2017): fingertip PPG at 125 Hz; no beat annotations, so the
  reference is 60 / mean R-R of R-peaks we detect offline on ECG lead II
  (:func:`detect_r_peaks`), cross-checked against the bedside monitor's HR numerics.

Agreement uses the heart-rate meter tolerance of ANSI/AAMI EC13: within 10 % of the
reference or 5 bpm, whichever is greater (cited from memory;
:data:`estimators.metrics.HR_TOLERANCE_ABS`). A hop without an estimate counts as
outside. Bounds sit a little below the figures measured when the tests were written;
the figures are in the comments and printed by each test (run with ``-s``).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
import pytest
from scipy import io

from bench.records import BIDMC_FS, detect_r_peaks, load_bidmc, rate_in_windows
from estimators.config import get_profile
from estimators.metrics import within_tolerance
from estimators.monitor import RateMonitor

pytestmark = pytest.mark.data

WFDB_BEAT_SYMBOLS = set("NLRBAaJSVrFejnE/fQ?")
"""Annotation symbols that mark beats (WFDB annotation codes; the rest are rhythm,
noise or comment labels)."""


@dataclass
class Run:
    """Estimates of one record paired with the reference (one row per estimate)."""

    record: str
    rate: np.ndarray
    reference: np.ndarray
    confidence: np.ndarray
    quality: np.ndarray

    @property
    def error(self) -> np.ndarray:
        return np.abs(self.rate - self.reference)

    @property
    def has_reference(self) -> np.ndarray:
        return np.isfinite(self.reference)

    @property
    def mae(self) -> float:
        return float(np.nanmean(self.error[self.has_reference]))

    @property
    def ec13(self) -> float:
        """Fraction of reference hops within tolerance (no estimate counts as outside)."""
        ref = self.has_reference
        return float(np.mean(within_tolerance(self.rate[ref], self.reference[ref])))

    @property
    def coverage(self) -> float:
        return float(np.mean(np.isfinite(self.rate[self.has_reference])))

    def line(self) -> str:
        return (f"{self.record}: MAE {self.mae:5.2f} bpm, EC13 {self.ec13:6.1%}, "
                f"coverage {self.coverage:6.1%}, n {int(self.has_reference.sum())}")


def heart_profile(name: str):
    """The named profile with only heart rate switched on: breathing from the pulse,
    when the profile has it, costs time here and does not change the heart rate."""
    profile = get_profile(name)
    if getattr(profile, "breathing_from_pulse", False):
        profile = dataclasses.replace(profile, breathing_from_pulse=False)
    return profile


def heart(estimates):
    """The heart-rate estimates (a profile may also report breathing from a pulse)."""
    return [e for e in estimates if e.quantity == "hr"]


def estimate_arrays(estimates):
    return (np.array([e.time_s for e in estimates]),
            np.array([e.emitted_s for e in estimates]),
            np.array([e.rate_per_min for e in estimates]),
            np.array([e.confidence for e in estimates]),
            np.array([e.quality for e in estimates]))


def run_against_beats(record, x, t, fs, kind, profile, beats_s) -> Run:
    est = heart(RateMonitor([(record, kind)], fs, heart_profile(profile)).update(x[:, None], t))
    centre, end, rate, conf, quality = estimate_arrays(est)
    start = 2 * centre - end  # the window's first sample (the window is symmetric)
    return Run(record, rate, rate_in_windows(beats_s, start, end), conf, quality)


def print_runs(title, runs):
    print(f"\n{title}")
    for r in runs:
        print("  " + r.line())


# ------------------------------------------------------------------ MIT-BIH 100


@pytest.fixture(scope="module")
def mitbih(shared_data):
    wfdb = pytest.importorskip("wfdb")
    base = shared_data / "physionet_wfdb" / "100"
    record = wfdb.rdrecord(str(base))
    ann = wfdb.rdann(str(base), "atr")
    fs = float(record.fs)
    lead = record.sig_name.index("MLII")
    x = np.asarray(record.p_signal[:, lead], dtype=np.float64)
    is_beat = np.array([s in WFDB_BEAT_SYMBOLS for s in ann.symbol])
    beats_s = np.asarray(ann.sample)[is_beat] / fs
    return x, fs, beats_s


def test_mitbih_reference_matches_its_documentation(mitbih):
    x, fs, beats_s = mitbih
    # physionet_wfdb/SOURCE.md: 650000 samples at 360 Hz, 2273 beats, mean 75.5 bpm.
    assert fs == 360.0 and len(x) == 650000
    assert len(beats_s) == 2273
    assert 60.0 * (len(beats_s) - 1) / (beats_s[-1] - beats_s[0]) == pytest.approx(75.5,
                                                                                  abs=0.1)


@pytest.fixture(scope="module")
def mitbih_run(mitbih) -> Run:
    x, fs, beats_s = mitbih
    t = np.arange(len(x)) / fs
    return run_against_beats("mitdb-100 MLII", x, t, fs, "ecg", "chest-ecg", beats_s)


def test_mitbih_100_ecg(mitbih_run):
    run = mitbih_run
    print_runs("MIT-BIH 100, ECG MLII, profile chest-ecg (30 min)", [run])
    # Measured: MAE 1.01 bpm, EC13 99.9 %, coverage 99.9 % over 7190 hops.
    assert run.has_reference.sum() > 7000
    assert run.ec13 >= 0.99
    assert run.mae < 1.3


# ------------------------------------------------------------- IEEE SPC 2015


SPC_RECORDS = [f"DATA_{i:02d}_TYPE{'01' if i == 1 else '02'}" for i in range(1, 7)]
SPC_FS = 125.0
SPC_REST_S = 30.0  # every training record starts with 30 s at rest (Readme / SOURCE.md)


def load_spc(shared_data, name):
    folder = shared_data / "ieee_spc2015" / "Training_data"
    sig = io.loadmat(folder / f"{name}.mat")["sig"].astype(np.float64)
    bpm = io.loadmat(folder / f"{name}_BPMtrace.mat")["BPM0"][:, 0].astype(np.float64)
    return sig, bpm


def spc_run(name, ppg, bpm) -> Run:
    """Estimates at the hops whose window is exactly reference window ``k``: it ends
    at sample ``250 k + 999`` (our 8 s window at a 0.25 s hop lands there every 8th
    hop)."""
    t = np.arange(len(ppg)) / SPC_FS
    est = heart(RateMonitor([("ppg", "ppg")], SPC_FS, heart_profile("wrist")).update(
        ppg[:, None], t))
    _, end, rate, conf, quality = estimate_arrays(est)
    window_end = t[250 * np.arange(len(bpm)) + 999]
    idx = np.searchsorted(end, window_end - 1e-9)
    assert np.all(idx < len(end)) and np.allclose(end[idx], window_end, atol=1e-9)
    return Run(name, rate[idx], bpm, conf[idx], quality[idx])


@pytest.fixture(scope="module")
def spc(shared_data):
    return {name: load_spc(shared_data, name) for name in SPC_RECORDS}


@pytest.fixture(scope="module")
def spc_whole(spc) -> list[Run]:
    return [spc_run(name, sig[1], bpm) for name, (sig, bpm) in spc.items()]


def test_spc2015_rest_segments_wrist_ppg(spc):
    """PPG channel 1, only the first 30 s fed (the rest segment); reference windows
    ending by 30 s (k = 0..11, the first at the very first estimate)."""
    runs = []
    for name, (sig, bpm) in spc.items():
        n_rest = int(SPC_REST_S * SPC_FS)
        windows = int((n_rest - 1000) // 250) + 1
        runs.append(spc_run(name + " rest", sig[1, :n_rest], bpm[:windows]))
    print_runs("IEEE SPC 2015 rest (first 30 s), PPG ch1, profile wrist", runs)
    pooled = np.concatenate([within_tolerance(r.rate, r.reference) for r in runs])
    # Measured: EC13 pooled 91.7 % (66/72); per record 100, 75, 100, 75, 100, 100 %
    # (record 02: three windows withheld; record 04: windows 6-8 off by 5-10 bpm);
    # MAE of the shown estimates 1.5, 2.1, 1.0, 3.5, 1.3, 1.3 bpm. (Channel 2 is much
    # worse: pooled 62.5 %, many windows withheld or locked at half the rate.)
    assert pooled.mean() >= 0.88
    assert min(r.ec13 for r in runs) >= 0.6
    assert np.median([r.mae for r in runs]) < 2.0


def test_spc2015_running_wrist_ppg_without_motion_handling(spc_whole):
    """Whole records (rest, running, rest). No motion handling yet, so these are a
    floor to keep, not a target: the figures are printed for the report."""
    runs = spc_whole
    print_runs("IEEE SPC 2015 whole records, PPG ch1, profile wrist", runs)
    pooled = np.concatenate([within_tolerance(r.rate, r.reference) for r in runs])
    # Measured: EC13 pooled 59.0 %; per record 44.6, 18.9, 50.0, 72.6, 94.5, 73.3 %;
    # MAE per record 24.0, 37.7, 25.0, 12.6, 4.7, 17.9 bpm (channel 2: pooled 30.8 %).
    assert pooled.mean() >= 0.5


# ------------------------------------------------------------------ BIDMC


@pytest.fixture(scope="module")
def bidmc(shared_data):
    runs, checks = [], []
    for number in range(1, 13):
        t, ppg, ecg, num_t, num_hr = load_bidmc(shared_data, number)
        beats_s = t[detect_r_peaks(ecg, BIDMC_FS)]
        run = run_against_beats(f"bidmc-{number:02d} PLETH", ppg, t, BIDMC_FS, "ppg",
                                "fingertip-rest", beats_s)
        # our R-peak reference over the 8 s before each numerics second vs the monitor HR
        ref = rate_in_windows(beats_s, num_t - 8.0, num_t)
        checks.append(float(np.nanmedian(np.abs(ref - num_hr))))
        runs.append(run)
    return runs, checks


def test_bidmc_r_peak_reference_agrees_with_the_bedside_monitor(bidmc):
    _, checks = bidmc
    print("\nBIDMC: median |R-peak reference - monitor HR| per record (bpm): "
          + ", ".join(f"{c:.2f}" for c in checks))
    # Measured: 0.26-1.12 bpm (record 03, with ectopic beats, is the largest).
    assert max(checks) < 1.5


def test_bidmc_fingertip_ppg(bidmc):
    runs, _ = bidmc
    print_runs("BIDMC PLETH, profile fingertip-rest (8 min each)", runs)
    pooled = np.concatenate([within_tolerance(r.rate[r.has_reference],
                                              r.reference[r.has_reference]) for r in runs])
    # Measured: EC13 pooled 98.0 %, per record 93.6 % (record 03, ectopic beats) to
    # 100 %; MAE per record 0.11-1.80 bpm, median 0.37 (coverage 97-100 %).
    assert pooled.mean() >= 0.96
    assert min(r.ec13 for r in runs) >= 0.9
    assert np.median([r.mae for r in runs]) < 0.6
    assert max(r.mae for r in runs) < 2.5


# ------------------------------------------------------- confidence is informative


def test_confidence_is_informative(mitbih_run, spc_whole, bidmc):
    """Over every hop with an estimate on the real records (MIT-BIH 100, SPC whole
    records, BIDMC), hops reported with confidence >= 0.8 have a lower median error
    than hops with confidence < 0.5."""
    runs = [mitbih_run, *spc_whole, *bidmc[0]]
    error = np.concatenate([r.error for r in runs])
    conf = np.concatenate([r.confidence for r in runs])
    usable = np.isfinite(error)
    high = usable & (conf >= 0.8)
    low = usable & (conf < 0.5)
    print(f"\nconfidence >= 0.8: {high.sum()} hops, median error "
          f"{np.median(error[high]):.2f} bpm; < 0.5: {low.sum()} hops, median error "
          f"{np.median(error[low]) if low.any() else np.nan:.2f} bpm")
    # Measured: >= 0.8: 30331 hops, median error 0.24 bpm; < 0.5: 21 hops (MIT-BIH,
    # SPC and BIDMC together), median error 2.15 bpm. Confidence below 0.5 is rare (0.06 % of
    # shown hops), so the low group is small; at least 15 are needed to judge.
    assert low.sum() >= 15, "too few low-confidence hops to judge"
    assert np.median(error[high]) < np.median(error[low])
