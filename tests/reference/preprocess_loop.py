"""Pre-processing by plain loops over samples, plus scipy over the whole record.

* A sample is *accepted* when it is finite, at most ``max_abs`` in magnitude and inside
  the limits of its block (see :func:`accepted_flags`); any other sample is replaced by
  the last accepted value (0 before any), and counted as rejected.
* A sample is *stuck* when it and the ``min_run - 1`` samples before it are identical
  accepted values (rejected samples break runs).
* The filter chain runs over the whole filled record with ``scipy.signal.sosfilt`` from
  rest; the ECG envelope is the squared first difference (the value before the first
  sample taken as 0).
* Decimation keeps raw samples ``k = j M + M - 1``.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal


def accepted_flags(x: np.ndarray, block: int, blocks: int, rank: int, margin: float,
                   max_abs: float) -> np.ndarray:
    """1.0 for accepted samples, written out plainly.

    Samples come in blocks of ``block`` (0: no blocks, only finiteness and ``max_abs``
    count). For each block, look at the up to ``blocks`` blocks before it (``n`` of
    them): each has the largest and the smallest of its samples that are finite and at
    most ``max_abs`` in magnitude (none when it has no such sample). When at least
    ``r = ceil(rank n / blocks)`` blocks have such samples (and ``r >= 1``), ``high`` is
    the ``r``-th largest maximum, ``low`` the ``r``-th smallest minimum, and the block's
    samples must lie in ``[low - m (high - low), high + m (high - low)]``, where
    ``m = margin``, or ``margin * blocks / (4 n)`` while ``n`` is under a quarter of
    ``blocks``.
    """
    usable = [math.isfinite(v) and abs(v) <= max_abs for v in map(float, x)]
    flags = np.zeros(len(x))
    extremes = []  # (max, min) of each complete block, None when it has no usable sample
    for k, v in enumerate(map(float, x)):
        lo, hi = -math.inf, math.inf
        if block:
            b = k // block
            before = extremes[max(0, b - blocks):b]
            known = [e for e in before if e is not None]
            r = math.ceil(rank * len(before) / blocks)
            if len(known) >= r >= 1:
                high = sorted((e[0] for e in known), reverse=True)[r - 1]
                low = sorted(e[1] for e in known)[r - 1]
                m = margin * blocks / (4.0 * len(before)) if 4 * len(before) < blocks else margin
                lo, hi = low - m * (high - low), high + m * (high - low)
            if (k + 1) % block == 0:  # the block is complete: its extremes count from now on
                span = range(k + 1 - block, k + 1)
                mine = [float(x[i]) for i in span if usable[i]]
                extremes.append((max(mine), min(mine)) if mine else None)
        flags[k] = 1.0 if usable[k] and lo <= v <= hi else 0.0
    return flags


def stuck_flags(x: np.ndarray, accepted: np.ndarray, min_run: int) -> np.ndarray:
    """1.0 where the sample ends a run of at least ``min_run`` identical accepted values
    (a rejected sample is never flagged and ends any run)."""
    flags = np.zeros(len(x))
    run = 0
    prev = None
    for k, v in enumerate(x):
        v = float(v)
        if not accepted[k]:
            run, prev = 0, None
            continue
        run = run + 1 if v == prev else 1
        prev = v
        flags[k] = 1.0 if run >= min_run else 0.0
    return flags


def hold_last_accepted(x: np.ndarray, accepted: np.ndarray) -> np.ndarray:
    """Copy of ``x`` with every rejected sample replaced by the last accepted one."""
    filled = np.empty(len(x))
    last = 0.0
    for k, v in enumerate(x):
        if accepted[k]:
            last = float(v)
        filled[k] = last
    return filled


def preprocess(x: np.ndarray, t: np.ndarray, chain, decimation: int, min_run: int,
               limiter=None, max_abs: float = 1e100) -> dict:
    """Analysis samples of a whole record: ``values``, ``timestamps``,
    ``cum_rejected``, ``cum_stuck``. ``limiter`` has ``block``, ``blocks``, ``rank`` and
    ``margin`` (None: no blocks)."""
    if limiter is None:
        accepted = accepted_flags(x, 0, 1, 1, 0.0, max_abs)
    else:
        accepted = accepted_flags(x, limiter.block, limiter.blocks, limiter.rank,
                                  limiter.margin, max_abs)
    filled = hold_last_accepted(x, accepted)
    stuck = stuck_flags(x, accepted, min_run)
    y = signal.sosfilt(chain.pre, filled)
    if chain.envelope:
        y = np.diff(y, prepend=0.0) ** 2
    if chain.post is not None:
        y = signal.sosfilt(chain.post, y)
    keep = np.arange(decimation - 1, len(x), decimation)
    return {
        "values": y[keep],
        "timestamps": t[keep],
        "cum_rejected": np.cumsum(1.0 - accepted)[keep],
        "cum_stuck": np.cumsum(stuck)[keep],
    }
