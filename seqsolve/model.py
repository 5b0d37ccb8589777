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
        self._triples: dict[tuple[int, bool], np.ndarray] = {}
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

    def triples(self, run: int, cyclic: bool = False) -> np.ndarray:
        """Literals z[p, a, b, c] = 'a at p, b at p+1, c at p+2', shape (n_triples, K, K, K), made once.

        Channelled linearly on the pair literals (triple flow): summed over c they are the pair
        (p, p+1), summed over a the pair (p+1, p+2); with one pair true at each place, exactly the
        triple standing there is true. With cyclic (runs of 3 trials or more) two more rows hold
        the triples that wrap, (n-2, n-1, 0) and (n-1, 0, 1), each an AND of its three one-hot literals.
        """
        key = (run, cyclic)
        if key not in self._triples:
            xs, ys = self.x[run], self.pairs(run)
            n, k = xs.shape
            rows = [self._triple_row(run, p, ys) for p in range(max(n - 2, 0))]
            if cyclic and n >= 3:
                rows += [self._and3(run, xs[n - 2], xs[n - 1], xs[0]), self._and3(run, xs[n - 1], xs[0], xs[1])]
            self._triples[key] = np.array(rows, dtype=object).reshape(len(rows), k, k, k)
        return self._triples[key]

    def _triple_row(self, run: int, p: int, ys: np.ndarray) -> np.ndarray:
        k = self.facts.n_conditions
        given = self.given[run]
        zs = np.empty((k, k, k), dtype=object)
        if (given[p : p + 3] >= 0).all():
            # all three trials fixed: constants
            zs[...] = self.false
            zs[given[p], given[p + 1], given[p + 2]] = self.true
            return zs
        names = self.facts.names
        for a in range(k):
            for b in range(k):
                for c in range(k):
                    zs[a, b, c] = self.cp.new_bool_var(
                        f"run{run + 1}_pos{p + 1}_{names[a]}_then_{names[b]}_then_{names[c]}"
                    )
        for a in range(k):
            for b in range(k):
                # the triples starting with pair (a, b) at p, and those ending with it at p+1
                self.cp.add(sum(zs[a, b, :].tolist()) == ys[p, a, b])
                self.cp.add(sum(zs[:, a, b].tolist()) == ys[p + 1, a, b])
        return zs

    def _and3(self, run: int, first: np.ndarray, second: np.ndarray, third: np.ndarray) -> np.ndarray:
        """Literals w[a, b, c] = first[a] AND second[b] AND third[c] (the wrap triples)."""
        k = self.facts.n_conditions
        w = np.empty((k, k, k), dtype=object)
        for a in range(k):
            for b in range(k):
                for c in range(k):
                    w[a, b, c] = self.cp.new_bool_var(f"run{run + 1}_wrap_{a}_{b}_{c}")
                    self.cp.add_bool_or([~first[a], ~second[b], ~third[c], w[a, b, c]])
                    for lit in (first[a], second[b], third[c]):
                        self.cp.add_implication(w[a, b, c], lit)
        return w

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
