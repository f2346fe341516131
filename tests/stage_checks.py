"""The conformance checks every stage of :mod:`estimators.stage` passes.

A conformance case is a function with no arguments, defined at module level in a test
module, returning ``(stage, x)``: a built stage and an input long enough to exercise it
(several hops). Test modules parametrise :func:`check_all` over their cases; the checks
are, for every case:

* **batch parity**: ``stage.batch(x)`` equals the steps over one chunk;
* **chunk invariance**: the steps over 1-sample chunks (of the first ``one_sample_limit``
  input items, to keep the suite quick) and over random chunk sizes equal the steps over
  one chunk;
* **purity**: ``step`` does not change the state it is given;
* **state round trip**: a state pickled and restored in the middle of the input resumes
  to the same output as the uninterrupted run;
* **JIT off** (:func:`check_without_jit`): the same batch in a fresh interpreter with
  ``RIDGEWATCH_NO_JIT=1`` equals the compiled one.

Outputs are compared with :func:`assert_same`: arrays to ``rtol=1e-9, atol=1e-12`` (NaN
equal to NaN), other values exactly, dataclasses and tuples field by field.
"""

from __future__ import annotations

import copy
import dataclasses
import importlib
import pickle
import tempfile
from pathlib import Path

import numpy as np

from estimators.stage import run_chunks
from tests.conftest import run_python_without_jit

RTOL = 1e-9
ATOL = 1e-12


def assert_same(a, b, where: str = "output") -> None:
    """Deep equality for stage outputs and states (see the module docstring)."""
    if dataclasses.is_dataclass(a) and not isinstance(a, type):
        assert type(a) is type(b), f"{where}: {type(a).__name__} vs {type(b).__name__}"
        for field in dataclasses.fields(a):
            assert_same(getattr(a, field.name), getattr(b, field.name),
                        f"{where}.{field.name}")
    elif isinstance(a, (tuple, list)):
        assert isinstance(b, (tuple, list)) and len(a) == len(b), f"{where}: lengths differ"
        for i, (u, v) in enumerate(zip(a, b)):
            assert_same(u, v, f"{where}[{i}]")
    elif isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), f"{where}: keys differ"
        for key in a:
            assert_same(a[key], b[key], f"{where}[{key!r}]")
    elif isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a), np.asarray(b)
        assert a.shape == b.shape, f"{where}: shape {a.shape} vs {b.shape}"
        if a.dtype.kind in "fc" or b.dtype.kind in "fc":
            np.testing.assert_allclose(a, b, rtol=RTOL, atol=ATOL, equal_nan=True,
                                       err_msg=where)
        else:
            np.testing.assert_array_equal(a, b, err_msg=where)
    elif isinstance(a, float) and isinstance(b, float):
        assert (np.isnan(a) and np.isnan(b)) or np.isclose(a, b, rtol=RTOL, atol=ATOL), \
            f"{where}: {a} vs {b}"
    else:
        assert a == b, f"{where}: {a!r} vs {b!r}"


def _input_length(stage, x) -> int:
    """Number of input items: the length of the (first array of the) unsplit input."""
    first = stage.split(x, [])[0]
    probe = first[0] if isinstance(first, tuple) else first
    return len(probe)


def random_bounds(n: int, rng: np.random.Generator, mean_chunk: float) -> list[int]:
    """Sorted distinct chunk boundaries in ``(0, n)``, chunk sizes about ``mean_chunk``
    (sizes 1 and 0-length ends included by chance)."""
    sizes = rng.geometric(1.0 / max(mean_chunk, 1.0), size=int(2 * n / max(mean_chunk, 1)) + 2)
    bounds = np.cumsum(sizes)
    return [int(b) for b in bounds if 0 < b < n]


def check_all(case, rng: np.random.Generator, one_sample_limit: int = 400) -> None:
    """Batch parity, chunk invariance, purity and state round trip for one case."""
    stage, x = case()
    n = _input_length(stage, x)
    _, whole = run_chunks(stage, x, [])
    assert_same(stage.batch(x), whole, "batch vs one step")

    for mean_chunk in (3.0, 37.0, n / 3.0):
        _, chunked = run_chunks(stage, x, random_bounds(n, rng, mean_chunk))
        assert_same(chunked, whole, f"random chunks of about {mean_chunk:.0f}")

    m = min(n, one_sample_limit)
    head = stage.split(x, [m])[0]
    _, one_by_one = run_chunks(stage, head, list(range(1, m)))
    _, head_whole = run_chunks(stage, head, [])
    assert_same(one_by_one, head_whole, "1-sample chunks")

    start = stage.initial_state()
    first, second = stage.split(x, [n // 2])
    kept = copy.deepcopy(start)
    state, y1 = stage.step(start, first)
    assert_same(start, kept, "initial state after a step (step must not change its input state)")
    before = copy.deepcopy(state)
    _, y2 = stage.step(state, second)
    assert_same(state, before, "state after step (step must not change its input state)")

    restored = pickle.loads(pickle.dumps(state))
    _, y2_restored = stage.step(restored, second)
    assert_same(y2_restored, y2, "resumed from a pickled state")
    assert_same(stage.join([y1, y2]), whole, "two halves")


def check_without_jit(case_module: str, case_name: str) -> None:
    """The case's batch output in a fresh interpreter with the JIT off equals the
    compiled output here (to :data:`RTOL`)."""
    module = importlib.import_module(case_module)
    stage, x = getattr(module, case_name)()
    compiled = stage.batch(x)
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "plain.pickle"
        code = (f"import pickle, importlib\n"
                f"from estimators import _jit\n"
                f"assert not _jit.JIT_ENABLED\n"
                f"m = importlib.import_module({case_module!r})\n"
                f"stage, x = m.{case_name}()\n"
                f"pickle.dump(stage.batch(x), open({str(path)!r}, 'wb'))\n"
                f"print('0')\n")
        run_python_without_jit(code)
        with open(path, "rb") as handle:
            plain = pickle.load(handle)
    assert_same(plain, compiled, f"{case_name} without JIT")
