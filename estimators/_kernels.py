"""Hot per-hop kernels, compiled with numba (see :mod:`estimators._jit`).

Every kernel writes into preallocated ``out`` arrays and takes C-contiguous float64
arrays; the public wrappers in the other modules validate and prepare them. Each kernel
has a plain-Python twin (``kernel.py_func``) that the tests run against.

Index vocabulary: ``k`` sample, ``p`` hop, ``f`` frequency bin, ``q`` quefrency bin.
"""

from __future__ import annotations

import numpy as np

from estimators._jit import kernel

TINY = 1e-300
"""Keeps divisions by a vanishing level finite."""

MAX_HARMONIC = 4.0
"""The harmonic family of a rate: its multiples up to the fourth."""


@kernel
def predict(alpha, transition, mix, out):
    """One prediction step of the tracker: ``alpha`` (F,) convolved with the banded,
    symmetric step kernel ``transition`` (2 w + 1 taps; mass leaving the band is lost)
    and mixed with a uniform jump of probability ``mix``; written into ``out``."""
    n_bins = alpha.shape[0]
    half = (transition.shape[0] - 1) // 2
    for f in range(n_bins):
        acc = 0.0
        lo = f - half
        for j in range(transition.shape[0]):
            g = lo + j
            if 0 <= g < n_bins:
                acc += transition[j] * alpha[g]
        out[f] = (1.0 - mix) * acc + mix / n_bins


@kernel
def normalise_or_prior(alpha, total, prior):
    """Finish a tracker update in place: divide ``alpha`` by its ``total``, or, when the
    total is zero or not finite (no usable evidence), fall back on the ``prior``."""
    n_bins = alpha.shape[0]
    if total > 0.0 and np.isfinite(total):
        for f in range(n_bins):
            alpha[f] /= total
    else:
        for f in range(n_bins):
            alpha[f] = prior[f]


@kernel
def forward_filter(alpha, emissions, weights, transition, mix, out_alpha):
    """Hidden-Markov forward filter over frequency bins, several hops in one call.

    For each hop ``p``: predict with a banded transition (a symmetric kernel of
    ``len(transition) = 2 w + 1`` taps) mixed with a uniform jump of probability
    ``mix``, multiply by the emission tempered by ``weights[p]`` (a weight of 0 makes
    the emission uninformative), normalise.

    ``alpha`` (F,) is the posterior before the first hop and is updated in place;
    ``out_alpha`` (P, F) receives the posterior after every hop.
    """
    n_hops, n_bins = emissions.shape
    half = (transition.shape[0] - 1) // 2
    prior = np.empty(n_bins)
    for p in range(n_hops):
        predict(alpha, transition, mix, prior)
        w = weights[p]
        total = 0.0
        for f in range(n_bins):
            e = emissions[p, f]
            if w != 1.0:
                e = e ** w
            v = prior[f] * e
            alpha[f] = v
            total += v
        normalise_or_prior(alpha, total, prior)
        for f in range(n_bins):
            out_alpha[p, f] = alpha[f]
    return alpha


@kernel
def backward_pass(emissions, weights, transition, mix, out_beta):
    """Backward recursion of the forward-backward algorithm over ``emissions`` (P, F).

    ``out_beta[p]`` is proportional to the likelihood of the hops after ``p`` given
    the state at ``p`` (normalised to unit sum for range). The transition is symmetric,
    so the backward step uses the same banded kernel as the forward one.
    """
    n_hops, n_bins = emissions.shape
    tmp = np.empty(n_bins)
    for f in range(n_bins):
        out_beta[n_hops - 1, f] = 1.0 / n_bins
    for p in range(n_hops - 1, 0, -1):
        w = weights[p]
        total_in = 0.0
        for f in range(n_bins):
            e = emissions[p, f]
            if w != 1.0:
                e = e ** w
            tmp[f] = e * out_beta[p, f]
            total_in += tmp[f]
        if total_in > 0.0:  # the jump term needs unit mass; the scale cancels below
            for f in range(n_bins):
                tmp[f] /= total_in
        predict(tmp, transition, mix, out_beta[p - 1])
        total = 0.0
        for f in range(n_bins):
            total += out_beta[p - 1, f]
        if total > 0.0:
            for f in range(n_bins):
                out_beta[p - 1, f] /= total


@kernel
def backward_mass(emissions, weights, transition, mix, alphas, centre, halfwidth, out_mass):
    """Posterior mass within ``halfwidth`` bins of ``centre[p]`` at every hop, from the
    forward posteriors ``alphas`` (P, F) and a backward recursion run here (as
    :func:`backward_pass`) that keeps only the current backward vector: the same
    numbers as ``alphas * betas`` normalised per hop and summed near the centre,
    without holding the (P, F) betas. ``out_mass`` (P,) receives the masses (NaN where
    the posterior of a hop is all zero).
    """
    n_hops, n_bins = emissions.shape
    beta = np.empty(n_bins)
    tmp = np.empty(n_bins)
    for f in range(n_bins):
        beta[f] = 1.0 / n_bins
    for p in range(n_hops - 1, -1, -1):
        total = 0.0
        near = 0.0
        for f in range(n_bins):
            v = alphas[p, f] * beta[f]
            total += v
            if abs(f - centre[p]) <= halfwidth:
                near += v
        out_mass[p] = near / total if total > 0.0 else np.nan
        if p == 0:
            break
        w = weights[p]
        total_in = 0.0
        for f in range(n_bins):
            e = emissions[p, f]
            if w != 1.0:
                e = e ** w
            tmp[f] = e * beta[f]
            total_in += tmp[f]
        if total_in > 0.0:
            for f in range(n_bins):
                tmp[f] /= total_in
        predict(tmp, transition, mix, beta)
        total = 0.0
        for f in range(n_bins):
            total += beta[f]
        if total > 0.0:
            for f in range(n_bins):
                beta[f] /= total


@kernel
def viterbi(log_emissions, log_transition, log_jump, out_path):
    """Globally optimal ridge through ``log_emissions`` (P, F) by dynamic programming.

    The transition log-probability from bin ``g`` to ``f`` is
    ``log_transition[f - g + w]`` for ``|f - g| <= w`` and ``log_jump`` otherwise (the
    uniform re-acquisition term). ``out_path`` (P,) receives the bin of every hop.
    """
    n_hops, n_bins = log_emissions.shape
    half = (log_transition.shape[0] - 1) // 2
    score = np.empty(n_bins)
    new = np.empty(n_bins)
    back = np.empty((n_hops, n_bins), dtype=np.int32)  # bins: far below 2**31
    for f in range(n_bins):
        score[f] = log_emissions[0, f]
        back[0, f] = f
    for p in range(1, n_hops):
        best_all = 0
        for g in range(1, n_bins):
            if score[g] > score[best_all]:
                best_all = g
        for f in range(n_bins):
            best = score[best_all] + log_jump
            arg = best_all
            for j in range(log_transition.shape[0]):
                g = f - half + j
                if 0 <= g < n_bins:
                    v = score[g] + log_transition[j]
                    if v > best:
                        best = v
                        arg = g
            new[f] = best + log_emissions[p, f]
            back[p, f] = arg
        for f in range(n_bins):
            score[f] = new[f]
    best = 0
    for f in range(1, n_bins):
        if score[f] > score[best]:
            best = f
    out_path[n_hops - 1] = best
    for p in range(n_hops - 1, 0, -1):
        best = back[p, best]
        out_path[p - 1] = best


@kernel
def squeeze_column(magnitude, target_bins, out):
    """Reassign each bin's magnitude to the bin of its instantaneous frequency.

    ``target_bins`` (F,) holds the reassigned frequency in bin units (fractional);
    energy outside the grid or non-finite targets are dropped. Synchrosqueezing in the
    manner of Daubechies, Lu & Wu (2011), applied to one column.
    """
    n_bins = magnitude.shape[0]
    for f in range(n_bins):
        out[f] = 0.0
    for f in range(n_bins):
        t = target_bins[f]
        if np.isfinite(t):
            i = int(np.floor(t + 0.5))
            if 0 <= i < n_bins:
                out[i] += magnitude[f]


@kernel
def sos_filter(sos, x, zi, out):
    """Second-order sections, transposed direct form II, state ``zi`` (S, 2) updated in
    place; the same recursion as ``scipy.signal.sosfilt`` (which the tests compare)."""
    n_sections = sos.shape[0]
    for k in range(x.shape[0]):
        v = x[k]
        for s in range(n_sections):
            y = sos[s, 0] * v + zi[s, 0]
            zi[s, 0] = sos[s, 1] * v - sos[s, 4] * y + zi[s, 1]
            zi[s, 1] = sos[s, 2] * v - sos[s, 5] * y
            v = y
        out[k] = v


LIMIT_HEADER = 6
"""Scalars at the head of a limiter state (see :func:`limit_sample`); the two rings of
block extremes follow."""


@kernel
def kth_largest(values, n, rank):
    """The ``rank``-th largest of the non-NaN values among ``values[:n]`` (a scratch copy
    is sorted partially), or NaN when fewer than ``rank`` are not NaN."""
    scratch = np.empty(n)
    m = 0
    for i in range(n):
        v = values[i]
        if not np.isnan(v):
            scratch[m] = v
            m += 1
    if m < rank:
        return np.nan
    for r in range(rank):  # selection sort of the top ``rank`` entries
        best = r
        for i in range(r + 1, m):
            if scratch[i] > scratch[best]:
                best = i
        tmp = scratch[r]
        scratch[r] = scratch[best]
        scratch[best] = tmp
    return scratch[rank - 1]


@kernel
def limit_sample(v, limiter, block, rank, margin, max_abs):
    """Whether raw sample ``v`` lies in the running robust range; updates ``limiter``.

    A sample is accepted when it is finite, ``|v| <= max_abs`` and inside ``[lo, hi]``,
    the limits in force for its block. Raw samples are taken in blocks of ``block``; the
    last ``B`` blocks' largest and smallest acceptable-magnitude samples (NaN for a block
    without one) are kept in two rings. When a block completes and ``n`` blocks are
    known (``n <= B``), the envelope is the ``r``-th largest block maximum and the
    ``r``-th smallest block minimum, ``r = ceil(rank n / B)`` (the same upper quantile
    of the blocks however many are known), ``R`` its width, and the limits become
    ``[low - m R, high + m R]`` with ``m = margin``; while fewer than ``B / 4`` blocks
    are known (too short a stretch to be sure to hold a slow beat's peak or a breath),
    ``m = margin B / (4 n)``, wider the less has been seen. Before the first block
    completes there are no limits, only ``max_abs``. A burst is judged against the
    blocks before it, so it is rejected however many blocks are known; bursts in fewer
    than ``rank`` blocks of a full ring never move the envelope, while ``rank`` blocks
    of a new level or scale open it.

    ``limiter`` holds ``[position in block, block max, block min, blocks pushed, lo,
    hi]`` followed by the ring of block maxima and the ring of block minima (negated),
    ``B`` each.
    """
    n_ring = (limiter.shape[0] - LIMIT_HEADER) // 2
    ok = np.isfinite(v) and abs(v) <= max_abs
    accepted = ok and limiter[4] <= v and v <= limiter[5]
    if ok:
        if v > limiter[1]:
            limiter[1] = v
        if v < limiter[2]:
            limiter[2] = v
    limiter[0] += 1.0
    if limiter[0] >= block:
        slot = int(limiter[3]) % n_ring
        empty = limiter[1] < limiter[2]  # no acceptable-magnitude sample in the block
        limiter[LIMIT_HEADER + slot] = np.nan if empty else limiter[1]
        limiter[LIMIT_HEADER + n_ring + slot] = np.nan if empty else -limiter[2]
        limiter[3] += 1.0
        n_known = min(int(limiter[3]), n_ring)
        r = (rank * n_known + n_ring - 1) // n_ring
        high = kth_largest(limiter[LIMIT_HEADER:LIMIT_HEADER + n_ring], n_known, r)
        low = -kth_largest(limiter[LIMIT_HEADER + n_ring:], n_known, r)
        if np.isnan(high) or np.isnan(low):
            limiter[4] = -np.inf
            limiter[5] = np.inf
        else:
            m = margin
            if 4 * n_known < n_ring:
                m = margin * n_ring / (4.0 * n_known)
            width = high - low
            limiter[4] = low - m * width
            limiter[5] = high + m * width
        limiter[0] = 0.0
        limiter[1] = -np.inf
        limiter[2] = np.inf
    return accepted


@kernel
def limit_chunk(x, limiter, block, rank, margin, max_abs, out_accepted):
    """:func:`limit_sample` over a chunk: ``out_accepted[k]`` is 1.0 for accepted
    samples, 0.0 for the others."""
    for k in range(x.shape[0]):
        out_accepted[k] = 1.0 if limit_sample(x[k], limiter, block, rank, margin,
                                               max_abs) else 0.0


@kernel
def preprocess_chunk(x, t, sos_pre, zi_pre, envelope, sos_post, zi_post, scalars, limiter,
                     block, rank, margin, max_abs, decimation, min_run, out_values,
                     out_times, out_rejected, out_stuck):
    """The whole causal pre-processing of one chunk in one pass.

    Per raw sample: samples outside the running robust range (:func:`limit_sample`, with
    ``block = 0`` only the non-finite ones and those beyond ``max_abs``) are held at
    the last accepted one and counted as rejected;
    runs of identical accepted values of ``min_run`` samples or more are counted as stuck;
    the sample goes through the ``sos_pre`` cascade, optionally the squared first
    difference (``envelope``) and the ``sos_post`` cascade; every ``decimation``-th
    sample (raw index ``j M + M - 1``) is written out with its timestamp and the running
    counts. ``scalars`` carries ``[last_filtered, last_accepted, stuck_value, stuck_run,
    count, cum_rejected, cum_stuck]`` between chunks, ``limiter`` the range's state.
    Returns the number written.
    """
    last_filtered = scalars[0]
    last_accepted = scalars[1]
    stuck_value = scalars[2]
    stuck_run = scalars[3]
    count = int(scalars[4])
    cum_rj = scalars[5]
    cum_st = scalars[6]
    n_pre = sos_pre.shape[0]
    n_post = sos_post.shape[0]
    n_out = 0
    for k in range(x.shape[0]):
        v = x[k]
        if block > 0:
            accepted = limit_sample(v, limiter, block, rank, margin, max_abs)
        else:
            accepted = np.isfinite(v) and abs(v) <= max_abs
        if accepted:
            last_accepted = v
            if v == stuck_value:
                stuck_run += 1.0
            else:
                stuck_run = 1.0
            stuck_value = v
            if stuck_run >= min_run:
                cum_st += 1.0
        else:
            cum_rj += 1.0
            v = last_accepted
            stuck_value = np.nan
            stuck_run = 0.0
        for s in range(n_pre):
            y = sos_pre[s, 0] * v + zi_pre[s, 0]
            zi_pre[s, 0] = sos_pre[s, 1] * v - sos_pre[s, 4] * y + zi_pre[s, 1]
            zi_pre[s, 1] = sos_pre[s, 2] * v - sos_pre[s, 5] * y
            v = y
        if envelope:
            d = v - last_filtered
            last_filtered = v
            v = d * d
        for s in range(n_post):
            y = sos_post[s, 0] * v + zi_post[s, 0]
            zi_post[s, 0] = sos_post[s, 1] * v - sos_post[s, 4] * y + zi_post[s, 1]
            zi_post[s, 1] = sos_post[s, 2] * v - sos_post[s, 5] * y
            v = y
        if count % decimation == decimation - 1:
            out_values[n_out] = v
            out_times[n_out] = t[k]
            out_rejected[n_out] = cum_rj
            out_stuck[n_out] = cum_st
            n_out += 1
        count += 1
    scalars[0] = last_filtered
    scalars[1] = last_accepted
    scalars[2] = stuck_value
    scalars[3] = stuck_run
    scalars[4] = count
    scalars[5] = cum_rj
    scalars[6] = cum_st
    return n_out


@kernel
def preprocess_channels(x, t, sos_pre, zi_pre, envelope, sos_post, zi_post, scalars, limiter,
                        block, rank, margin, max_abs, decimation, min_run, out):
    """:func:`preprocess_chunk` for ``C`` channels sharing one chain, in one call.

    ``x`` (C, n) raw samples, ``t`` (n,) their timestamps; ``zi_pre`` (C, S, 2),
    ``zi_post`` (C, S', 2), ``scalars`` (C, 7) and ``limiter`` (C, L) each channel's
    carried state (updated in place); ``out`` (C, 4, J) receives each channel's values,
    timestamps, running rejected and stuck counts. Every channel has seen as many
    samples, so each writes the same number of analysis samples, which is returned."""
    n_out = 0
    for c in range(x.shape[0]):
        n_out = preprocess_chunk(x[c], t, sos_pre, zi_pre[c], envelope, sos_post, zi_post[c],
                                 scalars[c], limiter[c], block, rank, margin, max_abs,
                                 decimation, min_run, out[c, 0], out[c, 1], out[c, 2],
                                 out[c, 3])
    return n_out


@kernel
def harmonic_score(power, centre, offset, halfwidth, chance_factor, span):
    """How much of the band's ``power`` (F,) sits on the harmonic family of a rate.

    The family is the multiples ``k r`` (k = 1 ... :data:`MAX_HARMONIC`) of the rate ``r``
    at fractional bin ``centre`` that fall in the band (capped so that at a low rate the
    chance share of a long family does not swamp the score); bins are ``f`` with rate ``(f + offset) *
    step``, so the ``k``-th multiple is bin ``k (centre + offset) - offset``. The
    fraction of power within ``halfwidth`` bins of the family is compared with the share
    ``K (2 halfwidth + 1) / F`` that ``K`` such intervals would hold of a flat spectrum:
    ``clip((fraction - chance_factor * share) / span, 0, 1)``. A pulse puts its power on
    its fundamental and harmonics whatever its shape; noise spreads it.
    """
    n_bins = power.shape[0]
    base = centre + offset
    if not (base > 0.0):
        return 0.0
    near = 0.0
    total = 0.0
    for f in range(n_bins):
        v = power[f]
        if not np.isfinite(v):
            continue
        total += v
        k = np.floor((f + offset) / base + 0.5)
        if 1.0 <= k <= MAX_HARMONIC and abs(f - (k * base - offset)) <= halfwidth:
            near += v
    if total <= 0.0:
        return 0.0
    count = 0
    k = 1.0
    while k <= MAX_HARMONIC and k * base - offset <= n_bins - 1 + halfwidth:
        count += 1
        k += 1.0
    share = min(1.0, count * (2.0 * halfwidth + 1.0) / n_bins)
    score = (near / total - chance_factor * share) / span
    return min(1.0, max(0.0, score))


@kernel
def hop_rhythm(spectra_row, readout_row, offset, halfwidth, chance_factor, span, pw):
    """Rhythm score of one hop; fills ``pw`` with ``readout_row ** 2``. The score is
    :func:`harmonic_score` of that power on the family of the highest bin of
    ``spectra_row`` (the de-shape peak, on the fundamental), or 0 when that bin is a band
    edge (a slope rising out of the band is not a rhythm inside it). Also returns the
    largest finite value of ``spectra_row``."""
    n_bins = spectra_row.shape[0]
    top = 0
    peak_s = 0.0
    for f in range(n_bins):
        v = readout_row[f]
        pw[f] = v * v
        v = spectra_row[f]
        if np.isfinite(v) and v > peak_s:
            peak_s = v
            top = f
    if top == 0 or top == n_bins - 1:
        return 0.0, peak_s
    return harmonic_score(pw, float(top), offset, halfwidth, chance_factor, span), peak_s


@kernel
def track_block(spectra, readout, weights, alpha, transition, mix, power, floor, halfwidth,
                offset, chance_factor, span, check_rhythm, out_position, out_confidence,
                out_concentration):
    """Forward filter plus read-out for several hops in one call (the live hot path).

    For each hop:

    * the rhythm score: :func:`harmonic_score` of ``readout ** 2`` on the family of the
      highest bin of ``spectra`` (the de-shape peak, which sits on the fundamental); it
      multiplies ``weights[p]``, so a window without rhythm (noise) leaves the posterior
      to coast and spread instead of sharpening on a chance ridge (only with
      ``check_rhythm``; otherwise 1);
    * the emission ``floor + (S / max S) ** power`` tempered by that weight, and one
      forward step (as :func:`forward_filter`);
    * ``out_confidence[p]``: posterior mass within ``halfwidth`` bins of the mode;
    * ``out_position[p]``: fractional bin of the highest ``readout`` peak within
      ``halfwidth`` of the mode, refined by parabolic interpolation (the mode itself
      when ``readout`` is empty there);
    * ``out_concentration[p]``: :func:`harmonic_score` of ``readout ** 2`` at that
      position, or 0 when the peak is the first or last bin of the band (a slope rising
      out of the band, not a local maximum: no rhythm).

    ``alpha`` (F,) is updated in place.
    """
    n_hops, n_bins = spectra.shape
    half = (transition.shape[0] - 1) // 2
    prior = np.empty(n_bins)
    pw = np.empty(n_bins)
    for p in range(n_hops):
        rhythm, peak_s = hop_rhythm(spectra[p], readout[p], offset, halfwidth, chance_factor,
                                    span, pw)
        if not check_rhythm:
            rhythm = 1.0
        predict(alpha, transition, mix, prior)
        w = weights[p] * rhythm
        total = 0.0
        for f in range(n_bins):
            v = spectra[p, f]
            rel = v / peak_s if (peak_s > 0.0 and np.isfinite(v)) else 0.0
            e = floor + rel ** power
            if w != 1.0:
                e = e ** w
            alpha[f] = prior[f] * e
            total += alpha[f]
        normalise_or_prior(alpha, total, prior)
        mode = 0
        for f in range(1, n_bins):
            if alpha[f] > alpha[mode]:
                mode = f
        conf = 0.0
        best = -1
        best_v = -np.inf
        for f in range(n_bins):
            if abs(f - mode) <= halfwidth:
                conf += alpha[f]
                if readout[p, f] > best_v:
                    best_v = readout[p, f]
                    best = f
        position = float(mode)
        if best_v > 0.0:
            position = float(best)
            if 0 < best < n_bins - 1:
                left = readout[p, best - 1]
                right = readout[p, best + 1]
                denom = left - 2.0 * best_v + right
                if denom < 0.0:
                    delta = 0.5 * (left - right) / denom
                    if delta > 0.5:
                        delta = 0.5
                    elif delta < -0.5:
                        delta = -0.5
                    position += delta
        out_position[p] = position
        out_confidence[p] = min(1.0, max(0.0, conf))
        if best == 0 or best == n_bins - 1:
            out_concentration[p] = 0.0  # no local maximum: the rate sits on a band edge
        else:
            out_concentration[p] = harmonic_score(pw, position, offset, halfwidth,
                                                  chance_factor, span)


@kernel
def track_channels(spectra, readout, weights, alpha, transition, mix, power, floor, halfwidth,
                   offset, chance_factor, span, check_rhythm, out_position, out_confidence,
                   out_concentration):
    """:func:`track_block` for ``C`` channels on one grid, in one call: ``spectra`` and
    ``readout`` (C, P, F), ``weights`` (C, P), ``alpha`` (C, F) each channel's posterior
    (updated in place), the outputs (C, P)."""
    for c in range(spectra.shape[0]):
        track_block(spectra[c], readout[c], weights[c], alpha[c], transition, mix, power,
                    floor, halfwidth, offset, chance_factor, span, check_rhythm,
                    out_position[c], out_confidence[c], out_concentration[c])


@kernel
def rhythm_scores(spectra, readout, offset, halfwidth, chance_factor, span, out):
    """Per hop, the rhythm score that :func:`track_block` multiplies into the emission
    weight: :func:`harmonic_score` of ``readout ** 2`` on the family of the highest bin
    of ``spectra``; 0 when that bin is a band edge."""
    n_hops, n_bins = spectra.shape
    pw = np.empty(n_bins)
    for p in range(n_hops):
        out[p] = hop_rhythm(spectra[p], readout[p], offset, halfwidth, chance_factor, span,
                            pw)[0]


@kernel
def cancel_columns(cov, cross, power, count, x, y, forget, loading, independent_hops,
                   gate_low, gate_high, out, out_gate):
    """Coherence-gated multi-reference recursive least squares, per bin, several hops.

    ``cov`` (F, K, K) and ``cross`` (F, K) complex, ``power`` (F,) and ``count`` (1,)
    float: the exponentially weighted statistics, updated in place. ``x`` (P, F) the PPG
    columns, ``y`` (P, F, K) the reference columns; ``out`` (P, F) receives the residual
    ``x - g w^T y`` and ``out_gate`` (P, F) the gate ``g``. The regularised normal equations are solved by Gaussian elimination
    with partial pivoting (K is small: one to a few accelerometer axes).
    """
    n_hops, n_bins = x.shape
    n_refs = y.shape[2]
    a = np.empty((n_refs, n_refs), dtype=np.complex128)
    b = np.empty(n_refs, dtype=np.complex128)
    for p in range(n_hops):
        count[0] = forget * count[0] + 1.0
        independent = 1.0 + count[0] / independent_hops
        chance = min(1.0, n_refs / independent)
        for f in range(n_bins):
            xv = x[p, f]
            for i in range(n_refs):
                yi = y[p, f, i].conjugate()
                cross[f, i] = forget * cross[f, i] + yi * xv
                for j in range(n_refs):
                    cov[f, i, j] = forget * cov[f, i, j] + yi * y[p, f, j]
            power[f] = forget * power[f] + xv.real * xv.real + xv.imag * xv.imag
            trace = 0.0
            for i in range(n_refs):
                trace += cov[f, i, i].real
            load = loading * trace / n_refs + TINY
            for i in range(n_refs):
                b[i] = cross[f, i]
                for j in range(n_refs):
                    a[i, j] = cov[f, i, j]
                a[i, i] += load
            # Gaussian elimination with partial pivoting; a is Hermitian positive definite
            # after the loading, so pivots are non-zero.
            for k in range(n_refs):
                piv = k
                for i in range(k + 1, n_refs):
                    if abs(a[i, k]) > abs(a[piv, k]):
                        piv = i
                if piv != k:
                    for j in range(n_refs):
                        tmp = a[k, j]
                        a[k, j] = a[piv, j]
                        a[piv, j] = tmp
                    tmp = b[k]
                    b[k] = b[piv]
                    b[piv] = tmp
                for i in range(k + 1, n_refs):
                    factor = a[i, k] / a[k, k]
                    for j in range(k, n_refs):
                        a[i, j] -= factor * a[k, j]
                    b[i] -= factor * b[k]
            for k in range(n_refs - 1, -1, -1):
                acc = b[k]
                for j in range(k + 1, n_refs):
                    acc -= a[k, j] * b[j]
                b[k] = acc / a[k, k]
            explained = 0.0
            predicted = 0.0 + 0.0j
            for i in range(n_refs):
                explained += (cross[f, i].conjugate() * b[i]).real
                predicted += b[i] * y[p, f, i]
            coherence = explained / power[f] if power[f] > 0.0 else 0.0
            coherence = min(1.0, max(0.0, coherence))
            if chance < 1.0:
                corrected = (coherence - chance) / (1.0 - chance)
            else:
                corrected = 0.0
            gate = (corrected - gate_low) / (gate_high - gate_low)
            gate = min(1.0, max(0.0, gate))
            out[p, f] = xv - gate * predicted
            out_gate[p, f] = gate


@kernel
def spectral_margins(spectra, readout, rate_bins, offset, halfwidth, out):
    """Per hop, the spectral margins of a rate at fractional bin ``rate_bins[p]``
    (see :mod:`estimators.evidence`): ``out[p, 0]`` the highest ``spectra`` value more
    than ``2 halfwidth`` bins from the rate over the highest within ``halfwidth``;
    ``out[p, 1]`` (``out[p, 2]``) the highest ``readout`` value within ``halfwidth`` of
    half (double) the rate over the highest within ``halfwidth`` of the rate. Bins have
    rate ``(f + offset) * step``; non-finite values count as 0; a ratio with nothing
    below it is 0; ratios are capped at 10."""
    n_hops, n_bins = spectra.shape
    for p in range(n_hops):
        c = rate_bins[p]
        at_s = 0.0
        rival = 0.0
        at_r = 0.0
        half = 0.0
        double = 0.0
        if np.isfinite(c):
            c_half = (c + offset) / 2.0 - offset
            c_double = (c + offset) * 2.0 - offset
            for f in range(n_bins):
                d = abs(f - c)
                s = spectra[p, f]
                s = s if np.isfinite(s) else 0.0
                r = readout[p, f]
                r = r if np.isfinite(r) else 0.0
                if d <= halfwidth:
                    at_s = max(at_s, s)
                    at_r = max(at_r, r)
                elif d > 2.0 * halfwidth:
                    rival = max(rival, s)
                if c_half >= 0.0 and abs(f - c_half) <= halfwidth:
                    half = max(half, r)
                if c_double <= n_bins - 1 and abs(f - c_double) <= halfwidth:
                    double = max(double, r)
        out[p, 0] = min(10.0, rival / at_s) if at_s > 0.0 else 0.0
        out[p, 1] = min(10.0, half / at_r) if at_r > 0.0 else 0.0
        out[p, 2] = min(10.0, double / at_r) if at_r > 0.0 else 0.0


# ------------------------------------------------ breathing from the pulse (respiration.py)

N_MODULATIONS = 3
"""Intensity, amplitude, frequency (:data:`estimators.beats.MODULATIONS` order)."""

BANK_ROWS = 18
"""Rows of the modulation bank's ring (see :func:`modulation_frames`)."""


@kernel
def resample_chunk(beat_index, beat_position, beat_ready, beat_features, pending_s, t, state,
                   decimation, lookahead, max_gap, out_values, out_times, out_ready_s):
    """Evenly resample the beat features of one chunk (the step of
    :func:`estimators.respiration.resample_step`; its plain twin is
    :func:`estimators.respiration.resample_batch`).

    Grid sample ``j`` sits at raw sample ``k_j = j M + M - 1`` (``M = decimation``). Each
    beat ``i`` of the chunk (``beat_index``, ``beat_position``, ``beat_ready`` raw counts,
    ``beat_features`` (n, 3)) emits the grid samples before its position: the linear
    interpolation between the previous beat's features and its own, NaN before the first
    beat and across gaps (beats more than ``max_gap`` apart). A value with a NaN is ready
    at ``min(beat ready, lookahead + max(k_j + 1, previous index + max_gap + 1))``, else
    with the beat. After the beats, grid samples that no beat can now close in time
    (raw count less ``lookahead`` more than ``max_gap`` past the last beat) are emitted
    as NaN.

    ``pending_s`` holds the timestamps of the grid samples not yet emitted (oldest
    first), ``t`` the chunk's raw timestamps; ``state`` ``[raw count before the chunk,
    next grid sample, last beat index, last beat position, its three features]`` is
    updated in place. Writes ``out_values`` (n, 3), ``out_times``, ``out_ready_s`` and
    returns how many grid samples were emitted.
    """
    n = t.shape[0]
    m = float(decimation)
    r = float(lookahead)
    gap = float(max_gap)
    before = int(state[0])
    count = state[0] + n
    next_j = state[1]
    last_index = state[2]
    last_position = state[3]
    n_out = 0
    for i in range(beat_index.shape[0]):
        index = float(beat_index[i])
        position = beat_position[i]
        ready = float(beat_ready[i])
        closes = index - last_index <= gap
        nan_base = last_index + gap + 1.0
        while next_j * m + m - 1.0 < position:
            k_j = next_j * m + m - 1.0
            has_nan = False
            if closes and not k_j < last_position:
                w = (k_j - last_position) / (position - last_position)
                for c in range(N_MODULATIONS):
                    v = (1.0 - w) * state[4 + c] + w * beat_features[i, c]
                    out_values[n_out, c] = v
                    if np.isnan(v):
                        has_nan = True
            else:
                for c in range(N_MODULATIONS):
                    out_values[n_out, c] = np.nan
                has_nan = True
            when = ready
            if has_nan:
                when = min(ready, r + max(k_j + 1.0, nan_base))
            out_times[n_out] = pending_s[n_out]
            out_ready_s[n_out] = t[int(when) - 1 - before]
            n_out += 1
            next_j += 1.0
        last_index = index
        last_position = position
        for c in range(N_MODULATIONS):
            state[4 + c] = beat_features[i, c]
    if count - r - last_index > gap:
        nan_base = last_index + gap + 1.0
        while next_j * m + m - 1.0 < count - r:
            k_j = next_j * m + m - 1.0
            for c in range(N_MODULATIONS):
                out_values[n_out, c] = np.nan
            when = r + max(k_j + 1.0, nan_base)
            out_times[n_out] = pending_s[n_out]
            out_ready_s[n_out] = t[int(when) - 1 - before]
            n_out += 1
            next_j += 1.0
    state[0] = count
    state[1] = next_j
    state[2] = last_index
    state[3] = last_position
    return n_out


@kernel
def modulation_frames(values, time_s, ready_s, sos, zi, pre_scalars, limiter, min_run,
                      max_abs, offset, sums, ring, counters, windows, min_window, hop,
                      out_frames, out_integrity, out_depth, out_beat_rate, out_time_s,
                      out_emitted_s):
    """The three modulations of one chunk through their band-pass and into the windowed
    frames of the hops they complete, with each hop's integrity, depth and beat rate
    (the step of :class:`estimators.respiration.ModulationSpectra`; its batch twin is
    :meth:`~estimators.respiration.ModulationSpectra.hops_batch`).

    Per modulation ``c``: the series enters relative to its first finite value
    (``offset[c]``, NaN until known), then :func:`preprocess_chunk` (``sos`` with state
    ``zi[c]``, scalars ``pre_scalars[c]``, no range limit: non-finite samples held and
    counted as rejected, runs of ``min_run`` equal values as stuck). Per sample, the
    running ``sums`` (interval sum and count, amplitude sum and count over finite
    values, squares of the three band-passed series) advance, and the ring (``ring``
    (:data:`BANK_ROWS`, C) with ``C`` at least the window plus one: rows 0-2 band-passed
    series, 3 timestamps, 4-6 running rejected counts, 7-9 running stuck counts, 10-16
    the running sums, 17 ``ready_s``) takes the sample at column ``count mod C``.

    Hop ``p`` (``counters[1]`` is the next one) falls when the count ``counters[0]``
    reaches ``floor(p hop + 1e-9)``; from ``min_window`` on, its frames are the newest
    ``L = min(m, count)`` samples of each series times ``windows[L - min_window]`` (the
    unit-sum periodic Hann of ``L`` samples; ``m = windows.shape[1]``), written to rows
    ``3 h + c`` of ``out_frames`` (the rest of a row is left as it is: zeros). Per hop
    ``h``: ``out_integrity`` (h, c) from the window's rejected and stuck fractions
    (:func:`estimators.quality.integrity`), ``out_depth`` (h, c) the RMS of the
    band-passed series over the mean amplitude (intensity, amplitude) or mean interval
    (frequency), 0 without a scale, ``out_beat_rate`` 60 / mean interval, ``out_time_s``
    the window centre and ``out_emitted_s`` the ``ready_s`` of its newest sample.
    Returns the number of hops.
    """
    n = values.shape[0]
    cap = ring.shape[1]
    m = windows.shape[1]
    filtered = np.empty((N_MODULATIONS, n))
    rejected = np.empty((N_MODULATIONS, n))
    stuck = np.empty((N_MODULATIONS, n))
    times = np.empty(n)
    centred = np.empty(n)
    no_sections = np.zeros((0, 6))
    no_state = np.zeros((0, 2))
    for c in range(N_MODULATIONS):
        if np.isnan(offset[c]):
            for k in range(n):
                if np.isfinite(values[k, c]):
                    offset[c] = values[k, c]
                    break
        base = offset[c] if np.isfinite(offset[c]) else 0.0
        for k in range(n):
            centred[k] = values[k, c] - base
        preprocess_chunk(centred, time_s, sos, zi[c], False, no_sections, no_state,
                         pre_scalars[c], limiter, 0, 1, 0.0, max_abs, 1, min_run,
                         filtered[c], times, rejected[c], stuck[c])
    n_hops = 0
    for k in range(n):
        v = values[k, 2]
        if np.isfinite(v):
            sums[0] += v
            sums[1] += 1.0
        v = values[k, 1]
        if np.isfinite(v):
            sums[2] += v
            sums[3] += 1.0
        for c in range(N_MODULATIONS):
            sums[4 + c] += filtered[c, k] ** 2
        slot = int(counters[0]) % cap
        for c in range(N_MODULATIONS):
            ring[c, slot] = filtered[c, k]
            ring[4 + c, slot] = rejected[c, k]
            ring[7 + c, slot] = stuck[c, k]
        ring[3, slot] = time_s[k]
        for i in range(7):
            ring[10 + i, slot] = sums[i]
        ring[17, slot] = ready_s[k]
        counters[0] += 1.0
        count = counters[0]
        while True:
            c_p = np.floor(counters[1] * hop + 1e-9)
            if c_p > count:
                break
            counters[1] += 1.0
            if c_p < min_window:
                continue
            length = min(m, int(c_p))
            first = int(c_p) - length
            last = (int(c_p) - 1) % cap
            w = windows[length - min_window]
            for c in range(N_MODULATIONS):
                row = 3 * n_hops + c
                for i in range(length):
                    out_frames[row, i] = ring[c, (first + i) % cap] * w[i]
            prior = (first - 1) % cap
            span = float(length)
            for c in range(N_MODULATIONS):
                rej = ring[4 + c, last] - (ring[4 + c, prior] if first > 0 else 0.0)
                stk = ring[7 + c, last] - (ring[7 + c, prior] if first > 0 else 0.0)
                finite_part = max(1.0 - 5.0 * (rej / span), 0.0)
                unstuck = max(1.0 - 3.0 * (stk / span), 0.0)
                out_integrity[n_hops, c] = min(finite_part * unstuck, 1.0)
            s = np.empty(7)
            for i in range(7):
                s[i] = ring[10 + i, last] - (ring[10 + i, prior] if first > 0 else 0.0)
            mean_interval = s[0] / s[1] if s[1] > 0 else np.nan
            mean_amplitude = abs(s[2] / s[3]) if s[3] > 0 else np.nan
            for c in range(N_MODULATIONS):
                rms = np.sqrt(max(s[4 + c], 0.0) / span)
                scale = mean_interval if c == 2 else mean_amplitude
                depth = rms / scale if scale > 0 else 0.0
                out_depth[n_hops, c] = depth if np.isfinite(depth) else 0.0
            if mean_interval == 0.0:
                out_beat_rate[n_hops] = np.inf
            else:
                out_beat_rate[n_hops] = 60.0 / mean_interval
            out_time_s[n_hops] = 0.5 * (ring[3, first % cap] + ring[3, last])
            out_emitted_s[n_hops] = ring[17, last]
            n_hops += 1
    return n_hops


@kernel
def shape_modulation_spectra(spectra, tilt, rates, beat_rate, harmonic_index, harmonic_frac,
                             harmonic_inside, weight, cap):
    """Tilt, Nyquist mask and harmonic support of band spectra (P, 3, F), in place (the
    compiled twin of :func:`estimators.respiration.tilt_spectra`,
    :func:`~estimators.respiration.nyquist_mask` and
    :func:`~estimators.respiration.harmonic_support` in that order): each row times
    ``tilt`` (F,); bins at or above half of ``beat_rate[p]`` (per minute; NaN: no mask)
    times 0; then ``S(f) + weight * min(cap S(f), S(2 f))`` with ``S(2 f)`` read at
    ``harmonic_index`` + ``harmonic_frac`` where ``harmonic_inside`` (else 0)."""
    n_hops, n_mod, n_bins = spectra.shape
    row = np.empty(n_bins)
    for p in range(n_hops):
        limit = 0.5 * beat_rate[p] if np.isfinite(beat_rate[p]) else np.inf
        for c in range(n_mod):
            for f in range(n_bins):
                v = spectra[p, c, f] * tilt[f]
                if not rates[f] < limit:
                    v = v * 0.0
                row[f] = v
            for f in range(n_bins):
                if weight != 0.0:
                    doubled = 0.0
                    if harmonic_inside[f]:
                        j = harmonic_index[f]
                        doubled = (row[j] * (1.0 - harmonic_frac[f])
                                   + row[j + 1] * harmonic_frac[f])
                    spectra[p, c, f] = row[f] + weight * min(cap * row[f], doubled)
                else:
                    spectra[p, c, f] = row[f]


@kernel
def track_ridges(spectra, integrity, alpha, transition, mix, power, floor, halfwidth, rates,
                 out_rate, out_confidence):
    """The forward filters of the three modulations over several hops in one call (no
    lag; the compiled twin of :meth:`estimators.tracker.RidgeTracker.update` per
    modulation).

    ``spectra`` (P, 3, F), ``integrity`` (P, 3) the emission weights (clipped to [0,
    1]), ``alpha`` (3, F) the posteriors before the first hop (updated in place). Per
    hop and modulation: the emission ``floor + (S / max S) ** power`` tempered by the
    weight, one forward step (:func:`predict`, :func:`normalise_or_prior`); the
    confidence is the posterior mass within ``halfwidth`` bins of its mode, the rate
    (``rates`` (F,) per minute) the highest spectral peak within ``halfwidth`` of the
    mode refined by parabolic interpolation (the mode's rate where the spectrum is
    empty there), as :func:`estimators.tracker.read_posterior`.
    """
    n_hops, n_mod, n_bins = spectra.shape
    prior = np.empty(n_bins)
    step = rates[1] - rates[0] if n_bins > 1 else 0.0
    for c in range(n_mod):
        a = alpha[c]
        for p in range(n_hops):
            predict(a, transition, mix, prior)
            peak = spectra[p, c, 0]
            for f in range(1, n_bins):
                if spectra[p, c, f] > peak:
                    peak = spectra[p, c, f]
            w = min(max(integrity[p, c], 0.0), 1.0)
            total = 0.0
            for f in range(n_bins):
                rel = spectra[p, c, f] / peak if peak > 0.0 else 0.0
                if not np.isfinite(rel):
                    rel = 0.0
                # A square is exact either way (numpy squares for a power of 2 too).
                e = floor + (rel * rel if power == 2.0 else rel ** power)
                if w != 1.0:
                    e = e ** w
                v = prior[f] * e
                a[f] = v
                total += v
            normalise_or_prior(a, total, prior)
            mode = 0
            for f in range(1, n_bins):
                if a[f] > a[mode]:
                    mode = f
            mass = 0.0
            best = -1
            best_v = -np.inf
            for f in range(n_bins):
                if abs(f - mode) <= halfwidth:
                    mass += a[f]
                    if spectra[p, c, f] > best_v:
                        best_v = spectra[p, c, f]
                        best = f
            out_confidence[p, c] = min(max(mass, 0.0), 1.0)
            if best_v > 0.0:
                delta = 0.0
                if 0 < best < n_bins - 1:
                    left = spectra[p, c, best - 1]
                    right = spectra[p, c, best + 1]
                    denom = left - 2.0 * best_v + right
                    if denom < 0.0:
                        delta = min(max(0.5 * (left - right) / denom, -0.5), 0.5)
                out_rate[p, c] = rates[best] + delta * step
            else:
                out_rate[p, c] = rates[mode]


@kernel
def modulation_quality(spectra, rate, integrity, depth, beat_rate, rates, halfwidth,
                       concentration_full, depth_floor, depth_full, out_quality):
    """Quality (P, 3) of each modulation's rate: integrity x concentration at the rate
    over the bins below half the beat rate x depth score (the compiled twin of
    :func:`estimators.respiration.modulation_quality`).

    Concentration: the share of ``spectra ** 2`` within ``halfwidth`` bins of the rate,
    rescaled so that a flat spectrum's share over the open bins maps to 0 and
    ``concentration_full`` to 1; 0 for a NaN rate or a rate on the first or last open
    bin. Depth score: ``clip((depth - depth_floor) / (depth_full - depth_floor), 0, 1)``.
    """
    n_hops, n_mod, n_bins = spectra.shape
    step = rates[1] - rates[0]
    for p in range(n_hops):
        limit = 0.5 * beat_rate[p] if np.isfinite(beat_rate[p]) else np.inf
        n_open = 0
        for f in range(n_bins):
            if rates[f] < limit:
                n_open += 1
        n_open = min(max(n_open, 1), n_bins)
        chance = min(1.0, (2.0 * halfwidth + 1.0) / n_open)
        for c in range(n_mod):
            centre = (rate[p, c] - rates[0]) / step
            if np.isnan(centre):
                centre = -1e9
            total = 0.0
            near = 0.0
            for f in range(n_bins):
                v = spectra[p, c, f] ** 2
                total += v
                if abs(f - centre) <= halfwidth:
                    near += v
            share = near / total if total > 0.0 else 0.0
            score = (share - chance) / max(concentration_full - chance, 1e-9)
            score = min(max(score, 0.0), 1.0)
            if not (centre >= 1.0 and centre <= n_open - 2.0):
                score = 0.0
            d = min(max((depth[p, c] - depth_floor) / (depth_full - depth_floor), 0.0), 1.0)
            out_quality[p, c] = min(max(integrity[p, c] * (score * d), 0.0), 1.0)


@kernel
def fuse_rates(rate, confidence, quality, groups, group_sizes, agreement, min_agreeing,
               min_support, weight_power, out_rate, out_confidence, out_quality):
    """Quality-weighted agreement of the modulation rates (P, 3) per hop (the compiled
    twin of :func:`estimators.respiration.fuse_modulations`, which documents the rule).
    ``groups`` (G, 3) lists the candidate groups' columns (``group_sizes`` (G,) of them
    used), larger groups first so that ties go to them."""
    n_hops, n_mod = rate.shape
    q = np.empty(n_mod)
    r = np.empty(n_mod)
    carried = np.empty(n_mod, dtype=np.bool_)
    for p in range(n_hops):
        total = 0.0
        for c in range(n_mod):
            carried[c] = np.isfinite(rate[p, c])
            q[c] = min(max(quality[p, c], 0.0), 1.0) if carried[c] else 0.0
            r[c] = rate[p, c] if carried[c] else 0.0
            total += q[c]
        best = -1
        best_score = -np.inf
        for g in range(groups.shape[0]):
            size = group_sizes[g]
            if size < min_agreeing:
                continue
            ok = True
            low = np.inf
            high = -np.inf
            for i in range(size):
                col = groups[g, i]
                if not carried[col]:
                    ok = False
                else:
                    low = min(low, rate[p, col])
                    high = max(high, rate[p, col])
            if not ok or not high - low <= agreement:
                continue
            score = 0.0
            for i in range(size):
                score += q[groups[g, i]]
            if score > best_score + 1e-12:
                best_score = score
                best = g
        out_rate[p] = np.nan
        out_confidence[p] = 0.0
        out_quality[p] = 0.0
        if best < 0:
            continue
        size = group_sizes[best]
        wsum = 0.0
        weighted = 0.0
        support = 0.0
        plain = 0.0
        conf = 0.0
        for i in range(size):
            col = groups[best, i]
            w = q[col] ** weight_power
            wsum += w
            weighted += w * r[col]
            support += q[col]
            plain += r[col]
            conf += confidence[p, col]
        mean = weighted / wsum if wsum > 0 else plain / size
        share = support / total if total > 0 else 1.0
        out_quality[p] = min(max(support, 0.0), 1.0)
        if best_score >= min_support:
            out_rate[p] = mean
            out_confidence[p] = min(max(conf / size * share, 0.0), 1.0)


@kernel
def interp_point(x, xp, fp):
    """``numpy.interp(x, xp, fp)`` for one value, the same arithmetic: the end values
    outside ``xp``, the knot's own value on a knot, else ``slope (x - xp[j]) + fp[j]``
    (from the right knot when that is not finite)."""
    n = xp.shape[0]
    if n == 1:
        return fp[0]
    if np.isnan(x):
        return x
    if x < xp[0]:
        return fp[0]
    if x > xp[n - 1]:
        return fp[n - 1]
    lo = 0
    hi = n  # the largest j with xp[j] <= x
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if xp[mid] <= x:
            lo = mid
        else:
            hi = mid
    j = lo
    if j == n - 1 or xp[j] == x:
        return fp[j]
    slope = (fp[j + 1] - fp[j]) / (xp[j + 1] - xp[j])
    value = slope * (x - xp[j]) + fp[j]
    if np.isnan(value):
        value = slope * (x - xp[j + 1]) + fp[j + 1]
        if np.isnan(value) and fp[j] == fp[j + 1]:
            value = fp[j]
    return value


@kernel
def calibrate_breathing(raw, quality, centre, scale, beta, knots_score, knots_prob, low, high,
                        prob_floor, prob_ceil, out):
    """The breathing confidence map of one kind over several estimates (the compiled
    twin of :func:`estimators.breathing_confidence.calibrated` with a model for the
    kind): the design ``(logit clip(raw, 1e-3, 1 - 1e-3), quality)`` (non-finite as 0)
    clipped to ``[low, high]``, the score ``beta[0] + ((x - centre) / scale) . beta[1:]``,
    its isotonic read-out (:func:`interp_point` on the knots) clipped to ``[prob_floor,
    prob_ceil]``; a raw confidence of 0 or less, or a non-finite probability, keeps the
    raw value."""
    for i in range(raw.shape[0]):
        r = raw[i]
        if not r > 0.0:
            out[i] = r
            continue
        c = r if np.isfinite(r) else 0.0
        c = min(max(c, 1e-3), 1.0 - 1e-3)
        q = quality[i]
        if np.isnan(q):
            q = 0.0
        elif np.isinf(q):
            q = 1.7976931348623157e308 if q > 0 else -1.7976931348623157e308
        x0 = min(max(np.log(c / (1.0 - c)), low[0]), high[0])
        x1 = min(max(q, low[1]), high[1])
        score = beta[0] + ((x0 - centre[0]) / scale[0] * beta[1]
                           + (x1 - centre[1]) / scale[1] * beta[2])
        prob = min(max(interp_point(score, knots_score, knots_prob), prob_floor), prob_ceil)
        out[i] = prob if np.isfinite(prob) else r


# --------------------------------------------------------------------- beat detection
# The per-candidate work of :func:`estimators.beats.detect_step`. Its numpy twin is the
# scan in :mod:`estimators.beats` (``_scan``), which :func:`estimators.beats.detect_batch`
# runs; the two must agree to the last bit (beat times are compared exactly), so every
# reduction here is done in numpy's own order: :func:`numpy_sum` for ``mean``,
# :func:`upper_quartile` for ``percentile(..., 75)``, :func:`small_median` for ``median``,
# rows added in turn for a mean over beats (numpy's order for an axis-0 mean of rows
# longer than one value) and ``np.dot`` for the cross-correlation (numba calls the same
# BLAS routine numpy does).

BEAT_SCAN_SIZE = 8
"""Layout of the scalars a beat scan carries (:func:`scan_beats`): the first candidate
not yet decided, the last beat's detection index, its position and its feature peak
(raw samples), then how many beat heights, intervals, R-wave polarities and upstrokes
are remembered."""

SCAN_NEXT, SCAN_LAST_INDEX, SCAN_LAST_POSITION, SCAN_LAST_PEAK = 0, 1, 2, 3
SCAN_HEIGHTS, SCAN_INTERVALS, SCAN_POLARITIES, SCAN_UPSTROKES = 4, 5, 6, 7


@kernel
def beat_front_end(x, limiter, block, rank, margin, max_abs, last_accepted, detect_sos,
                   zi_detect, feature_sos, zi_feature, level_sos, zi_level, last_band, fs,
                   out_slope, out_band, out_feature, out_level):
    """The causal filters of beat detection over one chunk, in one call (the compiled
    twin of ``estimators.beats._front_end`` up to the ECG's moving average).

    Each raw sample is accepted by :func:`limit_sample` (by finiteness and ``max_abs``
    alone when ``block`` is 0) or held at the last accepted value (``last_accepted``
    before the chunk); the held samples go through the three filters (:func:`sos_filter`)
    into ``out_band`` (detection band-pass), ``out_feature`` and ``out_level``;
    ``out_slope`` is the band-pass's slope per second (``last_band``: its value before the
    chunk). ``limiter`` and the three filter states are updated in place; returns the
    last accepted value."""
    n = x.shape[0]
    held = np.empty(n)
    for k in range(n):
        v = x[k]
        if block == 0:
            accepted = np.isfinite(v) and abs(v) <= max_abs
        else:
            accepted = limit_sample(v, limiter, block, rank, margin, max_abs)
        if accepted:
            last_accepted = v
        held[k] = last_accepted
    sos_filter(detect_sos, held, zi_detect, out_band)
    sos_filter(feature_sos, held, zi_feature, out_feature)
    sos_filter(level_sos, held, zi_level, out_level)
    previous = last_band
    for k in range(n):
        out_slope[k] = (out_band[k] - previous) * fs
        previous = out_band[k]
    return last_accepted


@kernel
def numpy_sum(x, lo, n, square):
    """Sum of ``x[lo:lo + n]`` (of its squares when ``square``) associated as numpy's
    ``add.reduce`` does (pairwise: eight running sums per block of at most 128 values,
    blocks split in halves), so it equals ``np.sum`` to the last bit."""
    if n < 8:
        total = 0.0
        for i in range(lo, lo + n):
            total += x[i] * x[i] if square else x[i]
        return total
    if n <= 128:
        acc = np.empty(8)
        for j in range(8):
            acc[j] = x[lo + j] * x[lo + j] if square else x[lo + j]
        i = 8
        while i < n - n % 8:
            for j in range(8):
                v = x[lo + i + j]
                acc[j] += v * v if square else v
            i += 8
        total = ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7]))
        while i < n:
            total += x[lo + i] * x[lo + i] if square else x[lo + i]
            i += 1
        return total
    half = n // 2
    half -= half % 8
    return numpy_sum(x, lo, half, square) + numpy_sum(x, lo + half, n - half, square)


@kernel
def sorted_copy(values, n):
    """The first ``n`` of ``values``, sorted (insertion sort: ``n`` is a few beats)."""
    out = np.empty(n)
    for i in range(n):
        v = values[i]
        j = i - 1
        while j >= 0 and out[j] > v:
            out[j + 1] = out[j]
            j -= 1
        out[j + 1] = v
    return out


@kernel
def upper_quartile(values, n):
    """``np.percentile(values[:n], 75)`` (linear method, numpy's arithmetic: virtual
    index ``0.75 n + 0.25 - 1``, and the interpolation ``a + (b - a) g`` below
    ``g = 0.5``, ``b - (b - a) (1 - g)`` from it); finite values, ``n >= 1``."""
    s = sorted_copy(values, n)
    virtual = (n * 0.75 + 0.25) - 1.0
    below = int(np.floor(virtual))
    if virtual >= n - 1:
        return s[n - 1]
    g = virtual - below
    a, b = s[below], s[below + 1]
    if g >= 0.5:
        return b - (b - a) * (1.0 - g)
    return a + (b - a) * g


@kernel
def small_median(values, n):
    """``np.median(values[:n])``: the middle value, or the mean of the two middle ones;
    finite values, ``n >= 1``."""
    s = sorted_copy(values, n)
    if n % 2:
        return s[n // 2]
    return (s[n // 2 - 1] + s[n // 2]) / 2.0


@kernel
def vertex_offset(y, i, n):
    """Offset in [-0.5, 0.5] of the vertex of the parabola through ``y[i-1], y[i],
    y[i+1]`` (``y`` of length ``n``); 0 at the ends or where the parabola does not
    open downwards."""
    if i <= 0 or i >= n - 1:
        return 0.0
    a, b, c = y[i - 1], y[i], y[i + 1]
    den = a - 2.0 * b + c
    if not den < 0:
        return 0.0
    v = 0.5 * (a - c) / den
    if v < -0.5:
        return -0.5
    if v > 0.5:
        return 0.5
    return v


@kernel
def beat_candidates(detect, lo, hi, r, out):
    """Indices ``lo <= u < hi`` where ``detect[u]`` is larger than the ``r`` values before
    it and not smaller than the ``r`` after it (values before 0 or from ``hi + r`` on
    count as -inf; a NaN among them rejects ``u``), written into ``out``; returns how
    many. Candidates are more than ``r`` apart, so ``out`` needs ``(hi - lo) // (r + 1)
    + 1`` places."""
    end = min(hi + r, detect.shape[0])
    count = 0
    for u in range(lo, hi):
        v = detect[u]
        keep = True
        for w in range(max(u - r, 0), u):
            if not v > detect[w]:
                keep = False
                break
        if keep:
            for w in range(u + 1, min(u + r + 1, end)):
                if not v >= detect[w]:
                    keep = False
                    break
        if keep:
            out[count] = u
            count += 1
    return count


@kernel
def remember(values, n, v):
    """Append ``v`` to the ``n`` remembered ``values`` (oldest first), dropping the oldest
    when full; returns the new count."""
    size = values.shape[0]
    if n < size:
        values[n] = v
        return n + 1
    for i in range(size - 1):
        values[i] = values[i + 1]
    values[size - 1] = v
    return size


@kernel
def aligned_offset(detect, kk, before, after, shift, upstrokes, n_upstrokes, intervals,
                   n_intervals, fs, cycle_share, min_beats):
    """Sub-sample offset of the PPG beat whose steepest sample is ``detect[kk]``: the lag
    (within ``+-shift``) that best aligns its upstroke derivative with the mean of the
    remembered ``upstrokes`` (rows ``before + after + 1`` long), over at most
    ``cycle_share`` of the typical interval either side, plus the template's own vertex;
    the beat's own vertex while fewer than ``min_beats`` are remembered or when the best
    lag is at the edge. Remembers the upstroke; returns ``(offset, n_upstrokes)``."""
    n = detect.shape[0]
    own = vertex_offset(detect, kk, n)
    if kk - before - shift < 0 or kk + after + shift >= n:
        return own, n_upstrokes
    start = kk - before - shift
    length = before + after + 1
    offset = own
    if n_upstrokes >= min_beats:
        template = np.zeros(length)
        for i in range(n_upstrokes):
            for j in range(length):
                template[j] = template[j] + upstrokes[i, j]
        for j in range(length):
            template[j] = template[j] / n_upstrokes
        lo, hi = 0, length
        if n_intervals > 0:
            half = int(cycle_share * small_median(intervals, n_intervals) * fs)
            lo, hi = max(before - half, 0), min(before + half + 1, length)
        corr = np.empty(2 * shift + 1)
        for u in range(2 * shift + 1):
            corr[u] = np.dot(detect[start + u + lo:start + u + hi], template[lo:hi])
        best = 0
        for u in range(1, 2 * shift + 1):
            if corr[u] > corr[best]:
                best = u
        if 0 < best < 2 * shift:
            offset = (best - shift + vertex_offset(corr, best, 2 * shift + 1)
                      + vertex_offset(template, before, length))
    rows = upstrokes.shape[0]
    if n_upstrokes == rows:
        for i in range(rows - 1):
            upstrokes[i, :] = upstrokes[i + 1, :]
        n_upstrokes -= 1
    upstrokes[n_upstrokes, :] = detect[kk - before:kk + after + 1]
    return offset, n_upstrokes + 1


@kernel
def scan_beats(detect, feature, level, band, times, offset, k_stop, is_ppg, fs, refractory,
               lookahead, search, integrate, qrs_half, max_gap, threshold_fraction,
               interval_tolerance, align_before, align_after, align_shift, cycle_share,
               template_min_beats, scan, heights, intervals, polarities, upstrokes,
               out_index, out_position, out_ready, out_ready_s, out_features, out_time_s):
    """Decide the beat candidates from ``scan[SCAN_NEXT]`` up to raw index ``k_stop``
    (the compiled twin of ``estimators.beats._scan``, which documents the rules).

    Signal arrays and ``times`` start at raw index ``offset``. ``scan`` (see
    :data:`BEAT_SCAN_SIZE`) and the remembered ``heights``, ``intervals``,
    ``polarities`` and ``upstrokes`` (oldest first; their lengths are the capacities)
    are updated in place. Each beat decided is written into the ``out_*`` arrays (its
    detection index, position, ready count, ready timestamp, features and time; room
    for ``(k_stop - scan[SCAN_NEXT]) // (refractory + 1) + 1`` beats, the most
    :func:`beat_candidates` can find); returns how many."""
    n = detect.shape[0]
    span = max(k_stop - int(scan[SCAN_NEXT]), 0)
    candidates = np.empty(span // (refractory + 1) + 1, np.int64)
    n_candidates = beat_candidates(detect, int(scan[SCAN_NEXT]) - offset, k_stop - offset,
                                   refractory, candidates)
    if k_stop > scan[SCAN_NEXT]:
        scan[SCAN_NEXT] = k_stop
    n_beats = 0
    for c in range(n_candidates):
        kk = candidates[c]
        k = kk + offset
        height = detect[kk]
        if not height > 0:
            continue
        last_index = int(scan[SCAN_LAST_INDEX])
        last_peak = int(scan[SCAN_LAST_PEAK])
        since = k - last_index
        n_heights = int(scan[SCAN_HEIGHTS])
        if n_heights > 0:
            bar = threshold_fraction * upper_quartile(heights, n_heights)
            bar *= 0.5 ** (max(since - max_gap, 0) / max_gap)
            if height < bar:
                continue
        if since > max_gap:  # a new stretch: learn its beat height afresh
            n_heights = 0
            scan[SCAN_POLARITIES] = 0
            scan[SCAN_UPSTROKES] = 0
        scan[SCAN_HEIGHTS] = remember(heights, n_heights, height)
        n_intervals = int(scan[SCAN_INTERVALS])
        if is_ppg:
            hi = min(kk + search + 1, n)
            peak = kk
            for j in range(kk + 1, hi):
                if feature[j] > feature[peak]:
                    peak = j
            foot_lo = min(max(last_peak - offset, kk - max_gap, 0), kk)
            foot = feature[foot_lo]
            for j in range(foot_lo + 1, kk + 1):
                if feature[j] < foot:
                    foot = feature[j]
            if align_before:
                shifted, n_up = aligned_offset(detect, kk, align_before, align_after,
                                               align_shift, upstrokes,
                                               int(scan[SCAN_UPSTROKES]), intervals,
                                               n_intervals, fs, cycle_share,
                                               template_min_beats)
                scan[SCAN_UPSTROKES] = n_up
                position = k + shifted
            else:
                position = k + vertex_offset(detect, kk, n)
            amplitude = feature[peak] - foot
            intensity = 0.5 * (feature[peak] + foot)
        else:
            # The moving average peaks about half its length after the QRS: search back.
            lo, hi = max(kk - integrate - search, 0), min(kk + search // 2 + 1, n)
            steepest = lo + 1
            slope = abs(band[lo + 1] - band[lo])
            for j in range(lo + 1, hi - 1):
                s = abs(band[j + 1] - band[j])
                if s > slope:
                    slope, steepest = s, j + 1
            q_lo = max(steepest - qrs_half, 0)
            q_hi = min(steepest + qrs_half + 1, n)
            top, bottom = q_lo, q_lo
            for j in range(q_lo + 1, q_hi):
                if feature[j] > feature[top]:
                    top = j
                if feature[j] < feature[bottom]:
                    bottom = j
            up, down = feature[top], -feature[bottom]
            if 0.0 > up:
                up = 0.0
            if 0.0 > down:
                down = 0.0
            polarity = (up - down) / (up + down) if up + down > 0 else 0.0
            n_polarities = remember(polarities, int(scan[SCAN_POLARITIES]), polarity)
            scan[SCAN_POLARITIES] = n_polarities
            vote = 0.0
            for j in range(n_polarities):
                vote += polarities[j]
            if vote == 0:
                sign = 1.0 if up >= down else -1.0
            else:
                sign = 1.0 if vote > 0 else -1.0
            peak = top if sign > 0 else bottom
            # The vertex of the R wave, turned upwards by its polarity.
            a_lo = max(peak - 1, 0)
            around = np.empty(3)
            m = min(peak + 2, n) - a_lo
            for j in range(m):
                around[j] = sign * feature[a_lo + j]
            position = peak + offset + vertex_offset(around, min(peak, 1), m)
            r_lo, r_hi = max(peak - qrs_half, 0), min(peak + qrs_half + 1, n)
            amplitude = np.sqrt(numpy_sum(feature, r_lo, r_hi - r_lo, True) / (r_hi - r_lo))
            beat_lo = last_peak - offset
            if 0 <= beat_lo < peak and peak + offset - last_peak <= max_gap:
                beat_span = peak - beat_lo
                intensity = numpy_sum(level, beat_lo + 1, beat_span, False) / beat_span
            else:
                intensity = np.nan
        gap = k - last_index
        interval = np.nan
        if gap > max_gap:
            n_intervals = 0
        else:
            interval = (position - scan[SCAN_LAST_POSITION]) / fs
            typical = small_median(intervals, n_intervals) if n_intervals >= 3 else interval
            n_intervals = remember(intervals, n_intervals, interval)
            ratio = interval / typical
            if abs(ratio - 1.0) > interval_tolerance:
                # A premature (ectopic) or missed beat: its interval, and the shape of a
                # premature beat, are dropped.
                if ratio < 1.0:
                    intensity = np.nan
                    amplitude = np.nan
                interval = np.nan
        scan[SCAN_INTERVALS] = n_intervals
        scan[SCAN_LAST_INDEX] = k
        scan[SCAN_LAST_POSITION] = position
        scan[SCAN_LAST_PEAK] = peak + offset
        ready = k + lookahead + 1
        out_index[n_beats] = k
        out_position[n_beats] = position
        out_ready[n_beats] = ready
        out_ready_s[n_beats] = times[ready - 1 - offset]
        out_features[n_beats, 0] = intensity
        out_features[n_beats, 1] = amplitude
        out_features[n_beats, 2] = interval
        u = position - offset
        if n == 1:
            out_time_s[n_beats] = times[0]
        else:
            i = int(min(max(np.floor(u), 0.0), n - 2.0))
            out_time_s[n_beats] = times[i] + (u - i) * (times[i + 1] - times[i])
        n_beats += 1
    return n_beats
