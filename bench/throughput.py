"""Replay throughput in x real time.

The whole replay path as ``ridgewatch replay --speed max --no-log --display none`` runs
it: a :class:`~streamer.sources.replay.RecordingSource` at ``speed=inf`` with the
command line's full-speed chunks (``streamer.cli.MAX_SPEED_CHUNK_S``) feeding a :class:`~streamer.runner.Runner`
with no log, no outlet and no display. Channels are synthetic PPG (every one a
heart-rate path; with two or more, the fused output as well), 1, 4 and 16 of them at
125 and 500 Hz. x real time = stream seconds / wall seconds of ``Runner.run``; the
same ratio on the process's CPU time is given beside it, since on a loaded machine wall
time also counts the time spent waiting for a core.
"""

from __future__ import annotations

import dataclasses
import time

from bench import measure, section, synthetic_ppg

CHANNEL_COUNTS = (1, 4, 16)
RATES_HZ = (125.0, 500.0)
def _chunk_s() -> float:
    from streamer.cli import replay_chunk_s

    return replay_chunk_s(float("inf"))


CHUNK_S = _chunk_s()
"""The chunk length of a full-speed replay from the command line
(``streamer.cli.replay_chunk_s``)."""
TARGET_X = 3000.0
"""Heart rate alone, one PPG channel at 125 Hz (issue 15)."""
TARGET_16_VS_1 = 6.0
"""Sixteen PPG channels cost at most this many times one channel (issue 15)."""


def replay_speed(n_channels: int, fs: float, duration_s: float, profile: str = "wrist",
                 breathing_from_pulse: bool = False) -> dict:
    """Stream seconds per wall second of a full-speed replay through the Runner."""
    from estimators.config import get_profile
    from streamer.channels import Selected
    from streamer.runner import Runner
    from streamer.sources.base import ChannelInfo, Recording, SourceInfo
    from streamer.sources.replay import RecordingSource

    samples, t, _ = synthetic_ppg(fs, duration_s, n_channels, seed=5)
    names = [f"PPG{c}" for c in range(n_channels)]
    info = SourceInfo("bench-synthetic", fs, tuple(ChannelInfo(n, "ppg", "a.u.") for n in names))
    recording = Recording(samples, t, info)
    source = RecordingSource(recording, speed=float("inf"), chunk_s=CHUNK_S)
    selected = [Selected(c, n, "ppg") for c, n in enumerate(names)]
    prof = dataclasses.replace(get_profile(profile), breathing_from_pulse=breathing_from_pulse)
    runner = Runner(source, selected, prof)
    start, start_cpu = time.perf_counter(), time.process_time()
    stats = runner.run()
    wall_s, cpu_s = time.perf_counter() - start, time.process_time() - start_cpu
    return {"channels": n_channels, "fs_hz": fs, "breathing_from_pulse": breathing_from_pulse,
            "stream_s": recording.duration_s,
            "wall_s": wall_s, "cpu_s": cpu_s, "x_real_time": recording.duration_s / wall_s,
            "x_real_time_cpu": recording.duration_s / cpu_s,
            "engine_share": stats.compute_s / wall_s, "estimates": stats.estimates}


def run(quick: bool) -> dict:
    duration_s = 30.0 if quick else 180.0
    # Warm-up: compile and fill caches before timing; 40 s, past the start-up of the
    # breathing window (24 s), so that the breathing kernels are loaded too.
    replay_speed(1, 125.0, 40.0, breathing_from_pulse=True)
    rows = [replay_speed(c, fs, duration_s) for fs in RATES_HZ for c in CHANNEL_COUNTS]
    measures = []
    for r in rows:
        is_target = r["channels"] == 1 and r["fs_hz"] == 125.0
        measures.append(measure(
            f"{r['channels']} PPG channel(s) at {r['fs_hz']:g} Hz", r["x_real_time"],
            "x real time", f">= {TARGET_X:g}x" if is_target else None,
            ">=" if is_target else None, TARGET_X if is_target else None,
            note=f"by process CPU time {r['x_real_time_cpu']:.0f}x"))
    both = replay_speed(1, 125.0, duration_s, breathing_from_pulse=True)
    measures.append(measure("1 PPG channel at 125 Hz, heart and breathing rate (default "
                            "wrist profile)", both["x_real_time"], "x real time",
                            note=f"by process CPU time {both['x_real_time_cpu']:.0f}x"))
    rows.append(both)
    one = {(r["channels"], r["fs_hz"]): r["x_real_time"] for r in rows
           if not r["breathing_from_pulse"]}
    for fs in RATES_HZ:
        is_target = fs == 125.0
        measures.append(measure(f"16 channels vs 1 at {fs:g} Hz: cost ratio per stream second",
                                one[(1, fs)] / one[(16, fs)], "x",
                                f"<= {TARGET_16_VS_1:g}" if is_target else None,
                                "<=" if is_target else None,
                                TARGET_16_VS_1 if is_target else None,
                                note="16 would be linear scaling"))
    method = (f"Runner + RecordingSource(speed=inf, chunk_s={CHUNK_S}) with no log, outlet or "
              f"display; synthetic PPG channels, {duration_s:g} s of stream each, profile "
              "wrist with heart rate only (breathing from the pulse off) unless the row says "
              "otherwise; x real time = stream seconds / wall seconds of Runner.run (the note gives "
              "stream seconds / process CPU seconds, less disturbed by other load).")
    return section("Replay throughput", measures, method, {"runs": rows})
