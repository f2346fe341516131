"""Compare an estimate log against a reference: load the reference, pair, measure.

The reference (the "other" side) is loaded by :func:`load_other`, which recognises:

* another estimate log (first line ``# ridgewatch estimate log``), e.g. the offline run
  of the same recording -> :class:`OtherLog`;
* a WFDB annotation file (``.atr``, or any annotation file with its record header
  ``<record>.hea`` beside it) -> :class:`EventTimes` (beat annotations become heart-rate
  events);
* a CSV with one numeric column of event times in seconds -> :class:`EventTimes`;
* a CSV with two columns ``time_s, rate_per_min`` -> :class:`RateSeries`; with more
  columns, the rate column is chosen by name and time is the first column.

:func:`pair_up` turns a log and a reference into one :class:`PairedSeries` per
(quantity, source): estimate and reference rate at each estimate's ``time_s``.
:func:`summarize` computes every metric of :mod:`estimators.metrics` for one pairing and
:func:`compare` does both. Every user-caused problem raises :class:`InputError` naming the
file and what to do.

Phases: :func:`split_phases` cuts a session at its markers (before the first marker, then
from each marker to the next); :func:`phase_rows` gives per phase the duration, mean
rate, agreement (with a reference) and time to a steady rate (:data:`STEADY`);
:func:`phases_of` does it for paired series, :func:`log_phases` for a log alone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Union

import numpy as np

from estimators import metrics
from estimators.estimate import QUANTITIES
from streamer.errors import InputError
from streamer.sinks.estimate_log import LogTable, read_log
from streamer.sources import wfdb_reader

LOG_MAGIC = "# ridgewatch estimate log"

DEFAULT_WINDOW_S = {"hr": 8.0, "rr": 32.0}
"""Window (s) over which reference events are averaged, per quantity, when the caller
does not pass the estimator's window. It also bounds the lag search."""

TOLERANCES = {
    # EC13-style heart-rate tolerance, max(5 bpm, 10 %) (ANSI/AAMI EC13, cited from memory).
    "hr": (metrics.HR_TOLERANCE_ABS, metrics.HR_TOLERANCE_REL),
    # No standard exists for breathing rate; +-2 breaths/min is common practice in
    # breathing-rate estimation studies.
    "rr": (2.0, 0.0),
}
"""(absolute per minute, relative fraction) tolerance per quantity."""

CALIBRATION_BINS = 5
"""Equal-width confidence bins on [0, 1] for the calibration table."""

MAX_PLAUSIBLE_RATE = 400.0
"""Rates above this (per minute) in a time,rate CSV mean the file is something else
(e.g. sample numbers); a generous bound above any heart or breathing rate."""

NOTE_CODE = 22
"""MIT annotation code of a comment/note (from memory, as in
:data:`streamer.sources.wfdb_reader.BEAT_CODES`)."""

_KNOWN_TYPES = ("an estimate log, a WFDB annotation file (.atr) or a CSV of event times "
                "(one column, seconds) or of time_s,rate_per_min")


@dataclass(frozen=True)
class OtherLog:
    """Another estimate log as the reference."""

    path: Path
    table: LogTable

    kind = "estimate log"


@dataclass(frozen=True)
class EventTimes:
    """Reference event times (beats or breaths), seconds, strictly increasing.

    ``quantity`` is ``"hr"`` when the file says the events are beats, else None.
    """

    path: Path
    times_s: np.ndarray
    quantity: str | None = None

    kind = "events"


@dataclass(frozen=True)
class RateSeries:
    """A reference rate series: strictly increasing times (s) and rates per minute."""

    path: Path
    time_s: np.ndarray
    rate_per_min: np.ndarray
    name: str = "rate"

    kind = "rate series"


Other = Union[OtherLog, EventTimes, RateSeries]


# ---------------------------------------------------------------------------- loading


def load_other(path, fs: float | None = None, column: str | None = None) -> Other:
    """Load the reference side of a comparison, recognising its type.

    Parameters
    ----------
    path : str or Path
        The file (see the module docstring for the types recognised).
    fs : float, optional
        Sampling rate (Hz) of sample numbers: a WFDB annotation file's, when there is no
        record header beside it, or a CSV column of event sample numbers (e.g. the
        BIDMC breath annotations), which are then divided by it.
    column : str, optional
        For a CSV with a header row: the name of the rate column (time is the first
        column), or of the sample-number column when ``fs`` is given.

    Returns
    -------
    OtherLog, EventTimes or RateSeries

    Raises
    ------
    InputError
        When the file is missing, of an unknown type or malformed.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path} does not exist or is not a file; pass {_KNOWN_TYPES}")
    try:
        with open(path, "rb") as fh:
            start = fh.read(len(LOG_MAGIC))
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    if start == LOG_MAGIC.encode():
        return OtherLog(path, read_log(path))
    suffix = path.suffix.lower()
    if suffix in (".csv", ".txt"):
        return _load_csv(path, column, fs)
    if suffix == ".atr" or (suffix not in (".hea", ".dat") and path.with_suffix(".hea").is_file()):
        return _load_wfdb_annotations(path, fs)
    raise InputError(f"{path}: unknown file type '{path.suffix}'; pass {_KNOWN_TYPES}")


def _events_from(path: Path, times: np.ndarray, what: str) -> np.ndarray:
    times = np.sort(times)
    if times.size < 2:
        raise InputError(f"{path} holds {times.size} {what}; at least 2 are needed for a rate")
    same = np.flatnonzero(np.diff(times) == 0)
    if same.size:
        raise InputError(
            f"{path}: two {what} at {times[same[0]]:g} s; remove the duplicate"
        )
    return times


def _load_wfdb_annotations(path: Path, fs: float | None) -> EventTimes:
    header_path = path.with_suffix(".hea")
    if fs is None and header_path.is_file():
        fs = wfdb_reader.read_header(header_path).fs
    # Without a rate the file may still carry its own "## time resolution" note.
    annotations = wfdb_reader.read_annotations(path, math.nan if fs is None else float(fs))
    if not (math.isfinite(annotations.fs) and annotations.fs > 0):
        raise InputError(
            f"{path}: the sampling rate of its sample numbers is unknown; put the record "
            f"header {header_path.name} beside it or give the sampling rate"
        )
    beats = annotations.beat_times_s()
    if beats.size:
        return EventTimes(path, _events_from(path, beats, "beat annotations"), "hr")
    # Not beats (e.g. breath annotations): every annotation is an event, except notes
    # (code 22, such as the time-resolution note) unless notes are all the file holds.
    keep = annotations.codes != NOTE_CODE
    if not keep.any():
        keep[:] = True
    times = annotations.samples[keep].astype(np.float64) / annotations.fs
    return EventTimes(path, _events_from(path, times, "annotations"), None)


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def _load_csv(path: Path, column: str | None,
              fs: float | None = None) -> Union[EventTimes, RateSeries]:
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) else "not UTF-8 text"
        raise InputError(f"cannot read {path}: {reason}") from None
    header: list[str] | None = None
    rows: list[tuple[int, list[str]]] = []
    for line_no, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        cells = [c.strip() for c in stripped.split(",")]
        if header is None and not rows and not all(_is_number(c) for c in cells if c):
            header = cells
            continue
        rows.append((line_no, cells))
    if not rows:
        raise InputError(f"{path} has no data rows; pass {_KNOWN_TYPES}")
    n_columns = len(header) if header is not None else len(rows[0][1])
    for line_no, cells in rows:
        if len(cells) != n_columns:
            raise InputError(
                f"{path}, line {line_no}: {len(cells)} columns where {n_columns} were expected"
            )
    names = header if header is not None else [f"column {j + 1}" for j in range(n_columns)]
    sample_columns = [j for j, name in enumerate(header or []) if "sample" in name.lower()]
    if sample_columns and fs is None:
        raise InputError(
            f"{path}: column '{header[sample_columns[0]]}' holds sample numbers; give their "
            "sampling rate (--against-fs HZ) or convert them to seconds first"
        )

    def numbers(j: int, allow_empty: bool) -> np.ndarray:
        out = np.empty(len(rows))
        for i, (line_no, cells) in enumerate(rows):
            cell = cells[j]
            if cell == "" and allow_empty:
                out[i] = np.nan
            elif cell != "" and _is_number(cell):
                out[i] = float(cell)
            else:
                raise InputError(
                    f"{path}, line {line_no}: '{cell}' in column '{names[j]}' is not a number"
                )
        return out

    if sample_columns:
        j = sample_columns[0]
        if column is not None:
            matches = [k for k, name in enumerate(header) if name.lower() == column.lower()]
            if not matches:
                raise InputError(f"{path} has no column '{column}'; its columns are "
                                 f"{', '.join(header)}")
            j = matches[0]
        samples = numbers(j, allow_empty=True)  # shorter columns are padded with empties
        times = samples[np.isfinite(samples)] / float(fs)
        return EventTimes(path, _events_from(path, times, "events"), None)
    if column is not None:
        if header is None:
            raise InputError(f"{path} has no header row, so column '{column}' cannot be found")
        lowered = [n.lower() for n in header]
        if column.lower() not in lowered[1:]:
            raise InputError(
                f"{path} has no rate column '{column}'; its columns are {', '.join(header)}"
            )
        rate_j = lowered.index(column.lower(), 1)
    elif n_columns == 1:
        times = numbers(0, allow_empty=False)
        if not np.all(np.isfinite(times)):
            raise InputError(f"{path}: event times must be finite numbers of seconds")
        return EventTimes(path, _events_from(path, times, "events"), None)
    elif n_columns == 2:
        rate_j = 1
    else:
        raise InputError(
            f"{path} has {n_columns} columns ({', '.join(names)}); expected 1 (event times "
            "in s) or 2 (time_s, rate_per_min), or choose the rate column by name"
        )
    time_s = numbers(0, allow_empty=False)
    rate = numbers(rate_j, allow_empty=True)
    if not (np.all(np.isfinite(time_s)) and np.all(np.diff(time_s) > 0)):
        k = int(np.argmax(~(np.diff(time_s) > 0))) if time_s.size > 1 else 0
        raise InputError(
            f"{path}, line {rows[k + 1][0] if time_s.size > 1 else rows[0][0]}: times in "
            f"column '{names[0]}' must be finite and strictly increasing"
        )
    finite = rate[np.isfinite(rate)]
    if finite.size and (finite.min() < 0 or finite.max() > MAX_PLAUSIBLE_RATE):
        raise InputError(
            f"{path}: column '{names[rate_j]}' has values from {finite.min():g} to "
            f"{finite.max():g}, not rates per minute; expected time_s,rate_per_min"
        )
    return RateSeries(path, time_s, rate, names[rate_j])


# ---------------------------------------------------------------------------- pairing


@dataclass
class PairedSeries:
    """Estimate and reference of one (quantity, source) at the estimate's times.

    ``reference`` is NaN where the reference has no value. ``events_s`` holds the
    reference events when the reference is event times (for plotting). ``extra_curves``
    holds further ``(label, time_s, rate_per_min)`` curves to overlay in figures (see
    :func:`add_overlay`).
    """

    quantity: str
    source: str
    reference_label: str
    reference_kind: str
    time_s: np.ndarray
    estimate: np.ndarray
    reference: np.ndarray
    confidence: np.ndarray
    quality: np.ndarray
    delay_s: np.ndarray
    window_s: float = math.nan
    events_s: np.ndarray | None = None
    extra_curves: list = field(default_factory=list)

    @property
    def key(self) -> tuple[str, str]:
        return (self.quantity, self.source)


def _window_for(quantity: str, window_s) -> float:
    if window_s is None:
        return DEFAULT_WINDOW_S.get(quantity, DEFAULT_WINDOW_S["hr"])
    if isinstance(window_s, dict):
        return float(window_s.get(quantity, DEFAULT_WINDOW_S.get(quantity, math.nan)))
    return float(window_s)


def _describe_sources(table: LogTable) -> str:
    sources = list(dict.fromkeys(s for _, s in table.pairs()))
    return ", ".join(sources) if sources else "none (no estimates)"


def _describe_pairs(table: LogTable) -> str:
    pairs = table.pairs()
    return ", ".join(f"{q}/{s}" for q, s in pairs) if pairs else "no estimates"


def _rate_series_gap(time_s: np.ndarray, max_gap_s: float | None) -> float:
    if max_gap_s is not None:
        return float(max_gap_s)
    if time_s.size < 2:
        return 0.0
    # 1.5 steps: interpolate between neighbouring samples and tolerate some jitter.
    return 1.5 * float(np.median(np.diff(time_s)))


def pair_up(log_table: LogTable, other: Other, quantity: str | None = None,
            source: str | None = None, window_s=None, other_source: str | None = None,
            max_gap_s: float | None = None, log_name: str = "the estimate log"
            ) -> list[PairedSeries]:
    """Pair each (quantity, source) of a log with the reference at the log's times.

    Parameters
    ----------
    log_table : LogTable
        The estimate log under test.
    other : OtherLog, EventTimes or RateSeries
        The reference, from :func:`load_other`.
    quantity, source : str, optional
        Restrict to this quantity (``"hr"``/``"rr"``) and/or source.
    window_s : float or dict, optional
        Window (s) of the estimator, per quantity when a dict; default
        :data:`DEFAULT_WINDOW_S`. Reference events are averaged over this window centred
        on each estimate's ``time_s`` (:func:`estimators.metrics.rate_from_events`).
    other_source : str, optional
        For a reference log: its source to compare with (default the same source).
    max_gap_s : float, optional
        For rate references: largest distance from an estimate time to the reference
        samples interpolated for it (default 1.5 reference steps).
    log_name : str
        How to name the log in error messages (usually its path).

    Returns
    -------
    list of PairedSeries, in the order the log first shows each (quantity, source).

    Raises
    ------
    InputError
        When nothing can be paired, or it is unclear which quantity a reference measures.
    """
    if quantity is not None and quantity not in QUANTITIES:
        raise InputError(f"unknown quantity '{quantity}'; choose one of {', '.join(QUANTITIES)}")
    if source is not None and source not in {s for _, s in log_table.pairs()}:
        raise InputError(f"{log_name}: no source '{source}' (--source); its sources are "
                         f"{_describe_sources(log_table)}")
    if other_source is not None and not isinstance(other, OtherLog):
        raise InputError(f"--against-source {other_source} needs an estimate log as the "
                         f"reference; {other.path} was read as {other.kind}")
    pairs = [(q, s) for q, s in log_table.pairs()
             if (quantity is None or q == quantity) and (source is None or s == source)]
    if not pairs:
        wanted = " ".join(x for x in (quantity, source) if x is not None)
        raise InputError(
            f"{log_name} has no estimates for {wanted or 'any quantity'}; "
            f"it holds {_describe_pairs(log_table)}"
        )
    if isinstance(other, OtherLog):
        return _pair_with_log(log_table, other, pairs, other_source, max_gap_s, log_name)

    ref_quantity = quantity or getattr(other, "quantity", None)
    if ref_quantity is None:
        found = sorted({q for q, _ in pairs})
        if len(found) > 1:
            raise InputError(
                f"{other.path}: cannot tell whether it is a heart-rate or a breathing-rate "
                f"reference while {log_name} holds {' and '.join(found)}; choose the quantity "
                "(hr or rr)"
            )
        ref_quantity = found[0]
    if getattr(other, "quantity", None) not in (None, ref_quantity):
        raise InputError(
            f"{other.path} holds beat annotations, a heart-rate (hr) reference, not "
            f"{ref_quantity}; choose quantity hr or another reference"
        )
    pairs = [(q, s) for q, s in pairs if q == ref_quantity]
    if not pairs:
        raise InputError(
            f"{log_name} has no {ref_quantity} estimates to compare with {other.path}; "
            f"it holds {_describe_pairs(log_table)}"
        )
    out = []
    for q, s in pairs:
        rows = log_table.select(q, s).columns
        t = rows["time_s"]
        label = other.path.name
        if isinstance(other, EventTimes):
            window = _window_for(q, window_s)
            if not (math.isfinite(window) and window > 0):
                raise InputError(f"the window for {q} must be a positive number of seconds, "
                                 f"got {window}")
            reference = metrics.rate_from_events(other.times_s, t, window)
            events = other.times_s
        else:
            window = _window_for(q, window_s)
            gap = _rate_series_gap(other.time_s, max_gap_s)
            _, reference = metrics.align(t, rows["rate_per_min"], other.time_s,
                                         other.rate_per_min, gap)
            label = f"{other.path.name} ({other.name})"
            events = None
        out.append(PairedSeries(q, s, label, other.kind, t, rows["rate_per_min"], reference,
                                rows["confidence"], rows["quality"], rows["delay_s"],
                                window, events))
    return out


def _pair_with_log(log_table, other: OtherLog, pairs, other_source, max_gap_s, log_name):
    if other_source is not None and other_source not in {s for _, s in other.table.pairs()}:
        raise InputError(f"{other.path}: no source '{other_source}' (--against-source); its "
                         f"sources are {_describe_sources(other.table)}")
    out = []
    for q, s in pairs:
        theirs = other.table.select(q, other_source or s).columns
        if theirs["time_s"].size == 0:
            continue
        t_ref, r_ref = theirs["time_s"], theirs["rate_per_min"]
        if not np.all(np.diff(t_ref) > 0):
            raise InputError(
                f"{other.path}: times of {q}/{other_source or s} are not strictly increasing; "
                "is it several logs joined together?"
            )
        rows = log_table.select(q, s).columns
        gap = _rate_series_gap(t_ref, max_gap_s)
        _, reference = metrics.align(rows["time_s"], rows["rate_per_min"], t_ref, r_ref, gap)
        label = f"{other.path.name} ({q}/{other_source or s})"
        out.append(PairedSeries(q, s, label, other.kind, rows["time_s"], rows["rate_per_min"],
                                reference, rows["confidence"], rows["quality"],
                                rows["delay_s"], DEFAULT_WINDOW_S.get(q, math.nan)))
    if not out:
        asked = ", ".join(f"{q}/{other_source or s}" for q, s in pairs)
        hint = ("" if other_source is not None else
                f"; choose its source with --against-source (one of "
                f"{_describe_sources(other.table)})")
        raise InputError(
            f"{other.path} has none of {asked} to compare with; it holds "
            f"{_describe_pairs(other.table)}{hint}"
        )
    return out


def with_rate(table: LogTable, use: str, name: str) -> LogTable:
    """``table`` with the rate the comparison scores: ``centre`` (as logged: the
    window-centre rate at ``time_s``) or ``now`` (the rate now at ``emitted_s``, with its
    own confidence and no delay, :mod:`estimators.rate_now`). An offline log's rate now
    is its centre rate, at its centre: it is scored at ``time_s``."""
    if use == "centre":
        return table
    if use != "now":
        raise InputError(f"--use {use!r}: expected now or centre")
    cols = dict(table.columns)
    now = cols.get("rate_now_per_min")
    if now is None or (len(now) and np.all(np.isnan(now)) and
                       np.any(np.isfinite(cols["rate_per_min"]))):
        raise InputError(f"{name} has no rate-now column (written before ridgewatch logged "
                         "it); compare its window-centre rate with --use centre")
    offline = str(table.header.get("mode", "")).strip() == "offline"
    if not offline:
        cols["time_s"] = cols["emitted_s"]
        cols["delay_s"] = np.zeros(len(now))
    cols["rate_per_min"] = now
    cols["confidence"] = cols["now_confidence"]
    return LogTable(table.header, cols, table.markers)


def add_overlay(series: list[PairedSeries], label: str, table: LogTable) -> None:
    """Add the matching (quantity, source) of another log as a curve to overlay in figures."""
    for item in series:
        rows = table.select(item.quantity, item.source).columns
        if rows["time_s"].size:
            item.extra_curves.append((label, rows["time_s"], rows["rate_per_min"]))


# ---------------------------------------------------------------------------- metrics


def _finite_stat(values: np.ndarray, fn) -> float:
    finite = values[np.isfinite(values)]
    return float(fn(finite)) if finite.size else math.nan


def summarize(series: PairedSeries) -> dict:
    """All metrics of one pairing as a flat dict (plus a ``calibration`` list of dicts).

    Keys: ``quantity``, ``source``, ``reference``, ``reference_kind``, ``window_s``,
    ``rows``; every field of :class:`estimators.metrics.Agreement`; ``coverage``
    (rows with an estimate), ``reference_coverage`` (rows with a reference),
    ``delay_median_s`` and ``delay_p95_s`` (of the log's ``delay_s``), ``lag_s``
    (:func:`estimators.metrics.best_lag`, positive = the estimate lags the reference,
    searched within +-``window_s``) and ``calibration`` (per confidence bin).
    """
    tol_abs, tol_rel = TOLERANCES.get(series.quantity, TOLERANCES["hr"])
    result = {
        "quantity": series.quantity,
        "source": series.source,
        "reference": series.reference_label,
        "reference_kind": series.reference_kind,
        "window_s": series.window_s,
        "rows": int(series.time_s.size),
    }
    result.update(metrics.agreement(series.estimate, series.reference, tol_abs, tol_rel).as_dict())
    result["coverage"] = metrics.coverage(series.estimate)
    result["reference_coverage"] = metrics.coverage(series.reference)
    result["delay_median_s"] = _finite_stat(series.delay_s, np.median)
    result["delay_p95_s"] = _finite_stat(series.delay_s, lambda v: np.percentile(v, 95))
    t = series.time_s
    lag = math.nan
    max_lag = series.window_s if math.isfinite(series.window_s) else DEFAULT_WINDOW_S["hr"]
    if t.size >= 3 and np.all(np.isfinite(t)) and np.all(np.diff(t) > 0):
        lag = metrics.best_lag(t, series.reference, series.estimate, max_lag)
    result["lag_s"] = lag
    cal = metrics.calibration(series.estimate - series.reference, series.confidence,
                              CALIBRATION_BINS, series.reference, tol_abs, tol_rel)
    result["calibration"] = cal.rows()
    return result


def compare(log_table: LogTable, other: Other, quantity: str | None = None,
            source: str | None = None, window_s=None, **options) -> list[dict]:
    """Metrics of a log against a reference, one dict per (quantity, source).

    Parameters are those of :func:`pair_up` (``options`` are passed on); see
    :func:`summarize` for the keys of each dict. Use :func:`pair_up` and
    :func:`summarize` directly when the paired series are also needed (e.g. for figures).

    Raises
    ------
    InputError
        As :func:`pair_up`.
    """
    return [summarize(s) for s in pair_up(log_table, other, quantity, source, window_s, **options)]


# ---------------------------------------------------------------------------- phases

STEADY = {
    # Band: the EC13-style absolute heart-rate tolerance (ANSI/AAMI EC13, cited from
    # memory): a rate that stays within the accuracy asked of a monitor counts as steady.
    # Hold: 30 s, the stretch over which a pulse is counted by hand (30 s, doubled;
    # common practice), and about four independent 8-s analysis windows, so a one-window
    # plateau during a transition does not count.
    "hr": (5.0, 30.0),
    # Band: the +-2 breaths/min tolerance of breathing-rate studies (common practice).
    # Hold: 30 s, the stretch over which breaths are counted by hand (30 s, doubled;
    # common practice): 6-10 breaths at resting rates.
    "rr": (2.0, 30.0),
}
"""(band per minute, hold s) of :func:`estimators.metrics.time_to_steady` per quantity."""

FIRST_PHASE = "(before the first marker)"
"""Label of the phase from the session's start to its first marker."""


@dataclass(frozen=True)
class Phase:
    """A stretch of the session: from a marker (or the start) to the next (or the end).

    ``label`` is the marker's text (:data:`FIRST_PHASE` for the stretch before the first
    marker), ``marker_source`` where the marker came from ('' for the first stretch).
    """

    label: str
    start_s: float
    end_s: float
    marker_source: str = ""

    @property
    def duration_s(self) -> float:
        return self.end_s - self.start_s


def split_phases(markers, start_s: float, end_s: float) -> list[Phase]:
    """The phases of a session ``[start_s, end_s]`` cut at its markers.

    Phase 0 runs from ``start_s`` to the first marker, phase ``k`` from marker ``k`` to
    marker ``k + 1`` (the last one to ``end_s``). Markers are taken in time order; a
    phase of no length is left out: two markers at one time, the stretch before a first
    marker at or before the session's start, a marker at or after the session's end.
    A phase keeps its marker's time as its start even before the first estimate, so
    its time to steady counts from the marker. No markers: no phases (the caller
    reports the session as a whole, as before).

    Examples
    --------
    >>> from streamer.sources.base import Marker
    >>> [(p.label, p.start_s, p.end_s) for p in split_phases(
    ...     [Marker(30.0, "ramp"), Marker(60.0, "rest")], 0.0, 99.0)]
    [('(before the first marker)', 0.0, 30.0), ('ramp', 30.0, 60.0), ('rest', 60.0, 99.0)]
    """
    timed = sorted((m for m in markers if math.isfinite(m.time_s)), key=lambda m: m.time_s)
    if not timed or not (math.isfinite(start_s) and math.isfinite(end_s)):
        return []
    starts = [(FIRST_PHASE, float(start_s), "")] + [(m.text, float(m.time_s), m.source)
                                                    for m in timed]
    phases = []
    for k, (label, begin, source) in enumerate(starts):
        end = starts[k + 1][1] if k + 1 < len(starts) else float(end_s)
        end = min(end, float(end_s))
        if end > begin and begin < end_s:
            phases.append(Phase(label, begin, end, source))
    return phases


def session_span(table: LogTable) -> tuple[float, float]:
    """First and last estimate time (``time_s``) of a log, over all its rows."""
    t = table.columns["time_s"]
    t = t[np.isfinite(t)]
    return (float(t.min()), float(t.max())) if t.size else (math.nan, math.nan)


def phase_rows(quantity: str, source: str, time_s, estimate, phases: list[Phase],
               reference=None) -> list[dict]:
    """Per phase: duration, mean rate, agreement (with a reference) and time to steady.

    Parameters
    ----------
    quantity, source : str
        What the rates are (``"hr"``/``"rr"``) and where they come from.
    time_s, estimate : array_like, shape (n,)
        Estimate times and rates (NaN: no estimate).
    phases : list of Phase
        From :func:`split_phases`. A row belongs to the phase with
        ``start_s <= time_s < end_s`` (the last phase also keeps ``time_s == end_s``).
    reference : array_like, shape (n,), optional
        The reference at the same times; without it the agreement keys are left out.

    Returns
    -------
    list of dict
        Keys ``quantity, source, phase, marker_source, start_s, end_s, duration_s,
        estimates`` (rows with a rate), ``mean_rate``; with a reference ``reference_mean``
        and ``n, mae, rmse, bias, loa_lower, loa_upper, within_tolerance``
        (:func:`estimators.metrics.agreement`, tolerance :data:`TOLERANCES`); and
        ``time_to_steady_s`` (:func:`estimators.metrics.time_to_steady` with
        :data:`STEADY`, counted from the phase's start; NaN when it never settles).
    """
    t = np.asarray(time_s, dtype=np.float64)
    est = np.asarray(estimate, dtype=np.float64)
    ref = None if reference is None else np.asarray(reference, dtype=np.float64)
    band, hold_s = STEADY.get(quantity, STEADY["hr"])
    tol_abs, tol_rel = TOLERANCES.get(quantity, TOLERANCES["hr"])
    rows = []
    for k, phase in enumerate(phases):
        inside = (t >= phase.start_s) & (t < phase.end_s)
        if k == len(phases) - 1:
            inside |= t == phase.end_s
        rates = est[inside]
        row = {"quantity": quantity, "source": source, "phase": phase.label,
               "marker_source": phase.marker_source, "start_s": phase.start_s,
               "end_s": phase.end_s, "duration_s": phase.duration_s,
               "estimates": int(np.isfinite(rates).sum()),
               "mean_rate": _finite_stat(rates, np.mean)}
        if ref is not None:
            row["reference_mean"] = _finite_stat(ref[inside], np.mean)
            agree = metrics.agreement(rates, ref[inside], tol_abs, tol_rel)
            for key in ("n", "mae", "rmse", "bias", "loa_lower", "loa_upper",
                        "within_tolerance"):
                row[key] = getattr(agree, key)
        row["time_to_steady_s"] = metrics.time_to_steady(t[inside], rates, phase.start_s,
                                                         band, hold_s)
        rows.append(row)
    return rows


def phases_of(series: list[PairedSeries], table: LogTable) -> dict:
    """Phase rows per (quantity, source) of paired series, cut at the log's markers;
    empty when the log has no markers (or none inside the session)."""
    start_s, end_s = session_span(table)
    phases = split_phases(table.markers, start_s, end_s)
    if not phases:
        return {}
    return {s.key: phase_rows(s.quantity, s.source, s.time_s, s.estimate, phases, s.reference)
            for s in series}


def log_phases(table: LogTable, markers=None) -> dict:
    """Phase rows (no reference) per (quantity, source) of a log, cut at ``markers``
    (default the log's own); empty without markers."""
    start_s, end_s = session_span(table)
    phases = split_phases(table.markers if markers is None else markers, start_s, end_s)
    if not phases:
        return {}
    out = {}
    for q, s in table.pairs():
        rows = table.select(q, s).columns
        out[(q, s)] = phase_rows(q, s, rows["time_s"], rows["rate_per_min"], phases)
    return out
