"""Synthetic LSL "devices" for the multi-stream tests: each publishes its part of one
:class:`~streamer.simulation.WristRunSession` at its own rate, stamped on its own clock.

True time is the wall clock (``time.time()``, CLOCK_REALTIME), which every process on
the machine shares: sample ``n`` of a device describes the session at ``n / fs`` and is
due at ``epoch + n / fs``. Each device stamps it as a real device does, on its *own* LSL
clock (``pylsl.local_clock()``, CLOCK_MONOTONIC): ``local_clock() - (time.time() - due)``.
Run in a Linux time namespace (``unshare --user --map-root-user --time --monotonic N``)
a device's CLOCK_MONOTONIC, and so its LSL clock, is N seconds off ours while the wall
clock is not: a genuinely different sender clock on one machine, which only LSL's
``time_correction`` can map back. Runnable as ``python -m tests.streamer.lsl_devices``.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import threading
import time

import numpy as np
import pylsl

from streamer.simulation import WristRunSession


def make_outlet(kind: str, name: str, source_id: str, fs: float) -> pylsl.StreamOutlet:
    if kind == "ppg":
        labels, ch_type, stream_type, unit = ["PPG"], "PPG", "PPG", "a.u."
    else:
        labels, ch_type, stream_type, unit = ["X", "Y", "Z"], "ACC", "Accelerometer", "g"
    info = pylsl.StreamInfo(name, stream_type, len(labels), fs, pylsl.cf_double64, source_id)
    channels = info.desc().append_child("channels")
    for label in labels:
        ch = channels.append_child("channel")
        ch.append_child_value("label", label)
        ch.append_child_value("type", ch_type)
        ch.append_child_value("unit", unit)
    return pylsl.StreamOutlet(info, chunk_size=0, max_buffered=60)


def publish(kind: str, name: str, source_id: str, fs: float, epoch: float,
            duration_s: float, session: WristRunSession, stop: threading.Event | None = None,
            step_s: float = 0.04) -> None:
    """Push the device's samples in ``step_s`` chunks, each when its last sample is due."""
    outlet = make_outlet(kind, name, source_id, fs)
    n_total = int(duration_s * fs)
    t = np.arange(n_total) / fs
    values = session.ppg(t)[:, None] if kind == "ppg" else session.acc(t)
    step = max(1, int(round(step_s * fs)))
    try:
        for a in range(0, n_total, step):
            b = min(a + step, n_total)
            due_last = epoch + (b - 1) / fs
            while time.time() < due_last:
                if stop is not None and stop.is_set():
                    return
                time.sleep(min(0.005, max(0.0, due_last - time.time())))
            now_wall, now_lsl = time.time(), pylsl.local_clock()
            stamps = now_lsl - (now_wall - (epoch + np.arange(a, b) / fs))
            outlet.push_chunk(values[a:b].tolist(), stamps.tolist())
    finally:
        del outlet


def publish_markers(name: str, source_id: str, epoch: float, texts_at: list,
                    stop: threading.Event | None = None) -> None:
    """A text marker stream; ``texts_at`` is ``[(session_s, text), ...]``."""
    info = pylsl.StreamInfo(name, "Markers", 1, pylsl.IRREGULAR_RATE, pylsl.cf_string,
                            source_id)
    outlet = pylsl.StreamOutlet(info)
    try:
        for at, text in texts_at:
            while time.time() < epoch + at:
                if stop is not None and stop.is_set():
                    return
                time.sleep(0.005)
            outlet.push_sample([text], pylsl.local_clock() - (time.time() - (epoch + at)))
        while stop is not None and not stop.wait(0.05):
            pass
    finally:
        del outlet


def clock_shift_prefix(shift_s: float) -> list[str] | None:
    """The command prefix running a process whose monotonic clock is ``shift_s`` ahead
    of ours, or None when this machine does not allow it (no unshare, no user or time
    namespaces)."""
    if shutil.which("unshare") is None:
        return None
    prefix = ["unshare", "--user", "--map-root-user", "--time", "--monotonic", f"{shift_s:g}"]
    try:
        probe = subprocess.run(prefix + [sys.executable, "-c",
                                         "import time; print(time.monotonic())"],
                               capture_output=True, text=True, timeout=30)
        theirs = float(probe.stdout)
    except (OSError, ValueError, subprocess.TimeoutExpired):
        return None
    if probe.returncode != 0 or abs(theirs - time.monotonic() - shift_s) > 5.0:
        return None
    return prefix


def main(argv=None) -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--kind", choices=("ppg", "acc"), required=True)
    p.add_argument("--name", required=True)
    p.add_argument("--source-id", required=True)
    p.add_argument("--fs", type=float, required=True)
    p.add_argument("--epoch", type=float, required=True)
    p.add_argument("--duration", type=float, required=True)
    p.add_argument("--taps", type=float, nargs="*", default=())
    args = p.parse_args(argv)
    publish(args.kind, args.name, args.source_id, args.fs, args.epoch, args.duration,
            WristRunSession(taps=tuple(args.taps)))


if __name__ == "__main__":
    main()
