"""The README's Python example runs as written and prints what it says."""

from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"


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
