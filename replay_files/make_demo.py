"""Write the bundled demo session (synthetic) and its ground truth.

Run from the project root: ``python replay_files/make_demo.py``. Deterministic (fixed
seed): running it again gives byte-identical files. The scenario is described in
:mod:`streamer.simulation` (a synthetic cycling bench trial); no real person's data.
"""

from __future__ import annotations

import gzip
from pathlib import Path

import numpy as np

from streamer.simulation import cycling_trial

HERE = Path(__file__).resolve().parent
SESSION = HERE / "cycling_trial.csv.gz"
TRUTH = HERE / "cycling_trial_truth.csv"
BEATS = HERE / "cycling_trial_beats.csv"
BREATHS = HERE / "cycling_trial_breaths.csv"


def write(fs: float = 125.0) -> None:
    sim = cycling_trial(fs)
    header = "time_s," + ",".join(sim.names)
    rows = np.column_stack((sim.timestamps, sim.samples))
    lines = [header] + [",".join(f"{v:.5f}" for v in row) for row in rows]
    with gzip.GzipFile(SESSION, "wb", mtime=0) as fh:
        fh.write(("\n".join(lines) + "\n").encode())
    step = int(fs)  # ground truth once per second
    truth = ["time_s,hr_bpm,rr_per_min,cadence_rpm"] + [
        f"{sim.timestamps[k]:.3f},{sim.hr_bpm[k]:.3f},{sim.rr_per_min[k]:.3f},{sim.cadence_rpm[k]:.1f}"
        for k in range(0, len(sim.timestamps), step)
    ]
    TRUTH.write_text("\n".join(truth) + "\n")
    BEATS.write_text("beat_s\n" + "\n".join(f"{b:.4f}" for b in sim.beat_times) + "\n")
    BREATHS.write_text("breath_s\n" + "\n".join(f"{b:.4f}" for b in sim.breath_times) + "\n")


if __name__ == "__main__":
    write()
    print(f"wrote {SESSION.name}, {TRUTH.name}, {BEATS.name}, {BREATHS.name}")
