"""Sliding STFT: columns against scipy's ShortTimeFFT and an explicit-loop twin;
streaming equals batch after every update, whatever the chunking."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.signal import ShortTimeFFT, get_window

from estimators.errors import ParameterError
from estimators.stft import (SlidingSTFT, analysis_window, batch_hop_count, hop_counts,
                             stft_batch, stft_blocks)
from tests.reference import stft_loop

FS = 25.0
# Rounding only: the same sums in a different order (batched vs single-row FFTs) agree
# to a few ulps of the column's largest value; 1e-12 of it leaves room for n_fft ~ 1e3.
RTOL = 1e-12


def assert_columns_equal(got, want, label=""):
    """Compare two column sets field by field (``want`` a Columns or a dict)."""
    get = (lambda k: want[k]) if isinstance(want, dict) else (lambda k: getattr(want, k))
    scale = max(1.0, float(np.max(np.abs(get("spectra")), initial=0.0)))
    np.testing.assert_allclose(got.spectra, get("spectra"), rtol=0, atol=RTOL * scale,
                               err_msg=f"spectra {label}")
    if get("spectra_dw") is not None:
        scale_dw = max(1.0, float(np.max(np.abs(get("spectra_dw")), initial=0.0)))
        np.testing.assert_allclose(got.spectra_dw, get("spectra_dw"), rtol=0,
                                   atol=RTOL * scale_dw, err_msg=f"spectra_dw {label}")
    np.testing.assert_array_equal(got.first_count, get("first_count"), err_msg=label)
    np.testing.assert_array_equal(got.last_count, get("last_count"), err_msg=label)
    np.testing.assert_allclose(got.time_s, get("time_s"), rtol=0, atol=1e-12, err_msg=label)
    np.testing.assert_allclose(got.emitted_s, get("emitted_s"), rtol=0, atol=1e-12,
                               err_msg=label)


def concat_columns(parts):
    """Stack the fields of several Columns (for cumulative comparisons)."""
    out = SimpleNamespace(**{name: np.concatenate([getattr(p, name) for p in parts])
                             for name in ("spectra", "time_s", "emitted_s", "first_count",
                                          "last_count")})
    dws = [p.spectra_dw for p in parts]
    out.spectra_dw = None if dws[0] is None else np.concatenate(dws)
    return out


def prefix(columns, n):
    return {
        "spectra": columns.spectra[:n],
        "spectra_dw": None if columns.spectra_dw is None else columns.spectra_dw[:n],
        "time_s": columns.time_s[:n],
        "emitted_s": columns.emitted_s[:n],
        "first_count": columns.first_count[:n],
        "last_count": columns.last_count[:n],
    }


def random_chunks(rng, n, high=40, ones=True):
    """Chunk sizes covering ``n`` samples: a run of 1-sample chunks, then random sizes
    in [1, high] (most not multiples of any hop used here)."""
    sizes = [1] * min(n, 17) if ones else []
    while sum(sizes) < n:
        sizes.append(int(rng.integers(1, high + 1)))
    sizes[-1] -= sum(sizes) - n
    return [s for s in sizes if s > 0]


# ----------------------------------------------------------------- window and schedule


def test_analysis_window_is_periodic_hann_with_unit_sum():
    for length in (4, 51, 200):
        w, dw = analysis_window(length)
        np.testing.assert_allclose(w.sum(), 1.0, rtol=1e-14)
        hann = get_window("hann", length, fftbins=True)
        np.testing.assert_allclose(w, hann / hann.sum(), rtol=1e-13, atol=1e-16)
        np.testing.assert_allclose(w, stft_loop.periodic_hann(length), rtol=1e-12, atol=1e-16)
        np.testing.assert_allclose(dw, stft_loop.periodic_hann_derivative(length),
                                   rtol=1e-12, atol=1e-16)


def test_window_derivative_matches_central_difference():
    # The derivative of the continuous Hann in n, sampled: its central difference on a
    # fine grid converges to it (error O(h^2)).
    length = 64
    _, dw = analysis_window(length)
    hann = get_window("hann", length, fftbins=True)
    h = 1e-4
    n = np.arange(length)
    cont = lambda v: 0.5 - 0.5 * np.cos(2 * np.pi * v / length)  # noqa: E731
    numeric = (cont(n + h) - cont(n - h)) / (2 * h) / hann.sum()
    np.testing.assert_allclose(dw, numeric, rtol=0, atol=1e-9)


@pytest.mark.parametrize("hop_samples", [1.0, 5.0, 6.25, 2.1, 7.3333])
def test_hop_counts_partition_the_schedule(rng, hop_samples):
    n = 400
    want = stft_loop.hop_schedule(n, hop_samples)
    got, before = [], 0
    for size in random_chunks(rng, n):
        got.extend(hop_counts(before, before + size, hop_samples).tolist())
        before += size
    assert got == want
    assert hop_counts(0, n, hop_samples).tolist() == want


# --------------------------------------------------------------- against references


@pytest.mark.parametrize("window,hop,n_fft", [(100, 5, 256), (64, 8, 64), (160, 10, 512)])
def test_column_equals_scipy_short_time_fft(rng, window, hop, n_fft):
    """Our column for hop ``p`` is ShortTimeFFT's slice whose samples are the same
    ``x[c_p - m : c_p]``: ShortTimeFFT slice ``q`` starts at ``q * hop - m_num_mid``,
    so ``q = (c_p - m + m_num_mid) / hop``.

    With ``phase_shift=None`` ShortTimeFFT takes the FFT of the windowed slice as is,
    like us, so the complex values agree. With its default ``phase_shift=0`` it puts
    the window centre at phase zero; then ours is its value times
    ``exp(-2 pi i f m_num_mid / n_fft)`` (a pure linear phase, same magnitude).
    """
    x = rng.standard_normal(600)
    t = np.arange(len(x)) / FS
    ours = stft_batch(x, t, window, window, float(hop), n_fft)
    w, _ = analysis_window(window)
    assert len(ours) > 10
    f = np.arange(n_fft // 2 + 1)
    for phase_shift in (None, 0):
        sft = ShortTimeFFT(w, hop, FS, mfft=n_fft, phase_shift=phase_shift)
        full = sft.stft(x)  # (bins, slices from p_min)
        for p in range(len(ours)):
            start = int(ours.last_count[p]) - window
            assert (start + sft.m_num_mid) % hop == 0
            q = (start + sft.m_num_mid) // hop
            theirs = full[:, q - sft.p_min]
            if phase_shift is not None:
                theirs = theirs * np.exp(-2j * np.pi * f * sft.m_num_mid / n_fft)
            np.testing.assert_allclose(ours.spectra[p], theirs, rtol=0,
                                       atol=1e-13 * np.abs(theirs).max())


@pytest.mark.parametrize("window,min_window,hop,n_fft",
                         [(100, 100, 6.25, 256), (100, 40, 2.5, 128), (37, 10, 3.3, 64),
                          (20, 2, 1.0, 32)])
def test_batch_equals_explicit_loop(rng, window, min_window, hop, n_fft):
    n = 300
    x = rng.standard_normal(n)
    t = 100.0 + np.cumsum(rng.uniform(0.03, 0.05, n))  # irregular: times are carried
    want = stft_loop.stft_columns(x, t, window, min_window, hop, n_fft, with_derivative=True)
    got = stft_batch(x, t, window, min_window, hop, n_fft, with_derivative=True)
    assert len(got) == len(want["time_s"]) > 0
    assert_columns_equal(got, want, "batch vs loop")
    # growing window: the first column uses exactly min(m, c) >= m_min samples
    lengths = got.last_count - got.first_count
    assert lengths.min() >= min_window
    assert lengths.max() == min(window, int(got.last_count.max()))


def test_column_times_are_window_centre_and_newest_sample(rng):
    n, window = 200, 50
    t = np.cumsum(rng.uniform(0.03, 0.05, n))  # irregular on purpose
    cols = stft_batch(rng.standard_normal(n), t, window, window, 7.0, 64)
    for p in range(len(cols)):
        used = t[cols.first_count[p]:cols.last_count[p]]
        assert cols.emitted_s[p] == used[-1]
        assert cols.time_s[p] == pytest.approx(0.5 * (used[0] + used[-1]), abs=1e-12)


# ----------------------------------------------------------- streaming equals batch


@pytest.mark.parametrize("window,min_window,hop,with_dw",
                         [(100, 100, 6.25, False), (100, 30, 2.5, True), (25, 5, 1.0, False),
                          (60, 60, 13.7, True)])
def test_streaming_equals_batch_after_every_update(rng, window, min_window, hop, with_dw):
    n, n_fft = 700, 128
    x = rng.standard_normal(n)
    t = np.arange(n) / FS
    batch = stft_batch(x, t, window, min_window, hop, n_fft, with_dw)
    sliding = SlidingSTFT(window, min_window, hop, n_fft, with_dw)
    parts, k = [], 0
    for size in random_chunks(rng, n, high=3 * window):
        parts.append(sliding.update(x[k:k + size], t[k:k + size]))
        k += size
        so_far = concat_columns(parts)
        n_done = int(np.sum(batch.last_count <= k))
        assert len(so_far.time_s) == n_done
        assert_columns_equal(so_far, prefix(batch, n_done), f"after {k} samples")
    assert sliding.count == n
    assert len(concat_columns(parts).time_s) == len(batch)


@pytest.mark.parametrize("window,min_window,hop,recent",
                         [(100, 100, 6.25, 50), (100, 30, 2.5, 40), (60, 20, 13.7, 60)])
def test_recent_columns_streaming_batch_and_explicit_loop(rng, window, min_window, hop,
                                                          recent):
    # The end-weighted column of the newest samples: the live update after every chunk,
    # the batch twin and the explicit DFT loop agree (start-up frames shorter than
    # ``recent`` use the whole frame); the full columns are unchanged by asking for it.
    n, n_fft = 500, 128
    x = rng.standard_normal(n)
    t = np.arange(n) / FS
    want = stft_loop.recent_columns(x, window, min_window, hop, n_fft, recent)
    batch = stft_batch(x, t, window, min_window, hop, n_fft, recent_samples=recent)
    np.testing.assert_allclose(batch.recent, want, rtol=0, atol=1e-12)
    assert_columns_equal(batch, stft_batch(x, t, window, min_window, hop, n_fft))
    assert stft_batch(x, t, window, min_window, hop, n_fft).recent is None
    sliding = SlidingSTFT(window, min_window, hop, n_fft, recent_samples=recent)
    got, k = [], 0
    for size in random_chunks(rng, n, high=2 * window):
        got.append(sliding.update(x[k:k + size], t[k:k + size]).recent)
        k += size
        so_far = np.concatenate(got)
        np.testing.assert_allclose(so_far, want[:len(so_far)], rtol=0, atol=1e-12,
                                   err_msg=f"after {k} samples")
    assert len(np.concatenate(got)) == len(want)
    blocks = stft_blocks(x, t, window, min_window, hop, n_fft, block_hops=7,
                         recent_samples=recent)
    np.testing.assert_array_equal(np.concatenate([b.recent for b in blocks]), batch.recent)


def test_recent_column_peaks_at_the_newest_rate():
    # A tone that changes frequency 2 s before the end: the 2 s end-weighted column
    # peaks at the new frequency, the 8 s column still at the old one.
    t = np.arange(int(16 * FS)) / FS
    f = np.where(t < 14.0, 1.0, 2.0)
    x = np.sin(2 * np.pi * np.cumsum(f) / FS)
    columns = stft_batch(x, t, int(8 * FS), int(8 * FS), 0.25 * FS, 512,
                         recent_samples=int(2 * FS))
    freqs = np.fft.rfftfreq(512, 1 / FS)
    assert freqs[np.argmax(np.abs(columns.spectra[-1]))] == pytest.approx(1.0, abs=0.05)
    assert freqs[np.argmax(np.abs(columns.recent[-1]))] == pytest.approx(2.0, abs=0.05)


@pytest.mark.parametrize("block_hops", [1, 3, 50, 10 ** 6])
def test_blocks_are_the_batch_columns(rng, block_hops):
    # The blocks, one after the other, are the columns of the one-call batch twin.
    n, window, hop = 700, 60, 5.5
    x = rng.standard_normal(n)
    t = np.arange(n) / FS
    aux = (np.cumsum(rng.random(n)),)
    whole = stft_batch(x, t, window, 20, hop, 128, True, aux)
    blocks = list(stft_blocks(x, t, window, 20, hop, 128, True, aux, block_hops))
    assert [len(b) for b in blocks[:-1]] == [block_hops] * (len(blocks) - 1)
    assert sum(len(b) for b in blocks) == len(whole) == batch_hop_count(n, 20, hop)
    got = concat_columns(blocks)
    for name in ("spectra", "spectra_dw", "time_s", "emitted_s", "first_count", "last_count"):
        np.testing.assert_array_equal(getattr(got, name), getattr(whole, name), name)
    np.testing.assert_array_equal(np.concatenate([b.aux_last for b in blocks], axis=1),
                                  whole.aux_last)
    np.testing.assert_array_equal(np.concatenate([b.aux_before for b in blocks], axis=1),
                                  whole.aux_before)
    assert list(stft_blocks(x[:10], t[:10], window, 20, hop, 128)) == []


def test_blocks_refuse_an_empty_block():
    with pytest.raises(ParameterError, match=r"^block_hops=0 must be >= 1$"):
        list(stft_blocks(np.zeros(20), np.arange(20.0), 10, 5, 2.0, 16, block_hops=0))


def test_empty_update_and_reset(rng):
    sliding = SlidingSTFT(20, 10, 2.0, 32, with_derivative=True)
    empty = sliding.update(np.empty(0), np.empty(0))
    assert len(empty) == 0
    assert empty.spectra.shape == (0, 17) and empty.spectra_dw.shape == (0, 17)
    x = rng.standard_normal(50)
    t = np.arange(50) / FS
    first = sliding.update(x, t)
    sliding.reset()
    again = sliding.update(x, t)
    assert_columns_equal(again, prefix(first, len(first)), "after reset")


# ------------------------------------------------------------------ parameter errors


def test_parameter_errors():
    with pytest.raises(ParameterError, match=r"^recent_samples=1 must be 0 or in \[2, 10\]$"):
        SlidingSTFT(10, 5, 1.0, 16, recent_samples=1)
    with pytest.raises(ParameterError, match=r"^recent_samples=11 must be 0 or in \[2, 10\]$"):
        stft_batch(np.zeros(20), np.arange(20.0), 10, 5, 1.0, 16, recent_samples=11)
    with pytest.raises(ParameterError, match=r"min_window_samples=1 must be in \[2, 10\]"):
        SlidingSTFT(10, 1, 1.0, 16)
    with pytest.raises(ParameterError, match=r"min_window_samples=11 must be in \[2, 10\]"):
        SlidingSTFT(10, 11, 1.0, 16)
    with pytest.raises(ParameterError, match=r"n_fft=8 must be >= window_samples=10"):
        SlidingSTFT(10, 5, 1.0, 8)
    with pytest.raises(ParameterError, match=r"hop_samples=0.0 must be > 0"):
        SlidingSTFT(10, 5, 0.0, 16)
    with pytest.raises(ParameterError, match=r"hop_samples=0.0 must be > 0"):
        stft_batch(np.zeros(20), np.arange(20.0), 10, 5, 0.0, 16)
