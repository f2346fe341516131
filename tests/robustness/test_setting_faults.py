"""Absurd settings and an unwritable compiled-code cache, through the command line.

An option a user can get wrong (``--fs``, ``--hop``) or an input rate the engine cannot
use ends in one line ``ridgewatch: error: ...`` naming the option or file, exit code 2,
before anything is written. A read-only install, where numba cannot write its cache,
still runs, with one line saying so. Never "internal error", never a crash file.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from streamer import cli
from streamer.sinks.estimate_log import read_log
from streamer.sources import files
from tests.robustness.faults import pulse_signal, within_ec13

REPO_ROOT = Path(__file__).resolve().parents[2]


def ridgewatch(cwd: Path, *args, extra_env: dict | None = None) -> subprocess.CompletedProcess:
    env = dict(os.environ, **(extra_env or {}))
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    return subprocess.run([sys.executable, "-m", "streamer.cli", *map(str, args)], cwd=cwd,
                          env=env, capture_output=True, text=True, timeout=600)


def recording(folder: Path, fs: float = 100.0, header: str = "time,PPG") -> Path:
    x, t, _, _ = pulse_signal(30.0, fs, 72.0, seed=31)
    path = folder / "rec.csv"
    path.write_text(header + "\n" + "".join(f"{a:.4f},{b:.6f}\n" for a, b in zip(t, x)))
    return path


def assert_error_is(done: subprocess.CompletedProcess, cwd: Path, expected: str) -> None:
    assert done.returncode == 2, done.stderr
    assert done.stderr == expected + "\n"
    assert not (cwd / "out.csv").exists() and not (cwd / "ridgewatch-crash.txt").exists()


@pytest.mark.parametrize("value", ["1e-300", "0.5", "inf", "nan", "2e5", "-125"])
def test_absurd_fs_is_one_error_line(tmp_path, value):
    rec = recording(tmp_path)
    for command in (["replay", rec, "--display", "none"], ["offline", rec]):
        assert_error_is(ridgewatch(tmp_path, *command, "--fs", value, "--log", "out.csv"),
                        tmp_path,
                        f"ridgewatch: error: argument --fs: '{value}' must be a sampling rate "
                        f"between 1 and 100000 Hz (see 'ridgewatch {command[0]} --help')")


@pytest.mark.parametrize("value", ["1e-9", "0.01", "9", "1e300"])
def test_absurd_hop_is_one_error_line(tmp_path, value):
    """Before: ``--hop 1e-9`` ran for minutes, wrote nothing and ignored SIGTERM."""
    rec = recording(tmp_path)
    for command in (["replay", rec, "--display", "none"], ["offline", rec]):
        assert_error_is(ridgewatch(tmp_path, *command, "--hop", value, "--log", "out.csv"),
                        tmp_path,
                        f"ridgewatch: error: --hop {float(value):g} s must be between 0.04 s (one "
                        "analysis sample; a shorter hop only repeats estimates) and 8 s (the "
                        "heart-rate window of profile wrist)")


def test_a_rate_the_engine_cannot_use_names_the_file(tmp_path):
    rec = recording(tmp_path, fs=20.0, header="time,ECG")
    for command in (["replay", rec, "--display", "none"], ["offline", rec]):
        assert_error_is(ridgewatch(tmp_path, *command, "--log", "out.csv"), tmp_path,
                        f"ridgewatch: error: {rec}: fs=20.0 Hz is too low for ECG (need >= 40 Hz)")


def test_the_option_ranges_match_the_reader():
    """The command line keeps its own copies so that ``--help`` imports nothing heavy."""
    assert cli.FS_RANGE_HZ == files.FS_RANGE_HZ
    assert cli.TIME_UNIT_CHOICES == tuple(files.TIME_UNITS)


def test_unwritable_jit_cache_runs_without_it_and_says_so_once(tmp_path):
    """numba's only cache folder is one that cannot be created (below a plain file): the
    situation of a read-only install (reproduced there by hand with a read-only bind
    mount). The locator list comes from NUMBA_CACHE_LOCATOR_CLASSES, which numba 0.68
    reads (seen in its numba/core/caching.py); older versions skip the test."""
    numba = pytest.importorskip("numba")
    if not hasattr(numba.core.config, "CACHE_LOCATOR_CLASSES"):
        pytest.skip("this numba cannot be limited to one cache locator")
    rec = recording(tmp_path)
    (tmp_path / "a-file").write_text("")
    done = ridgewatch(tmp_path, "replay", rec, "--display", "none", "--log", "out.csv",
                      extra_env={"NUMBA_CACHE_LOCATOR_CLASSES": "UserProvidedCacheLocator",
                                 "NUMBA_CACHE_DIR": str(tmp_path / "a-file" / "cache"),
                                 "RIDGEWATCH_NO_JIT": ""})
    assert done.returncode == 0, done.stderr
    notes = [line for line in done.stderr.splitlines() if "not cached" in line]
    assert len(notes) == 1, done.stderr
    assert notes[0].startswith("ridgewatch: compiled kernels are not cached: numba cannot "
                               "write its cache (cannot cache function ")
    assert notes[0].endswith("); every start compiles them again (slower start, same "
                             "results). Set NUMBA_CACHE_DIR to a writable folder to keep them")
    assert "log complete: out.csv" in done.stderr.splitlines()[-1]
    rates = read_log(tmp_path / "out.csv").select("hr", "PPG").columns["rate_per_min"]
    assert len(rates) > 50 and within_ec13(rates, 72.0).all()
    assert not (tmp_path / "ridgewatch-crash.txt").exists()
