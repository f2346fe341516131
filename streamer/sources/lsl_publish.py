"""Publish samples (a replayed recording or a simulation) as an LSL stream.

:class:`SamplePublisher` turns a :class:`~streamer.sources.base.SourceInfo` into an LSL
outlet whose description follows the XDF channel-metadata convention
(``desc/channels/channel/{label,type,unit}``), so any LSL tool, and
:class:`~streamer.sources.lsl_source.LslSource`, sees channel names, kinds and units.
Used by ``ridgewatch simulate`` and ``ridgewatch replay --publish``.
"""

from __future__ import annotations

import hashlib
import math

import numpy as np
import pylsl

from estimators.errors import ParameterError
from streamer.sources.base import Chunk, SourceInfo

LSL_TYPE_BY_KIND = {"ppg": "PPG", "ecg": "ECG", "resp": "RESP", "acc": "ACC"}
"""The channel type string we write for each signal kind."""


def stream_type_for(info: SourceInfo) -> str:
    """``"PPG"`` etc. when every channel has that kind, else ``"Physio"``."""
    kinds = {c.kind for c in info.channels}
    if len(kinds) == 1:
        (kind,) = kinds
        if kind in LSL_TYPE_BY_KIND:
            return LSL_TYPE_BY_KIND[kind]
    return "Physio"


def derived_source_id(*parts: str) -> str:
    """A stable, short id from some strings: same inputs, same id, across runs.

    Examples
    --------
    >>> derived_source_id("a", "b") == derived_source_id("a", "b")
    True
    """
    digest = hashlib.sha1("\x1f".join(parts).encode("utf-8")).hexdigest()
    return f"ridgewatch-{digest[:16]}"


class SamplePublisher:
    """An LSL outlet carrying the channels of ``info``.

    Parameters
    ----------
    info : what is published: channel names, kinds, units and nominal rate.
    name : stream name; ``info.name`` by default.
    type : stream type; by default the common kind of all channels (see
        :func:`stream_type_for`).
    source_id : stream source id; ``info.source_id`` when set, else derived from the
        stream name and channel names, so a restarted publisher is recognised as the
        same stream.
    align_to_local_clock : if True (default), chunk timestamps are shifted by one
        constant, fixed at the first push, so that the first chunk's newest sample is
        stamped "now" on :func:`pylsl.local_clock`. Gaps and irregular timing in the
        input survive. If False, timestamps are pushed as given and must already be
        on the local LSL clock.

    Notes
    -----
    liblsl delivers a sample only to inlets that had subscribed before it was pushed;
    call :meth:`wait_for_consumers` first when the first samples matter.
    """

    def __init__(
        self,
        info: SourceInfo,
        name: str | None = None,
        type: str | None = None,
        source_id: str | None = None,
        align_to_local_clock: bool = True,
    ):
        if not info.fs > 0:
            raise ParameterError(f"info.fs={info.fs!r} must be > 0")
        if not info.channels:
            raise ParameterError("info.channels must not be empty")
        self.info = info
        self.name = name or info.name
        self.source_id = source_id or info.source_id or derived_source_id(
            self.name, *info.channel_names
        )
        stream_info = pylsl.StreamInfo(
            self.name,
            type or stream_type_for(info),
            len(info.channels),
            float(info.fs),
            pylsl.cf_double64,
            self.source_id,
        )
        channels = stream_info.desc().append_child("channels")
        for channel in info.channels:
            node = channels.append_child("channel")
            node.append_child_value("label", channel.name)
            node.append_child_value("type", LSL_TYPE_BY_KIND.get(channel.kind, ""))
            node.append_child_value("unit", channel.unit)
        stream_info.desc().append_child_value("manufacturer", "ridgewatch")
        self._outlet: pylsl.StreamOutlet | None = pylsl.StreamOutlet(stream_info)
        self._align = align_to_local_clock
        self.offset_s = math.nan
        """Added to input timestamps (NaN until the first push when aligning)."""

    def wait_for_consumers(self, timeout_s: float) -> bool:
        """Wait until some inlet has subscribed; False if ``timeout_s`` passed first."""
        return self._outlet is not None and self._outlet.wait_for_consumers(timeout_s)

    def push_chunk(self, chunk: Chunk) -> None:
        """Publish one chunk with its own timestamps (shifted, see the class notes)."""
        if self._outlet is None:
            raise RuntimeError("push_chunk after close")
        if len(chunk) == 0:
            return
        samples = np.asarray(chunk.samples, dtype=np.float64)
        if samples.ndim != 2 or samples.shape != (len(chunk), len(self.info.channels)):
            raise ParameterError(
                f"chunk.samples.shape={samples.shape} must be "
                f"({len(chunk)}, {len(self.info.channels)})"
            )
        timestamps = np.asarray(chunk.timestamps, dtype=np.float64)
        if self._align:
            if math.isnan(self.offset_s):
                self.offset_s = pylsl.local_clock() - float(timestamps[-1])
            timestamps = timestamps + self.offset_s
        self._outlet.push_chunk(samples, timestamps.tolist())

    def close(self) -> None:
        """Destroy the outlet; inlets see the stream as lost."""
        self._outlet = None

    def __enter__(self) -> "SamplePublisher":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
