"""The stage protocol and its conformance checks, on small stages whose outputs are
obvious (a running sum and a first difference), and a stage that breaks purity."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest

from estimators.stage import Chain, join_arrays, run_chunks, split_arrays
from tests.stage_checks import check_all, check_without_jit


@dataclass(frozen=True)
class RunningSum:
    """y[k] = x[0] + ... + x[k]; state: the sum so far (a 1-element array)."""

    def initial_state(self):
        return np.zeros(1)

    def step(self, state, x):
        y = state[0] + np.cumsum(x[0])
        return (np.array([y[-1]]) if len(y) else state.copy()), (y,)

    def batch(self, x):
        return (np.cumsum(x[0]),)

    def split(self, x, bounds):
        return split_arrays(x, bounds)

    def join(self, parts):
        return join_arrays(parts)


@dataclass(frozen=True)
class Difference(RunningSum):
    """y[k] = x[k] - x[k-1] (x[-1] = 0); state: the last input."""

    def step(self, state, x):
        values = np.concatenate([state, x[0]])
        return values[-1:].copy(), (np.diff(values),)

    def batch(self, x):
        return (np.diff(np.concatenate([[0.0], x[0]])),)


@dataclass(frozen=True)
class MutatingSum(RunningSum):
    """Like RunningSum, but changes the state it is given: not a pure step."""

    def step(self, state, x):
        y = state[0] + np.cumsum(x[0])
        if len(y):
            state[0] = y[-1]
        return state, (y,)


def chain_case():
    return Chain((RunningSum(), Difference())), (np.random.default_rng(1).normal(size=500),)


def test_a_chain_of_stages_passes_the_conformance_checks(rng):
    check_all(chain_case, rng)
    chain, x = chain_case()
    # The difference of the running sum is the input itself.
    np.testing.assert_allclose(chain.batch(x)[0], x[0], atol=1e-12)


def test_a_step_that_changes_its_input_state_is_caught(rng):
    with pytest.raises(AssertionError, match="step must not change its input state"):
        check_all(lambda: (MutatingSum(), (np.arange(50.0),)), rng)


def test_a_chain_refuses_what_is_not_a_stage():
    with pytest.raises(TypeError, match="int does not speak the stage protocol"):
        Chain((RunningSum(), 3))


def test_the_jit_off_check_runs_in_a_fresh_interpreter():
    check_without_jit("tests.estimators.test_stage", "chain_case")


def test_run_chunks_resumes_from_a_given_state():
    stage, x = RunningSum(), (np.ones(10),)
    state, _ = run_chunks(stage, x, [4])
    _, again = run_chunks(stage, x, [], state=state)
    np.testing.assert_array_equal(again[0], np.arange(11.0, 21.0))
