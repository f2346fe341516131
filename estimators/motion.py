"""Accelerometer-aided suppression of motion in wrist-PPG spectra (exercise profile).

During running, a wrist PPG carries the arm's motion: the step cadence, the arm swing
(half the cadence) and their harmonics, often stronger than the pulse and crossing it.
The accelerometer on the same wrist sees the motion but not the pulse, so it serves as a
*reference*. Each heart-rate column goes through three steps before the tracker; the
STFT columns of the PPG channel and of every accelerometer axis come from the same
band-pass chain and the same hop schedule, so they describe the same windows.

1. **Coherent cancellation** (:func:`cancel_step`). Per frequency bin ``f``, the motion
   part of the PPG column ``X_p(f)`` is modelled as a linear combination of the
   accelerometer columns ``Y_p(f) = (Y_{p,1}(f), ..., Y_{p,K}(f))``: the weights solve
   the exponentially weighted least-squares problem

   .. math::

       w_p(f) = \\arg\\min_w \\sum_{i \\le p} \\lambda^{p - i}
                \\left| X_i(f) - w^T Y_i(f) \\right|^2
              = (R_p + \\delta\\,\\mathrm{tr}(R_p)/K\\, I)^{-1} r_p,

   with ``R_p = sum lambda^(p-i) conj(Y_i) Y_i^T`` and ``r_p = sum lambda^(p-i)
   conj(Y_i) X_i`` (recursive least squares with diagonal loading ``delta``). This is
   the adaptive noise canceller with a reference input (Widrow et al., "Adaptive noise
   cancelling: principles and applications", Proc. IEEE 63(12):1692-1716, 1975) run in
   the frequency domain, one small multi-reference problem per bin (frequency-domain
   adaptive filtering: Shynk, "Frequency-domain and multirate adaptive filtering", IEEE
   Signal Processing Magazine 9(1):14-37, 1992); adaptive cancellation with the
   wrist accelerometer as reference is the common approach for wrist PPG during
   exercise. The fitted part is removed only where the PPG is *coherent* with the
   accelerometer: the multiple coherence ``c = r^H w / sum lambda^(p-i) |X_i|^2`` is
   corrected for the level that ``K`` references reach by chance with ``n`` nearly
   independent windows in the memory, ``c0 = K / n`` (windows half a window apart are
   close to uncorrelated, as in Welch's method with 50 % overlap), rescaled
   ``(c - c0) / (1 - c0)``, and mapped to a gate in [0, 1] between ``gate[0]`` and
   ``gate[1]``:

   .. math:: E_p(f) = X_p(f) - g_p(f)\\, w_p(f)^T Y_p(f).

   The pulse is not phase-locked to the arm, so it is incoherent with the references and
   survives even when it sits within the window's main lobe of the cadence, where a
   magnitude-domain method cannot separate the two (measured on IEEE SPC 2015 record 01
   over 30 s stretches: the cadence line has multiple coherence 0.7-0.94 with the three
   axes; the pulse, 0.17).
2. **Residual motion gain** (:func:`gain_step`). The arm-swing component of the PPG is
   mostly *not* linearly coherent with the accelerometer (multiple coherence 0.3-0.5 in
   the same stretches), so it survives step 1. A Wiener-like gain built from
   time-averaged, peak-normalised spectra attenuates what the accelerometer explains:

   .. math:: G_p(f) = \\bar P_p(f) / (\\bar P_p(f) + \\alpha \\bar A_p(f)),

   ``bar P`` the causal exponential average of the normalised residual magnitude and
   ``bar A`` that of the accelerometer reference: the sum of the axes' normalised
   magnitudes, weighted per bin by ``1 - g_p(f) t_p(f)``; the cleaned magnitude is
   ``C_p = |E_p| / max |E_p| * G_p``. ``t_p(f)`` in [0, 1] is the *trust* in the
   canceller (:func:`expected_pulse`): 1 where the tracker expects the pulse (near the
   mode of its posterior before hop ``p``, and at twice that rate), 0 elsewhere. Near the
   expected pulse, what the canceller removed is gone and the gain stays off, so a pulse
   crossing the cadence keeps its peak (a gain there would carve a notch that splits it
   into two false peaks: on the synthetic crossings of ``tests/estimators/test_motion.py``
   the tracker then follows one of them, 43-83 % of crossing hops within 5 bpm instead
   of 100 %). Everywhere else the gain sees the whole reference, including the lines the
   canceller worked on: motion coupled non-linearly into the PPG (the arm swing at half
   the cadence, measured coherence 0.66-0.81 with a residue of 15-49 % of the PPG's
   magnitude on SPC 2015 record 10) survives the canceller, and when the pulse sits on
   the cadence line (so the canceller removes both) that residue was the strongest
   peak left. With the trust everywhere (the gain off on every cancelled line) the
   tracker locked on it for minutes on record 10 (80-90 bpm while the truth was 155-175,
   AAE 50 bpm); with the trust map, 3.4 bpm and the other records within their spread
   (``python -m bench.exercise_table``). This is a validation gate in the tracking
   sense: evidence is believed where the track predicts it. After Temko, "Accurate heart rate monitoring during physical
   exercises using PPG", IEEE Trans. Biomed. Eng. 64(9):2016-2024, 2017 (cited from
   memory), where Wiener filters from PPG and accelerometer spectra attenuate the
   motion.
3. **Harmonic support** (:func:`harmonic_support`). At rest the PPG's second harmonic
   can outgrow its fundamental (SPC 2015 record 03: 1.0 against 0.8), and the tracker
   then locks on twice the rate. The tracked spectrum is the two-term harmonic sum
   ``H(f) = C(f) + lambda min(kappa C(f), C(2 f))`` (subharmonic summation: Hermes,
   "Measurement of pitch by subharmonic summation", J. Acoust. Soc. Am.
   83(1):257-264, 1988), which favours the fundamental of a pulse whose harmonic is
   present. The harmonic supports a fundamental only up to ``kappa`` times that
   fundamental's own level: with the plain sum ``C(f) + lambda C(2 f)``, half the heart
   rate wins as soon as
   anything there reaches ``1 - lambda`` of the pulse (during running, the arm swing
   sits at about half the rate), and whether record 10 of SPC 2015 locked at half the
   rate for minutes depended on the canceller's memory and on ``lambda`` (held-out AAE
   29 and 65 bpm at grid points next to the shipped one). With the cap the fundamental
   candidate must show a peak of its own; ``kappa`` (1, 1.5 or 2) is chosen by
   cross-validation with the other motion parameters (``python -m bench.exercise_table``;
   with ``kappa = 1`` a resting pulse whose harmonic outgrows its fundamental, record 03,
   doubled more often).

Why not de-shape here. The de-shape filter (:mod:`estimators.deshape`) on the raw
running PPG emphasises the motion's own fundamental (14-22 bpm mean AAE, measured in the
project's findings). Applied *after* steps 1-2 it fixes the doubled rate at rest but,
where motion residue remains, its cepstral rahmonics put weight on half the rate:
measured on SPC 2015 records 01-06 with steps 1-2 followed by de-shape instead of step
3 (gamma 0.2, 0.5, 1): 6.3, 5.5 and 5.9 bpm mean AAE, against 1.45 with the harmonic
sum and 2.06 with neither (``python -m bench.exercise_table``). The exercise profile
therefore tracks ``H``.

The accelerometer's normalised spectrum also marks **motion lines** (:func:`motion_lines`):
bins where the cadence or its harmonics stand far above the accelerometer's median
level. The monitor lowers the confidence of a rate that sits on such a line
(:func:`overlap_confidence`): there the pulse and the motion cannot be told apart from
one window.

With no accelerometer channel the chain reduces to step 3 (the PPG-only reference the
benchmarks compare against).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from estimators._kernels import TINY, cancel_columns
from estimators.errors import ParameterError

@dataclass(frozen=True)
class MotionParams:
    """Fixed parameters of the motion stage of one heart-rate channel (see the module
    docstring for the symbols).

    ``n_bins`` one-sided bins processed (enough for twice the grid's top rate);
    ``band`` the slice of the tracker grid's bins; ``forget`` lambda per hop;
    ``loading`` delta; ``independent_hops`` hops between nearly uncorrelated windows;
    ``gate`` the coherence gate; ``gain_weight`` alpha; ``gain_smoothing`` the weight of
    the newest hop in the gain's averages; ``harmonic_weight`` lambda and
    ``harmonic_cap`` kappa of the harmonic
    sum; ``line_ratio`` where the motion-line mark starts and is full (multiples of the
    accelerometer's median level).
    """

    n_bins: int
    band: slice
    forget: float
    loading: float
    independent_hops: float
    gate: tuple
    gain_weight: float
    gain_smoothing: float
    harmonic_weight: float
    harmonic_cap: float
    line_ratio: tuple

    @property
    def band_bins(self) -> np.ndarray:
        return np.arange(self.band.start, self.band.stop)


def motion_params(settings, band: slice, n_fft: int, hop_s: float) -> MotionParams:
    """Motion parameters from validated :class:`~estimators.config.RateSettings` and the
    path's geometry (grid ``band`` slice, ``n_fft``, ``hop_s``)."""
    n_bins = min(n_fft // 2 + 1, 2 * (band.stop - 1) + 2)
    memory_hops = settings.motion_memory_s / hop_s
    forget = 1.0 - 1.0 / memory_hops if memory_hops > 1.0 else 0.0
    smoothing = 1.0 - math.exp(-hop_s / settings.motion_smoothing_s)
    return MotionParams(
        n_bins=int(n_bins), band=band, forget=forget,
        loading=settings.motion_loading,
        independent_hops=max(1.0, 0.5 * settings.window_s / hop_s),
        gate=tuple(settings.motion_coherence_gate),
        gain_weight=settings.motion_gain, gain_smoothing=smoothing,
        harmonic_weight=settings.harmonic_weight, harmonic_cap=settings.harmonic_cap,
        line_ratio=tuple(settings.motion_line_ratio))


@dataclass
class MotionState:
    """Carried between updates: canceller statistics and the gain's averages."""

    cov: np.ndarray
    cross: np.ndarray
    power: np.ndarray
    count: np.ndarray
    ppg_mean: np.ndarray
    acc_mean: np.ndarray
    hops: int = 0


def initial_state(params: MotionParams, n_refs: int) -> MotionState:
    """Nothing seen: zero statistics (like ``sosfilt_zi`` times 0)."""
    f = params.n_bins - params.band.start  # the canceller works from the band up
    return MotionState(np.zeros((f, n_refs, n_refs), complex), np.zeros((f, n_refs), complex),
                       np.zeros(f), np.zeros(1), np.zeros(params.n_bins),
                       np.zeros(params.n_bins))


def _band_normalised(magnitude: np.ndarray, band: slice) -> np.ndarray:
    """Each hop's magnitude divided by its largest value inside the band."""
    peak = magnitude[:, band].max(axis=1, keepdims=True) if magnitude.shape[1] else 0.0
    return magnitude / np.maximum(peak, TINY)


def reference_magnitude(acc_columns: np.ndarray, band: slice) -> np.ndarray:
    """Sum over axes of each axis's band-normalised magnitude: ``acc_columns`` (P, F, K)
    -> (P, F). Normalising each axis first lets every axis count whatever its units or
    mounting."""
    if acc_columns.shape[2] == 0:
        return np.zeros(acc_columns.shape[:2])
    return sum(_band_normalised(np.abs(acc_columns[:, :, i]), band)
               for i in range(acc_columns.shape[2]))


def cancel_step(state: MotionState, ppg_columns: np.ndarray, acc_columns: np.ndarray,
                params: MotionParams) -> tuple[MotionState, np.ndarray, np.ndarray]:
    """Step 1: remove the accelerometer-coherent part of the PPG columns.

    Parameters
    ----------
    state : carried statistics (updated in place and returned).
    ppg_columns : (P, F) complex, ``F = params.n_bins``.
    acc_columns : (P, F, K) complex; ``K = 0`` leaves the columns unchanged.

    Returns
    -------
    (state, residual columns (P, F) complex, gate (P, F) in [0, 1]: how much of the
    fitted motion was removed in each bin).
    """
    out = np.array(ppg_columns, dtype=np.complex128)
    gate = np.zeros(out.shape)
    if acc_columns.shape[2] == 0 or len(out) == 0 or params.forget == 0.0:
        return state, out, gate
    # Bins below the band are never read (neither as rates nor as harmonics): skip them.
    lo = params.band.start
    x = np.ascontiguousarray(out[:, lo:])
    residual = np.empty_like(x)
    opened = np.empty(x.shape)
    cancel_columns(state.cov, state.cross, state.power, state.count, x,
                   np.ascontiguousarray(acc_columns[:, lo:, :], dtype=np.complex128),
                   params.forget, params.loading, params.independent_hops,
                   float(params.gate[0]), float(params.gate[1]), residual, opened)
    out[:, lo:] = residual
    gate[:, lo:] = opened
    return state, out, gate


def _running_mean(values: np.ndarray, last: np.ndarray, weight: float) -> np.ndarray:
    """Causal exponential average over hops ``m_p = (1 - a) m_{p-1} + a v_p`` from
    ``last``; returns all hops' means (P, F)."""
    out = np.empty_like(values)
    mean = last
    for p in range(len(values)):  # a few hops per call: a loop beats lfilter's set-up
        mean = (1.0 - weight) * mean + weight * values[p]
        out[p] = mean
    return out


def gain_step(state: MotionState, residual_magnitude: np.ndarray, reference: np.ndarray,
              params: MotionParams) -> tuple[MotionState, np.ndarray]:
    """Step 2: the Wiener-like gain; returns the cleaned magnitude (P, F) normalised to
    a band peak of 1 (with ``gain_weight = 0`` the gain is 1). ``reference`` (P, F) is
    the accelerometer magnitude the gain is built from."""
    cleaned = _band_normalised(residual_magnitude, params.band)
    if len(cleaned) == 0:
        return state, cleaned
    ppg_mean = _running_mean(cleaned, state.ppg_mean, params.gain_smoothing)
    acc_mean = _running_mean(reference, state.acc_mean, params.gain_smoothing)
    state.ppg_mean, state.acc_mean = ppg_mean[-1].copy(), acc_mean[-1].copy()
    if params.gain_weight > 0:
        cleaned = cleaned * ppg_mean / np.maximum(ppg_mean + params.gain_weight * acc_mean,
                                                  TINY)
    return state, _band_normalised(cleaned, params.band)


def harmonic_support(magnitude: np.ndarray, params: MotionParams) -> np.ndarray:
    """Step 3: ``H(f) = C(f) + lambda min(kappa C(f), C(2 f))`` on the band's bins,
    peak-normalised: (P, F) -> (P, band bins).

    Examples
    --------
    A pulse whose second harmonic (bin 40) outgrows its fundamental (bin 20):

    >>> from estimators.config import RateSettings
    >>> params = motion_params(RateSettings(motion=True), slice(10, 30), 128, 0.25)
    >>> magnitude = np.zeros((1, params.n_bins))
    >>> magnitude[0, 20], magnitude[0, 40] = 0.8, 1.0
    >>> int(np.argmax(harmonic_support(magnitude, params)[0])) + 10
    20
    """
    bins = params.band_bins
    out = magnitude[:, bins].copy()
    if params.harmonic_weight > 0:
        double = 2 * bins
        inside = double < magnitude.shape[1]
        out[:, inside] += params.harmonic_weight * np.minimum(
            params.harmonic_cap * magnitude[:, bins[inside]], magnitude[:, double[inside]])
    return _band_normalised(out, slice(0, out.shape[1]))


def expected_pulse(posterior: np.ndarray, halfwidth_bins: float) -> np.ndarray:
    """Where the tracker expects the pulse, in [0, 1] per band bin: the posterior
    divided by its largest value, then the largest value within ``halfwidth_bins`` on
    either side (a running maximum), so the whole confidence interval around each mode
    counts. ``posterior`` (F,) or (P, F) -> (P, F).

    >>> expected_pulse(np.array([0.0, 0.1, 0.8, 0.1, 0.0, 0.0]), 1.0).round(3).tolist()
    [[0.125, 1.0, 1.0, 1.0, 0.125, 0.0]]
    """
    posterior = np.atleast_2d(np.asarray(posterior, dtype=np.float64))
    peak = posterior.max(axis=1, keepdims=True)
    relative = np.where(peak > 0, posterior / np.where(peak > 0, peak, 1.0), 0.0)
    radius = int(round(halfwidth_bins))
    if radius > 0 and relative.shape[1]:
        relative = ndimage.maximum_filter1d(relative, size=2 * radius + 1, axis=1,
                                            mode="constant", cval=0.0)
    return relative


def trust_map(expected: np.ndarray | None, n_hops: int, params: MotionParams) -> np.ndarray:
    """Trust in the canceller per one-sided bin (P, n_bins): ``expected`` (P, band bins)
    placed on the band's bins and on their doubles (the pulse's second harmonic);
    ``None`` trusts nowhere (the gain then sees the whole reference)."""
    trust = np.zeros((n_hops, params.n_bins))
    if expected is None:
        return trust
    expected = np.asarray(expected, dtype=np.float64)
    if expected.shape != (n_hops, len(params.band_bins)):
        raise ParameterError(f"expected.shape={expected.shape} must be "
                             f"({n_hops}, {len(params.band_bins)})")
    bins = params.band_bins
    inside = bins < params.n_bins
    trust[:, bins[inside]] = expected[:, inside]
    double = 2 * bins
    inside = double < params.n_bins
    trust[:, double[inside]] = np.maximum(trust[:, double[inside]], expected[:, inside])
    return trust


def motion_lines(reference_mean: np.ndarray, params: MotionParams) -> np.ndarray:
    """Motion-line mark per band bin in [0, 1] (P, band bins): 0 below ``line_ratio[0]``
    times the accelerometer's median band level, 1 above ``line_ratio[1]`` times it."""
    band = reference_mean[:, params.band]
    if band.shape[1] == 0 or len(band) == 0:
        return np.zeros(band.shape)
    median = np.median(band, axis=1, keepdims=True)
    ratio = band / np.maximum(median, TINY)
    low, high = params.line_ratio
    marks = np.clip((ratio - low) / (high - low), 0.0, 1.0)
    return np.where(median > 0, marks, 0.0)


def overlap_confidence(confidence: np.ndarray, rate_per_min: np.ndarray,
                       lines: np.ndarray, rates_grid: np.ndarray,
                       penalty: float) -> np.ndarray:
    """Confidence lowered where the rate sits on a motion line:
    ``confidence * (1 - penalty * mark(rate))``, the mark read at the rate's nearest
    grid bin (NaN rates keep their confidence)."""
    confidence = np.asarray(confidence, dtype=np.float64)
    if penalty <= 0 or len(confidence) == 0:
        return confidence
    step = rates_grid[1] - rates_grid[0]
    position = np.round((np.asarray(rate_per_min) - rates_grid[0]) / step)
    valid = np.isfinite(position)
    index = np.clip(np.where(valid, position, 0), 0, lines.shape[1] - 1).astype(np.int64)
    marks = np.where(valid, lines[np.arange(len(index)), index], 0.0)
    return confidence * (1.0 - penalty * marks)


class MotionSuppressor:
    """Owns the motion stage's state for one heart-rate channel.

    ``update(ppg_columns, acc_columns, expected) -> (spectra, lines)``: ``ppg_columns``
    (P, n_fft // 2 + 1) and ``acc_columns`` (P, n_fft // 2 + 1, K) complex STFT columns
    of the same hops, ``expected`` (P, band bins) where the tracker expects the pulse at
    each hop (:func:`expected_pulse` of its posterior before the hop; ``None``: nowhere);
    returns the tracked band spectra (P, band bins) and the motion-line marks (P, band
    bins). Given ``expected``, the result does not depend on how the hops are split
    between calls.

    Parameters
    ----------
    settings : the heart-rate :class:`~estimators.config.RateSettings`.
    band : slice of the tracker grid's bins.
    n_fft : FFT length of the columns.
    n_refs : number of accelerometer axes (0: harmonic support only).
    """

    def __init__(self, settings, band: slice, n_fft: int, n_refs: int):
        if n_refs < 0:
            raise ParameterError(f"n_refs={n_refs} must be >= 0")
        self.params = motion_params(settings, band, n_fft, settings.hop_s)
        self.n_refs = int(n_refs)
        self.reset()

    def reset(self) -> None:
        self.state = initial_state(self.params, self.n_refs)

    def update(self, ppg_columns: np.ndarray, acc_columns: np.ndarray | None = None,
               expected: np.ndarray | None = None):
        n = self.params.n_bins
        ppg_columns = np.asarray(ppg_columns)[:, :n]
        if acc_columns is None:
            acc_columns = np.zeros((len(ppg_columns), n, 0), complex)
        acc_columns = np.asarray(acc_columns)[:, :n, :]
        if acc_columns.shape[2] != self.n_refs or len(acc_columns) != len(ppg_columns):
            raise ParameterError(
                f"acc_columns.shape={acc_columns.shape} must be ({len(ppg_columns)}, F, "
                f"{self.n_refs})")
        self.state, residual, gate = cancel_step(self.state, ppg_columns, acc_columns,
                                                 self.params)
        reference = reference_magnitude(acc_columns, self.params.band)
        trust = trust_map(expected, len(ppg_columns), self.params)
        self.state, cleaned = gain_step(self.state, np.abs(residual),
                                        reference * (1.0 - gate * trust), self.params)
        self.state.hops += len(ppg_columns)
        return harmonic_support(cleaned, self.params), motion_lines(reference, self.params)


@dataclass(frozen=True, eq=False)
class MotionStage:
    """Stage (:mod:`estimators.stage`) of the motion suppression of one heart-rate
    channel: input ``(ppg_columns (P, F), acc_columns (P, F, K), expected (P, band
    bins) or None)`` as :meth:`MotionSuppressor.update` takes them, output ``(spectra,
    lines)`` (P, band bins) each, state :class:`MotionState`. The same computation as
    :class:`MotionSuppressor` (which owns a state of this stage), on a copy of the
    state. Given the expected pulse per hop the stage is a function of its hops, so its
    batch is one step over the whole record from the initial state."""

    params: MotionParams
    n_refs: int

    def initial_state(self) -> MotionState:
        return initial_state(self.params, self.n_refs)

    def step(self, state: MotionState, x) -> tuple[MotionState, tuple]:
        suppressor = MotionSuppressor.__new__(MotionSuppressor)
        suppressor.params, suppressor.n_refs = self.params, self.n_refs
        suppressor.state = MotionState(*(np.array(getattr(state, name)) for name in (
            "cov", "cross", "power", "count", "ppg_mean", "acc_mean")), state.hops)
        out = suppressor.update(*x)
        return suppressor.state, out

    def batch(self, x) -> tuple:
        return self.step(self.initial_state(), x)[1]

    def split(self, x, bounds) -> list:
        edges = [0, *[int(b) for b in bounds], len(x[0])]
        return [tuple(None if a is None else a[lo:hi] for a in x)
                for lo, hi in zip(edges[:-1], edges[1:])]

    def join(self, parts) -> tuple:
        return tuple(np.concatenate([p[i] for p in parts]) for i in range(2))
