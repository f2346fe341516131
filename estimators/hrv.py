"""Beat-to-beat intervals: artifact correction and heart-rate variability (RMSSD, SDNN,
DFA alpha1), each as a causal step with carried state and a batch twin.

Chain, per beat source (beat times from :mod:`estimators.beats`):

1. :func:`correct_step` classifies the interval ending at each beat (``FLAGS``) two
   beats after it arrived (it needs the two following intervals), and gives the
   corrected normal-to-normal (NN) intervals; a flag is never dropped, so every changed
   interval can be traced to its beat.
2. :func:`hrv_step` computes, every ``hop_s`` seconds of stream time, RMSSD, SDNN and
   the mean NN interval over the last ``window_s`` (60 s) and DFA alpha1 over the last
   ``dfa_window_s`` (120 s), from the intervals decided by then.

Index vocabulary: ``i``, ``j`` beat (and the interval ending at that beat) within one run
of beats (a run ends at a gap longer than ``max_interval_s``); ``n`` DFA box size.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from estimators.errors import ParameterError

FLAGS = ("ok", "first", "missed", "extra", "ectopic", "long", "short")
"""Flag of the interval ending at a beat: ``ok``; ``first`` (no interval: the first beat
of a run); ``missed`` (a beat was missed inside it: split in two); ``extra`` (this beat
is a false detection: removed, its interval merged into the next beat's); ``ectopic``
(a premature beat, or the compensatory interval after one); ``long`` / ``short`` (an
interval out of line that none of the above explains). The last three are replaced by
the running median interval."""


@dataclass(frozen=True)
class CorrectionParams:
    """Artifact-correction settings (defaults from Lipponen & Tarvainen 2019, see
    :func:`correct_step`).

    ``spread_beats`` intervals give the thresholds' quartile deviations, ``median_beats``
    the running median interval; thresholds are ``scale`` quartile deviations, never
    below ``scale * min_deviation_ms``; ``c1``, ``c2`` shape the ectopic decision
    boundary; an interval longer than ``max_interval_s`` is a gap (the next beat starts
    a new run).
    """

    spread_beats: int = 91
    median_beats: int = 11
    scale: float = 5.2
    c1: float = 0.13
    c2: float = 0.17
    min_deviation_ms: float = 2.0
    max_interval_s: float = 3.0

    def __post_init__(self):
        if self.spread_beats < 4:
            raise ParameterError(f"spread_beats={self.spread_beats} must be >= 4")
        if self.median_beats < 3 or self.median_beats % 2 == 0:
            raise ParameterError(f"median_beats={self.median_beats} must be odd and >= 3")
        for name in ("scale", "min_deviation_ms", "max_interval_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ParameterError(f"{name}={value} must be > 0")

    LOOKAHEAD = 2
    """Intervals after the one decided that the decision reads."""


@dataclass(frozen=True)
class BeatRow:
    """One decided beat: its time, the raw interval ending at it (ms; NaN for
    ``first``), its flag, the corrected interval (ms; NaN for ``first`` and ``extra``;
    half the raw interval for ``missed``, which stands for two), the timestamp at which
    it was decided (``decided_s``) and ``delay_s = decided_s - time_s``."""

    time_s: float
    interval_ms: float
    flag: str
    nn_ms: float
    decided_s: float

    @property
    def delay_s(self) -> float:
        return self.decided_s - self.time_s


@dataclass
class CorrectionState:
    """What :func:`correct_step` carries for the current run of beats (from run index
    ``first`` on; beats judged ``extra`` are taken out): their times, raw intervals (ms,
    to the beat detected before, NaN for the run's first) and working intervals (raw,
    except that an extra beat's interval is added to the next beat's, so the beats after
    it are judged on the interval the heart made); ``decided`` beats of the run.
    Replaced (median) values are not fed back: a false flag would then make the next
    interval look out of line too."""

    times: list = field(default_factory=list)
    raw: list = field(default_factory=list)
    work: list = field(default_factory=list)
    first: int = 0
    decided: int = 0
    runs: int = 0
    last_ready_s: float = math.nan


def correction_initial_state() -> CorrectionState:
    """No beat seen."""
    return CorrectionState()


def _quartile_deviation(values: np.ndarray) -> float:
    q1, q3 = np.percentile(values, [25.0, 75.0])
    return 0.5 * (q3 - q1)


def _running_median(r: np.ndarray, lo: int, hi: int, end: int, params: CorrectionParams
                    ) -> np.ndarray:
    """Median interval at each ``i`` in ``lo..hi-1``: of ``r[i - 8 .. i + 2]`` (for 11
    beats; clipped to the run: ``r[1:end]``)."""
    before = params.median_beats - 1 - CorrectionParams.LOOKAHEAD
    a, b = max(lo - before, 1), min(hi + CorrectionParams.LOOKAHEAD, end)
    padded = np.full(params.median_beats + (hi - lo) - 1, np.nan)
    # padded[u] holds r[lo - before + u]
    padded[a - (lo - before):b - (lo - before)] = r[a:b]
    windows = np.lib.stride_tricks.sliding_window_view(padded, params.median_beats)
    return np.nanmedian(windows, axis=1)


def classify(r: np.ndarray, j: int, params: CorrectionParams) -> tuple[str, float]:
    """Flag and corrected value (ms) of interval ``j`` of a run (``j >= 1``).

    ``r`` holds the run's intervals in ms (``r[0]`` is NaN: the run's first beat has no
    interval; an extra beat already merged into the next) up to at least ``j + 2`` or up to the
    run's end; only ``r[1:j + 3]`` is read, and of that only the last ``spread_beats +
    median_beats`` values.
    See :func:`correct_step` for the rule.
    """
    end = min(len(r), j + 3)
    lookahead = CorrectionParams.LOOKAHEAD
    # dRR (differences of successive intervals) and their threshold over the
    # spread_beats differences ending at j + 2 (or the run's end).
    d_lo = max(2, end - params.spread_beats)
    d = np.zeros(j + lookahead + 2)  # index i: dRR_i; 0 where unknown (no evidence)
    d[d_lo:end] = r[d_lo:end] - r[d_lo - 1:end - 1]
    th1 = params.scale * max(_quartile_deviation(d[d_lo:end]) if end > d_lo else 0.0,
                             params.min_deviation_ms)
    ds = d / th1
    # Difference from the running median (doubled when negative, so short intervals
    # weigh like long ones) and its threshold over the spread_beats values ending at j.
    m_lo = max(1, j - params.spread_beats + 1)
    med = _running_median(r, m_lo, j + 1, end, params)
    m = r[m_lo:j + 1] - med
    m = np.where(m < 0, 2.0 * m, m)
    th2 = params.scale * max(_quartile_deviation(np.abs(m)), params.min_deviation_ms)
    median_j = float(med[-1])
    c1, c2 = params.c1, params.c2

    def ectopic_at(i):
        s11 = ds[i]
        s12 = max(ds[i - 1], ds[i + 1]) if s11 > 0 else min(ds[i - 1], ds[i + 1])
        return (s11 > 1 and s12 < -c1 * s11 - c2) or (s11 < -1 and s12 > -c1 * s11 + c2)

    if ectopic_at(j) or (ds[j] < -1 and ectopic_at(j + 1)):
        # The rule fires at the compensatory interval after a premature beat; the
        # premature (short) interval before it is ectopic too.
        return "ectopic", median_j
    s21 = ds[j]
    s22 = min(ds[j + 1], ds[j + 2]) if s21 >= 0 else max(ds[j + 1], ds[j + 2])
    out_of_line = (s21 > 1 and s22 < -1) or (s21 < -1 and s22 > 1) or abs(m[-1] / th2) > 3
    if not out_of_line:
        return "ok", float(r[j])
    if abs(r[j] / 2.0 - median_j) < th2:
        return "missed", float(r[j]) / 2.0
    if j + 1 < end and abs(r[j] + r[j + 1] - median_j) < th2:
        return "extra", math.nan
    return ("long" if r[j] > median_j else "short"), median_j


def _decide(state: CorrectionState, params: CorrectionParams, decided_s: float,
            final: bool) -> list[BeatRow]:
    """Decide every beat of the current run whose lookahead is complete (all of them
    when ``final``)."""
    rows = []
    reach = params.spread_beats + params.median_beats  # what classify reads back
    lookahead = CorrectionParams.LOOKAHEAD
    while True:
        n = state.first + len(state.times)  # beats of the run kept so far
        j = state.decided
        if not (j < n and (final or j + lookahead < n)):
            break
        u = j - state.first
        if j == 0:
            rows.append(BeatRow(state.times[u], math.nan, "first", math.nan, decided_s))
            state.decided += 1
            continue
        ahead = min(lookahead, n - 1 - j)
        base = max(0, u - reach)
        work = np.asarray(state.work[base:u + ahead + 1], dtype=np.float64)
        flag, nn = classify(work, u - base, params)
        raw = state.raw[u]
        if flag == "extra":
            # Take the beat out: the next beat's interval spans both.
            rows.append(BeatRow(state.times[u], raw, flag, math.nan, decided_s))
            state.work[u + 1] += state.work[u]
            for name in ("times", "raw", "work"):
                del getattr(state, name)[u]
            continue
        if flag == "ok":
            nn = state.work[u]  # raw, or the merged interval after an extra beat
        rows.append(BeatRow(state.times[u], raw, flag, float(nn), decided_s))
        state.decided += 1
    keep = reach + lookahead + 4
    if len(state.times) > keep:
        cut = len(state.times) - keep
        for name in ("times", "raw", "work"):
            del getattr(state, name)[:cut]
        state.first += cut
    return rows


def correct_step(state: CorrectionState, time_s: np.ndarray, ready_s: np.ndarray,
                 params: CorrectionParams, final: bool = False, now_s: float = math.nan
                 ) -> tuple[CorrectionState, list[BeatRow]]:
    r"""Classify and correct the intervals ending at newly detected beats.

    Parameters
    ----------
    state : from :func:`correction_initial_state` (updated in place, returned).
    time_s : times of the new beats (s), increasing; ``ready_s`` when each was detected.
    params : :class:`CorrectionParams`.
    final : decide the beats still waiting for their lookahead (end of a run or of the
        record) with the intervals there are; they are decided at ``now_s`` (default:
        when the newest beat was detected).

    Returns
    -------
    (state, rows): one :class:`BeatRow` per beat decided, in order. A beat is decided
    when the second beat after it is detected (``decided_s`` is that beat's
    ``ready_s``), or at a gap or the end.

    Notes
    -----
    After Lipponen & Tarvainen, "A robust algorithm for heart rate variability time
    series artefact correction using novel beat classification", J. Med. Eng. Technol.
    43(3), 2019, made causal. With intervals :math:`RR_i` (ms) and
    :math:`dRR_i = RR_i - RR_{i-1}`:

    * :math:`dRRs_i = dRR_i / Th_1`, :math:`Th_1 = 5.2\,QD(dRR)` over the 91
      differences ending at :math:`j + 2` (QD: quartile deviation, half the
      inter-quartile range, of the signed differences: with their absolute values the
      threshold halves and regular sinus variability is flagged several times per
      thousand beats; the published method centres its windows, a live one cannot);
    * :math:`mRR_i = RR_i - \mathrm{med}_i` (doubled when negative), with
      :math:`\mathrm{med}_i` the median of :math:`RR_{i-8..i+2}`;
      :math:`mRRs_j = mRR_j / Th_2`, :math:`Th_2 = 5.2\,QD(|mRR|)` over the 91
      values ending at :math:`j`;
    * **ectopic**: :math:`S_{11} = dRRs_j`, :math:`S_{12}` the larger (if
      :math:`S_{11} > 0`) or smaller of :math:`dRRs_{j \pm 1}`; ectopic when
      :math:`S_{11} > 1 \wedge S_{12} < -c_1 S_{11} - c_2` or
      :math:`S_{11} < -1 \wedge S_{12} > -c_1 S_{11} + c_2`
      (:math:`c_1 = 0.13`, :math:`c_2 = 0.17`); the short interval just before an
      ectopic one is flagged too (the premature beat);
    * **out of line** when :math:`S_{21} = dRRs_j` and :math:`S_{22}`, the smaller (if
      :math:`S_{21} \ge 0`) or larger of :math:`dRRs_{j+1}, dRRs_{j+2}`, have
      opposite signs beyond 1, or :math:`|mRRs_j| > 3`; then **missed** if
      :math:`|RR_j / 2 - \mathrm{med}_j| < Th_2` (split in two), **extra** if
      :math:`|RR_j + RR_{j+1} - \mathrm{med}_j| < Th_2` (the beat is removed and the
      next beat carries the merged interval, flagged ``ok``), else **long** or
      **short**.

    Ectopic, long and short intervals are replaced by :math:`\mathrm{med}_j` (the
    published method interpolates; the median is our simpler choice). Thresholds
    never fall below 5.2 x 2 ms, the timing resolution of typical beat times (our own
    choice), so a perfectly regular rhythm is not flagged for sub-millisecond jitter.
    """
    rows: list[BeatRow] = []
    max_ms = 1e3 * params.max_interval_s
    for t_i, ready in zip(np.asarray(time_s, float), np.asarray(ready_s, float)):
        interval = 1e3 * (t_i - state.times[-1]) if state.times else math.nan
        if interval > max_ms:
            rows += _decide(state, params, float(ready), final=True)
            state.times, state.raw, state.work = [], [], []
            state.first = state.decided = 0
            interval = math.nan
        if not state.times:
            state.runs += 1
        state.times.append(float(t_i))
        state.last_ready_s = float(ready)
        state.raw.append(interval)
        state.work.append(interval)
        rows += _decide(state, params, float(ready), final=False)
    if final and state.times:
        if math.isnan(now_s):
            now_s = float(ready_s[-1]) if len(ready_s) else state.last_ready_s
        rows += _decide(state, params, now_s, final=True)
    return state, rows


def correct_batch(time_s: np.ndarray, ready_s: np.ndarray | None = None,
                  params: CorrectionParams = CorrectionParams()) -> list[BeatRow]:
    """All beats of a record at once (the twin of :func:`correct_step` over any
    chunking, with ``final`` at the end). ``ready_s`` defaults to ``time_s``."""
    time_s = np.asarray(time_s, dtype=np.float64)
    ready_s = time_s if ready_s is None else np.asarray(ready_s, dtype=np.float64)
    return correct_step(correction_initial_state(), time_s, ready_s, params, final=True)[1]


# ------------------------------------------------------------------------ HRV


@dataclass(frozen=True)
class HrvParams:
    """HRV settings: a row every ``hop_s`` seconds of stream time; RMSSD, SDNN and the
    mean NN interval over the ``window_s`` before the newest decided beat, given at
    least ``min_intervals`` NN intervals; DFA alpha1 over ``dfa_window_s`` with box
    sizes ``box_min..box_max`` beats, given at least ``min_dfa_intervals`` intervals of
    one run and at most ``max_corrected_share`` of them corrected.

    Notes
    -----
    60 s for RMSSD is the ultra-short window common in sport science; 120 s and boxes of
    4-16 beats for DFA alpha1 as in Rogers et al., "A new detection method defining the
    aerobic threshold for endurance exercise and training prescription based on fractal
    correlation properties of heart rate variability", Front. Physiol. 11, 2021 (from
    memory). ``min_dfa_intervals`` = 64: four boxes of the largest size (our own
    choice). ``max_corrected_share`` = 5 %: Rogers et al. (Sensors 21, 2021) found 1-3 %
    artifacts bias alpha1 little and 6 % by up to 19 % (from memory). ``min_intervals``
    = 20 is our own choice (a minute of beats at 20 per minute, a third of the window
    at 60).
    """

    hop_s: float = 5.0
    window_s: float = 60.0
    dfa_window_s: float = 120.0
    box_min: int = 4
    box_max: int = 16
    min_intervals: int = 20
    min_dfa_intervals: int = 64
    max_corrected_share: float = 0.05

    def __post_init__(self):
        for name in ("hop_s", "window_s", "dfa_window_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ParameterError(f"{name}={value} must be > 0")
        if not 3 <= self.box_min < self.box_max:
            raise ParameterError(f"box_min={self.box_min}, box_max={self.box_max}: need "
                                 "3 <= box_min < box_max")
        if self.min_dfa_intervals < 2 * self.box_max:
            raise ParameterError(f"min_dfa_intervals={self.min_dfa_intervals} must be >= "
                                 f"2 * box_max = {2 * self.box_max}")
        if self.min_intervals < 3:
            raise ParameterError(f"min_intervals={self.min_intervals} must be >= 3")
        if not 0 <= self.max_corrected_share <= 1:
            raise ParameterError(f"max_corrected_share={self.max_corrected_share} must be "
                                 "in [0, 1]")


@dataclass(frozen=True)
class HrvRow:
    """HRV at stream time ``emitted_s``, over the windows ending at the newest beat
    decided by then (``window_end_s``; NaN when there is none). Values are NaN when
    there are too few intervals; ``corrected_share`` and ``n_intervals`` describe the
    ``window_s`` window."""

    emitted_s: float
    window_end_s: float
    rmssd_ms: float
    sdnn_ms: float
    mean_nn_ms: float
    corrected_share: float
    n_intervals: int
    dfa_alpha1: float


def dfa_alpha1(nn_ms: np.ndarray, box_min: int = 4, box_max: int = 16) -> float:
    r"""Short-term scaling exponent of detrended fluctuation analysis.

    Notes
    -----
    Peng, Havlin, Stanley & Goldberger, "Quantification of scaling exponents and
    crossover phenomena in nonstationary heartbeat time series", Chaos 5(1), 1995: the
    profile :math:`y_k = \sum_{i \le k} (x_i - \bar x)` is cut into
    :math:`\lfloor N/n \rfloor` non-overlapping boxes of ``n`` intervals from the
    start; in each, the least-squares line is removed;
    :math:`F(n) = \sqrt{\mathrm{mean}(\text{residual}^2)}` over all boxes; alpha1 is
    the least-squares slope of :math:`\log F(n)` on :math:`\log n`,
    ``n = box_min..box_max``. NaN when ``x`` is shorter than ``2 * box_max`` or flat.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> round(dfa_alpha1(rng.normal(800.0, 30.0, 4000)), 1)  # white noise: about 0.5
    0.6
    """
    x = np.asarray(nn_ms, dtype=np.float64)
    if len(x) < 2 * box_max or not np.all(np.isfinite(x)):
        return math.nan
    y = np.cumsum(x - x.mean())
    sizes = np.arange(box_min, box_max + 1)
    fluct = np.empty(len(sizes))
    for s, n in enumerate(sizes):
        boxes = y[:len(y) // n * n].reshape(-1, n)
        u = np.arange(n) - 0.5 * (n - 1)  # centred, so mean and slope separate
        slope = boxes @ u / (u @ u)
        residual = boxes - boxes.mean(axis=1, keepdims=True) - slope[:, None] * u
        fluct[s] = math.sqrt(np.mean(residual ** 2))
    if not np.all(fluct > 0):
        return math.nan
    return float(np.polyfit(np.log(sizes), np.log(fluct), 1)[0])


@dataclass
class NnIntervals:
    """Corrected NN intervals: ``time_s`` (end of each), ``nn_ms``, ``corrected``,
    ``run`` (intervals of one run follow each other), ``decided_s``."""

    time_s: list = field(default_factory=list)
    nn_ms: list = field(default_factory=list)
    corrected: list = field(default_factory=list)
    run: list = field(default_factory=list)
    decided_s: list = field(default_factory=list)
    runs: int = 0

    def add(self, row: BeatRow) -> None:
        """The NN intervals of one decided beat (none for ``first`` and ``extra``; two
        for ``missed``)."""
        if row.flag == "first":
            self.runs += 1
            return
        if row.flag == "extra":
            return
        if row.flag == "missed":
            self._append(row.time_s - 1e-3 * row.nn_ms, row.nn_ms, True, row.decided_s)
        self._append(row.time_s, row.nn_ms, row.flag != "ok" or row.nn_ms != row.interval_ms,
                     row.decided_s)

    def _append(self, time_s, nn_ms, corrected, decided_s):
        self.time_s.append(time_s)
        self.nn_ms.append(nn_ms)
        self.corrected.append(corrected)
        self.run.append(self.runs)
        self.decided_s.append(decided_s)

    def drop_before(self, time_s: float) -> None:
        cut = int(np.searchsorted(np.asarray(self.time_s), time_s, side="left"))
        for name in ("time_s", "nn_ms", "corrected", "run", "decided_s"):
            del getattr(self, name)[:cut]


def hrv_at(emitted_s: float, nn: NnIntervals, params: HrvParams) -> HrvRow:
    """HRV at ``emitted_s`` from the intervals in ``nn`` decided by then."""
    decided = np.asarray(nn.decided_s)
    count = int(np.searchsorted(decided, emitted_s, side="right"))  # decided in order
    empty = HrvRow(emitted_s, math.nan, math.nan, math.nan, math.nan, math.nan, 0, math.nan)
    if count == 0:
        return empty
    t = np.asarray(nn.time_s[:count])
    x = np.asarray(nn.nn_ms[:count])
    corrected = np.asarray(nn.corrected[:count], dtype=bool)
    run = np.asarray(nn.run[:count])
    end = float(t[-1])
    inside = t > end - params.window_s
    n = int(inside.sum())
    share = float(corrected[inside].mean()) if n else math.nan
    rmssd = sdnn = mean = math.nan
    if n >= params.min_intervals:
        xi, ri = x[inside], run[inside]
        same = ri[1:] == ri[:-1]  # no successive difference across a gap
        diffs = np.diff(xi)[same]
        rmssd = math.sqrt(np.mean(diffs ** 2)) if len(diffs) else math.nan
        sdnn = float(np.std(xi, ddof=1))
        mean = float(xi.mean())
    alpha = math.nan
    dfa = (t > end - params.dfa_window_s) & (run == run[-1])
    if dfa.sum() >= params.min_dfa_intervals and \
            corrected[dfa].mean() <= params.max_corrected_share:
        alpha = dfa_alpha1(x[dfa], params.box_min, params.box_max)
    return HrvRow(emitted_s, end, rmssd, sdnn, mean, share, n, alpha)


@dataclass
class HrvState:
    """What :func:`hrv_step` carries: the NN intervals still inside the longest window
    and the next emission time (NaN before the first sample)."""

    nn: NnIntervals = field(default_factory=NnIntervals)
    next_emit_s: float = math.nan


def hrv_initial_state() -> HrvState:
    """Nothing seen."""
    return HrvState()


def hrv_step(state: HrvState, rows: list[BeatRow], first_s: float, newest_s: float,
             params: HrvParams) -> tuple[HrvState, list[HrvRow]]:
    """HRV rows for every multiple of ``hop_s`` in ``(previous newest, newest_s]``.

    Parameters
    ----------
    state : from :func:`hrv_initial_state` (updated in place, returned).
    rows : beats decided since the last call (:func:`correct_step`), in order.
    first_s : timestamp of the chunk's first sample (the grid starts after the first
        chunk's: at the first multiple of ``hop_s`` after the first sample).
    newest_s : timestamp of the newest sample seen.
    params : :class:`HrvParams`.
    """
    if math.isnan(state.next_emit_s):
        if not math.isfinite(first_s):
            return state, []
        state.next_emit_s = (math.floor(first_s / params.hop_s) + 1) * params.hop_s
    for row in rows:
        state.nn.add(row)
    out = []
    while state.next_emit_s <= newest_s:
        out.append(hrv_at(state.next_emit_s, state.nn, params))
        state.next_emit_s += params.hop_s
    if state.nn.time_s:
        # Keep what the longest window can still need (the newest beat moves forward).
        longest = max(params.window_s, params.dfa_window_s)
        state.nn.drop_before(state.nn.time_s[-1] - longest - 10.0 * params.hop_s - 10.0)
    return state, out


def hrv_batch(rows: list[BeatRow], first_s: float, newest_s: float,
              params: HrvParams = HrvParams()) -> list[HrvRow]:
    """HRV rows of a whole record (the twin of :func:`hrv_step` over any split of the
    rows and samples)."""
    return hrv_step(hrv_initial_state(), rows, first_s, newest_s, params)[1]


# ------------------------------------------------------------------ composition


class BeatAnalysis:
    """Beats, corrected intervals and HRV of one PPG or ECG channel, live
    (:meth:`update`, :meth:`finish`) or over a whole record (:meth:`offline`).

    A gap in the timestamps (:func:`estimators.monitor.find_gaps`, the engine's rule)
    ends the run of beats: the beats waiting for their lookahead are decided with what
    there is, the detector starts afresh after the gap, and no interval or successive
    difference spans it.

    Examples
    --------
    >>> fs = 250.0
    >>> t = np.arange(int(60 * fs)) / fs
    >>> ecg = np.exp(-0.5 * (((t + 0.4) % 0.8 - 0.4) / 0.01) ** 2)  # a spike every 0.8 s
    >>> analysis = BeatAnalysis("ecg", fs)
    >>> rows, hrv_rows = analysis.update(ecg, t)
    >>> round(float(np.median([r.interval_ms for r in rows if r.flag == "ok"])))
    800
    """

    def __init__(self, kind: str, fs: float, correction: CorrectionParams = CorrectionParams(),
                 hrv: HrvParams = HrvParams()):
        from estimators.beats import beat_params
        self.kind, self.fs = kind, float(fs)
        self.beat_params = beat_params(kind, fs)
        self.correction, self.hrv = correction, hrv
        self.reset()

    def reset(self) -> None:
        """Forget everything (a new session)."""
        from estimators.beats import beat_initial_state
        self.beat_state = beat_initial_state(self.beat_params)
        self.correction_state = correction_initial_state()
        self.hrv_state = hrv_initial_state()
        self.newest_s = math.nan

    def _end_run(self, now_s: float) -> list[BeatRow]:
        from estimators.beats import beat_initial_state
        _, rows = correct_step(self.correction_state, np.empty(0), np.empty(0),
                               self.correction, final=True, now_s=now_s)
        self.correction_state = correction_initial_state()
        self.beat_state = beat_initial_state(self.beat_params)
        return rows

    def update(self, x: np.ndarray, t: np.ndarray) -> tuple[list[BeatRow], list[HrvRow]]:
        """Feed one chunk (raw samples and timestamps); returns the beats decided and the
        HRV rows due in it."""
        from estimators.beats import detect_step
        from estimators.monitor import find_gaps
        x = np.asarray(x, dtype=np.float64)
        t = np.asarray(t, dtype=np.float64)
        if len(t) == 0:
            return [], []
        rows: list[BeatRow] = []
        starts = find_gaps(t, self.fs, self.newest_s).tolist()
        bounds = sorted({0, *starts, len(t)})
        for a, b in zip(bounds[:-1], bounds[1:]):
            if a in starts:  # decided when the first sample after the gap comes
                rows += self._end_run(float(t[a]))
            self.beat_state, beats = detect_step(self.beat_state, x[a:b], t[a:b],
                                                 self.beat_params)
            self.correction_state, decided = correct_step(
                self.correction_state, beats.time_s, beats.ready_s, self.correction)
            rows += decided
        first_s = float(t[0])
        self.newest_s = float(np.nanmax([self.newest_s, t[-1]]))
        self.hrv_state, hrv_rows = hrv_step(self.hrv_state, rows, first_s, self.newest_s,
                                            self.hrv)
        return rows, hrv_rows

    def finish(self) -> list[BeatRow]:
        """At the end of the stream: decide the beats still waiting for their lookahead
        (no HRV row follows them)."""
        return self._end_run(self.newest_s)

    def offline(self, x: np.ndarray, t: np.ndarray) -> tuple[list[BeatRow], list[HrvRow]]:
        """The whole record at once, beats from zero-phase filtered signals (the offline
        twin); the record is cut at its gaps like the live path."""
        from estimators.beats import detect_batch
        from estimators.monitor import find_gaps
        x = np.asarray(x, dtype=np.float64)
        t = np.asarray(t, dtype=np.float64)
        if len(t) == 0:
            return [], []
        cuts = [0, *find_gaps(t, self.fs).tolist(), len(t)]
        rows: list[BeatRow] = []
        for a, b in zip(cuts[:-1], cuts[1:]):
            beats = detect_batch(x[a:b], t[a:b], self.beat_params, zero_phase=True)
            rows += correct_batch(beats.time_s, beats.time_s, self.correction)
        return rows, hrv_batch(rows, float(t[0]), float(np.nanmax(t)), self.hrv)
