"""``ridgewatch batch`` with reference files named as the data sets ship them.

The folders are built in tmp_path with the data sets' file names (BIDMC:
``bidmc_NN_Signals.csv.gz`` with ``bidmc_NN_Breaths.csv`` of breath sample numbers at
125 Hz in two annotator columns, NaN-padded; IEEE SPC 2015: ``DATA_NN_TYPEMM.mat`` with
``DATA_NN_TYPEMM_BPMtrace.mat``; see ../shared/data/*/SOURCE.md). The signals are the
first 60 s of the synthetic demo session, whose breath times are exact.
"""

from __future__ import annotations

import csv
import gzip
from pathlib import Path

import numpy as np
import pytest

from streamer import cli
from streamer.batch import BatchOptions, find_references, parse_reference_pattern, run_batch
from streamer.errors import InputError
from streamer.sources.files import read_recording

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "replay_files" / "cycling_trial.csv.gz"
CUT_S = 60.0
FS = 125.0


def bidmc_folder(folder: Path) -> Path:
    folder.mkdir()
    recording = read_recording(DEMO)
    assert recording.info.fs == FS
    n = int(CUT_S * FS)
    names = recording.info.channel_names
    columns = {"RESP": "RESP", "PLETH": "PPG", "II": "ECG"}
    data = np.column_stack([recording.timestamps[:n]]
                           + [recording.samples[:n, names.index(c)] for c in columns.values()])
    text = "Time [s], " + ", ".join(columns) + "\n" + "\n".join(
        ",".join(f"{x:.5f}" for x in row) for row in data) + "\n"
    for record in ("01", "02"):
        with gzip.open(folder / f"bidmc_{record}_Signals.csv.gz", "wt") as fh:
            fh.write(text)
    breaths = np.loadtxt(DEMO.with_name("cycling_trial_breaths.csv"), skiprows=1)
    samples = np.rint(breaths[breaths < CUT_S] * FS).astype(int)
    rows = [f"{a},{b}" for a, b in zip(samples, samples[:-1])] + [f"{samples[-1]},NaN"]
    (folder / "bidmc_01_Breaths.csv").write_text(
        "breaths ann1 [signal sample no], breaths ann2 [signal sample no]\n"
        + "\n".join(rows) + "\n")
    (folder / "bidmc_01_Numerics.csv").write_text("Time [s], HR, PULSE, RESP, SpO2\n0,80,80,15,98\n")
    return folder


def test_bidmc_names_with_reference_pattern(tmp_path, capfd):
    folder = bidmc_folder(tmp_path / "bidmc_csv")
    code = cli.main(["batch", str(folder), "--out", str(tmp_path / "out"), "--pattern",
                     "bidmc_*_Signals.csv.gz", "--reference-pattern",
                     "rr:bidmc_{id}_Breaths.csv", "--against-fs", "125", "--jobs", "1",
                     "--no-report"])
    out, err = capfd.readouterr()
    assert code == 0, err
    assert "no reference found for: bidmc_02_Signals (not in the summary)" in err
    with open(tmp_path / "out" / "batch_summary.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert {r["recording"] for r in rows} == {"bidmc_01_Signals"}
    assert {r["quantity"] for r in rows} == {"rr"}
    assert {r["reference"] for r in rows} == {"bidmc_01_Breaths.csv"}
    resp = {r["run"]: r for r in rows if r["source"] == "RESP"}
    # The respiration belt against its own exact breath times: within the +-2
    # breaths/min tolerance of breathing-rate studies (common practice) on average.
    for run in ("live", "offline"):
        assert float(resp[run]["mae"]) < 2.0 and int(resp[run]["n"]) > 0
    # the delay of an offline run means nothing: its cell is empty, the live one is not
    assert all(r["delay_median_s"] == "" for r in rows if r["run"] == "offline")
    assert all(float(r["delay_median_s"]) > 0 for r in rows if r["run"] == "live")
    md = (tmp_path / "out" / "batch_summary.md").read_text()
    assert "bidmc_02_Signals" not in md.split("\n\n")[-2]  # not a row of the table
    assert md.rstrip().endswith("No reference found (looked for rr:bidmc_{id}_Breaths.csv) "
                                "for: bidmc_02_Signals.")


def test_spc2015_names_find_the_trace_but_mat_is_not_read(tmp_path):
    folder = tmp_path / "Training_data"
    folder.mkdir()
    for name in ("DATA_01_TYPE01.mat", "DATA_01_TYPE01_BPMtrace.mat",
                 "DATA_02_TYPE02.mat", "DATA_02_TYPE02_BPMtrace.mat"):
        (folder / name).write_bytes(b"MATLAB 5.0 MAT-file stand-in")
    found = find_references(folder / "DATA_01_TYPE01.mat", (), ("hr:{stem}_BPMtrace.mat",))
    assert found == [(folder / "DATA_01_TYPE01_BPMtrace.mat", "hr")]
    # the traces match the recording pattern too, but are references, not recordings;
    # the .mat recordings themselves have no reader: one error row each
    rows, _ = run_batch(folder, BatchOptions(out_dir=str(tmp_path / "out"),
                                             reference_patterns=("hr:{stem}_BPMtrace.mat",)),
                        pattern="DATA_*.mat", jobs=1)
    assert [r["recording"] for r in rows] == ["DATA_01_TYPE01", "DATA_02_TYPE02"]
    assert all(r["error"].endswith(".mat: unknown file type; supported: .csv, .csv.gz, .tsv, "
                                   ".tsv.gz, .hea, .edf, .bdf, .xdf, .xdfz, .xdf.gz (a WFDB "
                                   "record may also be given by its .dat file or record name)")
               for r in rows)


def test_id_and_stem_and_wildcards(tmp_path):
    for name in ("rec_7_sig.csv", "rec_7_ref.csv", "rec_7_sig_beats_a.csv",
                 "rec_7_sig_beats_b.csv", "rec_[x]_sig.csv", "rec_[x]_sig_ref.csv"):
        (tmp_path / name).write_text("t\n")
    sig = tmp_path / "rec_7_sig.csv"
    assert find_references(sig, (), ("rec_{id}_ref.csv",), "rec_*_sig.csv") == [
        (tmp_path / "rec_7_ref.csv", None)]
    assert [p.name for p, _ in find_references(sig, (), ("hr:{stem}_beats_*.csv",))] == [
        "rec_7_sig_beats_a.csv", "rec_7_sig_beats_b.csv"]
    # a '[' in a recording's name is literal, not a wildcard
    odd = tmp_path / "rec_[x]_sig.csv"
    assert find_references(odd, (), ("{stem}_ref.csv",)) == [(tmp_path / "rec_[x]_sig_ref.csv",
                                                               None)]
    # the default names still work without a pattern
    (tmp_path / "rec_7_sig_beats.csv").write_text("t\n")
    assert find_references(sig, (("_beats.csv", "hr"),)) == [
        (tmp_path / "rec_7_sig_beats.csv", "hr")]


PATTERN_ERRORS = [
    (["--reference-pattern", "reference.csv"],
     "--reference-pattern 'reference.csv' does not name the recording; put {stem} or {id} in "
     "it (e.g. '{stem}_ref.csv')"),
    (["--reference-pattern", "{name}_ref.csv"],
     "--reference-pattern '{name}_ref.csv': unknown placeholder {name}; use {stem} or {id}"),
    (["--reference-pattern", "rr:{id}_Breaths.csv"],
     "--reference-pattern 'rr:{id}_Breaths.csv' uses {id}, which needs --pattern with exactly "
     "one '*' (e.g. --pattern 'bidmc_*_Signals.csv.gz')"),
    (["--reference-pattern", "refs/{stem}.csv"],
     "--reference-pattern 'refs/{stem}.csv': give a file name, without a folder (references "
     "sit beside their recording)"),
    (["--reference-pattern", "{stem"],
     "--reference-pattern '{stem': expected '}' before end of string; write placeholders as "
     "{stem} or {id}"),
    (["--against-fs", "0"],
     "argument --against-fs: '0' must be a sampling rate between 1 and 100000 Hz "
     "(see 'ridgewatch batch --help')"),
]


@pytest.mark.parametrize("extra, expected", PATTERN_ERRORS)
def test_reference_pattern_errors_are_one_line(tmp_path, capfd, extra, expected):
    (tmp_path / "rec.csv").write_text("time_s,PPG\n0,1\n")
    try:
        code = cli.main(["batch", str(tmp_path), "--out", str(tmp_path / "out"), *extra])
    except SystemExit as exc:
        code = exc.code
    out, err = capfd.readouterr()
    assert (code, out) == (2, "")
    assert err.splitlines() == [f"ridgewatch: error: {expected}"]
    assert not (tmp_path / "out").exists()


def test_parse_reference_pattern_quantity_prefix():
    assert parse_reference_pattern("hr:{stem}.atr") == ("{stem}.atr", "hr")
    assert parse_reference_pattern("{stem}_ref.csv") == ("{stem}_ref.csv", None)
    # an unknown prefix is part of the file name
    assert parse_reference_pattern("x:{stem}") == ("x:{stem}", None)
    with pytest.raises(InputError, match=r"^--reference-pattern 'hr:ref.csv' does not name "
                                         r"the recording; put \{stem\} or \{id\} in it"):
        parse_reference_pattern("hr:ref.csv")
