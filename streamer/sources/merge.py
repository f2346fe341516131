"""Several streams at their own rates on one time grid.

A lab session has several devices: a wrist band's PPG at one rate and its accelerometer
at another, a chest strap's ECG, a belt, a marker stream. The engine takes one block of
samples per chunk, so every numeric stream is put on one grid:

* **The grid** has the nominal rate of the fastest stream (no stream is sampled below
  its own rate, so nothing aliases) and is anchored at the first sample of that stream:
  grid point ``i`` is at ``t0 + i / fs``. Ties go to the stream listed first. When
  that stream sends nothing at all (it is marked lost, or has no samples in a file),
  the grid is anchored at the earliest first sample of the others, so a silent chest
  strap never blocks the wrist band.
* **Values** of each stream at a grid point are linear interpolations between the two
  samples around it, on the stream's own timestamps (LSL: the sender's clock mapped to
  ours with ``time_correction``). Where those two samples are further apart than the
  engine's gap rule (``max(3 sample periods, 0.25 s)``, :func:`estimators.monitor.find_gaps`),
  or the point is outside the stream's samples, the value is NaN: the engine counts it
  as rejected and holds its last good value, so a missing accelerometer never invents
  motion.
* **Grid points where no stream has a value are skipped**, so a hole common to every
  stream stays a timestamp gap, which the engine restarts at.

:class:`GridMerger` does this incrementally: a grid point is given out once every
*active* stream has a sample at or after it (so it can be interpolated on both sides);
a stream marked lost (or ended) stops holding the others back, and its channels read
NaN past its last sample until it resumes. :func:`merge_batch` is its batch twin: both
give the same samples for the same streams, whatever the chunking (tested).

Linear interpolation of a stream sampled at ``fs_k`` attenuates a component at ``f`` by
about ``sinc^2(f / fs_k)``: 2 % at 8 Hz from a 50 Hz accelerometer, the top of the
heart-rate band, which is harmless for motion references and for rate estimation.
"""

from __future__ import annotations

import numpy as np

from streamer.sources.base import ChannelInfo, Recording, SourceInfo


def gap_limit_s(fs: float) -> float:
    """Longest step between two samples of a stream sampled at ``fs`` that is still
    interpolated across: the engine's gap rule (``estimators.monitor.find_gaps``)."""
    return max(3.0 / fs, 0.25)


def merged_channels(infos: list[SourceInfo]) -> tuple[ChannelInfo, ...]:
    """The merged channel list: each channel keeps its label when no other stream has
    a channel of that label, else it is called ``STREAM/LABEL``; should that still
    collide (two streams of one name), ``STREAM (k)/LABEL`` with ``k`` the stream's
    1-based position.

    >>> a = SourceInfo("band", 125.0, (ChannelInfo("PPG", "ppg"), ChannelInfo("X", "acc")))
    >>> b = SourceInfo("strap", 250.0, (ChannelInfo("ECG", "ecg"), ChannelInfo("X", "acc")))
    >>> [c.name for c in merged_channels([a, b])]
    ['PPG', 'band/X', 'ECG', 'strap/X']
    """
    counts: dict[str, int] = {}
    for info in infos:
        for c in info.channels:
            counts[c.name] = counts.get(c.name, 0) + 1
    names = [[c.name if counts[c.name] == 1 else f"{info.name}/{c.name}"
              for c in info.channels] for info in infos]
    flat = [n for group in names for n in group]
    out = []
    for k, (info, group) in enumerate(zip(infos, names)):
        for c, name in zip(info.channels, group):
            if flat.count(name) > 1:
                name = f"{info.name} ({k + 1})/{c.name}"
            out.append(ChannelInfo(name, c.kind, c.unit))
    return tuple(out)


def merged_info(infos: list[SourceInfo], name: str | None = None) -> SourceInfo:
    """The :class:`SourceInfo` of the merged streams: the fastest rate, all channels."""
    if not infos:
        raise ValueError("merged_info needs at least one stream")
    fastest = _fastest(infos)
    return SourceInfo(name or " + ".join(i.name for i in infos), infos[fastest].fs,
                      merged_channels(infos),
                      " + ".join(i.source_id for i in infos if i.source_id))


def _fastest(infos: list[SourceInfo]) -> int:
    rates = [i.fs for i in infos]
    return int(np.argmax(rates))  # first of the fastest


def _interpolate(t: np.ndarray, x: np.ndarray, grid: np.ndarray, limit_s: float) -> np.ndarray:
    """``x`` (n, c) sampled at increasing ``t`` read at ``grid``; NaN outside ``t`` and
    between samples further apart than ``limit_s``."""
    out = np.full((len(grid), x.shape[1]), np.nan)
    if len(t) == 0 or len(grid) == 0:
        return out
    right = np.searchsorted(t, grid, side="left")  # first sample at or after the point
    exact = (right < len(t)) & (t[np.minimum(right, len(t) - 1)] == grid)
    inside = (right > 0) & (right < len(t))
    left = np.maximum(right - 1, 0)
    r = np.minimum(right, len(t) - 1)
    span = t[r] - t[left]
    ok = inside & (span <= limit_s) & (span > 0)
    w = np.zeros(len(grid))
    w[ok] = (grid[ok] - t[left[ok]]) / span[ok]
    rows = np.where(ok)[0]
    out[rows] = x[left[rows]] * (1.0 - w[rows, None]) + x[r[rows]] * w[rows, None]
    rows = np.where(exact)[0]
    out[rows] = x[right[rows]]
    return out


def _increasing(t: np.ndarray, after: float) -> np.ndarray:
    """Mask of the samples whose time is after every sample before them (and after
    ``after``): repeated or back-stepping timestamps are dropped."""
    if len(t) == 0:
        return np.zeros(0, dtype=bool)
    running = np.maximum.accumulate(np.concatenate(([after], t)))[:-1]
    return t > running


class GridMerger:
    """Incremental merge of several streams onto one grid (see the module docstring).

    Parameters
    ----------
    infos : each stream's :class:`SourceInfo` (nominal rate, channels), in order.
    """

    def __init__(self, infos: list[SourceInfo]):
        if not infos:
            raise ValueError("GridMerger needs at least one stream")
        self.infos = list(infos)
        self.info = merged_info(self.infos)
        self.fs = self.info.fs
        self._fastest = _fastest(self.infos)
        widths = [len(i.channels) for i in self.infos]
        self._offsets = np.concatenate(([0], np.cumsum(widths))).astype(int)
        self._t = [np.zeros(0) for _ in self.infos]
        self._x = [np.zeros((0, w)) for w in widths]
        self._last_s = [-np.inf] * len(self.infos)
        self._active = [True] * len(self.infos)
        self._t0: float | None = None
        self._first_s = [np.inf] * len(self.infos)
        self._next = 0  # index of the next grid point to give out
        self.dropped = [0] * len(self.infos)  # samples with repeated/back-stepping times

    def push(self, k: int, samples: np.ndarray, timestamps: np.ndarray) -> None:
        """Add samples ``(n, channels of stream k)`` with their timestamps."""
        samples = np.asarray(samples, dtype=np.float64).reshape(len(timestamps), -1)
        timestamps = np.asarray(timestamps, dtype=np.float64)
        keep = _increasing(timestamps, self._last_s[k])
        self.dropped[k] += int(len(keep) - keep.sum())
        if not keep.any():
            return
        samples, timestamps = samples[keep], timestamps[keep]
        self._t[k] = np.concatenate((self._t[k], timestamps))
        self._x[k] = np.concatenate((self._x[k], samples))
        self._last_s[k] = float(timestamps[-1])
        self._first_s[k] = min(self._first_s[k], float(timestamps[0]))
        self._active[k] = True
        if self._t0 is None and k == self._fastest:
            self._t0 = float(timestamps[0])

    def set_active(self, k: int, active: bool) -> None:
        """Mark stream ``k`` lost or ended (False) or back (True). An inactive stream
        does not hold the grid back; a push makes it active again."""
        self._active[k] = bool(active)

    def pull(self) -> tuple[np.ndarray, np.ndarray]:
        """Grid samples ``(n, all channels)`` and their times that are ready now."""
        if (self._t0 is None and not self._active[self._fastest]
                and np.isfinite(min(self._first_s))):
            self._t0 = min(self._first_s)  # the fastest stream sent nothing
        if self._t0 is None:
            return np.zeros((0, self._offsets[-1])), np.zeros(0)
        active = [s for s, a in zip(self._last_s, self._active) if a]
        if active:
            horizon = min(active)
        else:
            horizon = max(self._last_s)
        if not np.isfinite(horizon):  # an active stream has sent nothing yet
            return np.zeros((0, self._offsets[-1])), np.zeros(0)
        stop = int(np.floor((horizon - self._t0) * self.fs + 1e-9)) + 1
        if stop <= self._next:
            return np.zeros((0, self._offsets[-1])), np.zeros(0)
        grid = self._t0 + np.arange(self._next, stop) / self.fs
        self._next = stop
        out = np.concatenate([_interpolate(t, x, grid, gap_limit_s(info.fs))
                              for t, x, info in zip(self._t, self._x, self.infos)], axis=1)
        self._forget(grid[-1])
        has_value = ~np.all(np.isnan(out), axis=1)
        return out[has_value], grid[has_value]

    def _forget(self, last_grid_s: float) -> None:
        """Keep, per stream, only the last sample at or before the newest grid point
        given out, and what follows it: that is all later points can need."""
        for k, t in enumerate(self._t):
            first = max(int(np.searchsorted(t, last_grid_s, side="right")) - 1, 0)
            if first:
                self._t[k] = t[first:]
                self._x[k] = self._x[k][first:]


def merge_batch(parts: list[tuple[SourceInfo, np.ndarray, np.ndarray]],
                name: str | None = None) -> tuple[SourceInfo, np.ndarray, np.ndarray]:
    """The batch twin of :class:`GridMerger`: ``parts`` are ``(info, samples,
    timestamps)`` per stream; returns the merged info, samples and grid times."""
    infos = [p[0] for p in parts]
    info = merged_info(infos, name)
    fastest = _fastest(infos)
    cleaned = []
    for part_info, x, t in parts:
        t = np.asarray(t, dtype=np.float64)
        x = np.asarray(x, dtype=np.float64).reshape(len(t), len(part_info.channels))
        keep = _increasing(t, -np.inf)
        cleaned.append((t[keep], x[keep]))
    t_fast = cleaned[fastest][0]
    width = sum(len(i.channels) for i in infos)
    firsts = [float(t[0]) for t, _ in cleaned if len(t)]
    if not firsts:
        return info, np.zeros((0, width)), np.zeros(0)
    t0 = float(t_fast[0]) if len(t_fast) else min(firsts)
    end = max(float(t[-1]) for t, _ in cleaned if len(t))
    grid = t0 + np.arange(int(np.floor((end - t0) * info.fs + 1e-9)) + 1) / info.fs
    out = np.concatenate([_interpolate(t, x, grid, gap_limit_s(i.fs))
                          for (t, x), i in zip(cleaned, infos)], axis=1)
    has_value = ~np.all(np.isnan(out), axis=1)
    return info, out[has_value], grid[has_value]


def merge_recordings(recordings: list[Recording], name: str | None = None) -> Recording:
    """Several recordings of one session (e.g. the streams of one XDF file) as one
    :class:`Recording` on the grid of the fastest; reference events and markers are
    kept (markers in time order)."""
    if len(recordings) == 1 and name is None:
        return recordings[0]
    info, samples, timestamps = merge_batch(
        [(r.info, r.samples, r.timestamps) for r in recordings], name)
    events: dict = {}
    for r in recordings:
        for key, value in r.events.items():
            events.setdefault(key, value)
    markers = tuple(sorted((m for r in recordings for m in r.markers),
                           key=lambda m: m.time_s))
    return Recording(samples, timestamps, info, events, markers)

