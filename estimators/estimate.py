"""The estimate record every stage downstream of the engine reads."""

from __future__ import annotations

import math
from dataclasses import dataclass

QUANTITIES = ("hr", "rr")
"""``hr``: heart rate (beats per minute); ``rr``: breathing rate (breaths per minute)."""


@dataclass(frozen=True, slots=True)
class Estimate:
    """One estimate of one quantity from one channel (or ``"fused"``) at one hop.

    Attributes
    ----------
    quantity : ``"hr"`` or ``"rr"``.
    source : channel name, or ``"fused"`` when several channels combine.
    time_s : stream time the estimate refers to (centre of the analysis window, minus
        nothing: the window is symmetric, so its centre is the instant it describes).
    emitted_s : stream time of the newest sample the estimate used.
    rate_per_min : rate in events per minute; NaN when there is no estimate.
    confidence : in [0, 1]. Heart rate: the calibrated probability that the rate is
        within the heart-rate tolerance (:mod:`estimators.calibration`). Breathing rate:
        the calibrated probability that the rate is within 2 breaths/min
        (:mod:`estimators.breathing_confidence`, one map per signal kind: respiration,
        PPG, ECG); an estimate without a rate keeps the raw value.
    quality : in [0, 1], the data-quality index of the window.
    evidence : heart rate: the raw measures behind the confidence, named by
        :data:`estimators.evidence.FEATURES` (for diagnostics); empty otherwise.
    rate_now_per_min : the rate at ``emitted_s`` (the newest sample used): the rate
        carried forward over the delay by the ridge's recent slope
        (:mod:`estimators.rate_now`); equal to ``rate_per_min`` offline (no delay).
    now_confidence : the confidence of ``rate_now_per_min`` (the confidence times the
        chance that the forecast's own error is within the tolerance).
    recent_rate_per_min : the peak of the end-weighted column over the newest part of
        the window (``recent_window_s``; :mod:`estimators.stft`), the rate the newest
        samples carry; NaN when there is none or no rate. Not logged: the rate now
        reads it (:mod:`estimators.rate_now`).
    """

    quantity: str
    source: str
    time_s: float
    emitted_s: float
    rate_per_min: float
    confidence: float
    quality: float
    evidence: tuple = ()
    rate_now_per_min: float = math.nan
    now_confidence: float = math.nan
    recent_rate_per_min: float = math.nan

    @property
    def delay_s(self) -> float:
        return self.emitted_s - self.time_s

    @property
    def has_rate(self) -> bool:
        return not math.isnan(self.rate_per_min)

    @property
    def display(self) -> str:
        """``show``, ``grey`` or ``withhold``: the one rule every display, the log and
        the outlet follow (:mod:`estimators.display_rule`)."""
        from estimators.display_rule import decide_estimate

        return decide_estimate(self)

    @property
    def now_display(self) -> str:
        """The same rule applied to the rate now and its own confidence."""
        from estimators.display_rule import decide

        return decide(self.quantity, self.rate_now_per_min, self.now_confidence, self.quality)
