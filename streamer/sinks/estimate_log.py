"""The estimate log: a CSV that other tools and reports read.

Format
------
1. A header block of lines starting with ``#``::

       # ridgewatch estimate log
       # version: 0.1.0
       # mode: live            (live | replay | offline)
       # started: 2026-05-04T09:30:12.345+00:00     (wall clock at the start, UTC, ISO 8601)
       # source: <file path or stream name>
       # channels: {"PLETH": "ppg", ...}            (JSON)
       # config: {...}                               (JSON, the full configuration)

   A value that holds a double quote or a character that is not printable (a line
   break, a tab) is written as a JSON string (it then starts with ``"``), so every
   header value is one line, whatever a stream or file is called.

2. One header row with :data:`COLUMNS`, then one row per estimate, written with the
   :mod:`csv` module (cells quoted where needed, ``\n`` line ends): a channel called
   ``PPG, left`` or ``"finger"`` reads back as itself. Each row is flushed (and
   ``os.fsync``-ed every ``sync_every_s`` seconds) as it is written, so a Ctrl-C,
   SIGTERM or a crash of the display never loses a row already written; an interrupted
   log is a valid prefix of the full one.

3. Status lines between rows: ``# event <time_s> <kind>: <message>`` (the message
   escaped like a header value), and marker lines ``# marker <time_s> <source>: <text>``
   (source and text escaped the same way; a source holding ``: `` is written as a JSON
   string) for every text marker of the session (:class:`streamer.sources.base.Marker`).

Read it with :func:`read_log`, or with Python's csv module: ``[r for r in
csv.reader(f) if r and not r[0].startswith("#")]`` gives the header row and the rows.

Times are seconds on the source's stream clock. ``rate_per_min`` is empty when there is
no estimate; it keeps the engine's rate even when the displays withhold it. ``display``
(the last column) is what the displays did with the estimate: ``show``, ``grey`` or
``withhold`` (:mod:`estimators.display_rule`). Logs written before that column existed
are still read (:data:`COLUMNS_BEFORE_DISPLAY`); their ``display`` cells read as empty.
``rate_now_per_min`` and ``now_confidence`` (after ``display``) are the rate at
``emitted_s`` and its confidence (:mod:`estimators.rate_now`); logs written before
them (:data:`COLUMNS_BEFORE_NOW`) read them as NaN.

A log never replaces data by accident (see :class:`EstimateLog`): it is created
exclusively, is never one of the run's input files, and replaces an existing file only
when asked to, and only a file that is itself an estimate log.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import stat
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterable

import numpy as np

from estimators.estimate import Estimate
from streamer import __version__
from streamer.errors import InputError

MAGIC = "# ridgewatch estimate log"
"""The first line of every estimate log; it is how a file is recognised as one."""

COLUMNS = (
    "emitted_s",
    "time_s",
    "quantity",
    "source",
    "rate_per_min",
    "confidence",
    "quality",
    "delay_s",
    "compute_ms",
    "display",
    "rate_now_per_min",
    "now_confidence",
)
COLUMNS_BEFORE_NOW = COLUMNS[:COLUMNS.index("rate_now_per_min")]
"""The header row of logs written before the rate-now columns (still read)."""
COLUMNS_BEFORE_DISPLAY = COLUMNS[:COLUMNS.index("display")]
"""The header row of logs written before the ``display`` column (still read)."""
TEXT_COLUMNS = ("quantity", "source", "display")


def _fmt(value: float, digits: int) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return f"{value:.{digits}f}"


def format_row(estimate: Estimate, compute_ms: float) -> str:
    """One CSV line (with newline) for an estimate; the source cell is quoted by the
    csv module when the name holds a comma, a quote or a line break."""
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerow((
        _fmt(estimate.emitted_s, 4),
        _fmt(estimate.time_s, 4),
        estimate.quantity,
        estimate.source,
        _fmt(estimate.rate_per_min, 3),
        _fmt(estimate.confidence, 4),
        _fmt(estimate.quality, 4),
        _fmt(estimate.delay_s, 4),
        _fmt(compute_ms, 4),
        estimate.display,
        _fmt(estimate.rate_now_per_min, 3),
        _fmt(estimate.now_confidence, 4),
    ))
    return buffer.getvalue()


def one_line(text: str) -> str:
    """``text`` as it is when it is printable and holds no double quote, else as a JSON
    string: header values and event messages stay on their line, and a CSV reader never
    sees a quote opening a cell in a ``#`` line. :func:`read_log` undoes it."""
    text = str(text)
    if text.isprintable() and '"' not in text and text == text.strip():
        return text
    return json.dumps(text)


def format_marker(marker) -> str:
    """The log line of a marker. The source is written as a JSON string when it holds
    ``": "`` (where the text begins), so any source and text read back as themselves.

    >>> from streamer.sources.base import Marker
    >>> print(format_marker(Marker(12.5, 'stage 2, "fast"', "lab-markers")), end="")
    # marker 12.5000 lab-markers: "stage 2, \\"fast\\""
    """
    source = one_line(marker.source)
    if ": " in source and not source.startswith('"'):
        source = json.dumps(str(marker.source))
    return f"# marker {_fmt(marker.time_s, 4) or 'nan'} {source}: {one_line(marker.text)}\n"


def parse_marker(line: str):
    """The :class:`~streamer.sources.base.Marker` of a log line, or None when the line
    is not a well-formed marker line.

    >>> parse_marker(format_marker(parse_marker('# marker 3 user: warm-up ends')))
    Marker(time_s=3.0, text='warm-up ends', source='user')
    """
    from streamer.sources.base import Marker

    if not line.startswith("# marker "):
        return None
    body = line[len("# marker "):].rstrip("\n")
    time_text, _, rest = body.partition(" ")
    if rest.startswith('"'):
        try:
            source, end = json.JSONDecoder().raw_decode(rest)
        except json.JSONDecodeError:
            return None
        rest = rest[end:]
        if not rest.startswith(": "):
            return None
        text = rest[2:]
    else:
        source, sep, text = rest.partition(": ")
        if not sep:
            return None
    try:
        time_s = float(time_text)
    except ValueError:
        return None
    return Marker(time_s, _from_one_line(text), _from_one_line(str(source)))


def _from_one_line(value: str) -> str:
    if value.startswith('"'):
        try:
            decoded = json.loads(value)
        except json.JSONDecodeError:
            return value
        return decoded if isinstance(decoded, str) else value
    return value


class TableFile:
    """A CSV written like the estimate log: a ``#`` header block (``kind.magic``,
    version, mode, start time, source, channels, configuration), a header row of
    ``columns``, then rows and ``#`` status lines, each flushed as it is written (and
    ``os.fsync``-ed every ``sync_every_s``), claimed as :func:`_claim` describes. The
    estimate log, the beats file and the HRV file are table files
    (:class:`EstimateLog`, :mod:`streamer.sinks.beats_log`)."""

    def __init__(self, path, kind: "FileKind", columns: tuple, mode: str, source: str,
                 channels: dict, config: dict, sync_every_s: float = 1.0, *,
                 if_exists: str = "refuse", inputs: Iterable = (),
                 started: datetime | None = None):
        if if_exists not in ("refuse", "overwrite", "number"):
            raise ValueError(f"{if_exists=} must be 'refuse', 'overwrite' or 'number'")
        self.path, self.kind = Path(path), kind
        try:
            if self.path.parent and not self.path.parent.exists():
                self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(f"cannot write the {kind.noun} {self.path}: {exc.strerror}") \
                from None
        fd = _claim(self, if_exists, [Path(p) for p in inputs], kind)
        try:
            self._file = open(fd, "w", encoding="utf-8", newline="")
        except BaseException:
            os.close(fd)
            raise
        self._sync_every_s = sync_every_s
        self._last_sync = time.monotonic()
        self.rows_written = 0
        started = started or datetime.now(timezone.utc)
        header = [
            kind.magic,
            f"# version: {__version__}",
            f"# mode: {one_line(mode)}",
            f"# started: {started.astimezone(timezone.utc).isoformat(timespec='milliseconds')}",
            f"# source: {one_line(source)}",
            f"# channels: {json.dumps(channels)}",
            f"# config: {json.dumps(config, sort_keys=True)}",
            ",".join(columns),
        ]
        self._write("\n".join(header) + "\n")

    def _write(self, text: str) -> None:
        try:
            self._file.write(text)
            self._file.flush()
            now = time.monotonic()
            if now - self._last_sync >= self._sync_every_s:
                os.fsync(self._file.fileno())
                self._last_sync = now
        except OSError as exc:
            raise InputError(
                f"writing the {self.kind.noun} {self.path} failed ({exc.strerror}); "
                f"the {self.rows_written} rows written before are complete"
            ) from None

    def write_cells(self, cells: tuple) -> None:
        """One row of cells, written by the csv module."""
        buffer = io.StringIO()
        csv.writer(buffer, lineterminator="\n").writerow(cells)
        self._write(buffer.getvalue())
        self.rows_written += 1

    def write_event(self, kind: str, message: str, time_s: float = float("nan")) -> None:
        """A status line in the body (``# event ...``), e.g. a stream lost or resumed;
        readers skip it like any ``#`` line."""
        self._write(f"# event {_fmt(time_s, 4) or 'nan'} {one_line(kind)}: {one_line(message)}\n")

    def close(self) -> None:
        if self._file.closed:
            return
        try:
            self._file.flush()
            os.fsync(self._file.fileno())
        except OSError:
            pass
        try:
            self._file.close()
        except OSError:
            # Every line is flushed as it is written, so only text whose failed write
            # was already reported (e.g. a full disk) can still be pending here;
            # raising again would only repeat that error.
            pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class EstimateLog(TableFile):
    """Writes the estimate log, one flushed line per estimate.

    Parameters
    ----------
    path : where to write; parent folders are created.
    mode : ``"live"``, ``"replay"`` or ``"offline"``.
    source : file path or stream name, for the header.
    channels : mapping channel name -> kind, for the header.
    config : the full configuration as a JSON-serialisable dict.
    sync_every_s : seconds between ``os.fsync`` calls (every line is flushed regardless).
    if_exists : what to do when ``path`` exists: ``"refuse"`` (an error), ``"overwrite"``
        (replace it, but only if it is an estimate log, recognised by :data:`MAGIC`, or
        empty) or ``"number"`` (write ``<stem>-2.csv``, ``<stem>-3.csv``, ... instead;
        for default names). A device or pipe (``/dev/stdout``) is written as it is.
    inputs : files the run reads; the log refuses to be any of them (same file by
        device and inode, so links and other spellings of a path count).
    started : the run's wall-clock start (default: now), written to the header in UTC.

    Raises
    ------
    InputError
        One line naming the path: it exists, it is an input, another run is writing it,
        or it cannot be created.

    Notes
    -----
    The file is created with ``O_CREAT | O_EXCL``, so of two runs that start at once on
    one path exactly one gets it; the other is refused. The file also carries an
    advisory ``flock`` lock for the whole run, which is what keeps an
    ``if_exists="overwrite"`` run (which opens an existing file) from touching a log
    another run is writing.
    """

    def __init__(self, path, mode: str, source: str, channels: dict, config: dict,
                 sync_every_s: float = 1.0, *, if_exists: str = "refuse",
                 inputs: Iterable = (), started: datetime | None = None):
        super().__init__(path, ESTIMATE_LOG, COLUMNS, mode, source, channels, config,
                         sync_every_s, if_exists=if_exists, inputs=inputs, started=started)

    def write(self, estimate: Estimate, compute_ms: float = float("nan")) -> None:
        self._write(format_row(estimate, compute_ms))
        self.rows_written += 1

    def write_marker(self, marker) -> None:
        """A marker line in the body (``# marker <time_s> <source>: <text>``) for a
        :class:`streamer.sources.base.Marker`; :func:`read_log` gives them back in
        :attr:`LogTable.markers`."""
        self._write(format_marker(marker))


def write_offline_rows(log: EstimateLog, estimates, markers, compute_ms: float,
                       events=()) -> None:
    """The offline twin's rows (in ``time_s`` order) with a recording's markers and
    events (``SourceEvent``, e.g. the gaps where the twin restarts) among them: a marker
    or event at ``t`` after every row with ``time_s <= t``, markers without a time last.
    Offline rows describe their window centre (the twin sees the whole record), so that
    is what a marker is placed by; live and replay rows are placed by ``emitted_s``
    (:class:`streamer.runner.MarkerQueue`)."""
    timed = sorted([(m.time_s, 0, i, m) for i, m in enumerate(markers)
                    if not math.isnan(m.time_s)]
                   + [(e.time_s, 1, i, e) for i, e in enumerate(events)])
    rest = [m for m in markers if math.isnan(m.time_s)]

    def put(item) -> None:
        _, is_event, _, what = item
        if is_event:
            log.write_event(what.kind, what.message, what.time_s)
        else:
            log.write_marker(what)

    m = 0
    for est in estimates:
        while m < len(timed) and timed[m][0] < est.time_s:
            put(timed[m])
            m += 1
        log.write(est, compute_ms)
    for item in timed[m:]:
        put(item)
    for marker in rest:
        log.write_marker(marker)


# ---------------------------------------------------------------------------- opening

try:
    import fcntl
except ImportError:  # pragma: no cover - not POSIX: exclusive creation still holds
    fcntl = None


@dataclass(frozen=True)
class FileKind:
    """What a file written like the estimate log is called in messages: its ``noun``,
    the ``option`` that names it and the first line (``magic``) by which an existing
    one is recognised (other writers: :mod:`streamer.sinks.beats_log`)."""

    noun: str
    option: str
    magic: str


ESTIMATE_LOG = FileKind("estimate log", "--log", MAGIC)


def _claim(log, if_exists: str, inputs: list[Path], kind: FileKind = ESTIMATE_LOG) -> int:
    """Open ``log.path`` for writing as :class:`EstimateLog` describes; returns the
    file descriptor (locked, empty, positioned at 0). May change ``log.path`` when
    ``if_exists == "number"``. ``kind`` names the file in messages."""
    base = log.path
    for n in range(1, 1000):
        if n > 1:
            log.path = base.with_name(f"{base.stem}-{n}{base.suffix}")
        try:
            fd = os.open(log.path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            if if_exists == "number":
                continue
            return _open_existing(log.path, if_exists, inputs, kind)
        except OSError as exc:
            raise InputError(f"cannot write the {kind.noun} {log.path}: {exc.strerror}") from None
        try:
            _lock(fd, log.path, kind)
        except BaseException:
            os.close(fd)
            raise
        return fd
    raise InputError(f"cannot write the {kind.noun} {base}: {base.stem}-2 to "
                     f"{base.stem}-999 exist too; clear the folder {base.parent}")


def _open_existing(path: Path, if_exists: str, inputs: list[Path],
                   kind: FileKind = ESTIMATE_LOG) -> int:
    try:
        info = os.stat(path)
    except OSError as exc:  # e.g. a symbolic link to nowhere
        raise InputError(f"cannot write the {kind.noun} {path}: {exc.strerror}") from None
    if stat.S_ISDIR(info.st_mode):
        raise InputError(f"cannot write the {kind.noun} {path}: it is a folder; give a file "
                         "name")
    _refuse_inputs(path, info, inputs, kind)
    if not stat.S_ISREG(info.st_mode):  # a device or a pipe: nothing in it to destroy
        try:
            return os.open(path, os.O_WRONLY)
        except OSError as exc:
            raise InputError(f"cannot write the {kind.noun} {path}: {exc.strerror}") from None
    if if_exists != "overwrite":
        raise InputError(
            f"the {kind.noun} {path} already exists; give another {kind.option} path, or "
            f"add --overwrite to replace an earlier ridgewatch {_short(kind)}")
    try:
        fd = os.open(path, os.O_RDWR)
    except OSError as exc:
        raise InputError(f"cannot write the {kind.noun} {path}: {exc.strerror}") from None
    try:
        _refuse_inputs(path, os.fstat(fd), inputs, kind)  # the file opened, not the name looked up
        _lock(fd, path, kind)
        first = os.pread(fd, len(kind.magic) + 1, 0)
        if first and first.rstrip(b"\r\n") != kind.magic.encode():
            raise InputError(
                f"{path} is not a ridgewatch {kind.noun} (its first line is not "
                f"'{kind.magic}'); --overwrite only replaces {_short(kind)}s: give another "
                f"{kind.option} path")
        os.ftruncate(fd, 0)
    except OSError as exc:
        os.close(fd)
        raise InputError(f"cannot write the {kind.noun} {path}: {exc.strerror}") from None
    except BaseException:
        os.close(fd)
        raise
    return fd


def _refuse_inputs(path: Path, info: os.stat_result, inputs: list[Path],
                   kind: FileKind = ESTIMATE_LOG) -> None:
    for source in inputs:
        try:
            other = os.stat(source)
        except OSError:
            continue
        if (other.st_dev, other.st_ino) == (info.st_dev, info.st_ino):
            raise InputError(
                f"{kind.option} {path} is the input file {source}; the {_short(kind)} would "
                f"destroy it: give another {kind.option} path")


def _lock(fd: int, path: Path, kind: FileKind = ESTIMATE_LOG) -> None:
    if fcntl is None:
        return
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        raise InputError(
            f"the {kind.noun} {path} is being written by another ridgewatch run; give "
            f"another {kind.option} path") from None
    except OSError:
        pass  # a file system without locks: exclusive creation still holds


def _short(kind: FileKind) -> str:
    """The word for the file in the middle of a sentence: 'log' for the estimate log
    (as the messages always said), else the noun."""
    return "log" if kind is ESTIMATE_LOG else kind.noun


@dataclass
class LogTable:
    """A parsed estimate log: header fields and one numpy array per column.

    ``quantity`` and ``source`` are arrays of str; the others float64 with NaN for
    empty cells.
    """

    header: dict
    columns: dict = field(default_factory=dict)
    markers: list = field(default_factory=list)
    """The log's marker lines as :class:`~streamer.sources.base.Marker`, in file order."""

    def __len__(self) -> int:
        return len(self.columns["time_s"])

    def select(self, quantity: str | None = None, source: str | None = None) -> "LogTable":
        mask = np.ones(len(self), dtype=bool)
        if quantity is not None:
            mask &= self.columns["quantity"] == quantity
        if source is not None:
            mask &= self.columns["source"] == source
        return LogTable(self.header, {k: v[mask] for k, v in self.columns.items()},
                        self.markers)

    def pairs(self) -> list[tuple[str, str]]:
        """Distinct (quantity, source) pairs in order of first appearance."""
        seen = {}
        for q, s in zip(self.columns["quantity"], self.columns["source"]):
            seen.setdefault((str(q), str(s)), None)
        return list(seen)


def read_log(path) -> LogTable:
    """Read an estimate log written by :class:`EstimateLog`.

    A last row cut short (the writer was killed mid-line) is ignored; anything else
    malformed raises :class:`InputError` naming the file and line.
    """
    path = Path(path)
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            text = fh.read()
    except OSError as exc:
        raise InputError(f"cannot read the estimate log {path}: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise InputError(
            f"{path} is not a ridgewatch estimate log (not UTF-8 text); give a log written "
            f"by replay, live, demo or offline"
        ) from None
    # Lines end at "\n" only: a quoted cell may hold any other character.
    lines = text.split("\n")
    cut = lines[-1] != ""  # text after the last "\n": a partial line
    if not cut:
        lines.pop()
    header: dict = {}
    i = 0
    while i < len(lines) and lines[i].startswith("#"):
        body = lines[i][1:].strip()
        if ":" in body:
            key, value = body.split(":", 1)
            value = value.strip()
            if key in ("channels", "config"):
                try:
                    value = json.loads(value)
                except json.JSONDecodeError:
                    pass
            else:
                value = _from_one_line(value)
            header[key.strip()] = value
        i += 1
    names = tuple(lines[i].rstrip("\r").split(",")) if i < len(lines) else ()
    if names not in (COLUMNS, COLUMNS_BEFORE_NOW, COLUMNS_BEFORE_DISPLAY):
        raise InputError(
            f"{path} is not a ridgewatch estimate log (expected the header row "
            f"'{','.join(COLUMNS)}' after the '#' lines)"
        )
    if cut:
        lines.append(None)  # marks the partial line for _records
    notes: list[str] = []
    numbered = _records(path, lines, i + 1, notes)
    for line_no, r in numbered:
        if len(r) != len(names):
            raise InputError(f"{path}, line {line_no}: {len(r)} cells instead of "
                             f"{len(names)}; not a row of a ridgewatch estimate log")
    rows = [r for _, r in numbered]
    cols: dict = {}
    for j, name in enumerate(names):
        if name in TEXT_COLUMNS:
            cols[name] = np.array([r[j] for r in rows], dtype=str)
            continue
        try:
            cols[name] = np.array([float(r[j]) if r[j] != "" else np.nan for r in rows],
                                  dtype=np.float64)
        except ValueError:
            line_no, r = next((n, r) for n, r in numbered if not _is_num(r[j]))
            raise InputError(
                f"{path}, line {line_no}: column '{name}' is not a number: {r[j]!r}"
            ) from None
    if names == COLUMNS_BEFORE_DISPLAY:
        cols["display"] = np.array([""] * len(rows), dtype=str)
    for name in COLUMNS[len(names):]:
        if name not in cols:  # an older log: the rate-now columns read as NaN
            cols[name] = np.full(len(rows), np.nan)
    markers = [m for m in map(parse_marker, notes) if m is not None]
    return LogTable(header, cols, markers)


def _records(path: Path, lines: list, start: int,
             notes: list | None = None) -> list[tuple[int, list[str]]]:
    """(1-based line number, cells) of the rows from ``lines[start:]``.

    A ``#`` line or a blank line where a row would begin is skipped (an event or a
    marker; ``#`` lines are appended to ``notes`` when given); inside
    a quoted cell it is part of the cell. A last element None marks the line before it
    as partial: the row that reaches it was cut short and is dropped, as is a row that
    the file ends inside of (an unclosed quote).
    """
    partial = lines[-1] is None if len(lines) > start else False
    if partial:
        lines = lines[:-1]
    state = {"k": start, "first": 0, "at_start": True}

    def feed():
        while state["k"] < len(lines):
            line = lines[state["k"]]
            state["k"] += 1
            if state["at_start"]:
                if line.startswith("#") or not line.strip():
                    if notes is not None and line.startswith("#"):
                        notes.append(line)
                    continue
                state["first"] = state["k"]
                state["at_start"] = False
            yield line + ("\n" if state["k"] < len(lines) or not partial else "")

    reader = csv.reader(feed(), strict=True)
    records = []
    while True:
        state["at_start"] = True
        try:
            cells = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            if state["k"] >= len(lines):  # the file ends inside a quoted cell: cut short
                break
            raise InputError(f"{path}, line {state['first']}: {exc}; not a row of a "
                             "ridgewatch estimate log") from None
        if partial and state["k"] >= len(lines):
            break  # the row reaching the partial last line
        records.append((state["first"], cells))
    return records


def _is_num(cell: str) -> bool:
    if cell == "":
        return True
    try:
        float(cell)
        return True
    except ValueError:
        return False


def drop_cell(row: str, column: str = "compute_ms") -> str:
    """A row's text without the cell of ``column``: for comparing the rows of two runs
    of one input, whose only differing cell is the compute time. A row cut short before
    that cell (an interrupted writer) comes back as it is."""
    cells = next(csv.reader([row]))
    if len(cells) <= COLUMNS.index(column):
        return row
    del cells[COLUMNS.index(column)]
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="").writerow(cells)
    return buffer.getvalue()


def rows_text(path) -> list[str]:
    """The data rows of a log as text lines (for prefix comparisons). A log a run has
    just created, whose header is not written yet, has none."""
    with io.open(path, encoding="utf-8") as fh:
        lines = [ln for ln in fh.read().split("\n")]
    start = next((i for i, ln in enumerate(lines) if ln.startswith("emitted_s,")), None)
    if start is None:
        return []
    return [ln for ln in lines[start + 1:] if ln and not ln.startswith("#")]
