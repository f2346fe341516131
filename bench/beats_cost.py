"""Added cost of beats and HRV per hop (``python -m bench.beats_cost``).

One synthetic PPG channel at 125 Hz (:func:`bench.synthetic_ppg`, 10 min) is fed in
hop-sized chunks (0.25 s, the ``wrist`` profile's hop) to :class:`RateMonitor` and,
separately, to :class:`estimators.hrv.BeatAnalysis` (beat detection, artifact
correction, HRV every 5 s). Prints the median and 99th-percentile time per hop of each
and their ratio (best of three runs each, so that a burst of load from other processes
does not decide it). Ratios only: the absolute times depend on the machine.
"""

from __future__ import annotations

import time

import numpy as np

from bench import hop_bounds, print_json, synthetic_ppg

FS = 125.0
HOP_S = 0.25
DURATION_S = 600.0


def per_hop(update, x, t, bounds) -> np.ndarray:
    times = np.empty(len(bounds) - 1)
    for p, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        start = time.perf_counter()
        update(x[a:b], t[a:b])
        times[p] = time.perf_counter() - start
    return times


def measure_cost(duration_s: float = DURATION_S, repeats: int = 3) -> dict:
    """Median and 99th-percentile time per hop of the engine and of beats + HRV, and
    their ratios (best of ``repeats`` runs each)."""
    from estimators.config import get_profile
    from estimators.hrv import BeatAnalysis
    from estimators.monitor import RateMonitor

    x, t = synthetic_ppg(FS, duration_s)[:2]
    x = np.asarray(x).reshape(len(t), -1)
    bounds = hop_bounds(int(duration_s / HOP_S), HOP_S, FS)
    best = {}
    for _ in range(repeats):
        monitor = RateMonitor([("PPG", "ppg")], FS, get_profile("wrist"))
        engine = per_hop(lambda a, b: monitor.update(a, b), x, t, bounds)
        beats = BeatAnalysis("ppg", FS)
        extra = per_hop(lambda a, b: beats.update(a[:, 0], b), x, t, bounds)
        for name, times in (("engine", engine), ("beats_hrv", extra)):
            steady = times[int(60 / HOP_S):]  # after the first minute
            value = (float(np.median(steady)), float(np.percentile(steady, 99)))
            best[name] = min(best.get(name, value), value)
    result = {name: {"median_ms": 1e3 * v[0], "p99_ms": 1e3 * v[1]} for name, v in best.items()}
    result["ratio_median"] = best["beats_hrv"][0] / best["engine"][0]
    result["ratio_p99"] = best["beats_hrv"][1] / best["engine"][1]
    return result


def run(quick: bool = False) -> dict:
    """The part of ``python -m bench``: the added cost of beats and HRV per hop."""
    from bench import measure, section

    r = measure_cost(120.0 if quick else DURATION_S, 1 if quick else 3)
    rows = [measure("beats + HRV: added cost per hop, median", r["beats_hrv"]["median_ms"],
                    "ms", note=f"engine (wrist profile) {r['engine']['median_ms']:.3g} ms"),
            measure("beats + HRV: added cost per hop, p99", r["beats_hrv"]["p99_ms"], "ms",
                    note=f"engine {r['engine']['p99_ms']:.3g} ms"),
            measure("beats + HRV / engine per hop (medians)", r["ratio_median"], "x"),
            measure("beats + HRV / engine per hop (p99)", r["ratio_p99"], "x")]
    return section("Beats and HRV: added cost", rows,
                   f"One synthetic PPG channel at 125 Hz ({'120 s' if quick else '10 min'}), "
                   "hop-sized chunks (0.25 s) to RateMonitor (wrist) and separately to "
                   "estimators.hrv.BeatAnalysis (beats, artifact correction, HRV every 5 s); "
                   "times after the first minute, best of the runs; ratios side by side in "
                   "one run.", r)


def main() -> None:
    print_json(measure_cost())


if __name__ == "__main__":
    main()
