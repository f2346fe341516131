"""The estimate log: a CSV that other tools and reports read.

Format
------
1. A header block of lines starting with ``#``::

       # ridgewatch estimate log
       # version: 0.1.0
       # mode: live            (live | replay | offline)
       # source: <file path or stream name>
       # channels: {"PLETH": "ppg", ...}            (JSON)
       # config: {...}                               (JSON, the full configuration)

2. One header row with :data:`COLUMNS`, then one row per estimate. Each row is flushed
   (and ``os.fsync``-ed every ``sync_every_s`` seconds) as it is written, so a Ctrl-C,
   SIGTERM or a crash of the display never loses a row already written; an interrupted
   log is a valid prefix of the full one.

Times are seconds on the source's stream clock. ``rate_per_min`` is empty when there is
no estimate; it keeps the engine's rate even when the displays withhold it. ``display``
(the last column) is what the displays did with the estimate: ``show``, ``grey`` or
``withhold`` (:mod:`estimators.display_rule`). Logs written before that column existed
are still read (:data:`COLUMNS_BEFORE_DISPLAY`); their ``display`` cells read as empty.
"""

from __future__ import annotations

import io
import json
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from estimators.estimate import Estimate
from streamer import __version__
from streamer.errors import InputError

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
)
COLUMNS_BEFORE_DISPLAY = COLUMNS[:-1]
"""The header row of logs written before the ``display`` column (still read)."""
TEXT_COLUMNS = ("quantity", "source", "display")


def _fmt(value: float, digits: int) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return f"{value:.{digits}f}"


def format_row(estimate: Estimate, compute_ms: float) -> str:
    """One CSV line (with newline) for an estimate."""
    return ",".join(
        (
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
        )
    ) + "\n"


class EstimateLog:
    """Writes the estimate log, one flushed line per estimate.

    Parameters
    ----------
    path : where to write; parent folders are created.
    mode : ``"live"``, ``"replay"`` or ``"offline"``.
    source : file path or stream name, for the header.
    channels : mapping channel name -> kind, for the header.
    config : the full configuration as a JSON-serialisable dict.
    sync_every_s : seconds between ``os.fsync`` calls (every line is flushed regardless).
    """

    def __init__(self, path, mode: str, source: str, channels: dict, config: dict,
                 sync_every_s: float = 1.0):
        self.path = Path(path)
        try:
            if self.path.parent and not self.path.parent.exists():
                self.path.parent.mkdir(parents=True, exist_ok=True)
            self._file = open(self.path, "w", encoding="utf-8", newline="")
        except OSError as exc:
            raise InputError(f"cannot write the estimate log {self.path}: {exc.strerror}") from None
        self._sync_every_s = sync_every_s
        self._last_sync = time.monotonic()
        self.rows_written = 0
        header = [
            "# ridgewatch estimate log",
            f"# version: {__version__}",
            f"# mode: {mode}",
            f"# source: {source}",
            f"# channels: {json.dumps(channels)}",
            f"# config: {json.dumps(config, sort_keys=True)}",
            ",".join(COLUMNS),
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
                f"writing the estimate log {self.path} failed ({exc.strerror}); "
                f"the {self.rows_written} rows written before are complete"
            ) from None

    def write(self, estimate: Estimate, compute_ms: float = float("nan")) -> None:
        self._write(format_row(estimate, compute_ms))
        self.rows_written += 1

    def write_event(self, kind: str, message: str, time_s: float = float("nan")) -> None:
        """A status line in the body (``# event ...``), e.g. a stream lost or resumed;
        readers skip it like any ``#`` line."""
        self._write(f"# event {_fmt(time_s, 4) or 'nan'} {kind}: {message}\n")

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


@dataclass
class LogTable:
    """A parsed estimate log: header fields and one numpy array per column.

    ``quantity`` and ``source`` are arrays of str; the others float64 with NaN for
    empty cells.
    """

    header: dict
    columns: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.columns["time_s"])

    def select(self, quantity: str | None = None, source: str | None = None) -> "LogTable":
        mask = np.ones(len(self), dtype=bool)
        if quantity is not None:
            mask &= self.columns["quantity"] == quantity
        if source is not None:
            mask &= self.columns["source"] == source
        return LogTable(self.header, {k: v[mask] for k, v in self.columns.items()})

    def pairs(self) -> list[tuple[str, str]]:
        """Distinct (quantity, source) pairs in order of first appearance."""
        seen = {}
        for q, s in zip(self.columns["quantity"], self.columns["source"]):
            seen.setdefault((str(q), str(s)), None)
        return list(seen)


def read_log(path) -> LogTable:
    """Read an estimate log written by :class:`EstimateLog`.

    A last line cut short (the writer was killed mid-line) is ignored; anything else
    malformed raises :class:`InputError` naming the file and line.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot read the estimate log {path}: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise InputError(
            f"{path} is not a ridgewatch estimate log (not UTF-8 text); give a log written "
            f"by replay, live, demo or offline"
        ) from None
    header: dict = {}
    lines = text.splitlines()
    if text and not text.endswith("\n") and lines:
        lines = lines[:-1]  # a partial last line from an interrupted writer
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
            header[key.strip()] = value
        i += 1
    names = tuple(lines[i].split(",")) if i < len(lines) else ()
    if names not in (COLUMNS, COLUMNS_BEFORE_DISPLAY):
        raise InputError(
            f"{path} is not a ridgewatch estimate log (expected the header row "
            f"'{','.join(COLUMNS)}' after the '#' lines)"
        )
    # (1-based line number, cells): event lines between rows keep the numbers right.
    numbered = [(k + 1, line.split(",")) for k, line in enumerate(lines) if k > i
                and line.strip() and not line.startswith("#")]
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
    return LogTable(header, cols)


def _is_num(cell: str) -> bool:
    if cell == "":
        return True
    try:
        float(cell)
        return True
    except ValueError:
        return False


def rows_text(path) -> list[str]:
    """The data rows of a log as text lines (for prefix comparisons)."""
    with io.open(path, encoding="utf-8") as fh:
        lines = [ln for ln in fh.read().split("\n")]
    start = next(i for i, ln in enumerate(lines) if ln.startswith("emitted_s,"))
    return [ln for ln in lines[start + 1:] if ln and not ln.startswith("#")]
