"""End-to-end live latency over LSL on the loopback interface.

The chain, as ``ridgewatch live --publish`` runs it::

    publisher process                 this process
    SamplePublisher  --LSL-->  LslSource -> Runner(RateMonitor) -> EstimateOutlet
                                                                      |  LSL
                                                   test inlet  <------+

* The publisher (a separate interpreter, standing in for the device) pushes synthetic
  PPG at 125 Hz in real time, one sample per push, and records for every sample its
  LSL timestamp and the :func:`pylsl.local_clock` time just before the push.
* The runner reads the stream with :class:`LslSource` in a thread and publishes every
  estimate with :class:`EstimateOutlet` (``use_stream_time=True``).
* The test inlet, opened before the first estimate, notes :func:`pylsl.local_clock` when
  each estimate arrives.

Stream-time mapping: the publisher shifts its sample times by one constant so the first
sample is stamped "now" on the local LSL clock; the source's inlet adds liblsl's clock
offset (``proc_clocksync``; about zero on one machine); the engine's ``emitted_s`` is the
(mapped) timestamp of the newest sample an estimate used; the outlet stamps each
estimate with it; the test inlet reads that stamp unchanged (no processing flags). So
the estimate's stamp names the sample, and that sample's recorded push time is where
the latency starts. Both clocks are the same local LSL clock (one machine), so::

    latency = arrival time of the estimate - push time of its newest sample

This is the delay *beyond the hop*: a sample that arrives just after a hop waits up to
one hop before any estimate uses it. That wait is reported separately ("incl. hop
wait": from the push of the oldest sample first used by an estimate).
"""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
import threading
import time
import uuid

import numpy as np

from bench import REPO_ROOT, measure, section, summary_ms, synthetic_ppg, worker_env

FS = 125.0
TARGET_MS = 50.0
CONNECT_TIMEOUT_S = 20.0


# ------------------------------------------------------------------ publisher process


def publish(name: str, duration_s: float, fs: float = FS) -> None:
    """Push synthetic PPG in real time, one sample per push; print the push log as one
    JSON line and keep the stream open until standard input closes."""
    import pylsl

    from streamer.sources.base import ChannelInfo, Chunk, SourceInfo
    from streamer.sources.lsl_publish import SamplePublisher

    samples, t, _ = synthetic_ppg(fs, duration_s, 1, seed=9)
    info = SourceInfo(name, fs, (ChannelInfo("PPG", "ppg", "a.u."),))
    publisher = SamplePublisher(info, source_id=name)
    if not publisher.wait_for_consumers(CONNECT_TIMEOUT_S):
        raise RuntimeError(f"no inlet subscribed to {name} within {CONNECT_TIMEOUT_S:g} s")
    push_s = np.empty(len(t))
    stamps = np.empty(len(t))
    start = pylsl.local_clock()
    for k in range(len(t)):
        due = start + t[k] - t[0]
        wait = due - pylsl.local_clock()
        if wait > 0:
            time.sleep(wait)
        push_s[k] = pylsl.local_clock()
        publisher.push_chunk(Chunk(samples[k:k + 1], t[k:k + 1]))
        stamps[k] = t[k] + publisher.offset_s
    # Report, then keep the stream open until the measuring process has stopped reading
    # (it closes our standard input), so the end of the run is not a lost stream.
    print(json.dumps({"stamps": stamps.tolist(), "push_s": push_s.tolist()}), flush=True)
    sys.stdin.read()
    publisher.close()


# -------------------------------------------------------------------- measurement


def _open_inlet(source_id: str):
    import pylsl

    found = pylsl.resolve_byprop("source_id", source_id, minimum=1, timeout=CONNECT_TIMEOUT_S)
    if not found:
        raise RuntimeError(f"the estimate stream {source_id} was not found on loopback")
    inlet = pylsl.StreamInlet(found[0], max_buflen=60, processing_flags=0)
    inlet.open_stream(timeout=CONNECT_TIMEOUT_S)
    return inlet


def measure_latency(duration_s: float, profile: str = "wrist") -> dict:
    import pylsl

    from estimators.config import get_profile
    from streamer.channels import select
    from streamer.runner import Runner
    from streamer.sinks.outlet import EstimateOutlet
    from streamer.sources.lsl_source import LslSource

    # Heart rate alone: the latency of the hr estimate is what is measured here.
    prof = dataclasses.replace(get_profile(profile), breathing_from_pulse=False)
    # Unique names: other LSL streams (e.g. tests) may be on the same network.
    tag = f"{os.getpid()}-{uuid.uuid4().hex[:8]}"
    samples_name, estimates_id = f"bench-latency-samples-{tag}", f"bench-latency-est-{tag}"
    outlet = EstimateOutlet([("hr", "PPG")], prof.hr.hop_s, name=estimates_id,
                            source_id=estimates_id, use_stream_time=True)
    inlet = _open_inlet(outlet.source_ids[("hr", "PPG")])
    code = f"import bench.latency as L; L.publish({samples_name!r}, {duration_s!r})"
    publisher = subprocess.Popen([sys.executable, "-c", code], cwd=REPO_ROOT, env=worker_env(),
                                 stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                 stderr=subprocess.DEVNULL, text=True)
    report: list[str] = []
    reader = threading.Thread(target=lambda: report.append(publisher.stdout.readline()),
                              name="bench-latency-report", daemon=True)
    reader.start()
    runner = thread = None
    try:
        source = LslSource(name=samples_name, timeout_s=CONNECT_TIMEOUT_S, extra_wait_s=0.0)
        runner = Runner(source, select(source.info, ["PPG=ppg"]), prof, outlet=outlet)
        thread = threading.Thread(target=runner.run, name="bench-latency-runner", daemon=True)
        thread.start()
        arrivals, arrival_stamps = [], []
        deadline = time.monotonic() + duration_s + CONNECT_TIMEOUT_S
        while time.monotonic() < deadline:
            # After the publisher's last push, wait 0.5 s more for the last estimates.
            sample, stamp = inlet.pull_sample(timeout=0.5)
            if sample is not None:
                arrivals.append(pylsl.local_clock())
                arrival_stamps.append(stamp)
            elif not reader.is_alive() or publisher.poll() is not None:
                break
    finally:
        # Readers close first, then their senders, so nothing reports a broken stream.
        inlet.close_stream()
        if runner is not None:
            runner.stop("benchmark finished")
        if thread is not None:
            thread.join(timeout=10.0)
        try:
            publisher.stdin.close()
            publisher.wait(timeout=CONNECT_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            publisher.kill()
            publisher.wait()
    if not report or not report[0].strip():
        raise RuntimeError(f"the publisher process failed (exit {publisher.returncode})")
    log = json.loads(report[0])
    return match(np.array(log["stamps"]), np.array(log["push_s"]), np.array(arrival_stamps),
                 np.array(arrivals), FS)


def match(stamps: np.ndarray, push_s: np.ndarray, estimate_stamps: np.ndarray,
          arrivals: np.ndarray, fs: float) -> dict:
    """Latencies from the push log and the arrivals (see the module notes).

    An estimate stamp is matched to the pushed sample with the nearest timestamp; a
    match further than half a sample period away is counted as unmatched.
    """
    if len(estimate_stamps) == 0:
        raise RuntimeError("no estimate arrived at the test inlet")
    idx = np.clip(np.searchsorted(stamps, estimate_stamps), 1, len(stamps) - 1)
    idx = np.where(np.abs(stamps[idx - 1] - estimate_stamps) < np.abs(stamps[idx] - estimate_stamps),
                   idx - 1, idx)
    matched = np.abs(stamps[idx] - estimate_stamps) <= 0.5 / fs
    newest = arrivals[matched] - push_s[idx[matched]]
    # Oldest sample first used by an estimate: the one after the previous estimate's newest.
    first_idx = idx[matched][:-1] + 1
    oldest = arrivals[matched][1:] - push_s[first_idx]
    stamp_gap = arrivals - estimate_stamps  # same figure via the stamps (push lateness included)
    return {"estimates": int(len(estimate_stamps)), "matched": int(matched.sum()),
            "beyond_hop": summary_ms(newest), "incl_hop_wait": summary_ms(oldest),
            "arrival_minus_stamp": summary_ms(stamp_gap),
            "push_lateness": summary_ms(push_s - (stamps - stamps[0] + push_s[0]))}


def run(quick: bool) -> dict:
    duration_s = 11.0 if quick else 30.0
    r = measure_latency(duration_s)
    beyond, with_wait = r["beyond_hop"], r["incl_hop_wait"]
    measures = [
        measure("push of newest sample used -> estimate at inlet, median", beyond["median_ms"],
                "ms"),
        measure("push of newest sample used -> estimate at inlet, p99", beyond["p99_ms"], "ms",
                f"<= {TARGET_MS:g} ms beyond the hop", "<=", TARGET_MS),
        measure("incl. hop wait (oldest sample first used), median", with_wait["median_ms"], "ms"),
        measure("incl. hop wait (oldest sample first used), p99", with_wait["p99_ms"], "ms"),
    ]
    if r["matched"] < r["estimates"]:
        measures.append(measure("estimates not matched to a pushed sample",
                                r["estimates"] - r["matched"], "count"))
    method = (f"SamplePublisher in its own process pushing synthetic PPG at {FS:g} Hz, one "
              "sample per push, in real time -> LslSource -> Runner (profile wrist) -> "
              "EstimateOutlet(use_stream_time) -> a pylsl test inlet in the main thread; "
              f"{duration_s:g} s of stream (estimates start after the 8 s window fills); "
              "an estimate is matched to its newest sample by its stamp (emitted_s on the "
              "local LSL clock). See bench/latency.py for the clock mapping.")
    return section("End-to-end live latency (LSL loopback)", measures, method, r)
