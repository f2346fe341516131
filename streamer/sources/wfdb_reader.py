"""WFDB records through the ``wfdb`` package: header, signal files and annotation files.

The ``wfdb`` package (PhysioNet's own Python reader) decodes the signal files: every
format it reads, :data:`SUPPORTED_FORMATS`, including the FLAC-compressed formats 508,
516 and 524 (through ``soundfile``, which ``wfdb`` depends on), records whose signals
have different samples per frame (multi-frequency records), skewed signals and byte
offsets. This module adds what a command-line tool needs around it:

* one :class:`~streamer.errors.InputError` line naming the file and what is wrong, for
  every problem ``wfdb`` would raise as an assorted exception (or read leniently: a
  record line that does not parse, a gain ``2x0`` read as 2, a header with fewer signal
  lines than it declares);
* a signal file cut short keeps its complete frames, with a warning, as does an
  annotation file that ends without its end marker;
* a header checksum that the samples fail is reported as a warning;
* :func:`on_fastest_grid`: signals at different rates onto one time axis.

``wfdb`` is imported inside the functions that need it, so that starting ridgewatch
(``ridgewatch --help``, a CSV replay, a live stream) does not pay for its import
(see DEVELOPERS.md, "Dependencies and what they cost").

Physical value = ``(d - baseline) / gain``; the smallest value of a format (e.g. -2048
for format 212, -32768 for formats 16 and 516) marks an invalid sample and becomes NaN
(``wfdb``'s convention, the WFDB one from memory). A frequency field of 0 or none means
250 Hz, a gain of 0 or none 200 (``wfdb`` and WFDB defaults, from memory).

The byte-by-byte twin this reader is tested against is ``tests/reference/wfdb_plain.py``.
"""

from __future__ import annotations

import contextlib
import logging
import os
import re
import tempfile
import warnings
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np

from streamer.errors import InputError

logger = logging.getLogger("ridgewatch")

#: The signal formats ``wfdb`` 4.x reads (``wfdb.io._signal.DAT_FMTS``); 508, 516, 524 are
#: FLAC streams of 8, 16 and 24 bits.
SUPPORTED_FORMATS = (8, 16, 24, 32, 61, 80, 160, 212, 310, 311, 508, 516, 524)
FLAC_FORMATS = (508, 516, 524)

#: Bits one sample takes in a signal file of each uncompressed format (310 and 311 pack
#: three samples into 32 bits).
_STORED_BITS = {8: Fraction(8), 16: Fraction(16), 24: Fraction(24), 32: Fraction(32),
         61: Fraction(16), 80: Fraction(8), 160: Fraction(16), 212: Fraction(12),
         310: Fraction(32, 3), 311: Fraction(32, 3)}

#: Resolution in bits of the samples of each format (its invalid marker is -2**(bits-1)).
_BITS_OF_FORMAT = {8: 8, 16: 16, 24: 24, 32: 32, 61: 16, 80: 8, 160: 16, 212: 12,
                   310: 10, 311: 10, 508: 8, 516: 16, 524: 24}

#: Header default when the frequency field is absent or zero (from memory: WFDB's DEFFREQ).
DEFAULT_FS = 250.0

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

_FORMAT_RE = re.compile(r"^(\d+)(?:x(\d+))?(?::(\d+))?(?:\+(\d+))?$")
_GAIN_RE = re.compile(r"^[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?(\([-+]?\d+\))?(/.*)?$")


@dataclass(frozen=True)
class WfdbSignal:
    """One signal of a record: its label (``description``), unit, signal file, format,
    samples per frame, the byte offset of its samples in the signal file and its skew
    (frames by which its samples are late in the file)."""

    description: str
    units: str
    file_name: str
    fmt: int
    samples_per_frame: int = 1
    byte_offset: int = 0
    skew: int = 0


@dataclass(frozen=True)
class WfdbHeader:
    """The header of a single-segment record. ``fs`` is the frame rate in Hz; signal
    ``j`` is sampled at ``fs * signals[j].samples_per_frame`` (:attr:`signal_rates`).
    ``n_samples`` is the number of frames the header declares (None when it does not)."""

    path: Path
    record_name: str
    fs: float
    n_samples: int | None
    signals: tuple[WfdbSignal, ...]

    @property
    def signal_rates(self) -> tuple[float, ...]:
        return tuple(self.fs * s.samples_per_frame for s in self.signals)


def read_header(path: str | Path) -> WfdbHeader:
    """Read a ``.hea`` file.

    The record line and the signal lines' file and format fields are checked here first,
    because ``wfdb`` reads some malformed headers without complaint (a frequency field
    ``abc``, fewer signal lines than declared) and others with an unrelated exception;
    ``wfdb.rdheader`` then reads the rest.

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
        When the header cannot be read or is malformed, describes a multi-segment record,
        a signal without a signal file, or a signal format ``wfdb`` does not read.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="latin-1")
    except OSError as exc:
        raise InputError(f"{path}: cannot read the WFDB header: {exc.strerror}") from None
    lines = [(line_no, raw.strip()) for line_no, raw in enumerate(text.splitlines(), start=1)
             if raw.strip() and not raw.strip().startswith("#")]
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
    if not fs > 0:
        fs = DEFAULT_FS
    if n_sig < 1:
        raise InputError(f"{path}: WFDB header declares no signals; nothing to read")
    if len(lines) - 1 < n_sig:
        raise InputError(
            f"{path}: WFDB header declares {n_sig} signals but has {len(lines) - 1} signal "
            "lines; the header is incomplete"
        )
    for index, (line_no, line) in enumerate(lines[1:1 + n_sig]):
        _check_signal_line(f"{path}: line {line_no}", line, index)

    wfdb = _import_wfdb()

    try:
        with _quiet():
            header = wfdb.rdheader(str(path.with_suffix("")))
    except Exception as exc:  # wfdb raises assorted types for a malformed header
        raise InputError(f"{path}: malformed WFDB header ({_reason(exc)}); "
                         "check the header against the WFDB format") from None
    signals = tuple(
        WfdbSignal(
            description=header.sig_name[i] if header.sig_name[i] else f"ch{i}",
            units=header.units[i] if header.units[i] else "mV",
            file_name=header.file_name[i],
            fmt=int(header.fmt[i]),
            samples_per_frame=int(header.samps_per_frame[i] or 1),
            byte_offset=int(header.byte_offset[i] or 0),
            skew=int(header.skew[i] or 0),
        )
        for i in range(n_sig)
    )
    return WfdbHeader(path, tokens[0], fs, n_samples, signals)


def _check_signal_line(where: str, line: str, index: int) -> None:
    tokens = line.split()
    if len(tokens) < 2:
        raise InputError(f"{where}: signal line {line!r} lacks a format field")
    if tokens[0] == "~":
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
    if m.group(2) is not None and int(m.group(2)) < 1:
        raise InputError(f"{where}: {m.group(2)} samples per frame; must be at least 1")
    # wfdb drops what its patterns do not match ("2x0" is read as a gain of 2).
    if len(tokens) > 2 and not _GAIN_RE.match(tokens[2]):
        raise InputError(f"{where}: cannot parse the gain field {tokens[2]!r}")
    for position, name in ((3, "ADC resolution"), (4, "ADC zero"), (5, "initial value"),
                           (6, "checksum"), (7, "block size")):
        if len(tokens) > position and not re.fullmatch(r"[-+]?\d+", tokens[position]):
            raise InputError(f"{where}: cannot parse the {name} field {tokens[position]!r}")


@contextlib.contextmanager
def _quiet():
    """Silence the deprecation warnings wfdb 4.3 triggers in pandas: not the user's concern."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", FutureWarning)
        yield


def _import_wfdb():
    """The wfdb package, imported on first use (its import costs; see DEVELOPERS.md)."""
    with _quiet():  # its import alone builds pandas tables in deprecated ways
        import wfdb
    return wfdb


def _reason(exc: BaseException) -> str:
    """An exception as a short clause on one line."""
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def read_signals(header: WfdbHeader, given: str | Path = "") -> list[np.ndarray]:
    """Read every signal of a record in physical units, each at its own rate.

    Parameters
    ----------
    header : WfdbHeader
        From :func:`read_header`; the signal files are beside its file.
    given : str or Path, optional
        The record as the user named it, for messages (default: the header path).

    Returns
    -------
    list of ndarray
        Signal ``j`` as float64, ``n_frames * samples_per_frame_j`` samples; sample ``k``
        sits at ``k / header.signal_rates[j]`` seconds. NaN where the digital value is
        the format's invalid marker. ``n_frames`` is what the header declares, or less
        when a signal file is cut short: the frames that every file holds completely,
        with a warning.

    Raises
    ------
    InputError
        When a signal file is missing, unreadable, holds not a single complete frame, or
        ``wfdb`` fails on it (a damaged FLAC stream, a header that contradicts the file).
    """
    given = str(given or header.path)
    n_available = _complete_frames(header, given)
    n_declared = header.n_samples if header.n_samples is not None else n_available
    n_frames = min(n_available, n_declared)
    try:
        record = _read_frames(header, n_frames)
    except Exception as exc:  # wfdb and soundfile raise assorted types
        # A FLAC stream cut short announces all its samples but cannot decode them all:
        # read the samples it does decode.
        n_decodable = _decodable_flac_frames(header)
        if n_decodable is None or n_decodable >= n_frames:
            raise _decode_error(header, given, exc) from None
        n_frames = n_decodable
        record = None
    if n_frames == 0:
        raise InputError(
            f"{given}: the signal file holds no complete sample (file empty or "
            "truncated); nothing to read"
        )
    if n_frames < n_declared:
        logger.warning(
            "%s: the signal file holds %d of the %d samples the header declares "
            "(truncated file); reading the first %d samples",
            given, n_frames, n_declared, n_frames,
        )
    if record is None:
        try:
            record = _read_frames(header, n_frames)
        except Exception as exc:
            raise _decode_error(header, given, exc) from None
    physical = [np.asarray(x, dtype=np.float64) for x in record.e_p_signal]
    if n_frames == n_declared:
        _check_checksums(physical, record, header, given)
    return physical


def _read_frames(header: WfdbHeader, n_frames: int):
    """The first ``n_frames`` frames, physical values, each signal at its own rate.

    Physical values straight from wfdb: wfdb 4.3.1 fails to return the digital samples of
    format 61 (it cannot convert their big-endian dtype).
    """
    if n_frames == 0:
        return None
    wfdb = _import_wfdb()
    with _quiet():
        return wfdb.rdrecord(str(header.path.with_suffix("")), sampto=n_frames,
                             physical=True, smooth_frames=False, return_res=64)


def _decode_error(header: WfdbHeader, given: str, exc: BaseException) -> InputError:
    files = ", ".join(sorted({s.file_name for s in header.signals}))
    return InputError(
        f"{given}: cannot decode the signal file(s) {files} ({_reason(exc)}); the "
        "file is damaged or does not match its header"
    )


def _decodable_flac_frames(header: WfdbHeader) -> int | None:
    """Frames that every FLAC signal file of the record decodes (None without FLAC
    files): its samples are decoded in blocks until the end or the first block that
    fails, so a stream cut short gives the samples before the cut, less at most one
    block (:data:`_FLAC_BLOCK`) and the FLAC frame the cut falls in."""
    import soundfile

    n_frames = None
    flac_files = {s.file_name: s for s in header.signals if s.fmt in FLAC_FORMATS}
    for sig in flac_files.values():  # one FLAC file holds signals of one rate
        n_samples = 0
        try:
            with soundfile.SoundFile(str(header.path.parent / sig.file_name)) as stream:
                while True:
                    block = stream.read(_FLAC_BLOCK, dtype="int32")
                    if len(block) == 0:
                        break
                    n_samples += len(block)
        except Exception:  # soundfile raises its own error types at the damage
            pass
        frames = n_samples // sig.samples_per_frame
        n_frames = frames if n_frames is None else min(n_frames, frames)
    return n_frames


#: Samples per read when counting what a damaged FLAC stream decodes.
_FLAC_BLOCK = 1024


def _complete_frames(header: WfdbHeader, given: str) -> int:
    """Frames that every signal file holds completely (its size, or its FLAC stream
    information)."""
    members: dict[str, list[int]] = {}
    for i, sig in enumerate(header.signals):
        members.setdefault(sig.file_name, []).append(i)
    n_frames = []
    for file_name, indices in members.items():
        file_path = header.path.parent / file_name
        fmts = {header.signals[i].fmt for i in indices}
        offsets = {header.signals[i].byte_offset for i in indices}
        if len(fmts) > 1 or len(offsets) > 1:
            raise InputError(
                f"{given}: signals in {file_name} mix formats or byte offsets; not supported"
            )
        fmt, offset = fmts.pop(), offsets.pop()
        samples_per_frame = sum(header.signals[i].samples_per_frame for i in indices)
        try:
            with open(file_path, "rb") as fh:
                size = os.fstat(fh.fileno()).st_size
        except FileNotFoundError:
            raise InputError(
                f"{given}: signal file {file_path} is missing; keep the .dat file "
                "beside the .hea file"
            ) from None
        except OSError as exc:
            raise InputError(f"{file_path}: cannot read: {exc.strerror}") from None
        if fmt in FLAC_FORMATS:
            n_frames.append(_flac_frames(file_path, size, header.signals[indices[0]]))
        else:
            bits = max(0, size - offset) * 8
            n_frames.append(max(0, int(bits // (_STORED_BITS[fmt] * samples_per_frame))))
    return min(n_frames)


def _flac_frames(file_path: Path, size: int, signal: WfdbSignal) -> int:
    """Frames in a FLAC signal file, from its stream information block."""
    if size == 0:
        return 0
    import soundfile

    try:
        n_samples = soundfile.info(str(file_path)).frames
    except Exception as exc:  # soundfile raises its own error types
        raise InputError(
            f"{file_path}: not a readable FLAC stream (format {signal.fmt}: {_reason(exc)}); "
            "the file is damaged or is not the one the header names"
        ) from None
    return n_samples // signal.samples_per_frame


def _check_checksums(physical: list[np.ndarray], record, header: WfdbHeader,
                     given: str) -> None:
    """Warn about each signal whose samples fail the header checksum (the 16-bit two's
    complement sum of its digital samples, from memory).

    The digital samples are recovered from the physical ones, ``d = g x + b`` rounded
    (exact: ``|d| < 2**24`` and float64 carries 53 bits), invalid samples as the format's
    marker value. Skewed signals are not checked: wfdb pads their last ``skew`` samples
    with the invalid marker.
    """
    for j, (sig, expected) in enumerate(zip(header.signals, record.checksum)):
        if expected is None or sig.skew:
            continue
        x = physical[j]
        d = np.rint(x * record.adc_gain[j] + record.baseline[j])
        invalid = -(1 << (int(_BITS_OF_FORMAT[sig.fmt]) - 1))
        d[np.isnan(x)] = invalid
        total = int(d.astype(np.int64).sum()) & 0xFFFF
        if total == int(expected) & 0xFFFF:
            continue
        signed_total = total - 0x10000 if total >= 0x8000 else total
        logger.warning(
            "%s: signal %r fails its header checksum (%d, file gives %d); "
            "the signal file may be corrupt",
            given, sig.description, expected, signed_total,
        )


def on_fastest_grid(values: list[np.ndarray], rates: list[float]
                    ) -> tuple[np.ndarray, np.ndarray, float]:
    """Put signals sampled at different rates on the time grid of the fastest one.

    Parameters
    ----------
    values : list of ndarray
        One 1-d array per signal; sample ``k`` of signal ``j`` sits at ``k / rates[j]``
        seconds (as in a WFDB record, whose frames align the signals exactly).
    rates : list of float
        Each signal's rate in Hz.

    Returns
    -------
    samples : ndarray, shape (n, len(values)), float64
        Column ``j`` is signal ``j`` on the grid ``t_k = k / fs``: its own samples where
        its rate is ``fs``, otherwise linearly interpolated between its own sample times;
        NaN past its last sample.
    timestamps : ndarray, shape (n,)
        ``k / fs``.
    fs : float
        The fastest rate.

    Notes
    -----
    Linear interpolation is chosen for its lack of overshoot; it attenuates a component
    at frequency ``f`` of a signal sampled at ``r`` by at most ``sinc^2(f / r)`` (from
    memory), 0.985 for a 3 Hz pulse sampled at 62.5 Hz, so the rates the engine estimates
    are unaffected. A small function of its own so that a general merge of streams of
    different rates can replace it.
    """
    fs = max(rates)
    n = max(round(len(v) * fs / r) for v, r in zip(values, rates))
    timestamps = np.arange(n, dtype=np.float64) / fs
    samples = np.full((n, len(values)), np.nan, dtype=np.float64)
    for j, (v, r) in enumerate(zip(values, rates)):
        if r == fs:
            samples[: len(v), j] = v
        else:
            own_times = np.arange(len(v), dtype=np.float64) / r
            samples[:, j] = np.interp(timestamps, own_times, v, left=np.nan, right=np.nan)
    return samples, timestamps, fs


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


_TIME_NOTE = b"## time resolution:"


def read_annotations(path: str | Path, fs: float) -> Annotations:
    """Read an MIT-format annotation file with ``wfdb.rdann``.

    Parameters
    ----------
    path : str or Path
        The annotation file, e.g. ``100.atr``.
    fs : float
        The record's frame rate; used unless the file starts with a
        ``## time resolution: F`` note, which sets the resolution of its sample times.

    Returns
    -------
    Annotations
        Every annotation (beats and non-beats) in file order; notes that describe the
        file itself (the time-resolution note, label definitions) are left out.

    Raises
    ------
    InputError
        When the file cannot be read or ``wfdb`` cannot decode it. A file that ends
        without the end marker (cut short) keeps the annotations read so far and logs a
        warning.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: cannot read the annotation file: {exc.strerror}") from None
    raw = raw[: len(raw) // 2 * 2]
    ended = raw.endswith(b"\x00\x00") or not raw
    wfdb = _import_wfdb()

    try:
        with tempfile.TemporaryDirectory(prefix="ridgewatch-ann-") as folder:
            if ended:
                record, extension = str(path.parent / path.stem), path.suffix[1:]
            else:
                # wfdb drops the last annotation of a file without its end marker: read
                # a copy that has one.
                record, extension = str(Path(folder) / "cut"), "ann"
                (Path(folder) / "cut.ann").write_bytes(raw + b"\x00\x00")
            with _quiet():
                ann = wfdb.rdann(record, extension, return_label_elements=["label_store"])
    except Exception as exc:  # wfdb raises assorted types for a damaged file
        raise InputError(f"{path}: cannot decode the annotation file ({_reason(exc)}); "
                         "the file is damaged or not in the MIT annotation format") from None
    if not ended:
        logger.warning(
            "%s: annotation file ends without its end marker (truncated?); using the %d "
            "annotations read", path, len(ann.sample),
        )
    ann_fs = float(ann.fs) if _TIME_NOTE in raw[:64] and ann.fs else fs
    return Annotations(np.asarray(ann.sample, dtype=np.int64),
                       np.asarray(ann.label_store, dtype=np.int64), ann_fs)
