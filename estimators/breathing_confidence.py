"""Calibrated breathing-rate confidence: the probability of being within 2 breaths/min.

A breathing-rate estimate's ``confidence`` is

.. math:: c = P(|r - r_{ref}| \\le 2 \\text{ per minute} \\mid \\text{raw confidence, quality})

(2 breaths/min: the tolerance under which breathing-rate studies usually call an
estimate clinically useful; common practice). The raw confidence is the tracker's
posterior mass near the rate (for breathing from a pulse, the agreeing modulations'
mean posterior mass times their share of the support, :func:`estimators.respiration.
fuse_modulations`); the quality is the window's quality index (from a pulse: the
support). One model per signal kind (``resp``, ``ppg``, ``ecg``), the same two stages as
the heart-rate map (:mod:`estimators.calibration`, whose fitting functions are used):
an L2-penalised logistic regression on ``(logit raw confidence, quality)`` and an
isotonic read-out of its score whose steps each hold at least :data:`MIN_STEP_ROWS`
rows (:func:`fit_pooled_isotonic`). Fitted by ``python -m bench.breathing_table --refit``
with leave-one-record-out folds on BIDMC records 01-26 and shipped as package data,
``estimators/data/breathing_map.json``; without it (or for a kind without a model) the
raw confidence is reported and :data:`MAP` is None.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from estimators.calibration import PROB_CEIL, PROB_FLOOR, fit_logistic
from estimators.errors import ParameterError

MAP_PATH = Path(__file__).with_name("data") / "breathing_map.json"
"""The shipped map (package data)."""

TOLERANCE_PER_MIN = 2.0
"""A breathing rate within this of the reference counts as right (common practice)."""

MIN_STEP_ROWS = 100
"""Fewest rows behind one step of the isotonic read-out: a step's share within tolerance
then has a standard error of at most 0.03 near 0.9 (``sqrt(0.9 * 0.1 / 100)``), so the
read-out cannot promise 1.0 (or 0.0) from a handful of rows at the end of the score's
range (a priori; isotonic fits are known to overfit where rows are few: Niculescu-Mizil
& Caruana, "Predicting good probabilities with supervised learning", ICML 2005, from
memory)."""

KINDS = ("resp", "ppg", "ecg")
FORMAT = "ridgewatch breathing confidence map 1"


def design(raw_confidence: np.ndarray, quality: np.ndarray) -> np.ndarray:
    """``(N, 2)``: logit of the raw confidence (clipped to [1e-3, 1 - 1e-3], which
    spreads the range near 1 where posterior masses pile up) and the quality; non-finite
    values count as 0."""
    raw = np.clip(np.nan_to_num(np.asarray(raw_confidence, dtype=np.float64)), 1e-3, 1 - 1e-3)
    q = np.nan_to_num(np.asarray(quality, dtype=np.float64))
    return np.column_stack([np.log(raw / (1.0 - raw)), q])


@dataclass(frozen=True)
class KindModel:
    """One kind's map: standardised, range-clipped design -> logistic score -> isotonic."""

    centre: np.ndarray
    scale: np.ndarray
    beta: np.ndarray
    knots_score: np.ndarray
    knots_prob: np.ndarray
    low: np.ndarray
    high: np.ndarray

    def score(self, raw_confidence, quality) -> np.ndarray:
        x = np.clip(design(raw_confidence, quality), self.low, self.high)
        return self.beta[0] + ((x - self.centre) / self.scale) @ self.beta[1:]

    def __call__(self, raw_confidence, quality) -> np.ndarray:
        prob = np.interp(self.score(raw_confidence, quality), self.knots_score, self.knots_prob)
        return np.clip(prob, PROB_FLOOR, PROB_CEIL)

    def to_dict(self) -> dict:
        return {k: getattr(self, k).tolist() for k in
                ("centre", "scale", "beta", "knots_score", "knots_prob", "low", "high")}

    @classmethod
    def from_dict(cls, data: dict) -> "KindModel":
        arrays = {k: np.asarray(data[k], dtype=np.float64) for k in
                  ("centre", "scale", "beta", "knots_score", "knots_prob", "low", "high")}
        if not (len(arrays["centre"]) == len(arrays["scale"]) == len(arrays["low"])
                == len(arrays["high"]) == 2 and len(arrays["beta"]) == 3
                and len(arrays["knots_score"]) == len(arrays["knots_prob"]) >= 1):
            raise ParameterError("breathing confidence map: array sizes do not match the "
                                 "design (refit with python -m bench.breathing_table --refit)")
        return cls(**arrays)


def fit_pooled_isotonic(score: np.ndarray, y: np.ndarray,
                        min_rows: int = MIN_STEP_ROWS) -> tuple[np.ndarray, np.ndarray]:
    """Non-decreasing step fit of ``y`` on ``score`` (pool-adjacent-violators), then the
    smallest step merged with its nearer-valued neighbour until every step holds at
    least ``min_rows`` rows (or one step is left): ``(knots_score, knots_prob)``, one
    knot per step at its mean score. Merging two adjacent steps gives a value between
    theirs, so the fit stays non-decreasing.

    Examples
    --------
    >>> fit_pooled_isotonic(np.arange(8.0), np.array([0, 0, 0, 1, 0, 1, 1, 1]), min_rows=3)
    (array([2., 6.]), array([0.2, 1. ]))
    """
    from scipy.optimize import isotonic_regression

    order = np.argsort(np.asarray(score, dtype=np.float64), kind="stable")
    s = np.asarray(score, dtype=np.float64)[order]
    yy = np.asarray(y, dtype=np.float64)[order]
    starts = list(np.asarray(isotonic_regression(yy, increasing=True).blocks)[:-1])
    ends = starts[1:] + [len(yy)]
    steps = [[a, b] for a, b in zip(starts, ends)]
    while len(steps) > 1:
        sizes = [b - a for a, b in steps]
        i = int(np.argmin(sizes))
        if sizes[i] >= min_rows:
            break
        value = yy[steps[i][0]:steps[i][1]].mean()
        if i == 0:
            j = 1
        elif i == len(steps) - 1:
            j = i - 1
        else:
            left = abs(yy[steps[i - 1][0]:steps[i - 1][1]].mean() - value)
            right = abs(yy[steps[i + 1][0]:steps[i + 1][1]].mean() - value)
            j = i - 1 if left <= right else i + 1
        lo, hi = min(i, j), max(i, j)
        steps[lo:hi + 1] = [[steps[lo][0], steps[hi][1]]]
    return (np.array([s[a:b].mean() for a, b in steps]),
            np.array([yy[a:b].mean() for a, b in steps]))


def fit_kind(raw_confidence, quality, within, l2: float = 1.0,
             min_rows: int = MIN_STEP_ROWS) -> KindModel:
    """Fit one :class:`KindModel` to rows of raw confidence, quality and outcome (True:
    within :data:`TOLERANCE_PER_MIN`); ``min_rows`` rows at least behind each step of the
    isotonic read-out (:func:`fit_pooled_isotonic`)."""
    x = design(raw_confidence, quality)
    centre = x.mean(axis=0)
    scale = x.std(axis=0)
    scale = np.where(scale > 1e-12, scale, 1.0)
    y = np.asarray(within, dtype=np.float64)
    beta = fit_logistic((x - centre) / scale, y, None, l2)
    empty = np.empty(0)
    model = KindModel(centre, scale, beta, empty, empty, x.min(axis=0), x.max(axis=0))
    knots_s, knots_p = fit_pooled_isotonic(model.score(raw_confidence, quality), y, min_rows)
    return KindModel(centre, scale, beta, knots_s, knots_p, model.low, model.high)


@dataclass(frozen=True)
class BreathingMap:
    """Raw confidence and quality -> probability within 2 breaths/min, per kind."""

    models: dict
    meta: dict

    def __call__(self, kind: str, raw_confidence, quality) -> np.ndarray:
        raw = np.asarray(raw_confidence, dtype=np.float64)
        if kind not in self.models:
            return np.full(raw.shape, np.nan)
        return self.models[kind](raw, quality)

    def to_dict(self) -> dict:
        return {"format": FORMAT, "tolerance_per_min": TOLERANCE_PER_MIN,
                "models": {k: m.to_dict() for k, m in self.models.items()}, "meta": self.meta}

    @classmethod
    def from_dict(cls, data: dict) -> "BreathingMap":
        if data.get("format") != FORMAT:
            raise ParameterError(f"breathing confidence map: format {data.get('format')!r} is "
                                 f"not {FORMAT!r}")
        return cls({k: KindModel.from_dict(v) for k, v in data.get("models", {}).items()
                    if k in KINDS}, dict(data.get("meta", {})))


def load_map(path: Path = MAP_PATH) -> BreathingMap | None:
    """The map stored at ``path``, or None when there is no such file."""
    try:
        text = Path(path).read_text()
    except FileNotFoundError:
        return None
    return BreathingMap.from_dict(json.loads(text))


def _load_shipped() -> tuple[BreathingMap | None, str]:
    try:
        return load_map(), ""
    except (ParameterError, ValueError, KeyError) as error:
        return None, str(error)


MAP, MAP_PROBLEM = _load_shipped()
"""The shipped map, and why it could not be used (empty when it loaded)."""


def calibrated(kind: str, raw_confidence, quality,
               breathing_map: BreathingMap | None = None) -> np.ndarray:
    """Probability within 2 breaths/min per estimate of a ``kind`` channel, by
    ``breathing_map`` (default: the shipped :data:`MAP`); the raw confidence where there
    is no map for the kind. A raw confidence of 0 (no rate) stays 0.

    Examples
    --------
    >>> m = BreathingMap({"ppg": fit_kind(np.r_[0.2, 0.3, 0.8, 0.9], np.r_[0.1, 0.2, 0.8, 0.9],
    ...                                   [False, False, True, True], min_rows=1)}, {})
    >>> calibrated("ppg", np.r_[0.25, 0.85, 0.0], np.r_[0.1, 0.9, 0.0], m).round(3).tolist()
    [0.001, 0.999, 0.0]
    >>> calibrated("resp", np.r_[0.7], np.r_[0.5], m).tolist()  # no model: raw
    [0.7]
    """
    chosen = MAP if breathing_map is None else breathing_map
    raw = np.asarray(raw_confidence, dtype=np.float64)
    if chosen is None or raw.size == 0:
        return raw
    prob = chosen(kind, raw, quality)
    return np.where(raw > 0, np.where(np.isfinite(prob), prob, raw), raw)
