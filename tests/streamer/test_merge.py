"""Several streams on one grid: the incremental merger against its batch twin, and
against signals whose values at any time are known exactly."""

import numpy as np
import pytest

from streamer.sources.base import ChannelInfo, Recording, SourceInfo, Marker
from streamer.sources.merge import GridMerger, merge_batch, merge_recordings, merged_channels

PPG = SourceInfo("band", 125.0, (ChannelInfo("PPG", "ppg"),), "band-1")
ACC = SourceInfo("band-acc", 50.0, (ChannelInfo("X", "acc"), ChannelInfo("Y", "acc")), "acc-1")


def streams(seconds=20.0, acc_offset_s=0.013, jitter_s=0.0, seed=0):
    """A 1.3 Hz sine at 125 Hz and two slow lines at 50 Hz, starting 13 ms later:
    values known at every time."""
    rng = np.random.default_rng(seed)
    t1 = np.arange(int(seconds * 125)) / 125 + 100.0
    t2 = np.arange(int(seconds * 50)) / 50 + 100.0 + acc_offset_s
    t1 = t1 + rng.uniform(-jitter_s, jitter_s, len(t1))
    t2 = t2 + rng.uniform(-jitter_s, jitter_s, len(t2))
    x1 = np.sin(2 * np.pi * 1.3 * t1)[:, None]
    x2 = np.column_stack((0.5 * t2, -2.0 * t2 + 1.0))
    return [(PPG, x1, t1), (ACC, x2, t2)]


def run_incremental(parts, sizes_seed):
    rng = np.random.default_rng(sizes_seed)
    merger = GridMerger([p[0] for p in parts])
    cursors = [0] * len(parts)
    out_x, out_t = [], []
    while any(c < len(p[2]) for c, p in zip(cursors, parts)):
        k = int(rng.integers(len(parts)))
        if cursors[k] >= len(parts[k][2]):
            continue
        n = int(rng.integers(1, 40))
        a, b = cursors[k], min(cursors[k] + n, len(parts[k][2]))
        merger.push(k, parts[k][1][a:b], parts[k][2][a:b])
        cursors[k] = b
        x, t = merger.pull()
        out_x.append(x), out_t.append(t)
    for k in range(len(parts)):
        merger.set_active(k, False)  # ended
    x, t = merger.pull()
    out_x.append(x), out_t.append(t)
    return np.concatenate(out_x), np.concatenate(out_t)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_incremental_equals_batch_whatever_the_chunking(seed):
    parts = streams(jitter_s=0.001, seed=seed)
    _, bx, bt = merge_batch(parts)
    ix, it = run_incremental(parts, seed)
    np.testing.assert_array_equal(it, bt)
    np.testing.assert_allclose(ix, bx, rtol=0, atol=1e-12, equal_nan=True)


def test_values_are_interpolated_at_the_grid_of_the_fastest_stream():
    info, x, t = merge_batch(streams())
    assert info.fs == 125.0 and [c.name for c in info.channels] == ["PPG", "X", "Y"]
    np.testing.assert_allclose(np.diff(t), 1 / 125, atol=1e-9)
    assert t[0] == 100.0  # anchored at the fastest stream's first sample
    inside = np.isfinite(x[:, 1])
    # lines are exact under linear interpolation
    np.testing.assert_allclose(x[inside, 1], 0.5 * t[inside], atol=1e-9)
    np.testing.assert_allclose(x[inside, 2], -2.0 * t[inside] + 1.0, atol=1e-9)
    np.testing.assert_allclose(x[:, 0], np.sin(2 * np.pi * 1.3 * t), atol=1e-9)
    # before the accelerometer's first sample (13 ms later) there is no value for it
    assert np.isnan(x[0, 1]) and np.isfinite(x[2, 1])


def test_a_hole_in_one_stream_reads_nan_and_a_common_hole_stays_a_gap():
    parts = streams()
    info, x2, t2 = parts[1]
    hole = (t2 > 105) & (t2 < 107)  # 2 s missing from the accelerometer only
    _, x, t = merge_batch([parts[0], (info, x2[~hole], t2[~hole])])
    missing = (t > 105.02) & (t < 106.98)
    assert np.all(np.isnan(x[missing, 1:])) and np.all(np.isfinite(x[missing, 0]))
    assert np.all(np.isfinite(x[(t > 107.1) & (t < 119), 1:]))
    # the same hole in both streams: the grid skips it (a timestamp gap)
    ppg_info, x1, t1 = parts[0]
    h1 = (t1 > 105) & (t1 < 107)
    _, x, t = merge_batch([(ppg_info, x1[~h1], t1[~h1]), (info, x2[~hole], t2[~hole])])
    assert np.max(np.diff(t)) > 1.9
    assert not np.any(np.all(np.isnan(x), axis=1))


def test_a_lost_stream_stops_holding_the_grid_back():
    parts = streams(seconds=10)
    merger = GridMerger([p[0] for p in parts])
    merger.push(0, parts[0][1][:500], parts[0][2][:500])  # 4 s of PPG
    merger.push(1, parts[1][1][:50], parts[1][2][:50])    # 1 s of acc, then silence
    x, t = merger.pull()
    assert t[-1] <= parts[1][2][49] + 1e-9  # held back by the accelerometer
    merger.set_active(1, False)             # the accelerometer is lost
    x, t = merger.pull()
    assert t[-1] == pytest.approx(parts[0][2][499])
    assert np.all(np.isnan(x[t > parts[1][2][49] + 0.01, 1:]))
    assert np.all(np.isfinite(x[:, 0]))


def test_repeated_or_back_stepping_timestamps_are_dropped_and_counted():
    merger = GridMerger([PPG])
    t = np.array([0.0, 0.008, 0.008, 0.004, 0.016, 0.024])
    merger.push(0, np.arange(6.0)[:, None], t)
    assert merger.dropped == [2]
    x, g = merger.pull()
    np.testing.assert_allclose(g, [0.0, 0.008, 0.016, 0.024])
    np.testing.assert_allclose(x[:, 0], [0, 1, 4, 5])


def test_channel_names_are_labels_when_unique_else_stream_slash_label():
    a = SourceInfo("dev", 50.0, (ChannelInfo("X"),))
    b = SourceInfo("dev", 50.0, (ChannelInfo("X"),))
    c = SourceInfo("strap", 250.0, (ChannelInfo("ECG", "ecg"),))
    assert [ch.name for ch in merged_channels([a, b, c])] == ["dev (1)/X", "dev (2)/X", "ECG"]


def test_merge_recordings_keeps_markers_in_time_order_and_events():
    parts = streams(seconds=5)
    recs = [Recording(x, t, info, {"beats": np.array([100.5])} if k == 0 else {},
                      (Marker(101.0 + k, f"m{k}", info.name),))
            for k, (info, x, t) in enumerate(parts)]
    merged = merge_recordings(recs[::-1])
    assert [m.text for m in merged.markers] == ["m0", "m1"]
    assert "beats" in merged.events
    assert merged.info.fs == 125.0


def test_a_fastest_stream_that_never_sends_does_not_block_the_others():
    """A 250 Hz chest strap that never delivers, beside a 125 Hz wrist band: once the
    strap is marked lost, the band's samples come through (on the 250 Hz grid), as in
    the batch twin of the same streams."""
    strap = SourceInfo("strap", 250.0, (ChannelInfo("ECG", "ecg"),))
    parts = streams(seconds=2)[:1]
    merger = GridMerger([strap, PPG])
    merger.push(1, parts[0][1], parts[0][2])
    assert len(merger.pull()[1]) == 0  # still waiting for the strap
    merger.set_active(0, False)
    x, t = merger.pull()
    _, bx, bt = merge_batch([(strap, np.zeros((0, 1)), np.zeros(0)), parts[0]])
    assert len(t) > 400 and t[0] == parts[0][2][0]
    np.testing.assert_array_equal(t, bt)
    np.testing.assert_allclose(x, bx, equal_nan=True)
    assert np.all(np.isnan(x[:, 0])) and np.all(np.isfinite(x[:, 1]))
