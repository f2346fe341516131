"""Benchmark suite: ``python -m bench`` runs every part, prints one table and writes
``bench/results/bench.json`` and ``bench/results/bench.md``.

Every figure is measured side by side in one run on one machine, so the ratios
(streaming against batch, JIT on against off, 1 against 16 channels) mean more than
the absolute times, which depend on the machine and on whatever else runs on it. No
test asserts a wall-clock time; ``tests/test_bench_smoke.py`` only checks that the
suite runs and reports numbers.

This module holds what the parts share: the result record of a part (a *section*
made of *measures*), a runner for measurements that need their own interpreter (JIT
off, clean memory), synthetic test channels and a few statistics.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np

REPO_ROOT = Path(__file__).resolve().parents[1]
"""The project root (``/work/main`` in the development tree)."""

RESULTS_DIR = REPO_ROOT / "bench" / "results"
"""Where the suite and the table modules of other parts write their JSON."""

SHARED_DATA = (REPO_ROOT / ".." / "shared" / "data").resolve()
"""Real recordings live beside the repository, never inside it."""

# ----------------------------------------------------------------------------- records


def finite_or_none(value) -> float | None:
    """A plain float, or None for NaN, inf and None (JSON has no NaN)."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def measure(name: str, value, unit: str, target: str | None = None,
            op: str | None = None, limit: float | None = None, note: str = "") -> dict:
    """One row of the table.

    Parameters
    ----------
    name : what is measured, in words.
    value : the number (None or NaN: not measured, e.g. never settled).
    unit : unit of ``value``.
    target : the target as text for the table (e.g. ``"<= 0.2 ms"``), or None.
    op, limit : the target as a comparison (``"<="`` or ``">="``) and its limit; when
        given, ``met`` says whether ``value`` meets it (None when there is no value).
    note : a short remark shown after the value (e.g. "extrapolated").
    """
    value = finite_or_none(value)
    met = None
    if op is not None and limit is not None and value is not None:
        if op == "<=":
            met = value <= limit
        elif op == ">=":
            met = value >= limit
        else:
            raise ValueError(f"{op=} must be '<=' or '>='")
    elif op is not None and value is None:
        met = False
    return {"measure": name, "value": value, "unit": unit, "target": target,
            "op": op, "limit": limit, "met": met, "note": note}


def section(title: str, measures: list[dict], method: str, details: dict | None = None,
            status: str = "ok", reason: str = "") -> dict:
    """The result of one part of the suite.

    ``status`` is ``"ok"``, ``"not available"`` (a module or the data is absent),
    ``"skipped"`` (not run in this mode) or ``"failed"`` (it raised; ``reason`` says
    what)."""
    return {"title": title, "status": status, "reason": reason, "method": method,
            "measures": measures, "details": jsonable(details or {})}


def jsonable(obj: Any) -> Any:
    """``obj`` with numpy scalars and arrays turned into Python values and NaN into None."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return finite_or_none(obj)
    return obj


def write_json(path: Path, payload: Any, indent: int = 2) -> None:
    """``payload`` as JSON (through :func:`jsonable`) at ``path``, creating its folder."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(jsonable(payload), indent=indent) + "\n")


# ---------------------------------------------------------------------- statistics


def summary_ms(seconds) -> dict:
    """Median, p99, mean and max of durations given in seconds, in milliseconds."""
    ms = 1e3 * np.asarray(seconds, dtype=np.float64)
    if ms.size == 0:
        return {"n": 0, "median_ms": None, "p99_ms": None, "mean_ms": None, "max_ms": None}
    return {"n": int(ms.size), "median_ms": float(np.median(ms)),
            "p99_ms": float(np.percentile(ms, 99)), "mean_ms": float(ms.mean()),
            "max_ms": float(ms.max())}


# ------------------------------------------------------------------------ signals


def synthetic_ppg(fs: float, duration_s: float, n_channels: int = 1, seed: int = 0
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Synthetic PPG channels with slowly wandering, different heart rates.

    Returns ``samples (n, n_channels)``, ``timestamps (n,)`` and the true rates
    ``(n, n_channels)`` in beats per minute. Channel ``c`` wanders around
    ``70 + 5 c`` bpm (mod 60) by +-10 bpm over a minute, so the tracker has to follow.
    """
    from streamer.simulation import pulse_train

    n = int(round(duration_s * fs))
    t = np.arange(n) / fs
    samples = np.empty((n, n_channels))
    rates = np.empty((n, n_channels))
    for c in range(n_channels):
        base = 70.0 + (5.0 * c) % 60.0
        rate = base + 10.0 * np.sin(2 * np.pi * t / 60.0 + c)
        rates[:, c] = rate
        samples[:, c] = pulse_train(fs, rate, seed=seed + c)
    return samples, t, rates


def breathing_wave(fs: float, duration_s: float, rate_per_min: float = 15.0,
                   seed: int = 0, noise: float = 0.02) -> np.ndarray:
    """A respiration-belt-like wave: quicker rise than fall, a little noise."""
    rng = np.random.default_rng(seed)
    n = int(round(duration_s * fs))
    pos = (np.arange(n) / fs * rate_per_min / 60.0) % 1.0
    # Inspiration over the first 40 % of the breath, expiration over the rest.
    wave = np.where(pos < 0.4, np.sin(np.pi * pos / 0.8) ** 2,
                    np.cos(np.pi * (pos - 0.4) / 1.2) ** 2)
    return wave + noise * rng.standard_normal(n)


def hop_bounds(n_hops: int, hop_s: float, fs: float) -> np.ndarray:
    """Chunk boundaries (sample indices) ``floor(p * hop_s * fs)``, ``p = 0..n_hops``:
    chunks of one hop each, as a live source delivers them when ``hop_s * fs`` is not a
    whole number of samples."""
    return np.floor(np.arange(n_hops + 1) * hop_s * fs + 1e-9).astype(np.int64)


# ------------------------------------------------------------------ subprocesses


def worker_env(extra: dict | None = None) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    env.update(extra or {})
    return env


def run_worker(module: str, args: list[str], extra_env: dict | None = None,
               timeout_s: float = 300.0) -> Any:
    """Run ``python -m module args`` in a fresh interpreter and return the JSON value it
    prints as the last line of its standard output.

    A fresh interpreter is how the JIT is switched off (``RIDGEWATCH_NO_JIT`` is read
    at import) and how memory is measured without the rest of the suite in the process.
    """
    done = subprocess.run([sys.executable, "-m", module, *args], cwd=REPO_ROOT,
                          env=worker_env(extra_env), capture_output=True, text=True,
                          timeout=timeout_s)
    if done.returncode != 0:
        tail = done.stderr.strip().splitlines()[-1:] or ["(no output)"]
        raise RuntimeError(f"python -m {module} {' '.join(args)} failed "
                           f"(exit {done.returncode}): {tail[0]}")
    lines = done.stdout.strip().splitlines()
    if not lines:
        raise RuntimeError(f"python -m {module} {' '.join(args)} printed nothing")
    return json.loads(lines[-1])


def print_json(obj: Any) -> None:
    """What a worker prints as its result (one line, read by :func:`run_worker`)."""
    sys.stdout.write(json.dumps(jsonable(obj)) + "\n")
    sys.stdout.flush()
