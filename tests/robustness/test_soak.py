"""Soak: a simulated 24 h stream at full speed with a fault every 20 minutes.

One PPG channel at 25 Hz goes straight into :class:`~estimators.monitor.RateMonitor`
(no decimation needed, so 24 h take well under a minute of engine time on the
development machine; a 125 Hz pulse train would need about 5 times longer, which
would mean simulating only a few hours). Every 20-minute period the heart rate moves
to a new level over its first 3 minutes and then holds; at minute 10 one fault from
:mod:`tests.robustness.faults` strikes (cycling through all of them); from minute 13 on
every estimate must be present and within the heart-rate tolerance again. The engine
must never raise, every row must be a valid log row, and the resident memory must
not grow with the length of the stream.
"""

from __future__ import annotations

import os

import numpy as np
import pytest

from estimators.config import get_profile
from estimators.monitor import RateMonitor
from tests.robustness.faults import (Fault, assert_log_invariants, chunked, inject,
                                     pulse_wave, within_ec13)

FS = 25.0
HOURS = 24
PERIOD_S = 20 * 60.0
RAMP_S = 3 * 60.0
FAULT_AT_S, FAULT_S = 10 * 60.0, 45.0
CHECK_FROM_S = 13 * 60.0
"""By then the fault has been over for more than a window plus the filter's ring-down
(see test_sample_faults)."""
PROFILE = get_profile("wrist")
CHUNKS = (37, 250, 13, 400)


def fault_for(period: int, start_s: float) -> Fault:
    """The fault of one period (clean stream time ``start_s`` of the period)."""
    at = start_s + FAULT_AT_S
    plan = [
        Fault("nan", at, FAULT_S),
        Fault("inf", at, FAULT_S),
        Fault("flat", at, FAULT_S),
        Fault("clip", at, FAULT_S, low=0.25, high=0.5),
        Fault("dc", at, FAULT_S, value=5.0),
        Fault("zero", at, FAULT_S),
        Fault("drop", at, FAULT_S),
        Fault("duplicate", at, FAULT_S),
        Fault("reorder", at, FAULT_S),
        Fault("clock_jump", at, value=30.0),
    ]
    return plan[period % len(plan)]


def resident_mb() -> float:
    """Current resident set size of this process (Linux ``/proc/self/statm``)."""
    with open("/proc/self/statm") as f:
        pages = int(f.read().split()[1])
    return pages * os.sysconf("SC_PAGE_SIZE") / 1e6


@pytest.mark.slow
def test_24_hours_with_periodic_faults():
    if not os.path.exists("/proc/self/statm"):
        pytest.skip("resident memory is read from /proc (Linux)")
    rng = np.random.default_rng(14)
    monitor = RateMonitor([("wrist", "ppg")], FS, PROFILE)
    n_periods = int(HOURS * 3600 / PERIOD_S)
    per_period = int(PERIOD_S * FS)
    ramp = int(RAMP_S * FS)
    level, phase, clock_offset_s = 70.0, 0.0, 0.0
    newest_s = -np.inf
    rss_after_hour_1 = None
    checked = 0
    for period in range(n_periods):
        start_s = period * PERIOD_S
        target = float(rng.uniform(55.0, 130.0))
        rate = np.concatenate([np.linspace(level, target, ramp),
                               np.full(per_period - ramp, target)])
        level = target
        x, phase = pulse_wave(FS, rate, seed=period, phase0=phase)
        t = start_s + np.arange(per_period) / FS
        fault = fault_for(period, start_s)
        offset = Fault("clock_jump", start_s, value=clock_offset_s)
        fed, produced, late = 0, [], []
        for xc, tc in inject(chunked(x, t, CHUNKS), [offset, fault]):
            estimates = monitor.update(xc, tc)
            fed += len(tc)
            produced.extend(estimates)
            if fed >= CHECK_FROM_S * FS:
                late.extend(estimates)
        assert_log_invariants(produced, PROFILE)
        assert produced[0].emitted_s >= newest_s
        newest_s = produced[-1].emitted_s
        rates = np.array([e.rate_per_min for e in late if e.quantity == "hr"])
        assert within_ec13(rates, target).all(), (period, fault, rates)
        checked += len(rates)
        if fault.kind == "clock_jump":
            clock_offset_s += fault.value
        if (period + 1) * PERIOD_S == 3600.0:
            rss_after_hour_1 = resident_mb()
    growth_mb = resident_mb() - rss_after_hour_1
    print(f"\nsoak: {HOURS} h at {FS:g} Hz, {n_periods} faults, {checked} estimates checked "
          f"after recovery; resident memory after hour 1 {rss_after_hour_1:.0f} MB, growth "
          f"to hour {HOURS} {growth_mb:+.1f} MB")
    assert checked >= n_periods * (PERIOD_S - CHECK_FROM_S) / PROFILE.hr.hop_s * 0.9
    assert growth_mb < 20.0
