"""Slow, obvious twin of :func:`estimators.refine.climb_to_peak`: one hop at a time,
one bin at a time."""

from __future__ import annotations

import math

import numpy as np


def climb_to_peak_loop(spectra, rates, rate_per_min, radius_bins):
    step = rates[1] - rates[0]
    out = []
    for row, rate in zip(np.atleast_2d(spectra).tolist(), list(rate_per_min)):
        if not math.isfinite(rate):
            out.append(rate)
            continue
        j = min(max(int(round((rate - rates[0]) / step)), 0), len(row) - 1)
        for _ in range(radius_bins):
            if j == 0 or j == len(row) - 1:
                break
            if row[j + 1] > row[j] and row[j + 1] >= row[j - 1]:
                j += 1
            elif row[j - 1] > row[j]:
                j -= 1
            else:
                break
        if j == 0 or j == len(row) - 1:
            out.append(rate)
            continue
        left, mid, right = row[j - 1], row[j], row[j + 1]
        if not all(math.isfinite(v) for v in (left, mid, right)):
            out.append(rate)
            continue
        denom = left - 2.0 * mid + right
        delta = 0.5 * (left - right) / denom if denom < 0 else 0.0
        out.append(rates[j] + min(max(delta, -0.5), 0.5) * step)
    return np.array(out, dtype=np.float64)
