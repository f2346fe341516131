"""Hot per-hop kernels, compiled with numba (see :mod:`estimators._jit`).

Every kernel writes into preallocated ``out`` arrays and takes C-contiguous float64
arrays; the public wrappers in the other modules validate and prepare them. Each kernel
has a plain-Python twin (``kernel.py_func``) that the tests run against.

Index vocabulary: ``k`` sample, ``p`` hop, ``f`` frequency bin, ``q`` quefrency bin.
"""

from __future__ import annotations

import numpy as np

from estimators._jit import kernel


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
        for f in range(n_bins):
            acc = 0.0
            lo = f - half
            for j in range(transition.shape[0]):
                g = lo + j
                if 0 <= g < n_bins:
                    acc += transition[j] * alpha[g]
            prior[f] = (1.0 - mix) * acc + mix / n_bins
        w = weights[p]
        total = 0.0
        for f in range(n_bins):
            e = emissions[p, f]
            if w != 1.0:
                e = e ** w
            v = prior[f] * e
            alpha[f] = v
            total += v
        if total > 0.0 and np.isfinite(total):
            for f in range(n_bins):
                alpha[f] /= total
        else:
            for f in range(n_bins):
                alpha[f] = prior[f]
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
    half = (transition.shape[0] - 1) // 2
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
        total = 0.0
        for f in range(n_bins):
            acc = 0.0
            lo = f - half
            for j in range(transition.shape[0]):
                g = lo + j
                if 0 <= g < n_bins:
                    acc += transition[j] * tmp[g]
            v = (1.0 - mix) * acc + mix * total_in / n_bins
            out_beta[p - 1, f] = v
            total += v
        if total > 0.0:
            for f in range(n_bins):
                out_beta[p - 1, f] /= total


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
    back = np.empty((n_hops, n_bins), dtype=np.int64)
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
def stuck_runs(x, last_value, last_run, min_run, out_flags):
    """Flag samples that have repeated the same value for ``min_run`` samples or more.

    A flat line (sensor off) and a clipped or saturated signal both show as runs of
    identical values. The run carried in from the previous chunk is ``last_run`` samples
    of ``last_value``; returns the run length at the end of ``x``. Non-finite samples
    break runs and are not flagged here (they are counted separately).
    """
    run = last_run
    prev = last_value
    for k in range(x.shape[0]):
        v = x[k]
        if v == prev:
            run += 1
        else:
            run = 1
        prev = v
        out_flags[k] = 1.0 if run >= min_run else 0.0
    return run


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
