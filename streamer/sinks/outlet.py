"""Estimates as LSL streams, for other LSL tools to record or react to.

:class:`EstimateOutlet` publishes one LSL stream per estimate stream of the engine (one
per (quantity, source) pair, e.g. ``hr.PLETH`` and ``rr.PLETH``), each with six
channels::

    hr.PLETH.rate_per_min       unit 1/min (the window-centre rate)
    hr.PLETH.confidence         unit 1 (a fraction in [0, 1])
    hr.PLETH.quality            unit 1 (a fraction in [0, 1])
    hr.PLETH.delay_s            unit s
    hr.PLETH.rate_now_per_min   unit 1/min (the rate at the sample time, the newest
                                sample used; :mod:`estimators.rate_now`)
    hr.PLETH.now_confidence     unit 1

Every row of the estimate log is one sample of its stream, and nothing else is sent: the
consumer receives exactly as many samples per stream as the log has rows for it, and
the declared nominal rate is ``1 / hop_s`` of that stream. An estimate without a rate,
or one the display rule withholds (:mod:`estimators.display_rule`: a heart rate more
likely outside the tolerance than inside), sends NaN as rate and delay (confidence and
quality still say why there is none). A greyed estimate is sent as it is: its
confidence tells the receiver how far to trust it.
Values are double64: a few samples per second cost nothing, and rates and stream times
keep full precision.

One stream per pair, rather than one stream with a group of channels per pair, because
the pairs do not share their hop times: each decimates to its own analysis rate, and the
breathing rate from a pulse reports several hops at once when a beat completes them, so
a shared sample would have to pad with NaN or merge hops.

Markers
-------
Beside the estimate streams the outlet opens one marker stream, ``"<name> markers"``
(type ``Markers``, irregular rate, two string channels ``text`` and ``source``): every
marker the log gets (:class:`~streamer.sources.base.Marker`: from a marker stream or
file, or the user's own with source ``user``) is one sample, its text unchanged in the
first channel, stamped with the marker's time like the estimates (stream time live,
shifted onto the local clock in replay). The source travels in a channel of its own so
the text stays exactly what was sent, and a recorder that also records the original
marker stream can tell the copies from the user's own markers. The stream exists from
the start, so consumers can subscribe before the first marker.

Names and source ids
--------------------
A stream is named ``"<name> <quantity>.<source>"``. Its ``source_id`` is derived from
what the estimates are computed from (``input_id``), the pair and its hop, so that a
restarted run on the same input gets the same ids and LSL recorders pick the streams up
again. Two runs at the same time on the same input (one with a window, one logging, say)
must not share ids: a recorder could not tell them apart. So the outlet looks on the
network first: when another instance already publishes the id, it takes the next
instance number ``n`` (name ``"<name> (n) ..."``, id suffix ``-n``). Two instances that
start at the same moment both see the other after creating their streams; the younger
one (by ``created_at``, then ``uid``) moves on.

Timestamps
----------
With ``use_stream_time=True`` (live input) each sample is stamped with its estimate's
``emitted_s``: for LSL input that is already on the local LSL clock (see
:mod:`streamer.sources.lsl_source`), so the estimates line up with the input stream in
any LSL recording. With ``use_stream_time=False`` (replay: times are on the file's own
axis, unrelated to the LSL clock) the newest estimate of each push is stamped with
:func:`pylsl.local_clock` at that moment and the others keep their spacing in
``emitted_s``. Several breathing estimates may share one ``emitted_s`` (see above);
their window centres are ``timestamp - delay_s``.
"""

from __future__ import annotations

import math
from typing import Iterable, Mapping, Sequence

import numpy as np
import pylsl

from estimators.display_rule import WITHHOLD
from estimators.errors import ParameterError
from estimators.estimate import QUANTITIES, Estimate
from streamer.sources.lsl_publish import derived_source_id

FIELDS = ("rate_per_min", "confidence", "quality", "delay_s", "rate_now_per_min",
          "now_confidence")
"""Channels published per (quantity, source) pair, in this order."""

UNITS = {"rate_per_min": "1/min", "confidence": "1", "quality": "1", "delay_s": "s",
         "rate_now_per_min": "1/min", "now_confidence": "1"}

STREAM_TYPE = "RateEstimates"

MARKER_STREAM_TYPE = "Markers"
"""Type of the marker stream (the usual type of LSL event-marker streams)."""
MARKER_FIELDS = ("text", "source")
"""Channels of the marker stream, in this order."""

CLAIM_WAIT_S = 0.5
"""How long to listen for another instance with the same ids. The same wait as the
live source's check for a second matching stream; on a local network LSL streams answer
within milliseconds (measured on loopback: a few ms)."""

_MAX_INSTANCES = 99


def channel_labels(pairs: Sequence[tuple[str, str]]) -> list[str]:
    """Channel labels for ``pairs`` in order (six per pair).

    Examples
    --------
    >>> channel_labels([("hr", "PLETH")])[:2]
    ['hr.PLETH.rate_per_min', 'hr.PLETH.confidence']
    """
    return [f"{q}.{s}.{f}" for q, s in pairs for f in FIELDS]


def hops_by_stream(monitor) -> dict[tuple[str, str], float]:
    """The hop (s) of every estimate stream of a
    :class:`~estimators.monitor.RateMonitor`, in its order: heart rate from the
    profile's ``hr`` settings, breathing from a respiration channel from ``rr``, and
    breathing from a pulse channel from ``rr_pulse``."""
    profile = monitor.profile
    kinds = dict(monitor.channels)
    hops = {}
    for quantity, source in monitor.streams:
        if quantity == "hr":
            settings = profile.hr
        elif kinds.get(source) == "resp":
            settings = profile.rr
        else:
            settings = profile.rr_pulse
        hops[(quantity, source)] = settings.hop_s
    return hops


def _older(a: pylsl.StreamInfo, b: pylsl.StreamInfo) -> bool:
    return (a.created_at(), a.uid()) < (b.created_at(), b.uid())


class EstimateOutlet:
    """LSL outlets for estimates, one per (quantity, source) pair.

    Parameters
    ----------
    quantities_sources : (quantity, source) pairs, e.g. ``[("hr", "PLETH"),
        ("rr", "PLETH")]``; one stream each.
    hop_s : the engine's hop in seconds, one for all pairs or one per pair (a mapping,
        see :func:`hops_by_stream`); a stream's nominal rate is ``1 / hop_s``.
    name : the streams' common name; each stream adds `` <quantity>.<source>``.
    source_id : the streams' common id, each adding ``.<quantity>.<source>``; taken as
        given (no look on the network). By default derived from ``input_id``, the
        pairs and hops, plus an instance number when another run publishes the same.
    input_id : what the estimates are computed from (e.g. the input stream's
        source_id or the file path, and the profile); only used to derive the ids.
    use_stream_time : see the module notes on timestamps.
    claim_wait_s : how long to listen for another instance with the same ids.

    Attributes
    ----------
    instance : 1, or the instance number taken because others publish the same ids.
    names, source_ids : pair -> stream name, pair -> stream source_id.
    marker_name, marker_source_id : the marker stream's name and source_id.
    """

    def __init__(
        self,
        quantities_sources: Iterable[tuple[str, str]],
        hop_s: float | Mapping[tuple[str, str], float],
        name: str = "ridgewatch-estimates",
        source_id: str | None = None,
        input_id: str = "",
        use_stream_time: bool = True,
        claim_wait_s: float = CLAIM_WAIT_S,
    ):
        pairs = [(str(q), str(s)) for q, s in quantities_sources]
        if not pairs:
            raise ParameterError("quantities_sources must not be empty")
        if len(set(pairs)) != len(pairs):
            raise ParameterError(f"quantities_sources={pairs} has repeated pairs")
        for quantity, _ in pairs:
            if quantity not in QUANTITIES:
                raise ParameterError(f"quantity={quantity!r} must be one of {QUANTITIES}")
        hops = dict(hop_s) if isinstance(hop_s, Mapping) else {p: hop_s for p in pairs}
        for pair in pairs:
            hop = hops.get(pair, math.nan)
            if not hop > 0:
                raise ParameterError(f"hop_s={hop!r} for {pair} must be > 0")
        if not claim_wait_s >= 0:
            raise ParameterError(f"{claim_wait_s=} must be >= 0")
        self.pairs = pairs
        self.hops = {pair: float(hops[pair]) for pair in pairs}
        self._use_stream_time = use_stream_time
        self._outlets: dict[tuple[str, str], pylsl.StreamOutlet] = {}
        self._marker_outlet: pylsl.StreamOutlet | None = None
        self._shift_s = math.nan  # replay: local clock minus stream time at the last push
        if source_id:
            self._open(name, source_id)
            self.instance = 1
            return
        base_id = derived_source_id(
            "estimates", input_id, *(f"{q}.{s}@{self.hops[(q, s)]:g}" for q, s in pairs)
        )
        for n in range(1, _MAX_INSTANCES + 1):
            suffix = "" if n == 1 else f"-{n}"
            self._open(name if n == 1 else f"{name} ({n})", base_id + suffix)
            if self._claimed(base_id + suffix, claim_wait_s):
                self.instance = n
                return
            self._close_outlets()
        raise RuntimeError(f"{_MAX_INSTANCES} instances already publish estimates of "
                           f"{input_id!r}")

    def _open(self, name: str, instance_id: str) -> None:
        self.names = {(q, s): f"{name} {q}.{s}" for q, s in self.pairs}
        self.source_ids = {(q, s): f"{instance_id}.{q}.{s}" for q, s in self.pairs}
        for pair in self.pairs:
            quantity, source = pair
            info = pylsl.StreamInfo(
                self.names[pair], STREAM_TYPE, len(FIELDS), 1.0 / self.hops[pair],
                pylsl.cf_double64, self.source_ids[pair],
            )
            channels = info.desc().append_child("channels")
            for field in FIELDS:
                node = channels.append_child("channel")
                node.append_child_value("label", f"{quantity}.{source}.{field}")
                node.append_child_value("type", quantity.upper())
                node.append_child_value("unit", UNITS[field])
                node.append_child_value("quantity", quantity)
                node.append_child_value("source", source)
                node.append_child_value("field", field)
            info.desc().append_child_value("manufacturer", "ridgewatch")
            self._outlets[pair] = pylsl.StreamOutlet(info)
        self._open_markers(name, instance_id)

    def _open_markers(self, name: str, instance_id: str) -> None:
        self.marker_name = f"{name} markers"
        self.marker_source_id = f"{instance_id}.markers"
        info = pylsl.StreamInfo(self.marker_name, MARKER_STREAM_TYPE, len(MARKER_FIELDS),
                                pylsl.IRREGULAR_RATE, pylsl.cf_string, self.marker_source_id)
        channels = info.desc().append_child("channels")
        for field in MARKER_FIELDS:
            node = channels.append_child("channel")
            node.append_child_value("label", field)
            node.append_child_value("type", MARKER_STREAM_TYPE)
        info.desc().append_child_value("manufacturer", "ridgewatch")
        self._marker_outlet = pylsl.StreamOutlet(info)

    def _claimed(self, instance_id: str, wait_s: float) -> bool:
        """Whether no older instance publishes under ``instance_id`` (looked up for up
        to ``wait_s``; our own streams are among those found). ``instance_id`` holds
        only hex digits and dashes, so it needs no escaping in the query."""
        if wait_s == 0:
            return True
        ours = {outlet.get_info().uid(): outlet for outlet in
                [*self._outlets.values(), self._marker_outlet] if outlet is not None}
        first = self._outlets[self.pairs[0]].get_info()
        found = pylsl.resolve_bypred(f"starts-with(source_id, '{instance_id}.')",
                                     minimum=len(ours) + 1, timeout=wait_s)
        return not any(info.uid() not in ours and _older(info, first) for info in found)

    def rows(self, estimates: Sequence[Estimate]) -> dict[tuple[str, str], tuple]:
        """Per pair with estimates: samples ``(rows, 4)`` and their ``emitted_s``
        ``(rows,)``, one row per estimate, in the given order.

        Raises
        ------
        ParameterError
            When an estimate's (quantity, source) is not one of the outlet's pairs.
        """
        grouped: dict[tuple[str, str], list[Estimate]] = {}
        for estimate in estimates:
            pair = (estimate.quantity, estimate.source)
            if pair not in self.hops:
                raise ParameterError(
                    f"estimate for {pair} is not among the outlet's pairs {self.pairs}"
                )
            grouped.setdefault(pair, []).append(estimate)
        out = {}
        for pair, group in grouped.items():
            samples = np.array(
                [(e.rate_per_min if e.display != WITHHOLD else np.nan, e.confidence,
                  e.quality, e.delay_s if e.has_rate and e.display != WITHHOLD else np.nan,
                  e.rate_now_per_min if e.now_display != WITHHOLD else np.nan,
                  e.now_confidence)
                 for e in group], dtype=np.float64)
            out[pair] = (samples, np.array([e.emitted_s for e in group], dtype=np.float64))
        return out

    def push(self, estimates: Sequence[Estimate]) -> None:
        """Publish estimates: each becomes one sample of its pair's stream."""
        if not self._outlets:
            raise RuntimeError("push after close")
        if not estimates:
            return
        rows = self.rows(estimates)
        if not self._use_stream_time:
            # Keep the spacing between estimates; the newest of the push is stamped "now".
            newest = max(e.emitted_s for e in estimates)
            shift = pylsl.local_clock() - newest
            self._shift_s = shift
        for pair, (samples, emitted_s) in rows.items():
            stamps = emitted_s if self._use_stream_time else emitted_s + shift
            self._outlets[pair].push_chunk(samples, stamps.tolist())

    def push_markers(self, markers, newest_s: float = math.nan) -> None:
        """Publish markers: each becomes one sample (text, source) of the marker stream.

        Stamped with ``marker.time_s`` on live input. In replay, with the same shift as
        the estimates: the stream time ``newest_s`` (the newest sample) is "now", so a
        marker keeps its distance from the samples and estimates around it; before the
        first sample (``newest_s`` NaN) the shift of the last estimates, and failing
        that "now"; never later than "now" (a file's marker after its last sample). A
        marker without a time is stamped "now".
        """
        if self._marker_outlet is None:
            raise RuntimeError("push after close")
        now = pylsl.local_clock()
        if not self._use_stream_time and math.isfinite(newest_s):
            self._shift_s = now - newest_s
        for marker in markers:
            time_s = float(marker.time_s)
            if self._use_stream_time:
                stamp = time_s
            else:
                # Never in the future: a file's marker past its last sample is "now".
                stamp = min(time_s + self._shift_s, now)
            if not math.isfinite(stamp):
                stamp = now
            self._marker_outlet.push_sample([str(marker.text), str(marker.source)], stamp)

    def _close_outlets(self) -> None:
        self._outlets = {}
        self._marker_outlet = None

    def close(self) -> None:
        """Destroy the outlets; inlets see the streams as lost."""
        self._close_outlets()

    def __enter__(self) -> "EstimateOutlet":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
