"""``python -m bench``: run the benchmark suite, print one table, write the results.

Usage::

    python -m bench                  # everything (under 10 minutes on 2 cores)
    python -m bench --quick          # a short smoke run of every part
    python -m bench --only latency   # one part
    python -m bench --out DIR        # write the results somewhere else

Writes ``bench.json`` (every section: its measures, how they were measured, details)
and ``bench.md`` (the same table and the machine it ran on) to ``bench/results/``;
with ``--only NAME`` the files are ``bench-only-NAME.json`` / ``.md`` so a partial run
never replaces a full one. Exit status 1 when a part failed (raised), 0 otherwise:
a missed target is a finding, not a failure.

The table modules of other parts (``bench/exercise_table.py``,
``bench/breathing_table.py``, ``bench/deshape_table.py``, ``bench/calibration.py``,
``bench/display_fps.py``) are run with ``python -m`` when they exist and their JSON
(``exercise.json``, ``breathing.json``, ``deshape.json``, ``calibration.json``,
``display.json`` in ``bench/results/``) is folded into the table; otherwise their
section says "not
available". ``--quick`` does not run them (they write to ``bench/results/`` themselves).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import subprocess
import sys
import time
import traceback
from pathlib import Path

from bench import REPO_ROOT, RESULTS_DIR, jsonable, measure, section, worker_env

OWN_PARTS = ("cost", "streaming_batch", "throughput", "step_response", "rate_now", "latency",
             "memory", "offline_memory", "accuracy", "beats_cost")
EXTERNAL_PARTS = {
    # name: (module, results file, section title)
    "exercise": ("bench.exercise_table", "exercise.json", "Exercise heart-rate table (SPC 2015)"),
    "breathing": ("bench.breathing_table", "breathing.json", "Breathing-rate table (BIDMC)"),
    "deshape": ("bench.deshape_table", "deshape.json", "De-shape on vs off (real recordings)"),
    "display": ("bench.display_fps", "display.json", "Display frame rate"),
    "calibration": ("bench.calibration", "calibration.json",
                    "Calibrated heart-rate confidence (SPC 2015, BIDMC 01-26)"),
}
PARTS = OWN_PARTS + tuple(EXTERNAL_PARTS)
EXTERNAL_TIMEOUT_S = 400.0
"""Longest wall time given to each external table module."""
SUITE_BUDGET_S = 1500.0
"""The whole suite should end within 25 minutes; external modules get what is left of
this budget (at least :data:`MIN_EXTERNAL_S` each)."""
MIN_EXTERNAL_S = 60.0
MAX_FOLDED_ROWS = 12


def run_own(name: str, quick: bool) -> dict:
    from bench import (accuracy, beats_cost, cost, latency, memory, rate_now, step_response,
                       throughput)

    runners = {"cost": cost.run_cost, "streaming_batch": cost.run_streaming_batch,
               "throughput": throughput.run, "step_response": step_response.run,
               "rate_now": rate_now.run,
               "latency": latency.run, "memory": memory.run,
               "offline_memory": memory.run_offline, "accuracy": accuracy.run,
               "beats_cost": beats_cost.run}
    return runners[name](quick)


# ----------------------------------------------------------------- external tables


def run_external(name: str, quick: bool, started: float) -> dict:
    """Run another part's table module and fold its JSON (``started``: wall time
    (``time.time()``) at which the suite began; older result files are stale)."""
    module, file_name, title = EXTERNAL_PARTS[name]
    path = REPO_ROOT / Path(*module.split("."))
    if not path.with_suffix(".py").is_file():
        return section(title, [], "", status="not available",
                       reason=f"{module.replace('.', '/')}.py does not exist yet")
    if quick:
        return section(title, [], "", status="skipped",
                       reason="not run with --quick (it writes bench/results itself)")
    timeout_s = max(MIN_EXTERNAL_S,
                    min(EXTERNAL_TIMEOUT_S, SUITE_BUDGET_S - (time.time() - started)))
    try:
        done = subprocess.run([sys.executable, "-m", module], cwd=REPO_ROOT, env=worker_env(),
                              capture_output=True, text=True, timeout=timeout_s)
    except subprocess.TimeoutExpired:
        return section(title, [], f"python -m {module}", status="failed",
                       reason=f"timed out after {timeout_s:.0f} s")
    if done.returncode != 0:
        tail = (done.stderr.strip().splitlines() or ["(no output)"])[-1]
        return section(title, [], f"python -m {module}", status="failed",
                       reason=f"exit {done.returncode}: {tail}")
    results = RESULTS_DIR / file_name
    if not results.is_file() or results.stat().st_mtime < started:
        return section(title, [], f"python -m {module}", status="failed",
                       reason=f"it ran but did not write a fresh bench/results/{file_name}")
    data = json.loads(results.read_text())
    return section(title, fold(data), f"python -m {module}; numbers from "
                   f"bench/results/{file_name}", {"results": data})


def fold(data) -> list[dict]:
    """Table rows from another module's JSON: its own ``measures`` list when it has one
    in this suite's row format, else its numeric fields (top level first, then up to two
    levels down), at most :data:`MAX_FOLDED_ROWS`."""
    if isinstance(data, dict) and isinstance(data.get("measures"), list):
        rows = [m for m in data["measures"] if isinstance(m, dict) and "measure" in m]
        if rows:
            return [measure(str(m["measure"]), m.get("value"), str(m.get("unit", "")),
                            m.get("target"), note=str(m.get("note", ""))) | {
                                "met": m.get("met")} for m in rows[:MAX_FOLDED_ROWS]]
    rows: list[dict] = []

    def walk(obj, prefix: str, depth: int):
        if not isinstance(obj, dict) or depth > 2:
            return
        for key, value in obj.items():
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                rows.append(measure(f"{prefix}{key}", value, ""))
        for key, value in obj.items():
            if isinstance(value, dict):
                walk(value, f"{prefix}{key}.", depth + 1)

    walk(data, "", 0)
    return rows[:MAX_FOLDED_ROWS]


# ------------------------------------------------------------------------ machine


def machine() -> dict:
    import numpy
    import scipy

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    versions = {"python": platform.python_version(), "numpy": numpy.__version__,
                "scipy": scipy.__version__}
    for name in ("numba", "pylsl"):
        try:
            versions[name] = __import__(name).__version__
        except Exception:  # absent or without a version: say so rather than fail
            versions[name] = "not importable"
    return {"cpu": cpu, "cores": os.cpu_count(), "platform": platform.platform(),
            "date": _dt.datetime.now().astimezone().isoformat(timespec="seconds"),
            "load_average_start": list(os.getloadavg()), **versions}


# ------------------------------------------------------------------------- output


def _value_text(row: dict) -> str:
    value = row["value"]
    if value is None:
        text = "—"
    elif row["unit"] == "count":
        text = f"{value:.0f}"
    else:
        text = f"{value:.3g}" + (f" {row['unit']}" if row["unit"] else "")
    return text + (f" ({row['note']})" if row.get("note") else "")


def table(sections: dict) -> str:
    lines = ["| section | measure | value | target | met? |", "|---|---|---|---|---|"]
    for result in sections.values():
        title = result["title"]
        if result["status"] != "ok":
            lines.append(f"| {title} | — | {result['status']}: {result['reason']} | | |")
            continue
        for row in result["measures"]:
            met = {True: "yes", False: "no", None: ""}[row["met"]]
            lines.append(f"| {title} | {row['measure']} | {_value_text(row)} | "
                         f"{row['target'] or ''} | {met} |")
    return "\n".join(lines)


def markdown(report: dict) -> str:
    m = report["machine"]
    load = ", ".join(f"{x:.2f}" for x in m["load_average_start"])
    load_end = ", ".join(f"{x:.2f}" for x in m.get("load_average_end", []))
    head = [
        "# ridgewatch benchmarks",
        "",
        f"Run {m['date']} ({'quick' if report['quick'] else 'full'} run, "
        f"{report['wall_s']:.0f} s) on {m['cpu']}, {m['cores']} cores, {m['platform']}; "
        f"Python {m['python']}, numpy {m['numpy']}, scipy {m['scipy']}, numba {m['numba']}, "
        f"pylsl {m['pylsl']}. Load average (1, 5, 15 min) at start {load}, at end {load_end}.",
        "",
        "Figures are ratios and distributions measured side by side in one run; absolute "
        "times depend on the machine and on what else runs on it.",
        "",
        table(report["sections"]),
        "",
        "## How each part was measured",
        "",
    ]
    for result in report["sections"].values():
        if result["method"]:
            head.append(f"* **{result['title']}**: {result['method']}")
    return "\n".join(head) + "\n"


# --------------------------------------------------------------------------- main


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench", description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="short smoke run of every part")
    parser.add_argument("--only", choices=PARTS, help="run one part")
    parser.add_argument("--out", type=Path, default=RESULTS_DIR,
                        help="folder for bench.json and bench.md (default bench/results)")
    args = parser.parse_args(argv)
    parts = [args.only] if args.only else list(PARTS)
    started_wall = time.time()
    started = time.perf_counter()
    report = {"quick": args.quick, "machine": machine(), "sections": {}}
    failed = False
    for name in parts:
        print(f"[bench] {name} ...", file=sys.stderr, flush=True)
        part_start = time.perf_counter()
        try:
            if name in EXTERNAL_PARTS:
                result = run_external(name, args.quick, started_wall)
            else:
                result = run_own(name, args.quick)
        except Exception as exc:
            failed = True
            reason = f"{type(exc).__name__}: {exc}".splitlines()[0]
            result = section(name, [], "", {"traceback": traceback.format_exc()},
                             status="failed", reason=reason)
        result["wall_s"] = time.perf_counter() - part_start
        report["sections"][name] = jsonable(result)
        print(f"[bench] {name}: {result['status']} in {result['wall_s']:.1f} s",
              file=sys.stderr, flush=True)
    if "accuracy" in report["sections"]:
        from bench.accuracy import add_breathing

        add_breathing(report["sections"]["accuracy"], report["sections"].get("breathing"))
    report["machine"]["load_average_end"] = list(os.getloadavg())
    report["wall_s"] = time.perf_counter() - started
    report = jsonable(report)

    args.out.mkdir(parents=True, exist_ok=True)
    stem = f"bench-only-{args.only}" if args.only else "bench"
    (args.out / f"{stem}.json").write_text(json.dumps(report, indent=2) + "\n")
    (args.out / f"{stem}.md").write_text(markdown(report))
    print(table(report["sections"]))
    print(f"\n{args.out / stem}.json and .md written ({report['wall_s']:.0f} s)", file=sys.stderr)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
