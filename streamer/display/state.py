"""What the displays show, kept without Qt: latest values, status, history buffers."""

from __future__ import annotations

from dataclasses import dataclass, field

QUALITY_WORDS = ((0.6, "good"), (0.3, "weak"), (0.0, "unusable"))
"""Thresholds of the quality index and the plain word shown with it (our own wording)."""


def quality_word(quality: float) -> str:
    for threshold, word in QUALITY_WORDS:
        if quality >= threshold:
            return word
    return "unusable"


@dataclass
class DisplayState:
    """Latest estimate per (quantity, source) and the stream status line."""

    latest: dict = field(default_factory=dict)
    status: str = "waiting for data"
    dropped: int = 0
    newest_time_s: float = float("nan")

    def apply(self, update) -> None:
        for est in update.estimates:
            self.latest[(est.quantity, est.source)] = est
            self.newest_time_s = est.emitted_s
        if update.event is not None:
            self.status = update.event.message
        elif update.estimates and self.status == "waiting for data":
            self.status = "running"
