"""Causal ridge tracker (hidden-Markov forward filter) and its offline Viterbi twin.

Model
-----
The hidden state is the frequency bin ``f`` of the fundamental. Between hops the rate
moves by a Gaussian step of standard deviation ``sigma = max_change * hop_s`` (per
minute), truncated at 3 sigma, and with probability ``jump_probability`` it jumps
anywhere in the band (re-acquisition after a wrong lock). The emission of a hop is

.. math:: e_p(f) = \\epsilon + (S_p(f) / \\max_f S_p)^{\\beta}

from the de-shape spectrum ``S_p`` (``epsilon = 1e-2`` keeps every bin reachable),
tempered by a per-hop weight ``w_p`` in [0, 1] from the signal-integrity part of the
quality index: ``e_p ** w_p``, so a flat or non-finite window is uninformative and the
posterior coasts and spreads instead of locking onto garbage.

Forward filter (Rabiner, "A tutorial on hidden Markov models...", Proc. IEEE 1989):
``alpha_p = normalise(e_p * (T alpha_{p-1}))``. The reported rate is the posterior mean
within ``confidence_halfwidth`` of the posterior mode; the **confidence** is the posterior
mass in that interval, so it falls when the posterior splits (e.g. between the pulse
and a double or half of it, or between pulse and cadence).

Fixed-lag smoothing of ``L`` hops runs the backward recursion over the newest ``L + 1``
hops; the estimate then refers to hop ``p - L`` and its delay grows by ``L * hop_s``.

Offline, the Viterbi algorithm finds the globally optimal path through the same
emissions and transitions (log domain).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from estimators import _kernels
from estimators.errors import ParameterError

EMISSION_FLOOR = 1e-2

OFFLINE_BLOCK_HOPS = 4096
"""Rows per block where :func:`offline_track` works row by row (peak read-out): its
temporary masks stay at a few MB however long the record. Our own choice."""


def transition_kernel(sigma_bins: float) -> np.ndarray:
    """Normalised Gaussian step kernel over ``+-ceil(3 sigma)`` bins (at least +-1)."""
    if sigma_bins <= 0:
        raise ParameterError(f"sigma_bins={sigma_bins} must be > 0")
    half = max(1, int(np.ceil(3.0 * sigma_bins)))
    d = np.arange(-half, half + 1)
    g = np.exp(-0.5 * (d / sigma_bins) ** 2)
    return g / g.sum()


def emissions_from_spectra(spectra: np.ndarray, power: float) -> np.ndarray:
    """``epsilon + (S / max S) ** power`` per hop; all-zero hops give a flat emission."""
    spectra = np.atleast_2d(spectra)
    peak = spectra.max(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.where(peak > 0, spectra / np.where(peak > 0, peak, 1.0), 0.0)
    rel = np.nan_to_num(rel, nan=0.0, posinf=0.0, neginf=0.0)
    return EMISSION_FLOOR + rel ** power


@dataclass(frozen=True)
class TrackerParams:
    transition: np.ndarray
    jump_probability: float
    halfwidth_bins: float
    lag_hops: int = 0


def make_params(grid_step_per_min: float, hop_s: float, max_change_per_min_per_s: float,
                jump_probability: float, confidence_halfwidth_per_min: float,
                lag_hops: int = 0) -> TrackerParams:
    sigma = max_change_per_min_per_s * hop_s / grid_step_per_min
    return TrackerParams(transition_kernel(sigma), float(jump_probability),
                         confidence_halfwidth_per_min / grid_step_per_min, int(lag_hops))


def initial_posterior(n_bins: int) -> np.ndarray:
    """Uniform over the band: nothing is known before the first hop."""
    return np.full(n_bins, 1.0 / n_bins)


def read_posterior(posterior: np.ndarray, rates: np.ndarray, halfwidth_bins: float,
                   spectra: np.ndarray | None = None):
    """Rate and confidence per hop from posteriors (P, F).

    The posterior picks the ridge: its mode, and the **confidence** is the posterior mass
    within ``halfwidth_bins`` of the mode. The rate is read where the evidence is
    sharpest: with ``spectra`` given, the highest spectral peak within the half-width of
    the mode, refined by parabolic interpolation (no lag from the prior); without, the
    posterior mean within the half-width.
    """
    posterior = np.atleast_2d(posterior)
    n_hops, n_bins = posterior.shape
    mode = np.argmax(posterior, axis=1)
    idx = np.arange(n_bins)
    near = np.abs(idx[None, :] - mode[:, None]) <= halfwidth_bins
    mass = np.where(near, posterior, 0.0)
    confidence = np.clip(mass.sum(axis=1), 0.0, 1.0)
    if spectra is None:
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = (mass * rates[None, :]).sum(axis=1) / mass.sum(axis=1)
        return rate, confidence
    rate = refine_peak(np.atleast_2d(spectra), mode, halfwidth_bins, rates)
    return rate, confidence


def refine_peak(spectra: np.ndarray, centre: np.ndarray, halfwidth_bins: float,
                rates: np.ndarray) -> np.ndarray:
    """Rate of the highest spectral peak within ``halfwidth_bins`` of ``centre`` (P,)
    bins, refined by parabolic interpolation; the centre's rate where the spectrum is
    empty there."""
    n_hops, n_bins = spectra.shape
    idx = np.arange(n_bins)
    near = np.abs(idx[None, :] - centre[:, None]) <= halfwidth_bins
    peak = np.argmax(np.where(near, spectra, -np.inf), axis=1)
    rows = np.arange(n_hops)
    left = spectra[rows, np.maximum(peak - 1, 0)]
    mid = spectra[rows, peak]
    right = spectra[rows, np.minimum(peak + 1, n_bins - 1)]
    denom = left - 2.0 * mid + right
    with np.errstate(invalid="ignore", divide="ignore"):
        delta = np.where((denom < 0) & (peak > 0) & (peak < n_bins - 1),
                         0.5 * (left - right) / denom, 0.0)
    delta = np.clip(delta, -0.5, 0.5)
    step = rates[1] - rates[0] if len(rates) > 1 else 0.0
    return np.where(mid > 0, rates[peak] + delta * step, rates[centre])


def forward_step(posterior: np.ndarray, emissions: np.ndarray, weights: np.ndarray,
                 params: TrackerParams) -> tuple[np.ndarray, np.ndarray]:
    """``step(state, inputs, params) -> (state, output)`` for one or more hops.

    Parameters
    ----------
    posterior : (F,) posterior before these hops (not modified).
    emissions : (P, F) from :func:`emissions_from_spectra`.
    weights : (P,) emission tempering in [0, 1].

    Returns
    -------
    (new posterior (F,), posteriors after each hop (P, F)).
    """
    emissions = np.ascontiguousarray(emissions, dtype=np.float64)
    weights = np.ascontiguousarray(np.clip(weights, 0.0, 1.0), dtype=np.float64)
    alpha = np.array(posterior, dtype=np.float64, copy=True)
    out = np.empty_like(emissions)
    _kernels.forward_filter(alpha, emissions, weights, params.transition,
                            params.jump_probability, out)
    return alpha, out


def backward_betas(emissions: np.ndarray, weights: np.ndarray, params: TrackerParams) -> np.ndarray:
    """Backward variables (P, F) of the forward-backward algorithm."""
    emissions = np.ascontiguousarray(emissions, dtype=np.float64)
    out = np.empty_like(emissions)
    _kernels.backward_pass(emissions,
                           np.ascontiguousarray(np.clip(weights, 0, 1), dtype=np.float64),
                           params.transition, params.jump_probability, out)
    return out


def smooth_oldest(alphas: np.ndarray, emissions: np.ndarray, weights: np.ndarray,
                  params: TrackerParams) -> np.ndarray:
    """Smoothed posterior of the oldest of ``L + 1`` held hops (fixed-lag smoothing)."""
    post = alphas[0] * backward_betas(emissions, weights, params)[0]
    return post / post.sum()


def smooth_all(emissions: np.ndarray, weights: np.ndarray, params: TrackerParams) -> np.ndarray:
    """Posterior marginals of every hop given the whole record (forward-backward)."""
    n_bins = emissions.shape[1]
    _, alphas = forward_step(initial_posterior(n_bins), emissions, weights, params)
    post = alphas * backward_betas(emissions, weights, params)
    return post / post.sum(axis=1, keepdims=True)


def viterbi_path(emissions: np.ndarray, weights: np.ndarray, params: TrackerParams) -> np.ndarray:
    """Globally optimal bin path (P,) through tempered emissions (offline twin)."""
    emissions = np.atleast_2d(emissions)
    n_hops, n_bins = emissions.shape
    if n_hops == 0:
        return np.empty(0, dtype=np.int64)
    weights = np.clip(weights, 0, 1)
    log_e = np.empty((n_hops, n_bins))
    for a in range(0, n_hops, OFFLINE_BLOCK_HOPS):  # row by row: no (P, F) temporaries
        part = slice(a, a + OFFLINE_BLOCK_HOPS)
        log_e[part] = np.log(emissions[part]) * weights[part, None]
    mix = params.jump_probability
    log_t = np.log((1.0 - mix) * params.transition + mix / n_bins)
    log_jump = np.log(mix / n_bins) if mix > 0 else -np.inf
    path = np.empty(n_hops, dtype=np.int64)
    _kernels.viterbi(log_e, log_t, float(log_jump), path)
    return path


def offline_track(spectra: np.ndarray, weights: np.ndarray, params: TrackerParams,
                  power: float, rates: np.ndarray, readout: np.ndarray | None = None):
    """The offline twin of the tracker over a whole record: the Viterbi ridge and the
    forward-backward posterior mass within the half-width of it.

    Returns ``(rate, confidence, path)`` per hop: the rate of the highest peak of
    ``readout`` (default ``spectra``) near the ridge (:func:`refine_peak`), the mass
    near the ridge clipped to [0, 1], and the ridge's bins.

    Notes
    -----
    The same numbers as :func:`viterbi_path`, :func:`smooth_all` and a mask of the
    posteriors near the path, in bounded memory: the Viterbi pass runs first and frees
    its log-emissions; the backward recursion (``_kernels.backward_mass``) keeps one
    backward vector and reads the forward posteriors as it goes, so besides the
    spectra at most three (P, F) arrays exist at once (emissions, forward posteriors,
    and during the Viterbi pass its log-emissions and back-pointers), against about
    seven for the plain composition. The sums run in another order, so the masses agree
    with it to rounding (tested to 1e-12).
    """
    emissions = np.empty(spectra.shape)
    for a in range(0, len(spectra), OFFLINE_BLOCK_HOPS):  # row by row: no (P, F) temporaries
        part = slice(a, a + OFFLINE_BLOCK_HOPS)
        emissions[part] = emissions_from_spectra(spectra[part], power)
    weights = np.ascontiguousarray(np.clip(weights, 0.0, 1.0), dtype=np.float64)
    path = viterbi_path(emissions, weights, params)
    if len(path) == 0:
        empty = np.empty(0)
        return empty, empty, path
    _, alphas = forward_step(initial_posterior(emissions.shape[1]), emissions, weights,
                             params)
    mass = np.empty(len(path))
    _kernels.backward_mass(emissions, weights, params.transition, params.jump_probability,
                           alphas, path.astype(np.float64), float(params.halfwidth_bins),
                           mass)
    del alphas, emissions
    readout = spectra if readout is None else readout
    rate = np.empty(len(path))
    for a in range(0, len(path), OFFLINE_BLOCK_HOPS):  # its masks are (P, F) too
        part = slice(a, a + OFFLINE_BLOCK_HOPS)
        rate[part] = refine_peak(readout[part], path[part], params.halfwidth_bins, rates)
    return rate, np.clip(mass, 0.0, 1.0), path


@dataclass(frozen=True)
class TrackInput:
    """Input of the tracker stage for C channels: ``spectra`` and ``readout`` (C, P, F)
    (the tracked spectra, and where the rate is read off), ``weights`` (C, P) the
    emission tempering (the windows' signal integrity)."""

    spectra: np.ndarray
    weights: np.ndarray
    readout: np.ndarray

    def __len__(self) -> int:
        """Hops: the last axis of ``weights`` ((C, P), or (P,) for one channel)."""
        return self.weights.shape[-1]


@dataclass(frozen=True)
class TrackOutput:
    """Output of the tracker stage: ``rate`` (C, P) per minute, ``confidence`` (C, P)
    the posterior mass within the half-width of the mode, ``concentration`` (C, P) the
    harmonic concentration score at the rate (for the quality index)."""

    rate: np.ndarray
    confidence: np.ndarray
    concentration: np.ndarray


@dataclass
class TrackState:
    """The posterior of each channel (C, F) and the hops seen."""

    posterior: np.ndarray
    hops_seen: int = 0


def _split_hops(x, bounds) -> list:
    """Cut a dataclass of (C, P, ...) arrays at hop ``bounds``."""
    n = x.confidence.shape[1] if hasattr(x, "confidence") else x.weights.shape[1]
    edges = [0, *[int(b) for b in bounds], n]
    return [type(x)(*(getattr(x, f)[:, lo:hi] for f in x.__dataclass_fields__))
            for lo, hi in zip(edges[:-1], edges[1:])]


def _join_hops(parts):
    first = parts[0]
    return type(first)(*(np.concatenate([getattr(p, f) for p in parts], axis=1)
                         for f in first.__dataclass_fields__))


@dataclass(frozen=True, eq=False)
class RidgeTrack:
    """Stage (:mod:`estimators.stage`): the causal tracker without lag for C channels on
    one grid, all of them in one compiled call (:func:`estimators._kernels.track_channels`).

    Input :class:`TrackInput`, output :class:`TrackOutput`, state :class:`TrackState`.
    Per hop: the rhythm score tempers the emission (with ``check_rhythm``), one forward
    step, the confidence and the rate read at the highest ``readout`` peak near the mode
    (parabolic interpolation), the concentration score there. :meth:`batch` is the
    numpy composition of the same steps (:func:`emissions_from_spectra`,
    :func:`forward_step`, :func:`read_posterior` and the concentration score), the twin
    the compiled kernel is tested against.
    """

    rates: np.ndarray
    params: TrackerParams
    power: float
    check_rhythm: bool = False
    chance_factor: float = 1.5
    span: float = 0.3
    n_channels: int = 1

    @property
    def step_per_min(self) -> float:
        return float(self.rates[1] - self.rates[0])

    @property
    def offset_bins(self) -> float:
        return float(self.rates[0] / self.step_per_min)

    def initial_state(self) -> TrackState:
        return TrackState(np.tile(initial_posterior(len(self.rates)), (self.n_channels, 1)))

    def step(self, state: TrackState, x: TrackInput) -> tuple[TrackState, TrackOutput]:
        spectra = np.ascontiguousarray(x.spectra, dtype=np.float64)
        readout = np.ascontiguousarray(x.readout, dtype=np.float64)
        weights = np.ascontiguousarray(np.clip(x.weights, 0.0, 1.0), dtype=np.float64)
        posterior = np.array(state.posterior, dtype=np.float64, order="C")
        shape = weights.shape
        position, confidence, concentration = np.empty(shape), np.empty(shape), np.empty(shape)
        _kernels.track_channels(spectra, readout, weights, posterior, self.params.transition,
                                self.params.jump_probability, float(self.power),
                                EMISSION_FLOOR, float(self.params.halfwidth_bins),
                                self.offset_bins, self.chance_factor, self.span,
                                bool(self.check_rhythm), position, confidence, concentration)
        rate = self.rates[0] + position * self.step_per_min
        return (TrackState(posterior, state.hops_seen + shape[1]),
                TrackOutput(rate, confidence, concentration))

    def batch(self, x: TrackInput) -> TrackOutput:
        rows = [self._batch_channel(x.spectra[c], np.asarray(x.weights[c], dtype=np.float64),
                                    x.readout[c]) for c in range(len(x.spectra))]
        return TrackOutput(*(np.array([r[i] for r in rows]).reshape(len(rows), -1)
                             for i in range(3)))

    def _batch_channel(self, spectra, weights, readout):
        if len(spectra) == 0:
            return np.empty(0), np.empty(0), np.empty(0)
        # The general tracker without lag: rhythm score, emissions, forward filter and
        # read-out in numpy (the same steps LagTrack takes).
        plain = LagTrack(self.rates, dataclasses.replace(self.params, lag_hops=0),
                         self.power, self.check_rhythm, self.chance_factor, self.span)
        out = plain.batch(TrackInput(spectra, weights, readout))
        n_bins, halfwidth = len(self.rates), float(self.params.halfwidth_bins)
        position = (out.rate - self.rates[0]) / self.step_per_min
        concentration = np.zeros(len(position))
        for p, centre in enumerate(position.tolist()):
            # A rate on the grid's first or last bin is a slope, not a peak: no rhythm.
            if 0 < int(round(centre)) < n_bins - 1:
                concentration[p] = _kernels.harmonic_score(
                    np.ascontiguousarray(readout[p] ** 2), centre, self.offset_bins,
                    halfwidth, self.chance_factor, self.span)
        return out.rate, out.confidence, concentration

    def split(self, x, bounds) -> list:
        return _split_hops(x, bounds)

    def join(self, parts):
        return _join_hops(parts)


@dataclass
class LagState:
    """What :class:`LagTrack` carries: the posterior (F,), the hops seen, and the
    newest ``L`` (or fewer) hops' forward posteriors, emissions, weights and read-out
    spectra, which the backward pass of fixed-lag smoothing needs."""

    posterior: np.ndarray
    hops_seen: int
    alphas: np.ndarray
    emissions: np.ndarray
    weights: np.ndarray
    readouts: np.ndarray


@dataclass(frozen=True)
class LagOutput:
    """Output of :class:`LagTrack`: ``rate``, ``confidence`` (n,) and ``index`` (n,),
    the hop (counted from the first) each output refers to."""

    rate: np.ndarray
    confidence: np.ndarray
    index: np.ndarray


@dataclass(frozen=True, eq=False)
class LagTrack:
    """Stage (:mod:`estimators.stage`): one channel's tracker in its general form, with
    fixed-lag smoothing of ``params.lag_hops = L`` hops (``L = 0``: none). Input
    :class:`TrackInput` of one channel (``spectra``, ``readout`` (P, F), ``weights``
    (P,)); output :class:`LagOutput` (outputs start once ``L`` hops have been seen);
    state :class:`LagState`.

    Per hop: the weight times the rhythm score (with ``check_rhythm``), one forward
    step (:func:`forward_step`); the smoothed posterior of the oldest of the newest
    ``L + 1`` hops (:func:`smooth_oldest`) read by :func:`read_posterior` on that hop's
    read-out spectrum. Without lag the hot path is :class:`RidgeTrack` (compiled, the
    same numbers)."""

    rates: np.ndarray
    params: TrackerParams
    power: float
    check_rhythm: bool = False
    chance_factor: float = 1.5
    span: float = 0.3

    def initial_state(self) -> LagState:
        n_bins = len(self.rates)
        empty = np.empty((0, n_bins))
        return LagState(initial_posterior(n_bins), 0, empty, empty, np.empty(0), empty)

    def rhythm(self, spectra: np.ndarray, readout: np.ndarray) -> np.ndarray:
        """Rhythm score per hop (see :func:`estimators._kernels.rhythm_scores`); ones when
        the check is off."""
        spectra = np.ascontiguousarray(np.atleast_2d(spectra), dtype=np.float64)
        if not self.check_rhythm:
            return np.ones(len(spectra))
        step = float(self.rates[1] - self.rates[0])
        out = np.empty(len(spectra))
        _kernels.rhythm_scores(spectra, np.ascontiguousarray(readout, dtype=np.float64),
                               float(self.rates[0] / step), float(self.params.halfwidth_bins),
                               self.chance_factor, self.span, out)
        return out

    def step(self, state: LagState, x: TrackInput) -> tuple[LagState, LagOutput]:
        spectra = np.atleast_2d(x.spectra)
        readout = spectra if x.readout is None else np.atleast_2d(x.readout)
        weights = np.clip(x.weights, 0.0, 1.0) * self.rhythm(spectra, readout)
        emissions = emissions_from_spectra(spectra, self.power)
        posterior, posts = forward_step(state.posterior, emissions, weights, self.params)
        first_hop, lag = state.hops_seen, self.params.lag_hops
        hops_seen = first_hop + len(posts)
        if lag == 0:
            rate, conf = read_posterior(posts, self.rates, self.params.halfwidth_bins, readout)
            return (LagState(posterior, hops_seen, state.alphas, state.emissions,
                             state.weights, state.readouts),
                    LagOutput(rate, conf, np.arange(first_hop, hops_seen)))
        alphas = np.concatenate((state.alphas, posts))
        held_em = np.concatenate((state.emissions, emissions))
        held_w = np.concatenate((state.weights, np.clip(weights, 0, 1)))
        held_sp = np.concatenate((state.readouts, readout))
        smoothed, index, referred = [], [], []
        for i in range(len(posts)):
            end = len(state.alphas) + i + 1  # the held hops after hop i: [end - L - 1, end)
            if end >= lag + 1:
                part = slice(end - lag - 1, end)
                smoothed.append(smooth_oldest(alphas[part], held_em[part], held_w[part],
                                              self.params))
                index.append(first_hop + i - lag)
                referred.append(held_sp[end - lag - 1])
        keep = slice(max(0, len(alphas) - lag), len(alphas))
        new = LagState(posterior, hops_seen, alphas[keep].copy(), held_em[keep].copy(),
                       held_w[keep].copy(), held_sp[keep].copy())
        if not smoothed:
            e = np.empty(0)
            return new, LagOutput(e, e, np.empty(0, dtype=np.int64))
        rate, conf = read_posterior(np.array(smoothed), self.rates, self.params.halfwidth_bins,
                                    np.array(referred))
        return new, LagOutput(rate, conf, np.array(index, dtype=np.int64))

    def batch(self, x: TrackInput) -> LagOutput:
        return self.step(self.initial_state(), x)[1]

    def split(self, x: TrackInput, bounds) -> list:
        edges = [0, *[int(b) for b in bounds], len(x.weights)]
        return [TrackInput(x.spectra[lo:hi], x.weights[lo:hi],
                           None if x.readout is None else x.readout[lo:hi])
                for lo, hi in zip(edges[:-1], edges[1:])]

    def join(self, parts) -> LagOutput:
        return LagOutput(*(np.concatenate([getattr(p, f) for p in parts])
                           for f in ("rate", "confidence", "index")))


class RidgeTracker:
    """Causal tracker owning its posterior and the fixed-lag history.

    ``update(spectra, weights) -> (rate, confidence, lag_index)`` for the hops given:
    ``lag_index[i]`` is the index (into all hops seen so far) of the hop that output
    ``i`` refers to; with no lag it is the hop itself. Outputs start once ``L`` hops
    have been seen. :meth:`track` (no lag) steps a one-channel :class:`RidgeTrack`.
    """

    def __init__(self, rates_per_min: np.ndarray, params: TrackerParams, emission_power: float,
                 check_rhythm: bool = False, chance_factor: float = 1.5, span: float = 0.3):
        self.rates = np.asarray(rates_per_min, dtype=np.float64)
        self.params, self.power = params, emission_power
        self.step = float(self.rates[1] - self.rates[0])
        self.offset_bins = float(self.rates[0] / self.step)
        # Rhythm and concentration scores (see _kernels.harmonic_score). With the rhythm
        # check on, hops whose power is not on a harmonic family do not pull the posterior.
        self.check_rhythm = bool(check_rhythm)
        self.chance_factor, self.span = float(chance_factor), float(span)
        self.stage = RidgeTrack(self.rates, params, emission_power, self.check_rhythm,
                                self.chance_factor, self.span)
        self.lagged = LagTrack(self.rates, params, emission_power, self.check_rhythm,
                               self.chance_factor, self.span)
        self.reset()

    def reset(self) -> None:
        self.memory = self.lagged.initial_state()

    @property
    def posterior(self) -> np.ndarray:
        return self.memory.posterior

    @property
    def hops_seen(self) -> int:
        return self.memory.hops_seen

    def track(self, spectra: np.ndarray, weights: np.ndarray, readout: np.ndarray | None = None):
        """Hot path without lag: ``(rate (P,), confidence (P,), concentration (P,))``,
        the last being the harmonic concentration score at the rate (for the quality
        index), in one compiled pass. Hops without rhythm do not pull the posterior."""
        if self.params.lag_hops:
            raise ParameterError("track() is for lag_hops=0; use update()")
        spectra = np.atleast_2d(spectra)
        readout = spectra if readout is None else readout
        state, out = self.stage.step(TrackState(self.posterior[None], self.hops_seen),
                                     TrackInput(spectra[None], np.asarray(weights)[None],
                                                np.asarray(readout)[None]))
        self.memory = dataclasses.replace(self.memory, posterior=state.posterior[0],
                                          hops_seen=state.hops_seen)
        return out.rate[0], out.confidence[0], out.concentration[0]

    def rhythm(self, spectra: np.ndarray, readout: np.ndarray | None = None) -> np.ndarray:
        """Rhythm score per hop (see :func:`estimators._kernels.rhythm_scores`); ones when
        the check is off."""
        return self.lagged.rhythm(spectra, spectra if readout is None else readout)

    def update(self, spectra: np.ndarray, weights: np.ndarray, readout: np.ndarray | None = None):
        """Track the hops of ``spectra`` (P, F) with emission weights (P,) times the
        rhythm score; the rate is read off ``readout`` (P, F) near the posterior mode
        (default: ``spectra``). The general path (fixed-lag smoothing: a step of
        :class:`LagTrack`); :meth:`track` is the compiled hot path for no lag."""
        self.memory, out = self.lagged.step(self.memory, TrackInput(spectra, weights, readout))
        return out.rate, out.confidence, out.index
