"""The per-position CP-SAT model of a participant's orderings: one-hot literals, counts, guards."""

from __future__ import annotations

import numpy as np
from ortools.sat.python import cp_model

from seqsolve.rules.base import StudyFacts, Target


class OrderingModel:
    """Boolean x[run][position, condition] with exactly one condition per position.

    Each run holds exactly the counts of the study. Rules add constraints through the helpers
    here, each enforced only when its guard literal holds, so an impossible rule set can be
    explained from an assumption core.
    """

    def __init__(self, facts: StudyFacts, fixed: list[np.ndarray] | None = None):
        """fixed: per run, the condition code of each position, or -1 where the solver chooses.

        Fixed positions get the shared constants TRUE/FALSE instead of variables, so a model of a
        small window inside a long design stays small after presolve.
        """
        self.facts = facts
        self.cp = cp_model.CpModel()
        self.true = self.cp.new_constant(1)
        self.false = self.cp.new_constant(0)
        self.x: list[np.ndarray] = []
        self.given: list[np.ndarray] = []
        self._pairs: dict[int, np.ndarray] = {}
        self._groups: dict[tuple[int, tuple[int, ...]], np.ndarray] = {}
        for r in range(facts.n_runs):
            n = facts.run_length(r)
            given = np.asarray(fixed[r]) if fixed is not None else np.full(n, -1)
            self.given.append(given)
            xs = np.empty((n, facts.n_conditions), dtype=object)
            for p in range(n):
                if given[p] >= 0:
                    xs[p, :] = self.false
                    xs[p, int(given[p])] = self.true
                    continue
                for c, name in enumerate(facts.names):
                    xs[p, c] = self.cp.new_bool_var(f"run{r + 1}_pos{p + 1}_is_{name}")
                # one condition per trial
                self.cp.add_exactly_one(xs[p].tolist())
            for c in range(facts.n_conditions):
                # each run holds its declared number of trials of each condition
                self.cp.add(sum(xs[:, c].tolist()) == int(facts.counts[r, c]))
            self.x.append(xs)

    def active(self, run: int) -> bool:
        """Does the run have a position left to the solver? Rules skip runs that are all fixed:
        those are judged by the checker, so a window model never inherits their violations."""
        return bool((self.given[run] < 0).any())

    def runs(self) -> list[int]:
        return [r for r in range(self.facts.n_runs) if self.active(r)]

    def new_guard(self, name: str):
        return self.cp.new_bool_var(f"rule:{name}")

    def length(self, run: int) -> int:
        return self.x[run].shape[0]

    def member(self, run: int, target: Target) -> np.ndarray:
        """Literals 'position p holds a condition of target', shape (n_positions,)."""
        if len(target.codes) == 1:
            return self.x[run][:, target.codes[0]]
        key = (run, target.codes)
        if key not in self._groups:
            xs = self.x[run]
            lits = np.empty(xs.shape[0], dtype=object)
            for p in range(xs.shape[0]):
                if self.given[run][p] >= 0:
                    lits[p] = self.true if self.given[run][p] in target.codes else self.false
                    continue
                lits[p] = self.cp.new_bool_var(f"run{run + 1}_pos{p + 1}_in_{target.label}")
                # the group literal is the sum of its members' one-hot literals
                self.cp.add(lits[p] == sum(xs[p, list(target.codes)].tolist()))
            self._groups[key] = lits
        return self._groups[key]

    def pairs(self, run: int) -> np.ndarray:
        """Literals y[p, a, b] = 'a at p and b at p+1', shape (n-1, K, K), made once per run.

        Channelled linearly (pair flow): the pairs leaving p sum to x[p], those entering p+1 to x[p+1].
        """
        if run not in self._pairs:
            xs = self.x[run]
            n, k = xs.shape
            ys = np.empty((max(n - 1, 0), k, k), dtype=object)
            names = self.facts.names
            given = self.given[run]
            for p in range(n - 1):
                if given[p] >= 0 and given[p + 1] >= 0:
                    # both trials fixed: the pair literals are constants too
                    ys[p] = self.false
                    ys[p, given[p], given[p + 1]] = self.true
                    continue
                for a in range(k):
                    for b in range(k):
                        ys[p, a, b] = self.cp.new_bool_var(f"run{run + 1}_pos{p + 1}_{names[a]}_then_{names[b]}")
                for a in range(k):
                    self.cp.add(sum(ys[p, a, :].tolist()) == xs[p, a])
                    self.cp.add(sum(ys[p, :, a].tolist()) == xs[p + 1, a])
            self._pairs[run] = ys
        return self._pairs[run]

    def fix(self, runs: list[np.ndarray], guard=None) -> None:
        """Fix an ordering into the model (used to test the checks against the encodings)."""
        for r, seq in enumerate(runs):
            for p, c in enumerate(seq):
                ct = self.cp.add(self.x[r][p, int(c)] == 1)
                if guard is not None:
                    ct.only_enforce_if(guard)

    def decode(self, solver: cp_model.CpSolver) -> list[np.ndarray]:
        out = []
        for xs in self.x:
            vals = np.array([[solver.boolean_value(v) for v in row] for row in xs], dtype=bool)
            out.append(vals.argmax(axis=1).astype(np.int64))
        return out
