"""The transition-count model's own pieces: islands, cuts and the trail construction."""

from __future__ import annotations

import numpy as np
import pytest
from ortools.sat.python import cp_model

from seqsolve.flow import Disconnected, FlowModel
from seqsolve.rules import MaxRun, MinRun
from seqsolve.rules.transitions import pair_counts
from tests.conftest import make_facts


def test_islands_are_found_and_cut_off():
    facts = make_facts([3, 3, 3, 3])
    # a and b only follow each other (a first, b last), c and d form a closed loop: every degree
    # equality holds, yet no single ordering has these pair counts
    islands = np.array([[0, 3, 0, 0], [2, 0, 0, 0], [0, 0, 1, 2], [0, 0, 2, 1]])

    def fixed_model():
        f = FlowModel(facts)
        for a in range(4):
            for b in range(4):
                f.cp.add(f.m[0][a, b] == int(islands[a, b]))
        return f

    f = fixed_model()
    assert cp_model.CpSolver().solve(f.cp) in (cp_model.OPTIMAL, cp_model.FEASIBLE)  # the counts alone allow it
    with pytest.raises(Disconnected) as info:
        f.build_run(0, islands, 0, 1, np.random.default_rng(0))
    assert info.value.component == [0, 1]
    f.add_connectivity_cut(0, info.value.component)
    assert cp_model.CpSolver().solve(f.cp) == cp_model.INFEASIBLE


@pytest.mark.parametrize("seed", range(5))
def test_trail_has_exactly_the_chosen_pair_counts_and_stretch_bounds(seed):
    facts = make_facts([6, 6, 6])
    f = FlowModel(facts)
    guard = f.new_guard("r")
    f.cp.add(guard == 1)
    MaxRun(kind="max-run", length=3).encode_flow(f, guard)
    MinRun(kind="min-run", length=2).encode_flow(f, guard)
    solver = cp_model.CpSolver()
    solver.parameters.random_seed = seed
    assert solver.solve(f.cp) in (cp_model.OPTIMAL, cp_model.FEASIBLE)
    mm, first, last = f.values(solver, 0)
    seq = f.build_run(0, mm, first, last, np.random.default_rng(seed))
    assert (pair_counts(seq, 3) == mm).all()
    assert seq[0] == first and seq[-1] == last
    stretches = np.diff(np.flatnonzero(np.diff(np.concatenate([[-1], seq, [-1]])) != 0))
    assert stretches.min() >= 2 and stretches.max() <= 3
