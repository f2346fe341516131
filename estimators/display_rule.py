"""The one rule for showing an estimate: ``show``, ``grey`` or ``withhold``.

Every place a rate reaches a person or another program reads this rule: the Qt window
(withheld: a dash; grey: greyed digits), the text display, the estimate log (its
``display`` column) and the LSL outlet (withheld: NaN). The engine still reports the
rate it found (the log's ``rate_per_min`` keeps it); withholding is a display decision.

Heart rate, whose ``confidence`` is the calibrated probability ``P`` that the rate is
within the heart-rate tolerance (10 % or 5 bpm, whichever is greater;
:mod:`estimators.calibration`):

=============  ============================================================
``show``       ``P >= SHOW_CONFIDENCE`` (0.8) and quality >= ``UNUSABLE_QUALITY``
``grey``       ``GREY_CONFIDENCE`` (0.5) ``<= P < 0.8``; or ``P >= 0.8`` with quality
               below ``UNUSABLE_QUALITY`` (0.3)
``withhold``   ``P < 0.5``, or no rate
=============  ============================================================

Why these numbers: 0.8 is the level at which the calibration is checked (at least 95 %
of the estimates at or above it were within tolerance on the development records, out
of fold; see ``python -m bench.calibration``). Below 0.5 an estimate is more likely
outside the tolerance than inside, so it is not shown at all. Between, the rate is
likelier right than wrong but not to be relied on: it is shown greyed. A rate is never
shown in full beside the word ``unusable`` (quality below 0.3): the calibration may
still trust it (during exercise the motion lowers the quality of correct rates), so it
is greyed rather than withheld.

Breathing rate: its confidence is the tracker's posterior mass, not calibrated, so only
the quality counts: ``show`` with a rate and quality >= 0.3, ``grey`` with a rate below
it, ``withhold`` without a rate.
"""

from __future__ import annotations

import math

SHOW, GREY, WITHHOLD = "show", "grey", "withhold"
DECISIONS = (SHOW, GREY, WITHHOLD)

SHOW_CONFIDENCE = 0.8
"""Calibrated probability within tolerance from which a heart rate is shown."""
GREY_CONFIDENCE = 0.5
"""Below this probability a heart rate is withheld (more likely wrong than right)."""
UNUSABLE_QUALITY = 0.3
"""Quality below which the displays call a window ``unusable``; a rate is then greyed
at best."""


def decide(quantity: str, rate_per_min: float, confidence: float, quality: float) -> str:
    """``show``, ``grey`` or ``withhold`` for one estimate (see the module notes).

    Examples
    --------
    >>> decide("hr", 72.0, 0.93, 0.8), decide("hr", 72.0, 0.6, 0.8), decide("hr", 72.0, 0.3, 0.8)
    ('show', 'grey', 'withhold')
    >>> decide("hr", 174.0, 0.9, 0.18), decide("hr", float("nan"), 0.99, 0.9)
    ('grey', 'withhold')
    """
    if rate_per_min is None or not math.isfinite(rate_per_min):
        return WITHHOLD
    usable = quality is not None and math.isfinite(quality) and quality >= UNUSABLE_QUALITY
    if quantity != "hr":
        return SHOW if usable else GREY
    if confidence is None or not math.isfinite(confidence) or confidence < GREY_CONFIDENCE:
        return WITHHOLD
    if confidence >= SHOW_CONFIDENCE and usable:
        return SHOW
    return GREY


def decide_estimate(estimate) -> str:
    """:func:`decide` for an :class:`~estimators.estimate.Estimate`."""
    return decide(estimate.quantity, estimate.rate_per_min, estimate.confidence,
                  estimate.quality)
