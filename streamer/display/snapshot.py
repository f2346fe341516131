"""What a display is handed: the engine's outputs described once, and a snapshot of
what the engine made of each chunk.

A display never reads the engine (:class:`estimators.monitor.RateMonitor`) itself. The
runner builds, once per chunk, a :class:`DisplaySnapshot` with :func:`take_snapshot`
and hands it over inside its :class:`~streamer.runner.Update`; the window is laid out
once from :func:`describe_outputs`. These two functions are the only code on the
display's side that reads the monitor, so the engine can change its insides without
touching a window.

Everything here is read-only: frozen dataclasses, read-only array views (no copies: a
chunk's arrays are made afresh by the engine and never changed after it hands them
over), and read-only mappings.

Examples
--------
>>> import numpy as np
>>> from estimators.monitor import RateMonitor
>>> fs = 125.0
>>> t = np.arange(int(12 * fs)) / fs
>>> monitor = RateMonitor([("finger", "ppg")], fs, "fingertip-rest")
>>> estimates = monitor.update(np.sin(2 * np.pi * 1.2 * t)[:, None], t)
>>> snapshot = take_snapshot(monitor, estimates)
>>> band = snapshot.spectra[("hr", "finger")]
>>> band.spectra.shape == (len(band.time_s), len(band.rates_per_min))
True
>>> round(float(band.ridge_per_min[-1]))
72
"""

from __future__ import annotations

import types
from dataclasses import dataclass
from typing import Mapping

import numpy as np


def _read_only(array) -> np.ndarray:
    view = np.asarray(array, dtype=np.float64).view()
    view.flags.writeable = False
    return view


@dataclass(frozen=True)
class OutputInfo:
    """One (quantity, source) the engine reports, and how to draw it.

    Attributes
    ----------
    quantity, source : the pair in the estimates.
    hop_s : time between estimates.
    halfwidth_per_min : the confidence half-width of its settings.
    first_estimate_s : seconds of signal before the first estimate.
    band_per_min : lowest and highest rate its settings allow.
    grid : rates per minute of its spectra's bins, or None when the engine exposes no
        spectra for it (no time-frequency image then).
    deshape : whether its spectra are de-shape spectra.
    from_pulse : a breathing rate derived from the pulse of a PPG or ECG channel.
    """

    quantity: str
    source: str
    hop_s: float
    halfwidth_per_min: float
    first_estimate_s: float
    band_per_min: tuple = (0.0, 1.0)
    grid: np.ndarray | None = None
    deshape: bool = True
    from_pulse: bool = False

    @property
    def key(self) -> tuple:
        return (self.quantity, self.source)


@dataclass(frozen=True)
class OutputSpectra:
    """The band spectra one tracked output used in a chunk, and its ridge.

    Attributes
    ----------
    time_s : (P,) the centre of each hop's window (stream seconds).
    spectra : (P, F) the band spectra the tracker saw at those hops (de-shape spectra
        when the output's settings say so; after the motion stage when it runs).
    rates_per_min : (F,) the rate of each bin (the output's grid).
    integrity : (P,) the share of each hop's window that was usable signal (finite, in
        range, not stuck), in [0, 1]: the channel's data quality at that hop (for a
        fused output, the best channel's).
    ridge_time_s, ridge_per_min : the output's estimates in this chunk, their times
        and rates (NaN where withheld): where the tracker's ridge was read. They may
        refer to other hops than ``time_s`` (fixed-lag smoothing reports earlier hops).
    """

    time_s: np.ndarray
    spectra: np.ndarray
    rates_per_min: np.ndarray
    integrity: np.ndarray
    ridge_time_s: np.ndarray
    ridge_per_min: np.ndarray

    def __len__(self) -> int:
        return len(self.time_s)


@dataclass(frozen=True)
class DisplaySnapshot:
    """What the engine made of one chunk, for a display.

    Attributes
    ----------
    spectra : read-only mapping (quantity, source) -> :class:`OutputSpectra`, for every
        tracked output that completed at least one hop in the chunk. Breathing rates
        from the pulse have no band spectrum of their own and are not in it.
    """

    spectra: Mapping[tuple, OutputSpectra]

    @staticmethod
    def empty() -> "DisplaySnapshot":
        return DisplaySnapshot(types.MappingProxyType({}))


def take_snapshot(monitor, estimates) -> DisplaySnapshot:
    """The snapshot of the chunk ``monitor`` just processed; ``estimates``: what its
    ``update`` returned for that chunk."""
    ridges: dict = {}
    for e in estimates:
        ridges.setdefault((e.quantity, e.source), []).append((e.time_s, e.rate_per_min))
    spectra = {}
    for key, block in monitor.last_blocks.items():
        if len(block) == 0 or key not in monitor.outputs:
            continue
        ridge = np.array(ridges.get(key, []), dtype=np.float64).reshape(-1, 2)
        spectra[key] = OutputSpectra(
            _read_only(block.time_s), _read_only(block.spectra),
            _read_only(monitor.outputs[key].rates), _read_only(block.integrity),
            _read_only(ridge[:, 0]), _read_only(ridge[:, 1]))
    return DisplaySnapshot(types.MappingProxyType(spectra))


def describe_outputs(monitor) -> tuple[OutputInfo, ...]:
    """Every output ``monitor`` reports, in display order: heart rates first (the fused
    one last among them), then breathing rates (those from the pulse last)."""
    outputs = []
    for (quantity, source), out in monitor.outputs.items():
        s = out.settings
        outputs.append(OutputInfo(quantity, source, s.hop_s, s.confidence_halfwidth_per_min,
                                  s.min_window_s, tuple(s.band_per_min),
                                  _read_only(out.rates), s.deshape))
    # Breathing rates from the pulse have no band spectrum of their own to show.
    for name, breathing in getattr(monitor, "pulse_breathing", {}).items():
        s = breathing.settings
        outputs.append(OutputInfo("rr", name, s.hop_s, s.confidence_halfwidth_per_min,
                                  s.min_window_s, tuple(s.band_per_min), None, s.deshape,
                                  from_pulse=True))
    order = {"hr": 0, "rr": 1}
    outputs.sort(key=lambda o: (order.get(o.quantity, 2), o.source == "fused", o.from_pulse))
    return tuple(outputs)
