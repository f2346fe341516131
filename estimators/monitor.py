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
from estimators.preprocess import (FilterChain, FrontEnd, Limiter, STUCK_RUN_S,
                                   chain_group_delay_s, design_chain)
from estimators.respiration import MIN_FS_HZ, PulseBreathing
from estimators.stage import Chain, Parallel, concat_fields
from estimators.stft import (Columns, HopGatherer, SpectrumStage, batch_hop_count,
                             gather_hops)

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


def record_gaps(timestamps: np.ndarray, fs: float) -> list[Gap]:
    """The gaps of a whole record (:func:`find_gaps`) as :class:`Gap` records, in order:
    where the offline twin restarts, as the live monitor does (``last_gaps``)."""
    labels = monotone_times(np.asarray(timestamps, dtype=np.float64), np.nan)
    return [Gap(float(labels[k - 1]), float(labels[k]),
                float(labels[k] - labels[k - 1] - 1.0 / fs))
            for k in _gap_starts(labels, np.nan, gap_threshold_s(fs))]


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


def _by_rows(fn, array: np.ndarray, *args) -> np.ndarray:
    """``fn`` (which maps (P, n) to (P, m)) over an array with any leading axes."""
    out = fn(array.reshape(-1, array.shape[-1]), *args)
    return out.reshape(array.shape[:-1] + out.shape[-1:])


def column_spectra(columns: Columns, grid: deshape_mod.DeshapeGrid,
                   settings: RateSettings) -> tuple[np.ndarray, np.ndarray]:
    """Band spectra of the columns (de-shape by default, else plain magnitude) and the
    band of the plain magnitude; the columns may carry a channel axis (every channel's
    columns then go through one call)."""
    spectra = columns.spectra
    if spectra.shape[-2] == 0:
        empty = np.empty(spectra.shape[:-1] + (len(grid.freqs_hz),))
        return empty, empty
    if settings.sharpen:
        magnitude = _by_rows(lambda v, dw: deshape_mod.squeeze(v, dw, grid.n_fft), spectra,
                             columns.spectra_dw.reshape(-1, spectra.shape[-1]))
    else:
        magnitude = np.abs(spectra)
    band = _by_rows(deshape_mod.plain, magnitude, grid)
    if settings.deshape:
        return _by_rows(deshape_mod.deshape, magnitude, grid, settings.gamma), band
    return band, band


def recent_spectra(columns: Columns, grid: deshape_mod.DeshapeGrid,
                   settings: RateSettings) -> np.ndarray | None:
    """Band spectra of the end-weighted columns (de-shape by default, else plain), or
    None when there are none. Never sharpened: the short column has no derivative twin,
    and its peak only has to tell one rate from another several bpm away."""
    if columns.recent is None:
        return None
    if columns.recent.shape[-2] == 0:
        return np.empty(columns.recent.shape[:-1] + (len(grid.freqs_hz),))
    magnitude = np.abs(columns.recent)
    if settings.deshape:
        return _by_rows(deshape_mod.deshape, magnitude, grid, settings.gamma)
    return _by_rows(deshape_mod.plain, magnitude, grid)


def window_integrity(columns: Columns, decimation: int) -> np.ndarray:
    """Integrity per column (and channel) from the running counts of rejected
    (non-finite or out of range) and stuck raw samples carried beside the frames
    (``aux`` rows 0 and 1)."""
    raw = (columns.last_count - columns.first_count) * decimation
    flagged = columns.aux_last - columns.aux_before
    if len(columns) == 0:
        return np.empty(flagged.shape[1:])
    return quality_mod.integrity(flagged[0] / raw, flagged[1] / raw)


@dataclass(frozen=True)
class ChannelBlocks:
    """The per-hop output of C channels of one geometry: :class:`HopBlock`'s fields
    with a leading channel axis (``spectra`` (C, P, F), ``integrity`` (C, P), ...),
    and the hop facts ``time_s``, ``emitted_s`` (P,) they share. ``channel(c)`` is
    channel ``c``'s :class:`HopBlock` (views)."""

    spectra: np.ndarray
    time_s: np.ndarray
    emitted_s: np.ndarray
    integrity: np.ndarray
    magnitude: np.ndarray
    columns: np.ndarray | None = None
    recent: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.time_s)

    def channel(self, c: int) -> HopBlock:
        return HopBlock(self.spectra[c], self.time_s, self.emitted_s, self.integrity[c],
                        self.magnitude[c],
                        None if self.columns is None else self.columns[c],
                        recent=None if self.recent is None else self.recent[c])

    def hops(self, index) -> "ChannelBlocks":
        """The hops ``index`` (a slice or index array) of every channel."""
        pick = (lambda a: None if a is None else a[:, index])
        return ChannelBlocks(pick(self.spectra), self.time_s[index], self.emitted_s[index],
                             pick(self.integrity), pick(self.magnitude), pick(self.columns),
                             pick(self.recent))

    @staticmethod
    def concat(parts) -> "ChannelBlocks":
        return concat_fields(parts, {"spectra": 1, "time_s": 0, "emitted_s": 0,
                                     "integrity": 1, "magnitude": 1, "columns": 1,
                                     "recent": 1})


@dataclass(frozen=True, eq=False)
class BandSpectra:
    """Stage (:mod:`estimators.stage`): STFT columns of C channels -> their band spectra
    (:class:`ChannelBlocks`): de-shape (or the plain magnitude, optionally
    synchrosqueezed first), the band of the plain magnitude the rate is read from, the
    end-weighted columns' spectra and each window's integrity. Every channel's columns
    go through one call of each transform. No state (``None``): each hop is its own."""

    grid: deshape_mod.DeshapeGrid
    settings: RateSettings
    decimation: int
    keep_columns: bool = False
    """Keep the complex columns (the motion stage needs them)."""

    def initial_state(self):
        return None

    def step(self, state, columns: Columns):
        return None, self.batch(columns)

    def batch(self, columns: Columns) -> ChannelBlocks:
        spectra, magnitude = column_spectra(columns, self.grid, self.settings)
        return ChannelBlocks(spectra, columns.time_s, columns.emitted_s,
                             window_integrity(columns, self.decimation), magnitude,
                             columns.spectra if self.keep_columns else None,
                             recent_spectra(columns, self.grid, self.settings))

    def split(self, columns: Columns, bounds) -> list:
        edges = [0, *[int(b) for b in bounds], len(columns)]
        return [columns.hops(slice(lo, hi)) for lo, hi in zip(edges[:-1], edges[1:])]

    def join(self, parts) -> ChannelBlocks:
        return ChannelBlocks.concat(parts)


def front_end(kind: str, settings: RateSettings, fs: float, geometry: "PathGeometry",
              n_channels: int = 1, chain: FilterChain | None = None) -> FrontEnd:
    """The front-end stage of ``n_channels`` channels of ``kind`` for ``settings``: the
    kind's filter chain (or ``chain``), the path's decimation, stuck-run length and a
    limiter learning over one analysis window."""
    if chain is None:
        chain = design_chain(kind, settings.quantity, fs, geometry.fs_analysis)
    return FrontEnd(chain, geometry.decimation, max(3, int(round(settings.stuck_run_s * fs))),
                    Limiter.for_window(settings.window_s, fs), n_channels)


class ChannelGroup:
    """Channels of one kind and quantity advancing together: the :class:`Chain` of
    front end (:class:`~estimators.preprocess.FrontEnd`), sliding STFT
    (:class:`~estimators.stft.SpectrumStage`) and band spectra (:class:`BandSpectra`),
    each stage handling every channel at once (one compiled pass, one FFT call per
    frame length, one call per transform). This class only owns the chain's state.

    ``update(samples (n, C), t) -> ChannelBlocks``; ``batch`` the whole record (causal
    or zero-phase), ``batch_blocks`` the same in blocks of hops.
    """

    def __init__(self, names, kind: str, settings: RateSettings, fs: float,
                 chain_kind: str | None = None, keep_columns: bool = False,
                 chain: FilterChain | None = None):
        self.names, self.kind, self.settings, self.fs = list(names), kind, settings, fs
        self.geometry = g = PathGeometry.of(settings, fs)
        self.grid = deshape_mod.make_grid(g.fs_analysis, g.n_fft, settings.analysis_band_hz)
        self.front = front_end(chain_kind or kind, settings, fs, g, len(self.names), chain)
        self.spectrum = SpectrumStage(g.window, g.min_window, g.hop, g.n_fft,
                                      settings.sharpen, g.recent)
        self.transform = BandSpectra(self.grid, settings, g.decimation, keep_columns)
        self.chain = Chain((self.front, self.spectrum, self.transform))
        self.reset()

    def reset(self) -> None:
        self.state = self.chain.initial_state()

    def update(self, samples: np.ndarray, t: np.ndarray) -> ChannelBlocks:
        self.state, blocks = self.chain.step(self.state, (samples, t))
        return blocks

    def batch_blocks(self, samples: np.ndarray, t: np.ndarray, zero_phase: bool,
                     block_hops: int | None = None):
        """The hops of the whole record in consecutive blocks of at most ``block_hops``
        (default :data:`estimators.stft.BATCH_BLOCK_HOPS`): ``(n_hops, generator of
        ChannelBlocks)``. The front end runs over the whole record first (zero-phase
        filters need every sample); each block's complex columns are freed once its
        spectra are made (kept only with ``keep_columns``, for the motion stage)."""
        analysis = (self.front.offline if zero_phase else self.front.batch)((samples, t))
        g = self.geometry
        n_hops = batch_hop_count(analysis.values.shape[1], g.min_window, g.hop)
        return n_hops, (self.transform.batch(c)
                        for c in self.spectrum.blocks(analysis, block_hops))

    def group_delay_s(self, freqs_hz: np.ndarray) -> np.ndarray:
        """The causal chain's group delay at ``freqs_hz`` (:func:`chain_group_delay_s`)."""
        return chain_group_delay_s(self.front.chain, self.fs, freqs_hz)


class ChannelPath:
    """One channel, one quantity: a :class:`ChannelGroup` of one channel whose outputs
    are :class:`HopBlock` (pre-process, sliding STFT, band spectra)."""

    def __init__(self, name: str, kind: str, settings: RateSettings, fs: float,
                 chain_kind: str | None = None, keep_columns: bool = False,
                 chain: FilterChain | None = None):
        self.name, self.kind, self.settings = name, kind, settings
        self.group = ChannelGroup([name], kind, settings, fs, chain_kind, keep_columns, chain)
        self.geometry, self.grid = self.group.geometry, self.group.grid

    @property
    def keep_columns(self) -> bool:
        return self.group.transform.keep_columns

    def reset(self) -> None:
        self.group.reset()

    def update(self, x: np.ndarray, t: np.ndarray) -> HopBlock:
        return self.group.update(np.asarray(x)[:, None], t).channel(0)

    def batch(self, x: np.ndarray, t: np.ndarray, zero_phase: bool) -> HopBlock:
        """The whole record in one call (causal twin, or zero-phase for offline).

        The columns are formed block by block (:meth:`batch_blocks`) and only what is
        made of them is kept, so a long record never holds every complex column."""
        n_hops, blocks = self.batch_blocks(x, t, zero_phase)
        n_bins, none = len(self.grid.freqs_hz), np.empty(0)
        empty = HopBlock(np.empty((0, n_bins)), none, none, none, np.empty((0, n_bins)),
                         np.empty((0, self.geometry.n_fft // 2 + 1), complex)
                         if self.keep_columns else None,
                         recent=np.empty((0, n_bins)) if self.geometry.recent else None)
        return gather_hops(n_hops, blocks, empty)

    def batch_blocks(self, x: np.ndarray, t: np.ndarray, zero_phase: bool,
                     block_hops: int | None = None):
        """:meth:`ChannelGroup.batch_blocks` of the one channel, as :class:`HopBlock`."""
        n_hops, blocks = self.group.batch_blocks(np.asarray(x)[:, None], t, zero_phase,
                                                 block_hops)
        return n_hops, (b.channel(0) for b in blocks)

    def group_delay_s(self, freqs_hz: np.ndarray) -> np.ndarray:
        return self.group.group_delay_s(freqs_hz)


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
                         filter_delay_s: np.ndarray | None = None,
                         calibrated=None) -> list[Estimate]:
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
    (zero-phase, offline): the window centre.

    ``calibrated(measures, raw_confidence)``, when given, stands in for
    :func:`estimators.calibration.calibrated_confidence` and may fill the array it
    returns later: the function then returns a function that builds the estimates once
    it has (a group's reports calibrate all their channels in one call,
    :class:`GroupReport`)."""
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
            confidence = (calibration_mod.calibrated_confidence(measures, confidence)
                          if calibrated is None else calibrated(measures, confidence))
        evidence = [tuple(row) for row in measures.tolist()]
    # The grid reaches the confidence half-width beyond the band, so that a rate on the
    # band's edge is a peak; such rates are shown at the edge (off by less than the
    # half-width), never outside the band.
    lo, hi = settings.band_per_min
    withheld = (quality < settings.min_quality) | ~np.isfinite(rate)
    shown = np.where(withheld, np.nan, np.clip(rate, lo, hi))
    time_s = block.time_s
    if filter_delay_s is not None:
        finite = np.isfinite(rate)
        at = rate if finite.all() else np.where(finite, rate, np.median(rates_grid))
        time_s = time_s - np.interp(at, rates_grid, filter_delay_s)
    recent = np.full(len(shown), np.nan)
    if block.recent is not None and len(shown):
        # A maximum on the grid's first or last bin is no peak (the spectrum rises
        # beyond the grid: slow drift, an ectopic beat's long interval): none.
        top = np.argmax(block.recent, axis=1)
        inner = (top > 0) & (top < block.recent.shape[1] - 1) & np.isfinite(shown)
        recent = np.where(inner, np.clip(rates_grid[top], lo, hi), np.nan)

    def build() -> list[Estimate]:
        return [Estimate(quantity, source, t, e, r, c, q, v, recent_rate_per_min=n)
                for t, e, r, c, q, v, n in zip(
                    time_s.tolist(), emitted_s.tolist(), shown.tolist(),
                    np.asarray(confidence).tolist(), quality.tolist(), evidence,
                    recent.tolist())]

    return build() if calibrated is None else build


@dataclass(frozen=True, eq=False)
class Report:
    """Stage (:mod:`estimators.stage`): the tracker output of one reported (quantity,
    source) -> its :class:`~estimators.estimate.Estimate` records: quality index
    (:mod:`estimators.quality`), evidence and calibrated confidence, the shown rate
    (:func:`estimates_from_track`). Input ``(Tracked, channel_rates)`` (the channels'
    rates (C, P) for a fused output, else None); output a list of estimates; state the
    causal averages carried between hops (concentration score, jumpiness)."""

    quantity: str
    source: str
    rates: np.ndarray
    settings: RateSettings
    calibrate: bool = True
    filter_delay_s: np.ndarray | None = None

    def initial_state(self) -> dict:
        return {}

    def step(self, state: dict, x, calibrated=None) -> tuple[dict, list[Estimate]]:
        """One step; with ``calibrated`` (see :func:`estimates_from_track`) the output is
        a function that builds the estimates once ``calibrated`` has answered."""
        tracked, channel_rates = x
        state = {"last": state.get("last"), "jumps": dict(state.get("jumps", {}))}
        if len(tracked.rate) == 0:
            return state, (list if calibrated is not None else [])
        out = estimates_from_track(self.quantity, self.source, tracked.block, tracked.rate,
                                   tracked.confidence, self.rates, self.settings,
                                   tracked.emitted_s, tracked.concentration, state,
                                   channel_rates, self.calibrate, self.filter_delay_s,
                                   calibrated)
        if calibrated is not None:
            return state, lambda: self._breathing(out())
        return state, self._breathing(out)

    def _breathing(self, out: list[Estimate]) -> list[Estimate]:
        """A respiration channel's confidence: P(within 2 breaths/min)."""
        if self.quantity == "rr":  # a respiration channel: P(within 2 breaths/min)
            conf = breathing_confidence.calibrated("resp", [e.confidence for e in out],
                                                   [e.quality for e in out])
            out = [dataclasses.replace(e, confidence=c) if e.has_rate else e
                   for e, c in zip(out, conf.tolist())]
        return out

    def batch(self, x) -> list[Estimate]:
        return self.step(self.initial_state(), x)[1]

    def split(self, x, bounds) -> list:
        tracked, channel_rates = x
        edges = [0, *[int(b) for b in bounds], len(tracked.rate)]
        return [(tracked.hops(slice(lo, hi)),
                 None if channel_rates is None else channel_rates[:, lo:hi])
                for lo, hi in zip(edges[:-1], edges[1:])]

    def join(self, parts) -> list[Estimate]:
        return [e for part in parts for e in part]


class _Deferred:
    """Collects the calibration calls of several reports, answers them after one call
    of :func:`estimators.calibration.calibrated_confidence` on all their rows."""

    def __init__(self):
        self.requests: list = []

    def __call__(self, measures: np.ndarray, raw: np.ndarray) -> np.ndarray:
        out = np.full(len(measures), np.nan)
        self.requests.append((measures, np.asarray(raw, dtype=np.float64), out))
        return out

    def resolve(self) -> None:
        if not self.requests:
            return
        calibrated = calibration_mod.calibrated_confidence(
            np.concatenate([m for m, _, _ in self.requests]),
            np.concatenate([r for _, r, _ in self.requests]))
        a = 0
        for measures, _, out in self.requests:
            out[:] = calibrated[a:a + len(measures)]
            a += len(measures)


@dataclass(frozen=True)
class GroupReport(Parallel):
    """Stage: the :class:`Report` of each channel of a group side by side (as
    :class:`~estimators.stage.Parallel`), their heart-rate confidences calibrated in one
    call for all channels (the map works row by row, so the values are those of a call
    per channel)."""

    def step(self, state: tuple, x: tuple) -> tuple[tuple, tuple]:
        if len(self.stages) == 1:  # one channel: nothing to gather
            s, estimates = self.stages[0].step(state[0], x[0])
            return (s,), (estimates,)
        deferred = _Deferred()
        states, outputs = [], []
        for report, s, item in zip(self.stages, state, x):
            s, estimates = report.step(s, item, deferred)
            states.append(s)
            outputs.append(estimates)
        deferred.resolve()
        return tuple(states), tuple(build() for build in outputs)

    def batch(self, x: tuple) -> tuple:
        return self.step(self.initial_state(), x)[1]


def tracker_stage(settings: RateSettings, grid_rates: np.ndarray,
                  n_channels: int = 1) -> tracker_mod.RidgeTrack:
    """The tracker stage of ``n_channels`` outputs of ``settings`` on ``grid_rates``."""
    step = grid_rates[1] - grid_rates[0]
    params = tracker_mod.make_params(step, settings.hop_s, settings.max_change_per_min_per_s,
                                     settings.jump_probability,
                                     settings.confidence_halfwidth_per_min, settings.lag_hops)
    start = (None if settings.start_prior_above_per_min == 0 else
             tracker_mod.start_posterior(grid_rates, settings.start_prior_above_per_min))
    return tracker_mod.RidgeTrack(grid_rates, params, settings.emission_power, True,
                                  quality_mod.CHANCE_FACTOR, quality_mod.CONCENTRATION_SPAN,
                                  n_channels, start)


@dataclass(frozen=True, eq=False)
class GroupTracking:
    """Stage (:mod:`estimators.stage`): the band spectra of C channels
    (:class:`ChannelBlocks`) -> each channel's tracker output, all channels through one
    :class:`~estimators.tracker.RidgeTrack` call. The output is a tuple with one
    ``(Tracked, None)`` per channel: the input of that channel's :class:`Report`."""

    tracker: tracker_mod.RidgeTrack

    def initial_state(self) -> tracker_mod.TrackState:
        return self.tracker.initial_state()

    def _outputs(self, blocks: ChannelBlocks, out: tracker_mod.TrackOutput) -> tuple:
        return tuple((Tracked(blocks.channel(c), out.rate[c], out.confidence[c],
                              out.concentration[c], blocks.emitted_s), None)
                     for c in range(len(out.rate)))

    @staticmethod
    def _input(blocks: ChannelBlocks) -> tracker_mod.TrackInput:
        return tracker_mod.TrackInput(blocks.spectra, blocks.integrity, blocks.magnitude)

    def step(self, state, blocks: ChannelBlocks):
        state, out = self.tracker.step(state, self._input(blocks))
        return state, self._outputs(blocks, out)

    def batch(self, blocks: ChannelBlocks) -> tuple:
        return self._outputs(blocks, self.tracker.batch(self._input(blocks)))

    def split(self, blocks: ChannelBlocks, bounds) -> list:
        edges = [0, *[int(b) for b in bounds], len(blocks)]
        return [blocks.hops(slice(lo, hi)) for lo, hi in zip(edges[:-1], edges[1:])]

    def join(self, parts) -> tuple:
        return tuple((Tracked.concat([p[c][0] for p in parts]), None)
                     for c in range(len(parts[0])))


@dataclass
class MotionTrackingState:
    """What :class:`MotionTracking` carries: each motion stage's state, each heart-rate
    output's tracker state and (with fixed-lag smoothing) the hops it holds back,
    whether the references are missing, and how many hops the motion stage still
    trusts no track."""

    motion: tuple
    trackers: tuple
    held: tuple
    references_missing: bool = False
    untrusted_hops: int = 0


@dataclass(frozen=True)
class ExerciseHops:
    """Input of :class:`MotionTracking`: the heart-rate channels' blocks by output key
    and the accelerometer axes' blocks by name, all on the same hops."""

    blocks: dict
    references: dict

    def __len__(self) -> int:
        return len(next(iter(self.blocks.values())))

    def __iter__(self):
        return iter((self.blocks, self.references))


@dataclass(frozen=True, eq=False)
class MotionTracking:
    """Stage (:mod:`estimators.stage`): the exercise path's heart-rate tracking, hop by
    hop. The motion stage (:class:`~estimators.motion.MotionStage`) of every PPG
    channel at hop ``p`` trusts its canceller where the guiding tracker (the fused
    output when there is one, else the channel's own) expects the pulse after hop
    ``p - 1`` (:func:`estimators.motion.expected_pulse`); then every heart-rate output
    (channels, then fused) takes one step of its tracker (a one-channel
    :class:`~estimators.tracker.RidgeTrack`, or with fixed-lag smoothing a
    :class:`~estimators.tracker.LagTrack`, whose outputs refer to earlier hops; both
    start, and start again, from the settings' start prior), and each rate is refined
    on the refinement spectra of the hop it refers to (the motion stage's third output,
    the canceller's residual; :func:`refined`, within ``refine_radius_per_min``, 0:
    not refined). The refinement feeds nothing back: the trackers' states and the
    expected pulse do not see it.

    Input :class:`ExerciseHops`: the heart-rate channels' :class:`HopBlock` (with
    complex columns for the motion stage) by key, and the accelerometer axes' blocks by
    name, all on the same hops. Output ``(tracked, blocks)`` by output key: the tracker
    output and the blocks as tracked (motion-suppressed spectra, the fused block);
    both empty when the input has no hop.

    When the references come back after an absence (their window integrity below
    :data:`estimators.calibration.REFERENCE_MISSING`), the trackers start afresh and
    for one window the motion stage trusts no track, as at start-up: the track was made
    without them and may sit on the cadence. Meanwhile the evidence says the references
    are missing (the blind family of the confidence map).
    """

    keys: tuple
    motion_keys: tuple
    motion: tuple
    tracker: tracker_mod.RidgeTrack
    reference_names: tuple
    trust: str
    window_hops: int
    refine_radius_per_min: float = 0.0

    def initial_state(self) -> MotionTrackingState:
        return MotionTrackingState(tuple(m.initial_state() for m in self.motion),
                                   (self.tracker.initial_state(),) * len(self.keys),
                                   ((),) * len(self.keys))

    def _expected(self, state: MotionTrackingState, key) -> np.ndarray | None:
        guide = state.trackers[self.keys.index(("hr", FUSED) if ("hr", FUSED) in self.keys
                                               else key)]
        if self.trust == "everywhere":
            return np.ones((1, len(self.tracker.rates)))
        if self.trust == "nowhere" or guide.hops_seen == 0 or state.untrusted_hops > 0:
            return None
        return motion_mod.expected_pulse(np.reshape(guide.posterior, -1),
                                         self.tracker.params.halfwidth_bins)

    def _track(self, tracker_state, held: tuple, block: HopBlock):
        """One hop of one output's tracker, its rate refined on the hops' refinement
        spectra (:func:`refined`): ``(state, held, Tracked)``."""
        if isinstance(self.tracker, tracker_mod.RidgeTrack):
            tracker_state, out = self.tracker.step(tracker_state, tracker_mod.TrackInput(
                block.spectra[None], block.integrity[None], block.magnitude[None]))
            tracked = Tracked(block, out.rate[0], out.confidence[0], out.concentration[0],
                              block.emitted_s)
        else:
            tracker_state, out = self.tracker.step(tracker_state, tracker_mod.TrackInput(
                block.spectra, block.integrity, block.magnitude))
            held, tracked = lagged_tracked(held, block, out, tracker_state.hops_seen,
                                           self.tracker.params.lag_hops)
        return (tracker_state, held,
                refined(tracked, self.tracker.rates, self.refine_radius_per_min))

    def step(self, state: MotionTrackingState, x) -> tuple[MotionTrackingState, tuple]:
        blocks, references = x
        refs = [references[name].columns for name in self.reference_names]
        acc = np.stack(refs, axis=-1) if refs else None
        n_hops = len(blocks[self.motion_keys[0]])
        reference = (np.min([references[name].integrity for name in self.reference_names],
                            axis=0) if self.reference_names else np.zeros(n_hops))
        motion_states, trackers, held = list(state.motion), list(state.trackers), list(state.held)
        missing, untrusted = state.references_missing, state.untrusted_hops
        tracked = {key: [] for key in self.keys}
        hops = {key: [] for key in self.keys}
        fresh = self.initial_state()
        for p in range(n_hops):
            if self.reference_names and reference[p] < calibration_mod.REFERENCE_MISSING:
                missing = True
            elif missing:
                missing, untrusted = False, self.window_hops
                trackers = list(fresh.trackers)
            hop = {key: take_hops(blocks[key], slice(p, p + 1)) for key in self.keys
                   if key in blocks}
            for i, key in enumerate(self.motion_keys):
                guide = MotionTrackingState((), tuple(trackers), (), missing, untrusted)
                motion_states[i], (spectra, lines, refine) = self.motion[i].step(
                    motion_states[i], (hop[key].columns, None if acc is None else
                                       acc[p:p + 1], self._expected(guide, key)))
                # While the stage warms up again its output is not what the motion
                # calibration was fitted on: the evidence says the references are
                # missing (the blind family) until a window has passed.
                hop[key] = dataclasses.replace(
                    hop[key], spectra=spectra, magnitude=spectra, columns=None,
                    motion_lines=lines, refine=refine, reference_integrity=(
                        np.zeros(1) if untrusted > 0 else reference[p:p + 1]))
            if ("hr", FUSED) in self.keys:
                hop[("hr", FUSED)] = fuse_blocks([hop[key] for key in self.keys
                                                  if key[1] != FUSED])
            for k, key in enumerate(self.keys):
                trackers[k], held[k], new = self._track(trackers[k], held[k], hop[key])
                tracked[key].append(new)
                hops[key].append(hop[key])
            untrusted = max(0, untrusted - 1)
        state = MotionTrackingState(tuple(motion_states), tuple(trackers), tuple(held),
                                    missing, untrusted)
        if n_hops == 0:
            return state, ({}, {})
        return state, ({key: Tracked.concat(parts) for key, parts in tracked.items()},
                       {key: concat_blocks(parts) for key, parts in hops.items()})

    def batch(self, x) -> tuple:
        return self.step(self.initial_state(), x)[1]

    def split(self, x, bounds) -> list:
        blocks, references = x
        n = len(blocks[self.motion_keys[0]])
        edges = [0, *[int(b) for b in bounds], n]
        return [ExerciseHops({k: take_hops(b, slice(lo, hi)) for k, b in blocks.items()},
                             {k: take_hops(b, slice(lo, hi)) for k, b in references.items()})
                for lo, hi in zip(edges[:-1], edges[1:])]

    def join(self, parts) -> tuple:
        parts = [p for p in parts if p[0]]
        if not parts:
            return {}, {}
        return ({key: Tracked.concat([p[0][key] for p in parts]) for key in parts[0][0]},
                {key: concat_blocks([p[1][key] for p in parts]) for key in parts[0][1]})


def lagged_tracked(held: tuple, block: HopBlock, out, hops_seen: int, lag: int
                   ) -> tuple[tuple, "Tracked"]:
    """The hops a lagged tracker output (:class:`~estimators.tracker.LagOutput`) refers
    to, from the blocks held back (``held``) and the newest ``block``: ``(held,
    Tracked)``, the new held blocks being the newest ``lag + 1`` hops."""
    joined = concat_blocks([*held, block])
    pos = out.index - (hops_seen - len(joined))
    referred = take_hops(joined, pos)
    newest = joined.emitted_s[pos + lag]
    keep = take_hops(joined, np.arange(max(0, len(joined) - lag - 1), len(joined)))
    return (keep,), Tracked(referred, out.rate, out.confidence, None, newest)


class _Output:
    """One reported (quantity, source): its own tracker (the fused output, the motion
    stage's hop-by-hop tracking and fixed-lag smoothing use it; channels of a group
    without those are tracked by their group's stage) plus the lag history of hops and
    the :class:`Report` stage's state."""

    def __init__(self, quantity: str, source: str, grid_rates: np.ndarray,
                 settings: RateSettings, filter_delay_s: np.ndarray | None = None,
                 calibrate: bool = True):
        self.quantity, self.source, self.settings = quantity, source, settings
        self.rates = grid_rates
        self.filter_delay_s = filter_delay_s  # causal group delay per grid rate (F,)
        stage = tracker_stage(settings, grid_rates)
        self.tracker = tracker_mod.RidgeTracker(grid_rates, stage.params, stage.power, True,
                                                stage.chance_factor, stage.span, stage.start)
        self.report = Report(quantity, source, grid_rates, settings, calibrate,
                             filter_delay_s)
        self.reset()

    @property
    def calibrate(self) -> bool:
        return self.report.calibrate

    def reset(self) -> None:
        self.tracker.reset()
        self._held = ()
        self.report_state = self.report.initial_state()

    def track(self, block: HopBlock) -> "Tracked":
        """Advance the tracker over the hops of ``block``; the raw output for the hops
        it refers to (with fixed-lag smoothing, ``lag_hops`` earlier)."""
        if len(block) == 0:
            empty = np.empty(0)
            return Tracked(block, empty, empty, empty, empty)
        lag = self.settings.lag_hops
        if lag == 0:
            rate, conf, frac = self.tracker.track(block.spectra, block.integrity, block.magnitude)
            return refined(Tracked(block, rate, conf, frac, block.emitted_s), self.rates,
                           self.settings.refine_radius_per_min)
        rate, conf, index = self.tracker.update(block.spectra, block.integrity, block.magnitude)
        # Hops the smoothed outputs refer to: held from earlier updates plus this block.
        self._held, tracked = lagged_tracked(
            self._held, block, tracker_mod.LagOutput(rate, conf, index),
            self.tracker.hops_seen, lag)
        return refined(tracked, self.rates, self.settings.refine_radius_per_min)

    def estimates(self, tracked: "Tracked", channel_rates: np.ndarray | None = None
                  ) -> list[Estimate]:
        """Estimate records of tracker output (the :class:`Report` stage);
        ``channel_rates`` (C, P): for a fused output, the channels' rates of the same
        hops."""
        self.report_state, out = self.report.step(self.report_state, (tracked, channel_rates))
        return out


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

    def __len__(self) -> int:
        return len(self.rate)

    def hops(self, index) -> "Tracked":
        return Tracked(take_hops(self.block, index), self.rate[index],
                       self.confidence[index],
                       None if self.concentration is None else self.concentration[index],
                       self.emitted_s[index])

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


def refined(tracked: Tracked, rates: np.ndarray, radius_per_min: float) -> Tracked:
    """The tracker output with each rate moved onto the nearest peak of its hop's
    refinement spectra (``block.refine``, the motion stage's residual;
    :func:`estimators.refine.refine_rate`) within ``radius_per_min``; as it is when the
    hops carry none. The confidence and the concentration score stay those of the
    tracked rate, as the tracker gave them."""
    if tracked.block.refine is None or len(tracked) == 0:
        return tracked
    return dataclasses.replace(tracked, rate=refine_mod.refine_rate(
        tracked.block.refine, rates, tracked.rate, radius_per_min))


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
        motion_on = bool(hr.motion) and any(kind == "ppg" for _, kind in self.channels)
        self._index = {name: i for i, (name, _) in enumerate(self.channels)}
        # Channels of one kind and quantity advance together (ChannelGroup: one
        # front-end pass, one FFT call, one call per transform for all of them).
        members: dict[tuple[str, str], list[str]] = {}
        for name, kind in self.channels:
            quantity = "hr" if kind in ("ppg", "ecg") else "rr" if kind == "resp" else "acc"
            members.setdefault((quantity, kind), []).append(name)
        self.groups: dict[tuple[str, str], ChannelGroup] = {}
        for (quantity, kind), names in members.items():
            self.groups[(quantity, kind)] = ChannelGroup(
                names, kind, rr if quantity == "rr" else hr, fs,
                chain_kind="acc" if quantity == "acc" else None,
                keep_columns=motion_on and kind in ("ppg", "acc"))
        self._columns = {gid: [self._index[n] for n in group.names]
                         for gid, group in self.groups.items()}
        # One-channel views of the same paths: grids, geometry, and the offline twin,
        # which runs each channel over its whole record.
        self.paths: dict[tuple[str, str], ChannelPath] = {}
        self.motion_paths: dict[str, ChannelPath] = {}
        for name, kind in self.channels:
            keep = motion_on and kind in ("ppg", "acc")
            if kind in ("ppg", "ecg"):
                self.paths[("hr", name)] = ChannelPath(name, kind, hr, fs, keep_columns=keep)
            elif kind == "resp":
                self.paths[("rr", name)] = ChannelPath(name, kind, rr, fs)
            else:
                self.motion_paths[name] = ChannelPath(name, kind, hr, fs, chain_kind="acc",
                                                      keep_columns=keep)
        self.outputs: dict[tuple[str, str], _Output] = {}
        delays = {key: path.group_delay_s(path.grid.rates_per_min / 60.0)
                  for key, path in self.paths.items()}
        hr_paths = [k for k in self.paths if k[0] == "hr"]
        # The confidence map is fitted on PPG heart rate; ECG (and a fusion with ECG)
        # keeps the tracker's raw confidence until a map is fitted for it.
        for (quantity, name), path in self.paths.items():
            self.outputs[(quantity, name)] = _Output(
                quantity, name, path.grid.rates_per_min, path.settings,
                delays[(quantity, name)], quantity == "hr" and path.kind == "ppg")
        if len(hr_paths) >= 2:
            grid = self.paths[hr_paths[0]].grid.rates_per_min
            self.outputs[("hr", FUSED)] = _Output(
                "hr", FUSED, grid, hr, np.mean([delays[k] for k in hr_paths], axis=0),
                {self.paths[k].kind for k in hr_paths} == {"ppg"})
        self.last_blocks: dict[tuple[str, str], HopBlock] = {}
        self.motion_spectra: dict[str, HopBlock] = {}
        # Motion stage (estimators.motion) for PPG heart-rate paths when the profile asks.
        self.motion: dict[tuple[str, str], motion_mod.MotionStage] = {}
        self.motion_tracking: MotionTracking | None = None
        if motion_on:
            for key, path in self.paths.items():
                if key[0] == "hr" and path.kind == "ppg":
                    self.motion[key] = motion_mod.MotionStage(
                        motion_mod.motion_params(hr, path.grid.band, path.geometry.n_fft,
                                                 hr.hop_s), len(self.motion_paths))
            first = next(iter(self.motion))
            tracker = tracker_stage(hr, self.paths[first].grid.rates_per_min)
            if hr.lag_hops:
                tracker = tracker_mod.LagTrack(tracker.rates, tracker.params, tracker.power,
                                               True, tracker.chance_factor, tracker.span,
                                               tracker.start)
            self.motion_tracking = MotionTracking(
                tuple(key for key in self.outputs if key[0] == "hr"), tuple(self.motion),
                tuple(self.motion.values()), tracker,
                tuple(self.motion_paths), hr.motion_trust,
                int(round(hr.window_s / hr.hop_s)), hr.refine_radius_per_min)
        self._motion_state = (None if self.motion_tracking is None
                              else self.motion_tracking.initial_state())
        # Channels of a group are tracked together (one compiled call) unless the motion
        # stage tracks them hop by hop or fixed-lag smoothing holds hops back.
        # (tracker -> report per channel: GroupTracking, then GroupReport).
        self.group_tracking: dict[tuple[str, str], Chain] = {
            gid: Chain((GroupTracking(tracker_stage(group.settings, group.grid.rates_per_min,
                                                    len(group.names))),
                        GroupReport(tuple(self.outputs[(gid[0], name)].report
                                          for name in group.names))))
            for gid, group in self.groups.items()
            if gid[0] != "acc" and group.settings.lag_hops == 0
            and not (self.motion and gid[0] == "hr")}
        self._track_states = {gid: chain.initial_state()
                              for gid, chain in self.group_tracking.items()}
        self._grouped_keys = {(gid[0], name) for gid in self.group_tracking
                              for name in self.groups[gid].names}
        self._rate_now = {quantity: now_mod.RateNow(now_mod.params_for(quantity))
                          for quantity in ("hr", "rr")}
        self._newest_s = np.nan  # newest timestamp seen (labels never go backwards)
        self._now_states: dict = {}  # (quantity, source) -> rate_now.NowState
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
        for group in self.groups.values():
            group.reset()
        self._track_states = {gid: chain.initial_state()
                              for gid, chain in self.group_tracking.items()}
        for out in self.outputs.values():
            out.reset()
        if self.motion_tracking is not None:
            self._motion_state = self.motion_tracking.initial_state()
        for breathing in self.pulse_breathing.values():
            breathing.reset()
        self._now_states = {}

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

    def track_with_motion(self, blocks: dict, motion_blocks: dict) -> tuple[list, dict]:
        """The heart-rate outputs of the exercise path over their blocks (the
        :class:`MotionTracking` stage, then each output's report): the heart-rate
        estimates and the blocks as tracked (motion-suppressed spectra, fused block)."""
        self._motion_state, (tracked, hops) = self.motion_tracking.step(
            self._motion_state, ExerciseHops(blocks, motion_blocks))
        if not tracked:
            return [], {}
        return self._report(list(tracked), tracked), hops

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

    def use_chain(self, name: str, chain: FilterChain) -> None:
        """Research benches: replace the filter chain of channel ``name`` (and of the
        channels that share its group) by ``chain``, and start afresh."""
        for gid, group in list(self.groups.items()):
            if name in group.names:
                self.groups[gid] = ChannelGroup(group.names, group.kind, group.settings,
                                                self.fs, None if gid[0] != "acc" else "acc",
                                                group.transform.keep_columns, chain)
                for other in group.names:
                    key = (gid[0], other)
                    if key in self.paths:
                        path = self.paths[key]
                        self.paths[key] = ChannelPath(other, path.kind, path.settings,
                                                      self.fs, None, path.keep_columns, chain)
        self.restart()

    def _with_rate_now(self, estimates: list[Estimate]) -> list[Estimate]:
        """The estimates (in emitted order) with their rate now and its confidence: each
        output's estimates through its :class:`~estimators.rate_now.RateNow` stage,
        with its own state."""
        by_output: dict = {}
        for i, e in enumerate(estimates):
            by_output.setdefault((e.quantity, e.source), []).append(i)
        out = list(estimates)
        for key, index in by_output.items():
            stage = self._rate_now[key[0]]
            state = self._now_states.get(key) or stage.initial_state()
            self._now_states[key], done = stage.step(state, [estimates[i] for i in index])
            for i, e in zip(index, done):
                out[i] = e
        return out

    def _track_groups(self) -> tuple[list[Estimate], dict]:
        """The estimates of every group with a tracking chain (one tracker call for all
        its channels, then each channel's report), and the heart-rate channels' rates
        (for a fused output's evidence)."""
        estimates, channel_rates = [], {}
        for gid, chain in self.group_tracking.items():
            self._track_states[gid], per_channel = chain.step(self._track_states[gid],
                                                              self._group_blocks[gid])
            for name, new in zip(self.groups[gid].names, per_channel):
                estimates.extend(new)
                if gid[0] == "hr":
                    channel_rates[name] = [e.rate_per_min for e in new]
        return estimates, channel_rates

    def _update_stretch(self, samples: np.ndarray, labels: np.ndarray) -> list[Estimate]:
        """One stretch without a gap; ``labels`` never decrease."""
        if len(labels):
            self._newest_s = float(labels[-1])
        blocks = {}
        self._group_blocks = {}
        for gid, group in self.groups.items():
            grouped = group.update(samples[:, self._columns[gid]], labels)
            self._group_blocks[gid] = grouped
            for c, name in enumerate(group.names):
                if gid[0] == "acc":
                    self.motion_spectra[name] = grouped.channel(c)
                else:
                    blocks[(gid[0], name)] = grouped.channel(c)
        estimates = []
        if self.motion:
            hr_estimates, tracked = self.track_with_motion(blocks, self.motion_spectra)
            estimates.extend(hr_estimates)
            blocks.update(tracked)
        elif ("hr", FUSED) in self.outputs:
            blocks[("hr", FUSED)] = fuse_blocks([b for (q, _), b in blocks.items() if q == "hr"])
        self.last_blocks = blocks
        grouped, channel_rates = self._track_groups()
        estimates.extend(grouped)
        # The outputs no group tracks: fused, lagged (after the channels whose rates the
        # fused output reads).
        for key, out in self.outputs.items():
            if (self.motion and key[0] == "hr") or key in self._grouped_keys:
                continue
            new = out.estimates(out.track(blocks[key]), _stacked(list(channel_rates.values()))
                                if key[1] == FUSED else None)
            if key[0] == "hr" and key[1] != FUSED:
                channel_rates[key[1]] = [e.rate_per_min for e in new]
            estimates.extend(new)
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
