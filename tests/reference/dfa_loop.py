"""Detrended fluctuation analysis written out loop by loop: the slow, obviously correct
twin of :func:`estimators.hrv.dfa_alpha1`."""

from __future__ import annotations

import math

import numpy as np


def dfa_alpha1_loop(x, box_min: int = 4, box_max: int = 16) -> float:
    """Profile, boxes from the start, a least-squares line per box (``np.polyfit``),
    root-mean-square residual per box size, least-squares slope of the logs."""
    x = [float(v) for v in x]
    mean = sum(x) / len(x)
    profile, total = [], 0.0
    for v in x:
        total += v - mean
        profile.append(total)
    log_n, log_f = [], []
    for n in range(box_min, box_max + 1):
        squares, count = 0.0, 0
        for b in range(len(profile) // n):
            segment = profile[b * n:(b + 1) * n]
            k = list(range(n))
            slope, intercept = np.polyfit(k, segment, 1)
            for kk, y in zip(k, segment):
                squares += (y - (slope * kk + intercept)) ** 2
                count += 1
        log_n.append(math.log(n))
        log_f.append(0.5 * math.log(squares / count))
    mx, my = sum(log_n) / len(log_n), sum(log_f) / len(log_f)
    num = sum((a - mx) * (b - my) for a, b in zip(log_n, log_f))
    den = sum((a - mx) ** 2 for a in log_n)
    return num / den
