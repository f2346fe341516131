"""Frame rate of the live window while the engine keeps real time.

``python -m bench.display_fps [--seconds 20] [--out bench/results/display.json]``

Four synthetic channels (PPG, ECG, respiration, one accelerometer axis) at 250 Hz are
replayed at real time in chunks of 20 ms, the way an LSL inlet delivers a live stream,
through the real :func:`~streamer.display.qt_window.run_with_window`. The same replay
then runs without a window. Reported:

* the window's frames per second: paints of the raw-trace view (the view that moves
  with every chunk), over the run after a warm-up;
* whether estimation kept real time: how late each chunk reached the engine's
  listeners compared with its release by the replay clock (median and 95th
  percentile), and the stream seconds processed per wall second;
* the engine's compute time per hop with and without the window (the window and the
  engine share one interpreter, so drawing can slow the engine down).

Without ``DISPLAY`` the window renders offscreen (``QT_QPA_PLATFORM=offscreen``), which
paints in software like a virtual X server does. The figures depend on the machine and
on whatever else runs on it; they are printed and written as JSON, never asserted.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

REPO_ROOT = Path(__file__).resolve().parents[1]
DEFAULT_OUT = REPO_ROOT / "bench" / "results" / "display.json"
FS = 250.0
CHUNK_S = 0.02
WARMUP_S = 3.0
TARGET_FPS = 20.0


def _recording(seconds: float):
    from streamer.simulation import cycling_trial
    from streamer.sources.base import ChannelInfo, Recording, SourceInfo

    sim = cycling_trial(FS)
    n = min(len(sim.timestamps), int(math.ceil((seconds + 5.0) * FS)))
    info = SourceInfo("synthetic cycling trial, 4 channels at 250 Hz", FS, tuple(
        ChannelInfo(name, kind, unit) for name, kind, unit in zip(sim.names, sim.kinds,
                                                                  sim.units)))
    return Recording(sim.samples[:n], sim.timestamps[:n], info)


class _Lateness:
    """Listener (engine thread) recording how late each chunk is processed.

    At real time a chunk whose newest sample has stream time ``t`` is released at wall
    time ``w0 + t`` for some unknown ``w0``. Lateness is ``wall - t`` minus its smallest
    value over the run: how much later than the most punctual chunk a chunk reached the
    listeners. An engine that keeps real time shows a small, flat lateness; one that
    falls behind shows a lateness growing with time (``trend_s``).
    """

    def __init__(self):
        self.samples: list = []

    def __call__(self, update) -> None:
        if update.chunk is None or len(update.chunk) == 0:
            return
        self.samples.append((float(update.chunk.timestamps[-1]), time.monotonic()))

    def summary(self) -> dict:
        empty = {"median_s": None, "p95_s": None, "max_s": None, "trend_s": None}
        if not self.samples:
            return empty
        t, wall = np.array(self.samples).T
        offset = wall - t
        late = offset - offset.min()
        keep = t >= t[0] + WARMUP_S
        late = late[keep]
        if len(late) < 8:
            return empty
        quarter = len(late) // 4
        return {"median_s": float(np.median(late)), "p95_s": float(np.percentile(late, 95)),
                "max_s": float(late.max()),
                "trend_s": float(np.median(late[-quarter:]) - np.median(late[:quarter]))}


def _runner(seconds: float):
    from estimators.config import get_profile
    from streamer.channels import select
    from streamer.runner import Runner
    from streamer.sources.replay import RecordingSource

    recording = _recording(seconds)
    source = RecordingSource(recording, speed=1.0, chunk_s=CHUNK_S)
    selected = select(recording.info, None)
    runner = Runner(source, selected, get_profile("wrist"), duration_s=seconds)
    lateness = _Lateness()
    runner.listeners.append(lateness)
    return runner, lateness


def _engine_figures(stats, hops_per_s: float) -> dict:
    hops = stats.stream_seconds * hops_per_s
    return {
        "stream_s": stats.stream_seconds,
        "compute_ms_per_hop": 1e3 * stats.compute_s / hops if hops > 0 else None,
        "engine_x_real_time": (stats.stream_seconds / stats.compute_s
                               if stats.compute_s > 0 else None),
    }


def run_window(seconds: float) -> dict:
    """One run with the window; frame and engine figures."""
    from streamer.display.qt_window import PaintCounter, application, run_with_window

    app = application()
    runner, lateness = _runner(seconds)
    seen = {"paints": []}

    def on_window(window):
        seen["window"] = window
        seen["start"] = time.monotonic()
        seen["counter"] = PaintCounter(seen["paints"])
        window.traces_widget.viewport().installEventFilter(seen["counter"])

    wall0 = time.monotonic()
    stats = run_with_window(runner, runner.profile, duration_s=seconds, on_window=on_window)
    wall = time.monotonic() - wall0
    window = seen["window"]
    paints = [t for t in seen["paints"] if t >= seen["start"] + WARMUP_S]
    fps = ((len(paints) - 1) / (paints[-1] - paints[0])
           if len(paints) > 1 and paints[-1] > paints[0] else 0.0)
    hops_per_s = 1.0 / runner.profile.hr.hop_s
    return {"qt_platform": app.platformName(), "fps": fps, "frames_painted": len(paints), "traces_redrawn": window.frames,
            "dropped_updates": window.feed.dropped, "wall_s": wall,
            "lateness": lateness.summary(), **_engine_figures(stats, hops_per_s)}


def run_headless(seconds: float) -> dict:
    """The same replay without any display, for comparison."""
    runner, lateness = _runner(seconds)
    wall0 = time.monotonic()
    stats = runner.run()
    wall = time.monotonic() - wall0
    return {"wall_s": wall, "lateness": lateness.summary(),
            **_engine_figures(stats, 1.0 / runner.profile.hr.hop_s)}


def _fmt(value, spec: str) -> str:
    return "n/a" if value is None else format(value, spec)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.display_fps",
                                     description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=20.0,
                        help="wall seconds per run (default 20)")
    parser.add_argument("--out", default=str(DEFAULT_OUT), help="JSON output path")
    args = parser.parse_args(argv)
    if not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    window = run_window(args.seconds)
    platform_name = window["qt_platform"]
    headless = run_headless(args.seconds)
    result = {
        "what": "live window, 4 channels at 250 Hz replayed at real time in 20 ms chunks",
        "qt_platform": platform_name,
        "python": platform.python_version(),
        "cpu_count": os.cpu_count(),
        "load_average": list(os.getloadavg()) if hasattr(os, "getloadavg") else None,
        "seconds_per_run": args.seconds,
        "target_fps": TARGET_FPS,
        "window": window,
        "no_window": headless,
    }
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(result, indent=2) + "\n")

    late_w, late_h = window["lateness"], headless["lateness"]
    rows = [
        ("display frames per second", _fmt(window["fps"], ".1f"), "-",
         f">= {TARGET_FPS:g}"),
        ("chunk lateness median (s)", _fmt(late_w["median_s"], ".3f"),
         _fmt(late_h["median_s"], ".3f"), "near 0"),
        ("chunk lateness 95th pct (s)", _fmt(late_w["p95_s"], ".3f"),
         _fmt(late_h["p95_s"], ".3f"), "small"),
        ("lateness trend, last - first quarter (s)", _fmt(late_w["trend_s"], ".3f"),
         _fmt(late_h["trend_s"], ".3f"), "about 0"),
        ("compute ms per hop", _fmt(window["compute_ms_per_hop"], ".2f"),
         _fmt(headless["compute_ms_per_hop"], ".2f"), ""),
        ("dropped display updates", str(window["dropped_updates"]), "-", "0"),
    ]
    print(f"display benchmark ({platform_name}, {args.seconds:g} s per run, "
          f"load average {result['load_average'][0]:.1f} on {os.cpu_count()} cores)"
          if result["load_average"] else "display benchmark")
    print(f"{'':42s} {'window':>10s} {'no window':>10s}  target")
    for name, a, b, target in rows:
        print(f"{name:42s} {a:>10s} {b:>10s}  {target}")
    print(f"written to {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
