"""Breathing rate from a pulse (PPG or ECG): beats, respiratory modulations, one ridge
per modulation, quality-weighted agreement.

Breathing modulates a pulse in three ways (Karlen, Raman, Ansermino & Dumont,
"Multiparameter respiratory rate estimation from the photoplethysmogram", IEEE TBME
60(7), 2013):

* **intensity** (RIIV): the level of the pulse; here the mid-level of each PPG beat
  (half-way between its foot and its peak), and for ECG the mean level over each beat
  (baseline wander);
* **amplitude** (RIAV): the PPG beat's rise from its foot; for ECG the RMS of the QRS
  complex (electrical axis and thoracic impedance change with the lungs' filling);
* **frequency** (RIFV): the beat-to-beat interval (respiratory sinus arrhythmia).

Chain, per PPG or ECG channel; every stage is a step function with carried state and
has a batch twin:

1. :func:`detect_step` (in :mod:`estimators.beats`) finds beats causally
   (:func:`beat_params`): a candidate is the largest value of the detection signal
   within +-0.25 s, accepted when it reaches a fraction of the recent beats' heights.
   Each beat gives a sub-sample position and its three features; premature or missed
   beats drop their interval.
2. :func:`resample_step` evenly resamples the features at the analysis rate of the
   breathing settings (5 Hz): linear interpolation between beats, so a sample waits for
   the beat after it; beats more than 2 s apart leave NaN.
3. :class:`ModulationBank`: each modulation is band-passed like a respiration signal
   (relative to its first value) and goes through the engine's sliding STFT on the
   breathing grid. Breathing faster than half the beat rate cannot show in a
   once-per-beat series (Nyquist), so those bins are masked (:func:`nyquist_mask`).
4. One :class:`estimators.tracker.RidgeTracker` per modulation follows its ridge. Its
   quality is integrity x spectral concentration at the rate
   (:func:`peak_concentration`) x modulation depth (:func:`depth_score`); below
   ``min_quality`` it is withheld.
5. :func:`fuse_modulations`: among the groups of modulations that agree (spread at
   most ``agreement_per_min``), the one with the largest summed quality reports its
   quality-weighted mean rate when that support reaches ``min_support``; else no
   estimate (NaN) -- the 'smart fusion' of Karlen et al. (2013), weighted by quality.

:class:`PulseBreathing` composes the chain (``update(x, t) -> list[Estimate]``, and
:meth:`PulseBreathing.offline`, the zero-phase twin with Viterbi ridges).

Index vocabulary: ``k`` raw sample (count from the first sample, 0-based), ``j``
analysis sample, ``p`` hop, ``f`` frequency bin, ``i`` beat.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from estimators import breathing_confidence
from estimators import deshape as deshape_mod
from estimators import quality as quality_mod
from estimators import tracker as tracker_mod
from estimators.config import RateSettings
from estimators.errors import ParameterError
from estimators.estimate import Estimate
from estimators.preprocess import (chain_group_delay_s, design_chain, initial_state,
                                   preprocess_batch, preprocess_step)
from estimators.stft import SlidingSTFT, batch_hop_count, gather_hops, stft_blocks

# Beat detection lives in estimators.beats; its names stay importable from here.
from estimators.beats import (BEAT_LIMIT_WINDOW_S, MIN_FS_HZ, MODULATIONS,  # noqa: F401
                              PULSE_KINDS, Beats, BeatParams, BeatState, beat_initial_state,
                              beat_params, detect_batch, detect_step)


# ---------------------------------------------------------------- even resampling


@dataclass(frozen=True)
class ModulationSamples:
    """Evenly sampled modulations: ``values`` (n, 3) in :data:`MODULATIONS` order (NaN
    where unknown), ``time_s`` (n,) timestamps of the grid samples, ``ready_s`` (n,)
    timestamp of the newest raw sample each value depended on."""

    values: np.ndarray
    time_s: np.ndarray
    ready_s: np.ndarray

    def __len__(self) -> int:
        return len(self.time_s)


@dataclass
class ResampleState:
    """Carried by :func:`resample_step`: grid samples seen but not yet emitted, and the
    newest beat."""

    count: int
    next_j: int
    pending_s: np.ndarray
    last_index: float
    last_position: float
    last_features: np.ndarray


def resample_initial_state() -> ResampleState:
    """Nothing seen, no beat yet."""
    return ResampleState(0, 0, np.empty(0), -np.inf, -np.inf, np.full(3, np.nan))


def resample_step(state: ResampleState, beats: Beats, t: np.ndarray, decimation: int,
                  params: BeatParams) -> tuple[ResampleState, ModulationSamples]:
    """Emit the grid samples that the beats of this chunk (and the raw samples seen so
    far) decide.

    Grid sample ``j`` sits at raw sample ``k_j = j M + M - 1`` (``M = decimation``, the
    convention of :mod:`estimators.preprocess`) and takes its timestamp. Its value is
    the linear interpolation of the features of the beats ``i``, ``i + 1`` around it
    (``position_i <= k_j < position_{i+1}``), so it waits for beat ``i + 1``. It is NaN
    before the first beat and inside gaps (beats more than ``max_gap`` samples apart);
    a sample in a gap is emitted as soon as no beat can close the gap in time, at raw
    count ``T = lookahead + max(k_j + 1, index_i + max_gap + 1)``.

    Parameters
    ----------
    state : carried state (updated in place and returned).
    beats : beats decided in this chunk (from :func:`detect_step` on the same chunk).
    t : timestamps of the raw samples of this chunk.
    decimation : ``M``.
    params : the beat parameters the beats came from.
    """
    n = len(t)
    m = decimation
    before = state.count
    state.count += n
    first = (m - 1 - before) % m
    state.pending_s = np.concatenate((state.pending_s, t[first::m]))
    r, gap = params.lookahead, params.max_gap
    values, times, ready = [], [], []

    def emit(limit: float, nan_ready_base: float, beat_ready: float, interp):
        """Emit grid samples with ``k_j < limit``."""
        while state.next_j * m + m - 1 < limit:
            k_j = state.next_j * m + m - 1
            value = interp(k_j)
            if np.isnan(value).any():
                when = min(beat_ready, r + max(k_j + 1, nan_ready_base))
            else:
                when = beat_ready
            values.append(value)
            ready.append(when)
            times.append(state.pending_s[0])
            state.pending_s = state.pending_s[1:]
            state.next_j += 1

    for i in range(len(beats)):
        index, position = beats.index[i], beats.position[i]
        features = beats.features[i]
        closes = index - state.last_index <= gap
        p0, f0 = state.last_position, state.last_features

        def interp(k_j, p0=p0, f0=f0, position=position, features=features, closes=closes):
            if not closes or k_j < p0:
                return np.full(3, np.nan)
            w = (k_j - p0) / (position - p0)
            return (1.0 - w) * f0 + w * features

        emit(position, state.last_index + gap + 1, beats.ready[i], interp)
        state.last_index, state.last_position = float(index), float(position)
        state.last_features = features.copy()
    # Gap rule: no beat can now land before these grid samples in time to close the gap.
    if state.count - r - state.last_index > gap:
        emit(state.count - r, state.last_index + gap + 1, np.inf,
             lambda k_j: np.full(3, np.nan))
    ready = np.asarray(ready, dtype=np.int64) if ready else np.empty(0, np.int64)
    ready_s = t[ready - 1 - before] if len(ready) else np.empty(0)
    return state, ModulationSamples(np.array(values).reshape(-1, 3), np.array(times),
                                    ready_s)


def resample_batch(beats: Beats, t: np.ndarray, decimation: int,
                   params: BeatParams) -> ModulationSamples:
    """All grid samples of a record in one call (equal to any chunking of
    :func:`resample_step` fed with the same beats)."""
    return resample_step(resample_initial_state(), beats, t, decimation, params)[1]


# ------------------------------------------------------------- modulation spectra


MODULATION_STUCK_S = 3.0
"""A modulation that keeps one value this long carries no breathing (e.g. a pulse of
constant amplitude); its samples count as stuck. Our own choice: about three beats."""

CONCENTRATION_FULL = 0.5
"""Share of the band's power near the rate at which the concentration score is full."""

DEPTH_FLOOR = 0.002
DEPTH_FULL = 0.01
"""Modulation depth (RMS relative to its scale, see :class:`ModulationHops`) at which the
depth score leaves 0 and at which it is full. A pulse peak sampled at 125 Hz moves by up
to ``(4 ms) ** 2 / (2 sigma ** 2)`` of its height with the beat's phase against the
sample clock (0.3 % for a 50 ms systolic rise), and 1 % noise on a 17-sample QRS moves
its RMS by about 0.5 %: shallower than that, a modulation is sampling and noise, not
breathing. Our own choice; on BIDMC records 01-12 the breathing modulations are mostly
1-15 % deep (beat intervals and some ECG levels shallower, 0.5-1 %)."""

_N_SUMS = 7


@dataclass(frozen=True)
class ModulationHops:
    """Per-hop output of :class:`ModulationBank`.

    ``spectra`` (P, 3, F) band spectra; ``integrity`` (P, 3); ``depth`` (P, 3) RMS of
    each band-passed modulation over the window relative to its scale (the mean beat
    amplitude for intensity and amplitude, the mean interval for frequency);
    ``beat_rate`` (P,) mean beat rate over the window (per minute, NaN without
    intervals); ``time_s`` (P,) window centres; ``emitted_s`` (P,) newest raw timestamp
    each window depended on.
    """

    spectra: np.ndarray
    integrity: np.ndarray
    depth: np.ndarray
    beat_rate: np.ndarray
    time_s: np.ndarray
    emitted_s: np.ndarray

    _FIELDS = ("spectra", "integrity", "depth", "beat_rate", "time_s", "emitted_s")

    def __len__(self) -> int:
        return len(self.time_s)

    def take(self, index) -> "ModulationHops":
        return ModulationHops(*(getattr(self, name)[index] for name in self._FIELDS))

    @staticmethod
    def concat(parts: list["ModulationHops"]) -> "ModulationHops":
        if len(parts) == 1:
            return parts[0]
        return ModulationHops(*(np.concatenate([getattr(h, name) for h in parts])
                                for name in ModulationHops._FIELDS))


def band_spectra(magnitude: np.ndarray, grid: deshape_mod.DeshapeGrid,
                 settings: RateSettings) -> np.ndarray:
    """De-shape (``settings.deshape``) or plain band spectra of one-sided magnitudes."""
    if settings.deshape:
        return deshape_mod.deshape(magnitude, grid, settings.gamma)
    return deshape_mod.plain(magnitude, grid)


TILT_REFERENCE_PER_MIN = 15.0
"""Rate at which :func:`tilt_spectra` leaves a spectrum unchanged: a typical adult
breathing rate at rest (12-20 per minute, common practice), so that tilted spectra keep
about the scale of the plain ones where breathing usually is."""


def tilt_spectra(spectra: np.ndarray, rates_per_min: np.ndarray, tilt: float) -> np.ndarray:
    """``spectra * (rate / TILT_REFERENCE_PER_MIN) ** tilt`` along the last axis.

    Beat-to-beat series carry slow waves besides breathing (vasomotor and posture
    changes, baseline drift) whose power grows towards the bottom of the band, so the
    largest peak of a plain spectrum is often that drift (5-10 per minute while the
    breaths come at 15-21, on BIDMC records 02, 03, 08, 09 and 13). A tilt of 1 would be
    the spectrum of the first difference (it weights by rate); smaller tilts even out
    drift without lifting the breathing's second harmonic above it.

    Examples
    --------
    >>> tilt_spectra(np.ones((1, 3)), np.array([7.5, 15.0, 30.0]), 0.5).round(3).tolist()
    [[0.707, 1.0, 1.414]]
    """
    if tilt == 0:
        return spectra
    return spectra * (np.asarray(rates_per_min) / TILT_REFERENCE_PER_MIN) ** tilt


def harmonic_support(spectra: np.ndarray, rates_per_min: np.ndarray, weight: float,
                     cap: float) -> np.ndarray:
    """``S(f) + weight * min(cap * S(f), S(2 f))`` along the last axis (``S(2 f)``
    linearly interpolated on the grid, 0 beyond it).

    A breathing modulation that is not a sine (a quick inspiration, a slow expiration)
    has a second harmonic, which the tilt lifts further; on BIDMC 08 the PPG intensity
    and amplitude followed it for the whole record (41 per minute against 21). With the
    harmonic's support a fundamental outweighs its harmonic unless that harmonic is more
    than ``1 + weight * cap`` times as strong; the cap keeps a rate without a peak of its
    own (half the breathing rate) from borrowing the breathing peak (the same rule as the
    heart-rate motion stage, :mod:`estimators.motion`).

    Examples
    --------
    >>> s = np.array([[0.0, 1.0, 0.0, 1.5, 0.0]])          # rates 5, 10, 15, 20, 25
    >>> harmonic_support(s, np.array([5.0, 10.0, 15.0, 20.0, 25.0]), 1.0, 1.0).tolist()
    [[0.0, 2.0, 0.0, 1.5, 0.0]]
    """
    if weight == 0:
        return spectra
    rates = np.asarray(rates_per_min, dtype=np.float64)
    position = (2.0 * rates - rates[0]) / (rates[1] - rates[0])
    inside = position <= len(rates) - 1
    j = np.minimum(np.floor(position).astype(np.int64), len(rates) - 2)
    frac = position - j
    doubled = spectra[..., j] * (1.0 - frac) + spectra[..., j + 1] * frac
    doubled = np.where(inside, doubled, 0.0)
    return spectra + weight * np.minimum(cap * spectra, doubled)


def nyquist_mask(spectra: np.ndarray, rates_per_min: np.ndarray,
                 beat_rate: np.ndarray) -> np.ndarray:
    """Zero the bins at or above half the beat rate: a series sampled once per beat
    cannot show faster breathing (it would alias). ``spectra`` (P, ..., F), ``beat_rate``
    (P,) per minute (NaN: no mask).

    Examples
    --------
    >>> nyquist_mask(np.ones((1, 3)), np.array([10.0, 30.0, 50.0]), np.array([60.0])).tolist()
    [[1.0, 0.0, 0.0]]
    """
    limit = 0.5 * np.where(np.isfinite(beat_rate), beat_rate, np.inf)
    keep = rates_per_min[None, :] < limit[:, None]  # (P, F)
    shape = (keep.shape[0],) + (1,) * (spectra.ndim - 2) + (keep.shape[1],)
    return spectra * keep.reshape(shape)


def depth_score(depth: np.ndarray) -> np.ndarray:
    """``clip((depth - DEPTH_FLOOR) / (DEPTH_FULL - DEPTH_FLOOR), 0, 1)``: how much a
    modulation this deep counts (see :data:`DEPTH_FULL`).

    >>> depth_score(np.array([0.0, 0.006, 0.05])).tolist()
    [0.0, 0.5, 1.0]
    """
    return np.clip((np.asarray(depth) - DEPTH_FLOOR) / (DEPTH_FULL - DEPTH_FLOOR), 0.0, 1.0)


def peak_concentration(spectra: np.ndarray, centre_bins: np.ndarray, halfwidth_bins: float,
                       open_bins: np.ndarray | None = None) -> np.ndarray:
    """Concentration score per hop: the share of the band's power (``spectra ** 2``)
    within ``halfwidth_bins`` of ``centre_bins`` (P,), rescaled so that the share a flat
    spectrum would put there maps to 0 and :data:`CONCENTRATION_FULL` or more to 1.

    ``open_bins`` (P,) counts the bins from the bottom of the band that are not masked
    (:func:`nyquist_mask`; default: all): the flat-spectrum share is taken over those.
    NaN centres, and centres on the first or last open bin (a slope rising out of the
    band, such as slow vasomotor waves below it, not a peak), give 0.

    Notes
    -----
    Only the fundamental counts: a modulation series is close to a sine, and at slow
    breathing rates a harmonic family would cover most of the band (6 per minute has
    nine harmonics below 60 per minute), so that a harmonic score could never rise
    above its chance level.

    Examples
    --------
    >>> spectrum = np.zeros((1, 100)); spectrum[0, 40] = 1.0
    >>> peak_concentration(spectrum, np.array([40.0]), 2.0).tolist()
    [1.0]
    """
    power = np.atleast_2d(spectra) ** 2
    n_hops, n_bins = power.shape
    idx = np.arange(n_bins)
    open_bins = (np.full(n_hops, n_bins) if open_bins is None
                 else np.clip(np.asarray(open_bins), 1, n_bins))
    centre = np.nan_to_num(np.asarray(centre_bins, dtype=np.float64), nan=-1e9)
    near = np.abs(idx[None, :] - centre[:, None]) <= halfwidth_bins
    total = power.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(total > 0, (power * near).sum(axis=1) / total, 0.0)
    chance = np.minimum(1.0, (2.0 * halfwidth_bins + 1.0) / open_bins)
    score = np.clip((share - chance) / np.maximum(CONCENTRATION_FULL - chance, 1e-9),
                    0.0, 1.0)
    inside = (centre >= 1.0) & (centre <= open_bins - 2.0)
    return np.where(inside, score, 0.0)


class ModulationBank:
    """The three modulation series through band-pass, sliding STFT and band spectra.

    The band-pass is the respiration chain of :func:`estimators.preprocess.design_chain`
    at the analysis rate; non-finite samples (gaps, dropped beats) are held and counted,
    and a modulation that holds one value for :data:`MODULATION_STUCK_S` counts as stuck;
    both lower the window's integrity. Running sums carried beside the frames give each
    window's mean beat rate and each modulation's depth. ``update(samples) ->
    ModulationHops`` (any chunking gives the same hops); :meth:`batch` is the one-call
    twin.
    """

    def __init__(self, settings: RateSettings, fs_analysis: float):
        self.settings, self.fs_analysis = settings, fs_analysis
        window = max(4, int(round(settings.window_s * fs_analysis)))
        min_window = max(4, min(window, int(round(settings.min_window_s * fs_analysis))))
        n_fft = max(settings.n_fft(fs_analysis), 1 << int(np.ceil(np.log2(window))))
        self.window, self.min_window, self.n_fft = window, min_window, n_fft
        self.hop = settings.hop_s * fs_analysis
        self.chain = design_chain("resp", "rr", fs_analysis, fs_analysis)
        self.min_run = max(3, int(round(MODULATION_STUCK_S * fs_analysis)))
        self.grid = deshape_mod.make_grid(fs_analysis, n_fft, settings.band_hz)
        # The causal modulation filters' group delay at each rate of the grid: a live
        # estimate describes its window centre less this delay at its rate.
        self.filter_delay_s = chain_group_delay_s(self.chain, fs_analysis,
                                                  self.grid.rates_per_min / 60.0)
        self.stfts = [SlidingSTFT(window, min_window, self.hop, n_fft) for _ in MODULATIONS]
        self.reset()

    def reset(self) -> None:
        self.pre_states = [initial_state(self.chain) for _ in MODULATIONS]
        for stft in self.stfts:
            stft.reset()
        self._sums = np.zeros(_N_SUMS)
        self._offset = np.full(3, np.nan)

    @staticmethod
    def _first_finite(values: np.ndarray, known: np.ndarray) -> np.ndarray:
        """Per column, ``known`` where set, else the first finite value of ``values``."""
        out = known.copy()
        for c in range(values.shape[1]):
            if np.isnan(out[c]):
                finite = np.flatnonzero(np.isfinite(values[:, c]))
                if len(finite):
                    out[c] = values[finite[0], c]
        return out

    @staticmethod
    def _running_sums(samples: ModulationSamples, filtered: list[np.ndarray],
                      start: np.ndarray) -> np.ndarray:
        """Running sums (:data:`_N_SUMS`, n) from ``start``: interval sum and count,
        amplitude sum and count (finite values only), squares of the band-passed
        modulations."""
        rows = []
        for column in (2, 1):
            value = samples.values[:, column]
            finite = np.isfinite(value)
            rows += [np.where(finite, value, 0.0), finite.astype(np.float64)]
        rows += [y ** 2 for y in filtered]
        return start[:, None] + np.cumsum(np.array(rows), axis=1)

    def _hops(self, columns) -> ModulationHops:
        """Hops from aligned columns (one per modulation) whose aux rows are: rejected,
        stuck (that modulation), the running sums, ready_s."""
        first, last = columns[0].first_count, columns[0].last_count
        length = (last - first).astype(np.float64)
        integrity = np.empty((len(first), 3))
        for c, col in enumerate(columns):
            flagged = col.aux_last[:2] - col.aux_before[:2]
            integrity[:, c] = quality_mod.integrity(flagged[0] / length, flagged[1] / length)
        aux = columns[0]
        sums = aux.aux_last[2:2 + _N_SUMS] - aux.aux_before[2:2 + _N_SUMS]
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_interval = np.where(sums[1] > 0, sums[0] / sums[1], np.nan)
            mean_amplitude = np.where(sums[3] > 0, np.abs(sums[2] / sums[3]), np.nan)
            rms = np.sqrt(np.maximum(sums[4:7], 0.0) / length)  # (3, P)
            scale = np.stack([mean_amplitude, mean_amplitude, mean_interval])
            depth = np.where(scale > 0, rms / scale, 0.0).T
        beat_rate = 60.0 / mean_interval
        spectra = np.stack([band_spectra(np.abs(col.spectra), self.grid, self.settings)
                            for col in columns], axis=1)
        spectra = tilt_spectra(spectra, self.grid.rates_per_min, self.settings.modulation_tilt)
        spectra = nyquist_mask(spectra, self.grid.rates_per_min, beat_rate)
        spectra = harmonic_support(spectra, self.grid.rates_per_min,
                                   self.settings.harmonic_weight, self.settings.harmonic_cap)
        return ModulationHops(spectra, integrity, np.nan_to_num(depth, nan=0.0), beat_rate,
                              aux.time_s, aux.aux_last[2 + _N_SUMS])

    def _empty(self) -> ModulationHops:
        e = np.empty(0)
        return ModulationHops(np.empty((0, 3, len(self.grid.freqs_hz))), np.empty((0, 3)),
                              np.empty((0, 3)), e, e, e)

    def update(self, samples: ModulationSamples) -> ModulationHops:
        if len(samples) == 0:
            return self._empty()
        # Each series enters the band-pass relative to its first value: a filter at rest
        # would otherwise see a step from 0 to the beat interval (or level) at the start.
        self._offset = self._first_finite(samples.values, self._offset)
        centred = samples.values - np.nan_to_num(self._offset)
        analyses = []
        for c in range(3):
            self.pre_states[c], a = preprocess_step(self.pre_states[c], centred[:, c],
                                                    samples.time_s, self.chain, 1,
                                                    self.min_run)
            analyses.append(a)
        sums = self._running_sums(samples, [a.values for a in analyses], self._sums)
        self._sums = sums[:, -1].copy()
        columns = [self.stfts[c].update(a.values, a.timestamps,
                                        (a.cum_rejected, a.cum_stuck, *sums, samples.ready_s))
                   for c, a in enumerate(analyses)]
        return self._hops(columns) if len(columns[0]) else self._empty()

    def batch(self, samples: ModulationSamples, zero_phase: bool) -> ModulationHops:
        """All hops of a record in one call (causal twin, or zero-phase band-pass)."""
        if len(samples) == 0:
            return self._empty()
        offset = self._first_finite(samples.values, np.full(3, np.nan))
        centred = samples.values - np.nan_to_num(offset)
        analyses = [preprocess_batch(centred[:, c], samples.time_s, self.chain, 1,
                                     self.min_run, zero_phase) for c in range(3)]
        sums = self._running_sums(samples, [a.values for a in analyses], np.zeros(_N_SUMS))
        # Block by block (estimators.stft.stft_blocks): only the band spectra of each
        # block are kept, never every complex column of the three modulations.
        blocks = zip(*[stft_blocks(a.values, a.timestamps, self.window, self.min_window,
                                   self.hop, self.n_fft, False,
                                   (a.cum_rejected, a.cum_stuck, *sums, samples.ready_s))
                       for a in analyses])
        return gather_hops(batch_hop_count(len(samples), self.min_window, self.hop),
                           (self._hops(list(columns)) for columns in blocks), self._empty())


# ------------------------------------------------------------------------- fusion

_GROUPS = ((0, 1, 2), (0, 1), (0, 2), (1, 2), (0,), (1,), (2,))


def fuse_modulations(rate: np.ndarray, confidence: np.ndarray, quality: np.ndarray,
                     agreement_per_min: float, min_agreeing: int, min_support: float,
                     weight_power: float = 1.0):
    """Combine the modulation rates of each hop by quality-weighted agreement.

    Parameters
    ----------
    rate, confidence, quality : (P, 3) per hop and modulation; a NaN rate is withheld
        and does not vote.
    agreement_per_min : a group of modulations agrees when the spread (max - min) of
        their rates is at most this.
    min_agreeing : smallest group that may be reported.
    min_support : smallest summed quality of the reported group.
    weight_power : the group's rates are averaged with weights ``quality **
        weight_power`` (1: in proportion to quality; larger: nearer the best one's).

    Returns
    -------
    rate, confidence, quality : (P,) each. Among the agreeing groups of at least
    ``min_agreeing`` modulations, the one with the largest summed quality (its
    *support*) is chosen; its quality-weighted mean rate is reported when the support
    reaches ``min_support``, else NaN. The confidence is the group's mean tracker
    confidence times its share of the support of all voting modulations (1 when all
    agree); the quality is the support, clipped to 1.

    Notes
    -----
    Karlen et al. (2013), 'smart fusion': the mean of the three modulation rates is
    reported when their standard deviation is below 4 breaths/min, and the window is
    dropped otherwise. Here the spread is the range, a modulation withheld for low
    quality does not vote, and a smaller group may carry the estimate when its quality
    suffices (``min_agreeing=3, min_support=0`` is the all-three rule).

    Examples
    --------
    >>> r, c, q = fuse_modulations(np.array([[15.0, 16.0, 30.0]]), np.ones((1, 3)),
    ...                            np.array([[0.6, 0.5, 0.2]]), 4.0, 1, 0.3)
    >>> round(float(r[0]), 2), round(float(c[0]), 2), float(q[0])
    (15.45, 0.85, 1.0)
    """
    rate = np.atleast_2d(np.asarray(rate, dtype=np.float64))
    confidence = np.atleast_2d(np.asarray(confidence, dtype=np.float64))
    quality = np.atleast_2d(np.asarray(quality, dtype=np.float64))
    carried = np.isfinite(rate)
    q = np.where(carried, np.clip(quality, 0.0, 1.0), 0.0)
    r = np.where(carried, rate, 0.0)
    n_hops = rate.shape[0]
    best_score = np.full(n_hops, -np.inf)
    best = np.full(n_hops, -1)
    for g, group in enumerate(_GROUPS):
        if len(group) < min_agreeing:
            continue
        cols = list(group)
        ok = carried[:, cols].all(axis=1)
        spread = np.ptp(np.where(ok[:, None], rate[:, cols], 0.0), axis=1)
        ok &= spread <= agreement_per_min
        # Ties go to the larger group (listed first).
        score = np.where(ok, q[:, cols].sum(axis=1), -np.inf)
        better = score > best_score + 1e-12
        best_score = np.where(better, score, best_score)
        best = np.where(better, g, best)
    out_rate = np.full(n_hops, np.nan)
    out_conf = np.zeros(n_hops)
    out_qual = np.zeros(n_hops)
    total = q.sum(axis=1)
    for g, group in enumerate(_GROUPS):
        rows = best == g
        if not rows.any():
            continue
        cols = list(group)
        w = q[rows][:, cols] ** weight_power
        wsum = w.sum(axis=1)
        support = q[rows][:, cols].sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(wsum > 0, (w * r[rows][:, cols]).sum(axis=1) / wsum,
                            r[rows][:, cols].mean(axis=1))
            share = np.where(total[rows] > 0, support / total[rows], 1.0)
        out_rate[rows] = mean
        out_conf[rows] = confidence[rows][:, cols].mean(axis=1) * share
        out_qual[rows] = support
    supported = (best >= 0) & (best_score >= min_support)
    out_rate = np.where(supported, out_rate, np.nan)
    out_conf = np.where(supported, out_conf, 0.0)
    return out_rate, np.clip(out_conf, 0.0, 1.0), np.clip(out_qual, 0.0, 1.0)


# ---------------------------------------------------------------- whole chain


def tracker_params(settings: RateSettings, rates: np.ndarray) -> tracker_mod.TrackerParams:
    """Ridge-tracker parameters on the grid ``rates`` (per minute)."""
    return tracker_mod.make_params(rates[1] - rates[0], settings.hop_s,
                                   settings.max_change_per_min_per_s,
                                   settings.jump_probability,
                                   settings.confidence_halfwidth_per_min, settings.lag_hops)


def offline_track(spectra: np.ndarray, weights: np.ndarray, rates: np.ndarray,
                  params: tracker_mod.TrackerParams, power: float):
    """Viterbi rate (refined on the spectrum's peak near the path) and forward-backward
    confidence (posterior mass near the path) per hop: the offline twin of the tracker."""
    rate, conf, _ = tracker_mod.offline_track(spectra, weights, params, power, rates)
    return rate, conf


def fused_estimates(name: str, kind: str, settings: RateSettings, time_s: np.ndarray,
                    emitted_s: np.ndarray, rate: np.ndarray, confidence: np.ndarray,
                    quality: np.ndarray) -> list[Estimate]:
    """Estimates from per-modulation rates, confidences and qualities (P, 3): rates below
    ``settings.min_quality`` are withheld, the rest fused (:func:`fuse_modulations`), and
    the fused confidence mapped to the probability of being within 2 breaths/min
    (:mod:`estimators.breathing_confidence`)."""
    shown = np.where((quality >= settings.min_quality) & np.isfinite(rate), rate, np.nan)
    fused, fconf, fqual = fuse_modulations(shown, confidence, quality,
                                           settings.agreement_per_min, settings.min_agreeing,
                                           settings.min_support, settings.fusion_quality_power)
    fconf = breathing_confidence.calibrated(kind, fconf, fqual)
    return [Estimate("rr", name, a, b, r, c, q) for a, b, r, c, q in zip(
        np.asarray(time_s).tolist(), np.asarray(emitted_s).tolist(), fused.tolist(),
        fconf.tolist(), fqual.tolist())]


class PulseBreathing:
    """Breathing rate from one PPG or ECG channel: ``update(x, t) -> list[Estimate]``.

    Parameters
    ----------
    name : channel name, used as the estimates' ``source``.
    kind : ``"ppg"`` or ``"ecg"``.
    settings : breathing-rate settings (``quantity="rr"``): window, hop, band, tracker,
        and for the fusion ``agreement_per_min``, ``min_agreeing``, ``min_support``.
    fs : raw sampling rate (Hz), at least 40 Hz.

    Notes
    -----
    Each estimate describes the centre of its window (``time_s``); ``emitted_s`` is the
    timestamp of the newest raw sample any of its values depended on: an evenly
    resampled value waits for the next beat and the detector's look-ahead, so the delay
    is half a window plus about one beat interval and 0.25 s.

    After each update, :attr:`last_modulations` holds the per-modulation rates
    (withheld = NaN), confidences and qualities of the hops just reported, (P, 3) each,
    and :attr:`last_beats` the beats decided in the chunk.

    Examples
    --------
    >>> import numpy as np
    >>> from estimators.config import BREATHING_FROM_PULSE
    >>> fs = 125.0
    >>> t = np.arange(int(60 * fs)) / fs
    >>> phase = 2 * np.pi * 1.2 * t + 0.3 * np.sin(2 * np.pi * 0.25 * t)   # 72 bpm, 15/min
    >>> ppg = (1 + 0.2 * np.sin(2 * np.pi * 0.25 * t)) * np.sin(phase) ** 8
    >>> estimates = PulseBreathing("finger", "ppg", BREATHING_FROM_PULSE, fs).update(ppg, t)
    >>> round(estimates[-1].rate_per_min)
    15
    """

    def __init__(self, name: str, kind: str, settings: RateSettings, fs: float):
        if settings.quantity != "rr":
            raise ParameterError(f"settings.quantity={settings.quantity!r} must be 'rr'")
        self.name, self.kind, self.settings = name, kind, settings
        self.beat_params = replace(beat_params(kind, fs),
                                   interval_tolerance=settings.beat_interval_tolerance)
        self.decimation = settings.decimation(fs)
        self.bank = ModulationBank(settings, fs / self.decimation)
        self.rates = self.bank.grid.rates_per_min
        params = tracker_params(settings, self.rates)
        self.trackers = [tracker_mod.RidgeTracker(self.rates, params, settings.emission_power)
                         for _ in MODULATIONS]
        self.reset()

    def reset(self) -> None:
        self.beat_state = beat_initial_state(self.beat_params)
        self.resample_state = resample_initial_state()
        self.bank.reset()
        for tracker in self.trackers:
            tracker.reset()
        self._held: list[ModulationHops] = []
        self.last_beats = Beats.empty()
        e = np.empty((0, 3))
        self.last_modulations = (e, e, e)

    def update(self, x: np.ndarray, t: np.ndarray) -> list[Estimate]:
        """Feed raw samples ``x`` (n,) with timestamps ``t`` (n,); return the estimates of
        every hop completed, in order."""
        x = np.asarray(x, dtype=np.float64)
        t = np.asarray(t, dtype=np.float64)
        if x.shape != t.shape or x.ndim != 1:
            raise ParameterError(f"x.shape={x.shape} and t.shape={t.shape} must be equal "
                                 "and 1-D")
        self.beat_state, beats = detect_step(self.beat_state, x, t, self.beat_params)
        self.last_beats = beats
        self.resample_state, samples = resample_step(self.resample_state, beats, t,
                                                     self.decimation, self.beat_params)
        hops = self.bank.update(samples)
        if len(hops) == 0:
            return []
        outputs = [tracker.update(hops.spectra[:, c], hops.integrity[:, c])
                   for c, tracker in enumerate(self.trackers)]
        rate = np.column_stack([o[0] for o in outputs])
        conf = np.column_stack([o[1] for o in outputs])
        index = outputs[0][2]
        lag = self.settings.lag_hops
        if lag == 0:
            return self._estimates(hops, rate, conf, hops.emitted_s)
        # Fixed-lag smoothing: the outputs refer to hops up to ``lag`` back.
        held = ModulationHops.concat(self._held + [hops])
        first_index = self.trackers[0].hops_seen - len(held)
        self._held = [held.take(slice(max(0, len(held) - lag), None))]
        if len(index) == 0:
            return []
        pos = index - first_index
        return self._estimates(held.take(pos), rate, conf, held.emitted_s[pos + lag])

    def modulation_quality(self, hops: ModulationHops, rate: np.ndarray) -> np.ndarray:
        """Quality (P, 3) of each modulation's rate: integrity x concentration at the
        rate (over the bins below half the beat rate) x depth score."""
        s = self.settings
        step = self.rates[1] - self.rates[0]
        halfwidth = s.confidence_halfwidth_per_min / step
        limit = 0.5 * np.where(np.isfinite(hops.beat_rate), hops.beat_rate, np.inf)
        open_bins = (self.rates[None, :] < limit[:, None]).sum(axis=1)
        quality = np.empty_like(rate)
        for c in range(3):
            conc = peak_concentration(hops.spectra[:, c], (rate[:, c] - self.rates[0]) / step,
                                      halfwidth, open_bins)
            quality[:, c] = quality_mod.quality_index(hops.integrity[:, c],
                                                      conc * depth_score(hops.depth[:, c]))
        return quality

    def track_hops(self, hops: ModulationHops) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Rate, confidence and quality (P, 3) per modulation of a whole record's hops
        from fresh trackers (the live trackers are not touched; without lag equal to
        :meth:`update` over the same record). The fusion's inputs, for tuning it."""
        params = self.trackers[0].params
        rate, conf = np.empty((len(hops), 3)), np.empty((len(hops), 3))
        for c in range(3):
            tracker = tracker_mod.RidgeTracker(self.rates, params, self.settings.emission_power)
            rate[:, c], conf[:, c], _ = tracker.update(hops.spectra[:, c], hops.integrity[:, c])
        return rate, conf, self.modulation_quality(hops, rate)

    def _estimates(self, hops: ModulationHops, rate: np.ndarray, conf: np.ndarray,
                   emitted_s: np.ndarray) -> list[Estimate]:
        quality = self.modulation_quality(hops, rate)
        shown = np.where((quality >= self.settings.min_quality) & np.isfinite(rate), rate,
                         np.nan)
        self.last_modulations = (shown, conf, quality)
        estimates = fused_estimates(self.name, self.kind, self.settings, hops.time_s,
                                    emitted_s, rate, conf, quality)
        grid = self.bank.grid.rates_per_min
        return [replace(e, time_s=e.time_s - float(np.interp(
            e.rate_per_min if np.isfinite(e.rate_per_min) else np.median(grid), grid,
            self.bank.filter_delay_s))) for e in estimates]

    def hops_batch(self, x: np.ndarray, t: np.ndarray, zero_phase: bool) -> ModulationHops:
        """Modulation hops of a whole record in one call: the batch twin of the first
        three stages (``zero_phase`` for the offline estimates)."""
        x = np.asarray(x, dtype=np.float64)
        t = np.asarray(t, dtype=np.float64)
        if len(x) < self.bank.min_window * self.decimation:
            return self.bank._empty()  # shorter than the shortest window: no hop at all
        beats = detect_batch(x, t, self.beat_params, zero_phase)
        samples = resample_batch(beats, t, self.decimation, self.beat_params)
        return self.bank.batch(samples, zero_phase)

    def offline(self, x: np.ndarray, t: np.ndarray) -> list[Estimate]:
        """The non-causal twin over a whole record: zero-phase filters, a Viterbi ridge
        and forward-backward confidence per modulation, then the same fusion. Every
        estimate used the whole record, so ``emitted_s`` is the last timestamp."""
        hops = self.hops_batch(x, t, zero_phase=True)
        if len(hops) == 0:
            return []
        params = self.trackers[0].params
        rate, conf = np.empty((len(hops), 3)), np.empty((len(hops), 3))
        for c in range(3):
            rate[:, c], conf[:, c] = offline_track(hops.spectra[:, c], hops.integrity[:, c],
                                                   self.rates, params,
                                                   self.settings.emission_power)
        return self._estimates(hops, rate, conf, np.full(len(hops), float(t[-1])))
