"""The de-shape filter: soft-log cepstrum, lifter, inverse-quefrency mapping.

Notes
-----
Lin, Su & Wu, "Wave-shape function analysis: when cepstrum meets time-frequency
analysis", J. Fourier Anal. Appl. 24:451-505 (2018). For a column ``V(f)`` of the STFT
on the one-sided grid ``f_j = j fs_a / n_fft``:

.. math::

    C(q) = \\mathcal{F}^{-1}\\{ |V|^{\\gamma} \\}(q), \\qquad
    U(f) = \\max(C(1/f), 0)\\,\\mathbb{1}[1/f_{hi} \\le 1/f \\le 1/f_{lo}], \\qquad
    W(f) = |V(f)|\\, U(f).

The soft log ``|V|**gamma`` (0 < gamma <= 1) stands in for ``log|V|`` so that near-zero
bins do not dominate. A non-cosine oscillation of fundamental ``f0`` has harmonics at
``k f0`` in ``|V|`` and peaks at periods ``k / f0`` in ``C``, which map to ``f0 / k``
in ``U``; only ``f0`` is common to both, so the product keeps the fundamental and
suppresses the harmonics and the wave-shape. The lifter keeps only quefrencies whose
periods are plausible for the band.

Synchrosqueezing (Daubechies, Lu & Wu, "Synchrosqueezed wavelet transforms: an
empirical mode decomposition-like tool", ACHA 30(2), 2011; for the STFT: Thakur & Wu,
SIAM J. Math. Anal. 2011) optionally sharpens ``|V|`` first: each bin's magnitude moves
to its reassigned frequency
``f_hat = f - fs_a / (2 pi) * Im(V_dw(f) / V(f))`` where ``V_dw`` uses the window's
derivative.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from estimators import _kernels
from estimators.stft import fft_rows


@dataclass(frozen=True)
class DeshapeGrid:
    """Precomputed mapping from the cepstrum to the band's frequency bins.

    ``band`` is the slice of one-sided bins inside the band; ``q_index`` (float, per
    band bin) is the quefrency sample ``fs_a / f`` at which the cepstrum is read.
    """

    fs_analysis: float
    n_fft: int
    band: slice
    freqs_hz: np.ndarray
    q_low: np.ndarray
    q_weight: np.ndarray

    @property
    def rates_per_min(self) -> np.ndarray:
        return 60.0 * self.freqs_hz


def make_grid(fs_analysis: float, n_fft: int, band_hz: tuple) -> DeshapeGrid:
    """The band's bins and their inverse-quefrency read-out positions."""
    step = fs_analysis / n_fft
    lo = int(np.ceil(band_hz[0] / step))
    hi = int(np.floor(band_hz[1] / step))
    band = slice(lo, hi + 1)
    freqs = np.arange(lo, hi + 1) * step
    q = fs_analysis / freqs  # quefrency in samples: period * fs_a
    q_low = np.floor(q).astype(np.int64)
    q_low = np.minimum(q_low, n_fft - 2)
    return DeshapeGrid(fs_analysis, n_fft, band, freqs, q_low, q - q_low)


def squeeze(spectra: np.ndarray, spectra_dw: np.ndarray, n_fft: int) -> np.ndarray:
    """Synchrosqueezed magnitudes of ``spectra`` (P, F) using derivative-window
    columns. Bins whose magnitude is negligible are left out of the reassignment."""
    mag = np.abs(spectra)
    with np.errstate(divide="ignore", invalid="ignore"):
        shift_bins = np.imag(spectra_dw / spectra) * n_fft / (2.0 * np.pi)
    # For a tone at bin f0 the derivative theorem gives Im(V_dw / V) = 2 pi (f - f0) / n_fft,
    # so the tone's own bin is f - shift (the sign of f_hat in the module notes).
    target = np.arange(spectra.shape[1]) - shift_bins
    small = mag < 1e-8 * (mag.max(axis=1, keepdims=True) + 1e-300)
    target[small] = np.nan
    out = np.empty_like(mag)
    for p in range(mag.shape[0]):
        _kernels.squeeze_column(np.ascontiguousarray(mag[p]), np.ascontiguousarray(target[p]),
                                out[p])
    return out


def deshape(magnitude: np.ndarray, grid: DeshapeGrid, gamma: float) -> np.ndarray:
    """De-shape spectra of one-sided magnitudes ``(P, n_fft // 2 + 1)``, restricted to
    the band: returns ``(P, len(grid.freqs_hz))``, non-negative.

    Examples
    --------
    >>> import numpy as np
    >>> fs, n_fft = 25.0, 1024
    >>> grid = make_grid(fs, n_fft, (0.7, 3.0))
    >>> t = np.arange(200) / fs
    >>> pulse = np.exp(-((t * 1.5) % 1.0 - 0.3) ** 2 / 0.002)    # sharp pulses at 1.5 Hz
    >>> mag = np.abs(np.fft.rfft((pulse - pulse.mean()) * np.hanning(200), n_fft))
    >>> w = deshape(mag[None, :], grid, 0.2)[0]
    >>> round(float(grid.freqs_hz[np.argmax(w)]), 1)
    1.5
    """
    magnitude = np.atleast_2d(magnitude)
    soft = magnitude ** gamma
    cepstrum = fft_rows(np.fft.irfft, soft, grid.n_fft)
    lo = cepstrum[:, grid.q_low]
    hi = cepstrum[:, grid.q_low + 1]
    u = (1.0 - grid.q_weight) * lo + grid.q_weight * hi
    np.maximum(u, 0.0, out=u)
    return magnitude[:, grid.band] * u


def plain(magnitude: np.ndarray, grid: DeshapeGrid) -> np.ndarray:
    """The band of the plain STFT magnitude (what de-shape is compared against)."""
    return np.atleast_2d(magnitude)[:, grid.band]
