"""Resident memory over a long simulated stream.

A :class:`RateMonitor` with one PPG and one respiration channel at 125 Hz (the usual
wearable pair: heart rate and breathing rate) runs at full speed in its own interpreter,
so nothing else of the suite is in its memory. The input is a 60 s block of synthetic
signals, periodic in 60 s so that blocks join without a seam, repeated with advancing
timestamps; it is never held whole in memory (24 h at 125 Hz would be 170 MB by
itself). Chunks are 10 s long: the chunk length changes the temporary arrays of one
call, which are freed after it, not the state the monitor keeps.

Resident memory (``VmRSS`` from ``/proc/self/status``, after a garbage collection) is read
after 1 minute, 1 hour, 4 hours and 24 hours of stream. When the measured speed says
24 hours would take longer than the time budget, the run stops at the last checkpoint
that fits and the 24 h figure is extrapolated linearly from the last two checkpoints;
the table says so.
"""

from __future__ import annotations

import gc
import sys
import time

import numpy as np

from bench import breathing_wave, measure, print_json, run_worker, section

FS = 125.0
BLOCK_S = 60.0
CHUNK_S = 10.0
DAY_S = 86400.0
TARGET_MB = 10.0


def rss_mb() -> float:
    """Resident set size of this process in MB (Linux ``/proc/self/status``)."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    raise RuntimeError("VmRSS not found in /proc/self/status")


def _block(fs: float) -> np.ndarray:
    from streamer.simulation import pulse_train

    n = int(round(BLOCK_S * fs))
    # 75 beats and 15 breaths per minute: whole cycles in 60 s, so blocks join smoothly.
    ppg = pulse_train(fs, np.full(n, 75.0), seed=4)
    resp = breathing_wave(fs, BLOCK_S, 15.0, seed=4)
    return np.column_stack((ppg, resp))


def grow(checkpoints_s: list[float], budget_s: float, fs: float = FS) -> dict:
    """Run the monitor through the checkpoints (stream seconds) within ``budget_s`` wall
    seconds; return RSS and live Python objects at each checkpoint reached."""
    from estimators.monitor import RateMonitor

    monitor = RateMonitor([("PPG", "ppg"), ("RESP", "resp")], fs, "wrist")
    block = _block(fs)
    per_chunk = int(round(CHUNK_S * fs))
    chunks_per_block = len(block) // per_chunk
    offsets = np.arange(per_chunk) / fs
    readings = []
    started = time.perf_counter()
    stream_s = 0.0
    k = 0
    for checkpoint in checkpoints_s:
        if readings:
            # Would this checkpoint fit in the budget at the speed seen so far?
            speed = stream_s / (time.perf_counter() - started)
            if (time.perf_counter() - started) + (checkpoint - stream_s) / speed > budget_s:
                break
        while stream_s < checkpoint - 1e-9:
            j = k % chunks_per_block
            monitor.update(block[j * per_chunk:(j + 1) * per_chunk], stream_s + offsets)
            stream_s += per_chunk / fs
            k += 1
        gc.collect()
        readings.append({"stream_s": stream_s, "rss_mb": rss_mb(),
                         "python_objects": len(gc.get_objects()),
                         "wall_s": time.perf_counter() - started})
    return {"readings": readings, "x_real_time": stream_s / (time.perf_counter() - started)}


def _worker(argv: list[str]) -> None:
    budget_s = float(argv[0])
    checkpoints = [float(v) for v in argv[1:]]
    print_json(grow(checkpoints, budget_s))


def run(quick: bool) -> dict:
    if quick:
        checkpoints, budget_s = [60.0, 300.0, 900.0], 10.0
    else:
        checkpoints, budget_s = [60.0, 3600.0, 4 * 3600.0, DAY_S], 150.0
    r = run_worker("bench.memory", ["--worker", str(budget_s), *map(str, checkpoints)],
                   timeout_s=budget_s * 3 + 120)
    readings = r["readings"]
    if len(readings) < 2:
        raise RuntimeError("the memory run did not get past its first checkpoint")
    first, last = readings[0], readings[-1]
    measured_day = last["stream_s"] >= DAY_S - 1
    if measured_day:
        day_mb, note = last["rss_mb"], "measured"
    else:
        before = readings[-2]
        slope = (last["rss_mb"] - before["rss_mb"]) / (last["stream_s"] - before["stream_s"])
        day_mb = last["rss_mb"] + slope * (DAY_S - last["stream_s"])
        note = (f"extrapolated linearly from {before['stream_s'] / 3600:.3g} h and "
                f"{last['stream_s'] / 3600:.3g} h")
    measures = [measure(f"RSS after {x['stream_s'] / 3600:.3g} h of stream", x["rss_mb"], "MB")
                for x in readings]
    measures.append(measure("growth from 1 min to 24 h", day_mb - first["rss_mb"], "MB",
                            f"<= {TARGET_MB:g} MB", "<=", TARGET_MB, note=note))
    measures.append(measure("live Python objects, last checkpoint minus 1 min",
                            last["python_objects"] - first["python_objects"], "count"))
    method = (f"RateMonitor (1 PPG + 1 respiration channel, {FS:g} Hz, profile wrist) at full "
              f"speed in its own interpreter, {CHUNK_S:g} s chunks of a 60 s periodic synthetic "
              f"block; VmRSS after gc.collect at each checkpoint; wall budget {budget_s:g} s "
              f"(ran at {r['x_real_time']:.0f}x real time).")
    return section("Memory over a long stream", measures, method, r)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--worker":
        _worker(sys.argv[2:])
    else:
        sys.exit("usage: python -m bench.memory --worker BUDGET_S CHECKPOINT_S...")
