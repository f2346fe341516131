"""Shared fixtures: a seeded random generator, the real-recordings folder, and a runner
for code with the numba JIT switched off."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

REPO_ROOT = Path(__file__).resolve().parents[1]
"""The project root (``/work/main`` in the development tree)."""

SHARED_DATA = REPO_ROOT / ".." / "shared" / "data"
"""Real recordings live beside the repository, never inside it."""

SEED = 20240917


@pytest.fixture
def rng() -> np.random.Generator:
    """A fresh generator with a fixed seed for every test (tests stay independent)."""
    return np.random.default_rng(SEED)


@pytest.fixture(scope="session")
def shared_data() -> Path:
    """Path of ``../shared/data``; skips the test when the recordings are absent."""
    path = SHARED_DATA.resolve()
    if not (path / "README.md").is_file():
        pytest.skip(f"real recordings not found at {path} (expected ../shared/data beside "
                    f"the project root {REPO_ROOT}); data tests need them")
    return path


def run_python_without_jit(code: str, timeout_s: float = 300.0) -> object:
    """Run ``code`` in a fresh interpreter with ``RIDGEWATCH_NO_JIT=1`` and return the
    JSON value it prints as its last line of standard output.

    The JIT switch is read at import time, so only a new process can turn it off for
    code that was already imported here. The timeout guards against hangs only.
    """
    env = dict(os.environ, RIDGEWATCH_NO_JIT="1")
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    done = subprocess.run([sys.executable, "-c", code], cwd=REPO_ROOT, env=env,
                          capture_output=True, text=True, timeout=timeout_s)
    if done.returncode != 0:
        raise AssertionError(f"no-JIT run failed ({done.returncode}):\n{done.stderr}")
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.fixture
def without_jit():
    """:func:`run_python_without_jit`, as a fixture."""
    return run_python_without_jit
