"""The rate now against the window-centre rate, on synthetic ramps, steps and a steady
rate (PPG with profile ``wrist``, ECG-like with ``chest-ecg``).

Signals are synthetic, our own (:func:`streamer.simulation.pulse_train`,
:func:`bench.step_response.ecg_like`), fed to :class:`RateMonitor` in hop-sized chunks as
live. Both rates are scored against the truth at the instant each claims to describe:

* the rate now at ``emitted_s`` (the newest sample used: what "now" means to the user);
* the window-centre rate at ``emitted_s`` too (what a user reading it as the current
  rate gets), and, for reference, at its own ``time_s``.

Measures: ramps of +-1 and +-2 bpm/s (80 bpm for 40 s, the ramp, then a hold of 30 s):
MAE and share within 5 bpm after the first 20 s; steps 80 -> 120 and 80 -> 40 bpm:
settling time within 5 bpm (every later estimate within, from the step to
``emitted_s``) and overshoot beyond the new rate; a steady 72 bpm: the standard
deviation of each rate after the first 20 s. Targets of the rate-now issue: ramps MAE
<= 2 bpm and >= 90 % within 5 bpm; steady: rate now no noisier than 1.2x the centre
rate; steps: settled within 4.5 s, overshoot <= 5 bpm.
"""

from __future__ import annotations

import numpy as np

from bench import hop_bounds, measure, section

FS = 125.0
SIGNALS = {"ppg": "wrist", "ecg": "chest-ecg"}
RAMPS = (1.0, -1.0, 2.0, -2.0)
STEPS = (120.0, 40.0)
STEP_AT_S = 40.0
TOLERANCE_BPM = 5.0
"""The absolute part of the EC13 heart-rate tolerance (cited from memory)."""


def scenario(name: str) -> tuple[np.ndarray, np.ndarray]:
    """Sample times and the true rate of ``ramp:S`` (S bpm/s), ``step:R`` (80 -> R bpm
    at 40 s) or ``steady`` (72 bpm)."""
    if name.startswith("ramp:"):
        slope = float(name.split(":")[1])
        duration = 40.0 if abs(slope) == 1.0 else 30.0
        start = 80.0 if slope > 0 else 80.0 + abs(slope) * duration
        t = np.arange(int((40.0 + duration + 30.0) * FS)) / FS
        rate = start + slope * np.clip(t - 40.0, 0.0, duration)
        return t, rate
    if name.startswith("step:"):
        t = np.arange(int(80.0 * FS)) / FS
        return t, np.where(t < STEP_AT_S, 80.0, float(name.split(":")[1]))
    t = np.arange(int(90.0 * FS)) / FS
    return t, np.full(len(t), 72.0)


def run_scenario(kind: str, name: str, seed: int = 2) -> dict:
    """Heart-rate estimates of one scenario, fed hop by hop: arrays of ``emitted_s``,
    ``time_s``, ``rate`` (centre), ``now`` and the truth at both instants."""
    from bench.step_response import ecg_like
    from estimators.config import get_profile
    from estimators.monitor import RateMonitor
    from streamer.simulation import pulse_train

    t, rate = scenario(name)
    profile = get_profile(SIGNALS[kind])
    x = pulse_train(FS, rate, seed=seed) if kind == "ppg" else ecg_like(FS, rate, seed=seed)
    monitor = RateMonitor([("x", kind)], FS, profile)
    bounds = hop_bounds(int(len(t) // (profile.hr.hop_s * FS)), profile.hr.hop_s, FS)
    bounds[-1] = len(t)
    est = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        est += [e for e in monitor.update(x[a:b, None], t[a:b]) if e.quantity == "hr"]
    emitted = np.array([e.emitted_s for e in est])
    time_s = np.array([e.time_s for e in est])
    return {"emitted_s": emitted, "time_s": time_s,
            "rate": np.array([e.rate_per_min for e in est]),
            "now": np.array([e.rate_now_per_min for e in est]),
            "truth_emitted": np.interp(emitted, t, rate),
            "truth_centre": np.interp(time_s, t, rate)}


def settle_time(emitted_s: np.ndarray, ok: np.ndarray, step_s: float) -> float:
    from bench.step_response import settle_time as settle

    return settle(emitted_s, ok, step_s)


def ramp_scores(r: dict) -> dict:
    late = r["emitted_s"] > 20.0
    out = {}
    for label, values, truth in (("now", r["now"], r["truth_emitted"]),
                                 ("centre at emitted_s", r["rate"], r["truth_emitted"]),
                                 ("centre at time_s", r["rate"], r["truth_centre"])):
        err = np.abs(values - truth)[late]
        with np.errstate(invalid="ignore"):
            out[label] = {"mae": float(np.nanmean(err)),
                          "within_5": float(np.mean(err <= TOLERANCE_BPM))}
    return out


def step_scores(r: dict, after: float) -> dict:
    out = {}
    post = r["emitted_s"] >= STEP_AT_S
    for label, values in (("now", r["now"]), ("centre", r["rate"])):
        with np.errstate(invalid="ignore"):
            ok = np.abs(values - after) <= TOLERANCE_BPM
        beyond = (values[post] - after) if after > 80.0 else (after - values[post])
        out[label] = {"settle_s": settle_time(r["emitted_s"], ok, STEP_AT_S),
                      "overshoot": float(max(0.0, np.nanmax(beyond)))}
    return out


def steady_scores(r: dict) -> dict:
    late = r["emitted_s"] > 20.0
    return {"now_sd": float(np.nanstd(r["now"][late])),
            "centre_sd": float(np.nanstd(r["rate"][late]))}


def run_all(quick: bool = False) -> dict:
    results = {}
    for kind in SIGNALS:
        for slope in RAMPS:
            results[f"{kind} ramp {slope:+g} bpm/s"] = ramp_scores(run_scenario(kind, f"ramp:{slope:g}"))
        for after in STEPS:
            results[f"{kind} step 80 -> {after:g}"] = step_scores(run_scenario(kind, f"step:{after:g}"),
                                                                after)
        results[f"{kind} steady 72"] = steady_scores(run_scenario(kind, "steady"))
    return results


def cost_ratio(profile_name: str = "wrist", seconds: float = 120.0, repeats: int = 3) -> dict:
    """Per-hop cost of the default profile with the end-weighted column against without
    it, in one run: the same synthetic PPG fed hop by hop to both monitors, alternately,
    the best of ``repeats`` timings each (a ratio, so the machine's speed cancels)."""
    import dataclasses
    import time

    from estimators.config import get_profile
    from estimators.monitor import RateMonitor
    from streamer.simulation import pulse_train

    t = np.arange(int(seconds * FS)) / FS
    x = pulse_train(FS, np.full(len(t), 72.0), seed=3)
    with_stage = get_profile(profile_name)
    without = dataclasses.replace(with_stage, hr=dataclasses.replace(with_stage.hr,
                                                                      recent_window_s=0.0))
    step = int(round(with_stage.hr.hop_s * FS))
    best = {"with": np.inf, "without": np.inf}
    for _ in range(repeats):
        for label, profile in (("with", with_stage), ("without", without)):
            monitor = RateMonitor([("x", "ppg")], FS, profile)
            start = time.perf_counter()
            for a in range(0, len(t), step):
                monitor.update(x[a:a + step, None], t[a:a + step])
            best[label] = min(best[label], time.perf_counter() - start)
    hops = len(t) // step
    return {"with_ms_per_hop": 1e3 * best["with"] / hops,
            "without_ms_per_hop": 1e3 * best["without"] / hops,
            "ratio": best["with"] / best["without"]}


def run(quick: bool) -> dict:
    results = run_all(quick)
    results["cost"] = cost_ratio(repeats=1 if quick else 3)
    measures = []
    for label, r in results.items():
        if "ramp" in label:
            measures.append(measure(f"{label}: rate now MAE vs truth at emitted_s",
                                    r["now"]["mae"], "bpm", "<= 2", "<=", 2.0))
            measures.append(measure(f"{label}: rate now within 5 bpm", r["now"]["within_5"],
                                    "", ">= 0.9", ">=", 0.9))
            measures.append(measure(f"{label}: centre rate MAE vs truth at emitted_s",
                                    r["centre at emitted_s"]["mae"], "bpm"))
            measures.append(measure(f"{label}: centre rate within 5 bpm",
                                    r["centre at emitted_s"]["within_5"], ""))
        elif label == "cost":
            measures.append(measure("per-hop cost with / without the end-weighted column "
                                    "(profile wrist, one PPG channel)", r["ratio"], "x"))
            continue
        elif "step" in label:
            measures.append(measure(f"{label}: rate now settles within 5 bpm",
                                    r["now"]["settle_s"], "s", "<= 4.5 s", "<=", 4.5))
            measures.append(measure(f"{label}: rate now overshoot", r["now"]["overshoot"],
                                    "bpm", "<= 5", "<=", 5.0))
            measures.append(measure(f"{label}: centre rate settles within 5 bpm",
                                    r["centre"]["settle_s"], "s"))
        else:
            ratio = r["now_sd"] / r["centre_sd"] if r["centre_sd"] > 0 else float("nan")
            measures.append(measure(f"{label}: rate now SD / centre rate SD", ratio, "",
                                    "<= 1.2", "<=", 1.2))
    method = ("Synthetic PPG (wrist) and ECG-like (chest-ecg) at 125 Hz, fed hop by hop; "
              "ramps of +-1 and +-2 bpm/s, steps 80 -> 120 / 40 bpm at 40 s, a steady 72 "
              "bpm. The rate now is scored against the truth at emitted_s, the centre "
              "rate likewise (what a user reading it as current gets).")
    return section("Rate now", measures, method, {"results": results})


if __name__ == "__main__":  # pragma: no cover
    import json

    print(json.dumps(run_all(), indent=1))
    print(json.dumps(cost_ratio(), indent=1))
