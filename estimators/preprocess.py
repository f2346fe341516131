"""Causal pre-processing per signal kind, with carried state, and decimation.

Each channel and quantity gets a :class:`Preprocessor`: non-finite samples are held at
the last finite value (so filter state is never poisoned) and flagged; runs of
identical values (flat line, clipping) are flagged; then a causal SOS filter chain
(``scipy.signal.sosfilt`` with carried ``zi``) shapes the signal so that the rate of
interest is the fundamental, and every ``M``-th sample is kept (decimation by an
integer factor).

Chains (Butterworth, from :func:`design_chain`):

* heart rate from PPG or accelerometer: band-pass 0.5-8 Hz, order 3. Keeps the pulse
  harmonics the de-shape filter relies on.
* heart rate from ECG: band-pass 5-25 Hz (QRS energy; a common practice band for QRS
  detection), squared first difference (energy envelope, in the manner of Pan &
  Tompkins, IEEE TBME 1985), low-pass 8 Hz. The beat rate becomes the fundamental of
  the envelope whatever the beat's shape.
* breathing rate from a respiration channel: band-pass 0.05-1.5 Hz, order 2.

The offline twin runs the same chains zero-phase (``sosfiltfilt``) over a whole record.

Sample ``k`` of the input maps to analysis sample ``j`` when ``k = j M + M - 1``: the
analysis sample carries the timestamp of the newest raw sample it depends on.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

from estimators import _kernels
from estimators.errors import ParameterError

STUCK_RUN_S = 0.12
"""Seconds of identical values after which samples count as stuck (flat or clipped).
Our own choice: shorter than any pulse or breath half-period at 12-bit resolution or
better, longer than the plateaus of a quantised slow signal."""


@dataclass(frozen=True)
class FilterChain:
    """SOS stages at the source rate; ``envelope`` squares the first difference
    between ``pre`` and ``post``."""

    pre: np.ndarray
    envelope: bool
    post: np.ndarray | None


def _band(fs: float, lo: float, hi: float, order: int) -> np.ndarray:
    nyq = fs / 2.0
    hi = min(hi, 0.9 * nyq)
    if lo <= 0:
        return signal.butter(order, hi, btype="lowpass", fs=fs, output="sos")
    if hi <= lo:
        raise ParameterError(f"fs={fs} Hz is too low for a {lo}-{hi} Hz band")
    return signal.butter(order, [lo, hi], btype="bandpass", fs=fs, output="sos")


def design_chain(kind: str, quantity: str, fs: float, fs_analysis: float) -> FilterChain:
    """The filter chain for a signal ``kind`` and ``quantity`` at source rate ``fs``."""
    if fs <= 0 or not np.isfinite(fs):
        raise ParameterError(f"fs={fs} must be a finite rate > 0 Hz")
    top = 0.4 * fs_analysis  # anti-alias edge below the analysis Nyquist
    if quantity == "hr":
        if kind in ("ppg", "acc"):
            return FilterChain(_band(fs, 0.5, min(8.0, top), 3), False, None)
        if kind == "ecg":
            if fs < 40:
                raise ParameterError(f"fs={fs} Hz is too low for ECG (need >= 40 Hz)")
            return FilterChain(_band(fs, 5.0, 25.0, 2), True,
                               _band(fs, 0.0, min(8.0, top), 2))
    if quantity == "rr" and kind == "resp":
        return FilterChain(_band(fs, 0.05, min(1.5, top), 2), False, None)
    raise ParameterError(f"no pre-processing for kind={kind!r}, quantity={quantity!r}")


@dataclass
class PreprocessState:
    """Everything carried between chunks: the ``zi`` of both filter stages and the
    scalars of :func:`estimators._kernels.preprocess_chunk` (last filtered value, last
    finite value, value and length of the current run, raw samples seen, running counts
    of non-finite and stuck samples)."""

    zi_pre: np.ndarray
    zi_post: np.ndarray
    scalars: np.ndarray

    @property
    def count(self) -> int:
        return int(self.scalars[4])


def initial_state(chain: FilterChain) -> PreprocessState:
    """Starting state: filters at rest, nothing seen (like ``sosfilt_zi`` times 0)."""
    zi_pre = np.zeros((chain.pre.shape[0], 2))
    zi_post = np.zeros((0 if chain.post is None else chain.post.shape[0], 2))
    scalars = np.array([0.0, 0.0, np.nan, 0.0, 0.0, 0.0, 0.0])
    return PreprocessState(zi_pre, zi_post, scalars)


_NO_SECTIONS = np.zeros((0, 6))


@dataclass(frozen=True)
class Analysis:
    """Output of one preprocessing step at the analysis rate.

    ``cum_nonfinite`` and ``cum_stuck`` are running counts of flagged raw samples up to
    and including each analysis sample, so any window's count is a difference.
    """

    values: np.ndarray
    timestamps: np.ndarray
    cum_nonfinite: np.ndarray
    cum_stuck: np.ndarray


def preprocess_step(state: PreprocessState, x: np.ndarray, t: np.ndarray, chain: FilterChain,
                    decimation: int, min_run: int) -> tuple[PreprocessState, Analysis]:
    """Filter one chunk and keep the analysis samples it completes (one compiled pass).

    Parameters
    ----------
    state : carried state (updated in place and returned).
    x, t : raw samples and their timestamps, 1-D float64 of equal length.
    chain : from :func:`design_chain`.
    decimation : integer factor ``M``.
    min_run : identical samples in a row before samples count as stuck.
    """
    x = np.ascontiguousarray(x, dtype=np.float64)
    t = np.ascontiguousarray(t, dtype=np.float64)
    n_max = (len(x) + decimation - 1) // decimation + 1
    out = np.empty((4, n_max))
    n_out = _kernels.preprocess_chunk(
        x, t, chain.pre, state.zi_pre, bool(chain.envelope),
        _NO_SECTIONS if chain.post is None else chain.post, state.zi_post, state.scalars,
        int(decimation), float(min_run), out[0], out[1], out[2], out[3])
    return state, Analysis(out[0, :n_out], out[1, :n_out], out[2, :n_out], out[3, :n_out])


def causal_sos(sos: np.ndarray, x: np.ndarray, zi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``scipy.signal.sosfilt(sos, x, zi=zi)`` for one chunk, compiled (the recursion of
    :func:`estimators._kernels.sos_filter`, tested against scipy): returns ``(y, zf)``."""
    x = np.ascontiguousarray(x, dtype=np.float64)
    zf = np.array(zi, dtype=np.float64, copy=True, order="C")
    y = np.empty_like(x)
    _kernels.sos_filter(np.ascontiguousarray(sos, dtype=np.float64), x, zf, y)
    return y, zf


def _stuck_flags(x: np.ndarray, finite: np.ndarray, min_run: int) -> np.ndarray:
    """Plain numpy twin of the run counting: lengths of runs of equal finite values."""
    raw = np.where(finite, x, np.nan)
    same = np.concatenate(([False], raw[1:] == raw[:-1]))
    run_id = np.cumsum(~same)
    starts = np.flatnonzero(~same)
    position = np.arange(len(x)) - starts[run_id - 1] + 1
    return ((position >= min_run) & finite).astype(np.float64)


def _zero_phase(sos: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``sosfiltfilt`` with its default edge padding, shortened for records too short to
    take it (scipy refuses those; they are shorter than any STFT window anyway)."""
    n_taps = 2 * len(sos) + 1 - min(int((sos[:, 2] == 0).sum()), int((sos[:, 5] == 0).sum()))
    return signal.sosfiltfilt(sos, x, padlen=min(3 * n_taps, len(x) - 1))


def preprocess_batch(x: np.ndarray, t: np.ndarray, chain: FilterChain, decimation: int,
                     min_run: int, zero_phase: bool = False) -> Analysis:
    """The whole record at once with scipy's filters: causal (``sosfilt``, the batch twin
    of :func:`preprocess_step`) or, with ``zero_phase``, forward-backward
    (``sosfiltfilt``) for the offline twin."""
    x = np.asarray(x, dtype=np.float64)
    finite = np.isfinite(x)
    idx = np.where(finite, np.arange(len(x)), -1)
    np.maximum.accumulate(idx, out=idx)
    filled = np.where(idx >= 0, x[np.maximum(idx, 0)], 0.0)
    nonfinite = (~finite).astype(np.float64)
    stuck = _stuck_flags(x, finite, min_run)
    filt = _zero_phase if zero_phase else signal.sosfilt
    y = filt(chain.pre, filled) if len(x) else filled
    if chain.envelope and len(x):
        y = np.diff(y, prepend=y[0] if zero_phase else 0.0) ** 2
    if chain.post is not None and len(x):
        y = filt(chain.post, y)
    keep = slice(decimation - 1, len(x), decimation)
    return Analysis(y[keep], np.asarray(t, dtype=np.float64)[keep],
                    np.cumsum(nonfinite)[keep], np.cumsum(stuck)[keep])


class Preprocessor:
    """Owns the state of one channel's chain; ``update(x, t) -> Analysis``."""

    def __init__(self, kind: str, quantity: str, fs: float, decimation: int):
        self.kind, self.quantity, self.fs, self.decimation = kind, quantity, fs, decimation
        self.chain = design_chain(kind, quantity, fs, fs / decimation)
        self.min_run = max(3, int(round(STUCK_RUN_S * fs)))
        self.state = initial_state(self.chain)

    def update(self, x: np.ndarray, t: np.ndarray) -> Analysis:
        self.state, out = preprocess_step(self.state, x, t, self.chain, self.decimation,
                                          self.min_run)
        return out

    def reset(self) -> None:
        self.state = initial_state(self.chain)
