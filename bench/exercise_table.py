"""Exercise heart-rate table: IEEE SPC 2015 training records 01-12, cross-validated.
``python -m bench.exercise_table`` prints the tables and writes
``bench/results/exercise.json``.

Data: wrist PPG (two channels) and a 3-axis wrist accelerometer at 125 Hz while
running on a treadmill (Zhang, Pi & Liu, "TROIKA: a general framework for heart rate
monitoring using wrist-type photoplethysmographic signals during intensive physical
exercise", IEEE TBME 62(2):522-531, 2015; see ``../shared/data/ieee_spc2015/SOURCE.md``).
The chest-ECG row is the reference's source and is never given to the monitor.

Protocol (the data set's causal one): ``BPM0[k]`` is the mean ECG heart rate over
samples ``[250 k, 250 k + 1000)``; the estimate scored for window ``k`` is the newest
one shown when that window ends, i.e. at the timestamp of sample ``250 k + 999`` (with an
8 s window and a 0.25 s hop the engine emits a column exactly then, and that column
covers window ``k``). A withheld estimate ("no estimate") leaves the last shown rate on
screen, so the last shown rate is scored; windows before the first shown rate count only
against coverage. AAE = mean absolute error per record.

Cross-validation (leave one record out). The exercise profile's tunable motion
parameters are chosen on a small grid (:data:`GRID`: each parameter varied around the
shipped value in turn): for every held-out record, the grid point with the lowest mean
AAE over the *other* eleven records is chosen and scored on the held-out one. The
table's main row is those held-out figures (mean and worst record); the shipped
``exercise-wrist`` profile is the grid point chosen on all twelve. Everything else in
the chain is fixed a priori (window, hop, bands, the canceller's gate, the trust map's
width = the confidence half-width, the refinement's radius = half of it).

Ablations, with the shipped parameters, each stage off in turn:

``without cancellation``  ``motion_memory_s=0``
``without gain``          ``motion_gain=0``
``without harmonic sum``  ``harmonic_weight=0``
``trust everywhere``      the gain never acts where the canceller worked
                          (``motion_trust="everywhere"``: the design before the trust map)
``trust nowhere``         the gain acts on every accelerometer line
``without refinement``    ``refine_radius_per_min=0``: the rate is read at the tracked
                          (gained) spectrum's peak, not moved onto the canceller's
                          residual peak (:mod:`estimators.refine`)
``no accelerometer``      both PPG channels, no motion references
``ppg1 (wrist)``          PPG channel 1 alone with the default ``wrist`` profile (de-shape,
                          no motion stage)

Published points (values from memory, as given to us, not re-checked against the
papers): TROIKA 2.34 bpm mean AAE on the 12 training records (Zhang et al. 2015); JOSS
1.28 and MISPT 1.11 on the same records; 1.20 bpm over all 23 records for a causal
method (Chung, Lee & Lee, PLoS ONE 2019). The project target is a cross-validated mean
AAE of 1.3 bpm or less with no record worse than 3.0.
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import time
from pathlib import Path

import numpy as np

from bench import RESULTS_DIR, SHARED_DATA, measure, write_json
from bench.accuracy import held_rate_at, spc_records  # one SPC 2015 scoring for both

FS = 125.0
WINDOW, SHIFT = 1000, 250
"""BPM0 window and shift in samples (SOURCE.md: 8 s windows, 2 s shift at 125 Hz)."""
TARGET_MEAN_AAE, TARGET_WORST_AAE = 1.3, 3.0
CHUNK_S = 10.0
"""Chunk fed to the monitor per call; results do not depend on it (chunk invariance is
tested), only the speed does."""

ROWS = {"ppg1": 1, "ppg2": 2, "accx": 3, "accy": 4, "accz": 5}
KINDS = {"ppg1": "ppg", "ppg2": "ppg", "accx": "acc", "accy": "acc", "accz": "acc"}
ALL = ("ppg1", "ppg2", "accx", "accy", "accz")

GRID = {
    # Halving and doubling around the shipped 2 (0.5 was 0.25 bpm worse than 1 on the
    # mean when 1 was shipped; 3 and 4 were 0.05 and 0.08 worse than 2, measured once).
    "motion_gain": (1.0, 2.0, 4.0),
    "harmonic_weight": (0.5, 0.75, 1.0),
    "harmonic_cap": (1.0, 1.5, 2.0),
    # At least 30 s: the canceller's chance-coherence correction for three references
    # needs about eight nearly independent windows (half a window apart) before its
    # gate can open fully; with 15 s even perfectly coherent motion is only partly
    # removed (gate 0.83 on the canceller's unit test) and a pulse crossing the
    # cadence is lost (tests/estimators/test_motion.py).
    "motion_memory_s": (30.0, 60.0),
}
"""Values tried per parameter, one parameter at a time around the shipped profile."""

ABLATIONS = {
    "without cancellation": ({"motion_memory_s": 0.0}, ALL, "fused"),
    "without gain": ({"motion_gain": 0.0}, ALL, "fused"),
    "without harmonic sum": ({"harmonic_weight": 0.0}, ALL, "fused"),
    "trust everywhere": ({"motion_trust": "everywhere"}, ALL, "fused"),
    "trust nowhere": ({"motion_trust": "nowhere"}, ALL, "fused"),
    "without refinement": ({"refine_radius_per_min": 0.0}, ALL, "fused"),
    "no accelerometer": ({}, ("ppg1", "ppg2"), "fused"),
}


def exercise_profile(**changes):
    """The shipped ``exercise-wrist`` profile with heart-rate settings changed."""
    from estimators.config import get_profile

    profile = get_profile("exercise-wrist")
    if not changes:
        return profile
    return dataclasses.replace(profile, hr=dataclasses.replace(profile.hr, **changes))


def grid_points() -> list[dict]:
    """The shipped settings, then each parameter of :data:`GRID` varied in turn."""
    shipped = exercise_profile().hr
    points = [{}]
    for name, values in GRID.items():
        points += [{name: v} for v in values if v != getattr(shipped, name)]
    return points


def label(changes: dict) -> str:
    return ", ".join(f"{k}={v:g}" for k, v in changes.items()) or "shipped"


def load(sig_path: Path, trace_path: Path):
    from scipy.io import loadmat

    sig = np.asarray(loadmat(sig_path)["sig"], dtype=np.float64)  # ECG, PPG1, PPG2, acc x/y/z
    bpm0 = np.asarray(loadmat(trace_path)["BPM0"], dtype=np.float64).ravel()
    return sig, bpm0


def score(sig: np.ndarray, bpm0: np.ndarray, profile, channels=ALL,
          source: str = "fused") -> dict:
    """Run one configuration over one record and score it against ``BPM0``."""
    from estimators.monitor import RateMonitor

    samples = sig[[ROWS[c] for c in channels]].T
    t = np.arange(len(samples)) / FS
    monitor = RateMonitor([(c, KINDS[c]) for c in channels], FS, profile)
    step = int(round(CHUNK_S * FS))
    start = time.perf_counter()
    estimates = []
    for a in range(0, len(samples), step):
        estimates += monitor.update(samples[a:a + step], t[a:a + step])
    elapsed = time.perf_counter() - start
    mine = [e for e in estimates if e.quantity == "hr" and e.source == source]
    emitted = np.array([e.emitted_s for e in mine])
    rate = np.array([e.rate_per_min for e in mine])
    n_windows = min(len(bpm0), (len(samples) - WINDOW) // SHIFT + 1)
    ends = (np.arange(n_windows) * SHIFT + WINDOW - 1) / FS
    shown = held_rate_at(emitted, rate, ends)
    ok = np.isfinite(shown)
    error = np.abs(shown - bpm0[:n_windows])
    conf = np.array([e.confidence for e in mine])
    at_end = np.searchsorted(emitted, ends + 1e-9, side="right") - 1
    return {"aae_bpm": float(error[ok].mean()) if ok.any() else math.nan,
            "windows": int(n_windows), "coverage": float(ok.mean()),
            "withheld_at_window_end": int(np.sum(~np.isfinite(rate[at_end]))),
            "within_5_bpm": float(np.mean(error[ok] < 5.0)) if ok.any() else math.nan,
            "longest_over_20_bpm_s": longest_run_s(~(error <= 20.0), SHIFT / FS),
            "mean_confidence": float(np.mean(conf[at_end])),
            "seconds": elapsed, "record_s": len(samples) / FS}


def longest_run_s(flags: np.ndarray, step_s: float) -> float:
    """Longest run of consecutive True flags, in seconds of window ends.

    >>> longest_run_s(np.array([True, False, True, True, False]), 2.0)
    4.0
    """
    longest = current = 0
    for flag in flags.tolist():
        current = current + 1 if flag else 0
        longest = max(longest, current)
    return longest * step_s


def cross_validate(table: dict, names: list[str]) -> dict:
    """Leave one record out over ``table[point][record] -> AAE``: per held-out record,
    the point with the lowest mean AAE on the others and its held-out AAE.

    >>> t = {"a": {"r1": 1.0, "r2": 1.0, "r3": 9.0}, "b": {"r1": 2.0, "r2": 2.0, "r3": 2.0}}
    >>> cv = cross_validate(t, ["r1", "r2", "r3"])
    >>> [cv[n]["chosen"] for n in ("r1", "r2", "r3")], cv["r3"]["aae_bpm"]
    (['b', 'b', 'a'], 9.0)
    """
    out = {}
    for held in names:
        others = [n for n in names if n != held]
        chosen = min(table, key=lambda point: (np.mean([table[point][n] for n in others]),
                                               point))
        out[held] = {"chosen": chosen, "aae_bpm": table[chosen][held]}
    return out


def run(data: Path = SHARED_DATA) -> dict:
    recs = spc_records(data)
    if not recs:
        raise FileNotFoundError(f"no SPC 2015 records under {data / 'ieee_spc2015'}")
    loaded = {name: load(s, tr) for name, s, tr in recs}
    names = sorted(loaded)
    grid = {label(changes): {name: score(sig, bpm0, exercise_profile(**changes))
                             for name, (sig, bpm0) in loaded.items()}
            for changes in grid_points()}
    aae = {point: {n: r["aae_bpm"] for n, r in rows.items()} for point, rows in grid.items()}
    cv = cross_validate(aae, names)
    chosen_all = min(aae, key=lambda point: (np.mean(list(aae[point].values())), point))
    ablations = {}
    for name_, (changes, channels, source) in ABLATIONS.items():
        ablations[name_] = {n: score(sig, bpm0, exercise_profile(**changes), channels, source)
                            for n, (sig, bpm0) in loaded.items()}
    from estimators.config import get_profile

    ablations["ppg1 (wrist)"] = {n: score(sig, bpm0, get_profile("wrist"), ("ppg1",), "ppg1")
                                 for n, (sig, bpm0) in loaded.items()}
    return {"records": names, "grid": grid, "cross_validated": cv,
            "chosen_on_all": chosen_all, "ablations": ablations}


def _row(name: str, values: list[float], names: list[str]) -> str:
    cells = " | ".join(f"{v:.2f}" for v in values)
    return (f"| {name} | {cells} | {np.mean(values):.2f} | {np.max(values):.2f} "
            f"({names[int(np.argmax(values))]}) |")


def text_tables(result: dict) -> str:
    names = result["records"]
    head = f"| configuration | {' | '.join(names)} | mean | worst |"
    rule = "|" + "---|" * (len(names) + 3)
    cv = result["cross_validated"]
    shipped = result["grid"]["shipped"]
    lines = ["AAE (bpm) per record, SPC 2015 training records, causal protocol", "",
             head, rule,
             _row("**cross-validated** (leave one record out)",
                  [cv[n]["aae_bpm"] for n in names], names),
             _row("shipped exercise-wrist (in-sample)",
                  [shipped[n]["aae_bpm"] for n in names], names)]
    for name, rows in result["ablations"].items():
        lines.append(_row(name, [rows[n]["aae_bpm"] for n in names], names))
    lines += ["", "Grid (one parameter varied at a time), mean AAE over the 12 records:", "",
              "| grid point | mean | worst | chosen in folds |", "|---|---|---|---|"]
    for point, rows in result["grid"].items():
        values = [rows[n]["aae_bpm"] for n in names]
        folds = sum(1 for n in names if cv[n]["chosen"] == point)
        lines.append(f"| {point} | {np.mean(values):.2f} | {np.max(values):.2f} | {folds} |")
    lines.append(f"\nchosen on all 12 records: {result['chosen_on_all']}")
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, default=RESULTS_DIR / "exercise.json")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    result = run()
    print(text_tables(result))
    names = result["records"]
    cv_values = [result["cross_validated"][n]["aae_bpm"] for n in names]
    shipped = result["grid"]["shipped"]
    seconds = sum(r["seconds"] for r in shipped.values())
    record_s = sum(r["record_s"] for r in shipped.values())
    rows = [measure("cross-validated mean AAE (records 01-12)", float(np.mean(cv_values)),
                    "bpm", f"<= {TARGET_MEAN_AAE:g}", "<=", TARGET_MEAN_AAE),
            measure("cross-validated worst record AAE", float(np.max(cv_values)), "bpm",
                    f"<= {TARGET_WORST_AAE:g}", "<=", TARGET_WORST_AAE),
            measure("longest stretch > 20 bpm off, worst record (shipped)",
                    max(r["longest_over_20_bpm_s"] for r in shipped.values()), "s"),
            measure("exercise-wrist speed (5 channels)", record_s / seconds, "x real time")]
    rows += [measure(f"mean AAE {name}", float(np.mean([r[n]["aae_bpm"] for n in names])),
                     "bpm") for name, r in result["ablations"].items()]
    payload = {"measures": rows, **result,
               "protocol": "BPM0[k] vs last shown estimate at the timestamp of sample "
                           "250k+999; withheld -> last shown; leave-one-record-out over "
                           "the grid",
               "published": "TROIKA 2.34, JOSS 1.28, MISPT 1.11 bpm on the 12 training "
                            "records (values from memory)",
               "elapsed_s": time.perf_counter() - started}
    write_json(args.out, payload)
    print(f"written {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
