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

The path is a :class:`estimators.stage.Chain` of six stages (:func:`pulse_breathing_chain`),
each speaking the stage protocol of :mod:`estimators.stage` (frozen parameters,
``initial_state()``, a pure ``step(state, x) -> (state, y)`` and its ``batch(x)`` twin):

1. :class:`BeatDetection` wraps :func:`estimators.beats.detect_step` (beats found
   causally, :func:`beat_params`: a candidate is the largest value of the detection
   signal within +-0.25 s, accepted when it reaches a fraction of the recent beats'
   heights; each beat gives a sub-sample position and its three features; premature or
   missed beats drop their interval). Raw ``(x, t)`` -> :class:`PulseBeats`.
2. :class:`Resampling` evenly resamples the features at the analysis rate of the
   breathing settings (5 Hz): linear interpolation between beats, so a sample waits for
   the beat after it; beats more than 2 s apart leave NaN (:func:`resample_step`,
   compiled; :func:`resample_batch` its plain twin). -> :class:`ModulationSamples`.
3. :class:`ModulationSpectra`: each modulation is band-passed like a respiration signal
   (relative to its first value) and framed on the engine's sliding-STFT schedule on
   the breathing grid; the three modulations' filters and frames run in one compiled
   pass and all their frames go through one FFT call; the band spectra are tilted
   (:func:`tilt_spectra`), masked above half the beat rate (breathing faster than half
   the beat rate cannot show in a once-per-beat series, Nyquist: :func:`nyquist_mask`)
   and given their second harmonic's support (:func:`harmonic_support`) in a second
   compiled pass. -> :class:`ModulationHops`.
4. :class:`ModulationTrackers`: one hidden-Markov ridge tracker
   (:mod:`estimators.tracker`) per modulation, all three in one compiled call.
   -> :class:`TrackedModulations`.
5. :class:`ModulationQuality`: integrity x spectral concentration at the rate
   (:func:`peak_concentration`) x modulation depth (:func:`depth_score`).
   -> :class:`RatedModulations`.
6. :class:`ModulationFusion`: rates below ``min_quality`` are withheld; among the
   groups of modulations that agree (spread at most ``agreement_per_min``), the one
   with the largest summed quality reports its quality-weighted mean rate when that
   support reaches ``min_support``; else no estimate (NaN) -- the 'smart fusion' of
   Karlen et al. (2013), weighted by quality (:func:`fuse_modulations`). The
   confidence is calibrated (:mod:`estimators.breathing_confidence`) and ``time_s``
   moved back by the modulation filters' group delay at the rate. -> :class:`BreathingRates`.

Every compiled step (``estimators._kernels``: ``resample_chunk``,
``modulation_frames``, ``shape_modulation_spectra``, ``track_ridges``,
``modulation_quality``, ``fuse_rates``, ``calibrate_breathing``) keeps its plain path
(``RIDGEWATCH_NO_JIT=1``), and every stage's ``batch`` is the plain numpy twin it is
tested against (``tests/estimators/test_stage_conformance_breathing.py``).

:class:`PulseBreathing` owns the chain's state for one channel (``update(x, t) ->
list[Estimate]``), and :meth:`PulseBreathing.offline` is the zero-phase twin with
Viterbi ridges.

Index vocabulary: ``k`` raw sample (count from the first sample, 0-based), ``j``
analysis sample, ``p`` hop, ``f`` frequency bin, ``i`` beat.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from estimators import _kernels
from estimators import breathing_confidence
from estimators import deshape as deshape_mod
from estimators import quality as quality_mod
from estimators import tracker as tracker_mod
from estimators.calibration import PROB_CEIL, PROB_FLOOR
from estimators.config import RateSettings
from estimators.errors import ParameterError
from estimators.estimate import Estimate
from estimators.preprocess import (MAX_ABS, NO_LIMIT, chain_group_delay_s, design_chain,
                                   initial_state, preprocess_batch)
from estimators.stage import Chain, split_arrays
from estimators.stft import analysis_window, batch_hop_count, gather_hops, stft_blocks

# Beat detection lives in estimators.beats; its names stay importable from here.
from estimators.beats import (BEAT_LIMIT_WINDOW_S, MIN_FS_HZ, MODULATIONS,  # noqa: F401
                              PULSE_KINDS, Beats, BeatParams, BeatState, beat_initial_state,
                              beat_params, detect_batch, detect_step)


# -------------------------------------------------------------------- records


def _concat_fields(cls, parts: list, fields: tuple):
    """A record of ``cls`` whose array ``fields`` are the parts' concatenated in time."""
    if len(parts) == 1:
        return parts[0]
    return cls(*(np.concatenate([getattr(part, name) for part in parts]) for name in fields))


def _split_by_hops(record, bounds) -> list:
    """Cut a per-hop record (``take``, ``len``) at hop ``bounds``."""
    edges = [0, *[int(b) for b in bounds], len(record)]
    return [record.take(slice(lo, hi)) for lo, hi in zip(edges[:-1], edges[1:])]


@dataclass(frozen=True)
class PulseBeats:
    """Output of :class:`BeatDetection` for a stretch of raw samples: the beats decided
    in it and the stretch's raw timestamps ``time_s`` (n,), which the resampling reads
    its grid's timestamps from."""

    beats: Beats
    time_s: np.ndarray

    def __len__(self) -> int:
        return len(self.time_s)

    @staticmethod
    def concat(parts: list["PulseBeats"]) -> "PulseBeats":
        return PulseBeats(Beats.concat([p.beats for p in parts]),
                          np.concatenate([p.time_s for p in parts]))

    def split(self, bounds) -> list["PulseBeats"]:
        """Cut at raw-sample ``bounds`` (counted from the first sample of this stretch,
        which must start the record): each part holds the beats decided in it (a beat is
        decided when its ``ready``-th raw sample arrives)."""
        edges = [0, *[int(b) for b in bounds], len(self)]
        return [PulseBeats(_take_beats(self.beats, (self.beats.ready > lo)
                                       & (self.beats.ready <= hi)), self.time_s[lo:hi])
                for lo, hi in zip(edges[:-1], edges[1:])]


def _take_beats(beats: Beats, keep: np.ndarray) -> Beats:
    return Beats(*(getattr(beats, name)[keep] for name in
                   ("index", "position", "ready", "ready_s", "features", "time_s")))


@dataclass(frozen=True)
class ModulationSamples:
    """Evenly sampled modulations: ``values`` (n, 3) in :data:`MODULATIONS` order (NaN
    where unknown), ``time_s`` (n,) timestamps of the grid samples, ``ready_s`` (n,)
    timestamp of the newest raw sample each value depended on."""

    values: np.ndarray
    time_s: np.ndarray
    ready_s: np.ndarray

    _FIELDS = ("values", "time_s", "ready_s")

    def __len__(self) -> int:
        return len(self.time_s)

    def take(self, index) -> "ModulationSamples":
        return ModulationSamples(*(getattr(self, name)[index] for name in self._FIELDS))

    @staticmethod
    def concat(parts: list["ModulationSamples"]) -> "ModulationSamples":
        return _concat_fields(ModulationSamples, parts, ModulationSamples._FIELDS)


# --------------------------------------------------------------------- beats


@dataclass(frozen=True)
class BeatDetection:
    """Stage 1: beats of a raw PPG or ECG, ``(x, t) -> PulseBeats``.

    A stage wrapper of :func:`estimators.beats.detect_step` (pure: it never changes the
    state it is given) and :func:`estimators.beats.detect_batch` (its causal numpy
    twin)."""

    params: BeatParams

    def initial_state(self) -> BeatState:
        return beat_initial_state(self.params)

    def step(self, state: BeatState, x) -> tuple[BeatState, PulseBeats]:
        samples, t = x
        t = np.asarray(t, dtype=np.float64)
        state, beats = detect_step(state, samples, t, self.params)
        return state, PulseBeats(beats, t)

    def batch(self, x) -> PulseBeats:
        samples, t = x
        return PulseBeats(detect_batch(samples, t, self.params), np.asarray(t, np.float64))

    def split(self, x, bounds) -> list:
        return split_arrays(x, bounds)

    def join(self, parts) -> PulseBeats:
        return PulseBeats.concat(list(parts))


# ---------------------------------------------------------------- even resampling


@dataclass(frozen=True)
class ResampleState:
    """Carried by :func:`resample_step`: ``scalars`` ``[raw samples seen, next grid
    sample, newest beat's index, its position, its three features]`` and ``pending_s``,
    the timestamps of the grid samples seen but not yet emitted."""

    scalars: np.ndarray
    pending_s: np.ndarray


def resample_initial_state() -> ResampleState:
    """Nothing seen, no beat yet."""
    return ResampleState(np.array([0.0, 0.0, -np.inf, -np.inf, np.nan, np.nan, np.nan]),
                         np.empty(0))


def resample_step(state: ResampleState, beats: Beats, t: np.ndarray, decimation: int,
                  params: BeatParams) -> tuple[ResampleState, ModulationSamples]:
    """Emit the grid samples that the beats of this chunk (and the raw samples seen so
    far) decide; compiled (:func:`estimators._kernels.resample_chunk`). Pure: ``state``
    is not changed.

    Grid sample ``j`` sits at raw sample ``k_j = j M + M - 1`` (``M = decimation``, the
    convention of :mod:`estimators.preprocess`) and takes its timestamp. Its value is
    the linear interpolation of the features of the beats ``i``, ``i + 1`` around it
    (``position_i <= k_j < position_{i+1}``), so it waits for beat ``i + 1``. It is NaN
    before the first beat and inside gaps (beats more than ``max_gap`` samples apart);
    a sample in a gap is emitted as soon as no beat can close the gap in time, at raw
    count ``T = lookahead + max(k_j + 1, index_i + max_gap + 1)``.

    Parameters
    ----------
    state : from :func:`resample_initial_state` or a previous step.
    beats : beats decided in this chunk (from :func:`detect_step` on the same chunk).
    t : timestamps of the raw samples of this chunk.
    decimation : ``M``.
    params : the beat parameters the beats came from.
    """
    t = np.ascontiguousarray(t, dtype=np.float64)
    m = int(decimation)
    before = int(state.scalars[0])
    pending = np.concatenate((state.pending_s, t[(m - 1 - before) % m::m]))
    scalars = state.scalars.copy()
    values = np.empty((len(pending), 3))
    times, ready_s = np.empty(len(pending)), np.empty(len(pending))
    n_out = _kernels.resample_chunk(
        np.ascontiguousarray(beats.index, dtype=np.int64),
        np.ascontiguousarray(beats.position, dtype=np.float64),
        np.ascontiguousarray(beats.ready, dtype=np.int64),
        np.ascontiguousarray(beats.features, dtype=np.float64).reshape(-1, 3), pending, t,
        scalars, m, int(params.lookahead), int(params.max_gap), values, times, ready_s)
    return (ResampleState(scalars, pending[n_out:].copy()),
            ModulationSamples(values[:n_out], times[:n_out], ready_s[:n_out]))


def resample_batch(beats: Beats, t: np.ndarray, decimation: int,
                   params: BeatParams) -> ModulationSamples:
    """All grid samples of a record in one call, in plain Python: the twin of
    :func:`resample_step` (equal to any chunking of it fed with the same beats)."""
    t = np.asarray(t, dtype=np.float64)
    m = decimation
    grid_s = t[m - 1::m]
    r, gap = params.lookahead, params.max_gap
    next_j, last_index, last_position = 0, -np.inf, -np.inf
    last_features = np.full(3, np.nan)
    values, times, ready = [], [], []

    def emit(limit: float, nan_ready_base: float, beat_ready: float, interp):
        """Emit grid samples with ``k_j < limit``."""
        nonlocal next_j
        while next_j * m + m - 1 < limit:
            k_j = next_j * m + m - 1
            value = interp(k_j)
            if np.isnan(value).any():
                when = min(beat_ready, r + max(k_j + 1, nan_ready_base))
            else:
                when = beat_ready
            values.append(value)
            ready.append(when)
            times.append(grid_s[next_j])
            next_j += 1

    for i in range(len(beats)):
        index, position = beats.index[i], beats.position[i]
        features = beats.features[i]
        closes = index - last_index <= gap
        p0, f0 = last_position, last_features

        def interp(k_j, p0=p0, f0=f0, position=position, features=features, closes=closes):
            if not closes or k_j < p0:
                return np.full(3, np.nan)
            w = (k_j - p0) / (position - p0)
            return (1.0 - w) * f0 + w * features

        emit(position, last_index + gap + 1, beats.ready[i], interp)
        last_index, last_position = float(index), float(position)
        last_features = features.copy()
    # Gap rule: no beat can now land before these grid samples in time to close the gap.
    if len(t) - r - last_index > gap:
        emit(len(t) - r, last_index + gap + 1, np.inf, lambda k_j: np.full(3, np.nan))
    ready = np.asarray(ready, dtype=np.int64) if ready else np.empty(0, np.int64)
    ready_s = t[ready - 1] if len(ready) else np.empty(0)
    return ModulationSamples(np.array(values).reshape(-1, 3), np.array(times), ready_s)


@dataclass(frozen=True)
class Resampling:
    """Stage 2: ``PulseBeats -> ModulationSamples`` on the analysis grid (one sample in
    ``decimation`` raw samples); step :func:`resample_step`, batch
    :func:`resample_batch`."""

    params: BeatParams
    decimation: int

    def initial_state(self) -> ResampleState:
        return resample_initial_state()

    def step(self, state: ResampleState, x: PulseBeats) -> tuple[ResampleState,
                                                                 ModulationSamples]:
        return resample_step(state, x.beats, x.time_s, self.decimation, self.params)

    def batch(self, x: PulseBeats) -> ModulationSamples:
        return resample_batch(x.beats, x.time_s, self.decimation, self.params)

    def split(self, x: PulseBeats, bounds) -> list:
        return x.split(bounds)

    def join(self, parts) -> ModulationSamples:
        return ModulationSamples.concat(list(parts))


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
    """Per-hop output of :class:`ModulationSpectra`.

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

    @staticmethod
    def empty(n_bins: int) -> "ModulationHops":
        e = np.empty(0)
        return ModulationHops(np.empty((0, 3, n_bins)), np.empty((0, 3)), np.empty((0, 3)),
                              e, e, e)


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
    j, frac, inside = harmonic_taps(rates_per_min)
    doubled = spectra[..., j] * (1.0 - frac) + spectra[..., j + 1] * frac
    doubled = np.where(inside, doubled, 0.0)
    return spectra + weight * np.minimum(cap * spectra, doubled)


def harmonic_taps(rates_per_min: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Where :func:`harmonic_support` reads ``S(2 f)`` on an even grid: the bin below
    twice each rate, the fraction of the way to the next one, and whether twice the rate
    is still on the grid."""
    rates = np.asarray(rates_per_min, dtype=np.float64)
    position = (2.0 * rates - rates[0]) / (rates[1] - rates[0])
    inside = position <= len(rates) - 1
    j = np.minimum(np.floor(position).astype(np.int64), len(rates) - 2)
    return j, position - j, inside


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



@dataclass(frozen=True)
class BankState:
    """Carried by :class:`ModulationSpectra`: the band-pass state of the three series
    (``zi`` (3, S, 2) and the scalars of :func:`estimators._kernels.preprocess_chunk`,
    (3, 7)), their first finite values ``offset`` (3,), the running ``sums`` (7,),
    the ``ring`` of the newest window (see :func:`estimators._kernels.modulation_frames`)
    and ``counters`` ``[analysis samples seen, next hop]``."""

    zi: np.ndarray
    pre_scalars: np.ndarray
    offset: np.ndarray
    sums: np.ndarray
    ring: np.ndarray
    counters: np.ndarray

    def copy(self) -> "BankState":
        return BankState(self.zi.copy(), self.pre_scalars.copy(), self.offset.copy(),
                         self.sums.copy(), self.ring.copy(), self.counters.copy())


_NO_LIMIT_STATE = NO_LIMIT.initial_state()
"""The limiter state the compiled pre-processing is handed; with no range limit it is
never read nor written."""


@dataclass(frozen=True)
class ModulationSpectra:
    """Stage 3: ``ModulationSamples -> ModulationHops``, the three modulation series
    through band-pass, sliding STFT and band spectra.

    The band-pass is the respiration chain of :func:`estimators.preprocess.design_chain`
    at the analysis rate; non-finite samples (gaps, dropped beats) are held and counted,
    and a modulation that holds one value for :data:`MODULATION_STUCK_S` counts as stuck;
    both lower the window's integrity. Running sums carried beside the frames give each
    window's mean beat rate and each modulation's depth. Hops fall on the schedule of
    :mod:`estimators.stft` (window, start-up window, hop and FFT length of the breathing
    settings). Build it with :meth:`for_settings`.

    ``step``: one compiled pass for the filters, sums and frames of all three series
    (:func:`estimators._kernels.modulation_frames`), one FFT call for every frame of
    the chunk, one compiled pass for tilt, Nyquist mask and harmonic support
    (:func:`estimators._kernels.shape_modulation_spectra`). ``batch``: the plain twin
    (:meth:`hops_batch`: scipy filters, :func:`estimators.stft.stft_blocks` and the
    numpy functions of this module), which also offers the zero-phase variant.
    """

    settings: RateSettings
    fs_analysis: float
    window: int
    min_window: int
    n_fft: int
    hop: float
    chain: object
    min_run: int
    grid: deshape_mod.DeshapeGrid
    rates: np.ndarray
    filter_delay_s: np.ndarray
    windows: np.ndarray
    tilt: np.ndarray
    harmonic: tuple

    @classmethod
    def for_settings(cls, settings: RateSettings, fs_analysis: float) -> "ModulationSpectra":
        window = max(4, int(round(settings.window_s * fs_analysis)))
        min_window = max(4, min(window, int(round(settings.min_window_s * fs_analysis))))
        n_fft = max(settings.n_fft(fs_analysis), 1 << int(np.ceil(np.log2(window))))
        chain = design_chain("resp", "rr", fs_analysis, fs_analysis)
        grid = deshape_mod.make_grid(fs_analysis, n_fft, settings.band_hz)
        rates = grid.rates_per_min
        # Row L - min_window: the unit-sum periodic Hann of L samples, zero beyond.
        windows = np.zeros((window - min_window + 1, window))
        for length in range(min_window, window + 1):
            windows[length - min_window, :length] = analysis_window(length)[0]
        return cls(settings, float(fs_analysis), window, min_window, n_fft,
                   settings.hop_s * fs_analysis, chain,
                   max(3, int(round(MODULATION_STUCK_S * fs_analysis))), grid, rates,
                   # The causal modulation filters' group delay at each rate of the grid:
                   # a live estimate describes its window centre less this delay.
                   chain_group_delay_s(chain, fs_analysis, rates / 60.0), windows,
                   tilt_spectra(np.ones(len(rates)), rates, settings.modulation_tilt),
                   harmonic_taps(rates))

    def initial_state(self) -> BankState:
        scalars = initial_state(self.chain).scalars
        return BankState(np.zeros((3, self.chain.pre.shape[0], 2)), np.tile(scalars, (3, 1)),
                         np.full(3, np.nan), np.zeros(_N_SUMS),
                         np.zeros((_kernels.BANK_ROWS, self.window + 1)),
                         np.array([0.0, 1.0]))

    def empty(self) -> "ModulationHops":
        return ModulationHops.empty(len(self.rates))

    def step(self, state: BankState, x: ModulationSamples) -> tuple[BankState,
                                                                    "ModulationHops"]:
        n = len(x)
        if n == 0:
            return state, self.empty()
        state = state.copy()
        count = state.counters[0]
        most = int((count + n) / self.hop) - int(count / self.hop) + 2
        frames = np.zeros((3 * most, self.window))
        integrity, depth = np.empty((most, 3)), np.empty((most, 3))
        beat_rate, time_s, emitted_s = np.empty(most), np.empty(most), np.empty(most)
        n_hops = _kernels.modulation_frames(
            np.ascontiguousarray(x.values, dtype=np.float64),
            np.ascontiguousarray(x.time_s, dtype=np.float64),
            np.ascontiguousarray(x.ready_s, dtype=np.float64), self.chain.pre, state.zi,
            state.pre_scalars, _NO_LIMIT_STATE, float(self.min_run), MAX_ABS, state.offset,
            state.sums, state.ring, state.counters, self.windows, self.min_window,
            float(self.hop), frames, integrity, depth, beat_rate, time_s, emitted_s)
        if n_hops == 0:
            return state, self.empty()
        columns = np.fft.rfft(frames[:3 * n_hops], self.n_fft, axis=1)
        if self.settings.deshape:
            spectra = deshape_mod.deshape(np.abs(columns), self.grid, self.settings.gamma)
        else:
            spectra = np.abs(columns[:, self.grid.band])
        spectra = spectra.reshape(n_hops, 3, len(self.rates))
        j, frac, inside = self.harmonic
        _kernels.shape_modulation_spectra(spectra, self.tilt, self.rates, beat_rate[:n_hops],
                                          j, frac, inside, float(self.settings.harmonic_weight),
                                          float(self.settings.harmonic_cap))
        return state, ModulationHops(spectra, integrity[:n_hops], depth[:n_hops],
                                     beat_rate[:n_hops], time_s[:n_hops], emitted_s[:n_hops])

    def batch(self, x: ModulationSamples) -> "ModulationHops":
        return self.hops_batch(x, zero_phase=False)

    def split(self, x: ModulationSamples, bounds) -> list:
        return _split_by_hops(x, bounds)

    def join(self, parts) -> "ModulationHops":
        return ModulationHops.concat(list(parts))

    # The plain twin.

    @staticmethod
    def _first_finite(values: np.ndarray) -> np.ndarray:
        """Per column, the first finite value of ``values`` (NaN when none)."""
        out = np.full(values.shape[1], np.nan)
        for c in range(values.shape[1]):
            finite = np.flatnonzero(np.isfinite(values[:, c]))
            if len(finite):
                out[c] = values[finite[0], c]
        return out

    @staticmethod
    def _running_sums(samples: ModulationSamples, filtered: list[np.ndarray]) -> np.ndarray:
        """Running sums (:data:`_N_SUMS`, n): interval sum and count, amplitude sum and
        count (finite values only), squares of the band-passed modulations."""
        rows = []
        for column in (2, 1):
            value = samples.values[:, column]
            finite = np.isfinite(value)
            rows += [np.where(finite, value, 0.0), finite.astype(np.float64)]
        rows += [y ** 2 for y in filtered]
        return np.cumsum(np.array(rows), axis=1)

    def _hops(self, columns) -> "ModulationHops":
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
        spectra = tilt_spectra(spectra, self.rates, self.settings.modulation_tilt)
        spectra = nyquist_mask(spectra, self.rates, beat_rate)
        spectra = harmonic_support(spectra, self.rates, self.settings.harmonic_weight,
                                   self.settings.harmonic_cap)
        return ModulationHops(spectra, integrity, np.nan_to_num(depth, nan=0.0), beat_rate,
                              aux.time_s, aux.aux_last[2 + _N_SUMS])

    def hops_batch(self, samples: ModulationSamples, zero_phase: bool) -> "ModulationHops":
        """All hops of a record in one call with scipy's filters and numpy: the plain twin
        of :meth:`step` (causal), or with ``zero_phase`` forward-backward band-passes
        (the offline path)."""
        if len(samples) == 0:
            return self.empty()
        # Each series enters the band-pass relative to its first value: a filter at rest
        # would otherwise see a step from 0 to the beat interval (or level) at the start.
        centred = samples.values - np.nan_to_num(self._first_finite(samples.values))
        analyses = [preprocess_batch(centred[:, c], samples.time_s, self.chain, 1,
                                     self.min_run, zero_phase) for c in range(3)]
        sums = self._running_sums(samples, [a.values for a in analyses])
        # Block by block (estimators.stft.stft_blocks): only the band spectra of each
        # block are kept, never every complex column of the three modulations.
        blocks = zip(*[stft_blocks(a.values, a.timestamps, self.window, self.min_window,
                                   self.hop, self.n_fft, False,
                                   (a.cum_rejected, a.cum_stuck, *sums, samples.ready_s))
                       for a in analyses])
        return gather_hops(batch_hop_count(len(samples), self.min_window, self.hop),
                           (self._hops(list(columns)) for columns in blocks), self.empty())


class ModulationBank:
    """Owns a :class:`ModulationSpectra` stage's state for one channel:
    ``update(samples) -> ModulationHops`` (any chunking gives the same hops),
    :meth:`batch` the one-call twin, :meth:`reset` a fresh start. Its parameters
    (``grid``, ``filter_delay_s``, ``window``, ...) are the stage's."""

    def __init__(self, settings: RateSettings, fs_analysis: float,
                 stage: ModulationSpectra | None = None):
        self.stage = (ModulationSpectra.for_settings(settings, fs_analysis) if stage is None
                      else stage)
        self.reset()

    def __getattr__(self, name):
        # The stage's parameters read as the bank's own (settings, grid, window, ...).
        if name == "stage":
            raise AttributeError(name)
        return getattr(self.stage, name)

    def reset(self) -> None:
        self.state = self.stage.initial_state()

    def update(self, samples: ModulationSamples) -> "ModulationHops":
        self.state, hops = self.stage.step(self.state, samples)
        return hops

    def batch(self, samples: ModulationSamples, zero_phase: bool) -> "ModulationHops":
        """All hops of a record in one call (causal twin, or zero-phase band-pass)."""
        return self.stage.hops_batch(samples, zero_phase)


# ------------------------------------------------------------------------ trackers


@dataclass(frozen=True)
class TrackedModulations:
    """Output of :class:`ModulationTrackers`: ``rate`` and ``confidence`` (P, 3) per
    modulation (posterior mass near the mode) and the ``hops`` they refer to (with
    fixed-lag smoothing, hops ``L`` back, whose ``emitted_s`` is then the newest sample
    of the hop that completed the output)."""

    hops: "ModulationHops"
    rate: np.ndarray
    confidence: np.ndarray

    def __len__(self) -> int:
        return len(self.rate)

    def take(self, index) -> "TrackedModulations":
        return TrackedModulations(self.hops.take(index), self.rate[index],
                                  self.confidence[index])

    @staticmethod
    def concat(parts: list["TrackedModulations"]) -> "TrackedModulations":
        if len(parts) == 1:
            return parts[0]
        return TrackedModulations(ModulationHops.concat([p.hops for p in parts]),
                                  np.concatenate([p.rate for p in parts]),
                                  np.concatenate([p.confidence for p in parts]))


@dataclass(frozen=True)
class RidgeState:
    """Carried by :class:`ModulationTrackers`: the three posteriors (3, F), the hops
    seen, and for fixed-lag smoothing the newest ``L`` hops' forward posteriors,
    emissions, weights and spectra (3, L, ...) and those hops themselves (``held``)."""

    posterior: np.ndarray
    hops_seen: int
    alphas: np.ndarray
    emissions: np.ndarray
    weights: np.ndarray
    readouts: np.ndarray
    held: "ModulationHops"


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


@dataclass(frozen=True)
class ModulationTrackers:
    """Stage 4: ``ModulationHops -> TrackedModulations``, one hidden-Markov ridge
    tracker (:mod:`estimators.tracker`) per modulation, emissions tempered by the
    modulation's integrity.

    ``step`` without lag: all three forward filters and read-outs in one compiled call
    (:func:`estimators._kernels.track_ridges`); with ``lag_hops = L > 0``, fixed-lag
    smoothing (:func:`estimators.tracker.smooth_oldest`) over the newest ``L + 1`` hops,
    in numpy. ``batch``: a fresh :class:`estimators.tracker.RidgeTracker` per
    modulation over the whole record (the plain twin)."""

    rates: np.ndarray
    params: tracker_mod.TrackerParams
    power: float

    def initial_state(self) -> RidgeState:
        n_bins = len(self.rates)
        none = np.empty((3, 0, n_bins))
        return RidgeState(np.tile(tracker_mod.initial_posterior(n_bins), (3, 1)), 0, none,
                          none, np.empty((3, 0)), none, ModulationHops.empty(n_bins))

    def _empty(self, hops: "ModulationHops") -> TrackedModulations:
        return TrackedModulations(hops.take(slice(0, 0)), np.empty((0, 3)), np.empty((0, 3)))

    def step(self, state: RidgeState, x: "ModulationHops") -> tuple[RidgeState,
                                                                   TrackedModulations]:
        if len(x) == 0:
            return state, self._empty(x)
        if self.params.lag_hops:
            return self._step_lagged(state, x)
        posterior = state.posterior.copy()
        rate, confidence = np.empty((len(x), 3)), np.empty((len(x), 3))
        _kernels.track_ridges(np.ascontiguousarray(x.spectra, dtype=np.float64),
                              np.ascontiguousarray(x.integrity, dtype=np.float64), posterior,
                              self.params.transition, float(self.params.jump_probability),
                              float(self.power), tracker_mod.EMISSION_FLOOR,
                              float(self.params.halfwidth_bins), self.rates, rate, confidence)
        return (replace(state, posterior=posterior, hops_seen=state.hops_seen + len(x)),
                TrackedModulations(x, rate, confidence))

    def _step_lagged(self, state: RidgeState, x: "ModulationHops"):
        lag, n_new = self.params.lag_hops, len(x)
        h = state.alphas.shape[1]  # held hops: the newest min(L, hops seen)
        posterior = state.posterior.copy()
        keep = {name: [] for name in ("alphas", "emissions", "weights", "readouts")}
        rate = np.empty((max(0, h + n_new - lag), 3))
        confidence = np.empty_like(rate)
        for c in range(3):
            weights = np.clip(x.integrity[:, c], 0.0, 1.0)
            emissions = tracker_mod.emissions_from_spectra(x.spectra[:, c], self.power)
            posterior[c], alphas = tracker_mod.forward_step(state.posterior[c], emissions,
                                                            weights, self.params)
            rows = {"alphas": np.concatenate((state.alphas[c], alphas)),
                    "emissions": np.concatenate((state.emissions[c], emissions)),
                    "weights": np.concatenate((state.weights[c], weights)),
                    "readouts": np.concatenate((state.readouts[c], x.spectra[:, c]))}
            smoothed = [tracker_mod.smooth_oldest(rows["alphas"][j - lag:j + 1],
                                                  rows["emissions"][j - lag:j + 1],
                                                  rows["weights"][j - lag:j + 1], self.params)
                        for j in range(max(h, lag), h + n_new)]
            if smoothed:
                rate[:, c], confidence[:, c] = tracker_mod.read_posterior(
                    np.array(smoothed), self.rates, self.params.halfwidth_bins,
                    rows["readouts"][max(h, lag) - lag:h + n_new - lag])
            for name, value in rows.items():
                keep[name].append(value[max(0, len(value) - lag):])
        held = ModulationHops.concat([state.held, x])
        refers = np.arange(max(h, lag), h + n_new) - lag
        state = RidgeState(posterior, state.hops_seen + n_new,
                           *(np.stack(keep[name]) for name in ("alphas", "emissions",
                                                               "weights", "readouts")),
                           held.take(slice(max(0, len(held) - lag), None)))
        return state, TrackedModulations(_lagged_hops(held, refers, lag), rate, confidence)

    def batch(self, x: "ModulationHops") -> TrackedModulations:
        if len(x) == 0:
            return self._empty(x)
        rate, confidence, index = [], [], None
        for c in range(3):
            tracker = tracker_mod.RidgeTracker(self.rates, self.params, self.power)
            r, conf, index = tracker.update(x.spectra[:, c], x.integrity[:, c])
            rate.append(r)
            confidence.append(conf)
        return TrackedModulations(_lagged_hops(x, index, self.params.lag_hops),
                                  np.column_stack(rate).reshape(-1, 3),
                                  np.column_stack(confidence).reshape(-1, 3))

    def split(self, x: "ModulationHops", bounds) -> list:
        return _split_by_hops(x, bounds)

    def join(self, parts) -> TrackedModulations:
        return TrackedModulations.concat(list(parts))


def _lagged_hops(hops: "ModulationHops", refers: np.ndarray, lag: int) -> "ModulationHops":
    """The hops ``refers`` whose outputs were completed ``lag`` hops later: their
    ``emitted_s`` is that of the later hop."""
    return replace(hops.take(refers), emitted_s=hops.emitted_s[refers + lag])


# ------------------------------------------------------------------------- quality


@dataclass(frozen=True)
class RatedModulations:
    """Output of :class:`ModulationQuality`: per hop ``time_s``, ``emitted_s`` (P,), and
    per modulation ``rate``, ``confidence`` and ``quality`` (P, 3)."""

    time_s: np.ndarray
    emitted_s: np.ndarray
    rate: np.ndarray
    confidence: np.ndarray
    quality: np.ndarray

    _FIELDS = ("time_s", "emitted_s", "rate", "confidence", "quality")

    def __len__(self) -> int:
        return len(self.time_s)

    def take(self, index) -> "RatedModulations":
        return RatedModulations(*(getattr(self, name)[index] for name in self._FIELDS))

    @staticmethod
    def concat(parts: list["RatedModulations"]) -> "RatedModulations":
        return _concat_fields(RatedModulations, parts, RatedModulations._FIELDS)


def modulation_quality(hops: "ModulationHops", rate: np.ndarray, rates: np.ndarray,
                       halfwidth_bins: float) -> np.ndarray:
    """Quality (P, 3) of each modulation's rate (P, 3): integrity x concentration at the
    rate (over the bins below half the beat rate) x depth score; ``rates`` the grid (per
    minute), ``halfwidth_bins`` the confidence half-width in bins."""
    step = rates[1] - rates[0]
    limit = 0.5 * np.where(np.isfinite(hops.beat_rate), hops.beat_rate, np.inf)
    open_bins = (rates[None, :] < limit[:, None]).sum(axis=1)
    quality = np.empty_like(rate)
    for c in range(3):
        conc = peak_concentration(hops.spectra[:, c], (rate[:, c] - rates[0]) / step,
                                  halfwidth_bins, open_bins)
        quality[:, c] = quality_mod.quality_index(hops.integrity[:, c],
                                                  conc * depth_score(hops.depth[:, c]))
    return quality


@dataclass(frozen=True)
class ModulationQuality:
    """Stage 5: ``TrackedModulations -> RatedModulations``, each modulation's quality
    (:func:`modulation_quality`; step compiled,
    :func:`estimators._kernels.modulation_quality`). No state."""

    rates: np.ndarray
    halfwidth_bins: float

    def initial_state(self) -> None:
        return None

    def step(self, state: None, x: TrackedModulations) -> tuple[None, RatedModulations]:
        hops = x.hops
        quality = np.empty((len(x), 3))
        if len(x):
            _kernels.modulation_quality(
                np.ascontiguousarray(hops.spectra, dtype=np.float64),
                np.ascontiguousarray(x.rate, dtype=np.float64),
                np.ascontiguousarray(hops.integrity, dtype=np.float64),
                np.ascontiguousarray(hops.depth, dtype=np.float64),
                np.ascontiguousarray(hops.beat_rate, dtype=np.float64), self.rates,
                float(self.halfwidth_bins), CONCENTRATION_FULL, DEPTH_FLOOR, DEPTH_FULL,
                quality)
        return state, RatedModulations(hops.time_s, hops.emitted_s, x.rate, x.confidence,
                                       quality)

    def batch(self, x: TrackedModulations) -> RatedModulations:
        quality = modulation_quality(x.hops, x.rate, self.rates, self.halfwidth_bins)
        return RatedModulations(x.hops.time_s, x.hops.emitted_s, x.rate, x.confidence,
                                quality)

    def split(self, x: TrackedModulations, bounds) -> list:
        return _split_by_hops(x, bounds)

    def join(self, parts) -> RatedModulations:
        return RatedModulations.concat(list(parts))


# ------------------------------------------------------------------------- fusion

_GROUPS = ((0, 1, 2), (0, 1), (0, 2), (1, 2), (0,), (1,), (2,))
_GROUP_COLUMNS = np.array([list(g) + [-1] * (3 - len(g)) for g in _GROUPS], dtype=np.int64)
_GROUP_SIZES = np.array([len(g) for g in _GROUPS], dtype=np.int64)


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




@dataclass(frozen=True)
class BreathingRates:
    """Output of :class:`ModulationFusion` (and of the whole path): per hop the breathing
    rate (NaN: no estimate), its calibrated confidence, quality (the support), the
    instant it describes ``time_s`` (window centre less the filters' group delay at the
    rate) and ``emitted_s``; per modulation (P, 3) the rates that voted
    (``modulation_rate``, NaN where withheld), their tracker confidences and qualities."""

    time_s: np.ndarray
    emitted_s: np.ndarray
    rate: np.ndarray
    confidence: np.ndarray
    quality: np.ndarray
    modulation_rate: np.ndarray
    modulation_confidence: np.ndarray
    modulation_quality: np.ndarray

    _FIELDS = ("time_s", "emitted_s", "rate", "confidence", "quality", "modulation_rate",
               "modulation_confidence", "modulation_quality")

    def __len__(self) -> int:
        return len(self.time_s)

    @staticmethod
    def concat(parts: list["BreathingRates"]) -> "BreathingRates":
        return _concat_fields(BreathingRates, parts, BreathingRates._FIELDS)


@dataclass(frozen=True)
class ModulationFusion:
    """Stage 6: ``RatedModulations -> BreathingRates``. Rates below
    ``settings.min_quality`` are withheld, the rest fused (:func:`fuse_modulations`;
    step compiled, :func:`estimators._kernels.fuse_rates`), the fused confidence mapped
    to the probability of being within 2 breaths/min
    (:mod:`estimators.breathing_confidence`, map of ``kind``; compiled in the step,
    :func:`estimators._kernels.calibrate_breathing`) and ``time_s`` moved back
    by the causal filters' group delay at the rate (``filter_delay_s`` on the grid
    ``rates``; at ``fallback_rate_per_min``, the grid's median rate, when there is
    none). No state."""

    kind: str
    settings: RateSettings
    rates: np.ndarray
    filter_delay_s: np.ndarray
    fallback_rate_per_min: float

    def initial_state(self) -> None:
        return None

    def _shown(self, x: RatedModulations) -> np.ndarray:
        return np.where((x.quality >= self.settings.min_quality) & np.isfinite(x.rate),
                        x.rate, np.nan)

    def _finish(self, x: RatedModulations, shown, rate, confidence, quality,
                compiled: bool) -> BreathingRates:
        chosen = breathing_confidence.MAP  # read now: a caller may swap the map
        model = None if chosen is None else chosen.models.get(self.kind)
        if compiled and model is not None and len(confidence):
            raw, confidence = confidence, np.empty(len(confidence))
            _kernels.calibrate_breathing(raw, quality, model.centre, model.scale, model.beta,
                                         model.knots_score, model.knots_prob, model.low,
                                         model.high, PROB_FLOOR, PROB_CEIL, confidence)
        else:
            confidence = breathing_confidence.calibrated(self.kind, confidence, quality)
        at = np.where(np.isfinite(rate), rate, self.fallback_rate_per_min)
        time_s = x.time_s - np.interp(at, self.rates, self.filter_delay_s)
        return BreathingRates(time_s, x.emitted_s, rate, confidence, quality, shown,
                              x.confidence, x.quality)

    def step(self, state: None, x: RatedModulations) -> tuple[None, BreathingRates]:
        shown = self._shown(x)
        n_hops = len(x)
        rate, confidence, quality = np.empty(n_hops), np.empty(n_hops), np.empty(n_hops)
        if n_hops:
            s = self.settings
            _kernels.fuse_rates(np.ascontiguousarray(shown),
                                np.ascontiguousarray(x.confidence, dtype=np.float64),
                                np.ascontiguousarray(x.quality, dtype=np.float64),
                                _GROUP_COLUMNS, _GROUP_SIZES, float(s.agreement_per_min),
                                int(s.min_agreeing), float(s.min_support),
                                float(s.fusion_quality_power), rate, confidence, quality)
        return state, self._finish(x, shown, rate, confidence, quality, compiled=True)

    def batch(self, x: RatedModulations) -> BreathingRates:
        shown = self._shown(x)
        s = self.settings
        return self._finish(x, shown, *fuse_modulations(
            shown, x.confidence, x.quality, s.agreement_per_min, s.min_agreeing,
            s.min_support, s.fusion_quality_power), compiled=False)

    def split(self, x: RatedModulations, bounds) -> list:
        return _split_by_hops(x, bounds)

    def join(self, parts) -> BreathingRates:
        return BreathingRates.concat(list(parts))


# ---------------------------------------------------------------- whole path


def pulse_breathing_chain(kind: str, settings: RateSettings, fs: float) -> Chain:
    """Breathing from one PPG or ECG channel at raw rate ``fs`` as a chain of stages:
    raw ``(x, t)`` -> :class:`BeatDetection` -> :class:`Resampling` ->
    :class:`ModulationSpectra` -> :class:`ModulationTrackers` -> :class:`ModulationQuality`
    -> :class:`ModulationFusion` -> :class:`BreathingRates`."""
    if settings.quantity != "rr":
        raise ParameterError(f"settings.quantity={settings.quantity!r} must be 'rr'")
    params = replace(beat_params(kind, fs), interval_tolerance=settings.beat_interval_tolerance)
    decimation = settings.decimation(fs)
    spectra = ModulationSpectra.for_settings(settings, fs / decimation)
    rates = spectra.rates
    return Chain((BeatDetection(params), Resampling(params, decimation), spectra,
                  ModulationTrackers(rates, tracker_params(settings, rates),
                                     float(settings.emission_power)),
                  ModulationQuality(rates, settings.confidence_halfwidth_per_min
                                    / (rates[1] - rates[0])),
                  ModulationFusion(kind, settings, rates, spectra.filter_delay_s,
                                   float(np.median(rates)))))


class PulseBreathing:
    """Breathing rate from one PPG or ECG channel: ``update(x, t) -> list[Estimate]``;
    owns the state of its :func:`pulse_breathing_chain`.

    Parameters
    ----------
    name : channel name, used as the estimates' ``source``.
    kind : ``"ppg"`` or ``"ecg"``.
    settings : breathing-rate settings (``quantity="rr"``): window, hop, band, tracker,
        and for the fusion ``agreement_per_min``, ``min_agreeing``, ``min_support``.
    fs : raw sampling rate (Hz), at least 40 Hz.

    Notes
    -----
    Each estimate describes the centre of its window, less the causal modulation
    filters' group delay at its rate (``time_s``); ``emitted_s`` is the timestamp of the
    newest raw sample any of its values depended on: an evenly resampled value waits for
    the next beat and the detector's look-ahead, so the delay is half a window plus
    about one beat interval and 0.25 s, plus the filters' delay.

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
        self.name, self.kind, self.settings = name, kind, settings
        self.chain = pulse_breathing_chain(kind, settings, fs)
        beats, resampling, spectra, self.tracker_stage, self.quality_stage, self.fusion_stage = \
            self.chain.stages
        self.beat_params, self.decimation = beats.params, resampling.decimation
        self.bank = ModulationBank(settings, spectra.fs_analysis, spectra)
        self.rates = spectra.rates
        self._after_beats = Chain(self.chain.stages[1:])
        self.reset()

    def reset(self) -> None:
        self.state = self.chain.initial_state()
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
        beat_state, beats = self.chain.stages[0].step(self.state[0], (x, t))
        rest, out = self._after_beats.step(self.state[1:], beats)
        self.state = (beat_state, *rest)
        self.last_beats = beats.beats
        if len(out) == 0:
            return []
        return self._estimates(out)

    def _estimates(self, out: BreathingRates) -> list[Estimate]:
        self.last_modulations = (out.modulation_rate, out.modulation_confidence,
                                 out.modulation_quality)
        name = self.name
        return [Estimate("rr", name, a, b, r, c, q) for a, b, r, c, q in zip(
            out.time_s.tolist(), out.emitted_s.tolist(), out.rate.tolist(),
            out.confidence.tolist(), out.quality.tolist())]

    def track_hops(self, hops: ModulationHops) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Rate, confidence and quality (P, 3) per modulation of a whole record's hops
        from fresh trackers (the live state is not touched; without lag equal to
        :meth:`update` over the same record). The fusion's inputs, for tuning it."""
        rated = self.quality_stage.batch(self.tracker_stage.batch(hops))
        return rated.rate, rated.confidence, rated.quality

    def hops_batch(self, x: np.ndarray, t: np.ndarray, zero_phase: bool) -> ModulationHops:
        """Modulation hops of a whole record in one call: the batch twin of the first
        three stages (``zero_phase`` for the offline estimates)."""
        x = np.asarray(x, dtype=np.float64)
        t = np.asarray(t, dtype=np.float64)
        stage = self.bank.stage
        if len(x) < stage.min_window * self.decimation:
            return stage.empty()  # shorter than the shortest window: no hop at all
        beats = detect_batch(x, t, self.beat_params, zero_phase)
        # One compiled call over the record (equal to resample_batch, the plain twin).
        _, samples = resample_step(resample_initial_state(), beats, t, self.decimation,
                                   self.beat_params)
        return stage.hops_batch(samples, zero_phase)

    def offline(self, x: np.ndarray, t: np.ndarray) -> list[Estimate]:
        """The non-causal twin over a whole record: zero-phase filters, a Viterbi ridge
        and forward-backward confidence per modulation, then the same quality and
        fusion. Every estimate used the whole record, so ``emitted_s`` is the last
        timestamp."""
        hops = self.hops_batch(x, t, zero_phase=True)
        if len(hops) == 0:
            return []
        params = self.tracker_stage.params
        rate, conf = np.empty((len(hops), 3)), np.empty((len(hops), 3))
        for c in range(3):
            rate[:, c], conf[:, c] = offline_track(hops.spectra[:, c], hops.integrity[:, c],
                                                   self.rates, params,
                                                   self.settings.emission_power)
        hops = replace(hops, emitted_s=np.full(len(hops), float(t[-1])))
        # Zero-phase filters delay nothing: offline estimates describe their window centre.
        fusion = replace(self.fusion_stage,
                         filter_delay_s=np.zeros_like(self.fusion_stage.filter_delay_s))
        return self._estimates(fusion.batch(self.quality_stage.batch(
            TrackedModulations(hops, rate, conf))))
