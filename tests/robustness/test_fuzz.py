"""Property-based fuzzing of the engine: random chunk sizes and random mixes of sample
and timing faults never make :class:`~estimators.monitor.RateMonitor` raise, and every
estimate it returns is a valid row of the estimate log (confidence and quality in
[0, 1], ``time_s <= emitted_s``, ``emitted_s`` never decreasing, a rate either absent or
inside the profile's band), also after a round trip through the log file.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from estimators.config import PROFILES
from estimators.monitor import RateMonitor
from streamer.sinks.estimate_log import EstimateLog, read_log
from tests.robustness.faults import (KINDS, Fault, assert_log_invariants, chunked, inject,
                                     pulse_signal)

FS = 50.0
DURATION_S = 60.0
CHANNELS = [("green", "ppg"), ("red", "ppg"), ("belt", "resp")]


def _signals():
    x, t, _, _ = pulse_signal(DURATION_S, FS, lambda t: 70.0 + 20.0 * np.sin(t / 9.0), seed=13)
    breath = np.sin(2 * np.pi * 0.25 * t) + 0.3 * np.sin(2 * np.pi * 0.5 * t + 1.0)
    return np.column_stack([x, 0.5 * x + 3.0, breath]), t


SAMPLES, TIMES = _signals()


@st.composite
def faults(draw):
    kind = draw(st.sampled_from(KINDS))
    start = draw(st.floats(0.0, DURATION_S))
    duration = draw(st.one_of(st.just(math.inf), st.floats(0.0, 30.0)))
    channel = draw(st.one_of(st.none(), st.integers(0, len(CHANNELS) - 1)))
    value = {"dc": st.floats(-1e4, 1e4), "clock_jump": st.floats(-100.0, 100.0),
             "rate": st.floats(0.8, 1.2)}.get(kind, st.just(0.0))
    rails = sorted(draw(st.lists(st.floats(-0.5, 1.5), min_size=2, max_size=2)))
    return Fault(kind, start, duration, channel, draw(value), rails[0], rails[1])


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(sizes=st.lists(st.integers(1, 400), min_size=1, max_size=6),
       mix=st.lists(faults(), max_size=4),
       profile=st.sampled_from(sorted(PROFILES)))
def test_engine_never_raises_and_every_row_is_a_valid_log_row(sizes, mix, profile):
    if sum(sizes) < 10 * len(sizes):  # keep single-sample chunking to a share of the runs
        sizes = sizes + [97]
    monitor = RateMonitor(CHANNELS, FS, profile)
    estimates = []
    for x, t in inject(chunked(SAMPLES, TIMES, sizes), mix):
        estimates.extend(monitor.update(x, t))
    assert_log_invariants(estimates, PROFILES[profile])
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "log.csv"
        with EstimateLog(path, "replay", "fuzz", dict(CHANNELS), {}) as log:
            for e in estimates:
                log.write(e, 0.1)
        table = read_log(path)
    assert len(table) == len(estimates)
    c = table.columns
    assert ((c["confidence"] >= 0) & (c["confidence"] <= 1)).all()
    assert ((c["quality"] >= 0) & (c["quality"] <= 1)).all()
    assert (np.diff(c["emitted_s"]) >= 0).all()
    assert (c["emitted_s"] >= c["time_s"]).all()
