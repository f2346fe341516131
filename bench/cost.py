"""Compute cost per hop, JIT on and off, and streaming against batch.

Two parts of the suite live here:

``cost``
    The time one :meth:`RateMonitor.update` call takes when it is fed one hop of
    samples (``hop_s * fs`` of them, the boundaries at ``floor(p * hop_s * fs)``, as a
    live source delivers them), for the heart-rate setting (one PPG channel, profile
    ``wrist``) and the breathing setting (one respiration channel), measured in a
    fresh interpreter with the numba JIT on and in another with
    ``RIDGEWATCH_NO_JIT=1`` (the switch is read at import). The window is filled first (and the kernels compiled) so
    only steady-state hops count. A call that completes no hop (the decimated sample
    count can fall just short of the next hop) adds its time to the next call that does,
    so the per-hop costs add up to the total time.

``streaming_batch``
    Cost per column of the live path against the batch path on the same record, like
    with like: the causal chain through :meth:`RateMonitor.update` in hop-sized chunks
    against the same call on the whole record at once; and the front end alone
    (pre-processing, STFT, de-shape: :meth:`ChannelPath.update` in hop-sized chunks
    against :meth:`ChannelPath.batch` with causal filters). Best of three repeats each,
    so that a burst of load from other processes does not decide the ratio.

Run one worker by hand: ``python -m bench.cost --worker 400 hr rr``.
"""

from __future__ import annotations

import dataclasses
import math
import sys
import time

import numpy as np

from bench import (breathing_wave, hop_bounds, measure, print_json, run_worker, section,
                   summary_ms, synthetic_ppg)

FS = 125.0
"""Sampling rate of the synthetic channels (Hz): the rate of the common wrist and
fingertip recordings in ../shared/data."""

SETTINGS = {
    "hr": ("heart rate, 1 PPG channel, profile wrist", "ppg"),
    "hr+rr": ("heart and breathing rate from 1 PPG channel, profile wrist", "ppg"),
    "rr": ("breathing rate, 1 respiration channel", "resp"),
}
"""``hr`` is the heart-rate setting alone (breathing from the pulse switched off);
``hr+rr`` is the default wrist profile, where the PPG channel also gives a breathing
rate from its respiratory modulations."""

HR_P99_TARGET_MS = 0.2
STREAM_BATCH_TARGET = 1.5


def hop_costs(quantity: str, n_hops: int, fs: float = FS, profile: str = "wrist",
              seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Seconds per hop of :meth:`RateMonitor.update` fed one hop at a time: wall time
    and the calling thread's CPU time (which a loaded machine disturbs less, since time
    spent waiting for a core is not counted)."""
    from estimators.config import get_profile
    from estimators.monitor import RateMonitor

    kind = SETTINGS[quantity][1]
    prof = get_profile(profile)
    if quantity == "hr":
        prof = dataclasses.replace(prof, breathing_from_pulse=False)
    settings = prof.rr if quantity == "rr" else prof.hr
    # Fill the longest window first: with breathing from the pulse, its 48 s one.
    window_s = max(settings.window_s, prof.rr_pulse.window_s if quantity == "hr+rr" else 0.0)
    warm = int(math.ceil(window_s / settings.hop_s)) + 8
    total = warm + n_hops
    bounds = hop_bounds(total, settings.hop_s, fs)
    duration_s = (bounds[-1] + 1) / fs
    if kind == "ppg":
        x = synthetic_ppg(fs, duration_s, 1, seed)[0][:, 0]
    else:
        x = breathing_wave(fs, duration_s, seed=seed)
    t = np.arange(len(x)) / fs
    monitor = RateMonitor([("x", kind)], fs, prof)
    costs: list[float] = []
    cpu_costs: list[float] = []
    pending = pending_cpu = 0.0
    for p in range(total):
        a, b = bounds[p], bounds[p + 1]
        start, start_cpu = time.perf_counter(), time.thread_time()
        estimates = monitor.update(x[a:b, None], t[a:b])
        elapsed, elapsed_cpu = time.perf_counter() - start, time.thread_time() - start_cpu
        if p < warm:
            continue
        pending += elapsed
        pending_cpu += elapsed_cpu
        hops = len({e.emitted_s for e in estimates})
        if hops:
            costs.extend([pending / hops] * hops)
            cpu_costs.extend([pending_cpu / hops] * hops)
            pending = pending_cpu = 0.0
    return np.asarray(costs), np.asarray(cpu_costs)


def _worker(argv: list[str]) -> None:
    n_hops, quantities = int(argv[0]), argv[1:]
    from estimators import _jit

    out = {}
    for quantity in quantities:
        costs, cpu_costs = hop_costs(quantity, n_hops)
        cpu = {f"cpu_{k}": v for k, v in summary_ms(cpu_costs).items() if k != "n"}
        out[quantity] = {"jit": _jit.JIT_ENABLED, **summary_ms(costs), **cpu}
    print_json(out)


def run_cost(quick: bool) -> dict:
    n_jit, n_plain = (200, 30) if quick else (2400, 400)
    on = run_worker("bench.cost", ["--worker", str(n_jit), *SETTINGS])
    off = run_worker("bench.cost", ["--worker", str(n_plain), *SETTINGS],
                     {"RIDGEWATCH_NO_JIT": "1"}, timeout_s=600)
    results: dict = {}
    for quantity in SETTINGS:
        if not on[quantity]["jit"] or off[quantity]["jit"]:
            raise RuntimeError("the JIT switch did not take effect in the workers")
        results[quantity] = {"jit_on": on[quantity], "jit_off": off[quantity]}
    measures = []
    for quantity, label in (("hr", "heart rate"), ("hr+rr", "heart + breathing from PPG"),
                            ("rr", "breathing")):
        on, off = results[quantity]["jit_on"], results[quantity]["jit_off"]
        is_target = quantity == "hr"
        measures += [
            measure(f"{label}: per-hop cost per channel, median (JIT on)", on["median_ms"],
                    "ms", note=_cpu_note(on["cpu_median_ms"])),
            measure(f"{label}: per-hop cost per channel, p99 (JIT on)", on["p99_ms"], "ms",
                    f"<= {HR_P99_TARGET_MS} ms" if is_target else None,
                    "<=" if is_target else None, HR_P99_TARGET_MS if is_target else None,
                    note=_cpu_note(on["cpu_p99_ms"])),
            measure(f"{label}: per-hop cost, median (JIT off)", off["median_ms"], "ms",
                    note=_cpu_note(off["cpu_median_ms"])),
            measure(f"{label}: per-hop cost, p99 (JIT off)", off["p99_ms"], "ms",
                    note=_cpu_note(off["cpu_p99_ms"])),
            measure(f"{label}: JIT off / on (medians)",
                    _ratio(off["median_ms"], on["median_ms"]), "x"),
        ]
    method = (f"RateMonitor.update fed one hop (hop_s * fs samples, fs = {FS:g} Hz) per call "
              "after the window is full; one channel, so per call = per channel; "
              "one interpreter with the JIT on and one with RIDGEWATCH_NO_JIT=1; "
              f"{n_jit} hops with JIT, {n_plain} without; garbage collector left on as live. "
              "Values are wall time; the note gives the calling thread's CPU time, which "
              "time spent waiting for a core on a loaded machine does not inflate.")
    return section("Per-hop compute cost", measures, method, results)


def _cpu_note(cpu_ms) -> str:
    return "" if cpu_ms is None else f"thread CPU time {cpu_ms:.3g} ms"


def _ratio(a, b):
    return None if a is None or b is None or b == 0 else a / b


# --------------------------------------------------------------- streaming vs batch


def _best(fn, repeats: int) -> tuple[float, int]:
    best, columns = math.inf, 0
    for _ in range(repeats):
        elapsed, columns = fn()
        best = min(best, elapsed)
    return best, columns


def stream_vs_batch(duration_s: float, repeats: int, fs: float = FS) -> dict:
    from estimators.config import get_profile
    from estimators.monitor import ChannelPath, RateMonitor

    # The heart-rate setting alone (breathing from the pulse off), as the per-hop cost.
    profile = dataclasses.replace(get_profile("wrist"), breathing_from_pulse=False)
    samples, t, _ = synthetic_ppg(fs, duration_s, 1, seed=11)
    x = samples[:, 0]
    n_hops = int(len(x) // (profile.hr.hop_s * fs))
    bounds = hop_bounds(n_hops, profile.hr.hop_s, fs)
    bounds[-1] = len(x)

    def monitor_live():
        monitor = RateMonitor([("x", "ppg")], fs, profile)
        start = time.perf_counter()
        emitted = set()
        for a, b in zip(bounds[:-1], bounds[1:]):
            emitted.update(e.emitted_s for e in monitor.update(samples[a:b], t[a:b]))
        return time.perf_counter() - start, len(emitted)

    def monitor_batch():
        monitor = RateMonitor([("x", "ppg")], fs, profile)
        start = time.perf_counter()
        estimates = monitor.update(samples, t)
        return time.perf_counter() - start, len({e.emitted_s for e in estimates})

    def path_live():
        path = ChannelPath("x", "ppg", profile.hr, fs)
        start = time.perf_counter()
        columns = 0
        for a, b in zip(bounds[:-1], bounds[1:]):
            columns += len(path.update(x[a:b], t[a:b]))
        return time.perf_counter() - start, columns

    def path_batch():
        path = ChannelPath("x", "ppg", profile.hr, fs)
        start = time.perf_counter()
        block = path.batch(x, t, zero_phase=False)
        return time.perf_counter() - start, len(block)

    # Warm up (compile, caches) on a short piece before timing anything.
    RateMonitor([("x", "ppg")], fs, profile).update(samples[: int(20 * fs)], t[: int(20 * fs)])
    out = {}
    for name, fn in (("monitor_live", monitor_live), ("monitor_batch", monitor_batch),
                     ("front_end_live", path_live), ("front_end_batch", path_batch)):
        elapsed, columns = _best(fn, repeats)
        out[name] = {"seconds": elapsed, "columns": columns,
                     "us_per_column": 1e6 * elapsed / max(columns, 1)}
    return out


def run_streaming_batch(quick: bool) -> dict:
    duration_s, repeats = (60.0, 1) if quick else (300.0, 3)
    r = stream_vs_batch(duration_s, repeats)
    chain = _ratio(r["monitor_live"]["us_per_column"], r["monitor_batch"]["us_per_column"])
    front = _ratio(r["front_end_live"]["us_per_column"], r["front_end_batch"]["us_per_column"])
    measures = [
        measure("whole causal chain, live (hop chunks): cost per column",
                r["monitor_live"]["us_per_column"], "us"),
        measure("whole causal chain, one call on the record: cost per column",
                r["monitor_batch"]["us_per_column"], "us"),
        measure("whole causal chain: live / one call", chain, "x",
                f"<= {STREAM_BATCH_TARGET}", "<=", STREAM_BATCH_TARGET),
        measure("front end (pre-process, STFT, de-shape): live / ChannelPath.batch causal",
                front, "x"),
    ]
    method = (f"One synthetic PPG record, {duration_s:g} s at {FS:g} Hz, profile wrist, heart "
              "rate alone (breathing from the pulse off). "
              "Live = hop-sized chunks (floor(p * hop_s * fs) boundaries); batch = the "
              "same call on the whole record (RateMonitor.update), and for the front end "
              f"ChannelPath.update in hop chunks against ChannelPath.batch(zero_phase=False). "
              f"Best of {repeats} repeat(s); JIT on; same process, side by side.")
    return section("Streaming vs batch", measures, method, r)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--worker":
        _worker(sys.argv[2:])
    else:
        sys.exit("usage: python -m bench.cost --worker N_HOPS hr|rr...  (the suite: python -m bench)")
