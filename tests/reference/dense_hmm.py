"""The ridge tracker's hidden-Markov model with dense matrices.

State: frequency bin ``f`` of the band (``F`` bins). Transition matrix
``A[f, g] = P(next = f | now = g) = (1 - mix) K[f - g] + mix / F`` where ``K`` is the
symmetric step kernel (zero beyond its half-width, and zero outside the band: probability
that would step out of the band is lost, as in the banded engine kernel, and comes back
through the normalisation of the next posterior). Emissions are tempered per hop:
``e_p(f) ** w_p``.

Forward filter (Rabiner 1989): ``alpha_p = normalise(e_p ** w_p * (A @ alpha_{p-1}))``;
when the product has no mass the prediction ``A @ alpha_{p-1}`` is kept.
Backward: ``beta_{P-1} = 1 / F``,
``beta_{p-1}(g) = normalise(sum_f A[f, g] e_p(f) ** w_p beta_p(f))``.
Viterbi: ``d_p(f) = max_g (d_{p-1}(g) + log A[f, g]) + w_p log e_p(f)``,
``d_0 = w_0 log e_0`` (plus ``log start`` when a start prior is given; the forward
filter then starts from ``alpha_{-1} = start`` instead of the uniform posterior).
"""

from __future__ import annotations

import numpy as np

EMISSION_FLOOR = 1e-2  # the engine's documented floor (estimators.tracker)


def step_kernel(sigma_bins: float) -> np.ndarray:
    """Gaussian kernel over ``-h..h`` bins, ``h = max(1, ceil(3 sigma))``, unit sum."""
    half = max(1, int(np.ceil(3.0 * sigma_bins)))
    d = np.arange(-half, half + 1, dtype=np.float64)
    g = np.exp(-0.5 * (d / sigma_bins) ** 2)
    return g / g.sum()


def transition_matrix(kernel: np.ndarray, n_bins: int, mix: float) -> np.ndarray:
    """Dense ``A[f, g]`` (see the module notes)."""
    half = (len(kernel) - 1) // 2
    a = np.zeros((n_bins, n_bins))
    for f in range(n_bins):
        for g in range(n_bins):
            if abs(f - g) <= half:
                a[f, g] = kernel[f - g + half]
    return (1.0 - mix) * a + mix / n_bins


def emissions(spectra: np.ndarray, power: float) -> np.ndarray:
    """``floor + (S / max S) ** power`` per hop; a hop without a positive peak gets the
    floor everywhere."""
    spectra = np.atleast_2d(np.asarray(spectra, dtype=np.float64))
    out = np.empty_like(spectra)
    for p, row in enumerate(spectra):
        peak = np.max(row)
        if peak > 0 and np.isfinite(peak):
            rel = np.where(np.isfinite(row), row / peak, 0.0)
            out[p] = EMISSION_FLOOR + rel ** power
        else:
            out[p] = EMISSION_FLOOR
    return out


def forward(alpha0: np.ndarray, em: np.ndarray, weights: np.ndarray,
            a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Posterior after every hop ``(P, F)`` and the last one."""
    alpha = np.array(alpha0, dtype=np.float64)
    out = np.empty_like(em, dtype=np.float64)
    for p in range(em.shape[0]):
        prior = a @ alpha
        post = prior * em[p] ** np.clip(weights[p], 0.0, 1.0)
        total = post.sum()
        alpha = post / total if (total > 0 and np.isfinite(total)) else prior
        out[p] = alpha
    return alpha, out


def backward(em: np.ndarray, weights: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Backward variables ``(P, F)``, each row scaled to unit sum."""
    n_hops, n_bins = em.shape
    beta = np.empty((n_hops, n_bins))
    beta[-1] = 1.0 / n_bins
    for p in range(n_hops - 1, 0, -1):
        v = a.T @ (em[p] ** np.clip(weights[p], 0.0, 1.0) * beta[p])
        beta[p - 1] = v / v.sum()
    return beta


def smoothed(em: np.ndarray, weights: np.ndarray, a: np.ndarray,
             start: np.ndarray | None = None) -> np.ndarray:
    """Posterior marginals given every hop, from a uniform start (or ``start``)."""
    n_bins = em.shape[1]
    _, alphas = forward(np.full(n_bins, 1.0 / n_bins) if start is None else start, em,
                        weights, a)
    post = alphas * backward(em, weights, a)
    return post / post.sum(axis=1, keepdims=True)


def fixed_lag(em: np.ndarray, weights: np.ndarray, a: np.ndarray, lag: int) -> np.ndarray:
    """``P(state_p | hops 0 .. p + lag)`` for ``p = 0 .. P - 1 - lag``."""
    n_hops, n_bins = em.shape
    _, alphas = forward(np.full(n_bins, 1.0 / n_bins), em, weights, a)
    out = []
    for p in range(n_hops - lag):
        beta = backward(em[p:p + lag + 1], weights[p:p + lag + 1], a)[0]
        post = alphas[p] * beta
        out.append(post / post.sum())
    return np.array(out).reshape(-1, n_bins)


def viterbi(em: np.ndarray, weights: np.ndarray, a: np.ndarray,
            start: np.ndarray | None = None) -> tuple[np.ndarray, float]:
    """Most probable bin path ``(P,)`` and its log score (``start``: the first bin's
    prior; None: uniform, which adds only a constant)."""
    n_hops, n_bins = em.shape
    with np.errstate(divide="ignore"):
        log_a = np.log(a)
    log_e = np.log(em) * np.clip(weights, 0.0, 1.0)[:, None]
    score = log_e[0].copy()
    if start is not None:
        score += np.log(start)
    back = np.zeros((n_hops, n_bins), dtype=np.int64)
    for p in range(1, n_hops):
        cand = score[None, :] + log_a  # cand[f, g]: come from g into f
        back[p] = np.argmax(cand, axis=1)
        score = cand[np.arange(n_bins), back[p]] + log_e[p]
    path = np.empty(n_hops, dtype=np.int64)
    path[-1] = int(np.argmax(score))
    for p in range(n_hops - 1, 0, -1):
        path[p - 1] = back[p, path[p]]
    return path, float(score.max())


def path_score(path: np.ndarray, em: np.ndarray, weights: np.ndarray, a: np.ndarray) -> float:
    """Log score of a given path under the same model as :func:`viterbi`."""
    log_e = np.log(em) * np.clip(weights, 0.0, 1.0)[:, None]
    total = log_e[0, path[0]]
    for p in range(1, len(path)):
        total += np.log(a[path[p], path[p - 1]]) + log_e[p, path[p]]
    return float(total)


def read_posterior(posteriors: np.ndarray, rates: np.ndarray, halfwidth_bins: float,
                   spectra: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Per hop: confidence = posterior mass within ``halfwidth_bins`` of the mode.

    Rate: without ``spectra``, the mean rate of that mass; with ``spectra`` (P, F), the
    rate of the highest spectral value within the half-width of the mode (the first
    one on ties), moved by the vertex of the parabola through it and its two
    neighbours (when it is not at the band edge and the parabola opens downwards; the
    shift is limited to half a bin); the mode's rate when that spectral value is not
    positive.
    """
    posteriors = np.atleast_2d(posteriors)
    step = rates[1] - rates[0]
    rate, conf = [], []
    for p, row in enumerate(posteriors):
        mode = int(np.argmax(row))
        mass = 0.0
        moment = 0.0
        best, best_value = -1, -np.inf
        for f in range(len(row)):
            if abs(f - mode) <= halfwidth_bins:
                mass += row[f]
                moment += row[f] * rates[f]
                if spectra is not None and spectra[p, f] > best_value:
                    best, best_value = f, spectra[p, f]
        conf.append(min(max(mass, 0.0), 1.0))
        if spectra is None:
            rate.append(moment / mass if mass > 0 else np.nan)
        elif best_value <= 0:
            rate.append(rates[mode])
        else:
            shift = 0.0
            if 0 < best < len(row) - 1:
                left, right = spectra[p, best - 1], spectra[p, best + 1]
                curvature = left - 2.0 * best_value + right
                if curvature < 0:
                    shift = min(0.5, max(-0.5, 0.5 * (left - right) / curvature))
            rate.append(rates[best] + shift * step)
    return np.array(rate), np.array(conf)


def concentration_fraction(spectra: np.ndarray, centre_bins: np.ndarray,
                           halfwidth_bins: float) -> np.ndarray:
    """Share of each hop's band total within ``halfwidth_bins`` of its (fractional)
    centre bin."""
    out = []
    for row, centre in zip(np.atleast_2d(spectra), centre_bins):
        near = sum(v for f, v in enumerate(row) if abs(f - centre) <= halfwidth_bins)
        total = float(np.sum(row))
        out.append(near / total if total > 0 else 0.0)
    return np.array(out)
