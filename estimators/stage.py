"""The one stage protocol of the engine.

Every stage of every path (front end, spectrum, transform, tracker, quality, the beat
and modulation stages of breathing from the pulse) speaks the same protocol, in the
manner of ``scipy.signal.sosfilt`` with ``zi``:

* a stage is a frozen object that holds its parameters (physical units, designed
  filters, grids); building it is where parameters are checked;
* ``initial_state()`` is the state before any input (a fresh start);
* ``step(state, x) -> (state, y)`` consumes one chunk of input and returns the new
  state and the chunk's output. It is **pure**: it never changes the ``state`` it is
  given (the conformance suite checks it), so a state can be kept, copied, compared and
  resumed from;
* ``batch(x) -> y`` is the twin that consumes a whole record at once; it equals the
  steps over any chunking of ``x``, joined (the conformance suite checks 1-sample
  chunks, random chunk sizes and batch parity with the JIT on and off);
* ``split(x, bounds)`` cuts an input into chunks at the given boundaries and
  ``join(parts)`` concatenates outputs in time; both are what the conformance suite
  (and a caller feeding chunks) needs to know about the stage's data types.

A path is a :class:`Chain` of stages: its state is the tuple of its stages' states, its
step passes each output to the next stage, and its batch composes the batches. A chain
is itself a stage, so paths nest.

Index vocabulary as elsewhere: ``k`` raw sample, ``j`` analysis sample, ``p`` hop.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol, Sequence, runtime_checkable

import numpy as np


@runtime_checkable
class Stage(Protocol):
    """What every stage provides (see the module docstring)."""

    def initial_state(self) -> Any: ...

    def step(self, state: Any, x: Any) -> tuple[Any, Any]: ...

    def batch(self, x: Any) -> Any: ...

    def split(self, x: Any, bounds: Sequence[int]) -> list: ...

    def join(self, parts: Sequence[Any]) -> Any: ...


@dataclass(frozen=True)
class Chain:
    """Stages composed in order; itself a stage."""

    stages: tuple

    def __post_init__(self):
        if not self.stages:
            raise ValueError("a chain needs at least one stage")
        for stage in self.stages:
            if not isinstance(stage, Stage):
                raise TypeError(f"{type(stage).__name__} does not speak the stage protocol")

    def initial_state(self) -> tuple:
        return tuple(stage.initial_state() for stage in self.stages)

    def step(self, state: tuple, x: Any) -> tuple[tuple, Any]:
        states = []
        for stage, stage_state in zip(self.stages, state):
            stage_state, x = stage.step(stage_state, x)
            states.append(stage_state)
        return tuple(states), x

    def batch(self, x: Any) -> Any:
        for stage in self.stages:
            x = stage.batch(x)
        return x

    def split(self, x: Any, bounds: Sequence[int]) -> list:
        return self.stages[0].split(x, bounds)

    def join(self, parts: Sequence[Any]) -> Any:
        return self.stages[-1].join(parts)


def run_chunks(stage: Stage, x: Any, bounds: Sequence[int], state: Any = None
               ) -> tuple[Any, Any]:
    """Feed ``x`` to ``stage`` in chunks cut at ``bounds`` (from ``initial_state()``
    unless ``state`` is given); returns ``(final state, joined output)``."""
    if state is None:
        state = stage.initial_state()
    parts = []
    for chunk in stage.split(x, bounds):
        state, y = stage.step(state, chunk)
        parts.append(y)
    return state, stage.join(parts)


def split_arrays(arrays: tuple, bounds: Sequence[int]) -> list[tuple]:
    """Cut a tuple of equally long arrays (axis 0) at ``bounds``: the usual ``split``."""
    edges = [0, *[int(b) for b in bounds], len(arrays[0])]
    return [tuple(a[lo:hi] for a in arrays) for lo, hi in zip(edges[:-1], edges[1:])]


def join_arrays(parts: Sequence[tuple]) -> tuple:
    """Concatenate tuples of arrays along axis 0: the usual ``join``."""
    return tuple(np.concatenate(column) for column in zip(*parts))


@dataclass(frozen=True)
class Parallel:
    """Stages side by side (one per channel, say): the input is a tuple with one item
    per stage, the output the tuple of their outputs, the state the tuple of their
    states; itself a stage."""

    stages: tuple

    def __post_init__(self):
        for stage in self.stages:
            if not isinstance(stage, Stage):
                raise TypeError(f"{type(stage).__name__} does not speak the stage protocol")

    def initial_state(self) -> tuple:
        return tuple(stage.initial_state() for stage in self.stages)

    def step(self, state: tuple, x: tuple) -> tuple[tuple, tuple]:
        pairs = [stage.step(s, item) for stage, s, item in zip(self.stages, state, x)]
        return tuple(p[0] for p in pairs), tuple(p[1] for p in pairs)

    def batch(self, x: tuple) -> tuple:
        return tuple(stage.batch(item) for stage, item in zip(self.stages, x))

    def split(self, x: tuple, bounds: Sequence[int]) -> list:
        pieces = [stage.split(item, bounds) for stage, item in zip(self.stages, x)]
        return [tuple(parts) for parts in zip(*pieces)]

    def join(self, parts: Sequence[tuple]) -> tuple:
        return tuple(stage.join([p[i] for p in parts]) for i, stage in enumerate(self.stages))


def concat_fields(parts: Sequence[Any], axes: dict[str, int]) -> Any:
    """Dataclass records of one type one after the other in time: each field named in
    ``axes`` concatenated along its time axis (a field that is None in the first part
    stays None), built with the first part's type. The usual ``join`` for records."""
    def one(name: str, axis: int):
        arrays = [getattr(p, name) for p in parts]
        return None if arrays[0] is None else np.concatenate(arrays, axis=axis)
    return type(parts[0])(**{name: one(name, axis) for name, axis in axes.items()})
