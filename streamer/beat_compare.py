"""Beat-by-beat comparison of a beats file with reference beats (``ridgewatch compare
BEATS.csv --against REF``).

Reference beats come from WFDB annotations (beat codes only) or a CSV of times, read by
:func:`streamer.compare.load_other`. Scores:

* **sensitivity** (reference beats matched) and **positive predictivity** (detected
  beats matched), a detected beat matching a reference beat within 150 ms, each used
  once: the beat-by-beat comparison of ANSI/AAMI EC57 (from memory);
* **timing**: median offset (detected minus reference) of matched beats;
* **intervals**: between consecutive matched beats on both sides, the difference of the
  detected and reference intervals (mean, SD, median and 95th percentile of its size);
* **HRV agreement**: RMSSD, SDNN (60 s) and DFA alpha1 (120 s) every 5 s from the
  detected beats (their flags and corrected intervals as written) and from the
  reference beats put through the same artifact correction, over the span both cover:
  median relative error (RMSSD, SDNN) and median difference (alpha1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from estimators import hrv as hrv_mod

MATCH_S = 0.15
"""Match window (s) of the beat-by-beat comparison (ANSI/AAMI EC57, from memory)."""


@dataclass(frozen=True)
class BeatMatch:
    """Pairs of matched beats (indices into the detected and reference times)."""

    detected: np.ndarray
    reference: np.ndarray
    n_detected: int
    n_reference: int
    offsets_s: np.ndarray

    @property
    def true_positives(self) -> int:
        return len(self.detected)

    @property
    def sensitivity(self) -> float:
        return self.true_positives / self.n_reference if self.n_reference else math.nan

    @property
    def positive_predictivity(self) -> float:
        return self.true_positives / self.n_detected if self.n_detected else math.nan

    @property
    def median_offset_s(self) -> float:
        return float(np.median(self.offsets_s)) if len(self.offsets_s) else math.nan


def match_beats(detected_s, reference_s, window_s: float = MATCH_S) -> BeatMatch:
    """Match two increasing sequences of beat times one to one: walking both in time
    order, a detected and a reference beat within ``window_s`` pair up, unless the next
    detected beat is closer to the same reference beat (then the earlier detected beat
    is unmatched).

    >>> m = match_beats([1.0, 1.9, 2.05, 4.0], [1.02, 2.0, 3.0, 4.1])
    >>> m.detected.tolist(), m.reference.tolist()
    ([0, 2, 3], [0, 1, 3])
    """
    d = np.asarray(detected_s, dtype=np.float64)
    r = np.asarray(reference_s, dtype=np.float64)
    i = j = 0
    pairs_d, pairs_r = [], []
    while i < len(d) and j < len(r):
        gap = d[i] - r[j]
        if abs(gap) <= window_s:
            if i + 1 < len(d) and abs(d[i + 1] - r[j]) < abs(gap):
                i += 1
                continue
            pairs_d.append(i)
            pairs_r.append(j)
            i += 1
            j += 1
        elif gap < 0:
            i += 1
        else:
            j += 1
    pd, pr = np.array(pairs_d, np.int64), np.array(pairs_r, np.int64)
    return BeatMatch(pd, pr, len(d), len(r), d[pd] - r[pr] if len(pd) else np.empty(0))


def interval_errors_ms(detected_s, reference_s, match: BeatMatch) -> np.ndarray:
    """Detected minus reference interval (ms) between each two consecutive matched
    beats that are consecutive on both sides."""
    d, r = np.asarray(detected_s), np.asarray(reference_s)
    both = (np.diff(match.detected) == 1) & (np.diff(match.reference) == 1)
    di = np.diff(d[match.detected])[both]
    ri = np.diff(r[match.reference])[both]
    return 1e3 * (di - ri)


def rows_from_table(table) -> list:
    """:class:`estimators.hrv.BeatRow` of one source of a beats file (decided at their
    own time: the file holds every beat already decided)."""
    c = table.columns
    return [hrv_mod.BeatRow(float(t), float(i), str(f), float(n), float(t))
            for t, i, f, n in zip(c["time_s"], c["interval_ms"], c["flag"], c["nn_ms"])]


def hrv_agreement(rows, reference_s, start_s: float, end_s: float) -> dict:
    """HRV of the detected beats (``rows``) and of the reference beats (through the same
    correction) every 5 s over ``[start_s, end_s]``; median relative errors and the
    median alpha1 difference where both have a value."""
    ours = hrv_mod.hrv_batch(rows, start_s, end_s)
    ref = hrv_mod.hrv_batch(hrv_mod.correct_batch(np.asarray(reference_s)), start_s, end_s)
    out = {}
    for name in ("rmssd_ms", "sdnn_ms"):
        a = np.array([getattr(h, name) for h in ours])
        b = np.array([getattr(h, name) for h in ref])
        both = np.isfinite(a) & np.isfinite(b) & (b > 0)
        out[f"{name}_n"] = int(both.sum())
        out[f"{name}_median_rel_error"] = float(np.median(np.abs(a[both] / b[both] - 1))) \
            if both.any() else math.nan
    a = np.array([h.dfa_alpha1 for h in ours])
    b = np.array([h.dfa_alpha1 for h in ref])
    both = np.isfinite(a) & np.isfinite(b)
    out["dfa_alpha1_n"] = int(both.sum())
    out["dfa_alpha1_median_abs_diff"] = float(np.median(np.abs(a[both] - b[both]))) \
        if both.any() else math.nan
    return out


def compare_beats(table, reference_s, source: str | None = None) -> list[dict]:
    """Scores of each source of a beats file (or only ``source``) against the
    reference beat times, over the span the beats file covers."""
    reference_s = np.asarray(reference_s, dtype=np.float64)
    sources = [source] if source is not None else table.sources()
    results = []
    for name in sources:
        part = table.select(name)
        detected = part.columns["time_s"]
        if len(detected) == 0:
            continue
        # Only the reference beats within the file's span (plus the match window).
        lo, hi = detected[0] - MATCH_S, detected[-1] + MATCH_S
        ref = reference_s[(reference_s >= lo) & (reference_s <= hi)]
        match = match_beats(detected, ref)
        errors = interval_errors_ms(detected, ref, match)
        result = {
            "source": name, "n_detected": len(detected), "n_reference": len(ref),
            "sensitivity": match.sensitivity,
            "positive_predictivity": match.positive_predictivity,
            "median_offset_ms": 1e3 * match.median_offset_s,
            "n_intervals": len(errors),
            "interval_error_mean_ms": float(np.mean(errors)) if len(errors) else math.nan,
            "interval_error_sd_ms": float(np.std(errors, ddof=1)) if len(errors) > 1
            else math.nan,
            "interval_error_median_abs_ms": float(np.median(np.abs(errors)))
            if len(errors) else math.nan,
            "interval_error_p95_abs_ms": float(np.percentile(np.abs(errors), 95))
            if len(errors) else math.nan,
            "flagged_share": float(np.mean(part.columns["flag"] != "ok")),
        }
        result.update(hrv_agreement(rows_from_table(part), ref, float(lo), float(hi)))
        results.append(result)
    return results


def format_result(r: dict, reference_name: str) -> str:
    """One line per source, for the terminal."""
    return (f"beats {r['source']} vs {reference_name}: detected {r['n_detected']}, reference "
            f"{r['n_reference']}; sensitivity {100 * r['sensitivity']:.2f} % positive "
            f"predictivity {100 * r['positive_predictivity']:.2f} % (within "
            f"{1e3 * MATCH_S:.0f} ms); timing median {r['median_offset_ms']:+.1f} ms; "
            f"intervals (n={r['n_intervals']}) error mean {r['interval_error_mean_ms']:+.1f} "
            f"SD {r['interval_error_sd_ms']:.1f} median |e| "
            f"{r['interval_error_median_abs_ms']:.1f} 95th |e| "
            f"{r['interval_error_p95_abs_ms']:.1f} ms; flagged {100 * r['flagged_share']:.1f} %; "
            f"RMSSD median rel. error {100 * r['rmssd_ms_median_rel_error']:.1f} % "
            f"(n={r['rmssd_ms_n']}), SDNN {100 * r['sdnn_ms_median_rel_error']:.1f} %, "
            f"DFA alpha1 median |diff| {r['dfa_alpha1_median_abs_diff']:.3f} "
            f"(n={r['dfa_alpha1_n']})")
