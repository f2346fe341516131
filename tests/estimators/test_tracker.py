"""Ridge tracker: forward filter, fixed-lag smoother, forward-backward and Viterbi
against dense-matrix twins; the incremental tracker against its batch step after every
update."""

from __future__ import annotations

import numpy as np
import pytest

from estimators import tracker
from estimators.errors import ParameterError
from tests.reference import dense_hmm, quality_loop

N_BINS = 60
RATES = 40.0 + 0.75 * np.arange(N_BINS)


def make(sigma=1.3, mix=1e-3, halfwidth=4.0, lag=0):
    return tracker.TrackerParams(tracker.transition_kernel(sigma), mix, halfwidth, lag)


def dense(params, n_bins=N_BINS):
    return dense_hmm.transition_matrix(params.transition, n_bins, params.jump_probability)


def ridge_spectra(rng, n_hops, n_bins=N_BINS, noise=0.3, start=20.0, slope=0.15):
    """Spectra with a drifting peak plus noise; a few hops are all zero."""
    f = np.arange(n_bins)
    centre = start + slope * np.arange(n_hops)
    s = np.exp(-0.5 * ((f[None, :] - centre[:, None]) / 1.5) ** 2)
    s += noise * rng.random((n_hops, n_bins))
    s[rng.random(n_hops) < 0.05] = 0.0
    return s


def random_weights(rng, n_hops):
    w = rng.random(n_hops)
    w[rng.random(n_hops) < 0.3] = 1.0
    w[rng.random(n_hops) < 0.1] = 0.0
    return w


# ------------------------------------------------------------------- model pieces


@pytest.mark.parametrize("sigma", [0.1, 0.33, 1.0, 2.7])
def test_transition_kernel(sigma):
    k = tracker.transition_kernel(sigma)
    np.testing.assert_allclose(k, dense_hmm.step_kernel(sigma), rtol=1e-14)
    assert len(k) % 2 == 1 and len(k) >= 3
    np.testing.assert_allclose(k, k[::-1], rtol=1e-15)
    assert k.sum() == pytest.approx(1.0, abs=1e-14)


def test_transition_kernel_rejects_non_positive_sigma():
    with pytest.raises(ParameterError, match=r"sigma_bins=0 must be > 0"):
        tracker.transition_kernel(0)
    with pytest.raises(ParameterError, match=r"sigma_bins=-1.0 must be > 0"):
        tracker.transition_kernel(-1.0)


def test_make_params_units():
    # sigma (bins) = 3 /min/s * 0.25 s / 0.75 /min = 1 bin; halfwidth 4 /min = 5.33 bins
    p = tracker.make_params(0.75, 0.25, 3.0, 1e-3, 4.0, lag_hops=2)
    np.testing.assert_allclose(p.transition, tracker.transition_kernel(1.0), rtol=1e-15)
    assert p.halfwidth_bins == pytest.approx(4.0 / 0.75)
    assert p.jump_probability == 1e-3 and p.lag_hops == 2


def test_emissions_equal_reference(rng):
    s = rng.random((8, N_BINS))
    s[2] = 0.0
    s[3, 5] = np.nan
    for power in (0.5, 1.0, 2.0):
        np.testing.assert_allclose(tracker.emissions_from_spectra(s, power),
                                   dense_hmm.emissions(s, power), rtol=1e-14)
    assert np.all(tracker.emissions_from_spectra(s, 2.0)[2] == tracker.EMISSION_FLOOR)


def test_read_posterior_equals_reference(rng):
    post = rng.random((10, N_BINS)) ** 8
    post /= post.sum(axis=1, keepdims=True)
    spectra = rng.random((10, N_BINS))
    spectra[3] = 0.0  # nothing to read: the mode's rate
    spectra[4, :] = np.linspace(0, 1, N_BINS)  # peak at the band edge: no refinement
    for halfwidth in (0.5, 3.0, 5.33):
        for readout in (None, spectra):
            rate, conf = tracker.read_posterior(post, RATES, halfwidth, readout)
            want_rate, want_conf = dense_hmm.read_posterior(post, RATES, halfwidth, readout)
            np.testing.assert_allclose(rate, want_rate, rtol=1e-13)
            np.testing.assert_allclose(conf, want_conf, rtol=1e-13)
    # a point mass reads exactly; a symmetric peak reads at its centre bin, a
    # parabola's vertex exactly
    point = np.zeros(N_BINS)
    point[17] = 1.0
    rate, conf = tracker.read_posterior(point, RATES, 4.0)
    assert rate[0] == RATES[17] and conf[0] == 1.0
    f = np.arange(N_BINS)
    parabola = np.maximum(0.0, 10.0 - (f - 18.3) ** 2)
    rate, _ = tracker.read_posterior(point, RATES, 4.0, parabola[None, :])
    assert rate[0] == pytest.approx(RATES[0] + 18.3 * (RATES[1] - RATES[0]), abs=1e-12)


# ---------------------------------------------------------- forward filter and lag


@pytest.mark.parametrize("mix", [0.0, 1e-3, 0.2])
def test_forward_step_equals_dense_forward(rng, mix):
    params = make(sigma=1.7, mix=mix)
    em = tracker.emissions_from_spectra(ridge_spectra(rng, 80), 2.0)
    w = random_weights(rng, 80)
    alpha0 = rng.random(N_BINS)
    alpha0 /= alpha0.sum()
    last, posts = tracker.forward_step(alpha0, em, w, params)
    want_last, want = dense_hmm.forward(alpha0, em, w, dense(params))
    np.testing.assert_allclose(posts, want, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(last, want_last, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(posts.sum(axis=1), 1.0, rtol=1e-12)


def test_forward_step_does_not_modify_its_input(rng):
    alpha0 = tracker.initial_posterior(N_BINS)
    keep = alpha0.copy()
    em = tracker.emissions_from_spectra(ridge_spectra(rng, 5), 2.0)
    tracker.forward_step(alpha0, em, np.ones(5), make())
    np.testing.assert_array_equal(alpha0, keep)


def test_weight_zero_hop_coasts_on_the_prediction(rng):
    params = make(sigma=2.0, mix=0.01)
    alpha0 = rng.random(N_BINS)
    alpha0 /= alpha0.sum()
    em = tracker.emissions_from_spectra(ridge_spectra(rng, 1), 2.0)
    _, posts = tracker.forward_step(alpha0, em, np.zeros(1), params)
    prediction = dense(params) @ alpha0
    np.testing.assert_allclose(posts[0], prediction / prediction.sum(), rtol=1e-12)


@pytest.mark.parametrize("lag", [0, 1, 4])
@pytest.mark.parametrize("with_readout", [False, True])
def test_ridge_tracker_incremental_equals_batch_after_every_update(rng, lag, with_readout):
    """Hops fed one at a time, in random groups and in empty updates give, after every
    update, the prefix of the dense twin over all hops (forward filter, or fixed-lag
    smoother) read out at the spectral peak near the posterior mode."""
    n_hops = 90
    params = make(sigma=1.2, mix=2e-3, halfwidth=4.0, lag=lag)
    spectra = ridge_spectra(rng, n_hops)
    readout = ridge_spectra(rng, n_hops, noise=0.5, start=21.0) if with_readout else spectra
    w = random_weights(rng, n_hops)
    em = tracker.emissions_from_spectra(spectra, 2.0)
    if lag == 0:
        _, posts = tracker.forward_step(tracker.initial_posterior(N_BINS), em, w, params)
    else:
        posts = dense_hmm.fixed_lag(em, w, dense(params), lag)
    want_rate, want_conf = dense_hmm.read_posterior(posts, RATES, params.halfwidth_bins,
                                                    readout[:len(posts)])

    live = tracker.RidgeTracker(RATES, params, 2.0)
    rates, confs, index = [], [], []
    p = 0
    while p < n_hops:
        size = 1 if p < 10 else int(rng.integers(0, 7))  # 0: an update without hops
        r, c, i = live.update(spectra[p:p + size], w[p:p + size],
                              readout[p:p + size] if with_readout else None)
        rates.extend(r)
        confs.extend(c)
        index.extend(i)
        p += size
        done = max(0, min(p, n_hops) - lag)
        assert len(rates) == done
        np.testing.assert_array_equal(index, np.arange(done))
        np.testing.assert_allclose(rates, want_rate[:done], rtol=1e-10)
        np.testing.assert_allclose(confs, want_conf[:done], rtol=1e-9, atol=1e-12)
    assert live.hops_seen == n_hops


def track_reference(live, spectra, readout, w):
    """The hot path by its definition: rhythm-tempered weights (when checked), the
    dense forward filter, the read-out near the mode, the harmonic score there."""
    params = live.params
    n_bins = spectra.shape[1]
    offset = RATES[0] / (RATES[1] - RATES[0])
    hw = params.halfwidth_bins
    weights = np.clip(w, 0, 1).copy()
    if live.check_rhythm:
        for p in range(len(spectra)):
            top = int(np.argmax(spectra[p]))
            score = quality_loop.harmonic_score(readout[p] ** 2, float(top), offset, hw,
                                                live.chance_factor, live.span)
            weights[p] *= 0.0 if top in (0, n_bins - 1) else score
    em = dense_hmm.emissions(spectra, 2.0)
    _, posts = dense_hmm.forward(tracker.initial_posterior(n_bins), em, weights,
                                 dense(params, n_bins))
    rate, conf = dense_hmm.read_posterior(posts, RATES, hw, readout)
    position = (rate - RATES[0]) / (RATES[1] - RATES[0])
    conc = []
    for p in range(len(spectra)):
        mode = int(np.argmax(posts[p]))
        near = np.flatnonzero(np.abs(np.arange(n_bins) - mode) <= hw)
        best = near[np.argmax(readout[p, near])]
        conc.append(0.0 if best in (0, n_bins - 1) else quality_loop.harmonic_score(
            readout[p] ** 2, position[p], offset, hw, live.chance_factor, live.span))
    return rate, conf, np.array(conc), posts[-1]


@pytest.mark.parametrize("check_rhythm", [False, True])
def test_track_hot_path_equals_update_and_reference(rng, check_rhythm):
    """``track`` (one compiled pass) equals ``update`` and the definition, whatever the
    grouping of hops; its third output is the harmonic score at the reported rate."""
    n_hops = 70
    params = make(sigma=1.2, mix=2e-3, halfwidth=5.33)
    spectra = ridge_spectra(rng, n_hops)
    readout = ridge_spectra(rng, n_hops, noise=0.5, start=21.0)
    readout[7] = 0.0  # empty read-out: the mode's rate
    readout[9, -1] = 50.0  # read-out peak on the band edge: no concentration
    spectra[11, 0] = 50.0  # de-shape peak on the band edge: no rhythm
    w = random_weights(rng, n_hops)
    hot = tracker.RidgeTracker(RATES, params, 2.0, check_rhythm)
    plain = tracker.RidgeTracker(RATES, params, 2.0, check_rhythm)
    got_rate, got_conf, got_conc = [], [], []
    p = 0
    while p < n_hops:
        size = int(rng.integers(0, 9))
        r, c, k = hot.track(spectra[p:p + size], w[p:p + size], readout[p:p + size])
        got_rate.extend(r)
        got_conf.extend(c)
        got_conc.extend(k)
        p += size
    want_rate, want_conf, _ = plain.update(spectra, w, readout)
    np.testing.assert_allclose(got_rate, want_rate, rtol=1e-12)
    np.testing.assert_allclose(got_conf, want_conf, rtol=1e-12)
    np.testing.assert_allclose(hot.posterior, plain.posterior, rtol=1e-12)
    assert hot.hops_seen == plain.hops_seen == n_hops
    ref_rate, ref_conf, ref_conc, ref_last = track_reference(hot, spectra, readout, w)
    np.testing.assert_allclose(got_rate, ref_rate, rtol=1e-10)
    np.testing.assert_allclose(got_conf, ref_conf, rtol=1e-9)
    np.testing.assert_allclose(got_conc, ref_conc, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(hot.posterior, ref_last, rtol=1e-9, atol=1e-15)
    # a read-out on the band edge (when the mode is near it) scores no concentration
    assert got_conc[9] == 0.0 or abs(got_rate[9] - RATES[-1]) > 5.33 * 0.75
    if check_rhythm:
        assert hot.rhythm(spectra[11:12], readout[11:12])[0] == 0.0
    else:
        np.testing.assert_array_equal(hot.rhythm(spectra, readout), np.ones(n_hops))


def test_track_refuses_lag():
    live = tracker.RidgeTracker(RATES, make(lag=2), 2.0)
    with pytest.raises(ParameterError, match=r"track\(\) is for lag_hops=0; use update\(\)"):
        live.track(np.ones((1, N_BINS)), np.ones(1))


def test_smooth_oldest_is_the_fixed_lag_marginal(rng):
    params = make(sigma=1.0, mix=1e-2)
    em = tracker.emissions_from_spectra(ridge_spectra(rng, 12), 2.0)
    w = random_weights(rng, 12)
    _, alphas = tracker.forward_step(tracker.initial_posterior(N_BINS), em, w, params)
    lag = 5
    for p in range(12 - lag):
        got = tracker.smooth_oldest(alphas[p:p + lag + 1], em[p:p + lag + 1],
                                    w[p:p + lag + 1], params)
        want = dense_hmm.fixed_lag(em[:p + lag + 1], w[:p + lag + 1], dense(params), lag)[p]
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-15)


# --------------------------------------------------------------------- offline twins


@pytest.mark.parametrize("mix", [0.0, 1e-3, 0.1])
def test_smooth_all_equals_dense_forward_backward(rng, mix):
    params = make(sigma=1.4, mix=mix)
    em = tracker.emissions_from_spectra(ridge_spectra(rng, 50), 2.0)
    w = random_weights(rng, 50)
    np.testing.assert_allclose(tracker.backward_betas(em, w, params),
                               dense_hmm.backward(em, w, dense(params)), rtol=1e-9,
                               atol=1e-15)
    np.testing.assert_allclose(tracker.smooth_all(em, w, params),
                               dense_hmm.smoothed(em, w, dense(params)), rtol=1e-9,
                               atol=1e-15)


@pytest.mark.parametrize("mix", [0.0, 1e-3, 0.1])
def test_viterbi_equals_dense_viterbi(rng, mix):
    params = make(sigma=1.1, mix=mix)
    spectra = ridge_spectra(rng, 70, noise=0.8)
    spectra[30:35] = 0.0  # a gap
    em = tracker.emissions_from_spectra(spectra, 2.0)
    w = random_weights(rng, 70)
    w[w == 0] = 0.5  # all-flat hops would make ties, whose winner is arbitrary
    got = tracker.viterbi_path(em, w, params)
    want, best = dense_hmm.viterbi(em, w, dense(params))
    assert dense_hmm.path_score(got, em, w, dense(params)) == pytest.approx(best, rel=1e-12)
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("block_hops", [7, 4096])
def test_offline_track_equals_the_plain_composition(rng, monkeypatch, block_hops):
    # The bounded-memory offline twin against the dense forward-backward posteriors and
    # the dense Viterbi path, composed the obvious way; blocks of 7 hops split the
    # row-by-row steps many times, 4096 leaves them whole.
    monkeypatch.setattr(tracker, "OFFLINE_BLOCK_HOPS", block_hops)
    params = make(sigma=1.1, mix=1e-3)
    spectra = ridge_spectra(rng, 80, noise=0.8)
    readout = spectra + 0.1 * rng.random(spectra.shape)
    w = random_weights(rng, 80)
    w[w == 0] = 0.5  # all-flat hops would make Viterbi ties, whose winner is arbitrary
    rate, conf, path = tracker.offline_track(spectra, w, params, 2.0, RATES, readout)
    em = dense_hmm.emissions(spectra, 2.0)
    want_path, _ = dense_hmm.viterbi(em, w, dense(params))
    np.testing.assert_array_equal(path, want_path)
    post = dense_hmm.smoothed(em, w, dense(params))
    near = np.abs(np.arange(N_BINS)[None, :] - want_path[:, None]) <= params.halfwidth_bins
    np.testing.assert_allclose(conf, np.clip(np.where(near, post, 0.0).sum(axis=1), 0, 1),
                               rtol=1e-12, atol=1e-15)
    np.testing.assert_array_equal(
        rate, tracker.refine_peak(readout, want_path, params.halfwidth_bins, RATES))
    empty = tracker.offline_track(spectra[:0], w[:0], params, 2.0, RATES)
    assert [len(x) for x in empty] == [0, 0, 0]


def test_viterbi_beats_the_filtered_argmax_path(rng):
    params = make(sigma=1.0, mix=1e-3)
    em = tracker.emissions_from_spectra(ridge_spectra(rng, 60, noise=1.0), 2.0)
    w = np.ones(60)
    path = tracker.viterbi_path(em, w, params)
    _, posts = tracker.forward_step(tracker.initial_posterior(N_BINS), em, w, params)
    greedy = np.argmax(posts, axis=1)
    a = dense(params)
    assert dense_hmm.path_score(path, em, w, a) >= dense_hmm.path_score(greedy, em, w, a)
    assert tracker.viterbi_path(em[:0], w[:0], params).shape == (0,)


# ------------------------------------------------------------------------- behaviour


def test_tracker_reacquires_after_the_ridge_jumps(rng):
    """A ridge that jumps 20 bins: the uniform jump term lets the posterior move
    within a few hops; without it the Gaussian step alone would take ~20 / sigma hops."""
    n_hops = 60
    f = np.arange(N_BINS)
    centre = np.where(np.arange(n_hops) < 30, 15.0, 35.0)
    spectra = np.exp(-0.5 * ((f[None, :] - centre[:, None]) / 1.5) ** 2)
    spectra += 0.05 * rng.random(spectra.shape)
    live = tracker.RidgeTracker(RATES, make(sigma=0.5, mix=1e-3), 2.0)
    rate, conf, _ = live.update(spectra, np.ones(n_hops))
    assert np.all(np.abs(rate[5:30] - RATES[15]) < 1.0)
    settled = np.argmax(np.abs(rate[30:] - RATES[35]) < 1.0)
    assert np.all(np.abs(rate[30 + settled:] - RATES[35]) < 1.0)
    # Measured: settles 2 hops after the jump (emission contrast 1e2 per hop against
    # a jump prior of 1e-3 / 60).
    assert settled <= 4
    # confidence dips while the posterior is split between the two ridges
    assert conf[30:30 + settled + 1].min() < conf[20:30].min()
