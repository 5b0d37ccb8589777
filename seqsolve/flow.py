"""The transition-count model: CP-SAT chooses how often each pair follows each other, a trail builds the order.

For rule sets that can be said in terms of pair counts, run lengths and the first and last trial
of each run (max-run and min-run per condition, balanced and forbidden transitions, a gap of one,
run boundaries, the first or last trial), this model is exact: a valid ordering exists if and
only if the model (with its connectivity cuts) is feasible, and every solution becomes a valid
ordering by the construction in `build_run`. It scales to thousands of trials because it has
K*K integer variables per run instead of one literal per position and pair.
"""

from __future__ import annotations

import numpy as np
from ortools.sat.python import cp_model

from seqsolve.rules.base import StudyFacts


class Disconnected(Exception):
    """The chosen pair counts split the conditions of a run into islands (no single trail)."""

    def __init__(self, run: int, component: list[int]):
        self.run = run
        self.component = component


class FlowModel:
    """M[run][a, b] = number of times b directly follows a; start/end literals per run."""

    def __init__(self, facts: StudyFacts):
        self.facts = facts
        self.cp = cp_model.CpModel()
        k = facts.n_conditions
        self.m: list[np.ndarray] = []
        self.start: list[np.ndarray] = []
        self.end: list[np.ndarray] = []
        #: per run, per condition: [shortest, longest] allowed stretch of that condition
        self.run_bounds = np.zeros((facts.n_runs, k, 2), dtype=np.int64)
        names = facts.names
        for r in range(facts.n_runs):
            n = facts.counts[r]
            mm = np.empty((k, k), dtype=object)
            for a in range(k):
                for b in range(k):
                    ub = int(min(n[a], n[b])) if a != b else max(int(n[a]) - 1, 0)
                    mm[a, b] = self.cp.new_int_var(0, ub, f"run{r + 1}_{names[a]}_then_{names[b]}")
            st = np.array([self.cp.new_bool_var(f"run{r + 1}_starts_{names[a]}") for a in range(k)], dtype=object)
            en = np.array([self.cp.new_bool_var(f"run{r + 1}_ends_{names[a]}") for a in range(k)], dtype=object)
            # a run starts and ends with exactly one trial, of a condition it holds
            self.cp.add_exactly_one(st.tolist())
            self.cp.add_exactly_one(en.tolist())
            for a in range(k):
                if n[a] == 0:
                    self.cp.add(st[a] == 0)
                    self.cp.add(en[a] == 0)
                # Eulerian degrees: each trial but the last is left once, each but the first entered once
                self.cp.add(sum(mm[a, :].tolist()) == int(n[a]) - en[a])
                self.cp.add(sum(mm[:, a].tolist()) == int(n[a]) - st[a])
            self.run_bounds[r, :, 0] = 1
            self.run_bounds[r, :, 1] = np.maximum(n, 1)
            self.m.append(mm)
            self.start.append(st)
            self.end.append(en)

    def new_guard(self, name: str):
        return self.cp.new_bool_var(f"rule:{name}")

    def limit_stretch(self, code: int, shortest: int, longest: int, guard) -> None:
        """Every stretch of condition `code` is between shortest and longest trials long."""
        for r in range(self.facts.n_runs):
            n = int(self.facts.counts[r, code])
            if n == 0:
                continue
            loops = self.m[r][code, code]
            visits = n - loops  # each stretch is one visit of the trail plus its self-repeats
            # stretches of shortest..longest trials: (shortest-1) to (longest-1) repeats per visit
            if shortest > 1:
                self.cp.add(loops >= (shortest - 1) * visits).only_enforce_if(guard)
            if longest < n:
                self.cp.add(loops <= (longest - 1) * visits).only_enforce_if(guard)
            b = self.run_bounds[r, code]
            b[0] = max(b[0], shortest)
            b[1] = min(b[1], longest)

    def add_connectivity_cut(self, run: int, component: list[int]) -> None:
        """Some pair must join `component` to the other conditions of the run (true of any ordering)."""
        inside = set(component)
        present = [c for c in range(self.facts.n_conditions) if self.facts.counts[run, c] > 0]
        outside = [c for c in present if c not in inside]
        mm = self.m[run]
        self.cp.add(sum(mm[a, b] + mm[b, a] for a in component for b in outside) >= 1)

    def values(self, solver: cp_model.CpSolver, run: int) -> tuple[np.ndarray, int, int]:
        mm = np.array([[solver.value(v) for v in row] for row in self.m[run]], dtype=np.int64)
        s = int(np.argmax([solver.boolean_value(v) for v in self.start[run]]))
        e = int(np.argmax([solver.boolean_value(v) for v in self.end[run]]))
        return mm, s, e

    def check_connected(self, run: int, mm: np.ndarray) -> np.ndarray:
        """Raise Disconnected if the pairs between different conditions leave an island; else return them."""
        off = mm.copy()
        np.fill_diagonal(off, 0)
        present = [c for c in range(mm.shape[0]) if self.facts.counts[run, c] > 0]
        _raise_if_disconnected(run, off, present)
        return off

    def build_run(self, run: int, mm: np.ndarray, first: int, last: int, rng: np.random.Generator) -> np.ndarray:
        """An ordering with exactly the pair counts mm, from first to last, stretches within bounds.

        Randomised Hierholzer trail over the pairs between different conditions, then each
        condition's self-repeats are dealt out over its visits within the stretch bounds.
        """
        k = mm.shape[0]
        present = [c for c in range(k) if self.facts.counts[run, c] > 0]
        off = self.check_connected(run, mm)
        succ = []
        for a in range(k):
            nxt = np.repeat(np.arange(k), off[a])
            rng.shuffle(nxt)
            succ.append(nxt.tolist())
        ptr = [0] * k
        stack, trail = [first], []
        while stack:
            v = stack[-1]
            if ptr[v] < len(succ[v]):
                stack.append(succ[v][ptr[v]])
                ptr[v] += 1
            else:
                trail.append(stack.pop())
        trail.reverse()
        if len(trail) != int(off.sum()) + 1 or trail[-1] != last:
            raise AssertionError("pair counts violate the degree equalities")  # model guarantees this
        trail = np.asarray(trail, dtype=np.int64)
        stretch = np.ones(trail.size, dtype=np.int64)
        for c in present:
            at = np.flatnonzero(trail == c)
            shortest, longest = (int(v) for v in self.run_bounds[run, c])
            stretch[at] = _deal(int(mm[c, c]), at.size, shortest - 1, longest - 1, rng) + 1
        return np.repeat(trail, stretch)


def _raise_if_disconnected(run: int, off: np.ndarray, present: list[int]) -> None:
    """Raise Disconnected with the component of the first present condition if it is not all."""
    if not present:
        return
    seen, todo = {present[0]}, [present[0]]
    both = (off + off.T) > 0
    while todo:
        a = todo.pop()
        for b in np.flatnonzero(both[a]):
            if int(b) not in seen:
                seen.add(int(b))
                todo.append(int(b))
    if len(seen) < len(present):
        raise Disconnected(run, sorted(seen))


def _deal(total: int, n_visits: int, low: int, high: int, rng: np.random.Generator) -> np.ndarray:
    """Split total repeats over n_visits, each between low and high, uniformly over slots."""
    out = np.full(n_visits, low, dtype=np.int64)
    rest = total - low * n_visits
    room = min(high - low, rest)
    if rest < 0 or rest > (high - low) * n_visits:
        raise AssertionError("stretch bounds violated by the pair counts")  # model guarantees this
    if rest and room:
        slots = rng.choice(n_visits * room, size=rest, replace=False) // room
        out += np.bincount(slots, minlength=n_visits)
    return out
