"""Beats and HRV during a run: the runner's hook for ``--beats``, ``--hrv`` and their
LSL streams.

:class:`BeatSession` keeps one :class:`estimators.hrv.BeatAnalysis` per PPG or ECG
channel, feeds it every chunk the runner processes, writes the beats file and the HRV
file (flushed per line) and pushes both to the outlet. It never blocks the estimates:
its work per chunk is a few array operations per channel.
"""

from __future__ import annotations

import math

import numpy as np

from estimators.beats import MIN_FS_HZ, PULSE_KINDS
from estimators.hrv import BeatAnalysis
from streamer.errors import InputError
from streamer.sinks.beats_log import beat_cells, hrv_cells


def beat_channels(selected, fs: float, stream: str, options: str) -> list:
    """The selected channels that give beats, or an :class:`InputError` naming the
    ``options`` asked for when there are none or the rate is too low."""
    chosen = [s for s in selected if s.kind in PULSE_KINDS]
    if not chosen:
        listed = ", ".join(f"{s.name}={s.kind}" for s in selected)
        raise InputError(f"{options} needs a PPG or ECG channel; '{stream}' gives {listed} "
                         "(choose one with --channel NAME=ppg or NAME=ecg)")
    if not fs >= MIN_FS_HZ:
        raise InputError(f"{options}: '{stream}' is sampled at {fs:g} Hz; beats need at "
                         f"least {MIN_FS_HZ:g} Hz")
    return chosen


class BeatSession:
    """Beats and HRV of the beat channels of a run.

    Parameters
    ----------
    selected : the run's channels (:class:`streamer.channels.Selected`), in the column
        order of the samples handed to :meth:`update`.
    fs : the source's nominal rate.
    channels : the beat channels (from :func:`beat_channels`).
    beats_file, hrv_file : :class:`streamer.sinks.beats_log.TableFile` or None.
    outlet : :class:`streamer.sinks.beats_outlet.BeatOutlet` or None.
    """

    def __init__(self, selected, fs: float, channels, beats_file=None, hrv_file=None,
                 outlet=None):
        columns = {s.name: k for k, s in enumerate(selected)}
        self.paths = [(columns[s.name], s.name, BeatAnalysis(s.kind, fs)) for s in channels]
        self.beats_file, self.hrv_file, self.outlet = beats_file, hrv_file, outlet
        self.latest: dict = {}
        """Source -> its newest :class:`estimators.hrv.HrvRow` (for displays)."""

    @property
    def sources(self) -> list[str]:
        return [name for _, name, _ in self.paths]

    def update(self, samples: np.ndarray, timestamps: np.ndarray) -> list:
        """Feed one chunk (the runner's selected columns); returns the new ``(source,
        HrvRow)`` pairs."""
        beats, hrv = [], []
        for column, name, analysis in self.paths:
            rows, hrv_rows = analysis.update(samples[:, column], timestamps)
            beats += [(name, r) for r in rows]
            hrv += [(name, r) for r in hrv_rows]
            if hrv_rows:
                self.latest[name] = hrv_rows[-1]
        self._write(beats, hrv, float(timestamps[-1]) if len(timestamps) else math.nan)
        return hrv

    def _write(self, beats, hrv, newest_s: float) -> None:
        if self.beats_file is not None:
            for name, row in beats:
                self.beats_file.write_cells(beat_cells(name, row))
        if self.hrv_file is not None:
            for name, row in hrv:
                self.hrv_file.write_cells(hrv_cells(name, row))
        if self.outlet is not None and (beats or hrv):
            self.outlet.push(beats, hrv, newest_s)

    def restart(self) -> None:
        """The time axis may jump (a stream came back): decide the waiting beats and
        start afresh."""
        self._finish()
        for _, _, analysis in self.paths:
            analysis.reset()

    def _finish(self) -> None:
        beats = [(name, r) for _, name, analysis in self.paths for r in analysis.finish()]
        self._write(beats, [], math.nan)

    def write_event(self, kind: str, message: str, time_s: float = math.nan) -> None:
        for sink in (self.beats_file, self.hrv_file):
            if sink is not None:
                sink.write_event(kind, message, time_s)

    def close(self) -> None:
        """Write the beats still waiting for their lookahead, then close the files and
        the outlet."""
        try:
            self._finish()
        finally:
            for sink in (self.beats_file, self.hrv_file, self.outlet):
                if sink is not None:
                    sink.close()


def write_offline(recording_samples, timestamps, fs: float, selected, channels,
                  beats_file=None, hrv_file=None) -> tuple[int, int]:
    """The offline twin: beats from zero-phase filtering of the whole record, then the
    same correction and HRV; returns the numbers of beat and HRV rows written."""
    columns = {s.name: k for k, s in enumerate(selected)}
    beats, hrv = [], []
    for s in channels:
        rows, hrv_rows = BeatAnalysis(s.kind, fs).offline(recording_samples[:, columns[s.name]],
                                                          timestamps)
        beats += [(s.name, r) for r in rows]
        hrv += [(s.name, r) for r in hrv_rows]
    beats.sort(key=lambda p: p[1].time_s)
    hrv.sort(key=lambda p: p[1].emitted_s)
    if beats_file is not None:
        for name, row in beats:
            beats_file.write_cells(beat_cells(name, row))
    if hrv_file is not None:
        for name, row in hrv:
            hrv_file.write_cells(hrv_cells(name, row))
    return len(beats), len(hrv)
