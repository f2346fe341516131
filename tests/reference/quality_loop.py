"""The quality measures by their definitions, in plain loops.

Harmonic score (see ``estimators._kernels.harmonic_score``): bins ``f = 0 .. F-1`` of a
band carry rates ``(f + offset) * step``. For a rate at fractional bin ``c`` the family
is the bins ``k (c + offset) - offset``, ``k = 1, 2, ...``, up to ``F - 1 + halfwidth``
(``K`` members). ``near`` is the power of bins within ``halfwidth`` of a member,
``share = min(1, K (2 halfwidth + 1) / F)`` what a flat spectrum would put there, and the
score is ``clip((near / total - chance_factor * share) / span, 0, 1)`` (0 when the rate
is not positive or the band holds no power). Non-finite bins are left out.

Exponential average: ``y_p = (1 - a) x_p + a y_{p-1}`` with ``a = exp(-hop / tau)`` and
``y_{-1} = x_0`` when nothing is carried in.
"""

from __future__ import annotations

import math


MAX_HARMONIC = 4  # the family: the rate and its multiples up to the fourth


def harmonic_score(power, centre, offset, halfwidth, chance_factor, span) -> float:
    base = centre + offset
    if not base > 0:
        return 0.0
    n_bins = len(power)
    members = []
    k = 1
    while k <= MAX_HARMONIC and k * base - offset <= n_bins - 1 + halfwidth:
        members.append(k * base - offset)
        k += 1
    near = total = 0.0
    for f, v in enumerate(power):
        if not math.isfinite(v):
            continue
        total += v
        if any(abs(f - m) <= halfwidth for m in members):
            near += v
    if total <= 0:
        return 0.0
    share = min(1.0, len(members) * (2 * halfwidth + 1) / n_bins)
    return min(1.0, max(0.0, (near / total - chance_factor * share) / span))


def exponential_average(values, hop_s, time_constant_s, last=None) -> list[float]:
    a = math.exp(-hop_s / time_constant_s)
    out = []
    prev = None if last is None else last
    for x in values:
        prev = x if prev is None else (1 - a) * x + a * prev
        out.append(prev)
    return out
