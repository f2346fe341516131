"""Heart-rate references of the development recordings, shared by the bench and the tests.

* IEEE SPC 2015 training records (``../shared/data/ieee_spc2015``, see its SOURCE.md):
  ``BPM0[k]`` is the ECG heart rate over samples ``[250 k, 250 k + 1000)`` at 125 Hz.
* BIDMC PPG and Respiration Dataset (Pimentel et al., IEEE TBME 64(8):1914-1923, 2017;
  ``../shared/data/bidmc``): no beat annotations, so the reference is 60 / mean R-R of
  R-peaks detected offline on ECG lead II (:func:`detect_r_peaks`) inside each
  estimate's window; the tests cross-check it against the bedside monitor's HR numerics.
"""

from __future__ import annotations

import gzip
from pathlib import Path

import numpy as np

BIDMC_FS = 125.0


def detect_r_peaks(ecg: np.ndarray, fs: float) -> np.ndarray:
    """R-peak sample indices on one ECG lead, offline (our reference, not the engine).

    Zero-phase Butterworth band-pass 8-20 Hz (order 3; the QRS band, common practice);
    polarity chosen so the larger 99.5th percentile is positive; ``find_peaks`` with a
    0.25 s refractory distance and a height of 35 % of the 99th percentile; then the
    smaller of any two peaks closer than 0.6 of the median R-R is dropped (T waves,
    noise). Ectopic beats stay in.
    """
    from scipy import signal

    sos = signal.butter(3, [8.0, 20.0], btype="bandpass", fs=fs, output="sos")
    y = signal.sosfiltfilt(sos, ecg)
    if np.percentile(-y, 99.5) > np.percentile(y, 99.5):
        y = -y
    peaks, _ = signal.find_peaks(y, distance=int(0.25 * fs), height=0.35 * np.percentile(y, 99))
    while len(peaks) > 2:
        rr = np.diff(peaks)
        close = np.flatnonzero(rr < 0.6 * np.median(rr))
        if len(close) == 0:
            break
        i = close[0]
        peaks = np.delete(peaks, i if y[peaks[i]] < y[peaks[i + 1]] else i + 1)
    return peaks


def rate_in_windows(beats_s: np.ndarray, start_s: np.ndarray, end_s: np.ndarray) -> np.ndarray:
    """60 / mean interval of the beats inside each ``[start, end]``; NaN with < 2 beats.

    Examples
    --------
    >>> rate_in_windows(np.array([0.0, 1.0, 2.0, 2.5]), np.array([0.0, 1.5]),
    ...                 np.array([2.0, 1.9])).tolist()
    [60.0, nan]
    """
    lo = np.searchsorted(beats_s, start_s, side="left")
    hi = np.searchsorted(beats_s, end_s, side="right")
    out = np.full(len(start_s), np.nan)
    for i, (a, b) in enumerate(zip(lo, hi)):
        if b - a >= 2:
            out[i] = 60.0 * (b - a - 1) / (beats_s[b - 1] - beats_s[a])
    return out


def load_bidmc(shared_data: Path, number: int):
    """``(t, PLETH, II, numerics time, numerics HR)`` of BIDMC record ``number``."""
    folder = Path(shared_data) / "bidmc" / "bidmc_csv"
    with gzip.open(folder / f"bidmc_{number:02d}_Signals.csv.gz", "rt") as f:
        names = [c.strip() for c in f.readline().split(",")]
        sig = np.loadtxt(f, delimiter=",")
    numerics = np.genfromtxt(folder / f"bidmc_{number:02d}_Numerics.csv", delimiter=",",
                             names=True)
    return (sig[:, 0], sig[:, names.index("PLETH")], sig[:, names.index("II")],
            numerics["Time_s"], numerics["HR"])


def load_spc(shared_data: Path, name: str):
    """``(sig (6, N), BPM0 (K,))`` of SPC 2015 training record ``name`` (e.g.
    ``DATA_01_TYPE01``): rows ECG, PPG1, PPG2, acc x, y, z."""
    from scipy import io

    folder = Path(shared_data) / "ieee_spc2015" / "Training_data"
    sig = io.loadmat(folder / f"{name}.mat")["sig"].astype(np.float64)
    bpm = io.loadmat(folder / f"{name}_BPMtrace.mat")["BPM0"][:, 0].astype(np.float64)
    return sig, bpm


def spc_names(shared_data: Path) -> list[str]:
    """The SPC 2015 training records present, e.g. ``DATA_01_TYPE01`` ... ``DATA_12_TYPE02``."""
    folder = Path(shared_data) / "ieee_spc2015" / "Training_data"
    return sorted(p.stem for p in folder.glob("DATA_*_TYPE*.mat")
                  if not p.stem.endswith("BPMtrace")
                  and (folder / f"{p.stem}_BPMtrace.mat").is_file())
