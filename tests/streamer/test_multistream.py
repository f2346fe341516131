"""Several streams in one run, the parts that need no LSL: which streams the options
select, merged channel names in --channel and the log, and how the runner treats a
session's markers and a motion-reference stream coming back."""

from __future__ import annotations

import pytest

from estimators.errors import ParameterError
from streamer.channels import Selected, select
from streamer.errors import InputError
from streamer.runner import Runner
from streamer.sinks.estimate_log import EstimateLog, read_log
from streamer.sources.base import ChannelInfo, Marker, SourceEvent, SourceInfo
from streamer.sources.lsl_session import Criterion, LslSession, criteria_from_options
from streamer.sources.merge import merged_info
from tests.streamer.test_runner import PROFILE, FakeSource, new_log, ppg_chunks


def test_options_once_each_make_one_stream_repeated_ones_several():
    assert criteria_from_options(["a"], ["PPG"], None) == [Criterion("a", "PPG")]
    assert criteria_from_options(["a", "b"], ["Markers"], ["x"]) == [
        Criterion(name="a"), Criterion(name="b"), Criterion(type="Markers"),
        Criterion(source_id="x")]
    with pytest.raises(ParameterError, match=r"^criteria must name at least one stream$"):
        LslSession([])


def test_merged_names_work_in_channel_and_the_log_header(tmp_path):
    band = SourceInfo("band", 125.0, (ChannelInfo("PPG", "ppg"), ChannelInfo("X", "acc")))
    strap = SourceInfo("strap", 250.0, (ChannelInfo("ECG", "ecg"), ChannelInfo("X", "acc")))
    info = merged_info([band, strap])
    chosen = select(info, ["PPG=ppg", "band/X=acc", "strap/X=acc"])
    assert [(c.index, c.name) for c in chosen] == [(0, "PPG"), (1, "band/X"), (3, "strap/X")]
    with pytest.raises(InputError, match=r"^band \+ strap: no channel 'X'; channels are: "
                                         r"PPG, band/X, ECG, strap/X \(or a 0-based index "
                                         r"below 4\)$"):
        select(info, ["PPG=ppg", "X=acc"])
    mapping = {c.name: c.kind for c in chosen}
    log = EstimateLog(tmp_path / "log.csv", "live", info.name, mapping, {})
    log.close()
    assert read_log(tmp_path / "log.csv").header["channels"] == mapping


def _run(tmp_path, items):
    runner = Runner(FakeSource(items), [Selected(0, "PLETH", "ppg")], PROFILE,
                    log=new_log(tmp_path))
    resets = []
    reset = runner.monitor.reset
    runner.monitor.reset = lambda: (resets.append(1), reset())
    runner.run()
    return read_log(tmp_path / "run.csv"), resets


@pytest.mark.parametrize("restart", [False, True])
def test_runner_restarts_only_when_the_returning_stream_asks(tmp_path, restart):
    back = SourceEvent("resumed", "stream 'arm-acc' is back", 20.0,
                       {"stream": "arm-acc", "restart": restart})
    table, resets = _run(tmp_path, ppg_chunks(0.0, 20.0) + [back] + ppg_chunks(20.0, 4.0))
    assert resets == ([1] if restart else [])
    late = table.select("hr", "PLETH").columns["emitted_s"] > 20.0
    # Without a restart the windows run on and hops continue right after the event.
    assert late.sum() == (0 if restart else 16)


def test_runner_writes_a_sessions_markers_to_the_log(tmp_path):
    marker = Marker(5.0, 'stage 2, "fast" – café', "lab-markers")
    chunks = ppg_chunks(0.0, 10.0)
    table, _ = _run(tmp_path, chunks[:10] + [marker] + chunks[10:])
    assert table.markers == [marker]
