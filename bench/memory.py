"""Resident memory: a long simulated stream, and ``ridgewatch offline`` of long records.

``python -m bench.memory`` runs the offline part alone and prints its rows
(``--quick``: 15 and 30 minute records); ``python -m bench --only offline_memory`` runs
it inside the suite.

**Offline** (:func:`run_offline`): ``ridgewatch offline`` with the default profile on a
synthetic single-PPG record at 125 Hz written as CSV.gz (1 h and 4 h), each in its own
child interpreter; its peak resident memory is the child's ``ru_maxrss`` (from
``os.wait4``, so no other process counts), its wall time includes reading the file and
writing the log. Target: 4 h within 1.5 GB.

**Live stream** (:func:`run`):

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



# ------------------------------------------------------------------ offline memory

OFFLINE_TARGET_MB = 1536.0
"""Peak resident memory allowed for ``ridgewatch offline`` of a 4 h single-PPG record
at 125 Hz, default profile (1.5 GB)."""
OFFLINE_HOURS = (1.0, 4.0)
OFFLINE_QUICK_HOURS = (0.25, 0.5)


def write_ppg_record(path, duration_s: float, fs: float = FS, seed: int = 5) -> None:
    """A synthetic single-PPG record as a gzip-compressed CSV (``time_s,PPG``).

    The heart rate wanders between 60 and 90 bpm over ten minutes and the pulse is
    scaled by a 15 breaths/min modulation, so both heart rate and breathing from the
    pulse have something to track. Written in one-minute pieces so the writer never
    holds the text of the whole file.
    """
    import gzip

    from streamer.simulation import pulse_train

    n = int(round(duration_s * fs))
    t = np.arange(n) / fs
    rate = 75.0 + 15.0 * np.sin(2 * np.pi * t / 600.0)
    ppg = pulse_train(fs, rate, seed=seed) * (1.0 + 0.15 * np.sin(2 * np.pi * t * 0.25))
    piece = int(round(60 * fs))
    with gzip.open(path, "wt", compresslevel=1) as f:
        f.write("time_s,PPG\n")
        for a in range(0, n, piece):
            rows = np.column_stack((t[a:a + piece], ppg[a:a + piece]))
            f.write("\n".join(f"{x:.3f},{y:.6f}" for x, y in rows.tolist()) + "\n")


def offline_peak(record, log, profile: str = "wrist", root=None) -> dict:
    """Run ``ridgewatch offline record --log log`` in a child interpreter; its peak
    resident memory (``ru_maxrss`` of that child alone, from ``os.wait4``) and wall time.
    ``root``: the source tree to run (default this one), e.g. an export of an earlier
    commit for a before/after comparison in one run."""
    import os
    import subprocess

    from bench import REPO_ROOT

    root = REPO_ROOT if root is None else root
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(root), env.get("PYTHONPATH")]))
    command = [sys.executable, "-c", "import sys; from streamer.cli import main; "
               "sys.exit(main())", "offline", str(record), "--log", str(log),
               "--profile", profile, "-q"]
    started = time.perf_counter()
    child = subprocess.Popen(command, cwd=root, env=env,
                             stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    stderr = child.stderr.read()
    _, status, usage = os.wait4(child.pid, 0)
    child.returncode = os.waitstatus_to_exitcode(status)
    wall_s = time.perf_counter() - started
    if child.returncode != 0:
        tail = (stderr.decode("utf-8", "replace").strip().splitlines() or ["(no output)"])[-1]
        raise RuntimeError(f"ridgewatch offline failed (exit {child.returncode}): {tail}")
    return {"peak_rss_mb": usage.ru_maxrss / 1024.0, "wall_s": wall_s}


def run_offline(quick: bool, before=None) -> dict:
    """Peak memory and time of ``ridgewatch offline`` on synthetic single-PPG records;
    with ``before`` (another source tree), the same records through it too, and the
    ratios of this tree's figures to its."""
    import tempfile
    from pathlib import Path

    hours = OFFLINE_QUICK_HOURS if quick else OFFLINE_HOURS
    runs, earlier = {}, {}
    with tempfile.TemporaryDirectory() as folder:
        for h in hours:
            record = Path(folder) / f"ppg-{h:g}h.csv.gz"
            write_ppg_record(record, h * 3600.0)
            runs[h] = offline_peak(record, Path(folder) / f"ppg-{h:g}h-offline.csv")
            runs[h]["record_mb"] = record.stat().st_size / 2 ** 20
            if before is not None:
                earlier[h] = offline_peak(record, Path(folder) / f"ppg-{h:g}h-before.csv",
                                          root=before)
    short, long = hours
    measures = []
    for h in hours:
        last = h == long and not quick
        measures.append(measure(f"offline peak RSS, {h:g} h single PPG", runs[h]["peak_rss_mb"],
                                "MB", f"<= {OFFLINE_TARGET_MB:g} MB" if last else None,
                                "<=" if last else None, OFFLINE_TARGET_MB if last else None))
        measures.append(measure(f"offline wall time, {h:g} h single PPG", runs[h]["wall_s"],
                                "s", note=f"{h * 3600 / runs[h]['wall_s']:.0f}x real time"))
    measures.append(measure(f"peak RSS ratio {long:g} h / {short:g} h",
                            runs[long]["peak_rss_mb"] / runs[short]["peak_rss_mb"], ""))
    for h, then in earlier.items():
        measures.append(measure(f"{h:g} h: peak RSS, this tree / before",
                                runs[h]["peak_rss_mb"] / then["peak_rss_mb"], "",
                                note=f"before {then['peak_rss_mb']:.0f} MB"))
        measures.append(measure(f"{h:g} h: wall time, this tree / before",
                                runs[h]["wall_s"] / then["wall_s"], "",
                                note=f"before {then['wall_s']:.1f} s"))
    method = (f"`ridgewatch offline` (profile wrist) on a synthetic single-PPG CSV.gz at "
              f"{FS:g} Hz (time_s,PPG; heart rate 60-90 bpm, breathing modulation) in a child "
              f"interpreter; peak RSS = ru_maxrss of that child (os.wait4), wall time "
              f"includes reading the file and writing the log.")
    return section("Offline memory (4 h record)", measures, method,
                   {"this": {f"{h:g}h": r for h, r in runs.items()},
                    "before": {f"{h:g}h": r for h, r in earlier.items()}})


def main(argv: list[str]) -> int:
    import argparse

    parser = argparse.ArgumentParser(prog="python -m bench.memory",
                                     description="peak memory of ridgewatch offline")
    parser.add_argument("--quick", action="store_true", help="15 and 30 minute records")
    parser.add_argument("--before", metavar="DIR",
                        help="also run another source tree (e.g. 'git archive' of an "
                             "earlier commit) on the same records and print the ratios")
    args = parser.parse_args(argv)
    result = run_offline(args.quick, args.before)
    for row in result["measures"]:
        note = f" ({row['note']})" if row["note"] else ""
        target = f"  target {row['target']}: {'met' if row['met'] else 'not met'}" \
            if row["target"] else ""
        print(f"{row['measure']}: {row['value']:.4g} {row['unit']}{note}{target}")
    return 0

if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--worker":
        _worker(sys.argv[2:])
    else:
        sys.exit(main(sys.argv[1:]))
