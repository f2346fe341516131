"""A lab's own settings: profiles as TOML files, and the profile recorded in a log.

``ridgewatch profiles --show NAME`` prints a built-in profile with :func:`profile_toml`;
``--profile-file PATH`` reads such a file back with :func:`read_profile_file` (the
standard library's :mod:`tomllib`); ``ridgewatch profiles --from-log LOG`` prints the
profile an estimate log's ``# config:`` header recorded (:func:`profile_from_log`), so
a run can be repeated with exactly its settings. Checking the values is the job of
:func:`estimators.config.profile_from_dict` (the same constructors as the built-in
profiles); this module adds the file's name to every message and turns them into
:class:`InputError` (one line, exit code 2).

The file::

    name = "my-lab"
    description = "..."
    base = "wrist"                 # optional: keys left out come from this profile
    breathing_from_pulse = true

    [hr]                           # heart rate (RateSettings)
    band_per_min = [40.0, 200.0]
    window_s = 8.0
    ...

    [rr]                           # breathing rate from a respiration channel
    [rr_pulse]                     # breathing rate from a pulse's modulations
"""

from __future__ import annotations

import re
import textwrap
import tomllib
from dataclasses import fields
from pathlib import Path

from estimators.config import PROFILE_SECTIONS, Profile, RateSettings, profile_from_dict
from estimators.errors import ParameterError
from streamer.errors import InputError

SECTION_TITLES = {
    "hr": "heart rate (PPG or ECG channels)",
    "rr": "breathing rate from a respiration channel",
    "rr_pulse": "breathing rate from the respiratory modulations of a pulse (PPG or ECG)",
}


def _toml_string(text: str) -> str:
    """``text`` as a TOML basic string: quotes, backslashes and control characters
    escaped (TOML 1.0, "String"); everything else as it is."""
    out = []
    for char in text:
        if char in '"\\':
            out.append("\\" + char)
        elif ord(char) < 0x20 or ord(char) == 0x7F:
            out.append(f"\\u{ord(char):04X}")
        else:
            out.append(char)
    return '"' + "".join(out) + '"'


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value)  # the shortest text that reads back as the same float
    if isinstance(value, tuple):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return _toml_string(str(value))


def setting_notes() -> dict[str, str]:
    """One sentence or so per :class:`RateSettings` field, from its docstring's
    Parameters section (so the starting file and the code say the same)."""
    doc = RateSettings.__doc__ or ""
    notes: dict[str, list[str]] = {}
    current = None
    for line in doc.splitlines():
        match = re.match(r"^    (\w+) : (.*)$", line)
        if match:
            current = match.group(1)
            notes[current] = [match.group(2).strip()]
        elif current and line.startswith("        ") and line.strip():
            notes[current].append(line.strip())
        elif not line.strip():
            current = None
    return {name: " ".join(parts).replace("``", "") for name, parts in notes.items()}


def profile_toml(profile: Profile, *, notes: bool = True, header: str = "") -> str:
    """``profile`` as a TOML file that :func:`read_profile_file` reads back to an equal
    profile (every key written, floats in their shortest exact form).

    With ``notes``, the ``[hr]`` keys carry a comment from :class:`RateSettings`'s
    docstring (the other tables have the same keys). ``header`` lines are written first
    as comments.
    """
    explained = setting_notes() if notes else {}
    # A comment holds no control characters (TOML 1.0): escape any, e.g. from a command line.
    lines = ["# " + "".join(c if c.isprintable() else repr(c)[1:-1] for c in line).rstrip()
             for line in header.splitlines()]
    lines += [
        "# ridgewatch profile (research tool, not a medical device).",
        "# Read with: ridgewatch <command> --profile-file THIS_FILE",
        "# Every key is given; delete a key to take it from the built-in profile named by",
        "# 'base' (add base = \"wrist\", or another built-in profile, for that).",
        "",
        f"name = {_toml_string(profile.name)}",
        f"description = {_toml_string(profile.description)}",
        f"breathing_from_pulse = {_toml_value(profile.breathing_from_pulse)}",
    ]
    for section in PROFILE_SECTIONS:
        settings = getattr(profile, section)
        lines += ["", f"# {SECTION_TITLES[section]}", f"[{section}]"]
        for f in fields(RateSettings):
            if section == "hr" and f.name in explained:
                lines += textwrap.wrap(explained[f.name], 88, initial_indent="# ",
                                       subsequent_indent="# ")
            lines.append(f"{f.name} = {_toml_value(getattr(settings, f.name))}")
    return "\n".join(lines) + "\n"


def read_profile_file(path) -> Profile:
    """The profile in the TOML file ``path``.

    Raises
    ------
    InputError
        One line naming the file and, for a bad setting, its dotted key
        (``lab.toml: hr.window_s=-1.0 must be > 0``); also for a file that cannot be
        read or is not TOML.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"--profile-file {path}: cannot read it ({exc.strerror})") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise InputError(f"--profile-file {path}: not a TOML file (not UTF-8 text at byte "
                         f"{exc.start})") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"--profile-file {path}: not valid TOML: {exc}") from None
    try:
        return profile_from_dict(data)
    except ParameterError as exc:
        raise InputError(f"--profile-file {path}: {exc}") from None


def profile_from_log(path) -> tuple[Profile, dict]:
    """The profile an estimate log was written with (its ``# config:`` header), and
    that whole configuration (mode, rate, speed, command line where recorded)."""
    from streamer.sinks.estimate_log import read_log

    table = read_log(path)
    config = table.header.get("config")
    profile = config.get("profile") if isinstance(config, dict) else None
    if not isinstance(profile, dict):
        raise InputError(f"{path}: its header records no profile (# config: has no "
                         "'profile')")
    try:
        return profile_from_dict(profile), config
    except ParameterError as exc:
        raise InputError(f"{path}: the profile in its header is not valid: {exc}") from None


def run_summary(path, config: dict) -> str:
    """Comment lines for a profile taken from the log ``path``: how that run was made."""
    lines = [f"Profile of the run that wrote {path}."]
    for key in ("command", "mode", "fs", "speed", "profile_file"):
        if config.get(key) is not None:
            lines.append(f"{key}: {config[key]}")
    return "\n".join(lines)
