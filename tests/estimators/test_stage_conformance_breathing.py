"""Breathing from the pulse as a composition of stages: the conformance checks of
:mod:`tests.stage_checks` over every stage of :func:`estimators.respiration.
pulse_breathing_chain` and over the composed path, and its compiled kernels against
their plain paths and their numpy twins.

Each stage's ``batch`` is its plain numpy twin (scipy filters, the sliding-STFT batch,
the tracker's numpy path, the numpy quality and fusion), while ``step`` runs the
compiled kernels, so the batch-parity check of :func:`check_all` is also the parity of
every per-hop kernel with its batch twin. Inputs are synthetic pulses (our own
constructions, :func:`tests.estimators.test_respiration.synthetic_pulse`) kept short.
"""

from __future__ import annotations

import dataclasses
import functools

import numpy as np
import pytest

from estimators import _kernels
from estimators import breathing_confidence as B
from estimators import respiration as R
from estimators import tracker as tracker_mod
from estimators.calibration import PROB_CEIL, PROB_FLOOR
from estimators.config import BREATHING_FROM_PULSE
from estimators.stage import join_arrays, run_chunks, split_arrays
from tests.estimators.test_respiration import FS, synthetic_pulse
from tests.stage_checks import assert_same, check_all, check_without_jit

MODULE = "tests.estimators.test_stage_conformance_breathing"
LAGGED = dataclasses.replace(BREATHING_FROM_PULSE, lag_hops=3)
DESHAPED = dataclasses.replace(BREATHING_FROM_PULSE, deshape=True, modulation_tilt=0.0,
                               harmonic_weight=0.0)
"""Variants that take the other branches: fixed-lag smoothing; de-shape band spectra
with no tilt and no harmonic support."""


@functools.lru_cache(maxsize=None)
def _record(kind: str, duration_s: float = 40.0):
    """A pulse with breathing at 18 per minute in its amplitude and a 1.6 s dropout
    (NaN), so gaps, held samples and lowered integrity are exercised."""
    t, x, _ = synthetic_pulse(kind, 85, 18, "amplitude", duration_s=duration_s)
    x = x.copy()
    x[3000:3200] = np.nan
    return x, t


@functools.lru_cache(maxsize=None)
def _chain(kind: str, settings=BREATHING_FROM_PULSE):
    return R.pulse_breathing_chain(kind, settings, FS)


@functools.lru_cache(maxsize=None)
def _upstream(kind: str, settings, n_stages: int):
    """The batch output of the chain's first ``n_stages`` stages on the record."""
    y = _record(kind)
    for stage in _chain(kind, settings).stages[:n_stages]:
        y = stage.batch(y)
    return y


def _case(kind: str, index: int, settings=BREATHING_FROM_PULSE):
    return _chain(kind, settings).stages[index], _upstream(kind, settings, index)


# One case per stage (the first on both kinds), the variants, and the whole path.
def beats_ppg_case():
    return _chain("ppg").stages[0], _record("ppg", 20.0)


def beats_ecg_case():
    return _chain("ecg").stages[0], _record("ecg", 20.0)


def resampling_case():
    return _case("ppg", 1)


def spectra_case():
    return _case("ecg", 2)


def spectra_deshape_case():
    return _case("ppg", 2, DESHAPED)


def trackers_case():
    return _case("ppg", 3)


def trackers_lag_case():
    return _case("ecg", 3, LAGGED)


def quality_case():
    return _case("ppg", 4)


def fusion_case():
    return _case("ecg", 5)


def chain_ppg_case():
    return _chain("ppg"), _record("ppg")


def chain_ecg_lag_case():
    return _chain("ecg", LAGGED), _record("ecg")


STAGE_CASES = [beats_ppg_case, beats_ecg_case, resampling_case, spectra_case,
               spectra_deshape_case, trackers_case, trackers_lag_case, quality_case,
               fusion_case, chain_ppg_case, chain_ecg_lag_case]


@pytest.mark.parametrize("case", STAGE_CASES, ids=lambda c: c.__name__)
def test_every_breathing_stage_and_the_path_conform(case, rng):
    stage, x = case()
    y = stage.batch(x)
    assert len(y) > 0  # the case exercises the stage: it has output to compare
    check_all(case, rng, one_sample_limit=300)


def test_the_cases_cover_every_stage_of_the_path():
    covered = {type(case()[0]).__name__ for case in STAGE_CASES}
    assert {type(stage).__name__ for stage in _chain("ppg").stages} < covered
    assert "Chain" in covered


@dataclasses.dataclass(frozen=True)
class Stepped:
    """A stage whose ``batch`` is its steps over fixed chunks: what the JIT-off check
    compares when the compiled kernels are in the steps, not in the numpy twin."""

    stage: object
    bounds: tuple

    def initial_state(self):
        return self.stage.initial_state()

    def step(self, state, x):
        return self.stage.step(state, x)

    def batch(self, x):
        return run_chunks(self.stage, x, list(self.bounds))[1]

    def split(self, x, bounds):
        return self.stage.split(x, bounds)

    def join(self, parts):
        return self.stage.join(parts)


def stepped_ppg_case():
    stage, x = chain_ppg_case()
    return Stepped(stage, tuple(range(125, len(x[0]), 125))), x


def stepped_ecg_lag_case():
    stage, x = chain_ecg_lag_case()
    return Stepped(stage, tuple(range(31, len(x[0]), 31))), x


def stepped_deshape_case():
    stage, x = spectra_deshape_case()
    return Stepped(stage, tuple(range(7, len(x), 7))), x


def stepped_beats_ppg_case():
    stage, x = beats_ppg_case()
    return Stepped(stage, tuple(range(97, len(x[0]), 97))), x


def stepped_beats_ecg_case():
    stage, x = beats_ecg_case()
    return Stepped(stage, tuple(range(61, len(x[0]), 61))), x


@pytest.mark.parametrize("name", ["chain_ppg_case", "stepped_ppg_case", "stepped_ecg_lag_case",
                                  "stepped_deshape_case", "stepped_beats_ppg_case",
                                  "stepped_beats_ecg_case"])
def test_the_path_without_jit_equals_the_compiled_path(name):
    check_without_jit(MODULE, name)


BREATHING_KERNELS = ("resample_chunk", "modulation_frames", "shape_modulation_spectra",
                     "track_ridges", "modulation_quality", "fuse_rates", "calibrate_breathing",
                     "scan_beats", "aligned_offset", "beat_candidates", "numpy_sum",
                     "sorted_copy", "upper_quartile", "small_median", "vertex_offset",
                     "remember", "beat_front_end")


def test_each_kernel_equals_its_plain_python_path(monkeypatch):
    stage, x = stepped_ppg_case()
    compiled = stage.batch(x)
    for name in BREATHING_KERNELS:
        monkeypatch.setattr(_kernels, name, getattr(_kernels, name).py_func)
    assert_same(stage.batch(x), compiled, "plain kernels")


# ---------------------------------------------------- kernels on edge cases


def test_fusion_kernel_equals_fuse_modulations_on_ties_nans_and_thresholds(rng):
    # Rates from a coarse set, so spreads of exactly the agreement (4 per minute) and
    # ties of support occur; qualities from a coarse set with zeros and NaN rates.
    n = 4000
    rate = rng.choice([10.0, 12.0, 14.0, 16.0, 30.0, np.nan], size=(n, 3))
    quality = rng.choice([0.0, 0.1, 0.2, 0.3, 0.5, 1.0, 1.2], size=(n, 3))
    confidence = rng.uniform(0, 1, size=(n, 3))
    for min_agreeing, min_support, power in ((1, 0.3, 4.0), (2, 0.0, 1.0), (3, 0.5, 2.0)):
        expected = R.fuse_modulations(rate, confidence, quality, 4.0, min_agreeing,
                                      min_support, power)
        for kernel in (_kernels.fuse_rates, _kernels.fuse_rates.py_func):
            got = np.empty(n), np.empty(n), np.empty(n)
            kernel(rate, confidence, quality, R._GROUP_COLUMNS, R._GROUP_SIZES, 4.0,
                   min_agreeing, min_support, power, *got)
            for a, b in zip(got, expected):
                np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-15, equal_nan=True)


def test_quality_kernel_equals_the_numpy_quality_on_masks_and_edges(rng):
    stage = _chain("ppg").stages[4]
    rates = stage.rates
    n = 300
    spectra = rng.uniform(0, 1, size=(n, 3, len(rates))) ** 4
    # Rates on the first and last bins, on the edge of the open band, NaN, inside.
    rate = rng.uniform(rates[0], rates[-1], size=(n, 3))
    rate[::7, 0] = rates[0]
    rate[::5, 1] = rates[-1]
    rate[::11, 2] = np.nan
    beat_rate = rng.choice([np.nan, 40.0, 80.0, 200.0], size=n)
    rate[::3, 1] = 0.5 * np.where(np.isfinite(beat_rate[::3]), beat_rate[::3], 60.0) - 0.1
    hops = R.ModulationHops(spectra, rng.uniform(0, 1, (n, 3)),
                            rng.choice([0.0, 0.004, 0.02], size=(n, 3)), beat_rate,
                            np.arange(n, dtype=float), np.arange(n, dtype=float))
    tracked = R.TrackedModulations(hops, rate, rng.uniform(0, 1, (n, 3)))
    expected = R.modulation_quality(hops, rate, rates, stage.halfwidth_bins)
    assert (expected > 0).any() and (expected == 0).any()
    for kernel in (_kernels.modulation_quality, _kernels.modulation_quality.py_func):
        out = np.empty((n, 3))
        kernel(spectra, rate, hops.integrity, hops.depth, beat_rate, rates,
               float(stage.halfwidth_bins), R.CONCENTRATION_FULL, R.DEPTH_FLOOR,
               R.DEPTH_FULL, out)
        np.testing.assert_allclose(out, expected, rtol=1e-12, atol=1e-15)
    assert_same(stage.step(None, tracked)[1], stage.batch(tracked))


def test_spectrum_shaping_kernel_equals_tilt_mask_and_support(rng):
    rates = np.linspace(4.0, 60.0, 200)
    j, frac, inside = R.harmonic_taps(rates)
    spectra = rng.uniform(0, 1, size=(20, 3, len(rates)))
    beat_rate = rng.choice([np.nan, 30.0, 70.0], size=20)
    for tilt, weight, cap in ((0.0, 0.0, 1.0), (0.5, 0.5, 1.0), (1.0, 1.0, 0.5)):
        expected = R.harmonic_support(R.nyquist_mask(R.tilt_spectra(spectra, rates, tilt),
                                                     rates, beat_rate),
                                      rates, weight, cap)
        factor = R.tilt_spectra(np.ones(len(rates)), rates, tilt)
        for kernel in (_kernels.shape_modulation_spectra,
                       _kernels.shape_modulation_spectra.py_func):
            got = spectra.copy()
            kernel(got, factor, rates, beat_rate, j, frac, inside, weight, cap)
            np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-15)


def test_tracker_kernel_equals_one_ridge_tracker_per_modulation(rng):
    rates = np.linspace(4.0, 60.0, 120)
    params = tracker_mod.make_params(rates[1] - rates[0], 0.25, 0.5, 1e-3, 2.0)
    n = 60
    centre = 40 + 10 * np.sin(np.arange(n) / 9.0)
    f = np.arange(len(rates))
    spectra = np.stack([np.exp(-0.5 * ((f[None, :] - centre[:, None] - 15 * c) / 2.0) ** 2)
                        + 0.3 * rng.random((n, len(rates))) for c in range(3)], axis=1)
    spectra[5, 1] = 0.0  # an empty hop: the read-out falls back on the mode's rate
    integrity = rng.uniform(0, 1, (n, 3))
    integrity[::4] = 1.0
    for kernel in (_kernels.track_ridges, _kernels.track_ridges.py_func):
        alpha = np.tile(tracker_mod.initial_posterior(len(rates)), (3, 1))
        rate, conf = np.empty((n, 3)), np.empty((n, 3))
        kernel(spectra, integrity, alpha, params.transition, params.jump_probability, 2.0,
               tracker_mod.EMISSION_FLOOR, params.halfwidth_bins, rates, rate, conf)
        for c in range(3):
            tracker = tracker_mod.RidgeTracker(rates, params, 2.0)
            r, k, _ = tracker.update(spectra[:, c], integrity[:, c])
            np.testing.assert_allclose(rate[:, c], r, rtol=1e-12)
            np.testing.assert_allclose(conf[:, c], k, rtol=1e-12, atol=1e-15)
            np.testing.assert_allclose(alpha[c], tracker.posterior, rtol=1e-12, atol=1e-300)


def test_splitting_beats_by_when_they_are_decided():
    stage, x = resampling_case()
    parts = x.split([1000, 2500])
    assert [len(p) for p in parts] == [1000, 1500, len(x) - 2500]
    assert all(np.all((p.beats.ready > lo) & (p.beats.ready <= hi)) for p, lo, hi in
               zip(parts, [0, 1000, 2500], [1000, 2500, len(x)]))
    assert_same(R.PulseBeats.concat(parts), x)
    # The stage helpers for tuples of arrays cut and join as the records do.
    assert_same(join_arrays(split_arrays(_record("ppg"), [10, 20])), _record("ppg"))


def test_interp_point_is_numpy_interp_on_knots_ends_ties_and_nan(rng):
    xp = np.array([-2.0, -1.0, -1.0, 0.5, 3.0])  # a repeated knot, as isotonic fits give
    fp = np.array([0.1, 0.2, 0.4, 0.4, 0.9])
    x = np.concatenate([rng.uniform(-4, 5, 500), xp, [np.nan, -np.inf, np.inf]])
    for kernel in (_kernels.interp_point, _kernels.interp_point.py_func):
        got = np.array([kernel(v, xp, fp) for v in x])
        np.testing.assert_array_equal(got, np.interp(x, xp, fp))
        assert kernel(0.3, xp[:1], fp[:1]) == np.interp(0.3, xp[:1], fp[:1])


def test_calibration_kernel_equals_the_shipped_map(rng):
    raw = rng.choice([0.0, -0.1, 1e-4, 0.3, 0.7, 0.9999, 1.0, np.nan], size=400)
    raw[::3] = rng.uniform(0, 1, len(raw[::3]))
    quality = rng.uniform(-0.2, 1.2, size=400)
    quality[::17] = np.nan
    for kind in B.KINDS:
        model = B.MAP.models[kind]
        expected = B.calibrated(kind, raw, quality)
        for kernel in (_kernels.calibrate_breathing, _kernels.calibrate_breathing.py_func):
            out = np.empty(len(raw))
            kernel(raw, quality, model.centre, model.scale, model.beta, model.knots_score,
                   model.knots_prob, model.low, model.high, PROB_FLOOR, PROB_CEIL, out)
            np.testing.assert_allclose(out, expected, rtol=1e-12, atol=1e-15, equal_nan=True)


def test_the_fusion_stage_reads_the_map_in_force(monkeypatch):
    stage, x = fusion_case()
    monkeypatch.setattr(B, "MAP", None)  # no map: the raw confidence, in step and batch
    _, stepped = stage.step(None, x)
    assert_same(stepped, stage.batch(x))
    raw = R.fuse_modulations(stepped.modulation_rate, x.confidence, x.quality,
                             stage.settings.agreement_per_min, stage.settings.min_agreeing,
                             stage.settings.min_support,
                             stage.settings.fusion_quality_power)[1]
    np.testing.assert_allclose(stepped.confidence, raw, rtol=1e-12)
