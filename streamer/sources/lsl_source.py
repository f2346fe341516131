"""Live input from a Lab Streaming Layer (LSL) stream.

:class:`LslSource` finds one stream on the network, reads its channel description and
yields :class:`~streamer.sources.base.Chunk` objects and
:class:`~streamer.sources.base.SourceEvent` objects from :meth:`LslSource.chunks`.

Timestamps
----------
Every timestamp a chunk carries is the sender's sample time mapped onto the *local* LSL
clock (:func:`pylsl.local_clock`): the inlet runs with ``proc_clocksync`` only, so liblsl
adds its running clock-offset estimate (``time_correction``) to each sample. We do not
ask liblsl to dejitter or monotonise: both would smooth over exactly the gaps and
out-of-order samples we want to see and report. The offset is kept fresh by liblsl
itself, not by us: the inlet's clock-sync thread measures it again every 2 s
(``tuning.TimeUpdateInterval``, liblsl ``api_config.cpp``) and the post-processing
picks up the newest measurement at most every 0.5 s (liblsl ``time_postprocessor.cpp``),
so a sender clock that drifts is followed within seconds. The estimate log therefore records
times on the local LSL clock, the same axis an LSL recorder on this machine uses.

Timing checks
-------------
:class:`TimingCheck` looks at every chunk before it is yielded:

- a step between consecutive samples larger than ``2.5`` sample periods plus
  ``gap_tolerance_s`` is a *gap*: the chunk is split there and a ``"gap"`` event with
  ``detail["missing_s"]`` goes between the two parts, so events arrive in stream order;
- a sample whose timestamp is not later than every earlier one (duplicate, backwards or
  not finite) is *irregular* and dropped, because the engine assumes strictly
  increasing time; one ``"irregular"`` event (``time_s`` the offending timestamp,
  ``detail["newest_s"]`` the newest earlier one) is yielded per episode, before the
  chunk it was found in, and an episode ends after one second of kept samples. Dropped
  samples leave a hole, which the gap rule then reports like any other.

Stream loss
-----------
Silence alone does not make a stream lost: senders that buffer (a phone app pushing
ten seconds at a time, a radio link that catches up) pause for seconds while nothing is
wrong. :class:`SilenceCheck` decides what a silence means:

- the inlet reports the connection broken (liblsl's ``lost_error``: the outlet was
  destroyed, or its process or machine closed the connection): *lost* at once;
- no sample for longer than the *silence limit*, ``max(lost_after_s, PAUSE_FACTOR x``
  the longest pause the sender has made between deliveries that continued its
  timestamps), and the stream no longer answers liblsl's resolver (a machine that
  vanished without closing its connections, a frozen sender): *lost*;
- no sample for longer than the silence limit plus ``presence_s`` while the stream
  still answers: one ``"irregular"`` event says so (*stalled*; ``detail["silent_s"]``),
  and nothing is restarted. A hole in the timestamps when samples flow again is a
  ``"gap"`` like any other.

A lost stream gives one ``"lost"`` event, and :meth:`LslSource.chunks` keeps running
while it looks for the stream again (same ``source_id``; by the user's name/type when
the stream has none). When samples flow again a ``"resumed"`` event comes first,
carrying ``detail["missing_s"]``; the time axis may jump there (forwards, or even
backwards when a restarted sender keeps its own time axis), so consumers should restart
their per-stream state on ``"resumed"``. A stream that comes back with a different
channel count or rate is not read: a second ``"lost"`` event says why.
"""

from __future__ import annotations

import math
import threading
import time
from typing import Iterator, Mapping

import numpy as np
import pylsl
from pylsl.util import LostError
from pylsl.util import TimeoutError as LslTimeoutError

from estimators.errors import ParameterError
from streamer.errors import InputError
from streamer.sources.base import KINDS, ChannelInfo, Chunk, Item, SourceEvent, SourceInfo

KIND_BY_TYPE = {
    "ppg": "ppg",
    "pleth": "ppg",
    "bvp": "ppg",
    "ecg": "ecg",
    "ekg": "ecg",
    "resp": "resp",
    "respiration": "resp",
    "breathing": "resp",
    "acc": "acc",
    "accel": "acc",
    "accelerometer": "acc",
    "accelerometry": "acc",
}
"""Channel type strings (lower case) we recognise, mapped to our signal kinds. The XDF
channel-metadata convention leaves the type vocabulary open, so we accept the spellings
senders commonly use (from memory); anything else is an unknown kind."""

GAP_PERIODS = 2.5
"""A step of more than this many sample periods (plus the tolerance) is a gap: 1.5 or
more samples are missing, which a one-sample hiccup of a regular sender never causes."""

PAUSE_FACTOR = 2.0
"""A silence this many times the longest pause the sender has made is out of its rhythm
(our own choice: pauses of a buffering sender vary, rarely by a factor of two)."""

PRESENCE_S = 3.0
"""A stream that has not answered liblsl's continuous resolver for this long is gone
from the network. The resolver asks every 0.5 s (``ContinuousResolveInterval``, liblsl
``api_config.cpp``), so that is six unanswered queries in a row, not one lost packet."""

_LOOK_EVERY_S = 0.25  # how often a silence is judged (resolver results, comeback)
_MAX_LISTED = 10
_NUMERIC_FORMATS = {
    pylsl.cf_float32: "float32",
    pylsl.cf_double64: "double64",
    pylsl.cf_int8: "int8",
    pylsl.cf_int16: "int16",
    pylsl.cf_int32: "int32",
    pylsl.cf_int64: "int64",
}


def kind_from_type(type_text: str) -> str | None:
    """Our signal kind for an LSL channel or stream type string, or None.

    Examples
    --------
    >>> kind_from_type("EKG"), kind_from_type(" Accelerometer "), kind_from_type("EEG")
    ('ecg', 'acc', None)
    """
    return KIND_BY_TYPE.get(type_text.strip().lower())


def describe_stream(info: pylsl.StreamInfo) -> str:
    """One short description of a resolved stream, for error and status messages."""
    rate = info.nominal_srate()
    rate_text = f"{rate:g} Hz" if rate > 0 else "irregular rate"
    return (
        f"'{info.name()}' (type '{info.type()}', source_id '{info.source_id()}', "
        f"{info.channel_count()} ch, {rate_text})"
    )


def _list_streams(infos: list[pylsl.StreamInfo]) -> str:
    listed = "; ".join(describe_stream(i) for i in infos[:_MAX_LISTED])
    if len(infos) > _MAX_LISTED:
        listed += f"; and {len(infos) - _MAX_LISTED} more"
    return listed


def _xpath_literal(value: str, option: str) -> str:
    # XPath 1.0 has no escape character: a value is quoted with whichever quote it
    # does not contain.
    if "'" not in value:
        return f"'{value}'"
    if '"' not in value:
        return f'"{value}"'
    raise InputError(
        f"LSL stream {option} {value!r} contains both quote characters; "
        f"select the stream by another property"
    )


def build_predicate(name: str | None, type: str | None, source_id: str | None) -> str:
    """The XPath predicate liblsl resolves; empty when no property is given.

    Examples
    --------
    >>> build_predicate("Polar H10", None, "abc")
    "name='Polar H10' and source_id='abc'"
    """
    parts = []
    for option, value in (("name", name), ("type", type), ("source_id", source_id)):
        if value is not None:
            parts.append(f"{option}={_xpath_literal(value, option)}")
    return " and ".join(parts)


def _resolve(predicate: str, minimum: int, timeout_s: float) -> list[pylsl.StreamInfo]:
    # An empty predicate matches nothing in liblsl, while "true()" matches every stream
    # and, unlike resolve_streams, returns as soon as ``minimum`` are found (measured).
    return pylsl.resolve_bypred(predicate or "true()", minimum=minimum, timeout=timeout_s)


def _unique_by_uid(infos: list[pylsl.StreamInfo]) -> list[pylsl.StreamInfo]:
    seen: dict[str, pylsl.StreamInfo] = {}
    for info in infos:
        seen.setdefault(info.uid(), info)
    return list(seen.values())


def channels_from_info(
    full_info: pylsl.StreamInfo, channel_kinds: Mapping[str, str] | None = None
) -> tuple[ChannelInfo, ...]:
    """Channel names, kinds and units from a stream's XDF-style description.

    Reads ``desc/channels/channel/{label,type,unit}``. A missing label becomes
    ``"ch<k>"``; a repeated label gets ``"_<k>"`` appended so names stay unique. When no
    channel carries a type, the stream's own type (e.g. ``"PPG"``) applies to all of
    them. ``channel_kinds`` (channel name -> kind) overrides what the stream says.

    Raises
    ------
    InputError
        When ``channel_kinds`` names a channel the stream lacks or a kind we do not know.
    """
    n_channels = full_info.channel_count()
    labels = [""] * n_channels
    types = [""] * n_channels
    units = [""] * n_channels
    node = full_info.desc().child("channels").child("channel")
    k = 0
    while not node.empty() and k < n_channels:
        labels[k] = node.child_value("label").strip()
        types[k] = node.child_value("type").strip()
        units[k] = node.child_value("unit").strip()
        node = node.next_sibling("channel")
        k += 1
    if not any(types):
        types = [full_info.type()] * n_channels

    names: list[str] = []
    for k, label in enumerate(labels):
        name = label or f"ch{k}"
        if name in names:
            name = f"{name}_{k}"
        names.append(name)
    kinds = [kind_from_type(t) for t in types]

    stream = full_info.name()
    for name, kind in (channel_kinds or {}).items():
        if name not in names:
            raise InputError(
                f"LSL stream '{stream}' has no channel '{name}'; its channels are "
                f"{', '.join(names)}"
            )
        if kind not in KINDS:
            raise InputError(
                f"unknown signal kind '{kind}' for channel '{name}' of LSL stream "
                f"'{stream}'; use one of {', '.join(KINDS)}"
            )
        kinds[names.index(name)] = kind
    return tuple(ChannelInfo(n, kd, u) for n, kd, u in zip(names, kinds, units))


class TimingCheck:
    """Finds gaps and out-of-order samples in a stream of chunks.

    Pure bookkeeping (no LSL, no clocks), so it can be tested on its own. See the
    module notes for the rules.

    Parameters
    ----------
    fs : nominal sampling rate in Hz.
    gap_tolerance_s : extra step allowed before a gap is reported, for senders whose
        timestamps jitter (e.g. stamped on arrival of a radio packet).
    stream : stream name used in event messages.
    """

    def __init__(self, fs: float, gap_tolerance_s: float = 0.05, stream: str = ""):
        if not fs > 0:
            raise ParameterError(f"{fs=} must be > 0")
        if not gap_tolerance_s >= 0:
            raise ParameterError(f"{gap_tolerance_s=} must be >= 0")
        self.fs = float(fs)
        self.stream = stream
        self.max_step_s = GAP_PERIODS / self.fs + gap_tolerance_s
        self._regular_to_end_episode = math.ceil(self.fs)  # one second of samples
        self.reset()

    def continues(self, first_s: float) -> bool:
        """Whether a sample stamped ``first_s`` follows the newest one kept without a
        gap (False before the first sample)."""
        return 0.0 < first_s - self.last_s <= self.max_step_s

    def reset(self) -> None:
        """Forget the previous sample, e.g. after the stream was lost and came back."""
        self.last_s = -math.inf
        self._in_episode = False
        self._regular_run = 0

    def check(self, samples: np.ndarray, timestamps: np.ndarray) -> list[Item]:
        """Chunks (split at gaps) and events for one incoming chunk, in stream order."""
        timestamps = np.asarray(timestamps, dtype=np.float64)
        items: list[Item] = []
        if len(timestamps) == 0:
            return items
        # The newest time seen before each sample; fmax ignores NaN, and a dropped
        # sample never raises it, so it equals the newest *kept* time.
        before = np.fmax.accumulate(np.concatenate(([self.last_s], timestamps[:-1])))
        keep = timestamps > before
        # Episodes: a dropped sample starts one unless an episode is open; an episode
        # closes after a second of kept samples. Loops over dropped samples only.
        previous = -1
        for bad in np.flatnonzero(~keep):
            self._regular_run += int(bad) - previous - 1
            if self._regular_run >= self._regular_to_end_episode:
                self._in_episode = False
            if not self._in_episode:
                self._in_episode = True
                items.append(
                    SourceEvent(
                        "irregular",
                        f"stream '{self.stream}' sent timestamps that do not increase; "
                        f"dropping those samples",
                        float(timestamps[bad]),
                        {"newest_s": float(before[bad])},
                    )
                )
            self._regular_run = 0
            previous = int(bad)
        self._regular_run += len(keep) - previous - 1
        if self._regular_run >= self._regular_to_end_episode:
            self._in_episode = False

        kept_s = timestamps[keep]
        if len(kept_s) == 0:
            return items
        kept_x = np.asarray(samples, dtype=np.float64)[keep]
        steps = np.diff(np.concatenate(([self.last_s], kept_s)))
        gap_at = np.flatnonzero(steps > self.max_step_s)
        if math.isinf(self.last_s) and len(gap_at) and gap_at[0] == 0:
            gap_at = gap_at[1:]  # the first sample ever has no predecessor
        start = 0
        for k in gap_at:
            if k > start:
                items.append(Chunk(kept_x[start:k], kept_s[start:k]))
            missing_s = float(steps[k]) - 1.0 / self.fs
            items.append(
                SourceEvent(
                    "gap",
                    f"stream '{self.stream}' skipped {missing_s:.3f} s of samples",
                    float(kept_s[k]),
                    {"missing_s": missing_s},
                )
            )
            start = int(k)
        items.append(Chunk(kept_x[start:], kept_s[start:]))
        self.last_s = float(kept_s[-1])
        return items


class SilenceCheck:
    """Decides what a silence of a live stream means: nothing, *stalled* or *lost*.

    Pure bookkeeping (no LSL, no clocks), so it can be tested on its own; see the
    module notes for the rules.

    Parameters
    ----------
    lost_after_s : the shortest silence limit, in wall-clock seconds.
    presence_s : how long a stream must go unanswered on the network to count as gone;
        a silence is only called *stalled* this much after the limit, so that a stream
        that vanished is reported lost rather than stalled first.
    """

    def __init__(self, lost_after_s: float, presence_s: float = PRESENCE_S):
        if not lost_after_s > 0:
            raise ParameterError(f"{lost_after_s=} must be > 0")
        if not presence_s > 0:
            raise ParameterError(f"{presence_s=} must be > 0")
        self.lost_after_s = float(lost_after_s)
        self.presence_s = float(presence_s)
        self.longest_pause_s = 0.0

    @property
    def limit_s(self) -> float:
        """Silence after which the stream's presence on the network decides."""
        return max(self.lost_after_s, PAUSE_FACTOR * self.longest_pause_s)

    def delivered(self, pause_s: float, continues: bool) -> None:
        """Samples arrived ``pause_s`` after the previous ones. A pause after which the
        timestamps carry on where they stopped is the sender's rhythm; one after which
        they skip is a hole, and teaches nothing."""
        if continues:
            self.longest_pause_s = max(self.longest_pause_s, float(pause_s))

    def verdict(self, silent_s: float, present: bool) -> str | None:
        """``"lost"``, ``"stalled"`` or None for a silence of ``silent_s`` seconds;
        ``present``: the stream still answers on the network.

        Examples
        --------
        >>> check = SilenceCheck(2.0, presence_s=3.0)
        >>> check.verdict(2.5, present=False), check.verdict(2.5, present=True)
        ('lost', None)
        >>> check.verdict(5.5, present=True)
        'stalled'
        >>> check.delivered(10.0, continues=True)
        >>> check.limit_s, check.verdict(5.5, present=False)
        (20.0, None)
        """
        if silent_s <= self.limit_s:
            return None
        if not present:
            return "lost"
        if silent_s > self.limit_s + self.presence_s:
            return "stalled"
        return None


class LslSource:
    """A live LSL stream as a :class:`~streamer.sources.base.Source`.

    The constructor resolves the stream, reads its full description and opens the
    inlet, so samples pushed from then on are queued for :meth:`chunks`.

    Parameters
    ----------
    name, type, source_id : stream properties to match; any combination. With none,
        any stream matches (and must then be the only one on the network).
    timeout_s : how long to look for a matching stream.
    channel_kinds : channel name -> signal kind, overriding the stream's metadata.
    lost_after_s : the shortest silence (wall-clock seconds without a sample) after
        which the stream may count as lost; see :class:`SilenceCheck`.
    presence_s : see :class:`SilenceCheck`.
    gap_tolerance_s : see :class:`TimingCheck`.
    poll_s : sleep between empty, non-blocking pulls; bounds how fast :meth:`close`
        takes effect.
    extra_wait_s : after the first match, how long to keep listening for a second one,
        so that an ambiguous choice is reported rather than made at random.
    resolved : a stream already resolved (by :class:`~streamer.sources.lsl_session.LslSession`,
        which reads several); then no search is made and ``name``, ``type`` and
        ``source_id`` only say how to look for it again after a loss.

    Raises
    ------
    InputError
        No matching stream (the message lists what was seen), several matching streams,
        a stream with text samples or an irregular rate, or bad ``channel_kinds``.

    Notes
    -----
    Measured with pylsl 1.18.6 on loopback: resolving an existing stream takes a few
    ms, while the first clock-offset estimate takes about 0.6 s; it is taken here, at
    construction, so the first pull does not stall.
    """

    def __init__(
        self,
        name: str | None = None,
        type: str | None = None,
        source_id: str | None = None,
        timeout_s: float = 5.0,
        channel_kinds: Mapping[str, str] | None = None,
        lost_after_s: float = 2.0,
        presence_s: float = PRESENCE_S,
        gap_tolerance_s: float = 0.05,
        poll_s: float = 0.005,
        extra_wait_s: float = 0.5,
        resolved: pylsl.StreamInfo | None = None,
    ):
        for label, value in (
            ("timeout_s", timeout_s),
            ("lost_after_s", lost_after_s),
            ("presence_s", presence_s),
            ("poll_s", poll_s),
        ):
            if not value > 0:
                raise ParameterError(f"{label}={value!r} must be > 0")
        if not extra_wait_s >= 0:
            raise ParameterError(f"{extra_wait_s=} must be >= 0")
        self._predicate = build_predicate(name, type, source_id)
        self._silence = SilenceCheck(lost_after_s, presence_s)
        self._poll_s = float(poll_s)
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._running = False
        self._inlet: pylsl.StreamInlet | None = None

        found = [resolved] if resolved is not None else _resolve(self._predicate, 1, timeout_s)
        if found and extra_wait_s > 0 and resolved is None:
            found = _unique_by_uid(
                found + _resolve(self._predicate, len(found) + 1, extra_wait_s)
            )
        wanted = self._predicate or "any stream"
        if not found:
            seen = _unique_by_uid(pylsl.resolve_streams(wait_time=1.0))
            if seen:
                raise InputError(
                    f"no LSL stream matches {wanted} within {timeout_s:g} s; streams "
                    f"seen: {_list_streams(seen)}; pick one with --name/--type/--source-id"
                )
            raise InputError(
                f"no LSL stream matches {wanted} within {timeout_s:g} s, and there are "
                f"no LSL streams at all on this network; start the sender first"
            )
        if len(found) > 1:
            raise InputError(
                f"{len(found)} LSL streams match {wanted}: {_list_streams(found)}; "
                f"add --source-id to choose one"
            )
        resolved = found[0]
        stream = resolved.name()
        if resolved.channel_format() not in _NUMERIC_FORMATS:
            raise InputError(
                f"LSL stream '{stream}' carries text samples, not numbers; "
                f"choose a numeric stream"
            )
        if not resolved.nominal_srate() > 0:
            raise InputError(
                f"LSL stream '{stream}' has an irregular sampling rate; ridgewatch needs "
                f"a stream with a nominal rate"
            )

        try:
            self._open(resolved, timeout_s)
            full = self._inlet.info(timeout=timeout_s)
        except (LostError, LslTimeoutError):
            raise InputError(
                f"LSL stream {describe_stream(resolved)} was found but did not answer "
                f"within {timeout_s:g} s; check that the sender is still running and "
                f"that no firewall blocks LSL's TCP ports"
            ) from None
        self.info = SourceInfo(
            name=stream,
            fs=float(resolved.nominal_srate()),
            channels=channels_from_info(full, channel_kinds),
            source_id=resolved.source_id(),
        )
        self._channel_count = resolved.channel_count()
        self._hostname = resolved.hostname()
        self._timing = TimingCheck(self.info.fs, gap_tolerance_s, stream)
        # Looking for the stream again after a loss: by source_id when it has one.
        if self.info.source_id:
            self._comeback_predicate = build_predicate(None, None, self.info.source_id)
        else:
            self._comeback_predicate = self._predicate or build_predicate(stream, None, None)

    @property
    def silence_limit_s(self) -> float:
        """Wall-clock silence after which this stream may count as lost: the shortest
        limit, or twice the longest pause the sender has made (see :class:`SilenceCheck`)."""
        return self._silence.limit_s

    # -- inlet handling ---------------------------------------------------------------
    def _open(self, resolved: pylsl.StreamInfo, timeout_s: float) -> None:
        """Open an inlet on ``resolved`` and take the first clock offset.

        Raises LostError / pylsl TimeoutError when the stream is gone.
        """
        inlet = pylsl.StreamInlet(
            resolved,
            max_buflen=60,
            recover=False,  # we re-resolve ourselves, so we can report the loss
            processing_flags=pylsl.proc_clocksync,
        )
        # Subscribe before anything else: samples pushed before open_stream are not
        # delivered (see /work/shared/FINDINGS.md).
        inlet.open_stream(timeout=timeout_s)
        inlet.time_correction(timeout=timeout_s)
        # Every pull asks the inlet for the full description, waiting for it without a
        # time limit until it has it; fetched here, a sender that freezes later cannot
        # hang a pull (measured: a stopped sender process did).
        inlet.info(timeout=timeout_s)
        self._inlet = inlet
        self._uid = resolved.uid()

    def _drop_inlet(self) -> None:
        inlet, self._inlet = self._inlet, None
        if inlet is not None:
            inlet.close_stream()

    # -- the Source protocol ----------------------------------------------------------
    def chunks(self) -> Iterator[Item]:
        """Yield chunks and events until :meth:`close` is called.

        Pulls without blocking and sleeps ``poll_s`` when nothing is queued; a silence
        is judged by :class:`SilenceCheck` against what liblsl's continuous resolver
        sees; while the stream is lost it keeps looking for it and yields nothing.
        """
        with self._lock:
            if self._stop.is_set():
                return
            self._running = True
        state = "flowing"  # or "stalled" (silent, still on the network) or "lost"
        last_data = time.monotonic()
        # One resolver for the whole run: whether the stream still answers, and
        # whether it came back after a loss. It needs ``presence_s`` of listening before
        # "not seen" means "gone".
        resolver = pylsl.ContinuousResolver(
            pred=self._comeback_predicate, forget_after=self._silence.presence_s
        )
        listening_since = time.monotonic()
        next_look = 0.0
        rejected: set[str] = set()
        try:
            while not self._stop.is_set():
                timestamps: np.ndarray = np.empty(0)
                if self._inlet is not None:
                    try:
                        samples, timestamps = self._inlet.pull_chunk(
                            timeout=0.0, max_samples=4096, as_numpy=True
                        )
                    except LostError:
                        rejected.add(self._uid)  # an outlet instance never comes back
                        self._drop_inlet()
                        timestamps = np.empty(0)
                        if state != "lost":
                            state = "lost"
                            yield self._lost_event()
                if len(timestamps):
                    now = time.monotonic()
                    if state == "lost":
                        yield self._resumed_event(float(timestamps[0]))
                        self._timing.reset()
                    else:
                        # Nothing precedes a first sample, so nothing can be missing.
                        first = not math.isfinite(self._timing.last_s)
                        continues = first or self._timing.continues(float(timestamps[0]))
                        self._silence.delivered(now - last_data, continues)
                    state, last_data = "flowing", now
                    yield from self._timing.check(samples, timestamps)
                    continue  # more may be queued: pull again before sleeping
                now = time.monotonic()
                silent_s = now - last_data
                if now >= next_look and (state == "lost" or silent_s > self._silence.limit_s):
                    next_look = now + _LOOK_EVERY_S
                    seen = resolver.results()
                    if state != "lost":
                        trusted = now - listening_since >= self._silence.presence_s
                        present = not trusted or any(i.uid() == self._uid for i in seen)
                        verdict = self._silence.verdict(silent_s, present)
                        if verdict == "lost":
                            state = "lost"
                            yield self._lost_event()
                        elif verdict == "stalled" and state == "flowing":
                            state = "stalled"
                            yield self._stalled_event(silent_s)
                    if state == "lost":
                        event = self._try_comeback(seen, rejected)
                        if event is not None:
                            yield event
                self._stop.wait(self._poll_s)
        finally:
            with self._lock:
                self._running = False
                self._drop_inlet()

    def _lost_event(self) -> SourceEvent:
        return SourceEvent(
            "lost",
            f"stream '{self.info.name}' lost; waiting for it to come back",
            self._timing.last_s if math.isfinite(self._timing.last_s) else math.nan,
        )

    def _stalled_event(self, silent_s: float) -> SourceEvent:
        threshold_s = self._silence.limit_s + self._silence.presence_s
        last_s = self._timing.last_s
        return SourceEvent(
            "irregular",
            f"stream '{self.info.name}' has sent no samples for {threshold_s:.3g} s but is "
            f"still on the network; waiting for more",
            last_s if math.isfinite(last_s) else math.nan,
            {"silent_s": silent_s},
        )

    def _resumed_event(self, first_s: float) -> SourceEvent:
        last_s = self._timing.last_s
        missing_s = first_s - last_s - 1.0 / self.info.fs if math.isfinite(last_s) else math.nan
        return SourceEvent(
            "resumed",
            f"stream '{self.info.name}' is back",
            first_s,
            {"missing_s": missing_s},
        )

    def _try_comeback(
        self, seen: list[pylsl.StreamInfo], rejected: set[str]
    ) -> SourceEvent | None:
        """Open an inlet on a stream instance that came back, if one is among ``seen``
        (the resolver's results). Instances in ``rejected`` are skipped; dead ones and
        ones with another layout join them.

        Returns a ``"lost"`` event when an instance came back with another layout.
        """
        for candidate in seen:
            uid = candidate.uid()
            if uid in rejected or (self._inlet is not None and uid == self._uid):
                continue
            if not self.info.source_id and candidate.hostname() != self._hostname:
                continue  # without a source_id, only the same machine counts as "same"
            rate = candidate.nominal_srate()
            if candidate.channel_count() != self._channel_count or rate != self.info.fs:
                rejected.add(uid)
                return SourceEvent(
                    "lost",
                    f"stream '{self.info.name}' came back with {candidate.channel_count()} "
                    f"channel(s) at {rate:g} Hz instead of {self._channel_count} at "
                    f"{self.info.fs:g} Hz; not reading it, restart ridgewatch to use it",
                    detail={
                        "channel_count": candidate.channel_count(),
                        "nominal_srate": rate,
                    },
                )
            previous = self._inlet
            try:
                self._open(candidate, timeout_s=1.0)
            except LostError:
                rejected.add(uid)  # a dead instance the resolver has not forgotten yet
                continue
            except LslTimeoutError:
                continue  # too slow to answer this time; asked again at the next look
            if previous is not None:
                previous.close_stream()
            return None
        return None

    def close(self) -> None:
        """End :meth:`chunks` (within about ``poll_s``) and release the inlet.

        Safe to call from another thread and more than once. If a reconnection is
        being opened at that moment, ending waits for it (up to about 2 s: one second
        each for subscribing and for the first clock-offset estimate).
        """
        self._stop.set()
        with self._lock:
            if not self._running:
                self._drop_inlet()

    def __enter__(self) -> "LslSource":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
