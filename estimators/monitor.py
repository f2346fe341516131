"""The engine: composes pre-processing, sliding STFT, de-shape, tracker and quality
for a set of channels and a profile.

``RateMonitor(channels, fs, profile).update(samples, timestamps) -> list[Estimate]``

* every PPG or ECG channel gives a heart-rate estimate (``source`` = its name);
* two or more heart-rate channels also give a ``fused`` estimate from the
  integrity-weighted mean of their normalised de-shape spectra;
* every respiration channel gives a breathing-rate estimate;
* with ``profile.breathing_from_pulse``, every PPG or ECG channel sampled at
  :data:`estimators.respiration.MIN_FS_HZ` or faster also gives a
  breathing-rate estimate from its respiratory modulations
  (:class:`estimators.respiration.PulseBreathing`, ``source`` = its name);
* accelerometer channels are accepted as motion references (their spectra are formed
  on the heart-rate grid and exposed in :attr:`RateMonitor.motion_spectra`); with a
  profile whose heart-rate settings set ``motion`` (``exercise-wrist``), every PPG
  heart-rate channel goes through the motion stage (:mod:`estimators.motion`) before
  tracking and fusion, and a rate on a motion line loses confidence.

Gaps: a step between consecutive timestamps longer than :func:`gap_threshold_s` is a
gap (:func:`find_gaps`). No window may span one: the monitor restarts every path after
it, so the first estimates after a gap come from samples after it only, one start-up
window later, and :attr:`RateMonitor.last_gaps` tells the caller where it restarted.

The offline twin (:func:`offline_estimates`) runs the same chain over a whole record
(each stretch between gaps on its own) with zero-phase filters, forward-backward
posteriors and a Viterbi ridge.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from estimators import breathing_confidence
from estimators import calibration as calibration_mod
from estimators import deshape as deshape_mod
from estimators import evidence as evidence_mod
from estimators import motion as motion_mod
from estimators import quality as quality_mod
from estimators import rate_now as now_mod
from estimators import refine as refine_mod
from estimators import tracker as tracker_mod
from estimators.config import PROFILES, SIGNAL_KINDS, Profile, RateSettings, get_profile
from estimators.errors import ParameterError
from estimators.estimate import Estimate
from estimators.preprocess import Analysis, Limiter, Preprocessor, STUCK_RUN_S
from estimators.respiration import MIN_FS_HZ, PulseBreathing
from estimators.stft import (Columns, HopGatherer, SlidingSTFT, batch_hop_count,
                             gather_hops, stft_blocks)

FUSED = "fused"

GAP_PERIODS = 3.0
GAP_MIN_S = 0.25
"""A step between consecutive timestamps longer than ``max(GAP_PERIODS / fs, GAP_MIN_S)``
is a gap (:func:`gap_threshold_s`). Three periods: two or more samples missing, which
neither a one-sample hiccup nor a time column written with few digits causes. A quarter
of a second: well above the jitter of senders that stamp samples on arrival (tens of
milliseconds), and a hole this short cannot hide a change of rate (at most 1 bpm at the
fastest change the profiles follow, 3-8 bpm/s), costs at most one hop of samples and
shifts a spliced 8 s window by 3 % of its length, whereas restarting costs a whole
start-up window of estimates. Our own choice."""


def gap_threshold_s(fs: float) -> float:
    """Longest step between consecutive timestamps that is not a gap (seconds)."""
    return max(GAP_PERIODS / fs, GAP_MIN_S)


@dataclass(frozen=True)
class Gap:
    """A hole in the time axis: ``before_s`` is the last timestamp before it,
    ``after_s`` the first after it, ``missing_s = after_s - before_s - 1 / fs`` the
    time without samples."""

    before_s: float
    after_s: float
    missing_s: float


def find_gaps(timestamps: np.ndarray, fs: float, newest_s: float = np.nan) -> np.ndarray:
    """Indices ``k`` of the samples that follow a gap: the step from the newest earlier
    timestamp (``newest_s`` before the first sample; NaN: none) to ``timestamps[k]``
    exceeds :func:`gap_threshold_s`. Timestamps that go backwards or repeat are never a
    gap (they are labelled with the newest one seen, :func:`monotone_times`).

    >>> find_gaps(np.array([0.0, 0.01, 0.02, 5.0, 5.01, 4.0, 5.02]), 100.0).tolist()
    [3]
    """
    labels = monotone_times(np.asarray(timestamps, dtype=np.float64), newest_s)
    return _gap_starts(labels, newest_s, gap_threshold_s(fs))


def _gap_starts(labels: np.ndarray, newest_s: float, threshold_s: float) -> np.ndarray:
    """:func:`find_gaps` on labels from :func:`monotone_times` (never decreasing)."""
    if len(labels) == 0:
        return np.empty(0, np.int64)
    with np.errstate(invalid="ignore"):  # infinite timestamps: inf - inf
        inner = np.flatnonzero(np.diff(labels) > threshold_s) + 1
        if labels[0] - newest_s > threshold_s:  # NaN (nothing seen before) compares False
            return np.concatenate(([0], inner))
    return inner


@dataclass(frozen=True)
class PathGeometry:
    """Sample-count geometry of one path, derived from the settings and ``fs``."""

    decimation: int
    fs_analysis: float
    window: int
    min_window: int
    hop: float
    n_fft: int
    recent: int = 0
    """Samples of the end-weighted column over the newest part of the window (0: none)."""

    @classmethod
    def of(cls, settings: RateSettings, fs: float) -> "PathGeometry":
        m_dec = settings.decimation(fs)
        fs_a = fs / m_dec
        window = max(4, int(round(settings.window_s * fs_a)))
        min_window = max(4, min(window, int(round(settings.min_window_s * fs_a))))
        n_fft = max(settings.n_fft(fs_a), 1 << int(np.ceil(np.log2(window))))
        recent = (0 if settings.recent_window_s == 0 else
                  max(2, min(window, int(round(settings.recent_window_s * fs_a)))))
        return cls(m_dec, fs_a, window, min_window, settings.hop_s * fs_a, n_fft, recent)


@dataclass(frozen=True)
class HopBlock:
    """Per-hop output of a channel path: band spectra (P, F) and hop facts (P,)."""

    spectra: np.ndarray
    time_s: np.ndarray
    emitted_s: np.ndarray
    integrity: np.ndarray
    magnitude: np.ndarray | None = None
    """Band of the plain STFT magnitude (P, F): where the rate is read off, near the
    ridge the tracker picked (its peak is not pulled by the de-shape mask's slope)."""
    columns: np.ndarray | None = None
    """Complex one-sided STFT columns (P, n_fft // 2 + 1), kept only when the motion
    stage needs them (:mod:`estimators.motion`)."""
    motion_lines: np.ndarray | None = None
    """Motion-line marks in [0, 1] on the band's bins (P, F) from the motion stage; they
    lower the confidence of a rate on a line."""
    reference_integrity: np.ndarray | None = None
    """Motion stage only (P,): the lowest integrity of the motion references' windows at
    each hop (0 when a profile with the motion stage has no reference channel). Low
    when the accelerometer is missing: the estimate then lacks the stage that makes
    running data trustworthy, and the confidence says so (:mod:`estimators.evidence`)."""
    recent: np.ndarray | None = None
    """Band spectra (P, F) of the end-weighted columns over the newest part of each
    window (made like ``spectra``: de-shape or plain), or None when the settings ask for
    none. Their peak is the rate the newest samples carry (:mod:`estimators.rate_now`)."""
    refine: np.ndarray | None = None
    """Motion stage only: band spectra (P, F) the tracked rate is refined on, the
    harmonic sum of the canceller's residual with no motion gain
    (:mod:`estimators.refine`)."""

    def __len__(self) -> int:
        return len(self.time_s)


def column_spectra(columns: Columns, grid: deshape_mod.DeshapeGrid,
                   settings: RateSettings) -> tuple[np.ndarray, np.ndarray]:
    """Band spectra of the columns (de-shape by default, else plain magnitude) and the
    band of the plain magnitude."""
    if len(columns) == 0:
        empty = np.empty((0, len(grid.freqs_hz)))
        return empty, empty
    if settings.sharpen:
        magnitude = deshape_mod.squeeze(columns.spectra, columns.spectra_dw, grid.n_fft)
    else:
        magnitude = np.abs(columns.spectra)
    band = deshape_mod.plain(magnitude, grid)
    if settings.deshape:
        return deshape_mod.deshape(magnitude, grid, settings.gamma), band
    return band, band


def recent_spectra(columns: Columns, grid: deshape_mod.DeshapeGrid,
                   settings: RateSettings) -> np.ndarray | None:
    """Band spectra of the end-weighted columns (de-shape by default, else plain), or
    None when there are none. Never sharpened: the short column has no derivative twin,
    and its peak only has to tell one rate from another several bpm away."""
    if columns.recent is None:
        return None
    magnitude = np.abs(columns.recent)
    if settings.deshape and len(columns):
        return deshape_mod.deshape(magnitude, grid, settings.gamma)
    return deshape_mod.plain(magnitude, grid) if len(columns) else \
        np.empty((0, len(grid.freqs_hz)))


def window_integrity(columns: Columns, decimation: int) -> np.ndarray:
    """Integrity per column from the running counts of rejected (non-finite or out of
    range) and stuck raw samples carried beside the frames (``aux`` rows 0 and 1)."""
    if len(columns) == 0:
        return np.empty(0)
    raw = (columns.last_count - columns.first_count) * decimation
    flagged = columns.aux_last - columns.aux_before
    return quality_mod.integrity(flagged[0] / raw, flagged[1] / raw)


class ChannelPath:
    """One channel, one quantity: pre-process, sliding STFT, band spectra."""

    def __init__(self, name: str, kind: str, settings: RateSettings, fs: float,
                 chain_kind: str | None = None):
        self.name, self.kind, self.settings = name, kind, settings
        self.geometry = g = PathGeometry.of(settings, fs)
        self.pre = Preprocessor(chain_kind or kind, settings.quantity, fs, g.decimation,
                                Limiter.for_window(settings.window_s, fs))
        self.pre.min_run = max(3, int(round(settings.stuck_run_s * fs)))
        self.stft = SlidingSTFT(g.window, g.min_window, g.hop, g.n_fft, settings.sharpen,
                                g.recent)
        self.grid = deshape_mod.make_grid(g.fs_analysis, g.n_fft, settings.analysis_band_hz)
        self.keep_columns = False  # set by the monitor when the motion stage needs them

    def reset(self) -> None:
        self.pre.reset()
        self.stft.reset()

    def update(self, x: np.ndarray, t: np.ndarray) -> HopBlock:
        analysis = self.pre.update(x, t)
        columns = self.stft.update(analysis.values, analysis.timestamps,
                                   (analysis.cum_rejected, analysis.cum_stuck))
        integrity = window_integrity(columns, self.geometry.decimation)
        spectra, magnitude = column_spectra(columns, self.grid, self.settings)
        return HopBlock(spectra, columns.time_s, columns.emitted_s, integrity, magnitude,
                        columns.spectra if self.keep_columns else None,
                        recent=recent_spectra(columns, self.grid, self.settings))

    def batch(self, x: np.ndarray, t: np.ndarray, zero_phase: bool) -> HopBlock:
        """The whole record in one call (causal twin, or zero-phase for offline).

        The columns are formed block by block (:meth:`batch_blocks`) and only what is
        made of them is kept, so a long record never holds every complex column."""
        n_hops, blocks = self.batch_blocks(x, t, zero_phase)
        return gather_hops(n_hops, blocks, self._block(Columns(
            np.empty((0, self.geometry.n_fft // 2 + 1), complex), None, np.empty(0),
            np.empty(0), np.empty(0, np.int64), np.empty(0, np.int64), np.empty((2, 0)),
            np.empty((2, 0)), np.empty((0, self.geometry.n_fft // 2 + 1), complex)
            if self.geometry.recent else None)))

    def batch_blocks(self, x: np.ndarray, t: np.ndarray, zero_phase: bool,
                     block_hops: int | None = None):
        """The hops of :meth:`batch` in consecutive blocks of at most ``block_hops``
        (default :data:`estimators.stft.BATCH_BLOCK_HOPS`): ``(n_hops, generator of
        HopBlock)``. Pre-processing runs over the whole record first (its filters see
        every sample, as in :meth:`batch`); each block's complex columns are freed once
        its spectra are made (kept only with ``keep_columns``, for the motion stage)."""
        g = self.geometry
        analysis: Analysis = self.pre.batch(x, t, zero_phase)
        n_hops = batch_hop_count(len(analysis.values), g.min_window, g.hop)
        columns = stft_blocks(analysis.values, analysis.timestamps, g.window, g.min_window,
                              g.hop, g.n_fft, self.settings.sharpen,
                              (analysis.cum_rejected, analysis.cum_stuck), block_hops,
                              g.recent)
        return n_hops, (self._block(c) for c in columns)

    def _block(self, columns: Columns) -> HopBlock:
        integrity = window_integrity(columns, self.geometry.decimation)
        spectra, magnitude = column_spectra(columns, self.grid, self.settings)
        return HopBlock(spectra, columns.time_s, columns.emitted_s, integrity, magnitude,
                        columns.spectra if self.keep_columns else None,
                        recent=recent_spectra(columns, self.grid, self.settings))


def _peak_normalised(spectra: np.ndarray) -> np.ndarray:
    if len(spectra) == 0:
        return spectra
    peak = spectra.max(axis=1, keepdims=True)
    return np.where(peak > 0, spectra / np.where(peak > 0, peak, 1.0), 0.0)


def fuse_blocks(blocks: Sequence[HopBlock]) -> HopBlock:
    """Integrity-weighted mean of peak-normalised spectra of aligned hop blocks."""
    weights = np.stack([b.integrity for b in blocks])  # (C, P)
    total = weights.sum(axis=0)

    def fuse(arrays):
        stacked = np.stack([_peak_normalised(a) for a in arrays])  # (C, P, F)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(total[:, None] > 0,
                            (weights[:, :, None] * stacked).sum(axis=0)
                            / np.where(total > 0, total, 1.0)[:, None],
                            stacked.mean(axis=0))

    magnitude = None
    if all(b.magnitude is not None for b in blocks):
        magnitude = fuse([b.magnitude for b in blocks])
    recent = None
    if all(b.recent is not None for b in blocks):
        recent = fuse([b.recent for b in blocks])
    refine = None
    if all(b.refine is not None for b in blocks):
        refine = fuse([b.refine for b in blocks])
    lines = [b.motion_lines for b in blocks if b.motion_lines is not None]
    references = [b.reference_integrity for b in blocks if b.reference_integrity is not None]
    return HopBlock(fuse([b.spectra for b in blocks]), blocks[0].time_s,
                    np.max([b.emitted_s for b in blocks], axis=0), weights.max(axis=0),
                    magnitude, motion_lines=np.max(lines, axis=0) if lines else None,
                    reference_integrity=np.min(references, axis=0) if references else None,
                    recent=recent, refine=refine)


def estimates_from_track(quantity: str, source: str, block: HopBlock, rate: np.ndarray,
                         confidence: np.ndarray, rates_grid: np.ndarray,
                         settings: RateSettings, emitted_s: np.ndarray,
                         concentration: np.ndarray | None = None,
                         smoothing: dict | None = None,
                         channel_rates: np.ndarray | None = None,
                         calibrate: bool = True,
                         filter_delay_s: np.ndarray | None = None) -> list[Estimate]:
    """Estimate records from tracker output aligned with ``block`` (same hops).

    ``concentration`` is the harmonic concentration score at each rate; computed here
    when not given. ``smoothing`` carries the state of its causal averages between
    calls (a dict, updated in place). ``channel_rates`` (C, P): for a fused output, the
    channels' own rates at the same hops (their spread is evidence).

    With ``calibrate`` (heart rate from PPG), a heart-rate estimate's ``confidence``
    is the calibrated probability that it is within the heart-rate tolerance
    (:mod:`estimators.calibration`); otherwise (ECG: no map is fitted for it yet) the
    tracker's raw confidence. A heart-rate estimate's ``evidence`` holds the raw
    measures (:mod:`estimators.evidence`); a breathing-rate estimate keeps the posterior
    mass as its confidence.

    ``filter_delay_s`` (F,): the causal filters' group delay at each rate of
    ``rates_grid``; an estimate then describes its window centre minus that delay at
    its rate (at the median delay when it has no rate), so ``delay_s`` is honest. None
    (zero-phase, offline): the window centre."""
    step = rates_grid[1] - rates_grid[0]
    halfwidth = settings.confidence_halfwidth_per_min / step
    posterior_mass = np.asarray(confidence, dtype=np.float64)
    mark = np.zeros(len(posterior_mass))
    if block.motion_lines is not None:  # pulse on a motion line: not told apart
        confidence = motion_mod.overlap_confidence(confidence, rate, block.motion_lines,
                                                   rates_grid,
                                                   settings.motion_confidence_penalty)
        mark = 1.0 - motion_mod.overlap_confidence(np.ones(len(mark)), rate,
                                                   block.motion_lines, rates_grid, 1.0)
    readout = block.spectra if block.magnitude is None else block.magnitude
    rate_bins = (rate - rates_grid[0]) / step
    if concentration is None:
        concentration = quality_mod.harmonic_concentration(
            readout, rate_bins, rates_grid[0] / step, halfwidth)
    state = {} if smoothing is None else smoothing
    conc, state["last"] = quality_mod.smooth_scores(concentration, state.get("last"),
                                                    settings.hop_s)
    quality = quality_mod.quality_index(block.integrity, conc)
    evidence = [()] * len(quality)
    if quantity == "hr" and len(quality):
        # Half and double rates are read on the tracked spectrum too: de-shape keeps
        # the fundamental and drops its harmonics there, so a pulse with a strong second
        # harmonic does not look like a lock on half the rate.
        rival, half, double = evidence_mod.spectral_margins(
            block.spectra, block.spectra, rate_bins, rates_grid[0] / step, halfwidth)
        jumps = evidence_mod.jumpiness(rate, settings.hop_s, state.setdefault("jumps", {}))
        measures = np.column_stack([
            posterior_mass, mark, quality, block.integrity, concentration, rival, half,
            double, jumps, evidence_mod.channel_spread(channel_rates, len(quality)),
            np.full(len(quality), 1.0 if settings.motion else 0.0),
            np.ones(len(quality)) if block.reference_integrity is None
            else block.reference_integrity])
        if calibrate:
            confidence = calibration_mod.calibrated_confidence(measures, confidence)
        evidence = [tuple(row) for row in measures.tolist()]
    # The grid reaches the confidence half-width beyond the band, so that a rate on the
    # band's edge is a peak; such rates are shown at the edge (off by less than the
    # half-width), never outside the band.
    lo, hi = settings.band_per_min
    withheld = (quality < settings.min_quality) | ~np.isfinite(rate)
    shown = np.where(withheld, np.nan, np.clip(rate, lo, hi))
    time_s = block.time_s
    if filter_delay_s is not None:
        at = np.where(np.isfinite(rate), rate, np.median(rates_grid))
        time_s = time_s - np.interp(at, rates_grid, filter_delay_s)
    recent = np.full(len(shown), np.nan)
    if block.recent is not None and len(shown):
        # A maximum on the grid's first or last bin is no peak (the spectrum rises
        # beyond the grid: slow drift, an ectopic beat's long interval): none.
        top = np.argmax(block.recent, axis=1)
        inner = (top > 0) & (top < block.recent.shape[1] - 1) & np.isfinite(shown)
        recent = np.where(inner, np.clip(rates_grid[top], lo, hi), np.nan)
    return [Estimate(quantity, source, t, e, r, c, q, v, recent_rate_per_min=n)
            for t, e, r, c, q, v, n in zip(
                time_s.tolist(), emitted_s.tolist(), shown.tolist(),
                np.asarray(confidence).tolist(), quality.tolist(), evidence, recent.tolist())]


class _Output:
    """One reported (quantity, source): a tracker plus the lag history of hops."""

    def __init__(self, quantity: str, source: str, grid_rates: np.ndarray,
                 settings: RateSettings, filter_delay_s: np.ndarray | None = None):
        self.quantity, self.source, self.settings = quantity, source, settings
        self.rates = grid_rates
        self.filter_delay_s = filter_delay_s  # causal group delay per grid rate (F,)
        step = grid_rates[1] - grid_rates[0]
        params = tracker_mod.make_params(step, settings.hop_s, settings.max_change_per_min_per_s,
                                         settings.jump_probability,
                                         settings.confidence_halfwidth_per_min,
                                         settings.lag_hops)
        self.calibrate = True  # set by the monitor: heart rate from PPG channels only
        self.tracker = tracker_mod.RidgeTracker(grid_rates, params, settings.emission_power,
                                                True, quality_mod.CHANCE_FACTOR,
                                                quality_mod.CONCENTRATION_SPAN,
                                                tracker_mod.start_posterior(
                                                    grid_rates, settings.start_prior_above_per_min))
        self._held: list[HopBlock] = []
        self._smoothing: dict = {}

    def reset(self) -> None:
        self.tracker.reset()
        self._held = []
        self._smoothing = {}

    def track(self, block: HopBlock) -> "Tracked":
        """Advance the tracker over the hops of ``block``; the raw output for the hops
        it refers to (with fixed-lag smoothing, ``lag_hops`` earlier)."""
        if len(block) == 0:
            empty = np.empty(0)
            return Tracked(block, empty, empty, empty, empty)
        lag = self.settings.lag_hops
        if lag == 0:
            rate, conf, frac = self.tracker.track(block.spectra, block.integrity, block.magnitude)
            rate = refine_mod.refine_rate(block.refine, self.rates, rate,
                                          self.settings.refine_radius_per_min)
            return Tracked(block, rate, conf, frac, block.emitted_s)
        rate, conf, index = self.tracker.update(block.spectra, block.integrity, block.magnitude)
        # Hops the smoothed outputs refer to: held from earlier updates plus this block.
        self._held.append(block)
        held = concat_blocks(self._held)
        first_index = self.tracker.hops_seen - len(held)
        pos = index - first_index
        referred = take_hops(held, pos)
        newest = held.emitted_s[pos + lag]
        self._held = [take_hops(held, np.arange(max(0, len(held) - lag - 1), len(held)))]
        rate = refine_mod.refine_rate(referred.refine, self.rates, rate,
                                      self.settings.refine_radius_per_min)
        return Tracked(referred, rate, conf, None, newest)

    def estimates(self, tracked: "Tracked", channel_rates: np.ndarray | None = None
                  ) -> list[Estimate]:
        """Estimate records of tracker output; ``channel_rates`` (C, P): for a fused
        output, the channels' rates of the same hops."""
        if len(tracked.rate) == 0:
            return []
        out = estimates_from_track(self.quantity, self.source, tracked.block, tracked.rate,
                                   tracked.confidence, self.rates, self.settings,
                                   tracked.emitted_s, tracked.concentration,
                                   self._smoothing, channel_rates, self.calibrate,
                                   self.filter_delay_s)
        if self.quantity == "rr":  # a respiration channel: P(within 2 breaths/min)
            conf = breathing_confidence.calibrated("resp", [e.confidence for e in out],
                                                   [e.quality for e in out])
            out = [dataclasses.replace(e, confidence=c) if e.has_rate else e
                   for e, c in zip(out, conf.tolist())]
        return out

    def update(self, block: HopBlock, channel_rates: np.ndarray | None = None
               ) -> list[Estimate]:
        """Estimates of the hops in ``block`` (see :meth:`track`, :meth:`estimates`)."""
        return self.estimates(self.track(block), channel_rates)


@dataclass(frozen=True)
class Tracked:
    """Raw tracker output: the hops it refers to, their rate, confidence, harmonic
    concentration (None: computed from the block when the estimates are made) and the
    newest sample time each used."""

    block: HopBlock
    rate: np.ndarray
    confidence: np.ndarray
    concentration: np.ndarray | None
    emitted_s: np.ndarray

    @staticmethod
    def concat(parts: Sequence["Tracked"]) -> "Tracked":
        concentration = [p.concentration for p in parts]
        return Tracked(concat_blocks([p.block for p in parts]),
                       np.concatenate([p.rate for p in parts]),
                       np.concatenate([p.confidence for p in parts]),
                       None if any(c is None for c in concentration)
                       else np.concatenate(concentration),
                       np.concatenate([p.emitted_s for p in parts]))


def _stacked(rates: list) -> np.ndarray | None:
    """Channels' rates (C, P) when every channel reported the same hops, else None."""
    if len(rates) < 2 or len({len(r) for r in rates}) != 1:
        return None
    return np.array(rates, dtype=np.float64)


def concat_blocks(blocks: Sequence[HopBlock]) -> HopBlock:
    """Hop blocks one after the other; an optional field is kept when every block has
    it."""
    fields = {}
    for field in dataclasses.fields(HopBlock):
        parts = [getattr(b, field.name) for b in blocks]
        fields[field.name] = None if any(x is None for x in parts) else np.concatenate(parts)
    return HopBlock(**fields)


def take_hops(block: HopBlock, index) -> HopBlock:
    """The hops ``index`` (an index array or a slice) of every field of ``block``."""
    return HopBlock(**{field.name: None if getattr(block, field.name) is None
                       else getattr(block, field.name)[index]
                       for field in dataclasses.fields(HopBlock)})


def monotone_times(timestamps: np.ndarray, newest_s: float) -> np.ndarray:
    """Each timestamp replaced by the newest of itself, every earlier one and
    ``newest_s`` (NaN: none yet; NaN timestamps take the newest before them).

    >>> monotone_times(np.array([1.0, 2.0, 1.5, 3.0]), 0.5)
    array([1., 2., 2., 3.])
    """
    if len(timestamps) == 0:
        return timestamps
    return np.fmax.accumulate(np.concatenate(([newest_s], timestamps)))[1:]


def _normalise_channels(channels) -> list[tuple[str, str]]:
    out = []
    for ch in channels:
        name, kind = (ch.name, ch.kind) if hasattr(ch, "name") else (ch[0], ch[1])
        if kind not in SIGNAL_KINDS:
            raise ParameterError(
                f"channel {name!r}: kind={kind!r} must be one of {', '.join(SIGNAL_KINDS)}")
        out.append((str(name), kind))
    if len({n for n, _ in out}) != len(out):
        raise ParameterError(f"channel names must be unique, got {[n for n, _ in out]}")
    if not any(k in ("ppg", "ecg", "resp") for _, k in out):
        raise ParameterError("at least one ppg, ecg or resp channel is needed "
                             f"(got {', '.join(f'{n}={k}' for n, k in out) or 'none'})")
    return out


class RateMonitor:
    """Live heart-rate and breathing-rate estimation for a set of channels.

    Parameters
    ----------
    channels : sequence of ``(name, kind)`` pairs or objects with ``name`` and
        ``kind``; kind is one of ``ppg``, ``ecg``, ``resp``, ``acc``.
    fs : sampling rate of all channels (Hz).
    profile : a :class:`~estimators.config.Profile` or its name.

    Examples
    --------
    >>> import numpy as np
    >>> fs = 125.0
    >>> t = np.arange(int(20 * fs)) / fs
    >>> ppg = np.sin(2 * np.pi * 1.2 * t) + 0.5 * np.sin(2 * np.pi * 2.4 * t)
    >>> monitor = RateMonitor([("finger", "ppg")], fs, "fingertip-rest")
    >>> estimates = monitor.update(ppg[:, None], t)
    >>> round(estimates[-1].rate_per_min)
    72
    """

    def __init__(self, channels, fs: float, profile="wrist"):
        if not (np.isfinite(fs) and fs > 0):
            raise ParameterError(f"fs={fs} must be a finite rate > 0 Hz")
        self.profile: Profile = get_profile(profile) if isinstance(profile, str) else profile
        self.channels = _normalise_channels(channels)
        self.fs = float(fs)
        hr, rr = self.profile.hr, self.profile.rr
        self.paths: dict[tuple[str, str], ChannelPath] = {}
        self.motion_paths: dict[str, ChannelPath] = {}
        for name, kind in self.channels:
            if kind in ("ppg", "ecg"):
                self.paths[("hr", name)] = ChannelPath(name, kind, hr, fs)
            elif kind == "resp":
                self.paths[("rr", name)] = ChannelPath(name, kind, rr, fs)
            else:
                self.motion_paths[name] = ChannelPath(name, kind, hr, fs, chain_kind="acc")
        self.outputs: dict[tuple[str, str], _Output] = {}
        delays = {key: path.pre.group_delay_s(path.grid.rates_per_min / 60.0)
                  for key, path in self.paths.items()}
        for (quantity, name), path in self.paths.items():
            self.outputs[(quantity, name)] = _Output(quantity, name, path.grid.rates_per_min,
                                                     path.settings, delays[(quantity, name)])
        hr_paths = [k for k in self.paths if k[0] == "hr"]
        if len(hr_paths) >= 2:
            grid = self.paths[hr_paths[0]].grid.rates_per_min
            self.outputs[("hr", FUSED)] = _Output("hr", FUSED, grid, hr, np.mean(
                [delays[k] for k in hr_paths], axis=0))
        # The confidence map is fitted on PPG heart rate; ECG (and a fusion with ECG)
        # keeps the tracker's raw confidence until a map is fitted for it.
        for (quantity, name), out in self.outputs.items():
            kinds = ({self.paths[k].kind for k in hr_paths} if name == FUSED
                     else {self.paths[(quantity, name)].kind})
            out.calibrate = quantity == "hr" and kinds == {"ppg"}
        self._index = {name: i for i, (name, _) in enumerate(self.channels)}
        self.last_blocks: dict[tuple[str, str], HopBlock] = {}
        self.motion_spectra: dict[str, HopBlock] = {}
        # Motion stage (estimators.motion) for PPG heart-rate paths when the profile asks.
        self.motion: dict[tuple[str, str], motion_mod.MotionSuppressor] = {}
        if hr.motion:
            for key, path in self.paths.items():
                if key[0] == "hr" and path.kind == "ppg":
                    path.keep_columns = True
                    self.motion[key] = motion_mod.MotionSuppressor(
                        hr, path.grid.band, path.geometry.n_fft, len(self.motion_paths))
            for path in self.motion_paths.values():
                path.keep_columns = bool(self.motion)
        self._newest_s = np.nan  # newest timestamp seen (labels never go backwards)
        self._now_states: dict = {}  # (quantity, source) -> rate_now.NowState
        self._references_missing = False  # motion references lost (exercise profiles)
        self._untrusted_hops = 0  # hops left in which the motion stage trusts no track
        self._gap_s = gap_threshold_s(self.fs)
        self.last_gaps: list[Gap] = []
        self.pulse_breathing: dict[str, PulseBreathing] = {
            name: PulseBreathing(name, kind, self.profile.rr_pulse, fs)
            for name, kind in self.channels
            if kind in ("ppg", "ecg") and self.profile.breathing_from_pulse
            and fs >= MIN_FS_HZ}  # a 25 Hz wrist PPG still gives its heart rate

    def filter_delay_s(self, quantity: str, source: str, rate_per_min: float) -> float:
        """The causal filters' group delay at ``rate_per_min`` for the output
        (``quantity``, ``source``): how much earlier than its window centre a live
        estimate at that rate is placed (its ``time_s``); at the median rate of the grid
        when the rate is NaN."""
        out = self.outputs[(quantity, source)]
        at = rate_per_min if np.isfinite(rate_per_min) else np.median(out.rates)
        return float(np.interp(at, out.rates, out.filter_delay_s))

    @property
    def streams(self) -> list[tuple[str, str]]:
        """Every (quantity, source) this monitor emits estimates for, in a fixed order:
        the tracked outputs, then breathing from each pulse channel."""
        return list(self.outputs) + [("rr", name) for name in self.pulse_breathing]

    def grid(self, quantity: str) -> np.ndarray | None:
        """Rates (per minute) of the spectra's bins for ``quantity``, or None."""
        for (q, _), path in self.paths.items():
            if q == quantity:
                return path.grid.rates_per_min
        return None

    def restart(self) -> None:
        """Start every path afresh (filters, windows, trackers, motion stage, breathing
        from pulse), keeping the newest timestamp seen so labels never go backwards."""
        for path in list(self.paths.values()) + list(self.motion_paths.values()):
            path.reset()
        for out in self.outputs.values():
            out.reset()
        for suppressor in self.motion.values():
            suppressor.reset()
        for breathing in self.pulse_breathing.values():
            breathing.reset()
        self._now_states = {}
        self._references_missing, self._untrusted_hops = False, 0

    def reset(self) -> None:
        """As after construction: :meth:`restart`, and no timestamp seen (for a stream
        whose time axis may start over, e.g. a sender that came back)."""
        self.restart()
        self._newest_s = np.nan
        self.last_gaps = []

    def _check(self, samples, timestamps):
        samples = np.asarray(samples, dtype=np.float64)
        timestamps = np.asarray(timestamps, dtype=np.float64)
        if samples.ndim == 1 and len(self.channels) == 1:
            samples = samples[:, None]
        if samples.ndim != 2 or samples.shape[1] != len(self.channels):
            raise ParameterError(
                f"samples.shape={samples.shape} must be (n, {len(self.channels)})")
        if timestamps.shape != (samples.shape[0],):
            raise ParameterError(
                f"timestamps.shape={timestamps.shape} must be ({samples.shape[0]},)")
        return samples, timestamps

    def _consumer(self, key: tuple[str, str]) -> "_Output":
        """The output whose track guides the motion stage of ``key``: the fused heart
        rate when there is one (it is what is reported), else the channel's own."""
        return self.outputs.get(("hr", FUSED), self.outputs[key])

    def _expected_pulse(self, key: tuple[str, str]) -> np.ndarray | None:
        """Where the guiding tracker expects the pulse before its next hop; None before
        it has seen a hop."""
        tracker = self._consumer(key).tracker
        trust = self.profile.hr.motion_trust
        if trust == "everywhere":
            return np.ones((1, len(tracker.posterior)))
        if trust == "nowhere" or tracker.hops_seen == 0 or self._untrusted_hops > 0:
            return None
        return motion_mod.expected_pulse(tracker.posterior, tracker.params.halfwidth_bins)

    def _report(self, keys: list, tracked: dict) -> list[Estimate]:
        """Estimates of the outputs ``keys`` from their tracker output (in the monitor's
        order: the fused output comes after the channels whose rates it reads)."""
        estimates, channel_rates = [], []
        for key in keys:
            new = self.outputs[key].estimates(
                tracked[key], _stacked(channel_rates) if key[1] == FUSED else None)
            if key[0] == "hr" and key[1] != FUSED:
                channel_rates.append([e.rate_per_min for e in new])
            estimates.extend(new)
        return estimates

    def _update_outputs(self, keys: list, blocks: dict) -> list[Estimate]:
        """The outputs ``keys`` advanced over their blocks."""
        return self._report(keys, {key: self.outputs[key].track(blocks[key]) for key in keys})

    def track_with_motion(self, blocks: dict, motion_blocks: dict) -> tuple[list, dict]:
        """The motion stage and the heart-rate trackers, hop by hop: the motion stage of
        hop ``p`` trusts its canceller where the trackers' posteriors after hop ``p - 1``
        expect the pulse (:func:`estimators.motion.expected_pulse`). Returns the
        heart-rate estimates and the blocks as tracked (motion-suppressed spectra, fused
        block)."""
        refs = [motion_blocks[name].columns for name in self.motion_paths]
        acc = np.stack(refs, axis=-1) if refs else None
        hr_keys = [key for key in self.outputs if key[0] == "hr"]
        n_hops = len(blocks[next(iter(self.motion))])
        reference = (np.min([motion_blocks[name].integrity for name in self.motion_paths],
                            axis=0) if self.motion_paths else np.zeros(n_hops))
        window_hops = int(round(self.profile.hr.window_s / self.profile.hr.hop_s))
        tracked, hops = {key: [] for key in hr_keys}, {key: [] for key in hr_keys}
        for p in range(n_hops):
            # References back after an absence: the track was made without them (it may
            # sit on the cadence), so for one window the motion stage trusts no track,
            # as at start-up.
            if self.motion_paths and reference[p] < calibration_mod.REFERENCE_MISSING:
                self._references_missing = True
            elif self._references_missing:
                self._references_missing = False
                self._untrusted_hops = window_hops
                for key in hr_keys:
                    self.outputs[key].tracker.reset()
            hop = {key: take_hops(blocks[key], slice(p, p + 1)) for key in hr_keys
                   if key in blocks}
            for key, suppressor in self.motion.items():
                spectra, lines, refine = suppressor.update_with_refine(
                    hop[key].columns, None if acc is None else acc[p:p + 1],
                    self._expected_pulse(key))
                # While the stage warms up again its output is not what the motion
                # calibration was fitted on: the evidence says the references are
                # missing (the blind family) until a window has passed.
                hop[key] = dataclasses.replace(
                    hop[key], spectra=spectra, magnitude=spectra, columns=None,
                    motion_lines=lines, refine=refine, reference_integrity=(
                        np.zeros(1) if self._untrusted_hops > 0 else reference[p:p + 1]))
            if ("hr", FUSED) in self.outputs:
                hop[("hr", FUSED)] = fuse_blocks([hop[key] for key in hr_keys
                                                  if key[1] != FUSED])
            for key in hr_keys:
                tracked[key].append(self.outputs[key].track(hop[key]))
                hops[key].append(hop[key])
            self._untrusted_hops = max(0, self._untrusted_hops - 1)
        if n_hops == 0:
            return [], {}
        estimates = self._report(hr_keys, {key: Tracked.concat(parts)
                                           for key, parts in tracked.items()})
        return estimates, {key: concat_blocks(parts) for key, parts in hops.items()}

    def update(self, samples, timestamps) -> list[Estimate]:
        """Feed a chunk ``(n, channels)`` with timestamps ``(n,)``; return the estimates
        of every hop it completes, ordered by hop, then by quantity and source.

        Hops fall by sample count (see :mod:`estimators.stft`); timestamps label the
        estimates and mark gaps. A timestamp earlier than one already seen (duplicated
        or out-of-order samples, a clock stepped back) is labelled with the newest one
        seen (:func:`monotone_times`), so ``emitted_s`` never decreases and
        ``time_s <= emitted_s`` whatever the source delivers. At a gap
        (:func:`find_gaps`, here or between this chunk and the last) the monitor
        restarts (:meth:`restart`): no window spans the gap, and the first estimates
        after it use samples after it only. :attr:`last_gaps` lists the gaps of this
        chunk."""
        samples, timestamps = self._check(samples, timestamps)
        labels = monotone_times(timestamps, self._newest_s)
        starts = _gap_starts(labels, self._newest_s, self._gap_s)
        self.last_gaps = []
        if len(starts) == 0:  # the usual case: one stretch
            estimates = self._update_stretch(samples, labels)
            estimates.sort(key=lambda e: (e.emitted_s, e.quantity, e.source))
            return self._with_rate_now(estimates)
        bounds = sorted({0, *starts.tolist(), len(labels)})
        estimates, pieces = [], []
        for a, b in zip(bounds[:-1], bounds[1:]):
            if a in starts:
                before = self._newest_s if a == 0 else float(labels[a - 1])
                after = float(labels[a])
                self.last_gaps.append(Gap(before, after, after - before - 1.0 / self.fs))
                self.restart()
            estimates.extend(self._with_rate_now(sorted(
                self._update_stretch(samples[a:b], labels[a:b]),
                key=lambda e: (e.emitted_s, e.quantity, e.source))))
            pieces.append(self.last_blocks)
        if len(pieces) > 1:  # the blocks of the chunk, for a display drawing them
            self.last_blocks = {key: concat_blocks([p[key] for p in pieces]) for key in
                                pieces[-1]}
        estimates.sort(key=lambda e: (e.emitted_s, e.quantity, e.source))
        return estimates

    def _with_rate_now(self, estimates: list[Estimate]) -> list[Estimate]:
        """The estimates (in emitted order) with their rate now and its confidence
        (:mod:`estimators.rate_now`), each output carrying its own forecast state."""
        out = []
        for e in estimates:
            state = self._now_states.setdefault((e.quantity, e.source), now_mod.NowState())
            now, conf = now_mod.rate_now_step(state, now_mod.params_for(e.quantity),
                                              e.emitted_s, e.rate_per_min, e.delay_s,
                                              e.confidence, e.recent_rate_per_min)
            out.append(dataclasses.replace(e, rate_now_per_min=now, now_confidence=conf))
        return out

    def _update_stretch(self, samples: np.ndarray, labels: np.ndarray) -> list[Estimate]:
        """One stretch without a gap; ``labels`` never decrease."""
        if len(labels):
            self._newest_s = float(labels[-1])
        blocks = {}
        for key, path in self.paths.items():
            blocks[key] = path.update(samples[:, self._index[key[1]]], labels)
        for name, path in self.motion_paths.items():
            self.motion_spectra[name] = path.update(samples[:, self._index[name]], labels)
        estimates = []
        if self.motion:
            hr_estimates, tracked = self.track_with_motion(blocks, self.motion_spectra)
            estimates.extend(hr_estimates)
            blocks.update(tracked)
        elif ("hr", FUSED) in self.outputs:
            blocks[("hr", FUSED)] = fuse_blocks([b for (q, _), b in blocks.items() if q == "hr"])
        self.last_blocks = blocks
        estimates.extend(self._update_outputs(
            [key for key in self.outputs if not (self.motion and key[0] == "hr")], blocks))
        for name, breathing in self.pulse_breathing.items():
            estimates.extend(breathing.update(samples[:, self._index[name]], labels))
        return estimates


def offline_estimates(samples, timestamps, channels, fs: float, profile="wrist") -> list[Estimate]:
    """The non-causal twin over a whole record.

    Zero-phase filters, the same STFT columns (each describes the centre of its
    window), forward-backward posteriors for the confidence and a Viterbi ridge for the
    rate. The record is cut at its gaps (:func:`find_gaps`) and each stretch is
    estimated on its own, as live restarts there; every estimate used its whole
    stretch, so ``emitted_s`` is the time of the stretch's last sample.
    """
    monitor = RateMonitor(channels, fs, profile)
    samples, timestamps = monitor._check(samples, timestamps)
    timestamps = monotone_times(timestamps, np.nan)
    bounds = [0, *find_gaps(timestamps, monitor.fs).tolist(), len(timestamps)]
    estimates = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        if b > a:
            estimates.extend(_offline_stretch(monitor, samples[a:b], timestamps[a:b]))
    estimates.sort(key=lambda e: (e.time_s, e.quantity, e.source))
    # No delay to compensate offline: the rate now is the centre rate.
    return [dataclasses.replace(e, rate_now_per_min=e.rate_per_min, now_confidence=e.confidence)
            for e in estimates]


def _offline_motion(monitor: RateMonitor, samples: np.ndarray,
                    timestamps: np.ndarray) -> dict[tuple[str, str], HopBlock]:
    """The heart-rate blocks of one stretch after the motion stage (and the fused block
    when there is one), for :func:`_offline_stretch`.

    The motion stage needs a track to know where to trust its canceller: a causal
    forward pass over the zero-phase columns gives it (its estimates are dropped); the
    Viterbi ridge then runs on the spectra that pass made. The pass goes block by block
    (:meth:`ChannelPath.batch_blocks`; heart-rate and reference paths share one
    geometry, so their blocks hold the same hops) and carries its state between blocks
    as a live run carries it between chunks, so the complex columns it needs exist one
    block at a time."""
    monitor.restart()
    keys = [key for key in monitor.paths if key[0] == "hr"]
    plans = [monitor.paths[key].batch_blocks(samples[:, monitor._index[key[1]]],
                                             timestamps, True) for key in keys]
    plans += [path.batch_blocks(samples[:, monitor._index[name]], timestamps, True)
              for name, path in monitor.motion_paths.items()]
    n_hops = plans[0][0]
    out_keys = keys + ([("hr", FUSED)] if ("hr", FUSED) in monitor.outputs else [])
    gatherers = {key: HopGatherer(n_hops) for key in out_keys}
    for parts in zip(*[blocks for _, blocks in plans]):
        _, tracked = monitor.track_with_motion(
            dict(zip(keys, parts[:len(keys)])),
            dict(zip(monitor.motion_paths, parts[len(keys):])))
        for key, gatherer in gatherers.items():
            gatherer.add(tracked[key])
    n_bins = len(monitor.paths[keys[0]].grid.freqs_hz)
    none = np.empty(0)
    empty = HopBlock(np.empty((0, n_bins)), none, none, none, np.empty((0, n_bins)))
    return {key: gatherer.result(empty) for key, gatherer in gatherers.items()}


def _offline_stretch(monitor: RateMonitor, samples: np.ndarray,
                     timestamps: np.ndarray) -> list[Estimate]:
    """:func:`offline_estimates` of one stretch without a gap."""
    end = float(timestamps[-1])
    # Breathing from the pulse first: its spectra are freed before the paths' are made,
    # so the two never take memory at once.
    estimates = []
    for name, breathing in monitor.pulse_breathing.items():
        estimates.extend(breathing.offline(samples[:, monitor._index[name]], timestamps))
    blocks = {key: path.batch(samples[:, monitor._index[key[1]]], timestamps, True)
              for key, path in monitor.paths.items()
              if not (monitor.motion and key[0] == "hr")}
    if monitor.motion:
        blocks.update(_offline_motion(monitor, samples, timestamps))
    elif ("hr", FUSED) in monitor.outputs:
        blocks[("hr", FUSED)] = fuse_blocks([b for (q, _), b in blocks.items() if q == "hr"])
    channel_rates = []
    for key, out in monitor.outputs.items():
        block = blocks[key]
        if len(block) == 0:
            continue
        weights = block.integrity * out.tracker.rhythm(block.spectra, block.magnitude)
        # Rate at the spectral peak near the Viterbi ridge (as live reads it near the mode).
        rate, conf, _ = tracker_mod.offline_track(block.spectra, weights, out.tracker.params,
                                                  out.tracker.power, out.rates,
                                                  block.magnitude, out.tracker.start)
        rate = refine_mod.refine_rate(block.refine, out.rates, rate,
                                      out.settings.refine_radius_per_min)
        new = estimates_from_track(key[0], key[1], block, rate, conf, out.rates, out.settings,
                                   np.full(len(block), end),
                                   channel_rates=_stacked(channel_rates)
                                   if key[1] == FUSED else None, calibrate=out.calibrate)
        if key[0] == "hr" and key[1] != FUSED:
            channel_rates.append([e.rate_per_min for e in new])
        estimates.extend(new)
    return estimates


__all__ = ["RateMonitor", "offline_estimates", "find_gaps", "gap_threshold_s", "Gap",
           "PROFILES", "FUSED", "STUCK_RUN_S"]
