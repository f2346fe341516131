"""Channel selection: ``--channel NAME=KIND`` specs, metadata, label guessing, errors."""

from __future__ import annotations

import pytest

from streamer.channels import Selected, guess_kind, parse_spec, select
from streamer.errors import InputError
from streamer.sources.base import ChannelInfo, SourceInfo


def info(*names, kinds=None) -> SourceInfo:
    kinds = kinds or [None] * len(names)
    return SourceInfo("rec.csv", 125.0, tuple(ChannelInfo(n, k) for n, k in zip(names, kinds)))


def test_specs_by_name_and_index_in_the_order_given():
    src = info("PLETH", "II", "RESP", "ACC_X")
    assert select(src, ["RESP=resp", "0=ppg", " II = ECG "]) == [
        Selected(2, "RESP", "resp"), Selected(0, "PLETH", "ppg"), Selected(1, "II", "ecg")]


def test_a_name_wins_over_an_index():
    src = info("x", "0", "y")
    assert select(src, ["0=ppg"]) == [Selected(1, "0", "ppg")]
    assert select(src, ["2=resp"]) == [Selected(2, "y", "resp")]


def test_specs_override_metadata():
    src = info("a", "b", kinds=["ecg", None])
    assert select(src, ["a=ppg"]) == [Selected(0, "a", "ppg")]


def test_name_matching_ignores_case_when_unambiguous():
    assert select(info("PLETH", "MLII"), ["mlii=ecg"]) == [Selected(1, "MLII", "ecg")]
    with pytest.raises(InputError, match=r"rec\.csv: no channel 'resp'; channels are: "
                                         r"Resp, RESP"):
        select(info("Resp", "RESP"), ["resp=resp"])


def test_name_containing_equals_sign():
    assert select(info("a=b", "c"), ["a=b=ppg"]) == [Selected(0, "a=b", "ppg")]


@pytest.mark.parametrize("spec, message", [
    ("PLETH", r"--channel 'PLETH': expected NAME=KIND, e\.g\. PLETH=ppg \(KIND is one of "
              r"ppg, ecg, resp, acc\)"),
    ("PLETH=eeg", r"--channel 'PLETH=eeg': kind 'eeg' is not one of ppg, ecg, resp, acc"),
    ("=ppg", r"--channel '=ppg': the channel name is empty"),
])
def test_bad_spec(spec, message):
    with pytest.raises(InputError, match=message):
        parse_spec(spec)
    with pytest.raises(InputError, match=message):
        select(info("PLETH"), [spec])


def test_unknown_channel_lists_the_channels():
    with pytest.raises(InputError, match=r"rec\.csv: no channel 'SpO2'; channels are: PLETH, "
                                         r"II, RESP \(or a 0-based index below 3\)"):
        select(info("PLETH", "II", "RESP"), ["SpO2=ppg"])
    with pytest.raises(InputError, match=r"no channel '3'; channels are: PLETH, II, RESP"):
        select(info("PLETH", "II", "RESP"), ["3=ppg"])


def test_channel_named_twice():
    with pytest.raises(InputError, match=r"rec\.csv: channel 'PLETH' is named twice in "
                                         r"--channel"):
        select(info("PLETH", "II"), ["PLETH=ppg", "0=ecg"])


def test_only_motion_channels_named():
    with pytest.raises(InputError, match=r"rec\.csv: --channel names no PPG, ECG or "
                                         r"respiration channel \(only ACC_X=acc\)"):
        select(info("PLETH", "ACC_X"), ["ACC_X=acc"])


@pytest.mark.parametrize("label, kind", [
    ("PLETH", "ppg"), ("ppg", "ppg"), ("PPG2", "ppg"), ("wrist_ppg", "ppg"), ("BVP", "ppg"),
    ("II", "ecg"), ("MLII", "ecg"), ("V5", "ecg"), ("ECG", "ecg"), ("ekg lead I", "ecg"),
    ("RESP", "resp"), ("Respiration", "resp"), ("belt", "resp"),
    ("ACC_X", "acc"), ("acc y", "acc"), ("Accelerometer", "acc"),
    ("SpO2", None), ("HR", None), ("time", None), ("EDA", None), ("marker", None),
])
def test_guess_kind_from_label(label, kind):
    assert guess_kind(label) == kind


def test_guessing_from_labels_keeps_usable_channels_in_file_order():
    src = info("time_ms", "PLETH", "SpO2", "II", "RESP", "ACC_X")
    assert select(src, None) == [Selected(1, "PLETH", "ppg"), Selected(3, "II", "ecg"),
                                 Selected(4, "RESP", "resp"), Selected(5, "ACC_X", "acc")]


def test_metadata_kind_wins_over_label():
    src = info("ch0", "PLETH", kinds=["ecg", "resp"])
    assert select(src, []) == [Selected(0, "ch0", "ecg"), Selected(1, "PLETH", "resp")]


def test_nothing_usable_says_how_to_name_channels():
    with pytest.raises(InputError, match=r"rec\.csv: cannot tell which channels are PPG, ECG "
                                         r"or respiration \(channels: ch0, ch1\); name them "
                                         r"with --channel NAME=KIND, e\.g\. --channel ch0=ppg"):
        select(info("ch0", "ch1"), None)
    # A motion channel alone is not enough either, and is never suggested as a PPG.
    with pytest.raises(InputError, match=r"^rec\.csv: holds accelerometer channels only "
                                         r"\(ACC_X=acc, ACC_Y=acc\); heart and breathing "
                                         r"rates need a PPG, ECG or respiration channel: add "
                                         r"the stream or file that carries it$"):
        select(info("ACC_X", "ACC_Y"), None)
    # With an unknown channel beside it, the unknown one is the suggestion.
    with pytest.raises(InputError, match=r"e\.g\. --channel sensor=ppg$"):
        select(info("ACC_X", "sensor"), None)
