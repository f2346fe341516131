"""Estimates as an LSL stream, for other LSL tools to record or react to.

:class:`EstimateOutlet` publishes one sample per hop. Channels come in groups of four,
one group per (quantity, source) pair, in the order given::

    hr.PLETH.rate_per_min   unit 1/min
    hr.PLETH.confidence     unit 1 (a fraction in [0, 1])
    hr.PLETH.quality        unit 1 (a fraction in [0, 1])
    hr.PLETH.delay_s        unit s
    rr.fused.rate_per_min   ...

A pair with no estimate in a hop sends NaN in all four channels; an estimate without a
rate, or one the display rule withholds (:mod:`estimators.display_rule`: a heart rate
more likely outside the tolerance than inside), sends NaN as rate and delay (confidence
and quality still say why there is none). A greyed estimate is sent as it is: its
confidence tells the receiver how far to trust it.
Values are double64: a few samples per second cost nothing, and rates and stream times
keep full precision.

Timestamps
----------
With ``use_stream_time=True`` (live input) each sample is stamped with the hop's
``emitted_s``: for LSL input that is already on the local LSL clock (see
:mod:`streamer.sources.lsl_source`), so the estimates line up with the input stream in
any LSL recording. With ``use_stream_time=False`` (replay: times are on the file's own
axis, unrelated to the LSL clock) the newest hop of each push is stamped with
:func:`pylsl.local_clock` at that moment and earlier hops of the same push keep their
spacing in ``emitted_s``.
"""

from __future__ import annotations

from typing import Iterable, Sequence

import numpy as np
import pylsl

from estimators.display_rule import WITHHOLD
from estimators.errors import ParameterError
from estimators.estimate import QUANTITIES, Estimate
from streamer.sources.lsl_publish import derived_source_id

FIELDS = ("rate_per_min", "confidence", "quality", "delay_s")
"""Channels published per (quantity, source) pair, in this order."""

UNITS = {"rate_per_min": "1/min", "confidence": "1", "quality": "1", "delay_s": "s"}


def channel_labels(pairs: Sequence[tuple[str, str]]) -> list[str]:
    """Channel labels for ``pairs`` in outlet order.

    Examples
    --------
    >>> channel_labels([("hr", "PLETH")])[:2]
    ['hr.PLETH.rate_per_min', 'hr.PLETH.confidence']
    """
    return [f"{q}.{s}.{f}" for q, s in pairs for f in FIELDS]


class EstimateOutlet:
    """An LSL outlet for estimates.

    Parameters
    ----------
    quantities_sources : (quantity, source) pairs, e.g. ``[("hr", "PLETH"),
        ("rr", "fused")]``; one group of :data:`FIELDS` channels each.
    hop_s : the engine's hop in seconds; the nominal rate is ``1 / hop_s``.
    name : stream name.
    source_id : stream source id; by default derived from ``input_id`` and the pairs,
        so restarting on the same input gives the same id and LSL recorders reconnect.
    input_id : what the estimates are computed from (e.g. the input stream's
        source_id or the file path); only used to derive ``source_id``.
    use_stream_time : see the module notes on timestamps.
    """

    def __init__(
        self,
        quantities_sources: Iterable[tuple[str, str]],
        hop_s: float,
        name: str = "ridgewatch-estimates",
        source_id: str | None = None,
        input_id: str = "",
        use_stream_time: bool = True,
    ):
        pairs = [(str(q), str(s)) for q, s in quantities_sources]
        if not pairs:
            raise ParameterError("quantities_sources must not be empty")
        if len(set(pairs)) != len(pairs):
            raise ParameterError(f"quantities_sources={pairs} has repeated pairs")
        for quantity, _ in pairs:
            if quantity not in QUANTITIES:
                raise ParameterError(f"quantity={quantity!r} must be one of {QUANTITIES}")
        if not hop_s > 0:
            raise ParameterError(f"{hop_s=} must be > 0")
        self.pairs = pairs
        self.labels = channel_labels(pairs)
        self._column = {pair: k * len(FIELDS) for k, pair in enumerate(pairs)}
        self.source_id = source_id or derived_source_id(
            "estimates", input_id, *(f"{q}.{s}" for q, s in pairs)
        )
        info = pylsl.StreamInfo(
            name, "RateEstimates", len(self.labels), 1.0 / hop_s, pylsl.cf_double64,
            self.source_id,
        )
        channels = info.desc().append_child("channels")
        for (quantity, source) in pairs:
            for field in FIELDS:
                node = channels.append_child("channel")
                node.append_child_value("label", f"{quantity}.{source}.{field}")
                node.append_child_value("type", quantity.upper())
                node.append_child_value("unit", UNITS[field])
                node.append_child_value("quantity", quantity)
                node.append_child_value("source", source)
                node.append_child_value("field", field)
        info.desc().append_child_value("manufacturer", "ridgewatch")
        self._use_stream_time = use_stream_time
        self._outlet: pylsl.StreamOutlet | None = pylsl.StreamOutlet(info)

    def rows(self, estimates: Sequence[Estimate]) -> tuple[np.ndarray, np.ndarray]:
        """Samples ``(hops, channels)`` and their ``emitted_s`` ``(hops,)``.

        One row per distinct ``emitted_s``, in order of first appearance.

        Raises
        ------
        ParameterError
            When an estimate's (quantity, source) is not one of the outlet's pairs.
        """
        row_of: dict[float, int] = {}
        for estimate in estimates:
            row_of.setdefault(estimate.emitted_s, len(row_of))
        samples = np.full((len(row_of), len(self.labels)), np.nan)
        for estimate in estimates:
            pair = (estimate.quantity, estimate.source)
            if pair not in self._column:
                raise ParameterError(
                    f"estimate for {pair} is not among the outlet's pairs {self.pairs}"
                )
            c = self._column[pair]
            has_rate = estimate.display != WITHHOLD
            samples[row_of[estimate.emitted_s], c : c + len(FIELDS)] = (
                estimate.rate_per_min if has_rate else np.nan,
                estimate.confidence,
                estimate.quality,
                estimate.delay_s if has_rate else np.nan,
            )
        return samples, np.fromiter(row_of, dtype=np.float64, count=len(row_of))

    def push(self, estimates: Sequence[Estimate]) -> None:
        """Publish the estimates of one or more hops, one sample per hop."""
        if self._outlet is None:
            raise RuntimeError("push after close")
        if not estimates:
            return
        samples, emitted_s = self.rows(estimates)
        if self._use_stream_time:
            stamps = emitted_s.tolist()
        else:
            # Keep the spacing between hops; the newest is stamped "now".
            stamps = (pylsl.local_clock() + (emitted_s - emitted_s[-1])).tolist()
        self._outlet.push_chunk(samples, stamps)

    def close(self) -> None:
        """Destroy the outlet."""
        self._outlet = None

    def __enter__(self) -> "EstimateOutlet":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
