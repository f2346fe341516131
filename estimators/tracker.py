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


START_TAPER_PER_MIN = 20.0
"""Width (standard deviation, per minute) of the start prior's taper above its knee
(:func:`start_posterior`): twice the spread of measured maximal heart rates around their
age prediction (about 10 bpm; Tanaka, Monahan & Seals, J. Am. Coll. Cardiol.
37(1):153-156, 2001, from memory), so a rate 20 bpm above the knee keeps 61 % of the
weight and one 40 bpm above, 14 %."""


def start_posterior(rates: np.ndarray, taper_above_per_min: float) -> np.ndarray:
    """The posterior before the first hop (and after a restart): uniform up to
    ``taper_above_per_min``, a Gaussian taper of width :data:`START_TAPER_PER_MIN`
    above it, normalised; uniform when ``taper_above_per_min`` is 0.

    Before any evidence, a tracker started on a resting pulse whose second harmonic
    outgrows its fundamental (a wrist PPG at rest can do this for seconds) would lock
    on twice the rate, as likely a priori as the rate itself; the taper makes rates
    above the usual maximal heart rate less likely at the start only. Later hops are
    not affected (the transitions carry the posterior).

    >>> start_posterior(np.array([100.0, 180.0, 200.0]), 180.0).round(3).tolist()
    [0.384, 0.384, 0.233]
    """
    rates = np.asarray(rates, dtype=np.float64)
    if taper_above_per_min <= 0:
        return initial_posterior(len(rates))
    excess = np.maximum(rates - taper_above_per_min, 0.0) / START_TAPER_PER_MIN
    weight = np.exp(-0.5 * excess ** 2)
    return weight / weight.sum()


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


def viterbi_path(emissions: np.ndarray, weights: np.ndarray, params: TrackerParams,
                 start: np.ndarray | None = None) -> np.ndarray:
    """Globally optimal bin path (P,) through tempered emissions (offline twin);
    ``start`` (F,): the prior of the first hop's bin (None: uniform)."""
    emissions = np.atleast_2d(emissions)
    n_hops, n_bins = emissions.shape
    if n_hops == 0:
        return np.empty(0, dtype=np.int64)
    weights = np.clip(weights, 0, 1)
    log_e = np.empty((n_hops, n_bins))
    for a in range(0, n_hops, OFFLINE_BLOCK_HOPS):  # row by row: no (P, F) temporaries
        part = slice(a, a + OFFLINE_BLOCK_HOPS)
        log_e[part] = np.log(emissions[part]) * weights[part, None]
    if start is not None:
        log_e[0] += np.log(np.maximum(start, 1e-300))
    mix = params.jump_probability
    log_t = np.log((1.0 - mix) * params.transition + mix / n_bins)
    log_jump = np.log(mix / n_bins) if mix > 0 else -np.inf
    path = np.empty(n_hops, dtype=np.int64)
    _kernels.viterbi(log_e, log_t, float(log_jump), path)
    return path


def offline_track(spectra: np.ndarray, weights: np.ndarray, params: TrackerParams,
                  power: float, rates: np.ndarray, readout: np.ndarray | None = None,
                  start: np.ndarray | None = None):
    """The offline twin of the tracker over a whole record: the Viterbi ridge and the
    forward-backward posterior mass within the half-width of it.

    Returns ``(rate, confidence, path)`` per hop: the rate of the highest peak of
    ``readout`` (default ``spectra``) near the ridge (:func:`refine_peak`), the mass
    near the ridge clipped to [0, 1], and the ridge's bins. ``start`` (F,): the
    posterior before the first hop (None: uniform), as the live tracker starts.

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
    path = viterbi_path(emissions, weights, params, start)
    if len(path) == 0:
        empty = np.empty(0)
        return empty, empty, path
    _, alphas = forward_step(initial_posterior(emissions.shape[1]) if start is None
                             else start, emissions, weights, params)
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


class RidgeTracker:
    """Causal tracker owning its posterior and the fixed-lag history.

    ``update(spectra, weights) -> (rate, confidence, lag_index)`` for the hops given:
    ``lag_index[i]`` is the index (into all hops seen so far) of the hop that output
    ``i`` refers to; with no lag it is the hop itself. Outputs start once ``L`` hops
    have been seen.
    """

    def __init__(self, rates_per_min: np.ndarray, params: TrackerParams, emission_power: float,
                 check_rhythm: bool = False, chance_factor: float = 1.5, span: float = 0.3,
                 start: np.ndarray | None = None):
        self.rates = np.asarray(rates_per_min, dtype=np.float64)
        # The posterior before the first hop and after every reset (start_posterior).
        self.start = (initial_posterior(len(self.rates)) if start is None
                      else np.asarray(start, dtype=np.float64) / np.sum(start))
        self.params, self.power = params, emission_power
        self.step = float(self.rates[1] - self.rates[0])
        self.offset_bins = float(self.rates[0] / self.step)
        # Rhythm and concentration scores (see _kernels.harmonic_score). With the rhythm
        # check on, hops whose power is not on a harmonic family do not pull the posterior.
        self.check_rhythm = bool(check_rhythm)
        self.chance_factor, self.span = float(chance_factor), float(span)
        self.reset()

    def reset(self) -> None:
        self.posterior = self.start.copy()
        self.hops_seen = 0
        self._hist_alpha: list[np.ndarray] = []
        self._hist_em: list[np.ndarray] = []
        self._hist_w: list[float] = []
        self._hist_sp: list[np.ndarray] = []

    def track(self, spectra: np.ndarray, weights: np.ndarray, readout: np.ndarray | None = None):
        """Hot path without lag: ``(rate (P,), confidence (P,), concentration (P,))``,
        the last being the harmonic concentration score at the rate (for the quality
        index), in one compiled pass. Hops without rhythm do not pull the posterior."""
        if self.params.lag_hops:
            raise ParameterError("track() is for lag_hops=0; use update()")
        spectra = np.ascontiguousarray(np.atleast_2d(spectra), dtype=np.float64)
        readout = spectra if readout is None else np.ascontiguousarray(readout, dtype=np.float64)
        weights = np.ascontiguousarray(np.clip(weights, 0.0, 1.0), dtype=np.float64)
        n = len(spectra)
        position, confidence, concentration = np.empty(n), np.empty(n), np.empty(n)
        _kernels.track_block(spectra, readout, weights, self.posterior, self.params.transition,
                             self.params.jump_probability, float(self.power), EMISSION_FLOOR,
                             float(self.params.halfwidth_bins), self.offset_bins,
                             self.chance_factor, self.span, self.check_rhythm, position,
                             confidence, concentration)
        self.hops_seen += n
        return self.rates[0] + position * self.step, confidence, concentration

    def rhythm(self, spectra: np.ndarray, readout: np.ndarray | None = None) -> np.ndarray:
        """Rhythm score per hop (see :func:`estimators._kernels.rhythm_scores`); ones when
        the check is off."""
        spectra = np.ascontiguousarray(np.atleast_2d(spectra), dtype=np.float64)
        if not self.check_rhythm:
            return np.ones(len(spectra))
        readout = spectra if readout is None else np.ascontiguousarray(readout, dtype=np.float64)
        out = np.empty(len(spectra))
        _kernels.rhythm_scores(spectra, readout, self.offset_bins,
                               float(self.params.halfwidth_bins), self.chance_factor,
                               self.span, out)
        return out

    def update(self, spectra: np.ndarray, weights: np.ndarray, readout: np.ndarray | None = None):
        """Track the hops of ``spectra`` (P, F) with emission weights (P,) times the
        rhythm score; the rate is read off ``readout`` (P, F) near the posterior mode
        (default: ``spectra``). The general path (fixed-lag smoothing); :meth:`track` is
        the compiled hot path for no lag."""
        readout = spectra if readout is None else readout
        weights = np.clip(weights, 0.0, 1.0) * self.rhythm(spectra, readout)
        emissions = emissions_from_spectra(spectra, self.power)
        self.posterior, posts = forward_step(self.posterior, emissions, weights, self.params)
        lag = self.params.lag_hops
        first_hop = self.hops_seen
        self.hops_seen += len(posts)
        if lag == 0:
            rate, conf = read_posterior(posts, self.rates, self.params.halfwidth_bins, readout)
            return rate, conf, np.arange(first_hop, self.hops_seen)
        smoothed, index, referred = [], [], []
        for i in range(len(posts)):
            self._hist_alpha.append(posts[i])
            self._hist_em.append(emissions[i])
            self._hist_sp.append(np.atleast_2d(readout)[i])
            self._hist_w.append(float(np.clip(weights[i], 0, 1)))
            if len(self._hist_alpha) > lag + 1:
                del self._hist_alpha[0], self._hist_em[0], self._hist_w[0], self._hist_sp[0]
            if len(self._hist_alpha) == lag + 1:
                smoothed.append(smooth_oldest(np.array(self._hist_alpha),
                                              np.array(self._hist_em),
                                              np.array(self._hist_w), self.params))
                index.append(first_hop + i - lag)
                referred.append(self._hist_sp[0])
        if not smoothed:
            e = np.empty(0)
            return e, e, np.empty(0, dtype=np.int64)
        rate, conf = read_posterior(np.array(smoothed), self.rates, self.params.halfwidth_bins,
                                    np.array(referred))
        return rate, conf, np.array(index, dtype=np.int64)
