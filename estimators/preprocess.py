"""Causal pre-processing per signal kind, with carried state, and decimation.

Each channel and quantity gets a :class:`Preprocessor`: samples that are not finite or
lie outside the signal's running robust range (:class:`Limiter`: spikes, overflowing
converters) are held at the last accepted value (so filter state is never poisoned)
and counted as rejected; runs of identical values (flat line, clipping) are flagged;
then a causal SOS filter chain
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
from estimators.stage import split_arrays

MAX_ABS = 1e100
"""Samples larger in magnitude are rejected whatever the signal's history. Far beyond
any physical unit, and small enough that the ECG envelope (a squared difference of
filtered samples) stays finite: float64 ends at 1.8e308."""

LIMIT_BLOCK_S = 0.25
"""The limiter learns the signal's range from blocks this long, over the last analysis
window (32 blocks for the 8 s heart-rate window, 128 for the 32 s breathing window).
Short, so that a lasting change of level opens the range within three blocks (0.75 s)
and only the first block of a stream, or after a gap, goes unchecked."""

LIMIT_RANK = 3
"""With a full memory, the envelope is the third-largest block maximum (third-smallest
minimum): a burst touching at most two blocks (a few samples, which may straddle a
block boundary) never moves it, while three blocks of a new level or scale (0.75 s)
open it; an 8 s window holds four beats or more at 30 per minute, so at least four
blocks hold a beat's peak, and a 32 s window two breaths or more at 4 per minute, each
near its peak for several blocks."""

LIMIT_MARGIN = 6.0
"""The accepted range reaches this many envelope widths beyond the envelope on each
side (thirteen widths in all). Generous on purpose: nothing is gained by a tight bound,
since spikes of up to 50 times the pulse passed unlimited never gave a wrong rate nor
withheld one for longer than about a window (measured on the synthetic PPG, ECG and belt
signals of tests/robustness), whereas a taller ectopic beat, a deep breath or the onset
of motion must stay accepted. Our own choice. On the real recordings of the tests
(BIDMC PLETH, II, V, AVR and RESP, MIT-BIH 100, SPC 2015 ECG, PPG and accelerometers) it
rejects no sample after the first second (a margin of 4 rejected 67 samples at three
onsets of running); in the first second, 18 to 31 samples of 4 of the 53 BIDMC RESP
records, which start flat at a rail, until one block of breathing is known."""

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


ENVELOPE_CARRIER_HZ = float(np.sqrt(5.0 * 25.0))
"""Where the ECG chain's band-pass delay is read: the geometric centre of its 5-25 Hz
band, where the QRS energy the envelope follows sits (about 11 Hz). The envelope's own
delay is then that of the first difference and of the low-pass at the beat rate."""


def sos_group_delay_s(sos: np.ndarray, freqs_hz: np.ndarray, fs: float) -> np.ndarray:
    """Group delay in seconds of an SOS cascade at ``freqs_hz``: the sum over its
    sections of each biquad's (``scipy.signal.group_delay``)."""
    freqs_hz = np.atleast_1d(np.asarray(freqs_hz, dtype=np.float64))
    total = np.zeros(len(freqs_hz))
    for section in np.atleast_2d(sos):
        _, gd = signal.group_delay((section[:3], section[3:]), w=freqs_hz, fs=fs)
        total += gd
    return total / fs


def chain_group_delay_s(chain: FilterChain, fs: float, freqs_hz: np.ndarray) -> np.ndarray:
    """How long ago, in seconds, the causal chain's output at a rhythm of ``freqs_hz``
    describes: the group delay of the filters at that frequency; for the ECG envelope,
    the band-pass at :data:`ENVELOPE_CARRIER_HZ`, half a sample for the first
    difference, and the low-pass at the rhythm. Zero-phase (offline) chains have none."""
    freqs_hz = np.atleast_1d(np.asarray(freqs_hz, dtype=np.float64))
    if not chain.envelope:
        return sos_group_delay_s(chain.pre, freqs_hz, fs)
    carrier = sos_group_delay_s(chain.pre, np.array([ENVELOPE_CARRIER_HZ]), fs)[0]
    post = np.zeros(len(freqs_hz)) if chain.post is None else sos_group_delay_s(
        chain.post, freqs_hz, fs)
    return carrier + 0.5 / fs + post


@dataclass(frozen=True)
class Limiter:
    """Running robust range of a raw signal (see :func:`estimators._kernels.limit_sample`).

    ``block`` raw samples per block (0: no range, only non-finite samples and those
    beyond :data:`MAX_ABS` are rejected), ``blocks`` in memory, the envelope at
    ``rank``, ``margin`` envelope widths of slack on each side.

    Notes
    -----
    Robust range limiting in the manner of a running order-statistic (quantile) filter:
    the envelope ``(e_lo, e_hi)`` is an order statistic of block extremes over the last
    analysis window, so outliers in fewer than ``rank`` blocks cannot move it (the
    breakdown point of an order statistic, Huber 1981, *Robust Statistics*, cited from
    memory), and

    ``lo = e_lo - margin (e_hi - e_lo)``, ``hi = e_hi + margin (e_hi - e_lo)``.

    The order statistic is the same upper quantile of however many blocks are known, and
    while they span under a quarter of the memory (2 s for heart rate, 8 s for
    breathing) the margin widens in proportion, so a slow beat's peak still in the
    future is not mistaken for a spike; only the first block has no limits
    (:func:`estimators._kernels.limit_sample`).
    """

    block: int
    blocks: int = 32
    rank: int = LIMIT_RANK
    margin: float = LIMIT_MARGIN

    def __post_init__(self):
        if self.block < 0 or self.blocks < self.rank or self.rank < 1 or not self.margin >= 0:
            raise ParameterError(f"limiter {self} must have block >= 0, blocks >= rank >= 1 "
                                 "and margin >= 0")

    @classmethod
    def for_window(cls, window_s: float, fs: float) -> "Limiter":
        """The limiter learning over one analysis window of ``window_s`` at ``fs``, in
        blocks of :data:`LIMIT_BLOCK_S`."""
        return cls(max(1, int(round(LIMIT_BLOCK_S * fs))),
                   max(LIMIT_RANK, int(round(window_s / LIMIT_BLOCK_S))))

    def initial_state(self) -> np.ndarray:
        """Nothing seen: no limits yet (the header of the kernel's state, then two rings)."""
        state = np.full(_kernels.LIMIT_HEADER + 2 * self.blocks, np.nan)
        state[:_kernels.LIMIT_HEADER] = [0.0, -np.inf, np.inf, 0.0, -np.inf, np.inf]
        return state


NO_LIMIT = Limiter(0)
"""Rejects only non-finite samples and those beyond :data:`MAX_ABS`."""


def limit_step(limiter: Limiter, state: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Accepted flags (bool) of the raw samples ``x``, carrying ``state`` (from
    :meth:`Limiter.initial_state`, updated in place); compiled."""
    x = np.ascontiguousarray(x, dtype=np.float64)
    if limiter.block == 0:
        return np.isfinite(x) & (np.abs(x) <= MAX_ABS)
    out = np.empty(len(x))
    _kernels.limit_chunk(x, state, limiter.block, limiter.rank, float(limiter.margin),
                         MAX_ABS, out)
    return out > 0.0


def limit_batch(limiter: Limiter, x: np.ndarray) -> np.ndarray:
    """Accepted flags of a whole record in plain numpy (the batch twin of
    :func:`limit_step` from its initial state)."""
    x = np.asarray(x, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(x) & (np.abs(x) <= MAX_ABS)
    if limiter.block == 0 or len(x) == 0:
        return ok
    b, n_ring = limiter.block, limiter.blocks
    n_full = len(x) // b
    good = ok[:n_full * b].reshape(n_full, b)
    vals = x[:n_full * b].reshape(n_full, b)
    has = good.any(axis=1)
    block_max = np.where(has, np.where(good, vals, -np.inf).max(axis=1, initial=-np.inf),
                         np.nan)
    block_min = np.where(has, np.where(good, vals, np.inf).min(axis=1, initial=np.inf),
                         np.nan)
    # Row p: the blocks p - n_ring ... p - 1, whose limits apply to the samples of block p.
    pad = np.full(n_ring, np.nan)
    highs = np.lib.stride_tricks.sliding_window_view(np.concatenate((pad, block_max)), n_ring)
    lows = np.lib.stride_tricks.sliding_window_view(np.concatenate((pad, block_min)), n_ring)
    n_known = np.minimum(np.arange(len(highs)), n_ring)
    rank = (limiter.rank * n_known + n_ring - 1) // n_ring
    counted = (~np.isnan(highs)).sum(axis=1)
    known = (counted >= rank) & (rank >= 1)
    at = np.clip(rank, 1, n_ring)[:, None]
    high = np.take_along_axis(np.sort(np.where(np.isnan(highs), -np.inf, highs), axis=1),
                              n_ring - at, axis=1)[:, 0]
    low = np.take_along_axis(np.sort(np.where(np.isnan(lows), np.inf, lows), axis=1),
                             at - 1, axis=1)[:, 0]
    # Wider while under a quarter of the memory is known (the same expression as live).
    margin = np.where(4 * n_known < n_ring,
                      limiter.margin * n_ring / (4.0 * np.maximum(n_known, 1)), limiter.margin)
    width = np.where(known, high - low, 0.0)
    lo = np.where(known, low - margin * width, -np.inf)
    hi = np.where(known, high + margin * width, np.inf)
    per_sample = np.arange(len(x)) // b
    with np.errstate(invalid="ignore"):
        return ok & (x >= lo[per_sample]) & (x <= hi[per_sample])


@dataclass
class PreprocessState:
    """Everything carried between chunks: the ``zi`` of both filter stages, the scalars
    of :func:`estimators._kernels.preprocess_chunk` (last filtered value, last accepted
    value, value and length of the current run, raw samples seen, running counts of
    rejected and stuck samples) and the limiter's state."""

    zi_pre: np.ndarray
    zi_post: np.ndarray
    scalars: np.ndarray
    limiter: np.ndarray

    @property
    def count(self) -> int:
        return int(self.scalars.reshape(-1, 7)[0, 4])

    def copy(self) -> "PreprocessState":
        return PreprocessState(self.zi_pre.copy(), self.zi_post.copy(), self.scalars.copy(),
                               self.limiter.copy())

    def channel(self, c: int) -> "PreprocessState":
        """Channel ``c`` of a state of several channels (views, no copy)."""
        return PreprocessState(self.zi_pre[c], self.zi_post[c], self.scalars[c],
                               self.limiter[c])

    @staticmethod
    def stack(states) -> "PreprocessState":
        """States of single channels as one state of several channels."""
        return PreprocessState(*(np.stack([getattr(s, name) for s in states])
                                 for name in ("zi_pre", "zi_post", "scalars", "limiter")))


def initial_state(chain: FilterChain, limiter: Limiter = NO_LIMIT) -> PreprocessState:
    """Starting state: filters at rest, nothing seen (like ``sosfilt_zi`` times 0)."""
    zi_pre = np.zeros((chain.pre.shape[0], 2))
    zi_post = np.zeros((0 if chain.post is None else chain.post.shape[0], 2))
    scalars = np.array([0.0, 0.0, np.nan, 0.0, 0.0, 0.0, 0.0])
    return PreprocessState(zi_pre, zi_post, scalars, limiter.initial_state())


_NO_SECTIONS = np.zeros((0, 6))


@dataclass(frozen=True)
class Analysis:
    """Output of one preprocessing step at the analysis rate.

    ``cum_rejected`` (non-finite or outside the running range) and ``cum_stuck`` are
    running counts of flagged raw samples up to and including each analysis sample, so
    any window's count is a difference.
    """

    values: np.ndarray
    timestamps: np.ndarray
    cum_rejected: np.ndarray
    cum_stuck: np.ndarray

    def __len__(self) -> int:
        return len(self.timestamps)

    @property
    def aux(self) -> np.ndarray:
        """The running counts as the auxiliary series the STFT carries beside its
        frames: (2, C, J) for several channels (rejected, stuck), (2, J) for one."""
        return np.stack([self.cum_rejected, self.cum_stuck])

    def channel(self, c: int) -> "Analysis":
        """Channel ``c`` of a several-channel output (views)."""
        return Analysis(self.values[c], self.timestamps, self.cum_rejected[c],
                        self.cum_stuck[c])

    @staticmethod
    def concat(parts) -> "Analysis":
        """Outputs one after the other in time (the last axis)."""
        return Analysis(*(np.concatenate([getattr(p, name) for p in parts], axis=-1)
                          for name in ("values", "timestamps", "cum_rejected", "cum_stuck")))


def preprocess_step(state: PreprocessState, x: np.ndarray, t: np.ndarray, chain: FilterChain,
                    decimation: int, min_run: int,
                    limiter: Limiter = NO_LIMIT) -> tuple[PreprocessState, Analysis]:
    """Filter one chunk of one channel and keep the analysis samples it completes: the
    step of :class:`FrontEnd` for a single channel.

    Parameters
    ----------
    state : carried state from :func:`initial_state` with the same ``limiter`` (not
        modified: a new state is returned).
    x, t : raw samples and their timestamps, 1-D float64 of equal length.
    chain : from :func:`design_chain`.
    decimation : integer factor ``M``.
    min_run : identical samples in a row before samples count as stuck.
    limiter : the running range outside which samples are rejected.
    """
    stage = FrontEnd(chain, int(decimation), int(min_run), limiter)
    state, out = stage.step(PreprocessState.stack([state]), (np.asarray(x)[:, None], t))
    return state.channel(0), out.channel(0)


@dataclass(frozen=True, eq=False)
class FrontEnd:
    """Stage (:mod:`estimators.stage`): the causal pre-processing of ``n_channels``
    channels that share one chain, in one compiled pass
    (:func:`estimators._kernels.preprocess_channels`).

    Input ``(samples (n, C), timestamps (n,))``; output :class:`Analysis` with values
    and counts ``(C, J)`` and timestamps ``(J,)``; state :class:`PreprocessState` with
    a leading channel axis. :meth:`batch` is the numpy/scipy twin
    (:func:`preprocess_batch` per channel); :meth:`offline` the zero-phase version the
    offline twin uses.
    """

    chain: FilterChain
    decimation: int
    min_run: int
    limiter: Limiter = NO_LIMIT
    n_channels: int = 1

    def __post_init__(self):
        if self.decimation < 1 or self.n_channels < 1:
            raise ParameterError(f"decimation={self.decimation} and "
                                 f"n_channels={self.n_channels} must be >= 1")

    def initial_state(self) -> PreprocessState:
        return PreprocessState.stack([initial_state(self.chain, self.limiter)]
                                     * self.n_channels)

    def _channels(self, samples, timestamps) -> tuple[np.ndarray, np.ndarray]:
        t = np.ascontiguousarray(timestamps, dtype=np.float64)
        x = np.asarray(samples, dtype=np.float64).reshape(len(t), self.n_channels)
        return np.ascontiguousarray(x.T), t

    def step(self, state: PreprocessState, x) -> tuple[PreprocessState, Analysis]:
        samples, t = self._channels(*x)
        state = state.copy()
        n_max = (len(t) + self.decimation - 1) // self.decimation + 1
        out = np.empty((self.n_channels, 4, n_max))
        chain, limiter = self.chain, self.limiter
        n_out = _kernels.preprocess_channels(
            samples, t, chain.pre, state.zi_pre, bool(chain.envelope),
            _NO_SECTIONS if chain.post is None else chain.post, state.zi_post,
            state.scalars, state.limiter, int(limiter.block), int(limiter.rank),
            float(limiter.margin), MAX_ABS, int(self.decimation), float(self.min_run), out)
        return state, Analysis(out[:, 0, :n_out], out[0, 1, :n_out], out[:, 2, :n_out],
                               out[:, 3, :n_out])

    def _whole(self, x, zero_phase: bool) -> Analysis:
        samples, t = self._channels(*x)
        parts = [preprocess_batch(row, t, self.chain, self.decimation, self.min_run,
                                  zero_phase, self.limiter) for row in samples]
        return Analysis(np.array([p.values for p in parts]).reshape(len(parts), -1),
                        parts[0].timestamps,
                        np.array([p.cum_rejected for p in parts]).reshape(len(parts), -1),
                        np.array([p.cum_stuck for p in parts]).reshape(len(parts), -1))

    def batch(self, x) -> Analysis:
        return self._whole(x, False)

    def offline(self, x) -> Analysis:
        """The zero-phase twin (``sosfiltfilt``) over a whole record."""
        return self._whole(x, True)

    def split(self, x, bounds):
        return split_arrays(tuple(x), bounds)

    def join(self, parts) -> Analysis:
        return Analysis.concat(parts)


def causal_sos(sos: np.ndarray, x: np.ndarray, zi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``scipy.signal.sosfilt(sos, x, zi=zi)`` for one chunk, compiled (the recursion of
    :func:`estimators._kernels.sos_filter`, tested against scipy): returns ``(y, zf)``."""
    x = np.ascontiguousarray(x, dtype=np.float64)
    zf = np.array(zi, dtype=np.float64, copy=True, order="C")
    y = np.empty_like(x)
    _kernels.sos_filter(np.ascontiguousarray(sos, dtype=np.float64), x, zf, y)
    return y, zf


def _stuck_flags(x: np.ndarray, accepted: np.ndarray, min_run: int) -> np.ndarray:
    """Plain numpy twin of the run counting: lengths of runs of equal accepted values."""
    raw = np.where(accepted, x, np.nan)
    same = np.concatenate(([False], raw[1:] == raw[:-1]))
    run_id = np.cumsum(~same)
    starts = np.flatnonzero(~same)
    position = np.arange(len(x)) - starts[run_id - 1] + 1
    return ((position >= min_run) & accepted).astype(np.float64)


def _zero_phase(sos: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``sosfiltfilt`` with its default edge padding, shortened for records too short to
    take it (scipy refuses those; they are shorter than any STFT window anyway)."""
    n_taps = 2 * len(sos) + 1 - min(int((sos[:, 2] == 0).sum()), int((sos[:, 5] == 0).sum()))
    return signal.sosfiltfilt(sos, x, padlen=min(3 * n_taps, len(x) - 1))


def preprocess_batch(x: np.ndarray, t: np.ndarray, chain: FilterChain, decimation: int,
                     min_run: int, zero_phase: bool = False,
                     limiter: Limiter = NO_LIMIT) -> Analysis:
    """The whole record at once with numpy and scipy's filters: causal (``sosfilt``, the
    batch twin of :func:`preprocess_step`) or, with ``zero_phase``, forward-backward
    (``sosfiltfilt``) for the offline twin. Samples are rejected and held exactly as
    live (:func:`limit_batch`)."""
    x = np.asarray(x, dtype=np.float64)
    accepted = limit_batch(limiter, x)
    idx = np.where(accepted, np.arange(len(x)), -1)
    np.maximum.accumulate(idx, out=idx)
    filled = np.where(idx >= 0, x[np.maximum(idx, 0)], 0.0)
    rejected = (~accepted).astype(np.float64)
    stuck = _stuck_flags(x, accepted, min_run)
    filt = _zero_phase if zero_phase else signal.sosfilt
    y = filt(chain.pre, filled) if len(x) else filled
    if chain.envelope and len(x):
        y = np.diff(y, prepend=y[0] if zero_phase else 0.0) ** 2
    if chain.post is not None and len(x):
        y = filt(chain.post, y)
    keep = slice(decimation - 1, len(x), decimation)
    return Analysis(y[keep], np.asarray(t, dtype=np.float64)[keep],
                    np.cumsum(rejected)[keep], np.cumsum(stuck)[keep])


class Preprocessor:
    """Owns the state of one channel's :class:`FrontEnd`; ``update(x, t) -> Analysis``.

    ``limiter`` is the running range (default: none, only non-finite samples and those
    beyond :data:`MAX_ABS` are rejected); ``min_run`` (default: :data:`STUCK_RUN_S`)
    identical samples in a row count as stuck."""

    def __init__(self, kind: str, quantity: str, fs: float, decimation: int,
                 limiter: Limiter = NO_LIMIT, min_run: int | None = None):
        self.kind, self.quantity, self.fs, self.decimation = kind, quantity, fs, decimation
        chain = design_chain(kind, quantity, fs, fs / decimation)
        if min_run is None:
            min_run = max(3, int(round(STUCK_RUN_S * fs)))
        self.stage = FrontEnd(chain, int(decimation), int(min_run), limiter)
        self.reset()

    @property
    def chain(self) -> FilterChain:
        return self.stage.chain

    @property
    def min_run(self) -> int:
        return self.stage.min_run

    @property
    def limiter(self) -> Limiter:
        return self.stage.limiter

    def update(self, x: np.ndarray, t: np.ndarray) -> Analysis:
        self.state, out = self.stage.step(self.state, (x, t))
        return out.channel(0)

    def batch(self, x: np.ndarray, t: np.ndarray, zero_phase: bool = False) -> Analysis:
        """A whole record in one call from the starting state (see :func:`preprocess_batch`)."""
        whole = self.stage.offline((x, t)) if zero_phase else self.stage.batch((x, t))
        return whole.channel(0)

    def reset(self) -> None:
        self.state = self.stage.initial_state()

    def group_delay_s(self, freqs_hz: np.ndarray) -> np.ndarray:
        """The causal chain's group delay at ``freqs_hz`` (:func:`chain_group_delay_s`)."""
        return chain_group_delay_s(self.chain, self.fs, freqs_hz)
