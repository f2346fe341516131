"""Several live LSL streams in one run: the devices of a lab session as one source.

``ridgewatch live --name A --name B --name C`` reads every stream the options select:

* **Numeric streams** (a nominal rate, numbers) each get their own
  :class:`~streamer.sources.lsl_source.LslSource` (its inlet, loss and comeback rules,
  burst learning, gap and order checks) running in its own thread. Their chunks meet in
  a :class:`~streamer.sources.merge.GridMerger`, which puts them on the grid of the
  fastest stream; :class:`LslSession` yields the merged samples as ordinary chunks of the
  merged :class:`~streamer.sources.base.SourceInfo`, so the runner and the engine do not
  know there were several streams. Channels are called ``LABEL`` when the label is
  unique and ``STREAM/LABEL`` otherwise (:func:`~streamer.sources.merge.merged_channels`).
* **Marker streams** (text samples, or type ``Markers`` with an irregular rate) are read
  by a :class:`MarkerReader` in its own thread and come out as
  :class:`~streamer.sources.base.Marker` items, ``source`` the stream's name, ``text``
  the sample unchanged (several channels are joined with ``" | "``).

Time axis
---------
Every inlet runs with ``proc_clocksync``: liblsl adds its running estimate of the offset
between the sender's clock and ours (``time_correction``, measured again every 2 s) to
each timestamp, so two devices with different clocks land on our one clock; the merger
then interpolates each stream on its own corrected timestamps.

Loss and return, per stream
---------------------------
* A numeric stream lost while others run: a ``"lost"`` event naming it
  (``detail["stream"]``, and ``detail["others_running"]`` True, so the displays do not
  call the whole session lost), the merger stops waiting for it and its channels read NaN,
  which the engine treats as rejected samples (held at the last good value, lower
  quality) while every other channel carries on. When it comes back, a ``"resumed"``
  event; ``detail["restart"]`` is False for a stream of accelerometer channels only, so
  the estimates are not restarted for a motion reference coming back.
* A stream that sends nothing for longer than its silence limit
  (:attr:`~streamer.sources.lsl_source.LslSource.silence_limit_s`, which learns a
  buffering sender's rhythm) stops holding the others back; a stream that has sent
  nothing at all that long after the first samples of another gets an ``"irregular"``
  event saying so. Its samples are used again as soon as they flow.
* A marker stream lost: a ``"lost"`` event (``detail["others_running"]`` True: the
  numbers go on), and it is looked for again; markers are never held back.
"""

from __future__ import annotations

import math
import queue
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Iterator

import pylsl
from pylsl.util import LostError
from pylsl.util import TimeoutError as LslTimeoutError

from estimators.errors import ParameterError
from streamer.channels import guess_kind
from streamer.errors import InputError
from streamer.sources.base import Chunk, Item, Marker, SourceEvent
from streamer.sources.lsl_source import (
    _NUMERIC_FORMATS,
    PRESENCE_S,
    LslSource,
    _list_streams,
    _resolve,
    _unique_by_uid,
    build_predicate,
    describe_stream,
)
from streamer.sources.merge import GridMerger

MARKER_TYPE = "markers"
"""Stream type (lower case) of event-marker streams by the usual LSL convention (from
memory); a text stream of any type is read as markers too."""

_JOIN = " | "
_DONE = object()


@dataclass(frozen=True)
class Criterion:
    """What to look for: stream properties that must all match (one ``--name``,
    ``--type`` or ``--source-id``, or today's combination of one of each)."""

    name: str | None = None
    type: str | None = None
    source_id: str | None = None

    @property
    def predicate(self) -> str:
        return build_predicate(self.name, self.type, self.source_id)


def criteria_from_options(names: list[str] | None, types: list[str] | None,
                          source_ids: list[str] | None) -> list[Criterion]:
    """The streams the ``live`` options ask for.

    Each option given at most once: one stream matching all of them (a single
    ``--name`` behaves as it always did, and ``--name X --source-id Y`` still picks one
    of several streams called X). Any option given twice or more: every value selects
    its own stream(s).

    >>> criteria_from_options(["band"], None, ["dev1"])
    [Criterion(name='band', type=None, source_id='dev1')]
    >>> [c.predicate for c in criteria_from_options(["a", "b"], ["Markers"], None)]
    ["name='a'", "name='b'", "type='Markers'"]
    """
    names, types, source_ids = names or [], types or [], source_ids or []
    if max(len(names), len(types), len(source_ids)) <= 1:
        return [Criterion(names[0] if names else None, types[0] if types else None,
                          source_ids[0] if source_ids else None)]
    return ([Criterion(name=n) for n in names] + [Criterion(type=t) for t in types]
            + [Criterion(source_id=s) for s in source_ids])


def is_marker_stream(info: pylsl.StreamInfo) -> bool:
    """Text samples, or numbers of type ``Markers`` at an irregular rate."""
    if info.channel_format() not in _NUMERIC_FORMATS:
        return True
    return info.type().strip().lower() == MARKER_TYPE and not info.nominal_srate() > 0


def resolve_all(criteria: list[Criterion], timeout_s: float,
                extra_wait_s: float = 0.5) -> list[pylsl.StreamInfo]:
    """Every stream matching any criterion (all matches of each, each stream once, in
    the order of the criteria). All criteria are looked for at the same time.

    Raises
    ------
    InputError
        A criterion matches no stream within ``timeout_s``; the message names it and
        lists the streams seen, as for a single stream.
    """
    def look(criterion: Criterion) -> list[pylsl.StreamInfo]:
        found = _resolve(criterion.predicate, 1, timeout_s)
        if found and extra_wait_s > 0:
            found = _unique_by_uid(
                found + _resolve(criterion.predicate, len(found) + 1, extra_wait_s))
        return found

    with ThreadPoolExecutor(max_workers=len(criteria)) as pool:
        results = list(pool.map(look, criteria))
    missing = [c.predicate or "any stream" for c, found in zip(criteria, results) if not found]
    if missing:
        wanted = " nor ".join(missing)
        seen = _unique_by_uid(pylsl.resolve_streams(wait_time=1.0))
        if seen:
            raise InputError(
                f"no LSL stream matches {wanted} within {timeout_s:g} s; streams "
                f"seen: {_list_streams(seen)}; pick one with --name/--type/--source-id")
        raise InputError(
            f"no LSL stream matches {wanted} within {timeout_s:g} s, and there are "
            f"no LSL streams at all on this network; start the sender first")
    return _unique_by_uid([info for found in results for info in found])


class MarkerReader:
    """One marker stream: its inlet, loss and comeback; :meth:`run` puts ``Marker`` and
    ``SourceEvent`` items on a queue until :meth:`close`.

    Marker streams are silent most of the time, so only a broken connection (liblsl's
    ``lost_error``) counts as a loss; the stream is then looked for again by its
    ``source_id`` (by name and machine when it has none).
    """

    def __init__(self, resolved: pylsl.StreamInfo, timeout_s: float = 5.0,
                 poll_s: float = 0.02):
        self.name = resolved.name()
        self.source_id = resolved.source_id()
        self._hostname = resolved.hostname()
        self._poll_s = float(poll_s)
        self._stop = threading.Event()
        self._numeric = resolved.channel_format() in _NUMERIC_FORMATS
        try:
            self._inlet = self._open(resolved, timeout_s)
        except (LostError, LslTimeoutError):
            raise InputError(
                f"LSL stream {describe_stream(resolved)} was found but did not answer "
                f"within {timeout_s:g} s; check that the sender is still running and "
                f"that no firewall blocks LSL's TCP ports") from None
        self._uid = resolved.uid()

    @staticmethod
    def _open(resolved: pylsl.StreamInfo, timeout_s: float) -> pylsl.StreamInlet:
        inlet = pylsl.StreamInlet(resolved, max_buflen=60, recover=False,
                                  processing_flags=pylsl.proc_clocksync)
        inlet.open_stream(timeout=timeout_s)
        inlet.time_correction(timeout=timeout_s)
        inlet.info(timeout=timeout_s)
        return inlet

    def _text(self, sample) -> str:
        values = [f"{v:g}" if self._numeric else str(v) for v in sample]
        return values[0] if len(values) == 1 else _JOIN.join(values)

    def run(self, put) -> None:
        """Read until :meth:`close`; ``put(item)`` receives markers and events."""
        predicate = (build_predicate(None, None, self.source_id) if self.source_id
                     else build_predicate(self.name, None, None))
        resolver = None
        rejected: set[str] = set()
        try:
            while not self._stop.is_set():
                if self._inlet is not None:
                    try:
                        samples, stamps = self._inlet.pull_chunk(timeout=0.0)
                    except LostError:
                        rejected.add(self._uid)
                        self._inlet.close_stream()
                        self._inlet = None
                        put(SourceEvent("lost", f"marker stream '{self.name}' lost; "
                                        f"waiting for it to come back", math.nan,
                                        {"stream": self.name, "others_running": True}))
                        resolver = pylsl.ContinuousResolver(pred=predicate,
                                                            forget_after=PRESENCE_S)
                        continue
                    for sample, stamp in zip(samples, stamps):
                        put(Marker(float(stamp), self._text(sample), self.name))
                    if samples:
                        continue
                elif resolver is not None:
                    for candidate in resolver.results():
                        if candidate.uid() in rejected or (
                                not self.source_id and candidate.hostname() != self._hostname):
                            continue
                        try:
                            self._inlet = self._open(candidate, 1.0)
                        except (LostError, LslTimeoutError):
                            continue
                        self._uid = candidate.uid()
                        resolver = None
                        put(SourceEvent("resumed", f"marker stream '{self.name}' is back",
                                        math.nan, {"stream": self.name, "restart": False}))
                        break
                self._stop.wait(self._poll_s)
        finally:
            if self._inlet is not None:
                self._inlet.close_stream()
                self._inlet = None

    def close(self) -> None:
        self._stop.set()


class LslSession:
    """Several LSL streams as one :class:`~streamer.sources.base.Source` (see the module
    notes).

    Parameters
    ----------
    criteria : the streams to read (:func:`criteria_from_options`); each must match at
        least one stream within ``timeout_s``; every match is read.
    timeout_s : how long to look for the streams (all at the same time).
    lost_after_s, presence_s, gap_tolerance_s, poll_s : per numeric stream, as for
        :class:`~streamer.sources.lsl_source.LslSource`.
    extra_wait_s : after a criterion's first match, how long to listen for more.

    Raises
    ------
    InputError
        A criterion matches nothing (the message names it and lists what was seen), no
        numeric stream among the matches, a numeric stream without a nominal rate, or a
        stream found that does not answer.
    """

    def __init__(self, criteria: list[Criterion], timeout_s: float = 5.0,
                 lost_after_s: float = 2.0, presence_s: float = PRESENCE_S,
                 gap_tolerance_s: float = 0.05, poll_s: float = 0.005,
                 extra_wait_s: float = 0.5):
        if not criteria:
            raise ParameterError("criteria must name at least one stream")
        if not timeout_s > 0:
            raise ParameterError(f"{timeout_s=} must be > 0")
        if not poll_s > 0:
            raise ParameterError(f"{poll_s=} must be > 0")
        found = resolve_all(criteria, timeout_s, extra_wait_s)
        numeric = [i for i in found if not is_marker_stream(i)]
        markers = [i for i in found if is_marker_stream(i)]
        if not numeric:
            raise InputError(
                f"the LSL streams found ({_list_streams(found)}) all carry markers; add a "
                f"stream of samples (PPG, ECG, respiration) with --name/--type/--source-id")
        for resolved in numeric:
            if not resolved.nominal_srate() > 0:
                raise InputError(
                    f"LSL stream '{resolved.name()}' has an irregular sampling rate; "
                    f"ridgewatch needs a stream with a nominal rate")
        self._poll_s = float(poll_s)
        self._stop = threading.Event()
        self._queue: queue.Queue = queue.Queue()
        self._threads: list[threading.Thread] = []
        self.streams: list[LslSource] = []
        self.markers: list[MarkerReader] = []
        try:
            for resolved in numeric:
                self.streams.append(LslSource(
                    name=resolved.name(), timeout_s=timeout_s, lost_after_s=lost_after_s,
                    presence_s=presence_s, gap_tolerance_s=gap_tolerance_s,
                    poll_s=poll_s, extra_wait_s=0.0, resolved=resolved))
            for resolved in markers:
                self.markers.append(MarkerReader(resolved, timeout_s))
        except BaseException:
            self.close()
            raise
        self.merger = GridMerger([s.info for s in self.streams])
        self.info = self.merger.info
        self._holding = [True] * len(self.streams)  # whether the grid waits for stream k
        self._lost = [False] * len(self.streams)
        self._motion_only = [
            all((c.kind or guess_kind(c.name)) == "acc" for c in s.info.channels)
            for s in self.streams]

    # -- threads ----------------------------------------------------------------------
    def _pump(self, k: int, source: LslSource) -> None:
        try:
            for item in source.chunks():
                self._queue.put((k, item))
        except BaseException as exc:  # handed to the consumer, raised there
            self._queue.put((k, exc))
        finally:
            self._queue.put((k, _DONE))

    def _start(self) -> None:
        for k, source in enumerate(self.streams):
            thread = threading.Thread(target=self._pump, args=(k, source), daemon=True,
                                      name=f"ridgewatch-lsl-{source.info.name}")
            self._threads.append(thread)
        for reader in self.markers:
            thread = threading.Thread(
                target=reader.run, args=(lambda item: self._queue.put((None, item)),),
                daemon=True, name=f"ridgewatch-markers-{reader.name}")
            self._threads.append(thread)
        for thread in self._threads:
            thread.start()

    # -- the Source protocol ----------------------------------------------------------
    def chunks(self) -> Iterator[Item]:
        """Merged chunks, markers and per-stream events until :meth:`close`."""
        if self._stop.is_set():
            return
        self._start()
        n = len(self.streams)
        # A stream's silence is counted from its last delivery, or, before its first,
        # from the first delivery of any stream: senders that all start late hold
        # nothing back, and a stream that never sends does not block the others.
        last_delivery = [math.inf] * n
        delivered = [False] * n
        told_silent = [False] * n
        running = n
        try:
            while not self._stop.is_set() and running:
                try:
                    k, item = self._queue.get(timeout=self._poll_s)
                except queue.Empty:
                    k, item = None, None
                if item is _DONE:
                    running -= 1
                    continue
                if isinstance(item, BaseException):
                    raise item
                if isinstance(item, Chunk):
                    self.merger.push(k, item.samples, item.timestamps)  # active again
                    self._holding[k] = True
                    now = time.monotonic()
                    if not any(delivered):
                        last_delivery = [now] * n
                    last_delivery[k], delivered[k] = now, True
                elif isinstance(item, SourceEvent) and k is not None:
                    yield self._stream_event(k, item)
                elif item is not None:  # a marker, or a marker stream's event
                    yield item
                now = time.monotonic()
                for j, source in enumerate(self.streams):
                    if now - last_delivery[j] > source.silence_limit_s and self._holding[j]:
                        self._release(j)
                        if not delivered[j] and not told_silent[j]:
                            told_silent[j] = True
                            yield SourceEvent(
                                "irregular",
                                f"stream '{source.info.name}' has sent no samples for "
                                f"{source.silence_limit_s:.3g} s; continuing with the other "
                                f"streams without it", math.nan,
                                {"stream": source.info.name})
                samples, grid = self.merger.pull()
                if len(grid):
                    yield Chunk(samples, grid)
        finally:
            self.close()

    def _release(self, k: int) -> None:
        """Stream ``k`` stops holding the grid back (lost or silent); its next samples
        make it count again."""
        self.merger.set_active(k, False)
        self._holding[k] = False

    def _stream_event(self, k: int, event: SourceEvent) -> SourceEvent:
        """A numeric stream's own event, told as part of the session."""
        name = self.streams[k].info.name
        detail = dict(event.detail, stream=name)
        message = event.message
        if event.kind == "lost":
            self._release(k)
            self._lost[k] = True
            others = [s.info.name for j, s in enumerate(self.streams)
                      if j != k and not self._lost[j]]
            detail["others_running"] = bool(others)
            if others and message.endswith("waiting for it to come back"):
                message = (f"stream '{name}' lost; continuing without it (its channels read "
                           f"NaN) and waiting for it to come back")
        elif event.kind == "resumed":
            self._lost[k] = False
            detail["restart"] = not self._motion_only[k]
        return SourceEvent(event.kind, message, event.time_s, detail)

    def close(self) -> None:
        """End :meth:`chunks` and release every inlet (safe from any thread, repeatable)."""
        self._stop.set()
        for source in self.streams:
            source.close()
        for reader in self.markers:
            reader.close()
        current = threading.current_thread()
        for thread in self._threads:
            if thread is not current:
                thread.join(timeout=3.0)

    def __enter__(self) -> "LslSession":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
