"""A minimal XDF writer for tests: files built byte by byte, so a test knows exactly
what the reader is given (stamps, clock offsets, text samples, damage).

Layout (XDF 1.0 specification, from memory; checked against pyxdf's reader): the magic
``XDF:``, then chunks ``[NumLengthBytes: 1, 4 or 8][Length][Tag: uint16][Content]``,
``Length`` counting tag and content. Tags: 1 FileHeader, 2 StreamHeader, 3 Samples,
4 ClockOffset, 6 StreamFooter; every stream chunk's content starts with a uint32
StreamId. A sample is ``[TimeStampBytes: 0 or 8][TimeStamp: double]`` and its values;
a string value is ``[NumLengthBytes][Length][UTF-8 bytes]``. A ClockOffset chunk holds
``CollectionTime`` and ``OffsetValue`` (doubles): the receiver's clock minus the
sender's, measured at that time of the sender's clock (pyxdf fits a line through them
and adds it to the stream's stamps).
"""

from __future__ import annotations

import struct
from dataclasses import dataclass, field
from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np

NUMERIC_FORMATS = {"float32": "<f4", "double64": "<f8", "int16": "<i2", "int32": "<i4"}


def varlen(n: int) -> bytes:
    if n < 256:
        return struct.pack("<BB", 1, n)
    if n < 1 << 32:
        return struct.pack("<BI", 4, n)
    return struct.pack("<BQ", 8, n)


def chunk(tag: int, content: bytes) -> bytes:
    return varlen(len(content) + 2) + struct.pack("<H", tag) + content


def file_header() -> bytes:
    return b"XDF:" + chunk(1, b'<?xml version="1.0"?><info><version>1.0</version></info>')


def stream_header(stream_id: int, name: str, kind: str, fmt: str, srate: float,
                  channels: list[tuple[str, str, str]]) -> bytes:
    """``channels``: (label, type, unit) per channel."""
    labels = "".join(f"<channel><label>{escape(label)}</label><type>{escape(ctype)}</type>"
                     f"<unit>{escape(unit)}</unit></channel>" for label, ctype, unit in channels)
    xml = (f'<?xml version="1.0"?><info><name>{escape(name)}</name><type>{escape(kind)}</type>'
           f"<channel_count>{len(channels)}</channel_count><nominal_srate>{srate}"
           f"</nominal_srate><channel_format>{fmt}</channel_format><created_at>0</created_at>"
           f"<desc><channels>{labels}</channels></desc></info>")
    return chunk(2, struct.pack("<I", stream_id) + xml.encode())


def samples_chunk(stream_id: int, stamps, values, fmt: str) -> bytes:
    """One Samples chunk; a stamp of None is left out (the reader deduces it)."""
    body = struct.pack("<I", stream_id) + varlen(len(values))
    for stamp, row in zip(stamps, values):
        body += b"\x00" if stamp is None else b"\x08" + struct.pack("<d", stamp)
        if fmt == "string":
            for cell in row:
                raw = cell.encode("utf-8")
                body += varlen(len(raw)) + raw
        else:
            body += np.asarray(row, dtype=NUMERIC_FORMATS[fmt]).tobytes()
    return chunk(3, body)


def clock_offset_chunk(stream_id: int, collection_time: float, offset: float) -> bytes:
    return chunk(4, struct.pack("<Idd", stream_id, collection_time, offset))


def footer(stream_id: int, first: float, last: float, count: int) -> bytes:
    xml = (f'<?xml version="1.0"?><info><first_timestamp>{first}</first_timestamp>'
           f"<last_timestamp>{last}</last_timestamp><sample_count>{count}</sample_count>"
           f"<clock_offsets></clock_offsets></info>")
    return chunk(6, struct.pack("<I", stream_id) + xml.encode())


@dataclass
class Stream:
    """One stream of a file written by :func:`write_streams`: ``stamps`` on the
    sender's clock, ``values`` (n, channels) numbers or lists of str, ``offsets``
    (collection time, offset value) pairs written as ClockOffset chunks."""

    name: str
    kind: str
    fmt: str
    srate: float
    channels: list
    stamps: np.ndarray
    values: object
    offsets: list = field(default_factory=list)


def write_streams(path: Path, streams: list[Stream], chunk_s: float = 1.0) -> Path:
    """Write ``streams`` as a recorder does: the headers, then the samples of all streams
    interleaved in blocks of ``chunk_s`` seconds of each one's own clock, each stream's
    clock offsets among its samples, the footers at the end."""
    out = file_header()
    for k, s in enumerate(streams, start=1):
        out += stream_header(k, s.name, s.kind, s.fmt, s.srate, s.channels)
    blocks = []
    for k, s in enumerate(streams, start=1):
        stamps = np.asarray(s.stamps, dtype=np.float64)
        if len(stamps) == 0:
            continue
        block = np.floor((stamps - stamps[0]) / chunk_s).astype(int)
        for b in np.unique(block):
            rows = np.nonzero(block == b)[0]
            lo, hi = rows[0], rows[-1] + 1
            blocks.append((b, k, samples_chunk(k, stamps[lo:hi], s.values[lo:hi], s.fmt)))
        for b, (when, value) in enumerate(s.offsets):
            blocks.append((b, k, clock_offset_chunk(k, when, value)))
    for _, _, body in sorted(blocks, key=lambda item: (item[0], item[1])):
        out += body
    for k, s in enumerate(streams, start=1):
        stamps = np.asarray(s.stamps, dtype=np.float64)
        if len(stamps):
            out += footer(k, stamps[0], stamps[-1], len(stamps))
    path.write_bytes(out)
    return path
