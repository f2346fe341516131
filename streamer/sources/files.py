"""Read a whole recording from a file into a :class:`~streamer.sources.base.Recording`.

:func:`read_recording` picks the reader by the file name:

=========================== ===========================================================
file                        reader
=========================== ===========================================================
``.csv``, ``.tsv`` (+``.gz``) header row, numeric rows; time column or ``fs=``
``.hea`` (``.dat``, none)   WFDB record via wfdb (:mod:`streamer.sources.wfdb_reader`)
``.edf``, ``.bdf``          EDF/EDF+/BDF via pyedflib; EDF+ annotations as markers
``.xdf``, ``.xdfz``         XDF via pyxdf: numeric streams merged, text streams as markers
=========================== ===========================================================

Every problem a user can cause becomes one :class:`~streamer.errors.InputError` line that
names the file (and line, column, channel or stream) and what to do. Recoverable damage
(a truncated last CSV line, a cut-short WFDB signal or XDF file, a CSV time column written
with too few digits) is logged as a warning on the ``"ridgewatch"`` logger and the
complete part is returned; values are never guessed.
"""

from __future__ import annotations

import csv
import gzip
import io
import logging
import math
import numbers
import re
import warnings
from pathlib import Path
from typing import Sequence

import numpy as np

from streamer.errors import InputError
from streamer.sources import wfdb_reader
from streamer.sources.base import KINDS, ChannelInfo, Marker, Recording, SourceInfo
from streamer.sources.merge import merge_batch, merge_recordings

logger = logging.getLogger("ridgewatch")

SUPPORTED = (".csv", ".csv.gz", ".tsv", ".tsv.gz", ".hea", ".edf", ".bdf", ".xdf", ".xdfz",
             ".xdf.gz")

#: Names (lower case, spaces stripped, unit removed) recognised as the time column; any
#: name that starts with "time" is one too (e.g. "Time [s]", "timestamp_us").
TIME_COLUMN_NAMES = ("time", "t", "timestamp")

#: Units of a time column, in its name (``time [ms]``, ``t (s)``, ``time_ms``,
#: ``timestamp_us``) or given with ``--time-unit``, and their size in seconds.
TIME_UNITS = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}
_TIME_UNIT_SPELLINGS = {
    "s": "s", "sec": "s", "secs": "s", "second": "s", "seconds": "s",
    "ms": "ms", "msec": "ms", "msecs": "ms", "millisecond": "ms", "milliseconds": "ms",
    "us": "us", "\u00b5s": "us", "\u03bcs": "us", "usec": "us", "usecs": "us",
    "microsecond": "us", "microseconds": "us",
    "ns": "ns", "nsec": "ns", "nsecs": "ns", "nanosecond": "ns", "nanoseconds": "ns",
}
_UNIT_RE = re.compile(r"[\[(]\s*([^\])]*?)\s*[\])]\s*$")
_SUFFIX_UNIT_RE = re.compile(r"(.*?)[\s_.\-]+([^\W\d_]+)", re.UNICODE)

#: Sampling rates ridgewatch accepts, from --fs or a time column: from 1 Hz (a slow
#: respiration record) to 100 kHz (above any physiological recorder; rule of thumb).
FS_RANGE_HZ = (1.0, 100_000.0)

#: A time column without a unit is read as seconds only if that gives at least this
#: rate: pulse, ECG and breathing recorders sample at 10 Hz or more (rule of thumb),
#: while integer milliseconds read as seconds give 1 Hz or less.
IMPLICIT_SECONDS_MIN_HZ = 4.0


def read_recording(
    path: str | Path,
    fs: float | None = None,
    channels: Sequence[str | int] | str | None = None,
    *,
    stream: str | Sequence[str] | None = None,
    annotators: Sequence[str] | None = None,
    time_column: str | None = None,
    time_unit: str | None = None,
) -> Recording:
    r"""Read a recording file.

    Parameters
    ----------
    path : str or Path
        The file. Its name picks the reader (see the module table); a WFDB record may
        also be given as its ``.dat`` file or as the record name without extension.
    fs : float, optional
        Sampling rate in Hz. Required for a CSV without a time column (timestamps are
        then ``k / fs``); for a CSV with one it only sets the nominal rate (the file's
        times are kept). Ignored by the other formats, which state their rate.
    channels : sequence of str, or str, optional
        Channels to keep, in this order: each a channel name (column header, signal
        description, label) or a 0-based index among the file's channels (the CSV time
        column not counted) written as a number. A single string is split at commas.
        All channels when omitted.
    stream : str or sequence of str, optional
        XDF only: the names of the numeric streams to read, in this order (every stream
        of a name). By default every numeric stream with samples and a nominal rate
        (irregular numeric streams only when there is no other). Several streams are
        put on the grid of the fastest (:mod:`streamer.sources.merge`); channel names
        are the labels, ``STREAM/LABEL`` where a label is not unique. Text streams are
        always read, as :attr:`Recording.markers`.
    annotators : sequence of str, optional
        WFDB only: annotation file extensions to read beside the record. Default
        ``("atr",)`` when ``<record>.atr`` exists. Only beat annotations are kept, as
        ``events[annotator]`` in seconds (see :data:`wfdb_reader.BEAT_CODES`).
    time_column : str, optional
        CSV only: the name of the time column (default: the first column named like
        :data:`TIME_COLUMN_NAMES`).
    time_unit : {"s", "ms", "us", "ns"}, optional
        CSV only: the unit of the time column; overrides a unit in its name (with a
        warning when they differ).

    Returns
    -------
    Recording
        ``info.name`` is ``str(path)`` as given, ``info.source_id`` is
        ``"file:" + basename``.

    Raises
    ------
    InputError
        Missing file, unsupported extension, malformed content, unknown channel or
        stream, bad ``fs``; a time column that does not increase, that gives a rate
        outside :data:`FS_RANGE_HZ`, or that contradicts ``fs`` by more than 1 %.

    Notes
    -----
    CSV: the delimiter (``,``, ``;`` or tab) is the one the header uses most; lines
    starting with ``#`` and blank lines are skipped; an empty cell is NaN; a time
    column may give its unit in brackets or after a separator (``time [ms]``,
    ``t (s)``, ``timestamp_us``, ``time_ns``); without one it is read as seconds if that
    gives at least :data:`IMPLICIT_SECONDS_MIN_HZ`, else refused with a hint. Timestamps
    are always seconds. The rate of a time column is
    :math:`L / \operatorname{median}_k(t_{k+L} - t_k)` with
    :math:`L = 100` samples (see :func:`_rate_from_times`). A time column that repeats
    times but lies within one sample period of a regular grid at that rate is replaced
    by the grid, with a warning; one that goes backwards is refused.

    EDF: only the selected channels are read; selected channels at different rates are
    put on the grid of the highest of their rates by linear interpolation
    (:func:`~streamer.sources.merge.merge_batch`, as XDF streams are), with a warning.
    EDF+ annotations become markers (source ``"annotations"``, at their onset; the
    duration is not kept; empty or all-blank texts are skipped). XDF: timestamps are
    the file's, with each stream's clock offsets applied and no dejittering (what a
    live LSL inlet delivers); a marker's time is its stamp on the same clock.
    WFDB: each signal is read at its own rate (samples per frame times the frame rate);
    selected signals at different rates are put on the grid of the fastest of them by
    linear interpolation over their own sample times, with a warning (see
    :func:`streamer.sources.wfdb_reader.on_fastest_grid`).
    """
    given = str(path)
    path = Path(path)
    if fs is not None and not (isinstance(fs, numbers.Real) and not isinstance(fs, bool)
                               and math.isfinite(fs) and fs > 0):
        raise InputError(f"{given}: --fs {fs!r} must be a positive number of Hz")
    if time_unit is not None and time_unit not in TIME_UNITS:
        raise InputError(f"{given}: --time-unit {time_unit!r} is not one of "
                         f"{', '.join(TIME_UNITS)}")
    lower = path.name.lower()

    # A WFDB record can be named without extension, or by its signal file.
    if not path.exists() and path.with_name(path.name + ".hea").is_file():
        path = path.with_name(path.name + ".hea")
        lower = path.name.lower()
    elif lower.endswith(".dat") and path.with_suffix(".hea").is_file():
        path = path.with_suffix(".hea")
        lower = path.name.lower()

    if not path.exists():
        raise InputError(f"{given}: no such file; check the path")
    if not path.is_file():
        raise InputError(f"{given}: not a file; give a recording file")

    is_csv = lower.endswith((".csv", ".csv.gz", ".tsv", ".tsv.gz"))
    if isinstance(stream, str):
        stream = [stream]
    if stream and not lower.endswith((".xdf", ".xdfz", ".xdf.gz")):
        raise InputError(f"{given}: --stream applies to XDF files only; this file has one "
                         "set of channels (choose them with --channel)")
    if not is_csv and (time_column is not None or time_unit is not None):
        option = "--time-column" if time_column is not None else "--time-unit"
        raise InputError(f"{given}: {option} applies to CSV files only; this file states "
                         "its own times")
    if is_csv:
        recording = _read_csv(path, given, fs, time_column, time_unit)
    elif lower.endswith(".hea"):
        # Selected before resampling: the grid follows the selected signals only.
        return _read_wfdb(path, given, annotators, channels)
    elif lower.endswith((".edf", ".bdf")):
        # Selected before reading: the rate follows the selected channels only.
        return _read_edf(path, given, channels)
    elif lower.endswith((".xdf", ".xdfz", ".xdf.gz")):
        recording = _read_xdf(path, given, stream)
    else:
        raise InputError(
            f"{given}: unknown file type; supported: {', '.join(SUPPORTED)} "
            "(a WFDB record may also be given by its .dat file or record name)"
        )
    return select_channels(recording, channels)


def recording_files(path: str | Path) -> list[Path]:
    """The files :func:`read_recording` reads for ``path``: the file itself, and for a
    WFDB record its header, the signal files the header names and the ``.atr``
    annotation file beside it. An estimate log must never be one of them."""
    path = Path(path)
    files = [path]
    if not path.exists() and path.with_name(path.name + ".hea").is_file():
        path = path.with_name(path.name + ".hea")
    elif path.name.lower().endswith(".dat") and path.with_suffix(".hea").is_file():
        path = path.with_suffix(".hea")
    if path.name.lower().endswith(".hea") and path.is_file():
        files.append(path)
        try:
            header = wfdb_reader.read_header(path)
        except InputError:
            return files
        files += [path.parent / s.file_name for s in header.signals]
        files.append(path.with_suffix(".atr"))
    return files


# ---------------------------------------------------------------------------- channels


def select_channels(recording: Recording,
                    channels: Sequence[str | int] | str | None) -> Recording:
    """Keep and order the channels named by ``channels`` (see :func:`read_recording`).

    Raises
    ------
    InputError
        ``"<file>: no channel 'X'; channels are: a, b, c"`` for an unknown name or index.
    """
    if channels is None:
        return recording
    picked = _channel_indices(recording.info.name, recording.info.channel_names, channels)
    info = SourceInfo(
        name=recording.info.name,
        fs=recording.info.fs,
        channels=tuple(recording.info.channels[i] for i in picked),
        source_id=recording.info.source_id,
    )
    return Recording(
        samples=np.ascontiguousarray(recording.samples[:, picked]),
        timestamps=recording.timestamps,
        info=info,
        events=recording.events,
        markers=recording.markers,
    )


def _channel_indices(file_name: str, names: list[str],
                     channels: Sequence[str | int] | str | None) -> list[int]:
    """Indices into ``names`` for a channel selection; all channels for None."""
    if channels is None:
        return list(range(len(names)))
    if isinstance(channels, str):
        channels = [c for c in (part.strip() for part in channels.split(",")) if c]
    if not channels:
        raise InputError(
            f"{file_name}: empty channel selection; channels are: {', '.join(names)}"
        )
    return [_channel_index(file_name, names, spec) for spec in channels]


def _channel_index(file_name: str, names: list[str], spec: str | int) -> int:
    text = str(spec).strip()
    if text in names:  # a name wins over an index that looks the same
        return names.index(text)
    folded = [n.casefold() for n in names]
    if text.casefold() in folded:
        return folded.index(text.casefold())
    if re.fullmatch(r"\d+", text) and int(text) < len(names):
        return int(text)
    raise InputError(f"{file_name}: no channel {text!r}; channels are: {', '.join(names)}")


def _source_id(path: Path) -> str:
    return "file:" + path.name


# ---------------------------------------------------------------------------- CSV


CSV_PIECE_BYTES = 1 << 22
"""Bytes of text parsed at a time (4 MiB, completed to the end of its last line): the
CSV reader holds the parsed table and one piece of text, never the whole text. Our own
choice: ``np.loadtxt`` runs at full speed on pieces this size."""


def _csv_pieces(path: Path, given: str):
    """``(offset, piece)``: the file's bytes (decompressed) in pieces of about
    :data:`CSV_PIECE_BYTES` ending at a line end, with a leading UTF-8 byte order mark
    removed and line ends written as ``\\r`` alone (classic Mac OS) read as ``\\n``;
    ``offset`` counts the bytes of the pieces before. The same file gives the same
    pieces every time."""
    try:
        with (gzip.open(path, "rb") if path.name.lower().endswith(".gz")
              else open(path, "rb")) as f:
            offset = 0
            while True:
                piece = f.read(CSV_PIECE_BYTES)
                if not piece:
                    return
                piece += f.readline()
                if offset == 0 and piece.startswith(b"\xef\xbb\xbf"):  # spreadsheet exports
                    piece = piece[3:]
                if b"\r" in piece and piece.count(b"\r") != piece.count(b"\r\n"):
                    piece = piece.replace(b"\r\n", b"\n").replace(b"\r", b"\n")
                yield offset, piece
                offset += len(piece)
    except EOFError:
        raise InputError(
            f"{given}: the compressed file is truncated; decompress what is left with "
            "'gzip -dc' and read the .csv"
        ) from None
    except (OSError, gzip.BadGzipFile) as exc:
        reason = getattr(exc, "strerror", None) or str(exc)
        raise InputError(f"{given}: cannot read: {reason}") from None


def _check_text(piece: bytes, offset: int, lines_before: int, given: str) -> None:
    """:class:`InputError` when a piece of the file shows it is not text.

    A text CSV holds no control characters other than tab, line ends and form feeds:
    the first 64 KiB of the file are checked for them (a binary file shows them at
    once), the whole file for NUL bytes (the holes a crashed writer can leave)."""
    if offset == 0 and piece.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError(f"{given}: the file is UTF-16 text; save it as UTF-8 (or ASCII) CSV")
    bad = (_CONTROL_BYTES.search(piece, 0, _TEXT_CHECK_BYTES - offset)
           if offset < _TEXT_CHECK_BYTES else None)
    k = bad.start() if bad else piece.find(b"\0")
    if k >= 0:
        what = "a NUL byte" if piece[k] == 0 else f"the control character 0x{piece[k]:02x}"
        line = lines_before + piece.count(b"\n", 0, k) + 1
        raise InputError(
            f"{given}: byte {offset + k} (line {line}) is {what}, which a CSV file never "
            "holds; the file is binary or damaged: check that it is the right file"
        )


def _read_csv(path: Path, given: str, fs: float | None, time_column: str | None = None,
              time_unit: str | None = None) -> Recording:
    """CSV/TSV reader: a header row, then one numeric row per sample.

    Two passes, so that the text and the table are never held together. The first
    checks that the file is text and finds the header, the last line and the number of
    lines; the second parses pieces of :data:`CSV_PIECE_BYTES` with ``np.loadtxt`` (its
    C parser) straight into the sample and time arrays, allocated once. Peak memory is
    the table plus one piece (a classic Mac OS file, lines ended by ``\\r`` alone, is
    one piece). Measured on a 2-core development machine for 1 h at 500 Hz x 8
    channels plus time (1.8 M rows, 149 MB) with the whole text in memory: 1.4-2.3 s
    plain, 2.8-3.3 s gzip-compressed; the first pass adds one more read (and
    decompression) of the file (``python -m bench.memory`` measures it). Only when
    loadtxt refuses a piece does a line-by-line pass parse it: it names the first bad
    line and column, and reads empty cells as NaN, the one thing it accepts that the
    fast path does not.
    """
    # Pass 1: text check; header (the first line that is neither empty nor a '#'
    # comment), where the body starts, how many lines it has and where its last line is.
    header_line, header_line_no, body_start = None, 0, 0
    newlines = 0  # line ends before the current piece
    last_start, last_line_no, last_line = -1, 0, b""
    for offset, piece in _csv_pieces(path, given):
        _check_text(piece, offset, newlines, given)
        pos = 0
        while header_line is None and pos < len(piece):
            end = piece.find(b"\n", pos)
            end = len(piece) if end < 0 else end
            line = piece[pos:end].decode("utf-8", "replace").strip()
            if line and not line.startswith("#"):
                header_line = line
                header_line_no = newlines + piece.count(b"\n", 0, pos) + 1
                body_start = offset + end + 1
            pos = end + 1
        content = len(piece.rstrip(b"\r\n \t"))
        if header_line is not None and content > max(0, body_start - offset):
            k = max(piece.rfind(b"\n", 0, content) + 1, body_start - offset)
            last_start, last_line = offset + k, piece[k:content]
            last_line_no = newlines + piece.count(b"\n", 0, k) + 1
        newlines += piece.count(b"\n")
    if header_line is None:
        raise InputError(
            f"{given}: file is empty; expected a header row with column names, then one "
            "row per sample"
        )
    delimiter = max(",;\t", key=header_line.count) if any(d in header_line for d in ",;\t") else ","
    names = [n.strip() for n in next(csv.reader([header_line], delimiter=delimiter))]
    if all(_is_number(n) for n in names):
        raise InputError(
            f"{given}: line {header_line_no} looks like data, not a header; add a header row "
            "with column names"
        )
    # Cells per row, and the columns read: a trailing delimiter on every line (some
    # exporters write one) makes a last column without a name, which is ignored.
    n_cells = len(names)
    while len(names) > 1 and names[-1] == "":
        names.pop()
    n_columns = len(names)
    names = [name or f"column{i + 1}" for i, name in enumerate(names)]

    # A recorder that was killed may leave a last line with fewer cells: drop it.
    body_end = math.inf
    text = last_line.decode("utf-8", "replace")
    if text and not text.lstrip().startswith("#"):
        n_last = len(next(csv.reader([text], delimiter=delimiter)))
        if n_last < n_cells:
            logger.warning(
                "%s: line %d has %d of %d cells (truncated last line); dropped it",
                given, last_line_no, n_last, n_cells,
            )
            body_end = last_start

    try:  # a wrong --time-column is reported after the emptiness of the body, as before
        time_index, time_error = _find_time_column(names, given, time_column), None
    except InputError as exc:
        time_index, time_error = None, exc
    channel_columns = [i for i in range(n_columns) if i != time_index]

    # Pass 2: parse the body piece by piece into arrays of (at most) its line count.
    capacity = max(newlines + 1 - header_line_no, 0)
    values = np.empty((capacity, len(channel_columns)))
    times = np.empty(capacity) if time_index is not None else None
    rows = 0
    newlines = 0
    for offset, piece in _csv_pieces(path, given):
        a = max(body_start - offset, 0)
        b = int(min(body_end - offset, len(piece)))
        if a < b:
            data = _parse_csv_piece(piece, a, b, given, names, n_cells, n_columns, delimiter,
                                    newlines + piece.count(b"\n", 0, a))
            values[rows:rows + len(data)] = data[:, channel_columns]
            if times is not None:
                times[rows:rows + len(data)] = data[:, time_index]
            rows += len(data)
        newlines += piece.count(b"\n")
        if offset + len(piece) >= body_end:
            break
    if rows == 0:
        raise InputError(f"{given}: no data rows after the header; the file holds no samples")
    if time_error is not None:
        raise time_error
    # Comment or empty lines in the body leave rows unused: shrink in place, no copy.
    values.resize((rows, len(channel_columns)), refcheck=False)
    if times is not None:
        times.resize(rows, refcheck=False)

    if time_index is None and time_unit is not None:
        raise InputError(
            f"{given}: --time-unit {time_unit} given, but no time column found (looked for a "
            f"column named {', '.join(TIME_COLUMN_NAMES)} or starting with 'time'); name it "
            "with --time-column NAME"
        )
    if time_index is None:
        if fs is None:
            raise InputError(
                f"{given}: no time column (looked for a column named "
                f"{', '.join(TIME_COLUMN_NAMES)} or starting with 'time') and no --fs given; "
                "add a time column or pass --fs HZ"
            )
        timestamps = np.arange(rows, dtype=np.float64) / fs
        nominal_fs = float(fs)
    else:
        timestamps, nominal_fs = _time_axis(times, names[time_index], given, fs, time_unit)
    if not channel_columns:
        raise InputError(f"{given}: only a time column, no signal columns; nothing to read")
    channels = tuple(ChannelInfo(names[i], None, _bracket_unit(names[i])) for i in channel_columns)
    info = SourceInfo(name=given, fs=nominal_fs, channels=channels, source_id=_source_id(path))
    return Recording(values, timestamps, info)


def _parse_csv_piece(piece: bytes, a: int, b: int, given: str, names: list[str],
                     n_cells: int, n_columns: int, delimiter: str,
                     lines_before: int) -> np.ndarray:
    """Rows of ``piece[a:b]`` (whole lines; ``lines_before`` lines of the file come
    before it), through ``np.loadtxt``, or line by line when it refuses them."""
    try:
        stream = io.BytesIO(piece if b == len(piece) else piece[:b])
        stream.seek(a)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # "input contained no data"
            data = np.loadtxt(stream, delimiter=delimiter, dtype=np.float64, ndmin=2,
                              comments="#", quotechar='"', encoding="utf-8",
                              usecols=range(n_columns) if n_cells > n_columns else None)
        if data.size and data.shape[1] != n_columns:
            raise ValueError("column count differs from the header")
        return data.reshape(-1, n_columns) if data.size == 0 else data
    except ValueError:
        return _parse_csv_slowly(piece[a:b], given, names, n_cells, delimiter, lines_before)


_CONTROL_BYTES = re.compile(rb"[\x00-\x08\x0e-\x1f]")
_TEXT_CHECK_BYTES = 1 << 16


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _parse_csv_slowly(body: bytes, given: str, names: list[str], n_cells: int,
                      delimiter: str, header_line_no: int) -> np.ndarray:
    """Line-by-line parse that names the first bad line and column; empty cells -> NaN.

    Rows must have ``n_cells`` cells; the first ``len(names)`` are read.
    """
    rows: list[list[float]] = []
    n_columns = len(names)
    text = body.decode("utf-8", "replace")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    for row in reader:
        line_no = header_line_no + reader.line_num
        if not row or (len(row) == 1 and not row[0].strip()):
            continue
        if row[0].lstrip().startswith("#"):
            continue
        if len(row) != n_cells:
            raise InputError(
                f"{given}: line {line_no} has {len(row)} cells but the header has {n_cells}; "
                "fix or remove that line"
            )
        values = []
        for column, cell in enumerate(row[:n_columns]):
            cell = cell.strip()
            if not cell:
                values.append(math.nan)
                continue
            try:
                values.append(float(cell))
            except ValueError:
                raise InputError(
                    f"{given}: line {line_no}, column {column + 1} ({names[column]!r}): "
                    f"{cell[:40]!r} is not a number; fix the cell or leave it empty (read as "
                    "missing)"
                ) from None
        rows.append(values)
    if not rows:
        return np.empty((0, n_columns), dtype=np.float64)
    return np.asarray(rows, dtype=np.float64)


def split_time_unit(name: str) -> tuple[str, str]:
    """A column name without its unit, and the unit as written: ``"time [ms]"`` ->
    ``("time", "ms")``, ``"timestamp_us"`` -> ``("timestamp", "us")``, ``"t (s)"`` ->
    ``("t", "s")``, ``"time"`` -> ``("time", "")``. A unit in brackets is returned
    whatever it is; one after a separator only when it is a time unit (so
    ``time_of_day`` keeps its name)."""
    text = name.strip()
    m = _UNIT_RE.search(text)
    if m:
        return text[: m.start()].strip(), m.group(1)
    m = _SUFFIX_UNIT_RE.fullmatch(text)
    if m and m.group(2).casefold() in _TIME_UNIT_SPELLINGS:
        return m.group(1), m.group(2)
    return text, ""


def _find_time_column(names: list[str], given: str, time_column: str | None) -> int | None:
    if time_column is not None:
        if time_column in names:
            return names.index(time_column)
        folded = [n.casefold() for n in names]
        if time_column.casefold() in folded:
            return folded.index(time_column.casefold())
        raise InputError(f"{given}: --time-column {time_column!r}: no such column; columns "
                         f"are: {', '.join(names)}")
    for i, name in enumerate(names):
        key = split_time_unit(name)[0].replace(" ", "").casefold()
        if key in TIME_COLUMN_NAMES or key.startswith("time"):
            return i
    return None


def _bracket_unit(name: str) -> str:
    m = _UNIT_RE.search(name)
    return m.group(1) if m else ""


def _time_axis(column: np.ndarray, name: str, given: str, fs: float | None,
               time_unit: str | None = None) -> tuple[np.ndarray, float]:
    """Timestamps in seconds from a time column, and the nominal rate."""
    written = split_time_unit(name)[1]
    if written and written.casefold() not in _TIME_UNIT_SPELLINGS:
        raise InputError(
            f"{given}: time column {name!r} has unit {written!r}; use s, ms, us or ns (in its "
            "name or with --time-unit), or drop the time column and pass --fs HZ"
        )
    named = _TIME_UNIT_SPELLINGS.get(written.casefold(), "")
    if time_unit is not None and named and named != time_unit:
        logger.warning("%s: time column %r says %s; reading it in %s as --time-unit says",
                       given, name, named, time_unit)
    unit = time_unit or named
    timestamps = column * TIME_UNITS[unit or "s"]
    bad = ~np.isfinite(timestamps)
    if bad.any():
        row = int(np.argmax(bad))
        raise InputError(
            f"{given}: time column {name!r} has no valid time in data row {row + 1}; every "
            "row needs a time"
        )
    steps = np.diff(timestamps)
    if (steps < 0).any():
        row = int(np.argmax(steps < 0)) + 1
        raise InputError(
            f"{given}: time column {name!r} goes backwards at data row {row + 1} "
            f"({float(column[row - 1])!r} then {float(column[row])!r}); sort the rows"
        )
    if len(steps) == 0:
        if fs is None:
            raise InputError(
                f"{given}: only one row; cannot infer the sampling rate; pass --fs HZ"
            )
        return timestamps, float(fs)
    file_fs = _rate_from_times(timestamps)
    if not math.isfinite(file_fs):
        which = (f"every row holds {float(column[0])!r}" if timestamps[-1] == timestamps[0]
                 else "most rows repeat the time before them")
        raise InputError(
            f"{given}: time column {name!r} does not increase ({which}); fix the time "
            "column, or drop it and pass --fs HZ"
        )
    as_read = f"in {unit}" if unit else "read as seconds"
    if fs is not None and abs(file_fs - fs) > 0.01 * fs:
        other = _other_unit(file_fs, unit, lambda rate: abs(rate - fs) <= 0.01 * fs)
        raise InputError(
            f"{given}: --fs {fs:g} Hz contradicts time column {name!r}, which gives "
            f"{file_fs:.6g} Hz {as_read}; "
            + (f"if its times are in {other}, pass --time-unit {other}" if other else
               "drop --fs, or fix the time column")
        )
    low = FS_RANGE_HZ[0] if unit else IMPLICIT_SECONDS_MIN_HZ
    if fs is None and not low <= file_fs <= FS_RANGE_HZ[1]:
        other = _other_unit(file_fs, unit,
                            lambda rate: IMPLICIT_SECONDS_MIN_HZ <= rate <= FS_RANGE_HZ[1])
        where = (f"has no unit, and read as seconds it gives {file_fs:.6g} Hz"
                 if not unit else f"in {unit} gives {file_fs:.6g} Hz")
        if other:
            fix = f"if its times are in {other}, pass --time-unit {other}"
            fix += f" or name the column time_{other}" if not unit else ""
        else:
            fix = "give its unit with --time-unit s|ms|us|ns"
        raise InputError(f"{given}: time column {name!r} {where}, outside "
                         f"{low:g}-{FS_RANGE_HZ[1]:g} Hz; {fix}")
    nominal_fs = float(fs) if fs is not None else file_fs
    if (steps == 0).any():
        # Times written with too few digits repeat (e.g. 100.02, 100.02 at 125 Hz). When
        # the column is a regular grid to within one sample period, that grid is what
        # was meant; anything else is ambiguous and refused.
        grid = timestamps[0] + np.arange(len(timestamps)) / nominal_fs
        worst = float(np.max(np.abs(timestamps - grid)))
        if worst > 1.0 / nominal_fs:
            row = int(np.argmax(steps == 0)) + 1
            raise InputError(
                f"{given}: time column {name!r} repeats the time {float(timestamps[row])!r} at "
                f"data row {row + 1} and is not a regular {nominal_fs:.6g} Hz grid; fix the "
                "time column, or drop it and pass --fs HZ"
            )
        logger.warning(
            "%s: time column %r repeats times (written with too few digits); using a regular "
            "%.6g Hz grid from its first time (at most %.3g s from the written times)",
            given, name, nominal_fs, worst,
        )
        timestamps = grid
    return timestamps, nominal_fs


def _other_unit(rate: float, unit: str, fits) -> str:
    """The first time unit other than ``unit`` (empty: seconds) under which a column
    that gives ``rate`` would give a rate for which ``fits(rate)`` holds, or ""."""
    for other, size in TIME_UNITS.items():
        if other != (unit or "s") and fits(rate * TIME_UNITS[unit or "s"] / size):
            return other
    return ""


def _rate_from_times(timestamps: np.ndarray, stride: int = 100) -> float:
    """Sampling rate from a time axis: ``stride / median(t[k + stride] - t[k])``.

    For a regular axis this equals ``1 / median(diff(t))``. Differencing over a stride
    of samples divides the error of times written with few digits by the stride (at
    125 Hz written to 0.01 s the one-sample median step is 0.01 s, i.e. 100 Hz), and
    the median still ignores the few strides that span a gap.
    """
    stride = max(1, min(stride, len(timestamps) - 1))
    span = float(np.median(timestamps[stride:] - timestamps[:-stride]))
    if not span > 0:
        return math.inf  # most strides repeat a time: no rate
    rate = stride / span
    # Times written in decimal carry rounding noise (124.99999999999933 Hz); a rate
    # within a millionth of a whole number of hertz is that number.
    nearest = round(rate)
    return float(nearest) if nearest > 0 and abs(rate - nearest) <= 1e-6 * rate else rate


# ---------------------------------------------------------------------------- WFDB


def _read_wfdb(path: Path, given: str, annotators: Sequence[str] | None,
               channels: Sequence[str | int] | str | None) -> Recording:
    """A WFDB record via :mod:`~streamer.sources.wfdb_reader`, only the selected signals.

    Signals keep their own rates while read. The selected ones are then put on the grid
    of the fastest selected signal (:func:`wfdb_reader.on_fastest_grid`): in a WFDB
    record the frames align the signals exactly, so sample ``k`` of a signal at
    ``fs_j`` Hz sits at ``k / fs_j`` s and the slower signals are interpolated linearly
    over those times (NaN past their last sample), with a warning naming them. Annotation
    sample numbers count frames unless the file states its own time resolution.
    """
    header = wfdb_reader.read_header(path)
    names = [s.description for s in header.signals]
    picked = _channel_indices(given, names, channels)
    values = wfdb_reader.read_signals(header, given)
    rates = header.signal_rates
    samples, timestamps, fs = wfdb_reader.on_fastest_grid([values[i] for i in picked],
                                                          [rates[i] for i in picked])
    slower = [f"{names[i]} ({rates[i]:g} Hz)" for i in picked if rates[i] != fs]
    if slower:
        logger.warning(
            "%s: resampled %s to %g Hz by linear interpolation; select signals of one rate "
            "to avoid it", given, ", ".join(slower), fs,
        )
    channels_info = tuple(ChannelInfo(header.signals[i].description, None,
                                      header.signals[i].units) for i in picked)
    info = SourceInfo(name=given, fs=fs, channels=channels_info, source_id=_source_id(path))

    record = path.with_suffix("")
    if annotators is None:
        annotators = [a for a in ("atr",) if record.with_name(record.name + ".atr").is_file()]
    events = {}
    for annotator in annotators:
        ann_path = record.with_name(f"{record.name}.{annotator}")
        if not ann_path.is_file():
            raise InputError(
                f"{given}: annotation file {ann_path} not found; check the annotator name "
                f"'{annotator}'"
            )
        events[annotator] = wfdb_reader.read_annotations(ann_path, header.fs).beat_times_s()
    return Recording(samples, timestamps, info, events)


# ---------------------------------------------------------------------------- EDF


def _read_edf(path: Path, given: str, channels: Sequence[str | int] | str | None) -> Recording:
    """EDF/EDF+/BDF via pyedflib, only the selected channels, and the EDF+ annotations.

    Selected channels at different rates are put on the grid of the highest of their
    rates by :func:`~streamer.sources.merge.merge_batch` (linear interpolation, NaN past
    a slower channel's last sample), with a warning naming them; select channels of one
    rate to avoid it.
    """
    import pyedflib

    _check_edf_size(path, given)
    try:
        reader = pyedflib.EdfReader(str(path))
    except OSError as exc:
        raise InputError(
            f"{given}: not a readable EDF/BDF file ({exc}); check that it is EDF(+) or BDF(+)"
        ) from None
    try:
        if reader.signals_in_file == 0:
            raise InputError(f"{given}: EDF file holds no signals; nothing to read")
        all_labels = [label.strip() for label in reader.getSignalLabels()]
        picked = _channel_indices(given, all_labels, channels)
        labels = [all_labels[i] for i in picked]
        rates = [float(reader.getSampleFrequency(i)) for i in picked]
        units = [reader.getPhysicalDimension(i).strip() for i in picked]
        signals = [np.asarray(reader.readSignal(i), dtype=np.float64) for i in picked]
        markers = _edf_markers(reader, given)
    finally:
        reader.close()

    channel_infos = tuple(ChannelInfo(label, None, unit) for label, unit in zip(labels, units))
    fs = max(rates)
    if all(rate == fs and len(signal) == len(signals[0])
           for signal, rate in zip(signals, rates)):
        samples = np.column_stack(signals)
        timestamps = np.arange(len(signals[0]), dtype=np.float64) / fs
    else:
        # Each signal is its own stream on its own time axis; merge_batch puts them on
        # the grid of the fastest, as it does for XDF streams and LSL inlets.
        parts = [(SourceInfo(f"signal {i}", rate, (info,)), signal[:, None],
                  np.arange(len(signal), dtype=np.float64) / rate)
                 for i, (info, signal, rate) in enumerate(zip(channel_infos, signals, rates))]
        _, samples, timestamps = merge_batch(parts)
        slower = [f"{label} ({rate:g} Hz)" for label, rate in zip(labels, rates) if rate != fs]
        logger.warning(
            "%s: resampled %s to %g Hz by linear interpolation; select channels of one rate "
            "to avoid it", given, ", ".join(slower), fs,
        )
    info = SourceInfo(name=given, fs=fs, channels=channel_infos, source_id=_source_id(path))
    return Recording(np.ascontiguousarray(samples), timestamps, info, markers=markers)


def _edf_markers(reader, given: str) -> tuple[Marker, ...]:
    """EDF+ annotations as markers at their onsets (seconds from the file's start),
    text unchanged, source ``"annotations"``. An annotation whose text is empty or
    blank (a bare duration, or an EDF+ time-keeping entry) says nothing and is skipped;
    durations are not kept. A plain EDF has none."""
    try:
        onsets, _, texts = reader.readAnnotations()
    except Exception as exc:  # pyedflib raises several kinds on a damaged annotation signal
        logger.warning("%s: EDF+ annotations could not be read (%s); reading the signals "
                       "without them", given, exc)
        return ()
    markers = [Marker(float(onset), str(text), "annotations")
               for onset, text in zip(onsets, texts) if str(text).strip()]
    return tuple(sorted(markers, key=lambda m: m.time_s))


def _check_edf_size(path: Path, given: str) -> None:
    """Refuse a truncated EDF/BDF with a message saying so (pyedflib's is cryptic)."""
    try:
        with open(path, "rb") as f:
            head = f.read(256)
            if len(head) < 256:
                raise InputError(f"{given}: too short for an EDF/BDF header; not an EDF file")
            header_bytes = int(head[184:192].decode("ascii").strip())
            n_records = int(head[236:244].decode("ascii").strip())
            n_signals = int(head[252:256].decode("ascii").strip())
            f.seek(256 + n_signals * 216)
            per_record = f.read(n_signals * 8).decode("ascii")
            samples_per_record = [int(per_record[8 * i: 8 * i + 8].strip())
                                  for i in range(n_signals)]
    except (ValueError, UnicodeDecodeError):
        raise InputError(
            f"{given}: malformed EDF/BDF header; not an EDF(+) or BDF(+) file"
        ) from None
    bytes_per_sample = 3 if head[:1] == b"\xff" else 2
    if n_records < 0:  # "-1": recording still in progress; let pyedflib decide
        return
    expected = header_bytes + n_records * sum(samples_per_record) * bytes_per_sample
    actual = path.stat().st_size
    if actual < expected:
        raise InputError(
            f"{given}: EDF file is truncated ({actual} of {expected} bytes that its header "
            f"declares for {n_records} data records); repair the file or record again"
        )


# ---------------------------------------------------------------------------- XDF


class _CollectLogs(logging.Handler):
    """Keeps the first line of each warning or error a library logs."""

    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.errors: list[str] = []
        self.warnings: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        message = record.getMessage()
        first_line = message.splitlines()[0] if message else ""
        (self.errors if record.levelno >= logging.ERROR else self.warnings).append(first_line)


def _read_xdf(path: Path, given: str, streams: Sequence[str] | None) -> Recording:
    """XDF via pyxdf: the chosen numeric streams on one time grid, and every text
    stream's samples as markers.

    Timestamps are the file's with each stream's clock offsets applied (pyxdf's linear
    fit per stream) and no dejittering: the same stamps a live LSL inlet delivers.
    Several numeric streams are put on the grid of the fastest by
    :func:`~streamer.sources.merge.merge_recordings`; one stream keeps its own stamps.
    """
    import pyxdf

    try:
        raw = path.read_bytes()
        if path.name.lower().endswith((".xdfz", ".gz")):
            raw = gzip.decompress(raw)
    except EOFError:
        raise InputError(f"{given}: the compressed file is truncated; cannot read it") from None
    except (OSError, gzip.BadGzipFile) as exc:
        raise InputError(f"{given}: cannot read: {getattr(exc, 'strerror', None) or exc}") from None
    if not raw.startswith(b"XDF:"):
        raise InputError(f"{given}: cannot read as XDF (no 'XDF:' magic at the start); "
                         "the file is not XDF")
    complete, reason = _complete_xdf_chunks(raw)
    if complete < len(raw):
        # pyxdf does not notice a file that ends inside the values of a sample: it fills
        # that sample with stale bytes. Hand it only the chunks that are whole.
        logger.warning(
            "%s: XDF file %s at byte %d of %d (truncated?); reading the chunks before it",
            given, reason, complete, len(raw),
        )
        raw = raw[:complete]

    # pyxdf reports damage through its logger, tracebacks included; collect it instead.
    pyxdf_logger = logging.getLogger("pyxdf")
    collector = _CollectLogs()
    saved_propagate = pyxdf_logger.propagate
    pyxdf_logger.addHandler(collector)
    pyxdf_logger.propagate = False
    try:
        loaded, _ = pyxdf.load_xdf(io.BytesIO(raw), dejitter_timestamps=False)
    except Exception as exc:  # pyxdf raises bare Exception/OSError/struct.error on damage
        raise InputError(
            f"{given}: cannot read as XDF ({type(exc).__name__}: {exc}); the file may be "
            "truncated or not XDF"
        ) from None
    finally:
        pyxdf_logger.removeHandler(collector)
        pyxdf_logger.propagate = saved_propagate

    chosen = _choose_xdf_streams(loaded, given, streams)
    # pyxdf logs errors for damage it skipped, and warnings for its own timing
    # heuristics, e.g. "Segments and clock-segments differ" for every stream whenever
    # dejittering is off: those are only kept at debug level.
    for s in chosen:
        if collector.errors or "footer" not in s:
            logger.warning(
                "%s: XDF file looks truncated or damaged (%s); using the %d samples of "
                "stream %r that could be read", given,
                collector.errors[0] if collector.errors else "no stream footer",
                len(s["time_stamps"]), _info(s, "name"),
            )
    for message in collector.warnings:
        logger.debug("%s: pyxdf: %s", given, message)

    parts = [_xdf_stream_recording(s, given) for s in chosen]
    markers = tuple(sorted((m for s in loaded if not _is_numeric(s)
                            for m in _xdf_markers(s)), key=lambda m: m.time_s))
    if len(parts) == 1:
        one = parts[0]
        info = SourceInfo(given, one.info.fs, one.info.channels, _source_id(path))
        return Recording(one.samples, one.timestamps, info, markers=markers)
    merged = merge_recordings(parts, name=given)
    info = SourceInfo(given, merged.info.fs, merged.info.channels, _source_id(path))
    return Recording(merged.samples, merged.timestamps, info, markers=markers)


def _choose_xdf_streams(loaded: list, given: str, streams: Sequence[str] | None) -> list:
    """The numeric streams to read: those named (in the order named; every stream of a
    name), else every numeric stream with samples and a nominal rate (an irregular
    one, e.g. event codes sent as numbers, would set the grid by its median step: it is
    left out with a warning unless it is all there is)."""
    described = "; ".join(_describe_stream(s) for s in loaded) or "none"
    if streams:
        chosen = []
        for name in dict.fromkeys(streams):  # a name given twice counts once
            matches = [s for s in loaded if _info(s, "name") == name]
            if not matches:
                raise InputError(f"{given}: no stream named {name!r}; streams are: {described}")
            numeric = [s for s in matches if _is_numeric(s) and len(s["time_stamps"]) > 0]
            if not numeric:
                kind = ("text markers, which are always read"
                        if not any(_is_numeric(s) for s in matches) else "no samples")
                numbers = "; ".join(_describe_stream(s) for s in loaded
                                    if _is_numeric(s) and len(s["time_stamps"]) > 0)
                raise InputError(
                    f"{given}: stream {name!r} holds no numeric samples ({kind}); --stream "
                    f"chooses among the numeric streams: {numbers or 'none'}"
                )
            chosen += numeric
        return chosen
    with_samples = []
    for s in loaded:
        if not _is_numeric(s):
            continue
        if len(s["time_stamps"]) == 0:
            logger.warning("%s: stream %r has no samples; left out", given, _info(s, "name"))
        else:
            with_samples.append(s)
    if not with_samples:
        raise InputError(f"{given}: no stream with numeric samples; streams are: {described}")
    regular = [s for s in with_samples if _nominal_rate(s) > 0]
    if not regular:
        return with_samples
    for s in with_samples:
        if _nominal_rate(s) <= 0:
            logger.warning(
                "%s: stream %r has no nominal rate (irregular samples); left out, name it "
                "with --stream to read it", given, _info(s, "name"))
    return regular


def _nominal_rate(stream: dict) -> float:
    try:
        value = float(_info(stream, "nominal_srate") or 0.0)
    except ValueError:
        return 0.0
    return value if math.isfinite(value) else 0.0


def _xdf_stream_recording(stream: dict, given: str) -> Recording:
    """One numeric stream as a recording named after the stream (its own stamps)."""
    name = _info(stream, "name")
    samples = np.ascontiguousarray(np.asarray(stream["time_series"], dtype=np.float64))
    timestamps = np.asarray(stream["time_stamps"], dtype=np.float64)
    if np.any(np.diff(timestamps) < 0):
        logger.warning("%s: stream %r has timestamps that go backwards", given, name)
    fs = _nominal_rate(stream)
    if fs <= 0:
        steps = np.diff(timestamps)
        steps = steps[steps > 0]
        if len(steps) == 0:
            raise InputError(
                f"{given}: stream {name!r} has an irregular rate and too few samples to "
                "estimate one; nothing to replay"
            )
        fs = 1.0 / float(np.median(steps))
    channels = _xdf_channels(stream, samples.shape[1])
    return Recording(samples, timestamps, SourceInfo(name, fs, channels))


def _xdf_markers(stream: dict) -> list[Marker]:
    """A text stream's samples as markers at their (clock-corrected) stamps, text
    unchanged. Source: the stream's name, or ``STREAM/LABEL`` per channel when it has
    several. Empty or all-blank values (a channel with nothing to say) are skipped."""
    name = _info(stream, "name")
    values = stream["time_series"]
    stamps = np.asarray(stream["time_stamps"], dtype=np.float64)
    n_channels = len(values[0]) if len(values) else 0
    sources = ([name] if n_channels == 1 else
               [f"{name}/{c.name}" for c in _xdf_channels(stream, n_channels)])
    markers = []
    for time_s, row in zip(stamps, values):
        for source, text in zip(sources, row):
            if isinstance(text, str) and text.strip():
                markers.append(Marker(float(time_s), text, source))
    return markers


def _complete_xdf_chunks(raw: bytes) -> tuple[int, str]:
    """End of the last whole chunk, and why reading stops there.

    XDF chunks are ``[NumLengthBytes: 1, 4 or 8][Length][Tag][Content]`` with
    ``Length`` counting tag and content (XDF 1.0 specification, from memory).
    """
    pos = 4  # after the magic
    while pos < len(raw):
        n_bytes = raw[pos]
        if n_bytes not in (1, 4, 8):
            return pos, "has a malformed chunk"
        if pos + 1 + n_bytes > len(raw):
            return pos, "ends inside a chunk"
        length = int.from_bytes(raw[pos + 1: pos + 1 + n_bytes], "little")
        end = pos + 1 + n_bytes + length
        if end > len(raw):
            return pos, "ends inside a chunk"
        pos = end
    return pos, ""


def _info(stream: dict, key: str) -> str:
    value = stream["info"].get(key)
    if isinstance(value, list):
        value = value[0] if value else None
    return value if isinstance(value, str) else ""


def _is_numeric(stream: dict) -> bool:
    return _info(stream, "channel_format") != "string" and isinstance(stream["time_series"],
                                                                      np.ndarray)


def _describe_stream(stream: dict) -> str:
    n = len(stream["time_stamps"])
    return (f"{_info(stream, 'name')} (type {_info(stream, 'type') or '?'}, "
            f"{_info(stream, 'channel_count')} x {_info(stream, 'channel_format')}, {n} samples)")


def _xdf_channels(stream: dict, n_channels: int) -> tuple[ChannelInfo, ...]:
    """Labels, kinds and units from ``desc/channels/channel`` (XDF channel metadata
    conventions); ``ch0``, ``ch1``, ... where a label is missing."""
    entries: list = []
    try:
        desc = stream["info"]["desc"][0]
        entries = desc["channels"][0]["channel"]
    except (KeyError, IndexError, TypeError):
        entries = []
    stream_kind = _kind(_info(stream, "type"))

    def field(entry, key: str) -> str:
        try:
            value = entry.get(key)
            value = value[0] if isinstance(value, list) else value
        except AttributeError:
            return ""
        return value.strip() if isinstance(value, str) else ""

    channels = []
    for i in range(n_channels):
        entry = entries[i] if i < len(entries) else {}
        label = field(entry, "label") or f"ch{i}"
        kind = _kind(field(entry, "type")) or stream_kind
        channels.append(ChannelInfo(label, kind, field(entry, "unit")))
    return tuple(channels)


def _kind(text: str) -> str | None:
    text = (text or "").strip().casefold()
    return text if text in KINDS else None
