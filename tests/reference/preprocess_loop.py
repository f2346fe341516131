"""Pre-processing by plain loops over samples, plus scipy over the whole record.

* Non-finite samples are replaced by the last finite value (0 before any), and counted.
* A sample is *stuck* when it and the ``min_run - 1`` samples before it are identical
  finite values (non-finite samples break runs).
* The filter chain runs over the whole filled record with ``scipy.signal.sosfilt`` from
  rest; the ECG envelope is the squared first difference (the value before the first
  sample taken as 0).
* Decimation keeps raw samples ``k = j M + M - 1``.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal


def stuck_flags(x: np.ndarray, min_run: int) -> np.ndarray:
    """1.0 where the sample ends a run of at least ``min_run`` identical finite values
    (a non-finite sample is never flagged and ends any run)."""
    flags = np.zeros(len(x))
    run = 0
    prev = None
    for k, v in enumerate(x):
        v = float(v)
        if not math.isfinite(v):
            run, prev = 0, None
            continue
        run = run + 1 if v == prev else 1
        prev = v
        flags[k] = 1.0 if run >= min_run else 0.0
    return flags


def hold_last_finite(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Filled copy of ``x`` and the 0/1 non-finite flags."""
    filled = np.empty(len(x))
    flags = np.zeros(len(x))
    last = 0.0
    for k, v in enumerate(x):
        if math.isfinite(v):
            last = float(v)
        else:
            flags[k] = 1.0
        filled[k] = last
    return filled, flags


def preprocess(x: np.ndarray, t: np.ndarray, chain, decimation: int, min_run: int) -> dict:
    """Analysis samples of a whole record: ``values``, ``timestamps``,
    ``cum_nonfinite``, ``cum_stuck``."""
    filled, nonfinite = hold_last_finite(x)
    stuck = stuck_flags(x, min_run)
    y = signal.sosfilt(chain.pre, filled)
    if chain.envelope:
        y = np.diff(y, prepend=0.0) ** 2
    if chain.post is not None:
        y = signal.sosfilt(chain.post, y)
    keep = np.arange(decimation - 1, len(x), decimation)
    return {
        "values": y[keep],
        "timestamps": t[keep],
        "cum_nonfinite": np.cumsum(nonfinite)[keep],
        "cum_stuck": np.cumsum(stuck)[keep],
    }
