"""The display snapshot: what the runner hands a window after each chunk, built from the
monitor in one place (``streamer.display.snapshot``) and read-only."""

from __future__ import annotations

import numpy as np
import pytest

from estimators.monitor import RateMonitor
from streamer.display.buffers import DisplayLayout
from streamer.display.snapshot import DisplaySnapshot, describe_outputs, take_snapshot
from streamer.simulation import pulse_train

FS = 125.0


def chunks(seconds=40.0, chunk_s=1.3):
    t = np.arange(int(seconds * FS)) / FS
    ppg = pulse_train(FS, np.full(len(t), 72.0), seed=2)
    ecg_like = pulse_train(FS, np.full(len(t), 72.0), seed=3)
    resp = np.sin(2 * np.pi * 0.25 * t)
    samples = np.column_stack((ppg, ecg_like, resp))
    n = int(chunk_s * FS)
    return [(samples[a:a + n], t[a:a + n]) for a in range(0, len(t), n)]


def test_snapshot_holds_each_tracked_outputs_band_ridge_and_integrity():
    monitor = RateMonitor([("A", "ppg"), ("B", "ppg"), ("R", "resp")], FS, "wrist")
    seen = set()
    for x, t in chunks():
        estimates = monitor.update(x, t)
        snapshot = take_snapshot(monitor, estimates)
        # Every tracked output with hops in the chunk; breathing from the pulse has no
        # band spectrum of its own.
        assert set(snapshot.spectra) == {key for key, block in monitor.last_blocks.items()
                                         if len(block)}
        for key, band in snapshot.spectra.items():
            seen.add(key)
            block = monitor.last_blocks[key]
            np.testing.assert_array_equal(band.time_s, block.time_s)
            np.testing.assert_array_equal(band.spectra, block.spectra)
            np.testing.assert_array_equal(band.integrity, block.integrity)
            np.testing.assert_array_equal(band.rates_per_min, monitor.outputs[key].rates)
            assert band.spectra.shape == (len(band), len(band.rates_per_min))
            mine = [e for e in estimates if (e.quantity, e.source) == key]
            np.testing.assert_array_equal(band.ridge_time_s, [e.time_s for e in mine])
            np.testing.assert_array_equal(band.ridge_per_min, [e.rate_per_min for e in mine])
            for array in (band.time_s, band.spectra, band.rates_per_min, band.integrity,
                          band.ridge_time_s, band.ridge_per_min):
                with pytest.raises(ValueError, match="read-only"):
                    array[...] = 0.0
        with pytest.raises(TypeError):
            snapshot.spectra[("hr", "X")] = None  # a read-only mapping
    assert seen == {("hr", "A"), ("hr", "B"), ("hr", "fused"), ("rr", "R")}
    # The engine's own arrays stay writable: the views are read-only, not the data.
    assert next(iter(monitor.last_blocks.values())).spectra.flags.writeable
    assert DisplaySnapshot.empty().spectra == {}


def test_layout_lists_every_stream_of_the_monitor_in_display_order():
    monitor = RateMonitor([("A", "ppg"), ("B", "ppg"), ("R", "resp")], FS, "wrist")
    outputs = describe_outputs(monitor)
    assert [o.key for o in outputs] == [("hr", "A"), ("hr", "B"), ("hr", "fused"), ("rr", "R"),
                                        ("rr", "A"), ("rr", "B")]
    assert set(o.key for o in outputs) == set(monitor.streams)
    assert [o.from_pulse for o in outputs] == [False] * 4 + [True] * 2
    assert [o.key for o in DisplayLayout.from_monitor(monitor).outputs] == [
        o.key for o in outputs]
