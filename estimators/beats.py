"""Beat detection in a pulse (PPG or ECG): causal, with carried state, and its batch
twin.

:func:`detect_step` finds beats causally (:func:`beat_params`): a candidate is the
largest value of the detection signal within +-0.25 s, accepted when it reaches a
fraction of the recent beats' heights. Each beat gives a sub-sample position and three
features (intensity, amplitude, interval; :data:`MODULATIONS` order); premature or
missed beats drop their interval. :func:`detect_step` is pure (it returns a new state)
and decides its candidates in one compiled pass (:func:`estimators._kernels.scan_beats`);
:func:`detect_batch` is its numpy twin over a whole record (causal, equal to the step to
the last bit over any chunking, or zero-phase for the offline path).

Fiducial points (where in a beat its time is read)
--------------------------------------------------
* **ECG: the R peak**. The QRS is located by the steepest slope of the 5-25 Hz
  detection band-pass near the energy-envelope peak (P and T waves are slower); the R
  peak is the extreme of a 0.5-40 Hz band-pass within ``qrs_half`` of that slope, of the
  polarity most of the last :data:`POLARITY_BEATS` beats had (so that a lead whose R and
  S waves are nearly equal does not jump between them from beat to beat).
* **PPG: the steepest point of the systolic upstroke**, the maximum of the first
  derivative of a 0.5-8 Hz band-pass (a fiducial point that the foot's baseline and
  the dicrotic wave move less than the foot or the peak do). Once
  :data:`TEMPLATE_MIN_BEATS` beats are known, each beat's steepest point is read by
  aligning its derivative from 0.25 s before to 0.2 s after its steepest sample (at
  most half a beat interval either side) with the mean of the last
  :data:`TEMPLATE_BEATS` beats' (the lag of the largest cross-correlation, within
  +-40 ms), and placed at the vertex of that mean: the whole
  upstroke and systolic wave locate the beat, not the few samples at its steepest point,
  which noise moves (Woody's adaptive template alignment; see :func:`beat_params`).

Both are refined to sub-sample precision by the vertex of the parabola through the
three samples around the extreme (for PPG: around the template's and the
cross-correlation's extremes), and turned into seconds (``Beats.time_s``) by linear
interpolation of the timestamps. Live filters are causal, so a live beat time lags the
fiducial point by the filter's group delay near the beat's main frequencies (a few
milliseconds for ECG: 6.5 ms median on MIT-BIH record 100; tens of milliseconds for PPG);
this is nearly constant, so intervals keep it out. The offline twin (``zero_phase``) has
no such lag.

A beat is decided (confirmed) once ``lookahead`` samples after its candidate have been
seen: ``ready_s`` is the timestamp of that sample and ``delay_s = ready_s - time_s`` the
confirmation delay (about 0.3 s for ECG: the refractory half-window, plus the envelope's
and filters' lag).

Index vocabulary: ``k`` raw sample (count from the first sample, 0-based), ``i`` beat.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import signal

from estimators import _kernels
from estimators.errors import ParameterError
from estimators.preprocess import MAX_ABS, Limiter, causal_sos, limit_batch, limit_step

MODULATIONS = ("intensity", "amplitude", "frequency")
"""Names of the three respiratory modulations, in the column order used throughout."""

PULSE_KINDS = ("ppg", "ecg")

MIN_FS_HZ = 40.0
"""Lowest raw sampling rate at which beats are located well enough for the
modulations (our own choice); below it a pulse channel gives no breathing rate."""

BEAT_LIMIT_WINDOW_S = 8.0
"""The beat detector rejects samples outside the pulse's running range learnt over
this long (:class:`estimators.preprocess.Limiter`), as the heart-rate path does over its
8 s window: at least four beats at the slowest rate followed (30 per minute)."""


POLARITY_BEATS = 32
"""Beats over which the ECG's R-wave polarity is learnt: about 30 s, several breaths,
as breathing turns the heart's axis and so swaps which of R and S is taller from beat
to beat in some leads (our own choice)."""

TEMPLATE_BEATS = 16
"""PPG beats whose mean derivative is the template each new beat is aligned with
(about 15 s; chosen by leave-one-record-out cross-validation on BIDMC 01-26 among 8,
16 and 32, see :func:`beat_params`)."""

CYCLE_SHARE = 0.5
"""The template alignment compares at most this share of the typical beat interval
before and after the steepest sample: the beat's own cycle, never the neighbouring
beats' upstrokes, whose distance changes with the rhythm (a priori)."""

TEMPLATE_MIN_BEATS = 4
"""PPG beats needed before the template is used; until then (and after a gap) a beat is
read at its own steepest sample (our own choice)."""

# --------------------------------------------------------------------------- beats


@dataclass(frozen=True)
class BeatParams:
    """Beat detection settings for one signal kind at raw rate ``fs`` (from
    :func:`beat_params`); lengths are in raw samples.

    ``detect_sos`` band-passes the signal whose slope is the detection signal (PPG:
    the slope itself; ECG: the moving average of the squared slope over ``integrate``
    samples). ``feature_sos`` shapes the signal the beat's amplitude (and for PPG its
    intensity) is read from, ``level_sos`` the ECG level whose beat mean is the ECG
    intensity. A candidate is the largest detection value within ``+-refractory``;
    ``search`` bounds where the systolic peak (PPG, after the upstroke) or the R wave
    (ECG, around the envelope peak) is looked for; ``qrs_half`` is the half-width of
    the QRS window; beats more than ``max_gap`` apart leave a gap. PPG beats are aligned
    with the template over ``align_before`` samples before and ``align_after`` after
    the steepest sample, by lags up to ``+-align_shift`` (0: no template, ECG).
    """

    kind: str
    fs: float
    detect_sos: np.ndarray
    feature_sos: np.ndarray
    level_sos: np.ndarray
    integrate: int
    refractory: int
    search: int
    qrs_half: int
    max_gap: int
    threshold_fraction: float
    history: int
    interval_tolerance: float
    limiter: Limiter
    align_before: int = 0
    align_after: int = 0
    align_shift: int = 0

    @property
    def lookahead(self) -> int:
        """Raw samples after a candidate needed before it is decided."""
        return self.refractory

    @property
    def keep(self) -> int:
        """Raw samples of signal history every step keeps."""
        return self.max_gap + 2 * self.refractory + self.integrate + self.search + 4


def beat_params(kind: str, fs: float) -> BeatParams:
    """Beat detection settings for ``kind`` (``"ppg"`` or ``"ecg"``) at ``fs`` Hz.

    Notes
    -----
    PPG: beats are the steepest points of the upstrokes of a 0.5-8 Hz band-pass (the
    pulse and its first harmonics, common practice); the systolic upstroke is far
    steeper than a dicrotic wave, so a candidate must reach half the upper quartile of
    the slopes of the last 8 beats. Features come from an 8 Hz low-pass that keeps the
    baseline. ECG: beats are peaks of the moving average (0.1 s) of the squared slope of
    a 5-25 Hz band-pass, in the manner of Pan & Tompkins ("A real-time QRS detection
    algorithm", IEEE TBME 32(3), 1985; cited from memory), reaching 30 % of the recent
    upper quartile; the R wave and the QRS amplitude come from a 0.5-40 Hz band-pass.
    PPG beat times are refined by aligning each beat's derivative with the mean of the
    last :data:`TEMPLATE_BEATS` beats' (segments centred on each beat's steepest sample):
    the lag maximising the cross-correlation, refined by a parabola, plus the vertex of
    the template's own maximum. This is Woody's adaptive template alignment of
    variable-latency responses (C. D. Woody, "Characterization of an adaptive filter for
    the analysis of variable latency neuroelectric signals", Med. Biol. Eng. 5:539-553,
    1967; cited from memory), applied to the pulse. The comparison is limited to the
    beat's own cycle (:data:`CYCLE_SHARE`). The segment (0.25 s before to 0.2 s after the
    steepest sample) and the template length were chosen by leave-one-record-out
    cross-validation on BIDMC 01-26 (before 0.15/0.25/0.35 s, after 0.1/0.2 s, 8/16/32
    beats; 24 folds chose 0.25 s, 0.2 s, 16 beats, two 0.35 s), scoring the share of PPG
    intervals within 20 ms of the ECG's, both live (held out: 95.5 %, against 93.5 % at
    the steepest sample); the lag is bounded by 40 ms so that the segment after the
    beat fits in the look-ahead. A candidate is the largest value within +-0.25 s (beat rates
    up to 240 per minute); beats more than 2 s apart (below 30 per minute) leave a gap,
    after which the detection bar halves every 2 s until a beat is found; an interval
    more than 30 % away from the median of the last 8 is an ectopic or missed beat and
    is dropped. These other numbers are our own choices.
    """
    if kind not in PULSE_KINDS:
        raise ParameterError(f"kind={kind!r} must be one of {', '.join(PULSE_KINDS)}")
    if not (np.isfinite(fs) and fs >= MIN_FS_HZ):
        raise ParameterError(f"fs={fs} must be at least {MIN_FS_HZ:g} Hz for beat detection")
    nyq = fs / 2.0

    def band(lo, hi, order=2):
        hi = min(hi, 0.9 * nyq)
        if lo <= 0:
            return signal.butter(order, hi, btype="lowpass", fs=fs, output="sos")
        return signal.butter(order, [lo, hi], btype="bandpass", fs=fs, output="sos")

    n = lambda seconds: int(round(seconds * fs))  # noqa: E731
    limiter = Limiter.for_window(BEAT_LIMIT_WINDOW_S, fs)
    if kind == "ppg":
        return BeatParams(kind, float(fs), band(0.5, 8.0), band(0.0, 8.0), band(0.0, 8.0),
                          0, n(0.25), n(0.25), 0, n(2.0), 0.5, 8, 0.3, limiter,
                          n(0.25), n(0.2), min(n(0.04), n(0.25) - n(0.2)))
    return BeatParams(kind, float(fs), band(5.0, 25.0), band(0.5, 40.0), band(0.0, 8.0),
                      n(0.1), n(0.25), n(0.12), n(0.064), n(2.0), 0.3, 8, 0.3, limiter)


@dataclass(frozen=True)
class Beats:
    """Beats decided in one step, in order.

    ``index`` (n,) raw-sample index of the detection peak; ``position`` (n,) beat time
    in raw samples (sub-sample; the fiducial point, see the module notes); ``ready`` (n,)
    number of raw samples seen when the beat was decided; ``ready_s`` (n,) timestamp of
    the newest of those; ``features`` (n, 3) in :data:`MODULATIONS` order: intensity,
    amplitude, interval (seconds; NaN for the first beat, after a gap, and for ectopic or
    missed beats: the breathing chain's own screening); ``time_s`` (n,) the beat's time
    in seconds, ``position`` on the timestamps (linear interpolation).
    """

    index: np.ndarray
    position: np.ndarray
    ready: np.ndarray
    ready_s: np.ndarray
    features: np.ndarray
    time_s: np.ndarray

    @property
    def delay_s(self) -> np.ndarray:
        """Confirmation delay of each beat: ``ready_s - time_s`` (seconds)."""
        return self.ready_s - self.time_s

    def __len__(self) -> int:
        return len(self.index)

    @staticmethod
    def empty() -> "Beats":
        e = np.empty(0)
        return Beats(np.empty(0, np.int64), e, np.empty(0, np.int64), e, np.empty((0, 3)), e)

    @staticmethod
    def concat(parts: list["Beats"]) -> "Beats":
        parts = [b for b in parts if len(b)]
        if not parts:
            return Beats.empty()
        return Beats(*(np.concatenate([getattr(b, name) for b in parts])
                       for name in ("index", "position", "ready", "ready_s", "features",
                                    "time_s")))


@dataclass(frozen=True)
class BeatState:
    """Everything :func:`detect_step` carries between chunks (never changed: every step
    returns a new one).

    Filter states and the limiter's; the newest band-pass value before the chunk
    (``last_band``, for the slope) and the last accepted input; ``count`` raw samples
    seen; the signal history (``detect[0]`` is raw sample ``count - len(detect)``) and
    ``times``, the timestamps of that history; ``scan`` the scalars of the beat scan
    (layout :data:`estimators._kernels.BEAT_SCAN_SIZE`: the first candidate not yet
    decided, the last beat's detection index, position and feature peak, and how many
    of each remembered quantity are held); the remembered recent beat ``heights`` and
    ``intervals``, the R-wave ``polarities`` (ECG) and the ``upstrokes`` (PPG rows of
    derivative), oldest first, in arrays of their full capacity.
    """

    zi_detect: np.ndarray
    zi_integrate: np.ndarray
    zi_feature: np.ndarray
    zi_level: np.ndarray
    limiter: np.ndarray
    last_band: float
    last_accepted: float
    count: int
    detect: np.ndarray
    feature: np.ndarray
    level: np.ndarray
    band: np.ndarray
    times: np.ndarray
    scan: np.ndarray
    heights: np.ndarray
    intervals: np.ndarray
    polarities: np.ndarray
    upstrokes: np.ndarray


FAR_BEFORE = -(10 ** 12)
"""Index of the 'last beat' before any beat: far enough back that every gap rule holds."""


def beat_initial_state(params: BeatParams) -> BeatState:
    """Filters at rest, nothing seen."""
    zeros = lambda sos: np.zeros((sos.shape[0], 2))  # noqa: E731
    scan = np.zeros(_kernels.BEAT_SCAN_SIZE)
    scan[_kernels.SCAN_LAST_INDEX] = scan[_kernels.SCAN_LAST_PEAK] = FAR_BEFORE
    scan[_kernels.SCAN_LAST_POSITION] = np.nan
    empty = np.empty(0)
    return BeatState(zeros(params.detect_sos), np.zeros(max(params.integrate - 1, 0)),
                     zeros(params.feature_sos), zeros(params.level_sos),
                     params.limiter.initial_state(), 0.0, 0.0, 0, empty, empty, empty,
                     empty, empty, scan, np.zeros(params.history), np.zeros(params.history),
                     np.zeros(POLARITY_BEATS),
                     np.zeros((TEMPLATE_BEATS, params.align_before + params.align_after + 1)))


@dataclass
class _ScanMemory:
    """What the numpy scan (:func:`_scan`, the batch twin) updates as it goes: the first
    candidate not yet decided; recent beat heights and intervals; the R-wave polarities
    (ECG) or upstroke derivatives (PPG) of the last beats; the last beat's detection
    index, position and feature peak."""

    next_k: int = 0
    polarities: list = field(default_factory=list)
    upstrokes: list = field(default_factory=list)
    heights: list = field(default_factory=list)
    intervals: list = field(default_factory=list)
    last_index: int = FAR_BEFORE
    last_position: float = np.nan
    last_peak: int = FAR_BEFORE


def _hold_rejected(x: np.ndarray, accepted: np.ndarray,
                   last_accepted: float) -> tuple[np.ndarray, float]:
    """Rejected samples (non-finite, or outside the running range: spikes) hold the last
    accepted value (``last_accepted`` before the chunk): a flat stretch has no beats, and
    the filters stay bounded. Returns the held samples and the new last accepted value."""
    if accepted.all():
        return x, (float(x[-1]) if len(x) else last_accepted)
    idx = np.where(accepted, np.arange(len(x)), -1)
    np.maximum.accumulate(idx, out=idx)
    filled = np.where(idx >= 0, x[np.maximum(idx, 0)], last_accepted)
    if accepted.any():
        last_accepted = float(x[accepted][-1])
    return filled, last_accepted


def _detection_signal(params: BeatParams, state: BeatState, x: np.ndarray):
    """The detection signal and the band-pass it is made from, for the chunk ``x`` after
    ``state``; returns ``(detect, band, zi_detect, zi_integrate)``."""
    band, zi_detect = causal_sos(params.detect_sos, x, state.zi_detect)
    prev = np.concatenate(([state.last_band], band[:-1]))
    detect, zi_integrate = _integrate(params, state, (band - prev) * params.fs)
    return detect, band, zi_detect, zi_integrate


def _integrate(params: BeatParams, state: BeatState, slope: np.ndarray):
    """The detection signal from the band-pass's slope: the slope itself (PPG), or the
    moving average of its square over ``params.integrate`` samples (ECG); returns it and
    the moving average's state after it."""
    if params.integrate == 0:
        return slope, state.zi_integrate
    taps = np.full(params.integrate, 1.0 / params.integrate)
    return signal.lfilter(taps, [1.0], slope ** 2, zi=state.zi_integrate)


def _parabolic(y: np.ndarray, i: int) -> float:
    """Sub-sample offset in [-0.5, 0.5] of the peak at ``y[i]`` from the parabola
    through ``y[i-1], y[i], y[i+1]``."""
    if i <= 0 or i >= len(y) - 1:
        return 0.0
    a, b, c = y[i - 1], y[i], y[i + 1]
    den = a - 2.0 * b + c
    if not den < 0:
        return 0.0
    return float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))


def _candidates(detect: np.ndarray, lo: int, hi: int, r: int) -> np.ndarray:
    """Indices ``lo <= u < hi`` where ``detect[u]`` is larger than the ``r`` values before
    it and not smaller than the ``r`` after it (values outside the array count as -inf)."""
    if hi <= lo:
        return np.empty(0, np.int64)
    base = max(lo - r, 0)
    seg = detect[base:hi + r]
    padded = np.concatenate((np.full(r, -np.inf), seg, np.full(r + 1, -np.inf)))
    windows = np.lib.stride_tricks.sliding_window_view(padded, r)
    u = np.arange(lo - base, hi - base)
    # Slices of the window view, not fancy indexing: reduced in place, never copied
    # into a (len(u), r) array (0.4 GB each for 4 h of PPG at 125 Hz).
    before = windows[lo - base:hi - base].max(axis=1)  # seg[u - r : u]
    after = windows[lo - base + r + 1:hi - base + r + 1].max(axis=1)  # seg[u + 1 : u + r + 1]
    keep = (seg[u] > before) & (seg[u] >= after)
    return u[keep] + base


def _r_wave(state: _ScanMemory, params: BeatParams, qrs: np.ndarray) -> tuple[int, float]:
    """Index in ``qrs`` (the QRS band-pass around one beat) of its R wave, and the
    polarity of the R waves: the extreme of the polarity most of the last beats had."""
    top, bottom = int(np.argmax(qrs)), int(np.argmin(qrs))
    up, down = max(qrs[top], 0.0), max(-qrs[bottom], 0.0)
    state.polarities.append((up - down) / (up + down) if up + down > 0 else 0.0)
    del state.polarities[:-POLARITY_BEATS]
    vote = sum(state.polarities)
    sign = (1.0 if up >= down else -1.0) if vote == 0 else float(np.sign(vote))
    return (top if sign > 0 else bottom), sign


def _aligned_offset(state: _ScanMemory, params: BeatParams, detect: np.ndarray,
                    kk: int) -> float:
    """Sub-sample offset of the PPG beat whose steepest sample is ``detect[kk]``: the lag
    that best aligns its upstroke derivative with the template (the mean of the last
    beats'), plus the template's own vertex; the beat's own vertex while there is no
    template or the best lag is at the edge of the range. Records the upstroke."""
    b, a, m = params.align_before, params.align_after, params.align_shift
    own = _parabolic(detect, kk)
    if kk - b - m < 0 or kk + a + m >= len(detect):
        return own
    segment = detect[kk - b - m:kk + a + m + 1]
    offset = own
    if len(state.upstrokes) >= TEMPLATE_MIN_BEATS:
        template = np.mean(state.upstrokes, axis=0)
        lo, hi = 0, len(template)
        if state.intervals:
            # Only the beat's own cycle: at fast rates the segment would reach into the
            # neighbouring beats, whose distance changes with the rhythm.
            half = int(CYCLE_SHARE * np.median(state.intervals) * params.fs)
            lo, hi = max(b - half, 0), min(b + half + 1, len(template))
        corr = np.array([np.dot(segment[u + lo:u + hi], template[lo:hi])
                         for u in range(2 * m + 1)])
        best = int(np.argmax(corr))
        if 0 < best < 2 * m:
            offset = best - m + _parabolic(corr, best) + _parabolic(template, b)
    state.upstrokes.append(segment[m:m + b + a + 1].copy())
    del state.upstrokes[:-TEMPLATE_BEATS]
    return offset


def _features(state: _ScanMemory, params: BeatParams, k: int, kk: int, detect: np.ndarray,
              feature: np.ndarray, level: np.ndarray, band: np.ndarray, offset: int):
    """Position and features of the accepted beat at raw index ``k`` (array index
    ``kk = k - offset``); updates the last-beat state."""
    s = params.search
    if params.kind == "ppg":
        peak = kk + int(np.argmax(feature[kk:kk + s + 1]))
        foot_lo = min(max(state.last_peak - offset, kk - params.max_gap, 0), kk)
        foot = feature[foot_lo:kk + 1].min()
        if params.align_before:
            position = k + _aligned_offset(state, params, detect, kk)
        else:
            position = k + _parabolic(detect, kk)
        amplitude = feature[peak] - foot
        # Mid-level of the beat: its baseline without most of the amplitude swing.
        intensity = 0.5 * (feature[peak] + foot)
    else:
        # The moving average peaks about half its length after the QRS: search back.
        lo, hi = max(kk - params.integrate - s, 0), kk + s // 2 + 1
        steepest = lo + 1 + int(np.argmax(np.abs(np.diff(band[lo:hi]))))
        q_lo = max(steepest - params.qrs_half, 0)
        r, sign = _r_wave(state, params, feature[q_lo:steepest + params.qrs_half + 1])
        peak = q_lo + r
        around = sign * feature[max(peak - 1, 0):peak + 2]
        position = peak + offset + _parabolic(around, min(peak, 1))
        q = params.qrs_half
        qrs = feature[max(peak - q, 0):peak + q + 1]
        # RMS over the QRS: it integrates the whole complex, so it is steadier than the
        # peak-to-peak value (smaller rate errors on BIDMC records 01-12).
        amplitude = np.sqrt(np.mean(qrs ** 2))
        beat_lo = state.last_peak - offset
        if 0 <= beat_lo < peak and peak + offset - state.last_peak <= params.max_gap:
            intensity = level[beat_lo + 1:peak + 1].mean()
        else:
            intensity = np.nan
    gap = k - state.last_index
    interval = np.nan
    if gap > params.max_gap:
        state.intervals.clear()
    else:
        interval = (position - state.last_position) / params.fs
        typical = np.median(state.intervals) if len(state.intervals) >= 3 else interval
        state.intervals.append(interval)
        del state.intervals[:-params.history]
        ratio = interval / typical
        if abs(ratio - 1.0) > params.interval_tolerance:
            # A premature (ectopic) or missed beat is not a breathing change: drop the
            # interval, and the shape of a premature beat.
            if ratio < 1.0:
                intensity = amplitude = np.nan
            interval = np.nan
    state.last_index, state.last_position = int(k), float(position)
    state.last_peak = int(peak + offset)
    return float(position), (float(intensity), float(amplitude), float(interval))


def _time_at(times: np.ndarray, position: float, offset: int) -> float:
    """Timestamp at sub-sample ``position`` (raw samples) by linear interpolation of
    ``times`` (which start at raw index ``offset``); extrapolated by the neighbouring
    step at the ends."""
    u = position - offset
    n = len(times)
    if n == 1:
        return float(times[0])
    i = int(min(max(np.floor(u), 0), n - 2))
    return float(times[i] + (u - i) * (times[i + 1] - times[i]))


def _scan(state: _ScanMemory, params: BeatParams, detect: np.ndarray, feature: np.ndarray,
          level: np.ndarray, band: np.ndarray, offset: int, k_stop: int, t: np.ndarray,
          t_offset: int) -> Beats:
    """Decide the candidates ``state.next_k <= k < k_stop``. Signal arrays start at raw
    index ``offset``, timestamps ``t`` at raw index ``t_offset`` (``t_offset <= offset``:
    ``t`` covers the signal history)."""
    cands = _candidates(detect, state.next_k - offset, k_stop - offset, params.refractory)
    state.next_k = max(state.next_k, k_stop)
    rows = []
    for kk in cands:
        k = int(kk + offset)
        height = detect[kk]
        if not height > 0:
            continue
        since = k - state.last_index
        if state.heights:
            # Against the upper quartile, not the median: were dicrotic waves ever
            # accepted, a median could settle between them and the beats and keep
            # accepting both. After a gap the bar halves every ``max_gap`` samples, so
            # a weaker pulse is learnt again while filter ringing (which dies away far
            # faster) is not taken for beats.
            bar = params.threshold_fraction * np.percentile(state.heights, 75.0)
            bar *= 0.5 ** (max(since - params.max_gap, 0) / params.max_gap)
            if height < bar:
                continue
        if since > params.max_gap:
            state.heights.clear()  # a new stretch: learn its beat height afresh
            state.polarities.clear()
            state.upstrokes.clear()
        state.heights.append(float(height))
        del state.heights[:-params.history]
        position, features = _features(state, params, k, int(kk), detect, feature, level,
                                       band, offset)
        ready = k + params.lookahead + 1
        rows.append((k, position, ready, t[ready - 1 - t_offset], features,
                     _time_at(t, position, t_offset)))
    if not rows:
        return Beats.empty()
    k, position, ready, ready_s, features, time_s = zip(*rows)
    return Beats(np.array(k, np.int64), np.array(position), np.array(ready, np.int64),
                 np.array(ready_s), np.array(features), np.array(time_s))


def _front_end(state: BeatState, x: np.ndarray, params: BeatParams):
    """The causal filters of one chunk after ``state``, one numpy call at a time (the
    twin of :func:`estimators._kernels.beat_front_end` that :func:`detect_batch` runs):
    ``(detect, feature, level, band, the held samples' last accepted value, the filter
    and limiter states after it)``. Pure: the limiter state is copied first."""
    limiter = state.limiter.copy()
    x, last_accepted = _hold_rejected(x, limit_step(params.limiter, limiter, x),
                                      state.last_accepted)
    detect, band, zi_detect, zi_integrate = _detection_signal(params, state, x)
    feature, zi_feature = causal_sos(params.feature_sos, x, state.zi_feature)
    level, zi_level = causal_sos(params.level_sos, x, state.zi_level)
    return (detect, feature, level, band, last_accepted,
            (zi_detect, zi_integrate, zi_feature, zi_level, limiter))


def detect_step(state: BeatState, x: np.ndarray, t: np.ndarray,
                params: BeatParams) -> tuple[BeatState, Beats]:
    """Filter one chunk and decide every candidate it completes (``step(state, inputs,
    params) -> (state, output)``): the filters run in the compiled
    :func:`estimators._kernels.beat_front_end` and the candidates are decided by
    :func:`estimators._kernels.scan_beats` (the numpy twin is :func:`detect_batch`).

    Parameters
    ----------
    state : carried state from :func:`beat_initial_state` (or a previous step); never
        changed.
    x, t : raw samples (non-finite ones and those outside the running range of
        ``params.limiter`` are held at the last accepted value) and their timestamps,
        1-D float64 of equal length.
    params : from :func:`beat_params`.

    Returns
    -------
    (the new state, the beats decided in this chunk).
    """
    n = len(x)
    if n == 0:
        return state, Beats.empty()
    x = np.ascontiguousarray(x, dtype=np.float64)
    limiter, zi_detect = state.limiter.copy(), state.zi_detect.copy()
    zi_feature, zi_level = state.zi_feature.copy(), state.zi_level.copy()
    slope, band, feature, level = np.empty(n), np.empty(n), np.empty(n), np.empty(n)
    last_accepted = _kernels.beat_front_end(
        x, limiter, params.limiter.block, params.limiter.rank, float(params.limiter.margin),
        MAX_ABS, state.last_accepted, params.detect_sos, zi_detect, params.feature_sos,
        zi_feature, params.level_sos, zi_level, state.last_band, params.fs, slope, band,
        feature, level)
    detect, zi_integrate = _integrate(params, state, slope)
    offset = state.count - len(state.detect)
    all_detect = np.concatenate((state.detect, detect))
    all_feature = np.concatenate((state.feature, feature))
    all_level = np.concatenate((state.level, level))
    all_band = np.concatenate((state.band, band))
    all_times = np.concatenate((state.times, np.asarray(t, dtype=np.float64)))
    count = state.count + n
    k_stop = count - params.lookahead
    scan, heights, intervals = state.scan.copy(), state.heights.copy(), state.intervals.copy()
    polarities, upstrokes = state.polarities.copy(), state.upstrokes.copy()
    room = max(k_stop - int(scan[_kernels.SCAN_NEXT]), 0) // (params.refractory + 1) + 1
    index, ready = np.empty(room, np.int64), np.empty(room, np.int64)
    position, ready_s, time_s = np.empty(room), np.empty(room), np.empty(room)
    features = np.empty((room, 3))
    n_beats = _kernels.scan_beats(
        all_detect, all_feature, all_level, all_band, all_times, offset, k_stop,
        params.kind == "ppg", params.fs, params.refractory, params.lookahead, params.search,
        params.integrate, params.qrs_half, params.max_gap, params.threshold_fraction,
        params.interval_tolerance, params.align_before, params.align_after,
        params.align_shift, CYCLE_SHARE, TEMPLATE_MIN_BEATS, scan, heights, intervals,
        polarities, upstrokes, index, position, ready, ready_s, features, time_s)
    keep = min(len(all_detect), params.keep)
    cut = len(all_detect) - keep
    new = BeatState(zi_detect, zi_integrate, zi_feature, zi_level, limiter, float(band[-1]),
                    float(last_accepted), count,
                    all_detect[cut:].copy(), all_feature[cut:].copy(), all_level[cut:].copy(),
                    all_band[cut:].copy(), all_times[cut:].copy(), scan, heights, intervals,
                    polarities, upstrokes)
    if n_beats == 0:
        return new, Beats.empty()
    return new, Beats(index[:n_beats], position[:n_beats], ready[:n_beats],
                      ready_s[:n_beats], features[:n_beats], time_s[:n_beats])


def _zero_phase(sos: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``sosfiltfilt`` with its edge padding shortened to what a short record holds."""
    padlen = min(3 * (2 * len(sos) + 1), len(x) - 1)
    return signal.sosfiltfilt(sos, x, padlen=max(padlen, 0))


def detect_batch(x: np.ndarray, t: np.ndarray, params: BeatParams,
                 zero_phase: bool = False) -> Beats:
    """Beats of a whole record in plain numpy: causal (the twin of :func:`detect_step`,
    equal to it over any chunking), or with ``zero_phase`` from forward-backward filtered
    signals (offline twin; the ECG moving average is then centred)."""
    if len(x) == 0:
        return Beats.empty()
    x = np.asarray(x, dtype=np.float64)
    t = np.asarray(t, dtype=np.float64)
    state = beat_initial_state(params)
    if not zero_phase:
        detect, feature, level, band = _front_end(state, x, params)[:4]
    else:
        x = _hold_rejected(x, limit_batch(params.limiter, x), state.last_accepted)[0]
        band = _zero_phase(params.detect_sos, x)
        detect = np.diff(band, prepend=band[0]) * params.fs
        if params.integrate:
            taps = np.full(params.integrate, 1.0 / params.integrate)
            detect = np.convolve(detect ** 2, taps, mode="same")
        feature = _zero_phase(params.feature_sos, x)
        level = _zero_phase(params.level_sos, x)
    return _scan(_ScanMemory(), params, detect, feature, level, band, 0,
                 len(x) - params.lookahead, t, 0)
