"""Screenshots of the live window at 1280 x 800 with 1, 4 and 8 channels.

    QT_QPA_PLATFORM=offscreen python docs/make_screenshots.py [--seconds 150] [--out docs]

Writes ``window-1ch.png``, ``window-4ch.png`` and ``window-8ch.png`` (and
``window-8ch-frozen.png``, the 8-channel window with its plots frozen). The signals
are the synthetic cycling trial of :mod:`streamer.simulation` (our own; see
``replay_files/``); extra channels are copies with their own noise, so that each has
rates and quality of its own. The window is fed with what the real engine produces,
through the same feed the runner uses, and grabbed with Qt's ``QWidget.grab``.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

SIZE = (1280, 800)

CHANNEL_SETS = {
    1: (("PPG", "ppg", 0),),
    4: (("PPG", "ppg", 0), ("ECG", "ecg", 1), ("RESP", "resp", 2), ("ACC_X", "acc", 3)),
    8: (("PPG_wrist_L", "ppg", 0), ("PPG_wrist_R", "ppg", 0), ("PPG_finger", "ppg", 0),
        ("ECG_chest", "ecg", 1), ("RESP_belt", "resp", 2), ("ACC_X", "acc", 3),
        ("ACC_Y", "acc", 3), ("ACC_Z", "acc", 3)),
}
"""Channel sets: (name, kind, column of the cycling trial it copies)."""


def updates_for(channels, seconds: float, fs: float = 125.0, chunk_s: float = 0.25):
    """The engine's monitor and the runner-like updates for ``channels``."""
    from estimators.monitor import RateMonitor
    from streamer.runner import Update
    from streamer.simulation import cycling_trial
    from streamer.sources.base import Chunk

    sim = cycling_trial(fs, duration_s=seconds)
    rng = np.random.default_rng(11)
    columns = []
    for k, (_, _, source) in enumerate(channels):
        x = sim.samples[:, source].copy()
        if k and any(c[2] == source for c in channels[:k]):
            x += 0.15 * x.std() * rng.standard_normal(len(x))  # a copy with its own noise
        columns.append(x)
    samples = np.column_stack(columns)
    monitor = RateMonitor([(name, kind) for name, kind, _ in channels], fs, "wrist")
    step = int(round(chunk_s * fs))
    updates = []
    for a in range(0, len(sim.timestamps), step):
        x, t = samples[a:a + step], sim.timestamps[a:a + step]
        updates.append(Update(monitor.update(x, t), Chunk(x, t), monitor.last_blocks))
    return monitor, updates


def grab(channels, seconds: float, path: Path, freeze_at: float | None = None) -> None:
    from streamer.display import qt_window as qw
    from streamer.display.buffers import DisplayLayout, UpdateFeed

    app = qw.application()
    monitor, updates = updates_for(channels, seconds)
    feed = UpdateFeed(maxsize=len(updates) + 1)
    window = qw.MonitorWindow(DisplayLayout.from_monitor(monitor), feed,
                              title="synthetic cycling trial (demo data)  \u00b7  profile wrist")
    window.resize(*SIZE)
    window.show()
    cut = len(updates) if freeze_at is None else int(freeze_at * len(updates))
    for u in updates[:cut]:
        feed.listener(u)
    window.refresh()
    window.draw(force=True)
    if freeze_at is not None:
        window.set_frozen(True)
        for u in updates[cut:]:
            feed.listener(u)
        window.refresh()
        window.draw(force=True)
    app.processEvents()
    window.draw(force=True)
    app.processEvents()
    if not window.grab().save(str(path)):
        raise SystemExit(f"could not write {path}")
    window.close()
    print(f"{path}: {window.width()} x {window.height()}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=150.0)
    parser.add_argument("--out", default=str(ROOT / "docs"))
    args = parser.parse_args(argv)
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    out = Path(args.out)
    for n, channels in CHANNEL_SETS.items():
        grab(channels, args.seconds, out / f"window-{n}ch.png")
    grab(CHANNEL_SETS[8], args.seconds, out / "window-8ch-frozen.png", freeze_at=0.8)
    return 0


if __name__ == "__main__":
    sys.exit(main())
