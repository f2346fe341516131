"""The estimate log: writing, reading back, interrupted files and files that are not logs."""

from __future__ import annotations

import csv
import gzip
import math

import numpy as np
import pytest

from estimators.estimate import Estimate
from streamer import __version__
from streamer.errors import InputError
from streamer.sinks.estimate_log import (COLUMNS, EstimateLog, drop_cell, format_row, read_log,
                                         rows_text)

CHANNELS = {"PLETH": "ppg", "RESP": "resp"}
CONFIG = {"profile": {"name": "wrist", "hr": {"window_s": 8.0}}, "fs": 125.0, "speed": "max"}


def estimates(rng, n=40) -> list[Estimate]:
    """Hops 0.25 s apart, two quantities each, some without a rate."""
    out = []
    for p in range(n):
        emitted = 8.0 + 0.25 * p
        for quantity, source, delay in (("hr", "PLETH", 3.98), ("rr", "RESP", 15.9)):
            rate = float(rng.uniform(40, 180)) if p % 7 else math.nan
            out.append(Estimate(quantity, source, emitted - delay, emitted, rate,
                                float(rng.uniform()), float(rng.uniform())))
    return out


def write(path, ests, events=()) -> EstimateLog:
    """A log of ``ests``; ``events`` maps an index in ``ests`` to an event written
    before that estimate."""
    events = dict(events)
    with EstimateLog(path, "replay", "session.csv", CHANNELS, CONFIG) as log:
        for k, est in enumerate(ests):
            if k in events:
                log.write_event(*events[k])
            log.write(est, compute_ms=0.125 * k)
    return log


def check_matches(table, ests):
    cols = table.columns
    assert len(table) == len(ests)
    assert list(cols["quantity"]) == [e.quantity for e in ests]
    assert list(cols["source"]) == [e.source for e in ests]
    # The writer keeps 4 decimals for times and fractions, 3 for rates: half a unit
    # in the last place is the round-off.
    for name, atol in (("emitted_s", 5e-5), ("time_s", 5e-5), ("confidence", 5e-5),
                       ("quality", 5e-5), ("rate_per_min", 5e-4)):
        np.testing.assert_allclose(cols[name], [getattr(e, name) for e in ests],
                                   atol=atol, equal_nan=True, err_msg=name)
    np.testing.assert_allclose(cols["delay_s"], [e.delay_s for e in ests], atol=1e-4)
    np.testing.assert_allclose(cols["compute_ms"], 0.125 * np.arange(len(ests)), atol=5e-5)


def test_round_trip(tmp_path, rng):
    ests = estimates(rng)
    log = write(tmp_path / "logs" / "a.csv", ests)  # the folder is created
    assert log.rows_written == len(ests)
    table = read_log(tmp_path / "logs" / "a.csv")
    assert table.header["version"] == __version__
    assert table.header["mode"] == "replay"
    assert table.header["source"] == "session.csv"
    assert table.header["channels"] == CHANNELS
    assert table.header["config"] == CONFIG
    check_matches(table, ests)
    assert table.pairs() == [("hr", "PLETH"), ("rr", "RESP")]
    hr = table.select(quantity="hr")
    assert len(hr) == len(ests) // 2 and set(hr.columns["source"]) == {"PLETH"}
    assert len(table.select(source="nope")) == 0


def test_text_layout(tmp_path, rng):
    ests = estimates(rng, 3)
    write(tmp_path / "a.csv", ests)
    lines = (tmp_path / "a.csv").read_text().splitlines()
    assert lines[0] == "# ridgewatch estimate log"
    assert lines[7] == ",".join(COLUMNS)
    assert all(len(line.split(",")) == len(COLUMNS) for line in lines[8:])
    assert rows_text(tmp_path / "a.csv") == lines[8:]
    assert lines[8] == format_row(ests[0], 0.0).rstrip("\n")
    no_rate = Estimate("hr", "PLETH", 1.0, 5.0, math.nan, 0.5, 0.25)
    assert format_row(no_rate, math.nan) == ("5.0000,1.0000,hr,PLETH,,0.5000,0.2500,4.0000,,"
                                              "withhold,,\n")
    now = Estimate("hr", "PLETH", 1.0, 5.0, 80.0, 0.9, 0.8, (), 82.5, 0.85)
    assert format_row(now, 1.0).endswith(",show,82.500,0.8500\n")


def test_partial_last_line_is_ignored(tmp_path, rng):
    ests = estimates(rng, 10)
    path = tmp_path / "a.csv"
    write(path, ests)
    whole = format_row(ests[0], 1.0)
    with open(path, "a") as fh:
        fh.write(whole[: len(whole) // 2])  # the writer was killed mid-line
    check_matches(read_log(path), ests)


def test_events_are_skipped(tmp_path, rng):
    ests = estimates(rng, 10)
    path = tmp_path / "a.csv"
    write(path, ests, {0: ("replaying", "starting", math.nan), 4: ("lost", "stream gone", 9.0),
                       6: ("resumed", "stream back", 12.5)})
    text = path.read_text()
    assert "# event nan replaying: starting\n" in text
    assert "# event 9.0000 lost: stream gone\n" in text
    assert "# event 12.5000 resumed: stream back\n" in text
    check_matches(read_log(path), ests)
    assert len(rows_text(path)) == len(ests)


def test_rows_are_readable_while_the_log_is_open(tmp_path, rng):
    ests = estimates(rng, 5)
    path = tmp_path / "a.csv"
    log = EstimateLog(path, "live", "stream", CHANNELS, CONFIG)
    try:
        for est in ests:
            log.write(est)
        # Flushed line by line: another reader sees every row before close().
        assert len(read_log(path)) == len(ests)
    finally:
        log.close()
    log.close()  # twice is fine


def test_header_only_log_has_no_rows(tmp_path):
    EstimateLog(tmp_path / "a.csv", "live", "s", CHANNELS, CONFIG).close()
    table = read_log(tmp_path / "a.csv")
    assert len(table) == 0 and table.pairs() == []


def test_a_recording_is_not_a_log(tmp_path):
    path = tmp_path / "session.csv"
    path.write_text("time_s,PLETH\n0.0,1.0\n0.008,1.1\n")
    with pytest.raises(InputError, match=r"session\.csv is not a ridgewatch estimate log "
                                         r"\(expected the header row 'emitted_s,time_s,"):
        read_log(path)


def test_empty_file_is_not_a_log(tmp_path):
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(InputError, match=r"empty\.csv is not a ridgewatch estimate log"):
        read_log(tmp_path / "empty.csv")


def test_binary_file_is_not_a_log(tmp_path):
    path = tmp_path / "session.csv.gz"
    path.write_bytes(gzip.compress(b"\xff\xfe" + bytes(range(256)) * 4))
    with pytest.raises(InputError, match=r"session\.csv\.gz is not a ridgewatch estimate "
                                         r"log \(not UTF-8 text\)"):
        read_log(path)


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"cannot read the estimate log .*nope\.csv"):
        read_log(tmp_path / "nope.csv")


def test_bad_number_names_the_line(tmp_path, rng):
    ests = estimates(rng, 4)
    path = tmp_path / "a.csv"
    write(path, ests, {1: ("lost", "gone", 8.2)})
    lines = path.read_text().splitlines()
    # Line 12: header block (7) + header row (1) + 2 rows + the event line, then the row.
    assert lines[11].startswith("8.2500,")
    cells = lines[11].split(",")
    cells[4] = "7x"
    lines[11] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError, match=r"a\.csv, line 12: column 'rate_per_min' is not a "
                                         r"number: '7x'"):
        read_log(path)


@pytest.mark.parametrize("cells", [3, 13])
def test_wrong_number_of_cells_names_the_line(tmp_path, rng, cells):
    ests = estimates(rng, 4)
    path = tmp_path / "a.csv"
    write(path, ests)
    with open(path, "a") as fh:
        fh.write(",".join(["1.0"] * cells) + "\n")
        fh.write(format_row(ests[0], 0.0))
    with pytest.raises(InputError, match=rf"a\.csv, line 17: {cells} cells instead of 12"):
        read_log(path)


def test_unwritable_path(tmp_path):
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match=r"cannot write the estimate log .*file/log\.csv"):
        EstimateLog(tmp_path / "file" / "log.csv", "live", "s", CHANNELS, CONFIG)


def test_display_column_records_the_display_rule(tmp_path):
    ests = [Estimate("hr", "PLETH", 0.0, 4.0, 72.0, 0.93, 0.8),
            Estimate("hr", "PLETH", 0.25, 4.25, 72.5, 0.6, 0.8),
            Estimate("hr", "PLETH", 0.5, 4.5, 140.0, 0.2, 0.8),
            Estimate("hr", "PLETH", 0.75, 4.75, math.nan, 0.9, 0.1)]
    write(tmp_path / "log.csv", ests)
    at = COLUMNS.index("display")
    assert [row.split(",")[at] for row in rows_text(tmp_path / "log.csv")] == [
        "show", "grey", "withhold", "withhold"]
    table = read_log(tmp_path / "log.csv")
    assert list(table.columns["display"]) == ["show", "grey", "withhold", "withhold"]
    # The withheld rate the engine found stays in the log: withholding is a display
    # decision.
    assert table.columns["rate_per_min"][2] == 140.0


def test_a_log_written_before_the_display_column_is_still_read(tmp_path, rng):
    ests = estimates(rng, n=8)
    path = tmp_path / "old.csv"
    write(path, ests)
    # Rewrite it as the writer did before the display column existed.
    lines = path.read_text().splitlines()
    old = [ln if ln.startswith("#") else ln.rsplit(",", 3)[0] for ln in lines]
    path.write_text("\n".join(old) + "\n")
    assert "display" not in path.read_text()
    table = read_log(path)
    check_matches(table, ests)
    assert list(table.columns["display"]) == [""] * len(ests)
    assert np.all(np.isnan(table.columns["rate_now_per_min"]))


def test_a_log_written_before_the_rate_now_columns_is_still_read(tmp_path, rng):
    ests = estimates(rng, n=8)
    path = tmp_path / "old.csv"
    write(path, ests)
    lines = path.read_text().splitlines()
    old = [ln if ln.startswith("#") else ln.rsplit(",", 2)[0] for ln in lines]
    path.write_text("\n".join(old) + "\n")
    assert "rate_now" not in path.read_text()
    table = read_log(path)
    check_matches(table, ests)
    assert np.all(np.isnan(table.columns["now_confidence"]))


# --------------------------------------------------------------------------- odd names

ODD_NAMES = ["PPG, left", 'the "finger"', "ear\nlobe", "Pulsoxymeter Ohr (gr\u00fcn) \u2764",
             "a\n# not an event", "line\u2028separator", ",", '"', " padded "]
"""Channel names a CSV header or an LSL label can carry: commas, quotes, line breaks
(one that starts a '#' line), non-ASCII letters and symbols, a Unicode line separator
(which ``str.splitlines`` would split at), surrounding spaces."""


def odd_estimates(rng) -> list[Estimate]:
    out = []
    for p in range(6):
        for name in ODD_NAMES:
            out.append(Estimate("hr", name, 4.0 + 0.25 * p, 8.0 + 0.25 * p,
                                float(rng.uniform(40, 180)), 0.5, 0.75))
    return out


def test_odd_channel_names_read_back(tmp_path, rng):
    ests = odd_estimates(rng)
    path = tmp_path / "odd.csv"
    with EstimateLog(path, "live", "stream\nwith \"quotes\", a comma",
                     {n: "ppg" for n in ODD_NAMES}, CONFIG) as log:
        for k, est in enumerate(ests):
            if k == 3:
                log.write_event("lost", 'stream "ear\nlobe", gone', 9.0)
            log.write(est, compute_ms=0.125 * k)
    table = read_log(path)
    check_matches(table, ests)
    assert table.header["source"] == "stream\nwith \"quotes\", a comma"
    assert table.header["channels"] == {n: "ppg" for n in ODD_NAMES}
    assert table.pairs() == [("hr", n) for n in ODD_NAMES]

    # Python's csv module, as the module docstring says to read it.
    with open(path, encoding="utf-8", newline="") as fh:
        rows = [r for r in csv.reader(fh) if r and not r[0].startswith("#")]
    assert tuple(rows[0]) == COLUMNS
    assert len(rows) == 1 + len(ests)
    assert [r[3] for r in rows[1:]] == [e.source for e in ests]
    assert [float(r[4]) for r in rows[1:]] == pytest.approx([e.rate_per_min for e in ests],
                                                            abs=5e-4)
    # Every '#' line is whole: header values and the event message stay on their line.
    lines = path.read_text(encoding="utf-8").split("\n")
    assert lines[4] == '# source: "stream\\nwith \\"quotes\\", a comma"'
    assert '# event 9.0000 lost: "stream \\"ear\\nlobe\\", gone"' in lines


def test_plain_names_are_written_as_they_are(tmp_path, rng):
    write(tmp_path / "a.csv", estimates(rng, 2))
    lines = (tmp_path / "a.csv").read_text().splitlines()
    assert lines[4] == "# source: session.csv"
    assert lines[8].split(",")[3] == "PLETH"


def test_a_row_cut_inside_a_quoted_name_is_ignored(tmp_path, rng):
    ests = odd_estimates(rng)[:3]  # the third is "ear\nlobe"
    path = tmp_path / "a.csv"
    with EstimateLog(path, "live", "s", CHANNELS, CONFIG) as log:
        for est in ests[:2]:
            log.write(est, 0.0)
    whole = format_row(ests[2], 0.0)
    with open(path, "a", newline="") as fh:
        fh.write(whole[: whole.index("\n") + 1])  # killed right after the line break
    assert list(read_log(path).columns["source"]) == [ests[0].source, ests[1].source]


def test_started_is_the_wall_clock_start_in_utc(tmp_path):
    from datetime import datetime, timedelta, timezone

    local = datetime(2026, 5, 4, 11, 30, 12, 345000, tzinfo=timezone(timedelta(hours=2)))
    EstimateLog(tmp_path / "a.csv", "live", "s", CHANNELS, CONFIG, started=local).close()
    assert read_log(tmp_path / "a.csv").header["started"] == "2026-05-04T09:30:12.345+00:00"
    before = datetime.now(timezone.utc)
    EstimateLog(tmp_path / "b.csv", "live", "s", CHANNELS, CONFIG).close()
    started = datetime.fromisoformat(read_log(tmp_path / "b.csv").header["started"])
    assert started.utcoffset() == timedelta(0)
    # Written to the millisecond: at most 1 ms before the time taken just before.
    assert started >= before - timedelta(milliseconds=1)


# --------------------------------------------------------------------------- no data lost

def test_an_existing_file_is_refused_and_untouched(tmp_path):
    path = tmp_path / "notes.csv"
    path.write_bytes(b"precious\n")
    with pytest.raises(InputError, match=r"^the estimate log .*notes\.csv already exists; give "
                                         r"another --log path, or add --overwrite to replace "
                                         r"an earlier ridgewatch log$"):
        EstimateLog(path, "live", "s", CHANNELS, CONFIG)
    assert path.read_bytes() == b"precious\n"


def test_overwrite_replaces_only_a_log(tmp_path, rng):
    path = tmp_path / "notes.csv"
    path.write_bytes(b"precious\n")
    with pytest.raises(InputError, match=r"^.*notes\.csv is not a ridgewatch estimate log \(its "
                                         r"first line is not '# ridgewatch estimate log'\); "
                                         r"--overwrite only replaces logs: give another --log "
                                         r"path$"):
        EstimateLog(path, "live", "s", CHANNELS, CONFIG, if_exists="overwrite")
    assert path.read_bytes() == b"precious\n"

    old = tmp_path / "old.csv"
    write(old, estimates(rng, 30))
    ests = estimates(rng, 2)
    with EstimateLog(old, "live", "s", CHANNELS, CONFIG, if_exists="overwrite") as log:
        for est in ests:
            log.write(est, 0.0)
    assert len(read_log(old)) == len(ests)  # replaced, not appended to or mixed

    empty = tmp_path / "empty.csv"
    empty.write_bytes(b"")
    EstimateLog(empty, "live", "s", CHANNELS, CONFIG, if_exists="overwrite").close()
    assert read_log(empty).header["mode"] == "live"


def test_the_log_is_never_an_input(tmp_path):
    recording = tmp_path / "rec.csv"
    recording.write_bytes(b"# ridgewatch estimate log\nnot really\n")
    link = tmp_path / "link.csv"
    link.symlink_to(recording)
    for path in (recording, link, tmp_path / "." / "rec.csv"):
        with pytest.raises(InputError, match=r"^--log .*\.csv is the input file .*rec\.csv; the "
                                             r"log would destroy it: give another --log path$"):
            EstimateLog(path, "replay", "rec.csv", CHANNELS, CONFIG, if_exists="overwrite",
                        inputs=[recording])
    assert recording.read_bytes() == b"# ridgewatch estimate log\nnot really\n"


def test_a_log_being_written_is_not_taken(tmp_path, rng):
    path = tmp_path / "a.csv"
    first = EstimateLog(path, "live", "s", CHANNELS, CONFIG)
    try:
        with pytest.raises(InputError, match=r"already exists"):
            EstimateLog(path, "live", "s", CHANNELS, CONFIG)
        with pytest.raises(InputError, match=r"^the estimate log .*a\.csv is being written by "
                                             r"another ridgewatch run; give another --log path$"):
            EstimateLog(path, "live", "s", CHANNELS, CONFIG, if_exists="overwrite")
        ests = estimates(rng, 3)
        for est in ests:
            first.write(est, 0.0)
    finally:
        first.close()
    assert len(read_log(path)) == len(ests)
    # Once the first run has closed it, --overwrite may take it.
    EstimateLog(path, "live", "s", CHANNELS, CONFIG, if_exists="overwrite").close()
    assert len(read_log(path)) == 0


def test_numbered_names_never_replace_a_file(tmp_path):
    path = tmp_path / "run.csv"
    path.write_bytes(b"x")
    (tmp_path / "run-2.csv").write_bytes(b"y")
    logs = [EstimateLog(path, "live", "s", CHANNELS, CONFIG, if_exists="number")
            for _ in range(2)]
    for log in logs:
        log.close()
    assert [log.path.name for log in logs] == ["run-3.csv", "run-4.csv"]
    assert path.read_bytes() == b"x" and (tmp_path / "run-2.csv").read_bytes() == b"y"


def test_a_device_is_written_as_it_is(tmp_path):
    EstimateLog("/dev/null", "live", "s", CHANNELS, CONFIG).close()


def test_drop_cell_leaves_out_one_column_by_name():
    est = Estimate("hr", "PPG, left", 4.0, 8.0, 72.0, 0.5, 0.75)
    row = format_row(est, 1.25).rstrip("\n")
    assert row == f'8.0000,4.0000,hr,"PPG, left",72.000,0.5000,0.7500,4.0000,1.2500,{est.display},,'
    assert drop_cell(row) == row.replace(",1.2500,", ",")
    assert drop_cell(row, "display") == row.replace(f",{est.display},", ",")
    assert drop_cell(row[:20]) == row[:20]  # cut short before the compute time


def test_marker_lines_read_back_exactly_between_rows(tmp_path):
    """Marker texts with commas, quotes, line breaks and non-ASCII characters, and a
    source holding ': ', read back as themselves; rows around them are unaffected."""
    from streamer.sinks.estimate_log import EstimateLog, read_log
    from streamer.sources.base import Marker
    from estimators.estimate import Estimate

    markers = [Marker(1.25, 'stage 2, "fast"', "lab"), Marker(2.0, "Stufe 3 – 180 W\nneu", "user"),
               Marker(3.5, "# marker 9 x: y", "odd: source"), Marker(4.0, " padded ", "")]
    path = tmp_path / "m.csv"
    with EstimateLog(path, "replay", "x", {"PPG": "ppg"}, {}) as log:
        for k, marker in enumerate(markers):
            log.write(Estimate("hr", "PPG", k + 0.5, k + 4.5, 70.0 + k, 0.9, 0.8))
            log.write_marker(marker)
        log.write(Estimate("hr", "PPG", 9.0, 13.0, 75.0, 0.9, 0.8))
    table = read_log(path)
    assert table.markers == markers
    assert len(table) == 5
    assert table.columns["rate_per_min"].tolist() == [70.0, 71.0, 72.0, 73.0, 75.0]
