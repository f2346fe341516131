"""The beats file and the HRV file: CSVs written like the estimate log.

Format
------
A header block of ``#`` lines like the estimate log's
(:mod:`streamer.sinks.estimate_log`), whose first line says what the file is::

    # ridgewatch beats            (or: # ridgewatch hrv)
    # version: 0.1.0
    # mode: replay                (live | replay | offline)
    # started: 2026-05-04T09:30:12.345+00:00
    # source: <file path or stream name>
    # channels: {"ECG": "ecg", ...}
    # config: {...}

then one header row and one row per beat (:data:`BEAT_COLUMNS`) or per HRV update
(:data:`HRV_COLUMNS`), each flushed as it is written. Empty cells mean "none" (no
interval for a run's first beat, no HRV value with too few clean beats).

Beats: ``time_s`` the beat (its fiducial point: ECG R peak, PPG steepest upstroke; see
:mod:`estimators.beats`); ``interval_ms`` from the beat detected before (raw);
``flag`` (:data:`estimators.hrv.FLAGS`); ``nn_ms`` the corrected interval (for
``missed``: each of the two it stands for; empty for ``extra`` and ``first``);
``delay_s`` how long after the beat its row was known (detection plus the two beats
the correction waits for). HRV: every 5 s of stream time per source (see
:class:`estimators.hrv.HrvRow`).

The files are claimed like the estimate log (created exclusively, never an input,
replaced with ``--overwrite`` only when they are files of the same kind, locked for
the run); a beats or HRV file is recognised by its first line.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from streamer.errors import InputError
from streamer.sinks.estimate_log import FileKind, TableFile

BEATS_MAGIC = "# ridgewatch beats"
HRV_MAGIC = "# ridgewatch hrv"
BEATS_FILE = FileKind("beats file", "--beats", BEATS_MAGIC)
HRV_FILE = FileKind("HRV file", "--hrv", HRV_MAGIC)

BEAT_COLUMNS = ("time_s", "source", "interval_ms", "flag", "nn_ms", "delay_s")
HRV_COLUMNS = ("emitted_s", "source", "window_end_s", "rmssd_ms", "sdnn_ms", "mean_nn_ms",
               "corrected_share", "n_intervals", "dfa_alpha1")


def _fmt(value, digits: int) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return f"{value:.{digits}f}"


def beat_cells(source: str, row) -> tuple:
    """The cells of one :class:`estimators.hrv.BeatRow`."""
    return (_fmt(row.time_s, 4), source, _fmt(row.interval_ms, 1), row.flag,
            _fmt(row.nn_ms, 1), _fmt(row.delay_s, 3))


def hrv_cells(source: str, row) -> tuple:
    """The cells of one :class:`estimators.hrv.HrvRow`."""
    return (_fmt(row.emitted_s, 3), source, _fmt(row.window_end_s, 4), _fmt(row.rmssd_ms, 2),
            _fmt(row.sdnn_ms, 2), _fmt(row.mean_nn_ms, 1), _fmt(row.corrected_share, 4),
            str(row.n_intervals), _fmt(row.dfa_alpha1, 4))


def beats_file(path, mode, source, channels, config, **kwargs) -> TableFile:
    """Open a beats file (``--beats``)."""
    return TableFile(path, BEATS_FILE, BEAT_COLUMNS, mode, source, channels, config, **kwargs)


def hrv_file(path, mode, source, channels, config, **kwargs) -> TableFile:
    """Open an HRV file (``--hrv``)."""
    return TableFile(path, HRV_FILE, HRV_COLUMNS, mode, source, channels, config, **kwargs)


# ---------------------------------------------------------------------- reading


@dataclass
class BeatTable:
    """A parsed beats file: header fields, and per column an array (``source`` and
    ``flag`` as str, the rest float with NaN for empty cells)."""

    header: dict
    columns: dict

    def __len__(self) -> int:
        return len(self.columns["time_s"])

    def sources(self) -> list[str]:
        return list(dict.fromkeys(self.columns["source"].tolist()))

    def select(self, source: str) -> "BeatTable":
        mask = self.columns["source"] == source
        return BeatTable(self.header, {k: v[mask] for k, v in self.columns.items()})


def is_beats_file(path) -> bool:
    """Whether ``path`` starts with the beats file's first line."""
    try:
        with open(path, "rb") as fh:
            return fh.read(len(BEATS_MAGIC) + 1).rstrip(b"\r\n") == BEATS_MAGIC.encode()
    except OSError:
        return False


def read_beats(path) -> BeatTable:
    """Read a beats file written by :func:`beats_file`.

    Raises
    ------
    InputError
        When it is not a beats file or a row is malformed (one line naming the file and
        the line number).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot read the beats file {path}: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise InputError(f"{path} is not a ridgewatch beats file (not UTF-8 text)") from None
    lines = text.splitlines()
    if not lines or lines[0] != BEATS_MAGIC:
        raise InputError(f"{path} is not a ridgewatch beats file (its first line is not "
                         f"'{BEATS_MAGIC}')")
    header, rows, names = {}, [], None
    for number, line in enumerate(lines[1:], start=2):
        if line.startswith("#"):
            key, _, value = line[1:].strip().partition(": ")
            if names is None and key in ("version", "mode", "started", "source", "channels",
                                         "config"):
                header[key] = value
            continue
        if not line.strip():
            continue
        cells = next(csv.reader([line]))
        if names is None:
            if tuple(cells[:len(BEAT_COLUMNS)]) != BEAT_COLUMNS:
                raise InputError(f"{path} line {number}: the header row is not "
                                 f"{','.join(BEAT_COLUMNS)}")
            names = cells
            continue
        if len(cells) != len(names):
            raise InputError(f"{path} line {number}: {len(cells)} cells where the header "
                             f"row has {len(names)}")
        rows.append(cells)
    if names is None:
        raise InputError(f"{path} has no header row ({','.join(BEAT_COLUMNS)})")
    columns = {}
    for c, name in enumerate(names):
        cells = [r[c] for r in rows]
        if name in ("source", "flag"):
            columns[name] = np.array(cells, dtype=object).astype(str)
            continue
        try:
            columns[name] = np.array([float(v) if v else np.nan for v in cells])
        except ValueError:
            bad = next(i for i, v in enumerate(cells) if v and not _is_float(v))
            raise InputError(f"{path}: column {name} holds '{cells[bad]}', not a number "
                             f"(row {bad + 1})") from None
    return BeatTable(header, columns)


def _is_float(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
