"""WFDB records read byte by byte: the slow, obvious twin of :mod:`streamer.sources.wfdb_reader`.

ridgewatch reads WFDB with the ``wfdb`` package; this plain reader (formerly its own) is kept
as the reference that reader is checked against (``tests/streamer/test_files.py``).

Only the parts of the WFDB format that single-segment physiological recordings use are
read: one header (``<record>.hea``), one or more signal files in which the signals of a
file are interleaved frame by frame, and annotation files (``<record>.<annotator>``) in
the MIT format. Everything else is refused with :class:`~streamer.errors.InputError`
rather than read wrongly.

Supported signal formats (digital sample ``d``)

====== =========================================================================
format layout
====== =========================================================================
16     16-bit two's complement, little-endian
61     16-bit two's complement, big-endian
80     8-bit offset binary (``d = byte - 128``)
160    16-bit offset binary, little-endian (``d = word - 32768``)
212    two 12-bit two's complement samples packed in 3 bytes
24     24-bit two's complement, little-endian
32     32-bit two's complement, little-endian
====== =========================================================================

Physical value = ``(d - baseline) / gain``. The smallest value of each format (e.g.
-2048 for format 212, -32768 for format 16) marks an invalid sample in WFDB (from memory)
and becomes NaN.

Notes
-----
The format descriptions follow the WFDB header and signal file conventions as written
in ``/work/shared/data/physionet_wfdb/SOURCE.md`` (format 212 bit layout, MIT
annotation word layout) and, where that file is silent (formats other than 212, the
header defaults gain 200 and baseline = ADC zero, the invalid-sample markers, the
``## time resolution`` note and the beat-code set), from memory.
"""

from __future__ import annotations

import logging
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from streamer.errors import InputError

logger = logging.getLogger("ridgewatch")

SUPPORTED_FORMATS = (16, 61, 80, 160, 212, 24, 32)

#: Bits per sample of each supported format.
_BITS = {16: 16, 61: 16, 80: 8, 160: 16, 212: 12, 24: 24, 32: 32}

#: Header defaults when a field is absent or zero (from memory: WFDB's DEFFREQ, DEFGAIN).
DEFAULT_FS = 250.0
DEFAULT_GAIN = 200.0

#: MIT annotation codes that mark a beat (QRS complex), from memory of the standard
#: WFDB code table: 1 N normal, 2 L left bundle branch block, 3 R right bundle branch
#: block, 4 a aberrated atrial premature, 5 V premature ventricular, 6 F fusion of
#: ventricular and normal, 7 J nodal premature, 8 A atrial premature, 9 S supraventricular
#: premature, 10 E ventricular escape, 11 j nodal escape, 12 / paced, 13 Q unclassifiable,
#: 25 B bundle branch block, 30 ? beat not classified during learning, 34 e atrial escape,
#: 35 n supraventricular escape, 38 f fusion of paced and normal, 41 r R-on-T premature
#: ventricular. Every other code (rhythm change 28 ``+``, noise 14 ``~``, artefact 16
#: ``|``, comment 22 ``"``, waves, ...) is not a beat.
BEAT_CODES = frozenset({1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 25, 30, 34, 35, 38, 41})

# MIT annotation pseudo-codes (SOURCE.md): they modify the stream, they are not events.
_SKIP, _NUM, _SUB, _CHN, _AUX = 59, 60, 61, 62, 63
_NOTE = 22


@dataclass(frozen=True)
class WfdbSignal:
    """One signal line of a WFDB header."""

    file_name: str
    fmt: int
    byte_offset: int
    gain: float
    baseline: int
    units: str
    checksum: int | None
    description: str
    samples_per_frame: int = 1


@dataclass(frozen=True)
class WfdbHeader:
    """The parsed header of a single-segment record."""

    record_name: str
    fs: float
    n_samples: int | None
    signals: tuple[WfdbSignal, ...]


_FORMAT_RE = re.compile(r"^(\d+)(?:x(\d+))?(?::(\d+))?(?:\+(\d+))?$")
_GAIN_RE = re.compile(r"^([-+0-9.eE]+)(?:\(([-+]?\d+)\))?(?:/(.*))?$")


def read_header(path: str | Path) -> WfdbHeader:
    """Parse a ``.hea`` file.

    Parameters
    ----------
    path : str or Path
        The header file.

    Returns
    -------
    WfdbHeader

    Raises
    ------
    InputError
        When the header cannot be read, is malformed, describes a multi-segment record,
        or uses a signal format or feature this reader does not support.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="latin-1")
    except OSError as exc:
        raise InputError(f"{path}: cannot read the WFDB header: {exc.strerror}") from None
    lines = []
    for line_no, raw in enumerate(text.splitlines(), start=1):
        stripped = raw.strip()
        if stripped and not stripped.startswith("#"):
            lines.append((line_no, stripped))
    if not lines:
        raise InputError(f"{path}: WFDB header has no record line; is this a WFDB .hea file?")
    line_no, record_line = lines[0]
    tokens = record_line.split()
    if "/" in tokens[0]:
        raise InputError(
            f"{path}: multi-segment WFDB records are not supported; "
            "read one segment's header instead"
        )
    try:
        n_sig = int(tokens[1]) if len(tokens) > 1 else 0
        # The frequency field may carry a counter frequency and base counter: "360/10(0)".
        fs = float(tokens[2].split("/")[0].split("(")[0]) if len(tokens) > 2 else DEFAULT_FS
        n_samples = int(tokens[3]) if len(tokens) > 3 else None
    except ValueError:
        raise InputError(
            f"{path}: line {line_no}: cannot parse the record line {record_line!r}; "
            "expected 'name n_signals [fs [n_samples ...]]'"
        ) from None
    if fs <= 0:
        fs = DEFAULT_FS
    if n_sig < 1:
        raise InputError(f"{path}: WFDB header declares no signals; nothing to read")
    if len(lines) - 1 < n_sig:
        raise InputError(
            f"{path}: WFDB header declares {n_sig} signals but has {len(lines) - 1} signal "
            "lines; the header is incomplete"
        )
    signals = tuple(_parse_signal_line(path, no, line, i) for i, (no, line) in
                    enumerate(lines[1:1 + n_sig]))
    return WfdbHeader(record_name=tokens[0], fs=fs, n_samples=n_samples, signals=signals)


def _parse_signal_line(path: Path, line_no: int, line: str, index: int) -> WfdbSignal:
    tokens = line.split()
    where = f"{path}: line {line_no}"
    if len(tokens) < 2:
        raise InputError(f"{where}: signal line {line!r} lacks a format field")
    file_name = tokens[0]
    if file_name == "~":
        raise InputError(f"{where}: signal {index} has no signal file ('~'); nothing to read")
    m = _FORMAT_RE.match(tokens[1])
    if not m:
        raise InputError(f"{where}: cannot parse the format field {tokens[1]!r}")
    fmt = int(m.group(1))
    if fmt not in SUPPORTED_FORMATS:
        raise InputError(
            f"{where}: signal format {fmt} is not supported; supported formats: "
            f"{', '.join(map(str, SUPPORTED_FORMATS))}; convert the record (e.g. to format 16)"
        )
    samples_per_frame = int(m.group(2)) if m.group(2) is not None else 1
    if samples_per_frame < 1:
        raise InputError(f"{where}: {samples_per_frame} samples per frame; must be at least 1")
    if m.group(3) is not None and int(m.group(3)) != 0:
        raise InputError(f"{where}: skewed signals are not supported; remove the skew")
    byte_offset = int(m.group(4)) if m.group(4) is not None else 0

    gain, baseline, units = DEFAULT_GAIN, None, "mV"
    if len(tokens) > 2:
        g = _GAIN_RE.match(tokens[2])
        if not g:
            raise InputError(f"{where}: cannot parse the gain field {tokens[2]!r}")
        gain = float(g.group(1))
        if g.group(2) is not None:
            baseline = int(g.group(2))
        if g.group(3):
            units = g.group(3)
    if gain == 0:
        gain = DEFAULT_GAIN
    try:
        adc_zero = int(tokens[4]) if len(tokens) > 4 else 0
        checksum = int(tokens[6]) if len(tokens) > 6 else None
    except ValueError:
        raise InputError(f"{where}: cannot parse the ADC zero or checksum field") from None
    if baseline is None:
        baseline = adc_zero
    description = " ".join(tokens[8:]) if len(tokens) > 8 else f"ch{index}"
    return WfdbSignal(file_name, fmt, byte_offset, gain, baseline, units, checksum, description,
                      samples_per_frame)


def _decode(raw: bytes, fmt: int, n_values: int) -> np.ndarray:
    """Decode ``n_values`` digital samples (int64) from the start of ``raw``."""
    if fmt == 16:
        return np.frombuffer(raw, dtype="<i2", count=n_values).astype(np.int64)
    if fmt == 61:
        return np.frombuffer(raw, dtype=">i2", count=n_values).astype(np.int64)
    if fmt == 80:
        return np.frombuffer(raw, dtype=np.uint8, count=n_values).astype(np.int64) - 128
    if fmt == 160:
        return np.frombuffer(raw, dtype="<u2", count=n_values).astype(np.int64) - 32768
    if fmt == 32:
        return np.frombuffer(raw, dtype="<i4", count=n_values).astype(np.int64)
    if fmt == 24:
        b = np.frombuffer(raw, dtype=np.uint8, count=3 * n_values).astype(np.int64).reshape(-1, 3)
        d = b[:, 0] | (b[:, 1] << 8) | (b[:, 2] << 16)
        return np.where(d >= 1 << 23, d - (1 << 24), d)
    if fmt == 212:
        n_triplets = (n_values + 1) // 2
        buf = np.frombuffer(raw, dtype=np.uint8, count=min(len(raw), 3 * n_triplets))
        if len(buf) < 3 * n_triplets:  # an odd last sample is stored in two bytes
            buf = np.concatenate([buf, np.zeros(3 * n_triplets - len(buf), np.uint8)])
        b = buf.astype(np.int64).reshape(-1, 3)
        out = np.empty(2 * n_triplets, dtype=np.int64)
        out[0::2] = b[:, 0] | ((b[:, 1] & 0x0F) << 8)
        out[1::2] = b[:, 2] | ((b[:, 1] & 0xF0) << 4)
        out[out > 2047] -= 4096
        return out[:n_values]
    raise AssertionError(fmt)  # read_header refuses other formats


def _bytes_for(fmt: int, n_values: int) -> int:
    """Bytes that hold ``n_values`` samples of ``fmt`` (format 212 rounds up)."""
    return (n_values * _BITS[fmt] + 7) // 8


def read_signals(
    header: WfdbHeader, directory: str | Path, header_path: str | Path = ""
) -> tuple[np.ndarray, int]:
    """Read all signals of a one-rate record in physical units, as columns.

    See :func:`read_signal_list` (this stacks its signals, which must share one rate).
    """
    signals, n_declared = read_signal_list(header, directory, header_path)
    if len({len(x) for x in signals}) > 1:
        raise InputError(f"{header_path}: signals at different rates; use read_signal_list")
    return np.column_stack(signals), n_declared


def read_signal_list(
    header: WfdbHeader, directory: str | Path, header_path: str | Path = ""
) -> tuple[list[np.ndarray], int]:
    """Read all signals of a record in physical units, each at its own rate.

    Signal ``j`` has ``samples_per_frame`` samples in each frame; in a signal file the
    frames follow each other, and within a frame the samples of its signals in header
    order, each signal's ``samples_per_frame`` samples together.

    Parameters
    ----------
    header : WfdbHeader
        From :func:`read_header`.
    directory : str or Path
        Where the signal files are (the header's folder).
    header_path : str or Path, optional
        Only used in messages.

    Returns
    -------
    signals : list of ndarray, float64
        Signal ``j`` has ``n * samples_per_frame_j`` physical values; NaN where the
        digital value is the format's invalid marker.
    n_declared : int
        The number of frames the header declares (``n`` when it declares none). When a
        signal file is shorter, ``n < n_declared`` and a warning is logged: the record
        is cut to the frames that every file holds completely.

    Raises
    ------
    InputError
        When a signal file is missing or holds not a single complete frame.
    """
    directory = Path(directory)
    # Signals of one file are interleaved in header order; group them by file.
    groups: dict[str, list[int]] = {}
    for i, sig in enumerate(header.signals):
        groups.setdefault(sig.file_name, []).append(i)

    decoded: dict[str, np.ndarray] = {}
    n_available = []
    for file_name, members in groups.items():
        fmts = {header.signals[i].fmt for i in members}
        offsets = {header.signals[i].byte_offset for i in members}
        if len(fmts) > 1 or len(offsets) > 1:
            raise InputError(
                f"{header_path}: signals in {file_name} mix formats or byte offsets; "
                "not supported"
            )
        fmt, offset = fmts.pop(), offsets.pop()
        file_path = directory / file_name
        try:
            raw = file_path.read_bytes()[offset:]
        except FileNotFoundError:
            raise InputError(
                f"{header_path}: signal file {file_path} is missing; keep the .dat file "
                "beside the .hea file"
            ) from None
        except OSError as exc:
            raise InputError(f"{file_path}: cannot read: {exc.strerror}") from None
        k = sum(header.signals[i].samples_per_frame for i in members)
        n_frames_in_file = (len(raw) * 8) // (_BITS[fmt] * k)
        n_frames = n_frames_in_file if header.n_samples is None else min(header.n_samples,
                                                                         n_frames_in_file)
        decoded[file_name] = _decode(raw, fmt, n_frames * k).reshape(n_frames, k)
        n_available.append(n_frames)

    n = min(n_available)
    n_declared = header.n_samples if header.n_samples is not None else n
    if n == 0:
        raise InputError(
            f"{header_path}: the signal file holds no complete sample (file empty or "
            "truncated); nothing to read"
        )
    if n < n_declared:
        logger.warning(
            "%s: the signal file holds %d of the %d samples the header declares "
            "(truncated file); reading the first %d samples",
            header_path, n, n_declared, n,
        )

    signals: list[np.ndarray] = [np.empty(0)] * len(header.signals)
    for file_name, members in groups.items():
        block = decoded[file_name][:n]
        column = 0
        for i in members:
            sig = header.signals[i]
            d = block[:, column:column + sig.samples_per_frame].reshape(-1)
            column += sig.samples_per_frame
            if n == n_declared and sig.checksum is not None:
                # The header checksum is the 16-bit two's complement sum of all samples.
                total = int(d.sum()) & 0xFFFF
                expected = sig.checksum & 0xFFFF
                if total != expected:
                    signed_total = total - 0x10000 if total >= 0x8000 else total
                    logger.warning(
                        "%s: signal %r fails its header checksum (%d, file gives %d); "
                        "the signal file may be corrupt",
                        header_path, sig.description, sig.checksum, signed_total,
                    )
            physical = (d.astype(np.float64) - sig.baseline) / sig.gain
            invalid_marker = -(1 << (_BITS[sig.fmt] - 1))
            physical[d == invalid_marker] = np.nan
            signals[i] = physical
    return signals, n_declared


@dataclass(frozen=True)
class Annotations:
    """MIT-format annotations: ``samples`` (int64 sample indices), ``codes`` (int)
    and ``fs`` (Hz, the time resolution of ``samples``)."""

    samples: np.ndarray
    codes: np.ndarray
    fs: float

    def beat_times_s(self) -> np.ndarray:
        """Times in seconds of the annotations whose code is in :data:`BEAT_CODES`."""
        is_beat = np.isin(self.codes, list(BEAT_CODES))
        return self.samples[is_beat].astype(np.float64) / self.fs


def read_annotations(path: str | Path, fs: float) -> Annotations:
    """Read an MIT-format annotation file.

    Parameters
    ----------
    path : str or Path
        The annotation file, e.g. ``100.atr``.
    fs : float
        The record's sampling rate; used unless the file starts with a
        ``## time resolution: F`` note, which sets the resolution of its sample times.

    Returns
    -------
    Annotations
        Every annotation (beats and non-beats) in file order.

    Raises
    ------
    InputError
        When the file cannot be read. A file that ends without the end marker (cut short)
        keeps the annotations read so far and logs a warning.

    Notes
    -----
    Word layout (SOURCE.md of the record 100 data): little-endian 16-bit words; code =
    ``w >> 10``, time increment = ``w & 0x3FF``; code 59 (SKIP) is followed by a 32-bit
    increment as two words, high word first; 63 (AUX) carries ``w & 0x3FF`` bytes of text
    padded to whole words; 60/61/62 (NUM/SUB/CHN) carry a field value and no time
    advance; the word 0 ends the file.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: cannot read the annotation file: {exc.strerror}") from None
    words = np.frombuffer(raw[: len(raw) // 2 * 2], dtype="<u2").tolist()
    samples: list[int] = []
    codes: list[int] = []
    aux_of_first: bytes | None = None
    t = 0
    i = 0
    n_words = len(words)
    ended = False
    while i < n_words:
        w = words[i]
        if w == 0:
            ended = True
            break
        code, value = w >> 10, w & 0x3FF
        if code == _SKIP:
            if i + 2 >= n_words:
                break
            skip = (words[i + 1] << 16) | words[i + 2]
            if skip >= 1 << 31:
                skip -= 1 << 32
            t += skip
            i += 3
        elif code in (_NUM, _SUB, _CHN):
            i += 1
        elif code == _AUX:
            n_aux_words = (value + 1) // 2
            if len(codes) == 1 and aux_of_first is None:
                aux_of_first = raw[2 * (i + 1): 2 * (i + 1) + value]
            i += 1 + n_aux_words
        else:
            t += value
            samples.append(t)
            codes.append(code)
            i += 1
    if not ended:
        logger.warning(
            "%s: annotation file ends without its end marker (truncated?); using the %d "
            "annotations read", path, len(codes),
        )
    ann_fs = fs
    time_note = b"## time resolution:"
    if codes and codes[0] == _NOTE and aux_of_first and aux_of_first.startswith(time_note):
        try:
            ann_fs = float(aux_of_first.split(b":", 1)[1].strip(b" \x00"))
        except ValueError:
            pass
    return Annotations(np.asarray(samples, dtype=np.int64), np.asarray(codes, dtype=np.int64),
                       ann_fs)
