"""Beats and HRV as LSL streams (``--publish`` with ``--beats`` or ``--hrv``).

Two irregular-rate double64 streams beside the estimate streams:

* ``"<name> beats"`` (type ``Beats``): one sample per beat row of the beats file, with
  channels ``source_index``, ``interval_ms``, ``nn_ms``, ``flag_index`` and
  ``delay_s``; the stream's description lists the sources and flags by index
  (``<sources>``, ``<flags>``), since an LSL sample holds numbers only. Stamped with the
  beat's time.
* ``"<name> hrv"`` (type ``HRV``): one sample per HRV update (every 5 s), with
  ``<source>.rmssd_ms``, ``<source>.sdnn_ms``, ``<source>.mean_nn_ms``,
  ``<source>.corrected_share`` and ``<source>.dfa_alpha1`` for every source (NaN where
  there is no value). Stamped with the update's ``emitted_s``.

Timestamps follow :mod:`streamer.sinks.outlet`: stream time on live input; in replay
shifted so that the newest sample seen is "now" on the local LSL clock.
"""

from __future__ import annotations

import math

import numpy as np
import pylsl

from estimators.hrv import FLAGS
from streamer.sources.lsl_publish import derived_source_id

BEAT_FIELDS = ("source_index", "interval_ms", "nn_ms", "flag_index", "delay_s")
HRV_FIELDS = ("rmssd_ms", "sdnn_ms", "mean_nn_ms", "corrected_share", "dfa_alpha1")
_UNITS = {"interval_ms": "ms", "nn_ms": "ms", "delay_s": "s", "rmssd_ms": "ms",
          "sdnn_ms": "ms", "mean_nn_ms": "ms", "corrected_share": "1", "dfa_alpha1": "1",
          "source_index": "1", "flag_index": "1"}


def _channels(info: pylsl.StreamInfo, labels, kind: str) -> None:
    channels = info.desc().append_child("channels")
    for label in labels:
        node = channels.append_child("channel")
        node.append_child_value("label", label)
        node.append_child_value("type", kind)
        node.append_child_value("unit", _UNITS[label.rsplit(".", 1)[-1]])
    info.desc().append_child_value("manufacturer", "ridgewatch")


class BeatOutlet:
    """The beats stream and the HRV stream of a run (see the module notes).

    Parameters
    ----------
    sources : the beat sources (PPG/ECG channel names), in order.
    name : the streams' common name (e.g. ``"ridgewatch <input>"``).
    input_id : what the beats come from, for stable source ids.
    use_stream_time : stamp with stream time (live) or shift onto the local clock.
    """

    def __init__(self, sources, name: str, input_id: str = "", use_stream_time: bool = True):
        self.sources = [str(s) for s in sources]
        self._index = {s: i for i, s in enumerate(self.sources)}
        self._use_stream_time = use_stream_time
        base = derived_source_id("beats", input_id, *self.sources)
        self.beats_name, self.hrv_name = f"{name} beats", f"{name} hrv"
        info = pylsl.StreamInfo(self.beats_name, "Beats", len(BEAT_FIELDS), pylsl.IRREGULAR_RATE,
                                pylsl.cf_double64, f"{base}.beats")
        _channels(info, BEAT_FIELDS, "Beats")
        listing = info.desc().append_child("sources")
        for s in self.sources:
            listing.append_child_value("source", s)
        flags = info.desc().append_child("flags")
        for f in FLAGS:
            flags.append_child_value("flag", f)
        self._beats = pylsl.StreamOutlet(info)
        labels = [f"{s}.{f}" for s in self.sources for f in HRV_FIELDS]
        info = pylsl.StreamInfo(self.hrv_name, "HRV", len(labels), pylsl.IRREGULAR_RATE,
                                pylsl.cf_double64, f"{base}.hrv")
        _channels(info, labels, "HRV")
        self._hrv = pylsl.StreamOutlet(info)

    @property
    def names(self) -> list[str]:
        return [self.beats_name, self.hrv_name]

    def _shift(self, newest_s: float) -> float:
        if self._use_stream_time or not math.isfinite(newest_s):
            return 0.0 if self._use_stream_time else pylsl.local_clock()
        return pylsl.local_clock() - newest_s

    def beat_samples(self, rows) -> tuple[np.ndarray, np.ndarray]:
        """``(n, 5)`` samples and their beat times for ``(source, BeatRow)`` pairs."""
        samples = np.array([(self._index[s], r.interval_ms, r.nn_ms, FLAGS.index(r.flag),
                             r.delay_s) for s, r in rows], dtype=np.float64).reshape(-1, 5)
        return samples, np.array([r.time_s for _, r in rows], dtype=np.float64)

    def hrv_samples(self, rows) -> tuple[np.ndarray, np.ndarray]:
        """One sample per ``emitted_s`` of ``(source, HrvRow)`` pairs (sources without a
        row at that time: NaN)."""
        times = sorted({r.emitted_s for _, r in rows})
        samples = np.full((len(times), len(self.sources) * len(HRV_FIELDS)), np.nan)
        at = {t: k for k, t in enumerate(times)}
        for s, r in rows:
            c = self._index[s] * len(HRV_FIELDS)
            samples[at[r.emitted_s], c:c + len(HRV_FIELDS)] = [getattr(r, f) for f in HRV_FIELDS]
        return samples, np.array(times, dtype=np.float64)

    def push(self, beats, hrv, newest_s: float = math.nan) -> None:
        """Publish ``(source, BeatRow)`` and ``(source, HrvRow)`` pairs."""
        shift = self._shift(newest_s)
        if beats:
            samples, stamps = self.beat_samples(beats)
            self._beats.push_chunk(samples, (stamps + shift).tolist())
        if hrv:
            samples, stamps = self.hrv_samples(hrv)
            self._hrv.push_chunk(samples, (stamps + shift).tolist())

    def close(self) -> None:
        self._beats = self._hrv = None
