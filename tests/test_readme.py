"""The README's Python example runs as written and prints what it says; its quick start
works on a fresh machine (a virtual environment, so a system Python that refuses
``pip install`` (PEP 668) is never asked to install) and states the Python versions
``pyproject.toml`` accepts."""

import re
import shlex
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"


def test_readme_python_example_runs(capsys):
    text = README.read_text()
    start = text.index("```python") + len("```python")
    code = text[start:text.index("```", start)]
    namespace: dict = {}
    exec(compile(code, str(README), "exec"), namespace)
    hr = namespace["latest"][("hr", "finger")]
    # The example's signal is a 72 bpm wave (1.2 Hz fundamental with its harmonic).
    assert abs(hr.rate_per_min - 72.0) < 0.5
    assert hr.confidence > 0.9 and hr.quality > 0.9
    assert ("rr", "finger") in namespace["latest"]
    assert all(e.emitted_s == namespace["t"][-1] for e in namespace["offline"])


def quick_start() -> tuple[str, list[list[list[str]]]]:
    """The Quick start section and its commands, each split at ``&&`` into steps (argv)."""
    text = README.read_text()
    section = text[text.index("## Quick start"):]
    section = section[:section.index("\n## ", 1)]
    block = re.search(r"```\n(.*?)```", section, re.S).group(1)
    lines = [line for line in block.splitlines() if line.strip()]
    return section, [[shlex.split(step) for step in line.split("&&")] for line in lines]


def pyproject() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]


def test_quick_start_has_two_commands_that_run_in_a_virtual_environment():
    _, commands = quick_start()
    assert len(commands) == 2
    for steps in commands:
        # Create the environment, enter it, and only then install or run anything.
        assert steps[0][:3] == ["python3", "-m", "venv"]
        venv = steps[0][3]
        assert steps[1] == [".", f"{venv}/bin/activate"]
        assert all(step[0] in ("pip", "python", "ridgewatch") for step in steps[2:])
        assert steps[2][:2] == ["pip", "install"]
    first, second = commands
    assert first[2] == ["pip", "install", "."] and first[3] == ["ridgewatch", "demo"]
    assert second[2] == ["pip", "install", ".[test]"]
    assert second[3] == ["python", "-m", "pytest"]


def test_quick_start_names_what_it_installs():
    project = pyproject()
    assert "test" in project["optional-dependencies"]
    assert project["scripts"]["ridgewatch"] == "streamer.cli:main"


def test_readme_states_the_python_versions_pyproject_accepts():
    section, _ = quick_start()
    minimum = re.fullmatch(r">=\s*(3\.\d+)", pyproject()["requires-python"]).group(1)
    stated = re.search(r"\*\*Supported Python versions:\*\* (3\.\d+) or newer", section)
    assert stated and stated.group(1) == minimum
    assert f"Python {minimum} or newer" in section
    assert f'requires-python = ">={minimum}"' in section
