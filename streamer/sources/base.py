"""One source protocol for LSL, files and simulation.

A source describes itself with :class:`SourceInfo` and yields, from :meth:`Source.chunks`,
either :class:`Chunk` objects (samples and their timestamps) or :class:`SourceEvent`
objects (stream lost, resumed, gap, irregular timing). The engine cannot tell live
from replay: it only ever sees chunks.

Timestamps are seconds on the source's own stream clock: for LSL the sender's clock
mapped to the local LSL clock (``time_correction`` applied); for a file its own time
axis, or seconds from its start when it has none.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterator, Protocol, Union

import numpy as np

KINDS = ("ppg", "ecg", "resp", "acc")


@dataclass(frozen=True)
class ChannelInfo:
    """One channel: its label, its signal kind (one of :data:`KINDS`, or None when
    unknown) and its unit (free text, may be empty)."""

    name: str
    kind: str | None = None
    unit: str = ""


@dataclass(frozen=True)
class SourceInfo:
    """What a source delivers. ``fs`` is the nominal sampling rate in Hz (> 0)."""

    name: str
    fs: float
    channels: tuple[ChannelInfo, ...]
    source_id: str = ""

    @property
    def channel_names(self) -> list[str]:
        return [c.name for c in self.channels]


@dataclass(frozen=True)
class Chunk:
    """``samples`` is ``(n, channels)`` float64, ``timestamps`` is ``(n,)`` float64."""

    samples: np.ndarray
    timestamps: np.ndarray

    def __len__(self) -> int:
        return len(self.timestamps)


@dataclass(frozen=True)
class SourceEvent:
    """A status change of the source.

    ``kind`` is one of ``"lost"``, ``"resumed"``, ``"gap"``, ``"irregular"``, ``"end"``,
    ``"replaying"``; ``message`` is one plain sentence for the user; ``time_s`` is the
    stream time it refers to (NaN when unknown).
    """

    kind: str
    message: str
    time_s: float = float("nan")
    detail: dict = field(default_factory=dict)


@dataclass(frozen=True)
class Marker:
    """A text marker (event label) on the stream clock: an LSL string sample, an XDF
    marker-stream sample, an EDF+ annotation, or one the user added during the run.

    ``source`` names where it came from (the marker stream's name, ``"annotations"``
    for EDF+, ``"user"`` for the user's own); ``text`` is passed on unchanged.
    """

    time_s: float
    text: str
    source: str = ""


Item = Union[Chunk, SourceEvent, Marker]


class Source(Protocol):
    info: SourceInfo

    def chunks(self) -> Iterator[Item]:
        """Yield chunks and events until the source ends or :meth:`close` is called."""

    def close(self) -> None:
        """Stop yielding; release the stream or file."""


@dataclass(frozen=True)
class Recording:
    """A whole recording read from a file: the input of replay and of the offline twin.

    ``samples`` is ``(n, channels)`` float64 (NaN where the file has no value),
    ``timestamps`` is ``(n,)`` float64 seconds on the file's time axis, ``info`` describes
    the channels. ``events`` holds reference event times (beats or breaths, seconds on
    the same axis) found beside the recording, keyed by a short name (e.g. ``"atr"``);
    empty when there are none. ``markers`` holds the file's text markers (XDF marker
    streams, EDF+ annotations) in time order.
    """

    samples: np.ndarray
    timestamps: np.ndarray
    info: SourceInfo
    events: dict = field(default_factory=dict)
    markers: tuple = ()

    @property
    def duration_s(self) -> float:
        if len(self.timestamps) == 0:
            return 0.0
        return float(self.timestamps[-1] - self.timestamps[0]) + 1.0 / self.info.fs
