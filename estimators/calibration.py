"""Calibrated heart-rate confidence: the probability that an estimate is within tolerance.

A heart-rate estimate's ``confidence`` is

.. math:: c = P(|r - r_{ref}| \\le \\max(5, 0.1 r_{ref}) \\mid \\text{evidence})

the heart-rate tolerance of ANSI/AAMI EC13 (within 10 % or 5 bpm, whichever is greater;
cited from memory, :data:`estimators.metrics.HR_TOLERANCE_ABS`). The evidence is the
vector of raw measures of :mod:`estimators.evidence`; the map from evidence to
probability is fitted on real recordings by ``python -m bench.calibration --refit``
(leave-one-record-out cross-validation; see that module and DEVELOPERS.md) and shipped
as package data, ``estimators/data/confidence_map.json``, read once at import. That
read of the package's own data is the only file access in :mod:`estimators`.

The map
-------
Two stages, both fitted on the same training records:

1. **Logistic regression** on a fixed transform of the evidence (:func:`design`):
   ``s = w . x + b``, fitted by Newton's method (iteratively re-weighted least squares)
   with an L2 penalty on ``w`` (not on ``b``) and per-row weights (McCullagh & Nelder,
   *Generalized Linear Models*, 1989, ch. 4: the IRLS update
   ``beta <- beta + (X' W X + L)^{-1} (X' (y - p) - L beta)``, ``W = diag(p (1 - p))``).
   It ranks estimates and gives a smooth, monotone dependence on each measure.
2. **Isotonic regression** of the outcome on ``s`` (pool-adjacent-violators,
   :func:`scipy.optimize.isotonic_regression`), read out by linear interpolation between
   the block centres and clipped to ``[PROB_FLOOR, PROB_CEIL]``. It corrects what a
   logistic curve cannot: the outcome rate as a function of ``s`` need not be a
   sigmoid (over-confidence at rest and under-confidence in motion bend it differently
   in different ranges of ``s``).

Why this and not something else: the logistic stage alone ranks as well but leaves
bins of the reliability table several points off; isotonic alone (on the posterior
mass) cannot use the other measures; both stages together are a few lines of numpy and
one scipy call, deterministic, and need no scikit-learn, whose fits would be the same
models. (Measured with ``python -m bench.calibration``; figures in DEVELOPERS.md.)

Without the data file (e.g. a trimmed install) the confidence falls back to the
tracker's raw confidence, and :data:`MAP` is None.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from estimators.errors import ParameterError
from estimators.evidence import FEATURES

MAP_PATH = Path(__file__).with_name("data") / "confidence_map.json"
"""The shipped map (package data)."""

PROB_FLOOR, PROB_CEIL = 0.001, 0.999
"""A fitted probability is never reported as certain either way."""

FAMILIES = ("motion", "blind", "still")
"""One model per family of rows: ``motion`` for profiles that run the motion stage
(exercise) with their accelerometer, ``blind`` for the same profiles while the
accelerometer is missing (``reference_integrity`` below :data:`REFERENCE_MISSING`: a
lost stream, NaN samples, no accelerometer channel), ``still`` for the rest. The same
measures mean different things after motion suppression (e.g. the harmonic sum changes
the spectral ratios), and one model across both ranks worse in each (measured, see
:mod:`bench.calibration`). Without references, running data lock on the cadence with
a peaked posterior: one model for both motion cases had to blur the posterior's meaning
(out of fold on SPC 2015 with the accelerometer: AUROC for errors > 10 bpm 0.79 instead
of 0.92), so the blind rows get their own."""

REFERENCE_MISSING = 0.5
"""``reference_integrity`` below which a motion-profile row is ``blind``: most of the
accelerometer's window is missing (the integrity is the share of accepted samples,
:func:`estimators.quality.integrity`)."""


HARMONIC_LEAK = 0.15
"""Share of the rate's peak below which power at half or twice the rate is not taken as
evidence of a lock, set just above the leakage de-shape leaves in the tracked spectrum
when the rate moves (0.09-0.11 on a clean synthetic pulse ramping at 0.5 bpm/s;
exactly 0 on the resting BIDMC records); a lock on half the rate puts the pulse's own
fundamental at twice the rate (median 0.25, up to 0.9 on the wrong locks of the running
records). Without this margin the map learned "any power there is a lock" and greyed
a clean ramp (confidence 0.68; now 0.97)."""


def _columns(measures: np.ndarray) -> dict:
    m = np.atleast_2d(np.asarray(measures, dtype=np.float64))
    m = np.where(np.isfinite(m), m, 0.0)
    if m.shape[1] != len(FEATURES):
        raise ParameterError(f"evidence has {m.shape[1]} columns, expected {len(FEATURES)} "
                             f"({', '.join(FEATURES)})")
    return {name: m[:, i] for i, name in enumerate(FEATURES)}


def _beyond_leak(ratio: np.ndarray) -> np.ndarray:
    """The part of a half- or double-rate ratio above :data:`HARMONIC_LEAK`."""
    return np.maximum(ratio - HARMONIC_LEAK, 0.0)


def design_basic(measures: np.ndarray) -> np.ndarray:
    """The measures, each once: ``logit`` of the posterior mass (clipped to [1e-3,
    1 - 1e-3]) spreads the range near 1 where the tracker's confidence piles up;
    ``log1p`` tames the heavy tails of the ratios, the jumpiness and the channel spread.
    Non-finite measures count as 0."""
    f = _columns(measures)
    pm = np.clip(f["posterior_mass"], 1e-3, 1.0 - 1e-3)
    return np.column_stack([
        np.log(pm / (1.0 - pm)), f["motion_mark"], f["quality"], f["integrity"],
        f["concentration"], f["rival_ratio"], np.log1p(_beyond_leak(f["half_ratio"])),
        np.log1p(_beyond_leak(f["double_ratio"])), np.log1p(np.maximum(f["jumpiness"], 0.0)),
        np.log1p(np.maximum(f["channel_spread"], 0.0))])


def design_extended(measures: np.ndarray) -> np.ndarray:
    """:func:`design_basic` plus a few bends and products, so one logistic score can
    hold two kinds of failure: a lock on half the rate (power at ``2 r`` above the power
    at ``r``: hinges of ``log double_ratio`` at 1 and at 1/e) and a weak, jumpy rhythm
    (squares of quality and concentration, products with the posterior mass and the
    jumpiness, and the part of the rival ratio above 1)."""
    f = _columns(measures)
    base = design_basic(np.column_stack([f[name] for name in FEATURES]))
    logit_pm, jumps = base[:, 0], base[:, 8]
    log_double = np.log(np.maximum(_beyond_leak(f["double_ratio"]), 1e-3))
    q, c = f["quality"], f["concentration"]
    return np.column_stack([
        base, np.maximum(log_double, 0.0), np.maximum(log_double + 1.0, 0.0), q * q, c * c,
        logit_pm * np.maximum(log_double + 1.0, 0.0), logit_pm * q, jumps * q,
        np.maximum(f["rival_ratio"] - 1.0, 0.0)])


def design_posterior(measures: np.ndarray) -> np.ndarray:
    """The tracker's own evidence only: ``logit`` of the posterior mass and the
    motion-line mark at the rate."""
    f = _columns(measures)
    pm = np.clip(f["posterior_mass"], 1e-3, 1.0 - 1e-3)
    return np.column_stack([np.log(pm / (1.0 - pm)), f["motion_mark"]])


def design_constant(measures: np.ndarray) -> np.ndarray:
    """No measure at all: the map is the family's rate of estimates within tolerance."""
    return np.zeros((len(_columns(measures)["posterior_mass"]), 0))


DESIGNS = {"basic": design_basic, "extended": design_extended, "posterior": design_posterior,
           "constant": design_constant}
FAMILY_DESIGN = {"motion": "posterior", "blind": "constant", "still": "extended"}
"""Design per family. The blind family (no motion references) gets no measure: out of
fold its posterior-based map ranked errors worse than chance (AUROC 0.43 for errors
> 10 bpm on SPC 2015 without the accelerometer; a locked cadence has a peaked
posterior), and gave 0.85 to a cadence lock with a posterior mass of 0.16; the
evidence cannot tell right from wrong there, so the confidence is the rate at which
such estimates were right, the same for every estimate. The motion family is fitted
on twelve running records with about
a dozen estimates more than 10 bpm off, so it gets the plainest design: out of fold the
two measures rank those errors better (AUROC 0.92) than all the measures (0.89, the
logistic stage spreads its weight over measures those few errors do not separate),
with the same calibration (ECE 0.005)."""


def family_of(measures: np.ndarray) -> np.ndarray:
    """Per row, the name of its family (:data:`FAMILIES`): ``still`` unless the
    ``motion_profile`` measure is 1, then ``blind`` when ``reference_integrity`` is
    below :data:`REFERENCE_MISSING`, else ``motion``."""
    f = _columns(measures)
    motion = f["motion_profile"] > 0.5
    blind = motion & (f["reference_integrity"] < REFERENCE_MISSING)
    return np.where(blind, "blind", np.where(motion, "motion", "still"))


def _sigmoid(z: np.ndarray) -> np.ndarray:
    return 0.5 * (1.0 + np.tanh(0.5 * z))  # exact logistic, no overflow


def fit_logistic(x: np.ndarray, y: np.ndarray, weights: np.ndarray | None = None,
                 l2: float = 1.0, max_iter: int = 50, tol: float = 1e-10) -> np.ndarray:
    """L2-penalised logistic regression by Newton's method (IRLS).

    Parameters
    ----------
    x : (N, K) inputs (standardise them first so one penalty suits every column).
    y : (N,) outcomes in {0, 1}.
    weights : (N,) row weights (default 1).
    l2 : penalty ``l2 / 2 * |w|^2`` on the slopes; the intercept is not penalised.

    Returns
    -------
    ``(K + 1,)``: intercept, then the slopes.

    Examples
    --------
    Without penalty the fit of two groups reproduces their outcome rates (1/4, 3/4):

    >>> x = np.array([[0.0]] * 4 + [[1.0]] * 4)
    >>> y = np.array([1, 0, 0, 0, 1, 1, 1, 0])
    >>> beta = fit_logistic(x, y, l2=0.0)
    >>> [round(float(v), 4) for v in _sigmoid(beta[0] + beta[1] * np.array([0.0, 1.0]))]
    [0.25, 0.75]
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    n, k = x.shape
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    a = np.column_stack([np.ones(n), x])
    penalty = np.full(k + 1, float(l2))
    penalty[0] = 0.0
    beta = np.zeros(k + 1)
    for _ in range(max_iter):
        p = _sigmoid(a @ beta)
        gradient = a.T @ (w * (y - p)) - penalty * beta
        hessian = (a * (w * p * (1.0 - p))[:, None]).T @ a + np.diag(penalty)
        # A tiny ridge keeps the solve defined when a column is constant in a fold.
        step = np.linalg.solve(hessian + 1e-9 * np.eye(k + 1), gradient)
        beta = beta + step
        if np.max(np.abs(step)) < tol:
            break
    return beta


def fit_isotonic(score: np.ndarray, y: np.ndarray, weights: np.ndarray | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Non-decreasing step fit of ``y`` on ``score``: ``(knots_score, knots_prob)``, one
    knot per block of the pool-adjacent-violators solution, at the block's weighted mean
    score (read out by :func:`numpy.interp` between knots).

    Examples
    --------
    >>> fit_isotonic(np.array([0.0, 1.0, 2.0, 3.0]), np.array([0, 1, 0, 1]))
    (array([0. , 1.5, 3. ]), array([0. , 0.5, 1. ]))
    """
    from scipy.optimize import isotonic_regression

    score = np.asarray(score, dtype=np.float64)
    order = np.argsort(score, kind="stable")
    s, yy = score[order], np.asarray(y, dtype=np.float64)[order]
    w = np.ones(len(s)) if weights is None else np.asarray(weights, dtype=np.float64)[order]
    result = isotonic_regression(yy, weights=w, increasing=True)
    blocks = np.asarray(result.blocks)
    sums = np.add.reduceat(w * s, blocks[:-1])
    mass = np.add.reduceat(w, blocks[:-1])
    return sums / mass, np.asarray(result.x)[blocks[:-1]]


@dataclass(frozen=True)
class FamilyModel:
    """One family's map: standardised design, logistic score, isotonic read-out."""

    design: str
    centre: np.ndarray
    scale: np.ndarray
    beta: np.ndarray
    knots_score: np.ndarray
    knots_prob: np.ndarray
    low: np.ndarray | None = None
    high: np.ndarray | None = None
    """Range of each design column in the training rows: a row outside it is clipped
    to it, so the map never extrapolates the logistic stage beyond what it saw (a
    synthetic pulse whose second harmonic outgrows anything in the real recordings
    would otherwise be driven to a confidence near 0 or 1 by one measure)."""

    def score(self, measures: np.ndarray) -> np.ndarray:
        x = DESIGNS[self.design](measures)
        if self.low is not None and self.high is not None:
            x = np.clip(x, self.low, self.high)
        x = (x - self.centre) / self.scale
        return self.beta[0] + x @ self.beta[1:]

    def __call__(self, measures: np.ndarray) -> np.ndarray:
        if len(self.knots_score) == 0:
            return np.clip(_sigmoid(self.score(measures)), PROB_FLOOR, PROB_CEIL)
        prob = np.interp(self.score(measures), self.knots_score, self.knots_prob)
        return np.clip(prob, PROB_FLOOR, PROB_CEIL)

    def to_dict(self) -> dict:
        out = {"design": self.design, "centre": self.centre.tolist(),
               "scale": self.scale.tolist(), "beta": self.beta.tolist(),
               "knots_score": self.knots_score.tolist(),
               "knots_prob": self.knots_prob.tolist()}
        if self.low is not None and self.high is not None:
            out.update(low=self.low.tolist(), high=self.high.tolist())
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "FamilyModel":
        if data.get("design") not in DESIGNS:
            raise ParameterError(f"confidence map: design {data.get('design')!r} is not one of "
                                 f"{', '.join(DESIGNS)}")
        arrays = {k: np.asarray(data[k], dtype=np.float64)
                  for k in ("centre", "scale", "beta", "knots_score", "knots_prob")}
        for k in ("low", "high"):
            arrays[k] = np.asarray(data[k], dtype=np.float64) if k in data else None
        width = DESIGNS[data["design"]](np.zeros((1, len(FEATURES)))).shape[1]
        bounds = [b for b in (arrays["low"], arrays["high"]) if b is not None]
        if not (len(arrays["centre"]) == len(arrays["scale"]) == width
                and len(arrays["beta"]) == width + 1
                and all(len(b) == width for b in bounds)
                and len(arrays["knots_score"]) == len(arrays["knots_prob"])):
            raise ParameterError("confidence map: array sizes do not match the design "
                                 "(refit with python -m bench.calibration --refit)")
        return cls(data["design"], **arrays)


@dataclass(frozen=True)
class ConfidenceMap:
    """Evidence -> probability within tolerance, one :class:`FamilyModel` per family
    (see the module notes); a row of a family without a model keeps NaN."""

    models: dict
    meta: dict

    def __call__(self, measures: np.ndarray) -> np.ndarray:
        measures = np.atleast_2d(np.asarray(measures, dtype=np.float64))
        families = family_of(measures)
        out = np.full(len(measures), np.nan)
        for family in FAMILIES:
            rows = families == family
            if rows.any() and family in self.models:
                out[rows] = self.models[family](measures[rows])
        return out

    def to_dict(self) -> dict:
        return {"format": "ridgewatch confidence map 2", "features": list(FEATURES),
                "models": {k: m.to_dict() for k, m in self.models.items()},
                "meta": self.meta}

    @classmethod
    def from_dict(cls, data: dict) -> "ConfidenceMap":
        if list(data.get("features", [])) != list(FEATURES):
            raise ParameterError("confidence map: its features do not match this version's "
                                 "(refit with python -m bench.calibration --refit)")
        models = {k: FamilyModel.from_dict(v) for k, v in data.get("models", {}).items()
                  if k in FAMILIES}
        return cls(models, dict(data.get("meta", {})))


def fit_family(measures: np.ndarray, within: np.ndarray, design: str,
               weights: np.ndarray | None = None, l2: float = 1.0,
               isotonic: bool = True) -> FamilyModel:
    """Fit one :class:`FamilyModel` to evidence rows (N, len(FEATURES)) and outcomes
    (N,) (True: within tolerance), with optional row weights."""
    x = DESIGNS[design](measures)
    w = np.ones(len(x)) if weights is None else np.asarray(weights, dtype=np.float64)
    centre = np.average(x, axis=0, weights=w)
    scale = np.sqrt(np.average((x - centre) ** 2, axis=0, weights=w))
    scale = np.where(scale > 1e-12, scale, 1.0)
    y = np.asarray(within, dtype=np.float64)
    beta = fit_logistic((x - centre) / scale, y, w, l2)
    empty = np.empty(0)
    low, high = x.min(axis=0), x.max(axis=0)
    model = FamilyModel(design, centre, scale, beta, empty, empty, low, high)
    if not isotonic or x.shape[1] == 0:  # no measure: the intercept is the base rate
        return model
    knots_s, knots_p = fit_isotonic(model.score(measures), y, w)
    return FamilyModel(design, centre, scale, beta, knots_s, knots_p, low, high)


def fit_map(measures: np.ndarray, within: np.ndarray, weights: np.ndarray | None = None,
            l2: float = 1.0, isotonic: bool = True, meta: dict | None = None
            ) -> ConfidenceMap:
    """Fit a :class:`ConfidenceMap`: one :func:`fit_family` per family that has rows,
    with the design of :data:`FAMILY_DESIGN`."""
    measures = np.atleast_2d(np.asarray(measures, dtype=np.float64))
    within = np.asarray(within, dtype=bool)
    w = np.ones(len(measures)) if weights is None else np.asarray(weights, dtype=np.float64)
    families = family_of(measures)
    models = {}
    for family in FAMILIES:
        rows = families == family
        if rows.any():
            models[family] = fit_family(measures[rows], within[rows], FAMILY_DESIGN[family],
                                        w[rows], l2, isotonic)
    return ConfidenceMap(models, dict(meta or {}))


def load_map(path: Path = MAP_PATH) -> ConfidenceMap | None:
    """The map stored at ``path``, or None when there is no such file."""
    try:
        text = Path(path).read_text()
    except FileNotFoundError:
        return None
    return ConfidenceMap.from_dict(json.loads(text))


def _load_shipped() -> tuple[ConfidenceMap | None, str]:
    try:
        return load_map(), ""
    except (ParameterError, ValueError, KeyError) as error:
        return None, str(error)


MAP, MAP_PROBLEM = _load_shipped()
"""The shipped map, and why it could not be used (empty when it loaded). Without a
usable map the raw confidence is reported, so a stale map after a change of the
evidence never stops the engine (or ``python -m bench.calibration --refit``, which
replaces it); the test suite asserts that the shipped map loads."""


def calibrated_confidence(measures: np.ndarray, raw_confidence: np.ndarray,
                          confidence_map: ConfidenceMap | None = None) -> np.ndarray:
    """Calibrated probability within tolerance per row of ``measures``, by
    ``confidence_map`` (default: the shipped :data:`MAP`); ``raw_confidence`` where there
    is no map (or none for the row's family)."""
    chosen = MAP if confidence_map is None else confidence_map
    raw = np.asarray(raw_confidence, dtype=np.float64)
    if chosen is None or len(measures) == 0:
        return raw
    prob = chosen(measures)
    return np.where(np.isfinite(prob), prob, raw)


# ----------------------------------------------------------------- scoring a map


def expected_calibration_error(prob: np.ndarray, outcome: np.ndarray, bins: int = 10) -> float:
    """Expected calibration error over ``bins`` equal-width bins on [0, 1]:
    ``sum_b (n_b / N) |mean outcome_b - mean prob_b|`` (Naeini, Cooper & Hauskrecht,
    AAAI 2015, from memory). The top bin includes 1.

    Examples
    --------
    >>> expected_calibration_error(np.array([0.05, 0.05, 0.95, 0.95]), np.array([0, 0, 1, 0]))
    0.25
    """
    table = reliability_table(prob, outcome, bins)
    n = sum(row["count"] for row in table)
    if n == 0:
        return math.nan
    return float(sum(row["count"] * abs(row["observed"] - row["mean_confidence"])
                     for row in table if row["count"]) / n)


def reliability_table(prob: np.ndarray, outcome: np.ndarray, bins: int = 10) -> list[dict]:
    """Per equal-width confidence bin: ``low``, ``high``, ``count``, ``mean_confidence``
    and ``observed`` (the fraction within tolerance; NaN when empty)."""
    prob = np.asarray(prob, dtype=np.float64)
    outcome = np.asarray(outcome, dtype=np.float64)
    index = np.clip((prob * bins).astype(np.int64), 0, bins - 1)
    rows = []
    for b in range(bins):
        sel = index == b
        n = int(sel.sum())
        rows.append({"low": b / bins, "high": (b + 1) / bins, "count": n,
                     "mean_confidence": float(prob[sel].mean()) if n else math.nan,
                     "observed": float(outcome[sel].mean()) if n else math.nan})
    return rows


def auroc(score: np.ndarray, positive: np.ndarray) -> float:
    """Area under the ROC curve of ``score`` for telling ``positive`` rows from the rest
    (the Mann-Whitney statistic, ties counted half); NaN when a class is empty.

    Examples
    --------
    >>> auroc(np.array([0.1, 0.4, 0.35, 0.8]), np.array([False, False, True, True]))
    0.75
    """
    from scipy.stats import rankdata

    score = np.asarray(score, dtype=np.float64)
    positive = np.asarray(positive, dtype=bool)
    n_pos, n_neg = int(positive.sum()), int((~positive).sum())
    if n_pos == 0 or n_neg == 0:
        return math.nan
    ranks = rankdata(score)
    return float((ranks[positive].sum() - n_pos * (n_pos + 1) / 2.0) / (n_pos * n_neg))
