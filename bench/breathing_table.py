"""Breathing rate on BIDMC records 01-12: per-record error and coverage, live and offline.

``python -m bench.breathing_table`` prints a table and writes
``bench/results/breathing.json`` (folded into ``python -m bench``).

Data: BIDMC PPG and Respiration Dataset, records 01-12 (Pimentel et al., "Towards a
Robust Estimation of Respiratory Rate from Pulse Oximeters", IEEE TBME 64(8):1914-1923,
2017; PhysioNet ``bidmc`` 1.0.0), CSV version in ``../shared/data/bidmc`` (see its
SOURCE.md): 125 Hz impedance respiration (``RESP``), fingertip PPG (``PLETH``) and ECG
lead II (``II``), 8 minutes each, columns selected by name.

Reference: the manual breath annotations of annotator 1 (annotator 2 as a cross-check).
For an estimate at ``time_s`` (the centre of its 32 s window) the reference rate is
``60 / mean breath interval`` of the annotated breaths inside ``[time_s - 16, time_s +
16]`` (:func:`estimators.metrics.rate_from_events`).

Per record and source: MAE over the windows that carry both an estimate and a
reference, and coverage, the share of windows with a reference that carry an estimate.
The live monitor (:class:`estimators.monitor.RateMonitor`, profile ``resp-belt``) is fed
1 s chunks, as a live source would deliver them; its results do not depend on the
chunking (the chunk-invariance tests check that). The offline twin
(:func:`estimators.monitor.offline_estimates`) runs zero-phase over each record.

Targets (the project's): RESP median MAE <= 1.0 breaths/min; PLETH median MAE <= 3.0
with >= 90 % of windows carrying an estimate; II median MAE <= 3.0. Published point:
about 4.0 breaths/min median MAE from PPG with 32 s windows (Pimentel et al. 2017, as
given to us, from memory).
"""

from __future__ import annotations

import gzip
import json
import sys
import time
from pathlib import Path

import numpy as np

from bench import RESULTS_DIR, SHARED_DATA, jsonable, measure

RECORDS = tuple(range(1, 13))
FS = 125.0
WINDOW_S = 32.0
CHUNK_S = 1.0
SOURCES = (("RESP", "resp"), ("PLETH", "ppg"), ("II", "ecg"))
PROFILE = "resp-belt"
TARGETS = {"RESP": (1.0, None), "PLETH": (3.0, 0.90), "II": (3.0, None)}
"""Per source: (largest median MAE, smallest pooled coverage or None)."""
PIMENTEL_PPG_MAE = 4.0


def bidmc_folder() -> Path:
    return SHARED_DATA / "bidmc" / "bidmc_csv"


def load_record(record: int, folder: Path | None = None):
    """``(t, samples (n, 3) in SOURCES order, breaths_ann1_s, breaths_ann2_s)``."""
    folder = folder or bidmc_folder()
    with gzip.open(folder / f"bidmc_{record:02d}_Signals.csv.gz", "rt") as f:
        names = [c.strip() for c in f.readline().split(",")]
        data = np.loadtxt(f, delimiter=",")
    t = data[:, names.index("Time [s]")]
    samples = np.column_stack([data[:, names.index(name)] for name, _ in SOURCES])
    breaths = np.genfromtxt(folder / f"bidmc_{record:02d}_Breaths.csv", delimiter=",",
                            skip_header=1, ndmin=2)
    # Sample numbers of the 125 Hz signals; whether they count from 0 or 1 is not stated
    # (one sample, 8 ms, does not matter for rates).
    ann = [np.unique(col[np.isfinite(col)]) / FS for col in breaths.T]
    return t, samples, ann[0], ann[1] if len(ann) > 1 else np.empty(0)


def score(estimates, source: str, ann1: np.ndarray, ann2: np.ndarray) -> dict:
    """MAE against both annotators and coverage of one source's breathing rates."""
    from estimators.metrics import rate_from_events

    rows = [e for e in estimates if e.quantity == "rr" and e.source == source]
    time_s = np.array([e.time_s for e in rows])
    rate = np.array([e.rate_per_min for e in rows])
    out = {"windows": len(rows)}
    for name, ann in (("ann1", ann1), ("ann2", ann2)):
        ref = (rate_from_events(ann, time_s, WINDOW_S) if len(ann) > 1
               else np.full(len(rows), np.nan))
        both = np.isfinite(ref) & np.isfinite(rate)
        out[f"mae_{name}"] = float(np.mean(np.abs(rate[both] - ref[both]))) if both.any() else None
        if name == "ann1":
            has_ref = np.isfinite(ref)
            out["with_reference"] = int(has_ref.sum())
            out["with_estimate"] = int((has_ref & np.isfinite(rate)).sum())
            out["coverage"] = (out["with_estimate"] / out["with_reference"]
                               if out["with_reference"] else None)
    return out


def run_record(record: int, offline: bool = True, chunk_s: float = CHUNK_S) -> dict:
    """Live (and offline) scores of every source of one record."""
    from estimators.monitor import RateMonitor, offline_estimates

    t, samples, ann1, ann2 = load_record(record)
    monitor = RateMonitor(list(SOURCES), FS, PROFILE)
    live = []
    step = max(1, int(round(chunk_s * FS)))
    for start in range(0, len(t), step):
        live.extend(monitor.update(samples[start:start + step], t[start:start + step]))
    result = {"live": {name: score(live, name, ann1, ann2) for name, _ in SOURCES}}
    if offline:
        done = offline_estimates(samples, t, list(SOURCES), FS, PROFILE)
        result["offline"] = {name: score(done, name, ann1, ann2) for name, _ in SOURCES}
    return result


def summarise(per_record: dict, mode: str) -> dict:
    """Median over records of the MAE (records without any estimate left out, and
    counted) and coverage pooled over all windows, per source."""
    out = {}
    for name, _ in SOURCES:
        scores = [r[mode][name] for r in per_record.values()]
        mae1 = [s["mae_ann1"] for s in scores if s["mae_ann1"] is not None]
        mae2 = [s["mae_ann2"] for s in scores if s["mae_ann2"] is not None]
        ref = sum(s["with_reference"] for s in scores)
        est = sum(s["with_estimate"] for s in scores)
        out[name] = {
            "median_mae_ann1": float(np.median(mae1)) if mae1 else None,
            "median_mae_ann2": float(np.median(mae2)) if mae2 else None,
            "records_without_estimate": len(scores) - len(mae1),
            "pooled_coverage": est / ref if ref else None,
            "median_coverage": float(np.median([s["coverage"] for s in scores
                                                if s["coverage"] is not None])),
        }
    return out


def table_text(per_record: dict, summary: dict, mode: str) -> str:
    head = f"{'record':>6} | " + " | ".join(f"{name:>5} MAE  cov " for name, _ in SOURCES)
    lines = [f"{mode} (MAE vs annotator 1, breaths/min; coverage = share of windows with "
             "an estimate)", head, "-" * len(head)]
    for record, result in per_record.items():
        cells = []
        for name, _ in SOURCES:
            s = result[mode][name]
            mae = "  —  " if s["mae_ann1"] is None else f"{s['mae_ann1']:5.2f}"
            cov = "  —" if s["coverage"] is None else f"{s['coverage']:4.2f}"
            cells.append(f"{mae:>9} {cov:>4}")
        lines.append(f"{record:>6} | " + " | ".join(cells))
    cells = []
    for name, _ in SOURCES:
        s = summary[name]
        mae = "  —  " if s["median_mae_ann1"] is None else f"{s['median_mae_ann1']:5.2f}"
        cells.append(f"{mae:>9} {s['pooled_coverage']:4.2f}")
    lines.append(f"{'median':>6} | " + " | ".join(cells) + "   (MAE: median over records; "
                 "coverage: pooled)")
    return "\n".join(lines)


def measures(summary: dict) -> list[dict]:
    rows = []
    for name, _ in SOURCES:
        mae_limit, coverage_limit = TARGETS[name]
        s = summary[name]
        note = "published PPG ~4.0 (Pimentel 2017)" if name == "PLETH" else ""
        if s["records_without_estimate"]:
            note = (note + "; " if note else "") + \
                f"{s['records_without_estimate']} record(s) without any estimate left out"
        rows.append(measure(f"{name} breathing rate: median MAE over records (live)",
                            s["median_mae_ann1"], "breaths/min", f"<= {mae_limit:g}", "<=",
                            mae_limit, note))
        rows.append(measure(f"{name} breathing rate: windows with an estimate (live, pooled)",
                            s["pooled_coverage"], "",
                            None if coverage_limit is None else f">= {coverage_limit:g}",
                            None if coverage_limit is None else ">=", coverage_limit))
    return rows


def main(argv: list[str] | None = None) -> int:
    folder = bidmc_folder()
    if not folder.is_dir():
        sys.stderr.write(f"BIDMC records not found at {folder}; nothing to do\n")
        return 1
    started = time.time()
    per_record = {}
    for record in RECORDS:
        per_record[f"{record:02d}"] = run_record(record)
    live = summarise(per_record, "live")
    offline = summarise(per_record, "offline")
    print(table_text(per_record, live, "live"))
    print()
    print(table_text(per_record, offline, "offline"))
    report = {
        "title": "Breathing rate, BIDMC records 01-12",
        "method": __doc__.strip().split("\n\n")[2].replace("\n", " "),
        "measures": measures(live),
        "summary": {"live": live, "offline": offline},
        "records": per_record,
        "settings": {"profile": PROFILE, "chunk_s": CHUNK_S, "window_s": WINDOW_S},
        "published": {"pimentel_2017_ppg_mae": PIMENTEL_PPG_MAE},
        "wall_s": time.time() - started,
    }
    RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    (RESULTS_DIR / "breathing.json").write_text(json.dumps(jsonable(report), indent=1))
    print(f"\nwrote {RESULTS_DIR / 'breathing.json'} ({time.time() - started:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
