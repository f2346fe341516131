"""Every numba kernel equals its plain-Python path (``kernel.py_func``) and a slow
reference twin; the whole engine gives the same estimates with the JIT switched off."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import signal

from estimators import _jit, _kernels, tracker
from estimators.preprocess import MAX_ABS, Limiter, design_chain, initial_state
from tests import signals
from tests.reference import dense_hmm, deshape_interp, preprocess_loop, quality_loop

N_BINS = 48


def both(kernel):
    """The compiled kernel and its plain-Python path (the same function when the JIT is
    off for the whole run)."""
    return [("compiled", kernel), ("python", kernel.py_func)]


def hmm_inputs(rng, n_hops=40):
    f = np.arange(N_BINS)
    centre = 15 + 0.2 * np.arange(n_hops)
    spectra = np.exp(-0.5 * ((f[None, :] - centre[:, None]) / 1.5) ** 2)
    spectra += 0.4 * rng.random(spectra.shape)
    em = tracker.emissions_from_spectra(spectra, 2.0)
    w = rng.random(n_hops)
    w[::5] = 1.0
    w[3] = 0.0
    return spectra, em, np.ascontiguousarray(w)


TESTED_KERNELS = {"forward_filter", "backward_pass", "backward_mass", "viterbi", "squeeze_column",
                  "sos_filter", "preprocess_chunk", "harmonic_score", "track_block",
                  "rhythm_scores", "hop_rhythm", "predict", "cancel_columns",
                  "normalise_or_prior", "spectral_margins", "kth_largest", "limit_sample",
                  "limit_chunk", "preprocess_channels", "track_channels", "resample_chunk",
                  "modulation_frames", "shape_modulation_spectra", "track_ridges",
                  "modulation_quality", "fuse_rates", "interp_point", "calibrate_breathing",
                  "numpy_sum", "sorted_copy", "upper_quartile", "small_median", "vertex_offset",
                  "beat_candidates", "remember", "aligned_offset", "scan_beats",
                  "beat_front_end"}
"""Kernels with a test here (the breathing-from-the-pulse kernels, ``resample_chunk`` to
``calibrate_breathing`` and ``interp_point``, in test_stage_conformance_breathing.py; ``cancel_columns`` in test_motion.py,
``harmonic_score`` in test_quality.py, ``spectral_margins`` in test_calibration.py,
``track_block`` also
through ``RidgeTracker.track`` in test_tracker.py; the beat detection kernels, ``beat_front_end``
and ``numpy_sum`` to ``scan_beats``, here and through ``detect_step`` against ``detect_batch`` in
test_beats.py and test_stage_conformance_breathing.py)."""


def test_every_kernel_is_tested_and_exposes_its_python_path():
    kernels = {name for name in dir(_kernels) if hasattr(getattr(_kernels, name), "py_func")}
    assert kernels == TESTED_KERNELS, "a kernel was added or removed: test it here"
    for name in kernels:
        k = getattr(_kernels, name)
        assert callable(k.py_func)
        if _jit.JIT_ENABLED:
            assert k.py_func is not k


@pytest.mark.parametrize("mix", [0.0, 1e-3, 0.3])
def test_forward_filter(rng, mix):
    _, em, w = hmm_inputs(rng)
    kernel = tracker.transition_kernel(1.3)
    alpha0 = rng.random(N_BINS)
    alpha0 /= alpha0.sum()
    _, want = dense_hmm.forward(alpha0, em, w, dense_hmm.transition_matrix(kernel, N_BINS, mix))
    for label, fn in both(_kernels.forward_filter):
        alpha = alpha0.copy()
        out = np.empty_like(em)
        fn(alpha, em, w, kernel, mix, out)
        np.testing.assert_allclose(out, want, rtol=1e-10, atol=1e-15, err_msg=label)
        np.testing.assert_array_equal(alpha, out[-1], err_msg=label)


@pytest.mark.parametrize("mix", [0.0, 1e-3, 0.3])
def test_backward_pass(rng, mix):
    _, em, w = hmm_inputs(rng)
    kernel = tracker.transition_kernel(0.8)
    want = dense_hmm.backward(em, w, dense_hmm.transition_matrix(kernel, N_BINS, mix))
    for label, fn in both(_kernels.backward_pass):
        out = np.empty_like(em)
        fn(em, w, kernel, mix, out)
        np.testing.assert_allclose(out, want, rtol=1e-10, atol=1e-15, err_msg=label)


@pytest.mark.parametrize("mix", [0.0, 1e-3, 0.3])
def test_backward_mass(rng, mix):
    # The posterior mass near a centre per hop, as the dense forward-backward twin's
    # smoothed posteriors summed within the half-width of it.
    _, em, w = hmm_inputs(rng)
    kernel = tracker.transition_kernel(0.8)
    a = dense_hmm.transition_matrix(kernel, N_BINS, mix)
    post = dense_hmm.smoothed(em, w, a)
    centre = rng.integers(0, N_BINS, len(em)).astype(np.float64)
    halfwidth = 2.5
    near = np.abs(np.arange(N_BINS)[None, :] - centre[:, None]) <= halfwidth
    want = np.where(near, post, 0.0).sum(axis=1)
    alphas = np.empty_like(em)
    _kernels.forward_filter(np.full(N_BINS, 1.0 / N_BINS), em, w, kernel, mix, alphas)
    for label, fn in both(_kernels.backward_mass):
        out = np.empty(len(em))
        fn(em, w, kernel, mix, alphas, centre, halfwidth, out)
        np.testing.assert_allclose(out, want, rtol=1e-10, atol=1e-15, err_msg=label)


@pytest.mark.parametrize("mix", [1e-6, 1e-3, 0.3])
def test_viterbi(rng, mix):
    _, em, w = hmm_inputs(rng, 60)
    w[w == 0] = 0.5  # a flat hop makes exact ties, whose winner is arbitrary
    kernel = tracker.transition_kernel(1.0)
    a = dense_hmm.transition_matrix(kernel, N_BINS, mix)
    want, _ = dense_hmm.viterbi(em, w, a)
    log_e = np.ascontiguousarray(np.log(em) * w[:, None])
    log_t = np.log((1 - mix) * kernel + mix / N_BINS)
    for label, fn in both(_kernels.viterbi):
        path = np.empty(len(em), dtype=np.int64)
        fn(log_e, log_t, float(np.log(mix / N_BINS)), path)
        np.testing.assert_array_equal(path, want, err_msg=label)


def test_squeeze_column(rng):
    mag = rng.random(65)
    target = np.arange(65) + rng.normal(0, 3, 65)
    target[[3, 9]] = np.nan
    target[5] = -4.0  # off the grid: dropped
    target[6] = 70.0
    want = np.zeros(65)
    for f in range(65):
        if np.isfinite(target[f]):
            i = int(np.floor(target[f] + 0.5))
            if 0 <= i < 65:
                want[i] += mag[f]
    for label, fn in both(_kernels.squeeze_column):
        out = np.full(65, np.nan)
        fn(mag, target, out)
        np.testing.assert_allclose(out, want, rtol=1e-15, err_msg=label)
    # and the public wrapper against the loop twin on a real column
    t = np.arange(300) / 25.0
    x = np.sin(2 * np.pi * 1.37 * t) + 0.5 * np.sin(2 * np.pi * 2.74 * t + 1)
    from estimators.deshape import squeeze
    from estimators.stft import stft_batch
    cols = stft_batch(x, t, 200, 200, 25.0, 512, with_derivative=True)
    got = squeeze(cols.spectra, cols.spectra_dw, 512)
    for p in range(len(cols)):
        np.testing.assert_allclose(got[p], deshape_interp.squeeze_column(
            cols.spectra[p], cols.spectra_dw[p], 512), rtol=1e-12, atol=1e-15)


def test_sos_filter_equals_scipy_with_carried_state(rng):
    sos = signal.butter(4, [0.5, 8.0], btype="bandpass", fs=125.0, output="sos")
    x = rng.standard_normal(1000)
    want = signal.sosfilt(sos, x)
    for label, fn in both(_kernels.sos_filter):
        zi = np.zeros((sos.shape[0], 2))
        parts, k = [], 0
        for size in (1, 10, 333, 656):
            out = np.empty(size)
            fn(sos, x[k:k + size], zi, out)
            parts.append(out)
            k += size
        np.testing.assert_allclose(np.concatenate(parts), want, rtol=1e-12, atol=1e-14,
                                   err_msg=label)


def spiky_rhythm(rng, n, fs):
    """An ECG-like rhythm with a NaN burst, a flat run, spikes of 1e6 to 1e308 (one of
    them astride a limiter block boundary) and a lasting DC jump."""
    t = np.arange(n) / fs
    x = signals.rhythm(t, np.full(len(t), 80.0), signals.ecg_like, noise_std=0.2, rng=rng)
    x[500:560] = np.nan
    x[900:1000] = x[900]
    x[1240:1243] = [1e6, -1e15, 1e30]
    x[1705] = -1e308
    x[2000] = np.inf
    x[2400:] += 40.0
    return t, x


@pytest.mark.parametrize("kind,limited", [("ppg", False), ("ecg", False), ("ppg", True),
                                          ("ecg", True)])
def test_preprocess_chunk(rng, kind, limited):
    fs, decimation, min_run = 125.0, 5, 15
    t, x = spiky_rhythm(rng, 3000, fs)
    if not limited:
        x[1240:1243] = x[1705] = 0.5
    limiter = Limiter.for_window(8.0, fs) if limited else Limiter(0)
    chain = design_chain(kind, "hr", fs, fs / decimation)
    want = preprocess_loop.preprocess(x, t, chain, decimation, min_run,
                                      limiter if limited else None)
    post = np.zeros((0, 6)) if chain.post is None else chain.post
    for label, fn in both(_kernels.preprocess_chunk):
        state = initial_state(chain, limiter)
        outs, k = [], 0
        for size in (1, 2, 4, 993, 2000):
            buf = np.empty((4, size // decimation + 2))
            n = fn(x[k:k + size], t[k:k + size], chain.pre, state.zi_pre, chain.envelope,
                   post, state.zi_post, state.scalars, state.limiter, limiter.block,
                   limiter.rank, limiter.margin, MAX_ABS, decimation, float(min_run),
                   buf[0], buf[1], buf[2], buf[3])
            outs.append(buf[:, :n])
            k += size
        got = np.concatenate(outs, axis=1)
        scale = np.abs(want["values"]).max()
        assert np.all(np.isfinite(got[0])), label
        np.testing.assert_allclose(got[0], want["values"], rtol=0, atol=1e-12 * scale,
                                   err_msg=label)
        np.testing.assert_array_equal(got[1], want["timestamps"], err_msg=label)
        np.testing.assert_array_equal(got[2], want["cum_rejected"], err_msg=label)
        np.testing.assert_array_equal(got[3], want["cum_stuck"], err_msg=label)


def test_limit_chunk_equals_the_plain_loop(rng):
    """The running range, chunk by chunk (single samples, sizes across block boundaries),
    against the plain loop of the reference: the same samples accepted."""
    fs = 125.0
    _, x = spiky_rhythm(rng, 3000, fs)
    limiter = Limiter.for_window(8.0, fs)
    want = preprocess_loop.accepted_flags(x, limiter.block, limiter.blocks, limiter.rank,
                                          limiter.margin, MAX_ABS)
    # The case is what it means to be: the spikes and the jump's first samples rejected.
    assert want[[1240, 1241, 1242, 1705, 2400]].sum() == 0 and want[:400].all()
    for label, fn in both(_kernels.limit_chunk):
        state = limiter.initial_state()
        outs, k = [], 0
        for size in [1] * 40 + [31, 30, 32, 1, 997] + [1] * 30 + [1839]:
            out = np.empty(size)
            fn(x[k:k + size], state, limiter.block, limiter.rank, limiter.margin, MAX_ABS,
               out)
            outs.append(out)
            k += size
        assert k == len(x)
        np.testing.assert_array_equal(np.concatenate(outs), want, err_msg=label)


def test_limit_sample_widens_its_margin_while_it_has_seen_little():
    """Before the first block completes only non-finite samples and those beyond
    ``max_abs`` are rejected; with ``n`` of ``B`` blocks known the range is widened by
    ``margin * B / (4 n)`` envelope widths while ``n < B / 4``, by ``margin`` after."""
    for label, fn in both(_kernels.limit_sample):
        def probe(state, values):
            # Whether each value would be accepted next (on a copy: the state stays).
            return [fn(v, state.copy(), 4, 3, 2.0, 1e100) for v in values]

        def block(state):
            for v in (0.0, 1.0, 0.0, 1.0):  # envelope [0, 1], width 1
                fn(v, state, 4, 3, 2.0, 1e100)

        state = Limiter(4, blocks=16, rank=3, margin=2.0).initial_state()
        assert probe(state, [1e50, -1e99, np.nan, 2e100]) == [True, True, False, False], label
        block(state)  # 1 of 16 known: margin 2 * 16 / 4 = 8, range [-8, 9]
        assert probe(state, [9.0, -8.0, 9.5, -8.5]) == [True, True, False, False], label
        block(state)  # 2 known: margin 4, range [-4, 5]
        assert probe(state, [5.0, -4.0, 5.5, -4.5]) == [True, True, False, False], label
        block(state)
        block(state)  # 4 known, a quarter: margin 2, range [-2, 3]
        assert probe(state, [3.0, -2.0, 3.5, -2.5]) == [True, True, False, False], label


def test_kth_largest_skips_nan_and_needs_rank_values():
    values = np.array([3.0, np.nan, 7.0, -1.0, 7.0, 5.0])
    for label, fn in both(_kernels.kth_largest):
        assert [fn(values, 6, r) for r in (1, 2, 3, 4, 5)][:5] == [7.0, 7.0, 5.0, 3.0, -1.0]
        assert np.isnan(fn(values, 6, 6)), label
        assert fn(values, 3, 2) == 3.0 and np.isnan(fn(values, 2, 2)), label


def test_track_block_compiled_equals_python(rng):
    """The hot-path kernel's two paths agree; the same inputs through both."""
    spectra, _, w = hmm_inputs(rng, 50)
    readout = spectra + 0.2 * rng.random(spectra.shape)
    compiled, python = [fn for _, fn in both(_kernels.track_channels)]
    live = tracker.RidgeTracker(40 + 0.75 * np.arange(N_BINS),
                                tracker.make_params(0.75, 0.25, 3.0, 1e-3, 4.0), 2.0)
    results = []
    for fn in (compiled, python):
        saved = _kernels.track_channels
        try:
            _kernels.track_channels = fn
            live.reset()
            results.append(live.track(spectra, w, readout) + (live.posterior.copy(),))
        finally:
            _kernels.track_channels = saved
    for a, b in zip(*results):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-15)


def test_rhythm_scores(rng):
    """Per hop: the harmonic score of ``readout ** 2`` on the family of the highest
    ``spectra`` bin, 0 when that bin is a band edge."""
    spectra, _, _ = hmm_inputs(rng, 30)
    readout = spectra + 0.3 * rng.random(spectra.shape)
    spectra[4, 0] = 10.0  # peak on the lower edge
    spectra[5, -1] = 10.0  # peak on the upper edge
    spectra[6] = 0.0  # nothing: the first bin counts as the peak, an edge
    offset, hw = 53.3, 5.33
    want = []
    for p in range(len(spectra)):
        top = int(np.argmax(spectra[p]))
        want.append(0.0 if top in (0, N_BINS - 1) else quality_loop.harmonic_score(
            readout[p] ** 2, float(top), offset, hw, 1.5, 0.3))
    for label, fn in both(_kernels.rhythm_scores):
        out = np.full(len(spectra), np.nan)
        fn(spectra, readout, offset, hw, 1.5, 0.3, out)
        np.testing.assert_allclose(out, want, rtol=1e-12, atol=1e-15, err_msg=label)
    assert want[4] == want[5] == want[6] == 0.0 and max(want) > 0


def test_predict_is_the_dense_transition_with_jumps(rng):
    """The banded prediction equals the dense matrix product of the reference twin."""
    params = tracker.make_params(0.75, 0.25, 3.0, 1e-2, 4.0)
    alpha = rng.random(N_BINS)
    alpha /= alpha.sum()
    want = dense_hmm.transition_matrix(params.transition, N_BINS, params.jump_probability) @ alpha
    for label, fn in both(_kernels.predict):
        out = np.empty(N_BINS)
        fn(alpha, params.transition, params.jump_probability, out)
        np.testing.assert_allclose(out, want, rtol=1e-12, atol=1e-15, err_msg=label)


def test_normalise_or_prior(rng):
    """Unit mass when there is evidence; the prior itself when the total is 0 or NaN."""
    prior = rng.random(N_BINS)
    for label, fn in both(_kernels.normalise_or_prior):
        alpha = rng.random(N_BINS)
        want = alpha / alpha.sum()
        fn(alpha, alpha.sum(), prior)
        np.testing.assert_allclose(alpha, want, rtol=1e-15, err_msg=label)
        for bad in (0.0, np.nan, np.inf):
            alpha = np.zeros(N_BINS)
            fn(alpha, bad, prior)
            np.testing.assert_array_equal(alpha, prior, err_msg=label)


def test_hop_rhythm_is_one_row_of_rhythm_scores(rng):
    """The per-hop helper returns the same score as the block kernel, the peak of the
    spectra row, and leaves ``readout ** 2`` in its scratch array."""
    spectra, _, _ = hmm_inputs(rng, 6)
    readout = spectra + 0.3 * rng.random(spectra.shape)
    spectra[2, 0] = 10.0  # an edge peak scores 0
    block = np.empty(len(spectra))
    _kernels.rhythm_scores(spectra, readout, 53.3, 5.33, 1.5, 0.3, block)
    for label, fn in both(_kernels.hop_rhythm):
        for p in range(len(spectra)):
            pw = np.empty(N_BINS)
            score, peak = fn(spectra[p], readout[p], 53.3, 5.33, 1.5, 0.3, pw)
            assert score == pytest.approx(block[p], rel=1e-12, abs=1e-15), label
            assert peak == spectra[p].max()
            np.testing.assert_array_equal(pw, readout[p] ** 2)


# --------------------------------------------------------------- beat detection
# The beat scan must equal its numpy twin to the last bit, so these compare exactly.


def _reals(rng, n):
    """Values of mixed scale and sign, with repeats (ties) and signed zeros."""
    x = rng.normal(size=n) * 10.0 ** rng.uniform(-3, 3, size=n) + rng.normal()
    x[rng.random(n) < 0.1] = 0.0
    x[rng.random(n) < 0.05] = -0.0
    if n > 3:
        x[1] = x[3]
    return x


def test_numpy_sum_is_numpy_summation_to_the_last_bit(rng):
    # Lengths across numpy's cases: under 8, one block (<= 128), split blocks.
    for label, fn in both(_kernels.numpy_sum):
        for n in [0, 1, 2, 7, 8, 9, 15, 16, 17, 127, 128, 129, 130, 257, 1000, 2047, 4100]:
            x = _reals(rng, n + 5)
            assert fn(x, 3, n, False) == np.sum(x[3:3 + n]), (label, n)
            assert fn(x, 3, n, True) == np.sum(x[3:3 + n] ** 2), (label, n)
            if n:
                assert fn(x, 3, n, True) / n == np.mean(x[3:3 + n] ** 2), (label, n)


def test_order_statistics_are_numpys_to_the_last_bit(rng):
    for label, fn in both(_kernels.upper_quartile):
        for n in range(1, 33):
            for _ in range(20):
                v = _reals(rng, n)
                assert fn(v, n) == np.percentile(v, 75.0), (label, n, v)
    for label, fn in both(_kernels.small_median):
        for n in range(1, 33):
            for _ in range(20):
                v = _reals(rng, n)
                assert fn(v, n) == np.median(v), (label, n, v)
    for label, fn in both(_kernels.sorted_copy):
        v = _reals(rng, 40)
        np.testing.assert_array_equal(fn(v, 25), np.sort(v[:25]))
        assert len(fn(v, 0)) == 0


def test_vertex_offset_is_the_parabolic_refinement(rng):
    from estimators.beats import _parabolic
    y = rng.normal(size=30)
    y[10:13] = [1.0, 1.0, 1.0]  # a flat top: no vertex
    y[20:23] = [0.0, 1.0, 1.9]  # not a peak: the vertex lies beyond, clipped
    for label, fn in both(_kernels.vertex_offset):
        for i in range(-1, 31):
            assert fn(y, i, len(y)) == _parabolic(y, i), (label, i)
        assert fn(y, 21, len(y)) == 0.5 and fn(y, 11, len(y)) == 0.0


def test_beat_candidates_equal_the_window_maxima(rng):
    from estimators.beats import _candidates
    # Plateaus (ties) and a NaN: a tie keeps the first sample, a NaN nearby rejects.
    detect = np.round(rng.normal(size=600), 1)
    detect[100:105] = 5.0
    detect[300] = np.nan
    for label, fn in both(_kernels.beat_candidates):
        for lo, hi, r in [(0, 600, 7), (0, 593, 7), (50, 400, 1), (10, 20, 30), (40, 40, 5)]:
            expected = _candidates(detect, lo, hi, r)
            out = np.empty(max(hi - lo, 0) // (r + 1) + 1, np.int64)
            n = fn(detect, lo, hi, r, out)
            np.testing.assert_array_equal(out[:n], expected, err_msg=f"{label} {lo} {hi} {r}")
            assert np.all(np.diff(out[:n]) > r)


def test_remember_keeps_the_newest_in_order():
    for label, fn in both(_kernels.remember):
        values, n, kept = np.zeros(4), 0, []
        for v in range(1, 8):
            n = fn(values, n, float(v))
            kept = (kept + [float(v)])[-4:]
            assert values[:n].tolist() == kept, label


@pytest.mark.parametrize("with_intervals", [False, True])
def test_aligned_offset_equals_the_numpy_alignment(rng, with_intervals):
    from estimators.beats import (TEMPLATE_BEATS, _aligned_offset, _parabolic, _ScanMemory,
                                  beat_params)
    params = beat_params("ppg", 125.0)
    b, a, m = params.align_before, params.align_after, params.align_shift
    period = 100
    u = np.arange(40 * period)
    detect = np.exp(-0.5 * ((u % period - 50) / 6.0) ** 2) + 0.05 * rng.normal(size=len(u))
    intervals = [0.8, 0.82, 0.79] if with_intervals else []
    for label, fn in both(_kernels.aligned_offset):
        memory = _ScanMemory(intervals=list(intervals))
        upstrokes = np.zeros((TEMPLATE_BEATS, b + a + 1))
        n_up, aligned = 0, 0
        # The first beat is too near the start to be aligned (and is not remembered).
        for kk in [20] + list(range(50, len(u) - period, period)):
            expected = _aligned_offset(memory, params, detect, kk)
            got, n_up = fn(detect, kk, b, a, m, upstrokes, n_up, np.array(intervals),
                           len(intervals), params.fs, 0.5, 4)
            assert got == expected, (label, kk)
            aligned += got != _parabolic(detect, kk)
            assert n_up == len(memory.upstrokes)
            np.testing.assert_array_equal(upstrokes[:n_up],
                                          np.reshape(memory.upstrokes, (n_up, b + a + 1)))
        assert n_up == TEMPLATE_BEATS and aligned > 20  # the template was used


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
@pytest.mark.parametrize("limited", [True, False])
def test_beat_front_end_equals_the_filters_one_call_at_a_time(rng, kind, limited):
    # Chunk by chunk, both carrying their states: held samples (NaN, spikes, values
    # beyond MAX_ABS), the three filters, the slope, the last accepted value and the
    # filter and limiter states equal to the last bit.
    import dataclasses

    from estimators.beats import _front_end, beat_initial_state, beat_params
    from estimators.preprocess import MAX_ABS, NO_LIMIT
    fs = 125.0
    params = beat_params(kind, fs)
    if not limited:
        params = dataclasses.replace(params, limiter=NO_LIMIT)
    x = spiky_rhythm(rng, 3000, fs)[1]
    x[700] = 2e100
    start = beat_initial_state(params)
    for label, fn in both(_kernels.beat_front_end):
        state = start
        limiter, zi = start.limiter.copy(), [z.copy() for z in (start.zi_detect,
                                                                start.zi_feature,
                                                                start.zi_level)]
        last_accepted = 0.0
        for lo in range(0, len(x), 97):
            chunk = np.ascontiguousarray(x[lo:lo + 97])
            detect, feature, level, band, held_last, filters = _front_end(state, chunk, params)
            out = [np.empty(len(chunk)) for _ in range(4)]
            last_accepted = fn(chunk, limiter, params.limiter.block, params.limiter.rank,
                               float(params.limiter.margin), MAX_ABS, last_accepted,
                               params.detect_sos, zi[0], params.feature_sos, zi[1],
                               params.level_sos, zi[2], state.last_band, fs, *out)
            np.testing.assert_array_equal(out[0], np.diff(np.concatenate((
                [state.last_band], band))) * fs, err_msg=label)
            if kind == "ppg":
                np.testing.assert_array_equal(out[0], detect, err_msg=label)
            for got, want in zip(out[1:], (band, feature, level)):
                np.testing.assert_array_equal(got, want, err_msg=label)
            assert last_accepted == held_last, label
            for got, want in zip((zi[0], zi[1], zi[2], limiter),
                                 (filters[0], filters[2], filters[3], filters[4])):
                np.testing.assert_array_equal(got, want, err_msg=label)
            state = dataclasses.replace(state, zi_detect=filters[0], zi_integrate=filters[1],
                                        zi_feature=filters[2], zi_level=filters[3],
                                        limiter=filters[4], last_accepted=held_last,
                                        last_band=float(band[-1]))
        assert np.isnan(x).any() and last_accepted == x[np.isfinite(x)][-1]


def test_scan_beats_plain_path_equals_the_compiled_one(rng):
    # The whole scan on the two kinds through detect_step with the plain Python paths of
    # the beat kernels swapped in (the numpy twin comparison is in test_beats.py).
    import estimators.beats as beats_mod
    from tests.beat_signals import ecg_from_beats, sinus_intervals_ms
    names = ("scan_beats", "aligned_offset", "beat_candidates", "numpy_sum", "sorted_copy",
             "upper_quartile", "small_median", "vertex_offset", "remember", "beat_front_end")
    fs = 125.0
    truth = 0.6 + np.cumsum(sinus_intervals_ms(rng, 40)) / 1e3
    x_ecg, t = ecg_from_beats(truth, fs, truth[-1] + 1.0, rng)
    x_ppg = signals.dicrotic_pulse((np.interp(t, truth, np.arange(len(truth)))) % 1.0)
    for kind, x in (("ecg", x_ecg), ("ppg", x_ppg)):
        params = beats_mod.beat_params(kind, fs)
        runs = []
        for plain in (False, True):
            saved = {name: getattr(_kernels, name) for name in names}
            if plain:
                for name in names:
                    setattr(_kernels, name, saved[name].py_func)
            try:
                state, parts = beats_mod.beat_initial_state(params), []
                for k in range(0, len(t), 113):
                    state, got = beats_mod.detect_step(state, x[k:k + 113], t[k:k + 113],
                                                       params)
                    parts.append(got)
            finally:
                for name in names:
                    setattr(_kernels, name, saved[name])
            runs.append(beats_mod.Beats.concat(parts))
        assert len(runs[0]) >= len(truth) - 2
        for field in ("index", "position", "ready", "ready_s", "features", "time_s"):
            np.testing.assert_array_equal(getattr(runs[1], field), getattr(runs[0], field))


# --------------------------------------------------------- the engine without the JIT


SMOKE_RUN = """
import numpy as np
from estimators.monitor import RateMonitor
from tests import signals
rng = np.random.default_rng(7)
fs = 125.0
t = np.arange(int(24 * fs)) / fs
rate = signals.ramp_rate(t, 70.0, 85.0)
x = np.column_stack((signals.rhythm(t, rate, signals.dicrotic_pulse, noise_std=0.3, rng=rng),
                     signals.rhythm(t, rate, signals.ecg_like, noise_std=0.1, rng=rng)))
x[1500:1600, 0] = np.nan
monitor = RateMonitor([("finger", "ppg"), ("chest", "ecg")], fs, "wrist")
est = []
for k in range(0, len(t), 97):
    est += monitor.update(x[k:k + 97], t[k:k + 97])
rows = [[e.source, e.emitted_s, e.rate_per_min, e.confidence, e.quality] for e in est]
"""

SMOKE_WITHOUT_JIT = """
import json
from estimators import _jit, _kernels
assert not _jit.JIT_ENABLED and not hasattr(_kernels.forward_filter, "signatures")
""" + SMOKE_RUN + """
print(json.dumps(rows))
"""


def test_monitor_without_jit_equals_monitor_with_jit(without_jit):
    """The same chunked run in a fresh interpreter with ``RIDGEWATCH_NO_JIT=1``."""
    plain = without_jit(SMOKE_WITHOUT_JIT)
    namespace: dict = {}
    exec(compile(SMOKE_RUN, "smoke", "exec"), namespace)  # noqa: S102 - our own test code
    here = json.loads(json.dumps(namespace["rows"]))  # NaN -> NaN, as the child printed
    assert len(plain) == len(here) > 100
    for a, b in zip(plain, here):
        assert a[:2] == b[:2]
        for x, y in zip(a[2:], b[2:]):
            if np.isnan(x) or np.isnan(y):
                assert np.isnan(x) and np.isnan(y)
            else:
                # no fastmath: compiled and plain paths agree to rounding
                assert x == pytest.approx(y, rel=1e-9, abs=1e-12)


def test_track_channels_is_track_block_per_channel(rng):
    """Several channels in one call: each channel's outputs and posterior are those of
    :func:`track_block` on that channel alone, compiled and plain."""
    rows = [hmm_inputs(rng, 30) for _ in range(3)]
    spectra = np.stack([r[0] for r in rows])
    weights = np.stack([r[2] for r in rows])
    readout = spectra + 0.2 * rng.random(spectra.shape)
    transition = tracker.transition_kernel(1.2)
    args = (transition, 1e-3, 2.0, 1e-2, 5.0, 53.0, 1.5, 0.3, True)
    want = []
    for c in range(3):
        alpha = np.full(N_BINS, 1.0 / N_BINS)
        outs = [np.empty(30) for _ in range(3)]
        _kernels.track_block(spectra[c], readout[c], weights[c], alpha, *args, *outs)
        want.append((alpha, *outs))
    for label, fn in both(_kernels.track_channels):
        alpha = np.full((3, N_BINS), 1.0 / N_BINS)
        outs = [np.empty((3, 30)) for _ in range(3)]
        fn(spectra, readout, weights, alpha, *args, *outs)
        for c in range(3):
            for got, expected in zip((alpha[c], *[o[c] for o in outs]), want[c]):
                np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-15,
                                           err_msg=label)


@pytest.mark.parametrize("kind", ["ppg", "ecg"])
def test_preprocess_channels_is_preprocess_chunk_per_channel(rng, kind):
    """Several channels sharing one chain in one call: each channel's output and state
    are those of :func:`preprocess_chunk` on that channel alone, compiled and plain."""
    fs, decimation, min_run = 125.0, 5, 15
    limiter = Limiter.for_window(8.0, fs)
    chain = design_chain(kind, "hr", fs, fs / decimation)
    post = np.zeros((0, 6)) if chain.post is None else chain.post
    x = np.stack([spiky_rhythm(rng, 3001, fs)[1] for _ in range(3)])
    t = np.arange(3001) / fs
    fixed = (limiter.block, limiter.rank, limiter.margin, MAX_ABS, decimation, float(min_run))
    want = []
    for c in range(3):
        state = initial_state(chain, limiter)
        buf = np.empty((4, 3001 // decimation + 2))
        n = _kernels.preprocess_chunk(x[c], t, chain.pre, state.zi_pre, chain.envelope, post,
                                      state.zi_post, state.scalars, state.limiter, *fixed,
                                      buf[0], buf[1], buf[2], buf[3])
        want.append((buf[:, :n], state))
    for label, fn in both(_kernels.preprocess_channels):
        states = [initial_state(chain, limiter) for _ in range(3)]
        stacked = [np.stack([getattr(s, name) for s in states])
                   for name in ("zi_pre", "zi_post", "scalars", "limiter")]
        out = np.empty((3, 4, 3001 // decimation + 2))
        n = fn(np.ascontiguousarray(x), t, chain.pre, stacked[0], chain.envelope, post,
               stacked[1], stacked[2], stacked[3], *fixed, out)
        for c in range(3):
            np.testing.assert_array_equal(out[c, :, :n], want[c][0], err_msg=label)
            np.testing.assert_array_equal(stacked[2][c], want[c][1].scalars, err_msg=label)
            np.testing.assert_array_equal(stacked[0][c], want[c][1].zi_pre, err_msg=label)
