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
    """Everything carried between chunks (the ``zi`` of the whole chain)."""

    zi_pre: np.ndarray
    zi_post: np.ndarray | None
    last_filtered: float
    last_finite: float
    stuck_value: float
    stuck_run: int
    count: int  # raw samples seen
    cum_nonfinite: float
    cum_stuck: float


def initial_state(chain: FilterChain) -> PreprocessState:
    """Starting state: filters at rest, nothing seen (like ``sosfilt_zi`` times 0)."""
    zi_pre = np.zeros((chain.pre.shape[0], 2))
    zi_post = None if chain.post is None else np.zeros((chain.post.shape[0], 2))
    return PreprocessState(zi_pre, zi_post, 0.0, 0.0, np.nan, 0, 0, 0.0, 0.0)


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


def _flags_and_fill(state: PreprocessState, x: np.ndarray, min_run: int):
    finite = np.isfinite(x)
    nonfinite = (~finite).astype(np.float64)
    filled = x.copy()
    if not finite.all():
        # Hold the last finite value: keeps filters bounded and the step visible as flat.
        idx = np.where(finite, np.arange(len(x)), -1)
        np.maximum.accumulate(idx, out=idx)
        filled = np.where(idx >= 0, x[np.maximum(idx, 0)], state.last_finite)
    if finite.any():
        state.last_finite = float(x[finite][-1])
    stuck = np.empty(len(x))
    raw = np.where(finite, x, np.nan)  # NaN never equals NaN: non-finite breaks runs
    state.stuck_run = int(_kernels.stuck_runs(raw, state.stuck_value, state.stuck_run,
                                              min_run, stuck))
    state.stuck_value = float(raw[-1])
    return filled, nonfinite, stuck


def _apply_chain(chain: FilterChain, state: PreprocessState, x: np.ndarray) -> np.ndarray:
    y, state.zi_pre = signal.sosfilt(chain.pre, x, zi=state.zi_pre)
    if chain.envelope:
        prev = np.concatenate(([state.last_filtered], y[:-1]))
        state.last_filtered = float(y[-1])
        y = (y - prev) ** 2
    if chain.post is not None:
        y, state.zi_post = signal.sosfilt(chain.post, y, zi=state.zi_post)
    return y


def preprocess_step(state: PreprocessState, x: np.ndarray, t: np.ndarray, chain: FilterChain,
                    decimation: int, min_run: int) -> tuple[PreprocessState, Analysis]:
    """Filter one chunk and keep the analysis samples it completes.

    Parameters
    ----------
    state : carried state (updated in place and returned).
    x, t : raw samples and their timestamps, 1-D float64 of equal length.
    chain : from :func:`design_chain`.
    decimation : integer factor ``M``.
    min_run : identical samples in a row before samples count as stuck.
    """
    n = len(x)
    if n == 0:
        empty = np.empty(0)
        return state, Analysis(empty, empty, empty, empty)
    filled, nonfinite, stuck = _flags_and_fill(state, x, min_run)
    y = _apply_chain(chain, state, filled)
    k0 = state.count
    cum_nf = state.cum_nonfinite + np.cumsum(nonfinite)
    cum_st = state.cum_stuck + np.cumsum(stuck)
    state.cum_nonfinite = float(cum_nf[-1])
    state.cum_stuck = float(cum_st[-1])
    state.count = k0 + n
    first = (decimation - 1 - k0) % decimation
    keep = slice(first, n, decimation)
    return state, Analysis(y[keep], t[keep], cum_nf[keep], cum_st[keep])


def preprocess_batch(x: np.ndarray, t: np.ndarray, chain: FilterChain, decimation: int,
                     min_run: int, zero_phase: bool = False) -> Analysis:
    """The whole record at once: causal (equal to any chunking of
    :func:`preprocess_step`) or, with ``zero_phase``, forward-backward filtered for the
    offline twin."""
    state = initial_state(chain)
    if not zero_phase:
        return preprocess_step(state, x, t, chain, decimation, min_run)[1]
    filled, nonfinite, stuck = _flags_and_fill(state, x, min_run)
    y = signal.sosfiltfilt(chain.pre, filled)
    if chain.envelope:
        y = np.diff(y, prepend=y[0]) ** 2
    if chain.post is not None:
        y = signal.sosfiltfilt(chain.post, y)
    keep = slice(decimation - 1, len(x), decimation)
    return Analysis(y[keep], t[keep], np.cumsum(nonfinite)[keep], np.cumsum(stuck)[keep])


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
