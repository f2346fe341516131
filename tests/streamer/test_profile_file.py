"""``--profile-file``, ``profiles --show`` and ``profiles --from-log``: a lab's own
settings as TOML, read back exactly, refused in one line, and recorded in the log so a
run can be repeated."""

from __future__ import annotations

import re
import shutil
import tomllib
from dataclasses import replace

import pytest

from estimators.config import PROFILES, profile_from_dict
from streamer import cli
from streamer.errors import InputError
from streamer.profile_file import profile_toml, read_profile_file
from streamer.sinks.estimate_log import read_log
from tests.streamer.test_cli import rows_without_compute, short_csv  # noqa: F401 (fixture)


def show(name: str, capsys) -> str:
    assert cli.main(["profiles", "--show", name]) == 0
    return capsys.readouterr().out


@pytest.mark.parametrize("name", sorted(PROFILES))
def test_show_prints_a_file_that_reads_back_to_the_same_profile(name, tmp_path, capsys):
    text = show(name, capsys)
    path = tmp_path / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    assert read_profile_file(path) == PROFILES[name]
    data = tomllib.loads(text)
    assert "base" not in data  # every key is written out, nothing comes from elsewhere
    assert data["name"] == name and data["hr"]["window_s"] == PROFILES[name].hr.window_s


def test_odd_texts_and_numbers_read_back_exactly(tmp_path):
    base = PROFILES["wrist"]
    odd = replace(base, name='lab "A"\\ü\n\tend\x7f', description="",
                  hr=replace(base.hr, gamma=0.1 + 0.2, jump_probability=1e-5,
                             band_per_min=(41.123456789012345, 199.0)))
    path = tmp_path / "odd.toml"
    path.write_text(profile_toml(odd), encoding="utf-8")
    assert read_profile_file(path) == odd


def test_header_lines_stay_comments_whatever_they_hold():
    text = profile_toml(PROFILES["wrist"], header="command: ridgewatch replay 'a\x1bb\rc.csv'")
    assert tomllib.loads(text)["name"] == "wrist"
    assert text.splitlines()[0] == "# command: ridgewatch replay 'a\\x1bb"
    assert text.splitlines()[1] == "# c.csv'"


def test_a_partial_file_takes_the_rest_from_its_base(tmp_path):
    path = tmp_path / "lab.toml"
    path.write_text('name = "treadmill"\nbase = "exercise-wrist"\n\n[hr]\n'
                    'band_per_min = [50, 210]\nmax_change_per_min_per_s = 6\n')
    profile = read_profile_file(path)
    assert profile.hr == replace(PROFILES["exercise-wrist"].hr, band_per_min=(50.0, 210.0),
                                 max_change_per_min_per_s=6.0)
    assert profile.rr == PROFILES["exercise-wrist"].rr


CASES = [
    ('name = "x"\nbase = "wrist"\n[hr]\nwindow_s = -1\n', "hr.window_s=-1.0 must be > 0"),
    ('name = "x"\nbase = "wrist"\n[hr]\nwindw_s = 8\n',
     "hr.windw_s is not a setting (did you mean hr.window_s?)"),
    ('name = "x"\nbase = "wrist"\n[rr]\ndeshape = "yes"\n',
     "rr.deshape='yes' must be true or false"),
    ('name = "x"\nbase = "wrist"\n[hr\nwindow_s = 8\n',
     "not valid TOML: Expected ']' at the end of a table declaration (at line 3, column 4)"),
    ('name = "x"\nname = "y"\n', "not valid TOML: Cannot overwrite a value (at line 2, "
                                 "column 11)"),
]


@pytest.mark.parametrize("text, message", CASES)
def test_bad_files_are_refused_in_one_line(text, message, tmp_path, capsys):
    path = tmp_path / "lab.toml"
    path.write_text(text, encoding="utf-8")
    code = cli.main(["offline", "no-such-recording.csv", "--log", str(tmp_path / "o.csv"),
                     "--profile-file", str(path)])
    # The profile is checked before the recording is looked at.
    assert code == 2
    assert capsys.readouterr().err == f"ridgewatch: error: --profile-file {path}: {message}\n"


def test_unreadable_files_are_refused_in_one_line(tmp_path):
    binary = tmp_path / "lab.toml"
    binary.write_bytes(b'name = "\xff"\n')
    with pytest.raises(InputError, match=re.escape(
            f"--profile-file {binary}: not a TOML file (not UTF-8 text at byte 8)")):
        read_profile_file(binary)
    with pytest.raises(InputError, match=re.escape(
            f"--profile-file {tmp_path / 'none.toml'}: cannot read it (No such file or "
            "directory)")):
        read_profile_file(tmp_path / "none.toml")
    with pytest.raises(InputError, match=re.escape(
            f"--profile-file {tmp_path}: cannot read it (Is a directory)")):
        read_profile_file(tmp_path)


def test_profile_and_profile_file_exclude_each_other(tmp_path, capsys):
    with pytest.raises(SystemExit) as stop:
        cli.main(["replay", "x.csv", "--profile", "wrist", "--profile-file", "lab.toml"])
    assert stop.value.code == 2
    assert capsys.readouterr().err == (
        "ridgewatch: error: argument --profile-file: not allowed with argument --profile "
        "(see 'ridgewatch replay --help')\n")


def test_a_run_repeats_from_the_profile_in_its_log(short_csv, tmp_path, capsys):  # noqa: F811
    """A log records the settings used (a file's profile with --hop applied);
    ``profiles --from-log`` turns them into a file that repeats the run exactly."""
    lab = tmp_path / "lab.toml"
    lab.write_text('name = "lab"\nbase = "fingertip-rest"\n[hr]\nband_per_min = [45, 170]\n')
    first, again = tmp_path / "first.csv", tmp_path / "again.csv"
    run = ["replay", str(short_csv), "--speed", "max", "--display", "none", "-q"]
    assert cli.main([*run, "--profile-file", str(lab), "--hop", "0.5", "--log", str(first)]) == 0
    header = read_log(first).header["config"]
    expected = read_profile_file(lab).with_hop(0.5)
    assert profile_from_dict(header["profile"]) == expected
    assert header["profile_file"] == str(lab)
    assert header["command"].startswith("ridgewatch replay ") and "--hop 0.5" in header["command"]

    assert cli.main(["profiles", "--from-log", str(first)]) == 0
    recorded = tmp_path / "recorded.toml"
    recorded.write_text(capsys.readouterr().out, encoding="utf-8")
    assert read_profile_file(recorded) == expected
    assert cli.main([*run, "--profile-file", str(recorded), "--log", str(again)]) == 0
    assert rows_without_compute(again) == rows_without_compute(first)
    assert len(rows_without_compute(first)) > 50


def test_batch_takes_a_profile_file(short_csv, tmp_path):  # noqa: F811
    folder = tmp_path / "recordings"
    folder.mkdir()
    shutil.copy(short_csv, folder / "one.csv")
    lab = tmp_path / "lab.toml"
    lab.write_text('name = "lab"\nbase = "wrist"\nbreathing_from_pulse = false\n')
    assert cli.main(["batch", str(folder), "--out", str(tmp_path / "out"), "--profile-file",
                     str(lab), "--jobs", "1", "--no-report", "-q"]) == 0
    for run in ("live", "offline"):
        header = read_log(tmp_path / "out" / "one" / f"{run}.csv").header
        assert profile_from_dict(header["config"]["profile"]) == read_profile_file(lab)
