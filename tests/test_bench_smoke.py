"""The benchmark suite runs end to end and reports numbers in every section.

No timing is asserted here: benchmarks report, tests check (STYLE.md: "Benchmarks live
in bench/, never as wall-clock assertions in tests"). The fast tests below check the
suite's own bookkeeping (target comparison, settling time, causal scoring, latency
matching, folding other tables) on inputs whose answer is worked out by hand.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from bench import measure
from bench.__main__ import EXTERNAL_PARTS, OWN_PARTS, fold
from bench.accuracy import held_rate_at
from bench.latency import match
from bench.step_response import settle_time

REPO_ROOT = Path(__file__).resolve().parents[1]


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


@pytest.mark.slow
@pytest.mark.lsl
@pytest.mark.data
def test_quick_run_reports_every_section(tmp_path):
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    # The timeout only guards against a hang; it is not a performance check.
    done = subprocess.run([sys.executable, "-m", "bench", "--quick", "--out", str(tmp_path)],
                          cwd=REPO_ROOT, env=env, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    report = json.loads((tmp_path / "bench.json").read_text())
    sections = report["sections"]
    assert set(sections) == set(OWN_PARTS) | set(EXTERNAL_PARTS)

    shared_data = REPO_ROOT.parent / "shared" / "data"
    for name in OWN_PARTS:
        result = sections[name]
        if name == "accuracy" and not shared_data.exists():
            # The accuracy part needs the real recordings; without them it must say so.
            assert result["status"] == "not available" and "not found" in result["reason"]
            continue
        assert result["status"] == "ok", f"{name}: {result['status']}: {result['reason']}"
        values = [row["value"] for row in result["measures"]]
        assert any(_is_number(v) for v in values), f"{name} reported no number"
        assert all(v is None or _is_number(v) for v in values), f"{name}: {values}"
        for row in result["measures"]:
            if row["op"] is not None and row["value"] is not None:
                expected = (row["value"] <= row["limit"] if row["op"] == "<="
                            else row["value"] >= row["limit"])
                assert row["met"] is expected, row
        assert result["method"], f"{name} does not say how it measured"
    for name in EXTERNAL_PARTS:
        # --quick never runs the other parts' table modules.
        assert sections[name]["status"] in ("not available", "skipped"), sections[name]

    machine = report["machine"]
    assert machine["cpu"] and machine["cores"] >= 1
    assert all(machine[k] for k in ("python", "numpy", "numba", "date"))
    markdown = (tmp_path / "bench.md").read_text()
    header = "| section | measure | value | target | met? |"
    assert header in markdown and header in done.stdout
    for result in sections.values():
        assert f"| {result['title']} |" in markdown


def test_measure_compares_against_its_target():
    assert measure("p99", 0.1, "ms", "<= 0.2 ms", "<=", 0.2)["met"] is True
    assert measure("p99", 0.3, "ms", "<= 0.2 ms", "<=", 0.2)["met"] is False
    assert measure("speed", 2500.0, "x", ">= 2000x", ">=", 2000.0)["met"] is True
    # No value (e.g. never settled) against a target is a miss, and JSON gets None.
    never = measure("settle", float("nan"), "s", "<= 6 s", "<=", 6.0)
    assert never["value"] is None and never["met"] is False
    assert measure("info", 1.0, "ms")["met"] is None
    with pytest.raises(ValueError, match="op='<' must be"):
        measure("bad", 1.0, "ms", "< 2", "<", 2.0)


def test_settle_time_counts_from_the_step_to_the_last_entry_into_tolerance():
    emitted = np.array([9.5, 10.25, 10.5, 10.75, 11.0, 11.25])
    ok = np.array([True, False, True, False, True, True])
    # The estimate at 9.5 s is before the step; the last miss is at 10.75 s.
    assert settle_time(emitted, ok, 10.0) == pytest.approx(1.0)
    assert settle_time(emitted, np.ones(6, bool), 10.0) == pytest.approx(0.25)
    assert math.isnan(settle_time(emitted, np.array([True] * 5 + [False]), 10.0))


def test_held_rate_is_the_last_finite_rate_shown_by_then():
    emitted = np.array([8.0, 8.25, 8.5, 8.75])
    rate = np.array([70.0, np.nan, 72.0, np.nan])
    got = held_rate_at(emitted, rate, np.array([7.9, 8.0, 8.3, 8.6, 9.0]))
    np.testing.assert_array_equal(got, [np.nan, 70.0, 70.0, 72.0, 72.0])


def test_latency_match_uses_the_push_time_of_the_newest_sample():
    fs = 100.0
    stamps = 1000.0 + np.arange(50) / fs
    push_s = stamps + 0.001          # each sample pushed 1 ms after its stamp
    estimate_stamps = stamps[[19, 44]] + 2e-6  # clock-offset noise far below 1/fs
    arrivals = push_s[[19, 44]] + np.array([0.004, 0.010])
    r = match(stamps, push_s, estimate_stamps, arrivals, fs)
    assert r["matched"] == 2
    assert r["beyond_hop"]["median_ms"] == pytest.approx(7.0)
    assert r["beyond_hop"]["max_ms"] == pytest.approx(10.0)
    # Oldest sample first used by the second estimate: sample 20, pushed 24 samples earlier.
    assert r["incl_hop_wait"]["max_ms"] == pytest.approx(240.0 + 10.0)


def test_latency_match_refuses_an_empty_run():
    with pytest.raises(RuntimeError, match="no estimate arrived"):
        match(np.arange(3.0), np.arange(3.0), np.empty(0), np.empty(0), 1.0)


def test_fold_takes_rows_or_numeric_fields_of_another_table():
    rows = fold({"measures": [{"measure": "mean AAE", "value": 2.5, "unit": "bpm"}]})
    assert [(r["measure"], r["value"], r["unit"]) for r in rows] == [("mean AAE", 2.5, "bpm")]
    rows = fold({"name": "x", "mae": 3.0, "summary": {"coverage": 0.9, "ok": True},
                 "records": [{"mae": 1.0}]})
    assert [(r["measure"], r["value"]) for r in rows] == [("mae", 3.0), ("summary.coverage", 0.9)]
