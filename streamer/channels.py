"""Which channels of a source feed the engine, and as what kind.

``--channel NAME=KIND`` (repeatable): NAME is a channel label or a 0-based index, KIND
one of ppg, ecg, resp, acc. Without any ``--channel``, kinds come from the source's
own metadata (LSL channel ``type``), else from well-known labels (e.g. ``PLETH`` ->
ppg, ``II`` -> ecg, ``RESP`` -> resp); when that finds nothing usable the user is told
to name the channels.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from streamer.errors import InputError
from streamer.sources.base import KINDS, SourceInfo

_LABEL_KINDS = (
    (re.compile(r"^(pleth|ppg|pulse|bvp|ppg\d*|ppg[_ -].*|.*[_ -]ppg)$", re.I), "ppg"),
    (re.compile(r"^(ecg|ekg|ii|i|iii|mlii|v\d|avr|avl|avf|ecg.*|ekg.*|lead.*)$", re.I), "ecg"),
    (re.compile(r"^(resp|respiration|breathing|belt|impedance|resp.*)$", re.I), "resp"),
    (re.compile(r"^(acc|accel|accelerometer|acc[_ -]?[xyz]|acc.*)$", re.I), "acc"),
)


@dataclass(frozen=True)
class Selected:
    """A channel chosen for the engine: its column in the source, name and kind."""

    index: int
    name: str
    kind: str


def parse_spec(spec: str) -> tuple[str, str]:
    """``"NAME=KIND"`` -> (NAME, KIND), or :class:`InputError` saying what is wrong."""
    if "=" not in spec:
        raise InputError(f"--channel {spec!r}: expected NAME=KIND, e.g. PLETH=ppg "
                         f"(KIND is one of {', '.join(KINDS)})")
    name, kind = spec.rsplit("=", 1)
    kind = kind.strip().lower()
    if kind not in KINDS:
        raise InputError(f"--channel {spec!r}: kind {kind!r} is not one of {', '.join(KINDS)}")
    if not name.strip():
        raise InputError(f"--channel {spec!r}: the channel name is empty")
    return name.strip(), kind


def guess_kind(label: str) -> str | None:
    for pattern, kind in _LABEL_KINDS:
        if pattern.match(label.strip()):
            return kind
    return None


def select(info: SourceInfo, specs: list[str] | None) -> list[Selected]:
    """Resolve ``--channel`` specs (or the source's metadata) against ``info``."""
    names = info.channel_names
    if specs:
        chosen = []
        for spec in specs:
            name, kind = parse_spec(spec)
            # Case is ignored when that finds exactly one channel (as the file readers do).
            folded = [i for i, n in enumerate(names) if n.casefold() == name.casefold()]
            if name in names:
                idx = names.index(name)
            elif len(folded) == 1:
                idx = folded[0]
            elif name.isdigit() and int(name) < len(names):
                idx = int(name)
            else:
                raise InputError(
                    f"{info.name}: no channel {name!r}; channels are: {', '.join(names)} "
                    f"(or a 0-based index below {len(names)})")
            if any(c.index == idx for c in chosen):
                raise InputError(f"{info.name}: channel {names[idx]!r} is named twice in "
                                 f"--channel; name each channel once")
            chosen.append(Selected(idx, names[idx], kind))
        if not any(c.kind in ("ppg", "ecg", "resp") for c in chosen):
            raise InputError(
                f"{info.name}: --channel names no PPG, ECG or respiration channel (only "
                f"{', '.join(f'{c.name}={c.kind}' for c in chosen)}); add one, e.g. "
                f"--channel NAME=ppg")
        return chosen
    chosen = []
    for i, ch in enumerate(info.channels):
        kind = ch.kind if ch.kind in KINDS else guess_kind(ch.name)
        if kind:
            chosen.append(Selected(i, ch.name, kind))
    if not any(c.kind in ("ppg", "ecg", "resp") for c in chosen):
        unknown = [n for n in names if n not in {c.name for c in chosen}]
        if chosen and not unknown:  # e.g. an accelerometer stream on its own
            raise InputError(
                f"{info.name}: holds accelerometer channels only "
                f"({', '.join(f'{c.name}={c.kind}' for c in chosen)}); heart and breathing "
                f"rates need a PPG, ECG or respiration channel: add the stream or file "
                f"that carries it")
        raise InputError(
            f"{info.name}: cannot tell which channels are PPG, ECG or respiration "
            f"(channels: {', '.join(names)}); name them with --channel NAME=KIND, "
            f"e.g. --channel {unknown[0] if unknown else 'NAME'}=ppg")
    return chosen


def missing_reference_warning(selected: list[Selected], profile) -> str | None:
    """One line for the user when the profile suppresses motion with an accelerometer
    but no selected channel is one; None otherwise. The engine still runs, with the
    confidence of its ``blind`` calibration (:data:`estimators.calibration.FAMILIES`)."""
    if not profile.hr.motion or any(s.kind == "acc" for s in selected):
        return None
    if not any(s.kind == "ppg" for s in selected):
        return None
    return (f"profile {profile.name} suppresses motion with an accelerometer, but no "
            "channel is of kind acc: heart rate runs without it, at a lower confidence; "
            "add --channel NAME=acc for the accelerometer axes")
