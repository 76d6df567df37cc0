"""Test helpers for sessions: random valid programs and a plain numpy evaluator of them independent of the backends.

A random program is a *recipe*: both parties' input counts, then steps that each apply one gate kind (AND, XOR,
NOT) lane-wise to bits picked by index from everything made so far (the public constants 0 and 1 first, then the
garbler's inputs, the evaluator's inputs, then each step's results), and finally each party's outputs picked the
same way. ``program_of`` turns it into a ``Program`` that runs the steps with the builder — one builder call per
step, so the steps are lane-parallel like a statistic's word operations, and constants fold as they do there.
``reference_outputs`` evaluates the same recipe with numpy alone, step by step, as a deliberately naive second
implementation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from hypothesis import strategies as st
from jointstat.circuit.bits import concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program

AND, XOR, NOT = "and", "xor", "not"


@dataclass(frozen=True)
class Step:
    kind: str
    a: np.ndarray  # indices into the bits made so far
    b: np.ndarray | None  # None for NOT


@dataclass(frozen=True)
class Recipe:
    inputs: dict[Party, int]
    steps: tuple[Step, ...]
    outputs: dict[Party, np.ndarray]


@st.composite
def random_recipes(draw: st.DrawFn, max_steps: int = 40, max_width: int = 8) -> Recipe:
    """A random valid recipe: inputs of both parties, steps reading earlier bits, outputs for both parties."""
    inputs = {Party.GARBLER: draw(st.integers(0, 8)), Party.EVALUATOR: draw(st.integers(0, 8))}
    n_steps = draw(st.integers(0, max_steps))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    made = 2 + inputs[Party.GARBLER] + inputs[Party.EVALUATOR]
    steps = []
    for _ in range(n_steps):
        kind = (AND, AND, XOR, NOT)[int(rng.integers(4))]
        width = int(rng.integers(1, max_width + 1))
        a = rng.integers(0, made, width)
        b = None if kind == NOT else rng.integers(0, made, width)
        steps.append(Step(kind, a, b))
        made += width
    outputs = {p: rng.integers(0, made, draw(st.integers(0, 12))) for p in Party}
    return Recipe(inputs, tuple(steps), outputs)


def program_of(recipe: Recipe) -> Program:
    def run(bld: Builder) -> None:
        parts = [bld.constant(np.array([0, 1], dtype=np.uint8))]
        parts += [bld.input(p, recipe.inputs[p]) for p in Party if recipe.inputs[p]]
        made = concat(parts)
        for step in recipe.steps:
            a = made[step.a]
            if step.kind == NOT:
                out = bld.not_(a)
            else:
                assert step.b is not None
                out = (bld.and_ if step.kind == AND else bld.xor)(a, made[step.b])
            made = concat([made, out])
        for p in Party:
            if recipe.outputs[p].size:
                bld.output(p, made[recipe.outputs[p]])

    return Program.of(run, name="random program")


def reference_outputs(recipe: Recipe, inputs: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
    """The recipe evaluated with numpy alone, step by step (independent of the builder and the backends)."""
    made = np.concatenate([np.array([0, 1], dtype=np.uint8), inputs[Party.GARBLER], inputs[Party.EVALUATOR]])
    for step in recipe.steps:
        if step.kind == AND:
            out = made[step.a] & made[step.b]
        elif step.kind == XOR:
            out = made[step.a] ^ made[step.b]
        else:
            out = 1 - made[step.a]
        made = np.concatenate([made, out.astype(np.uint8)])
    return {p: made[recipe.outputs[p]] for p in Party}


def random_bits(rng: np.random.Generator, n: int) -> np.ndarray:
    return rng.integers(0, 2, n, dtype=np.uint8)


def random_inputs(program: Program, seed: int) -> dict[Party, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {p: random_bits(rng, program.n_inputs(p)) for p in Party}
