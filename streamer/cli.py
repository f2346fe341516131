"""The ``ridgewatch`` command line: argument parsing and one-line errors only.

Every error a user can cause ends in one line ``ridgewatch: error: ...`` naming the
file, stream or channel and what to do, and exit code 2. An unexpected internal error
prints one line too, writes the traceback to ``ridgewatch-crash.txt`` and exits 3.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import re
import shlex
import sys
import threading
import time
import traceback
from pathlib import Path

from estimators.config import DEFAULT_PROFILE, PROFILES, get_profile
from estimators.errors import ParameterError
from streamer import __version__
from streamer.errors import InputError

CAUTION = ("ridgewatch is a research tool, not a medical device: it must not be used for "
           "diagnosis or treatment. Defer to licensed clinical practice and local regulations.")

DEMO_NAME = "cycling_trial.csv.gz"
TIME_UNIT_CHOICES = ("s", "ms", "us", "ns")  # streamer.sources.files.TIME_UNITS
FS_RANGE_HZ = (1.0, 100_000.0)  # streamer.sources.files.FS_RANGE_HZ (kept light to import)


MAX_SPEED_CHUNK_S = 10.0
"""Chunk length of a replay at full speed: nothing watches the chunks there, and the
engine handles a chunk's hops and channels together (one FFT call, one tracker call),
so fewer, larger calls cost less: 10 s chunks replay about twice as fast as 1 s chunks
(``python -m bench throughput``), and longer ones gain little more while the columns of
a chunk (about 40 hops per channel) still fit the caches. The estimates do not depend
on it (the engine is chunk-invariant)."""


def replay_chunk_s(speed: float) -> float:
    """Chunk length of a replay: a hop (0.25 s) as a live stream delivers it, or
    :data:`MAX_SPEED_CHUNK_S` at full speed."""
    return MAX_SPEED_CHUNK_S if math.isinf(speed) else 0.25
log = logging.getLogger("ridgewatch")


def _speed(text: str) -> float:
    if text.lower() in ("max", "inf", "fast"):
        return math.inf
    try:
        value = float(text.rstrip("xX"))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a speed; give N for N x real time (e.g. 1, 20) or 'max'")
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be > 0 (N x real time, or 'max')")
    return value


def _positive(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number")
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be > 0")
    return value


def _rate_hz(text: str) -> float:
    """A sampling rate: finite, within :data:`FS_RANGE_HZ`."""
    low, high = FS_RANGE_HZ
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of Hz")
    if not low <= value <= high:
        raise argparse.ArgumentTypeError(
            f"{text!r} must be a sampling rate between {low:g} and {high:g} Hz")
    return value


def _common(p: argparse.ArgumentParser, speed_default: str | None = None) -> None:
    p.add_argument("--channel", action="append", metavar="NAME=KIND",
                   help="use channel NAME (label or 0-based index) as KIND: ppg, ecg, resp "
                        "or acc; repeatable. Default: from the source's metadata or labels")
    _profile_options(p)
    p.add_argument("--hop", type=_positive, metavar="SECONDS",
                   help="time between estimates (default from the profile, 0.25 s)")
    p.add_argument("--log", metavar="PATH",
                   help="estimate log (CSV); default ridgewatch-logs/<source>-<time>-<pid>.csv. "
                        "An existing file is never replaced unless --overwrite is given")
    p.add_argument("--overwrite", action="store_true",
                   help="replace the --log file if it exists and is a ridgewatch estimate log")
    p.add_argument("--no-log", action="store_true", help="write no estimate log")
    p.add_argument("--publish", action="store_true",
                   help="publish the estimates as an LSL stream (and the beats and HRV "
                        "when --beats or --hrv is given)")
    _beat_options(p)
    p.add_argument("--headline", choices=("now", "centre"), default="now",
                   help="which heart/breathing rate the window shows in large digits: the "
                        "rate now (at the newest sample, the default) or the window-centre "
                        "rate (the other is shown beside it)")
    p.add_argument("--display", choices=("qt", "text", "none"),
                   help="window, terminal lines, or nothing (default: qt when a screen "
                        "is available, else text)")
    p.add_argument("--duration", type=_positive, metavar="SECONDS",
                   help="stop after this many seconds of wall-clock time")
    if speed_default is not None:
        p.add_argument("--speed", type=_speed, default=_speed(speed_default),
                       help=f"replay speed: N x real time or 'max' (default {speed_default})")
        p.add_argument("--publish-samples", action="store_true",
                       help="also publish the replayed samples as an LSL stream")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress or summary lines")


def _beat_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--beats", metavar="PATH",
                   help="write every beat of the PPG/ECG channels (time, interval, artifact "
                        "flag, corrected interval) to this CSV")
    p.add_argument("--hrv", metavar="PATH",
                   help="write heart-rate variability every 5 s (RMSSD, SDNN over 60 s, "
                        "DFA alpha1 over 120 s) to this CSV; research measures, not a "
                        "diagnosis")


def _profile_options(p: argparse.ArgumentParser) -> None:
    """``--profile NAME`` or ``--profile-file PATH`` (not both)."""
    group = p.add_mutually_exclusive_group()
    group.add_argument("--profile", choices=sorted(PROFILES),
                       help=f"settings preset (default {DEFAULT_PROFILE}; see 'ridgewatch "
                            "profiles')")
    group.add_argument("--profile-file", metavar="PATH",
                       help="settings from a TOML file of your own; start from 'ridgewatch "
                            "profiles --show NAME > lab.toml'")


def _csv_time(p: argparse.ArgumentParser) -> None:
    p.add_argument("--fs", type=_rate_hz, metavar="HZ",
                   help="sampling rate of a CSV without a time column (with one, it must "
                        "agree with the column to within 1 %%)")
    p.add_argument("--time-column", metavar="NAME",
                   help="CSV: the time column (default: one named time, t, timestamp or "
                        "starting with 'time')")
    p.add_argument("--time-unit", choices=TIME_UNIT_CHOICES,
                   help="CSV: unit of the time column (default: from its name, e.g. "
                        "time_ms or 'time [ms]', else seconds); logs are always in seconds")


def _xdf_streams(p: argparse.ArgumentParser) -> None:
    p.add_argument("--stream", action="append", metavar="NAME",
                   help="XDF: read the numeric stream NAME; repeatable (streams at different "
                        "rates are put on the grid of the fastest). Default: every numeric "
                        "stream. Marker (text) streams are always read")


class _Parser(argparse.ArgumentParser):
    """argparse with the house error format: one line on stderr and exit code 2 (the
    stock parser prints the whole usage block first)."""

    def error(self, message: str):
        self.exit(2, f"ridgewatch: error: {message} (see '{self.prog} --help')\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="ridgewatch",
        description="Live heart-rate and breathing-rate estimation from LSL streams and "
                    "recordings. " + CAUTION)
    parser.add_argument("--version", action="version", version=f"ridgewatch {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser("replay", help="replay a recording (CSV, WFDB, EDF, XDF) into the engine")
    p.add_argument("file", help="recording: .csv, .csv.gz, .hea (WFDB), .edf, .xdf")
    _csv_time(p)
    _xdf_streams(p)
    _common(p, speed_default="max")

    p = sub.add_parser("demo", help="replay the bundled synthetic demo session")
    _common(p, speed_default="4")

    p = sub.add_parser("live", help="follow live LSL streams (one, or several devices "
                                    "and a marker stream)")
    p.add_argument("--name", action="append",
                   help="LSL stream name to look for; repeat (with --type, --source-id) to "
                        "read several streams: each value then selects its own")
    p.add_argument("--type", action="append",
                   help="LSL stream type to look for (e.g. PPG, Markers); repeatable")
    p.add_argument("--source-id", action="append", help="LSL source_id to look for; repeatable")
    p.add_argument("--timeout", type=_positive, default=5.0, metavar="SECONDS",
                   help="how long to look for the streams (default 5)")
    _common(p)

    p = sub.add_parser("simulate",
                       help="publish the synthetic cycling trial as an LSL stream (no hardware)")
    p.add_argument("--name", default="ridgewatch-sim", help="stream name (default ridgewatch-sim)")
    p.add_argument("--fs", type=_rate_hz, default=125.0, help="sampling rate (default 125)")
    p.add_argument("--speed", type=_speed, default=1.0, help="N x real time (default 1)")
    p.add_argument("--duration", type=_positive, metavar="SECONDS",
                   help="stop after this many wall-clock seconds (default: loop until Ctrl-C)")
    p.add_argument("-q", "--quiet", action="store_true")

    p = sub.add_parser("profiles", help="list the settings presets, or print one as a file")
    shown = p.add_mutually_exclusive_group()
    shown.add_argument("--show", metavar="NAME", choices=sorted(PROFILES),
                       help="print built-in profile NAME as a TOML file for --profile-file")
    shown.add_argument("--from-log", metavar="LOG",
                       help="print the profile an estimate log was written with, as a TOML "
                            "file for --profile-file (to repeat that run)")

    p = sub.add_parser("offline", help="non-causal estimates over a whole recording")
    p.add_argument("file")
    _csv_time(p)
    _xdf_streams(p)
    p.add_argument("--channel", action="append", metavar="NAME=KIND")
    _profile_options(p)
    p.add_argument("--hop", type=_positive, metavar="SECONDS")
    p.add_argument("--log", metavar="PATH", required=True, help="where to write the log")
    p.add_argument("--overwrite", action="store_true",
                   help="replace the --log file if it exists and is a ridgewatch estimate log")
    _beat_options(p)
    p.add_argument("-q", "--quiet", action="store_true")

    p = sub.add_parser("compare", help="compare an estimate log with another log or a "
                                       "reference, or a beats file with reference beats")
    p.add_argument("log", help="estimate log written by replay, live, demo or offline, or a "
                               "beats file (--beats)")
    p.add_argument("--against", required=True, metavar="OTHER",
                   help="another estimate log, beat/breath times (WFDB annotation or CSV "
                        "of times) or a CSV of time,rate")
    p.add_argument("--against-fs", type=_rate_hz, metavar="HZ",
                   help="sampling rate of sample numbers in OTHER (a CSV column of event "
                        "sample numbers, or WFDB annotations without their header)")
    p.add_argument("--against-column", metavar="NAME",
                   help="column of OTHER to use (rate column, or sample-number column)")
    p.add_argument("--quantity", choices=("hr", "rr"), help="only this quantity")
    p.add_argument("--source", help="only this source (channel name or 'fused')")
    p.add_argument("--use", choices=("centre", "now"), default="centre",
                   help="score the window-centre rate at time_s (default) or the rate now "
                        "at emitted_s (an offline log's rate now is its centre rate)")
    p.add_argument("--against-source", metavar="SOURCE",
                   help="when OTHER is an estimate log: its source to compare with (default "
                        "the same source), e.g. --source PPG --against-source ECG")
    p.add_argument("--report", metavar="DIR", help="write a report folder (Markdown, HTML, "
                   "PNG; per-phase tables and phases.csv when the log has markers)")
    p.add_argument("-q", "--quiet", action="store_true")

    p = sub.add_parser("batch", help="live and offline runs, compared with references, over "
                                     "a folder of recordings")
    p.add_argument("folder", help="folder of recordings; a reference beside each one "
                                  "(<name>_beats.csv, <name>_breaths.csv, <name>.atr, or "
                                  "as --reference-pattern names it) is used")
    p.add_argument("--out", required=True, metavar="DIR", help="where logs and reports go")
    p.add_argument("--pattern", help="file pattern, e.g. '*.csv.gz' (default: every format); "
                                     "its one '*' is {id} in --reference-pattern")
    p.add_argument("--reference-pattern", action="append", metavar="[hr:|rr:]TEMPLATE",
                   help="name of each recording's reference file: {stem} is the recording's "
                        "name without its extension, {id} what the '*' of --pattern matched; "
                        "wildcards allowed; an hr: or rr: prefix says what it holds; "
                        "repeatable; replaces the default names. E.g. "
                        "--pattern 'bidmc_*_Signals.csv.gz' "
                        "--reference-pattern 'rr:bidmc_{id}_Breaths.csv'")
    p.add_argument("--against-fs", type=_rate_hz, metavar="HZ",
                   help="sampling rate of sample numbers in the reference files")
    p.add_argument("--against-column", metavar="NAME",
                   help="column of the reference files to use (rate or sample-number column)")
    p.add_argument("--channel", action="append", metavar="NAME=KIND")
    _profile_options(p)
    _csv_time(p)
    p.add_argument("--jobs", type=int, help="parallel processes (default: number of cores); "
                                            "with --dask local, the number of workers")
    p.add_argument("--dask", metavar="local|ADDRESS",
                   help="run the recordings on a Dask cluster: 'local' (one worker process "
                        "per core) or a scheduler address such as tcp://HOST:8786; needs "
                        "pip install 'ridgewatch[dask]'")
    p.add_argument("--no-report", action="store_true", help="summary table only")
    p.add_argument("--overwrite", action="store_true",
                   help="replace logs of an earlier batch in --out (ridgewatch logs only)")
    p.add_argument("-q", "--quiet", action="store_true")
    return parser


LIBLSL_LOG_LEVEL = -3
"""liblsl's console verbosity under ridgewatch: -3 keeps only fatal messages (loguru's
scale, -3 fatal to 9 debug; liblsl ``api_config.cpp``). Its errors ("Stream
transmission broke off ...") are about things ridgewatch reports itself in one line of
its own, so they would only split that line's story in two."""


def _liblsl_config_file() -> Path | None:
    """The configuration file liblsl would read: the first readable one of
    ``$LSLAPICFG``, ``./lsl_api.cfg``, ``~/lsl_api/lsl_api.cfg``,
    ``/etc/lsl_api/lsl_api.cfg`` (the order of liblsl's ``api_config.cpp``)."""
    candidates = [os.environ.get("LSLAPICFG"), "lsl_api.cfg",
                  str(Path.home() / "lsl_api" / "lsl_api.cfg"), "/etc/lsl_api/lsl_api.cfg"]
    for candidate in candidates:
        if candidate and os.access(candidate, os.R_OK) and Path(candidate).is_file():
            return Path(candidate)
    return None


def _ini_keys(text: str) -> set[str]:
    """``section.key`` names in an INI text, read the way liblsl reads its file (``;``
    starts a comment line; ``[section]`` lines; ``key = value`` lines)."""
    keys, section = set(), ""
    for line in text.splitlines():
        if not line.strip() or line.startswith(";"):
            continue
        if line.startswith("["):
            section = line[1:line.find("]")].strip() + "." if "]" in line else section
        elif "=" in line:
            keys.add(section + line.split("=", 1)[0].strip())
    return keys


def _quiet_liblsl() -> None:
    """Keep liblsl's console lines off stderr (see :data:`LIBLSL_LOG_LEVEL`), so that
    what the user reads is ridgewatch's own lines, each error on one line.

    Must run before the first pylsl call that reaches liblsl. Configuration content
    given to liblsl replaces its configuration file (pylsl ``set_config_content``), so
    the user's file, if any, is passed on with a ``[log]`` section added. A file that
    already sets ``log.level`` or ``log.file`` is left alone: its owner chose what
    liblsl shows (liblsl refuses a repeated key, so adding ours would void the file).
    """
    path = _liblsl_config_file()
    text = ""
    if path is not None:
        try:
            text = path.read_text(encoding="utf-8", errors="replace")
        except OSError:
            return
        if {"log.level", "log.file"} & _ini_keys(text):
            return
    try:
        import pylsl
        pylsl.set_config_content(f"{text}\n[log]\nlevel = {LIBLSL_LOG_LEVEL}\n")
    except (ImportError, NotImplementedError, AttributeError):
        pass  # an older liblsl: its lines show, nothing else changes


def _screen_available() -> bool:
    return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")
                or os.environ.get("QT_QPA_PLATFORM") == "offscreen")


def _default_log_path(source_name: str) -> Path:
    """``ridgewatch-logs/<source>-<time>-<pid>.csv``; the source's name reduced to a
    plain file name (its file stem, or a stream name with anything unusual replaced).
    The process id keeps two runs started in the same second apart; a name that still
    exists (a second run in this process) gets a number from :class:`EstimateLog`."""
    stem = Path(str(source_name).split(" (")[0]).name
    for suffix in (".gz", ".csv", ".hea", ".edf", ".xdf", ".dat"):
        stem = stem[: -len(suffix)] if stem.endswith(suffix) else stem
    stem = re.sub(r"[^A-Za-z0-9._-]+", "_", stem).strip("._")
    stamp = time.strftime("%Y%m%d-%H%M%S")
    return Path("ridgewatch-logs") / f"{stem or 'stream'}-{stamp}-{os.getpid()}.csv"


def find_demo() -> Path | None:
    """The bundled demo session: in ./replay_files, or beside the source tree."""
    for base in (Path.cwd(), Path(__file__).resolve().parents[1]):
        candidate = base / "replay_files" / DEMO_NAME
        if candidate.exists():
            return candidate
    return None


def _profile(args):
    """The chosen profile (``--profile`` or ``--profile-file``) with ``--hop``, which
    must lie between one heart-rate analysis sample (a shorter hop repeats estimates; a
    much shorter one runs for hours) and the shortest window (a longer hop skips
    samples). Read once per run (``args.resolved_profile``)."""
    if getattr(args, "resolved_profile", None) is not None:
        return args.resolved_profile
    if getattr(args, "profile_file", None):
        from streamer.profile_file import read_profile_file
        profile = read_profile_file(args.profile_file)
    else:
        profile = get_profile(args.profile or DEFAULT_PROFILE)
    hop_s = getattr(args, "hop", None)
    if hop_s is not None:
        low = 1.0 / profile.hr.analysis_fs
        high = min(profile.hr.window_s, profile.rr.window_s, profile.rr_pulse.window_s)
        if not low <= hop_s <= high:
            raise InputError(
                f"--hop {hop_s:g} s must be between {low:g} s (one analysis sample; a shorter "
                f"hop only repeats estimates) and {high:g} s (the heart-rate window of "
                f"profile {profile.name})")
        profile = profile.with_hop(hop_s)
    args.resolved_profile = profile
    return profile


def _run_config(args, profile, **more) -> dict:
    """The ``# config:`` header of a log: the profile in full (what ``--profile-file``
    reads back: see ``ridgewatch profiles --from-log``), the command line, and ``more``."""
    config = {"profile": profile.to_dict(), **more}
    if getattr(args, "profile_file", None):
        config["profile_file"] = str(args.profile_file)
    if getattr(args, "command_line", None):
        config["command"] = args.command_line
    return config


def _profile_words(args, profile) -> str:
    source = f" (from {args.profile_file})" if getattr(args, "profile_file", None) else ""
    return f"profile {profile.name}{source}"


def _progress_printer(quiet: bool):
    if quiet or not sys.stderr.isatty():
        return None
    state = {"last": -1}

    def show(fraction: float) -> None:
        pct = int(fraction * 100)
        if pct != state["last"]:
            state["last"] = pct
            sys.stderr.write(f"\rreplaying: {pct:3d} %")
            if fraction >= 1.0:
                sys.stderr.write("\n")
            sys.stderr.flush()

    return show


def _if_exists(args) -> str:
    return "overwrite" if args.overwrite else "refuse"


def _engine_error(name: str, exc: ParameterError) -> InputError:
    """A parameter the engine refuses because of the input (its rate): name the input."""
    return InputError(f"{name}: {exc}")


def _run(args, source, mode: str, input_id: str, inputs=()) -> int:
    from streamer.channels import missing_reference_warning, select
    from streamer.runner import Runner, install_signal_handlers
    from streamer.sinks.estimate_log import EstimateLog

    selected = select(source.info, args.channel)
    profile = _profile(args)
    mapping = {s.name: s.kind for s in selected}
    config = _run_config(args, profile, fs=source.info.fs, speed=getattr(args, "speed", None),
                         mode=mode)
    config["speed"] = "max" if config["speed"] == math.inf else config["speed"]
    display = args.display or ("qt" if _screen_available() else "text")
    if display == "qt" and not _screen_available():
        raise InputError("--display qt needs a screen (DISPLAY is not set); use --display text "
                         "or set QT_QPA_PLATFORM=offscreen")
    try:
        runner = Runner(source, selected, profile, duration_s=args.duration)
    except ParameterError as exc:
        raise _engine_error(source.info.name, exc) from None
    _check_beat_options(args, source.info.name, source.info.fs, selected,
                        None if args.no_log else args.log)
    log_path = None
    if not args.no_log:
        if args.log:
            runner.log = EstimateLog(args.log, mode, source.info.name, mapping, config,
                                     if_exists=_if_exists(args), inputs=inputs)
        else:
            runner.log = EstimateLog(_default_log_path(source.info.name), mode,
                                     source.info.name, mapping, config, if_exists="number")
        log_path = runner.log.path
    if args.publish or getattr(args, "publish_samples", False):
        _quiet_liblsl()
    beat_files = _open_beat_files(args, source.info.name, source.info.fs, selected, mode,
                                  mapping, config, inputs, log_path)
    if beat_files is not None:
        from streamer.beat_session import BeatSession
        channels, beats_out, hrv_out = beat_files
        beat_outlet = None
        if args.publish:
            from streamer.sinks.beats_outlet import BeatOutlet
            beat_outlet = BeatOutlet([c.name for c in channels],
                                     name=f"ridgewatch {source.info.name}",
                                     input_id=f"{input_id}|{profile.name}",
                                     use_stream_time=(mode == "live"))
        runner.beat_session = BeatSession(selected, source.info.fs, channels, beats_out,
                                          hrv_out, beat_outlet)
    if args.publish:
        from streamer.sinks.outlet import EstimateOutlet, hops_by_stream
        runner.outlet = EstimateOutlet(runner.monitor.streams, hops_by_stream(runner.monitor),
                                       name=f"ridgewatch {source.info.name}",
                                       input_id=f"{input_id}|{profile.name}",
                                       use_stream_time=(mode == "live"))
    publisher = None
    if getattr(args, "publish_samples", False):
        from streamer.sources.base import ChannelInfo, SourceInfo
        from streamer.sources.lsl_publish import SamplePublisher
        # The runner hands listeners the selected columns only, in --channel order, so
        # the published stream describes exactly those (with the kinds chosen).
        units = {c.name: c.unit for c in source.info.channels}
        published = SourceInfo(source.info.name, source.info.fs, tuple(
            ChannelInfo(s.name, s.kind, units.get(s.name, "")) for s in selected),
            source.info.source_id)
        publisher = SamplePublisher(published)
        runner.listeners.append(lambda u: u.chunk is not None and publisher.push_chunk(
            _full_chunk(u)))
    warning = missing_reference_warning(selected, profile)
    if warning and runner.log is not None:
        runner.log.write_event("warning", warning)
    if not args.quiet:
        print(f"ridgewatch {__version__}: {CAUTION}", file=sys.stderr)
        if warning:
            print(f"ridgewatch: warning: {warning}", file=sys.stderr)
        print("channels: " + ", ".join(f"{s.name}={s.kind}" for s in selected)
              + f"; {_profile_words(args, profile)}" + (f"; log {log_path}" if log_path else "")
              + _beat_words(beat_files)
              + ("; publishing LSL streams " + ", ".join(
                  f"'{n}'" for n in [*runner.outlet.names.values(), runner.outlet.marker_name,
                                     *(runner.beat_session.outlet.names if runner.beat_session
                                       and runner.beat_session.outlet else [])])
                  if runner.outlet else ""),
              file=sys.stderr)
    try:
        if display == "qt":
            from streamer.display.qt_window import run_with_window
            stats = run_with_window(runner, profile, duration_s=args.duration,
                                    headline=args.headline)
        else:
            stats = _run_threaded(runner, display, install_signal_handlers)
    finally:
        if publisher is not None:
            publisher.close()
    if not args.quiet:
        speed = stats.stream_seconds / stats.compute_s if stats.compute_s > 0 else math.nan
        print(f"done ({stats.stopped_by}): {stats.stream_seconds:.1f} s of signal, "
              f"{stats.estimates} estimates, engine at {speed:.0f}x real time"
              + (f"; log complete: {log_path}" if log_path else ""), file=sys.stderr)
    return 0


def _check_beat_options(args, stream: str, fs: float, selected, log_path):
    """The beat channels for ``--beats``/``--hrv`` (None when neither is given), and
    one path per output; called before any file is claimed."""
    from streamer.beat_session import beat_channels

    beats, hrv = getattr(args, "beats", None), getattr(args, "hrv", None)
    if not beats and not hrv:
        return None
    options = " and ".join(o for o, v in (("--beats", beats), ("--hrv", hrv)) if v)
    channels = beat_channels(selected, fs, stream, options)
    named = [(o, Path(v)) for o, v in (("--log", log_path), ("--beats", beats),
                                       ("--hrv", hrv)) if v]
    for k, (option, path) in enumerate(named):
        for other, other_path in named[:k]:
            if path.resolve() == other_path.resolve():
                raise InputError(f"{option} {path} is also the {other} file; give each "
                                 "output its own path")
    return channels


def _open_beat_files(args, stream: str, fs: float, selected, mode: str, mapping: dict,
                     config: dict, inputs, log_path):
    """Claim the ``--beats`` and ``--hrv`` files (before any work, like the log);
    returns (beat channels, beats file, HRV file) or None when neither is asked for."""
    from streamer.sinks.beats_log import beats_file, hrv_file

    beats, hrv = getattr(args, "beats", None), getattr(args, "hrv", None)
    if not beats and not hrv:
        return None
    channels = _check_beat_options(args, stream, fs, selected, log_path)
    beat_mapping = {c.name: c.kind for c in channels}
    opened = []
    try:
        for path, make in ((beats, beats_file), (hrv, hrv_file)):
            opened.append(None if not path else make(
                path, mode, stream, beat_mapping, config, if_exists=_if_exists(args),
                inputs=inputs))
    except BaseException:
        for f in opened:
            if f is not None:
                f.close()
        raise
    return channels, opened[0], opened[1]


def _beat_words(beat_files) -> str:
    if beat_files is None:
        return ""
    return "".join(f"; {what} {f.path}" for what, f in (
        ("beats", beat_files[1]), ("HRV", beat_files[2])) if f is not None)


def _full_chunk(update):
    return update.chunk


def _run_threaded(runner, display: str, install_signal_handlers):
    """Estimation in a worker thread; the main thread draws and takes the signals."""
    from streamer.display.text import TextDisplay

    text = TextDisplay() if display == "text" else None
    if text is not None:
        runner.listeners.append(text.listener)
        text.read_markers(sys.stdin, runner.add_user_marker)
    restore = install_signal_handlers(runner)
    result = {}
    errors = []

    def work():
        try:
            result["stats"] = runner.run()
        except BaseException as exc:  # handed to the main thread, reported there
            errors.append(exc)

    worker = threading.Thread(target=work, name="ridgewatch-engine", daemon=True)
    worker.start()
    try:
        if text is not None:
            text.run_until(lambda: not worker.is_alive())
        while worker.is_alive():
            worker.join(0.1)
    finally:
        restore()
    if errors:
        raise errors[0]
    return result["stats"]


def cmd_replay(args) -> int:
    from streamer.sources.files import read_recording, recording_files
    from streamer.sources.replay import RecordingSource

    recording = read_recording(args.file, fs=args.fs, time_column=args.time_column,
                               time_unit=args.time_unit, stream=args.stream)
    source = RecordingSource(recording, speed=args.speed, chunk_s=replay_chunk_s(args.speed),
                             progress=_progress_printer(args.quiet or args.display == "text"))
    return _run(args, source, "replay", recording.info.source_id or str(args.file),
                inputs=recording_files(args.file))


def cmd_demo(args) -> int:
    from streamer.simulation import cycling_trial
    from streamer.sources.base import ChannelInfo, Recording, SourceInfo
    from streamer.sources.files import read_recording
    from streamer.sources.replay import RecordingSource

    path = find_demo()
    if path is not None:
        recording = read_recording(path)
    else:  # installed without the source tree: rebuild the same synthetic session
        sim = cycling_trial()
        info = SourceInfo(DEMO_NAME + " (regenerated)", 125.0, tuple(
            ChannelInfo(n, k, u) for n, k, u in zip(sim.names, sim.kinds, sim.units)),
            "file:" + DEMO_NAME)
        recording = Recording(sim.samples, sim.timestamps, info)
    if not args.quiet:
        print(f"demo: synthetic cycling bench trial ({recording.duration_s:.0f} s: rest, "
              f"ramp, intervals, recovery) at "
              f"{'full speed' if math.isinf(args.speed) else f'{args.speed:g}x'}",
              file=sys.stderr)
    source = RecordingSource(recording, speed=args.speed, chunk_s=replay_chunk_s(args.speed))
    return _run(args, source, "replay", "demo", inputs=[path] if path is not None else [])


def cmd_live(args) -> int:
    from streamer.sources.lsl_source import LslSource

    # Import the engine (seconds on a busy machine) before subscribing, so the input
    # does not pile up meanwhile and come out as a burst of late estimates.
    import streamer.runner  # noqa: F401

    from streamer.sources.lsl_session import LslSession, criteria_from_options

    _quiet_liblsl()
    criteria = criteria_from_options(args.name, args.type, args.source_id)
    if len(criteria) == 1:  # one stream, as it always was
        one = criteria[0]
        source = LslSource(name=one.name, type=one.type, source_id=one.source_id,
                           timeout_s=args.timeout)
    else:
        source = LslSession(criteria, timeout_s=args.timeout)
    return _run(args, source, "live", source.info.source_id or source.info.name)


def cmd_simulate(args) -> int:
    import numpy as np

    from streamer.simulation import cycling_trial
    from streamer.sources.base import ChannelInfo, Chunk, SourceInfo
    from streamer.sources.lsl_publish import SamplePublisher

    _quiet_liblsl()
    sim = cycling_trial(args.fs)
    info = SourceInfo(args.name, args.fs, tuple(
        ChannelInfo(n, k, u) for n, k, u in zip(sim.names, sim.kinds, sim.units)),
        f"ridgewatch-sim-{args.name}")
    publisher = SamplePublisher(info, name=args.name)
    stop = threading.Event()
    import signal as _signal
    for sig in (_signal.SIGINT, _signal.SIGTERM):
        _signal.signal(sig, lambda *_: stop.set())
    if not args.quiet:
        print(f"publishing LSL stream '{args.name}' (synthetic cycling trial, "
              f"{', '.join(sim.names)} at {args.fs:g} Hz); Ctrl-C stops", file=sys.stderr)
    step = max(1, int(round(0.05 * args.fs)))
    start = time.monotonic()
    n = len(sim.timestamps)
    k = 0
    loop_offset = 0.0
    try:
        while not stop.is_set():
            if args.duration and time.monotonic() - start >= args.duration:
                break
            due = start + (loop_offset + sim.timestamps[k % n]) / args.speed \
                if math.isfinite(args.speed) else 0
            wait = due - time.monotonic()
            if wait > 0:
                stop.wait(min(wait, 0.1))
                continue
            j = min(k % n + step, n)
            block = sim.samples[k % n:j]
            stamps = sim.timestamps[k % n:j] + loop_offset
            publisher.push_chunk(Chunk(np.ascontiguousarray(block), stamps))
            k += j - k % n
            if k % n == 0:
                loop_offset += sim.timestamps[-1] + 1.0 / args.fs
    finally:
        publisher.close()
    return 0


def cmd_profiles(args) -> int:
    if args.show or args.from_log:
        from streamer.profile_file import profile_from_log, profile_toml, run_summary
        if args.show:
            print(profile_toml(get_profile(args.show)), end="")
        else:
            profile, config = profile_from_log(args.from_log)
            print(profile_toml(profile, header=run_summary(args.from_log, config)), end="")
        return 0
    for name, profile in sorted(PROFILES.items()):
        marker = " (default)" if name == DEFAULT_PROFILE else ""
        print(f"{name}{marker}: {profile.description}")
        for q in ("hr", "rr"):
            s = getattr(profile, q)
            print(f"  {q}: band {s.band_per_min[0]:g}-{s.band_per_min[1]:g}/min, window "
                  f"{s.window_s:g} s (first estimate after {s.min_window_s:g} s), hop "
                  f"{s.hop_s:g} s, de-shape {'on' if s.deshape else 'off'} (gamma {s.gamma:g}), "
                  f"max change {s.max_change_per_min_per_s:g}/min per s, lag {s.lag_hops} hops")
    return 0


def cmd_offline(args) -> int:
    from estimators.monitor import RateMonitor, offline_estimates, record_gaps
    from streamer.channels import missing_reference_warning, select
    from streamer.runner import gap_event
    from streamer.sinks.estimate_log import EstimateLog, write_offline_rows
    from streamer.sources.files import read_recording, recording_files

    recording = read_recording(args.file, fs=args.fs, time_column=args.time_column,
                               time_unit=args.time_unit, stream=args.stream)
    selected = select(recording.info, args.channel)
    profile = _profile(args)
    samples = recording.samples[:, [s.index for s in selected]]
    config = _run_config(args, profile, fs=recording.info.fs, mode="offline")
    paths = [(s.name, s.kind) for s in selected]
    try:  # the settings the engine refuses for this input, before any file is touched
        RateMonitor(paths, recording.info.fs, profile)
    except ParameterError as exc:
        raise _engine_error(recording.info.name, exc) from None
    _check_beat_options(args, recording.info.name, recording.info.fs, selected, args.log)
    # Claimed before the work, so a refused --log costs nothing and no other run can
    # take the path meanwhile.
    out = EstimateLog(args.log, "offline", recording.info.name,
                      {s.name: s.kind for s in selected}, config, if_exists=_if_exists(args),
                      inputs=recording_files(args.file))
    try:
        beat_files = _open_beat_files(args, recording.info.name, recording.info.fs, selected,
                                      "offline", {}, config, recording_files(args.file),
                                      args.log)
    except BaseException:
        out.close()
        raise
    with out:
        warning = missing_reference_warning(selected, profile)
        if warning:
            out.write_event("warning", warning)
            if not args.quiet:
                print(f"ridgewatch: warning: {warning}", file=sys.stderr)
        start = time.perf_counter()
        estimates = offline_estimates(samples, recording.timestamps, paths,
                                      recording.info.fs, profile)
        elapsed = time.perf_counter() - start
        per_row = 1e3 * elapsed / max(1, len(estimates))
        gaps = [gap_event(recording.info.name, gap)
                for gap in record_gaps(recording.timestamps, recording.info.fs)]
        write_offline_rows(out, estimates, recording.markers, per_row, gaps)
    beat_words = ""
    if beat_files is not None:
        from streamer.beat_session import write_offline
        channels, beats_out, hrv_out = beat_files
        try:
            n_beats, n_hrv = write_offline(samples, recording.timestamps, recording.info.fs,
                                           selected, channels, beats_out, hrv_out)
        finally:
            for f in (beats_out, hrv_out):
                if f is not None:
                    f.close()
        beat_words = "".join(f"; {what} {f.path} ({n} rows)" for what, f, n in (
            ("beats", beats_out, n_beats), ("HRV", hrv_out, n_hrv)) if f is not None)
    if not args.quiet:
        print(f"offline: {len(estimates)} estimates over {recording.duration_s:.1f} s "
              f"in {elapsed:.1f} s; log {args.log}{beat_words}", file=sys.stderr)
    _print_log_phases(args.log, recording.markers)
    return 0


def _print_log_phases(log_path, markers) -> None:
    """The phase table of a written log on stdout, one block per (quantity, source);
    nothing when there are no markers. It goes to stdout (the progress line goes to
    stderr) so that ``> phases.txt`` keeps it, and it is printed even with -q."""
    from streamer.compare import log_phases
    from streamer.report import format_phase_table, steady_note
    from streamer.sinks.estimate_log import read_log

    if not markers:
        return
    phases = log_phases(read_log(log_path), list(markers))
    for (quantity, source), rows in phases.items():
        print(format_phase_table(rows))
    for quantity in dict.fromkeys(q for q, _ in phases):
        print(steady_note(quantity))


def _log_windows(table) -> dict | None:
    """Window length per quantity from a log's configuration header, if present."""
    profile = (table.header.get("config") or {}).get("profile") if isinstance(
        table.header.get("config"), dict) else None
    if not profile:
        return None
    return {q: float(profile[q]["window_s"]) for q in ("hr", "rr") if q in profile}


def cmd_compare_beats(args) -> int:
    """``compare BEATS.csv --against REF``: beat-by-beat scores and HRV agreement."""
    from streamer.beat_compare import compare_beats, format_result
    from streamer.compare import EventTimes, load_other
    from streamer.sinks.beats_log import read_beats

    table = read_beats(args.log)
    other = load_other(args.against, fs=args.against_fs, column=args.against_column)
    if not isinstance(other, EventTimes):
        raise InputError(f"{args.against} is {'an' if other.kind[0] in 'aeiou' else 'a'} "
                         f"{other.kind}; a beats file is compared with reference beat times "
                         "(WFDB annotations or a CSV of times)")
    if args.source is not None and args.source not in table.sources():
        raise InputError(f"{args.log} has no beats of source '{args.source}'; it has "
                         f"{', '.join(table.sources()) or 'no beats'}")
    if len(table) == 0:
        raise InputError(f"{args.log} holds no beats")
    for result in compare_beats(table, other.times_s, args.source):
        print(format_result(result, Path(args.against).name))
    return 0


def cmd_compare(args) -> int:
    from streamer.compare import add_overlay, load_other, pair_up, summarize
    from streamer.sinks.beats_log import is_beats_file
    from streamer.sinks.estimate_log import read_log

    if is_beats_file(args.log):
        return cmd_compare_beats(args)

    from streamer.compare import phases_of
    from streamer.report import format_phase_table, steady_note

    from streamer.compare import OtherLog, with_rate

    table = with_rate(read_log(args.log), args.use, args.log)
    other = load_other(args.against, fs=args.against_fs, column=args.against_column)
    if isinstance(other, OtherLog):
        other = OtherLog(other.path, with_rate(other.table, args.use, str(other.path)))
    series = pair_up(table, other, args.quantity, args.source, _log_windows(table),
                     other_source=args.against_source, log_name=args.log)
    results = [summarize(s) for s in series]
    phases = phases_of(series, table)
    if args.report:
        from streamer.report import write_report
        if hasattr(other, "table") and args.against_source is None:
            # The other log's same source, drawn beside the reference (with
            # --against-source the reference already is that log's curve).
            add_overlay(series, Path(args.against).name, other.table)
        paths = write_report(results, series, args.report,
                             f"ridgewatch comparison: {Path(args.log).name} vs "
                             f"{Path(args.against).name}", phases)
        if not args.quiet:
            count = len(paths["figures"]) + 2 + ("phases" in paths)
            print(f"report written to {args.report} ({count} files)", file=sys.stderr)
    for r in results:
        print(f"{r['quantity']} {r['source']} vs {r['reference']}: n={r['n']} "
              f"MAE {r['mae']:.2f} RMSE {r['rmse']:.2f} "
              f"bias {r['bias']:+.2f} LoA [{r['loa_lower']:.2f}, {r['loa_upper']:.2f}] "
              f"r {r['pearson_r']:.3f} within tolerance {100 * r['within_tolerance']:.1f} % "
              f"coverage {100 * r['coverage']:.1f} % lag {r['lag_s']:+.2f} s "
              f"delay median {r['delay_median_s']:.2f} s")
        rows = phases.get((r["quantity"], r["source"]))
        if rows:
            print(format_phase_table(rows))
    if phases:
        for quantity in dict.fromkeys(r["quantity"] for r in results):
            print(steady_note(quantity))
    return 0


def cmd_batch(args) -> int:
    from streamer.batch import BatchOptions, run_batch

    # A profile from a file travels to the worker processes as the Profile itself.
    profile = _profile(args) if args.profile_file else (args.profile or DEFAULT_PROFILE)
    options = BatchOptions(out_dir=args.out, profile=profile,
                           channels=tuple(args.channel or ()), fs=args.fs,
                           report=not args.no_report, overwrite=args.overwrite,
                           time_column=args.time_column, time_unit=args.time_unit,
                           reference_patterns=tuple(args.reference_pattern or ()),
                           against_fs=args.against_fs, against_column=args.against_column)

    def progress(done, total, path):
        if not args.quiet:
            print(f"[{done}/{total}] {Path(path).name}", file=sys.stderr)

    if args.dask is not None and args.dask != "local" and args.jobs is not None:
        raise InputError(f"--jobs applies to local processes (and --dask local); the "
                         f"scheduler at {args.dask} runs on its own workers: drop --jobs")
    rows, written = run_batch(args.folder, options, args.pattern, args.jobs, progress,
                              dask=args.dask)
    for row in rows:
        if "error" in row:
            print(f"{row['recording']}: {row['error']}", file=sys.stderr)
    missing = [row["recording"] for row in rows if row.get("note") == "no reference found"]
    if missing and not args.quiet:
        print(f"no reference found for: {', '.join(missing)} (not in the summary)",
              file=sys.stderr)
    if not args.quiet:
        print(f"summary: {written['markdown']} and {written['csv']}", file=sys.stderr)
    return 0


COMMANDS = {"batch": cmd_batch, "replay": cmd_replay, "demo": cmd_demo, "live": cmd_live,
            "simulate": cmd_simulate, "profiles": cmd_profiles, "offline": cmd_offline,
            "compare": cmd_compare}


def one_line(text: str) -> str:
    """``text`` with line breaks and other unprintable characters escaped (``\\n``), so a
    message that quotes a file or stream name stays one line."""
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in str(text))


class _OneLineFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        return one_line(super().format(record))


def main(argv=None) -> int:
    stderr = logging.StreamHandler()
    stderr.setFormatter(_OneLineFormatter("ridgewatch: %(message)s"))
    logging.basicConfig(level=logging.WARNING, handlers=[stderr])  # no-op if configured
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else list(argv)
    args = parser.parse_args(argv)
    args.command_line = shlex.join(["ridgewatch", *argv])
    if getattr(args, "quiet", False):
        logging.getLogger("ridgewatch").setLevel(logging.ERROR)
    try:
        if hasattr(args, "profile_file"):
            _profile(args)  # a bad --profile-file or --hop is refused before any input is read
        return COMMANDS[args.command](args)
    except (InputError, ParameterError) as exc:
        print(f"ridgewatch: error: {one_line(exc)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("ridgewatch: stopped", file=sys.stderr)
        return 0
    except Exception as exc:  # last resort: one line for the user, the details in a file
        crash = Path("ridgewatch-crash.txt")
        try:
            crash.write_text(traceback.format_exc())
            where = f"; details in {crash.resolve()}"
        except OSError:
            where = ""
        print(f"ridgewatch: internal error: {type(exc).__name__}: {exc}{where}", file=sys.stderr)
        return 3


if __name__ == "__main__":
    sys.exit(main())
