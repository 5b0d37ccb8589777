"""Efficiency-steered search: CP-SAT keeps every candidate valid, the scorer says which is better.

One participant's search (`Search.run`):

1. Start: a pool of diverse valid designs sampled from CP-SAT (random objectives and seeds), and
   shuffles that pass every rule; the best-scoring one becomes the current design.
2. Each step is one of
   - swap: score every same-run swap of differently labelled trials at once (exact, fast
     evaluator; a random sample of them when estimation is weighted) and take the best-gaining
     swap that passes every rule check;
   - travel: once no swap gains, record-to-record travel (Dueck 1993): a random valid swap whose
     score stays within 0.1 % of the best, never undoing a recent one;
   - neighbourhood: free some positions of one run (a window, a scattered subset, or the trials
     of two conditions within a stretch), keep everything else fixed, and let CP-SAT choose the
     freed labels to maximise sum gain[p, c] * x[p, c], where gain[p, c] is the exact change of
     the score when position p alone takes condition c (the local sensitivity). The answer is
     valid by construction; it is re-scored exactly and kept only if better;
   - gaps (jittered timing only): swap two gaps within a run and re-score exactly; the declared
     gap distribution and the run length stay as they were;
   - enumerate: a small window's valid completions listed by CP-SAT and all scored exactly.
   Swap steps run while some valid swap gains; then travel takes most steps and the two CP-SAT
   neighbourhood kinds the rest, chosen by their success so far. Neighbourhoods grow after
   failures and shrink when CP-SAT uses its whole work limit. After `kick` failed neighbourhoods
   in a row, the current design moves to a random valid neighbour of the best one (a
   neighbourhood solved with a random objective) or, every third time, to an unused start; the
   best design is kept apart.
3. Stop: the iteration budget, `stall` steps without gain, the wall-clock budget, or Ctrl-C.

Everything depends on the seed and the iteration count only (one CP-SAT worker, deterministic
work limits); a wall-clock budget that stops the search early is recorded in the result.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from ortools.sat.python import cp_model

from seqsolve.model import OrderingModel
from seqsolve.objective import Figures, Scorer
from seqsolve.rules.participants_differ import ParticipantsDiffer
from seqsolve.solve import SolveOptions, _params, check_runs, choose_method, sample_orderings
from seqsolve.spec import Study

#: score gains below this are treated as no gain (scores are fractions near 1)
TOL = 1e-9


@dataclass
class SearchOptions:
    """How one participant's search runs. None: take the spec's [objective] value."""

    iterations: int | None = None
    stall: int | None = None
    budget: float | None = None  # wall-clock seconds per participant, a cap on top of iterations
    pool: int = 32  # diverse valid starts sampled from CP-SAT (fewer under the per-position model)
    swap_tries: int = 32  # best-gaining swaps tried against the rule checks per swap step
    swap_sample: int = 1500  # swaps scored per step when estimation (the slower part) is weighted
    window: int = 10  # first neighbourhood size (positions)
    window_work: float = 0.1  # CP-SAT deterministic work per neighbourhood
    listing: int = 400  # completions of a small window scored exactly per enumerate step
    kick: int = 8  # failed neighbourhoods in a row before moving away from the best design
    travel: float = 0.001  # record-to-record travel: moves may fall this fraction below the best score
    travel_share: float = 0.85  # share of steps that travel once no swap gains
    solve: SolveOptions = field(default_factory=SolveOptions)
    workers: int = 1  # processes searching participants side by side (generate); same designs for any count


@dataclass
class Progress:
    """What the progress display shows after each step."""

    participant: str
    iteration: int
    iterations: int
    elapsed: float
    best: Figures | None
    step: str


@dataclass
class SearchResult:
    runs: list[np.ndarray]
    gaps: list[np.ndarray] | None
    figures: Figures
    iterations: int
    stopped: str  # "iterations", "stall", "budget", "interrupted" or "no search"
    history: list[tuple[int, float, float]]  # (iteration, seconds, best score) at every improvement
    seconds: float
    accepted: dict[str, int] = field(default_factory=dict)  # improving steps by kind


class Judge:
    """The rule checks (the independent judge) and the participants already designed."""

    def __init__(self, study: Study, earlier: list[list[np.ndarray]]):
        self.study, self.earlier = study, earlier
        self.differ = [r for r in study.rules if isinstance(r, ParticipantsDiffer)]
        self.taken = {_key(e) for e in earlier}

    def ok(self, runs: list[np.ndarray]) -> bool:
        if check_runs(self.study, self.study.rules, runs):
            return False
        if any(rule.clashes(runs, self.earlier) for rule in self.differ):
            return False
        return _key(runs) not in self.taken  # every participant gets a design of their own


def shuffled(study: Study, rng: np.random.Generator) -> list[np.ndarray]:
    """Each run's trials in a random order (the counts of the spec; rules not looked at)."""
    return [rng.permutation(np.repeat(np.arange(study.facts.n_conditions), n)) for n in study.facts.counts]


def _key(runs: list[np.ndarray]) -> tuple:
    return tuple(tuple(int(c) for c in r) for r in runs)


class WindowSolver:
    """CP-SAT over some freed positions of one run, everything else constant."""

    def __init__(self, study: Study, earlier: list[list[np.ndarray]], work: float, options: SolveOptions):
        self.study, self.earlier, self.work, self.options = study, earlier, work, options

    def solve(
        self,
        runs: list[np.ndarray],
        run: int,
        positions: np.ndarray,
        weights: np.ndarray | None,
        seed: int,
        listing: int = 0,
    ) -> tuple[list[list[np.ndarray]], bool]:
        """Designs for the freed positions, improving on sum weights[i, c] * [position i holds c].

        weights: integers, shape (len(positions), n_conditions); None: list valid completions
        instead, up to `listing` of them (proved complete: the bool). Returns every solution CP-SAT met
        on its way (the last is the best for the linear objective; all are valid, and the caller
        re-scores them exactly) and whether the last was proved optimal. The current labels are a
        valid answer, given as a hint; an empty list when nothing was found within the work limit.
        """
        fixed = [r.copy() for r in runs]
        fixed[run][positions] = -1
        m = OrderingModel(self.study.facts, fixed)
        guards = [m.new_guard(str(i)) for i in range(len(self.study.rules))]
        for rule, g in zip(self.study.rules, guards):
            rule.encode(m, g)
            if rule.across_participants:
                rule.encode_against(m, g, self.earlier)
        xs = m.x[run]
        lits, coefs = [], []
        for i, p in enumerate(positions):
            for c in range(xs.shape[1]):
                if weights is not None and weights[i, c]:
                    lits.append(xs[p, c])
                    coefs.append(int(weights[i, c]))
            for c in range(xs.shape[1]):
                m.cp.add_hint(xs[p, c], bool(c == runs[run][p]))
        if weights is None:  # every completion (up to `enumerate`), for exact scoring by the caller
            seen = _Collector(xs[positions], limit=listing)
        else:
            if lits:
                m.cp.maximize(cp_model.LinearExpr.weighted_sum(lits, coefs))
            seen = _Collector(xs[positions])
        m.cp.clear_assumptions()
        m.cp.add_assumptions(guards)
        solver = _params(seed, self.options, work=self.work)
        if weights is None:
            solver.parameters.enumerate_all_solutions = True
        status = solver.solve(m.cp, seen)
        if status not in (cp_model.OPTIMAL, cp_model.FEASIBLE):
            return [], False
        out = []
        for labels in seen.labels:
            design = [r.copy() for r in runs]
            design[run][positions] = labels
            out.append(design)
        return out, status == cp_model.OPTIMAL


class _Collector(cp_model.CpSolverSolutionCallback):
    """The freed positions' labels in every solution CP-SAT reports."""

    def __init__(self, lits: np.ndarray, limit: int = 0):
        super().__init__()
        self.lits, self.limit = lits, limit
        self.labels: list[np.ndarray] = []

    def on_solution_callback(self) -> None:
        vals = np.array([[self.boolean_value(v) for v in row] for row in self.lits], dtype=bool)
        self.labels.append(vals.argmax(axis=1).astype(np.int64))
        if self.limit and len(self.labels) >= self.limit:
            self.stop_search()


class Search:
    """One participant's search; `run` returns the best design found (see module docstring)."""

    def __init__(
        self,
        study: Study,
        scorer: Scorer,
        label: str,
        seed: int,
        earlier: list[list[np.ndarray]],
        options: SearchOptions,
        progress: Callable[[Progress], None] | None = None,
    ):
        self.study, self.scorer, self.label, self.seed = study, scorer, label, seed
        self.options, self.progress = options, progress
        obj = study.spec.objective
        self.iterations = obj.iterations if options.iterations is None else options.iterations
        self.stall = obj.stall if options.stall is None else options.stall
        self.rng = np.random.default_rng([seed, 7])
        self.judge = Judge(study, earlier)
        self.windows = WindowSolver(study, earlier, options.window_work, options.solve)
        self.lengths = scorer.lengths
        self.offsets = np.concatenate([[0], np.cumsum(self.lengths)])
        self.window = options.window
        self.small = options.window
        self.accepted: dict[str, int] = {}
        self.tries = {"neighbourhood": [1, 2], "enumerate": [1, 2]}  # [gains + 1, tries + 2] per kind
        self.jitter = scorer.gaps is not None and any(len(np.unique(np.round(g, 6))) > 1 for g in scorer.gaps)
        # same-run pairs of trials (global indices)
        blocks = [np.column_stack(np.triu_indices(n, 1)) + off for n, off in zip(self.lengths, self.offsets) if n > 1]
        self.pairs = np.concatenate(blocks) if blocks else np.zeros((0, 2), dtype=np.int64)

    # -- the loop -----------------------------------------------------------------------------

    def run(self, starts: list[list[np.ndarray]] | None = None) -> SearchResult:
        t0 = time.perf_counter()
        if starts is None:
            starts = self.starts()
        scores = self.scorer.score_many(starts)
        order = np.argsort(-scores, kind="stable")
        first = int(order[0])
        self.current, self.current_score = starts[first], float(scores[first])
        self.unused = [starts[i] for i in order[1:]]
        self.kicks = 0
        self.tabu: list[tuple[int, int]] = []
        self.best, self.best_score, self.best_scorer = self.current, self.current_score, self.scorer
        history = [(0, time.perf_counter() - t0, self.best_score)]
        it, since, failures, stopped = 0, 0, 0, "iterations"
        swaps_left = True
        try:
            while it < self.iterations:
                if since >= self.stall:
                    stopped = "stall"
                    break
                if self.options.budget is not None and time.perf_counter() - t0 > self.options.budget:
                    stopped = "budget"
                    break
                it += 1
                if swaps_left:
                    step, gained = "swap", self._swap_step()
                    swaps_left = gained
                elif self.jitter and it % 4 == 0:
                    step, gained = "gaps", self._gap_step()
                elif self.rng.random() < self.options.travel_share:
                    step, gained = "travel", self._travel_step()
                else:
                    step = self._pick()
                    gained = self._window_step() if step == "neighbourhood" else self._enumerate_step()
                    self.tries[step][0] += gained
                    self.tries[step][1] += 1
                    failures = 0 if gained else failures + 1
                    swaps_left = gained  # a changed design may have new gaining swaps
                    if failures >= self.options.kick:
                        self._kick()
                        failures, swaps_left = 0, True
                if self.current_score > self.best_score + TOL:
                    self.best, self.best_score, self.best_scorer = self.current, self.current_score, self.scorer
                    history.append((it, time.perf_counter() - t0, self.best_score))
                    self.accepted[step] = self.accepted.get(step, 0) + 1
                    since = 0
                else:
                    since += 1
                if self.progress:
                    self.progress(
                        Progress(self.label, it, self.iterations, time.perf_counter() - t0, self._best_figures(), step)
                    )
        except KeyboardInterrupt:
            stopped = "interrupted"
        if self.iterations == 0:
            stopped = "no search"
        return SearchResult(
            runs=self.best,
            gaps=self.best_scorer.gaps,
            figures=self.best_scorer.figures(self.best),
            iterations=it,
            stopped=stopped,
            history=history,
            seconds=time.perf_counter() - t0,
            accepted=dict(self.accepted),
        )

    def _pick(self) -> str:
        """Neighbourhood kind, in proportion to each kind's rate of gain so far."""
        rates = np.array([g / t for g, t in self.tries.values()])
        return list(self.tries)[int(self.rng.choice(len(rates), p=rates / rates.sum()))]

    def _best_figures(self) -> Figures | None:
        if getattr(self, "_shown", None) is not None and self._shown[0] == self.best_score:
            return self._shown[1]
        self._shown = (self.best_score, self.best_scorer.figures(self.best))
        return self._shown[1]

    def starts(self) -> list[list[np.ndarray]]:
        return self.sample_starts(self.study, self.seed, self.judge.earlier, self.options)

    @staticmethod
    def sample_starts(
        study: Study, seed: int, earlier: list[list[np.ndarray]], options: SearchOptions
    ) -> list[list[np.ndarray]]:
        """Diverse valid starting designs: samples from CP-SAT (two only when the per-position model
        is needed), and plain shuffles that happen to pass every rule (common under loose rules;
        CP-SAT's samples lean toward extreme transition counts, shuffles do not)."""
        n = options.pool if choose_method(study, options.solve) == "counts" else 2
        found = sample_orderings(study, seed, n, earlier, options.solve)
        judge = Judge(study, earlier)
        rng = np.random.default_rng([seed, 23])
        for _ in range(4 * options.pool):
            runs = shuffled(study, rng)
            if judge.ok(runs):
                found.append(runs)
        return [d for d in found if _key(d) not in judge.taken] or found

    def variation(self, runs: list[np.ndarray]) -> list[np.ndarray] | None:
        """A random valid design near runs: a quarter of each run re-solved with a random objective,
        different from every earlier participant's. None if none is found."""
        current = [r.copy() for r in runs]
        k = self.study.facts.n_conditions
        for run, n in enumerate(self.lengths):
            w = int(min(n, max(8, n // 4)))
            start = int(self.rng.integers(0, n - w + 1))
            weights = self.rng.integers(-100, 101, size=(w, k))
            found, _ = self.windows.solve(
                current, run, np.arange(start, start + w), weights, int(self.rng.integers(2**31 - 1))
            )
            if found:
                current = found[-1]
        return current if self.judge.ok(current) else None

    # -- steps ----------------------------------------------------------------------------------

    def _accept(self, runs: list[np.ndarray], scorer: Scorer | None = None) -> bool:
        """Make runs current if valid and strictly better (exact score)."""
        scorer = scorer or self.scorer
        if not self.judge.ok(runs):
            return False
        score = scorer.score(runs)
        if score > self.current_score + TOL:
            self.current, self.current_score, self.scorer = runs, score, scorer
            return True
        return False

    def _swap_pairs(self, codes: np.ndarray, limit: int | None) -> np.ndarray:
        """Same-run pairs of differently labelled trials, a random sample of `limit` if more."""
        pairs = self.pairs[codes[self.pairs[:, 0]] != codes[self.pairs[:, 1]]]
        if limit is not None and len(pairs) > limit:
            pairs = pairs[np.sort(self.rng.choice(len(pairs), limit, replace=False))]
        return pairs

    def _swap_step(self) -> bool:
        codes = np.concatenate(self.current)
        pairs = self._swap_pairs(codes, self.options.swap_sample if self.scorer.use_est else None)
        if len(pairs) == 0:
            return False
        gains = self.scorer.swap_gains(self.current, pairs) - self.current_score
        order = np.argsort(-gains, kind="stable")
        for idx in order[: self.options.swap_tries]:
            if gains[idx] <= TOL:
                break
            i, j = pairs[idx]
            cand = codes.copy()
            cand[i], cand[j] = cand[j], cand[i]
            if self._accept(self.scorer.split(cand)):
                return True
        return False

    def _travel_step(self) -> bool:
        """Record-to-record travel (Dueck 1993, J. Comput. Phys. 104:86-92): a random valid swap
        whose score stays within `travel` of the best score (worse than the current one allowed),
        never undoing one of the last few moves. True if the design moved."""
        codes = np.concatenate(self.current)
        pairs = self._swap_pairs(codes, self.options.swap_sample)
        if len(pairs) == 0:
            return False
        scores = self.scorer.swap_gains(self.current, pairs)
        floor = self.best_score - self.options.travel * abs(self.best_score)
        eligible = np.flatnonzero(scores >= floor)
        self.rng.shuffle(eligible)
        for idx in eligible[: self.options.swap_tries]:
            i, j = (int(x) for x in pairs[idx])
            if (i, j) in self.tabu:
                continue
            cand = codes.copy()
            cand[i], cand[j] = cand[j], cand[i]
            runs = self.scorer.split(cand)
            if self.judge.ok(runs):
                self.current, self.current_score = runs, float(self.scorer.score(runs))
                self.tabu = (self.tabu + [(i, j)])[-8:]
                return True
        return False

    def _neighbourhood(self, size: int) -> tuple[int, np.ndarray]:
        """A run and some of its positions to free (about `size` of them)."""
        run = int(self.rng.choice(len(self.lengths), p=np.asarray(self.lengths) / sum(self.lengths)))
        n = self.lengths[run]
        w = int(min(size, n))
        kind = self.rng.integers(3)
        if kind == 0 or w >= n:  # a window
            start = int(self.rng.integers(0, n - w + 1))
            return run, np.arange(start, start + w)
        if kind == 1:  # a scattered subset
            return run, np.sort(self.rng.choice(n, w, replace=False))
        # the trials of two conditions within a stretch of three windows
        span = min(n, 3 * w)
        start = int(self.rng.integers(0, n - span + 1))
        seq = self.current[run][start : start + span]
        present = np.unique(seq)
        if len(present) < 2:
            return run, np.arange(start, start + w)
        a, b = self.rng.choice(present, 2, replace=False)
        return run, start + np.flatnonzero((seq == a) | (seq == b))

    def _enumerate_step(self) -> bool:
        """A small window's valid completions, all scored exactly; the best one if it gains."""
        run, positions = self._neighbourhood(self.small)
        seed = int(self.rng.integers(2**31 - 1))
        found, complete = self.windows.solve(self.current, run, positions, None, seed, listing=self.options.listing)
        if self._accept_best(found):
            return True
        n = max(self.lengths)
        # all completions seen and none better: look wider next time; cut short: narrower
        self.small = min(self.small + 1, n) if complete else max(4, self.small - 1)
        return False

    def _window_step(self) -> bool:
        run, positions = self._neighbourhood(self.window)
        gains = self.scorer.change_gains(self.current, self.offsets[run] + positions)
        top = np.abs(gains).max()
        weights = np.rint(gains / top * 10_000).astype(np.int64) if top > 0 else np.zeros(gains.shape, np.int64)
        seed = int(self.rng.integers(2**31 - 1))
        found, optimal = self.windows.solve(self.current, run, positions, weights, seed)
        if self._accept_best(found):
            return True
        # adapt: larger after a failure the solver settled, smaller when it ran out of work
        n = max(self.lengths)
        self.window = min(self.window + 2, n) if optimal else max(4, self.window - 2)
        return False

    def _accept_best(self, designs: list[list[np.ndarray]]) -> bool:
        """Score candidates exactly in one batch; accept the best valid one if it gains."""
        if not designs:
            return False
        scores = self.scorer.score_many(designs)
        for i in np.argsort(-scores, kind="stable"):
            if scores[i] <= self.current_score + TOL:
                return False
            if self.judge.ok(designs[i]):
                self.current, self.current_score = designs[i], float(scores[i])
                return True
        return False

    def _gap_step(self) -> bool:
        """Swap two gaps of one run (8 candidates), each scored exactly on its own timing."""
        gaps = self.scorer.gaps
        best = None
        for _ in range(8):
            r = int(self.rng.integers(len(gaps)))
            if len(gaps[r]) < 2:
                continue
            i, j = self.rng.choice(len(gaps[r]), 2, replace=False)
            if abs(gaps[r][i] - gaps[r][j]) < 1e-9:
                continue
            new = [g.copy() for g in gaps]
            new[r][i], new[r][j] = new[r][j], new[r][i]
            scorer = self.scorer.with_gaps(new)
            score = scorer.score(self.current)
            if score > self.current_score + TOL and (best is None or score > best[0]):
                best = (score, scorer)
        if best is None:
            return False
        self.current_score, self.scorer = best
        return True

    def _kick(self) -> None:
        """Leave a local optimum: every third time restart from the next unused starting design
        (best first), otherwise move to a random valid neighbour of the best one (score may drop)."""
        self.kicks += 1
        if self.kicks % 3 == 0 and self.unused:
            self.current = self.unused.pop(0)
            self.current_score = self.scorer.score(self.current)
            self.window = self.options.window
            return
        run = int(self.rng.integers(len(self.lengths)))
        n = self.lengths[run]
        w = int(min(n, max(2 * self.window, 8)))
        start = int(self.rng.integers(0, n - w + 1))
        k = self.study.facts.n_conditions
        weights = self.rng.integers(-100, 101, size=(w, k))
        found, _ = self.windows.solve(
            self.best, run, np.arange(start, start + w), weights, int(self.rng.integers(2**31 - 1))
        )
        if found and self.judge.ok(found[-1]):
            self.current, self.scorer = found[-1], self.best_scorer
            self.current_score = self.scorer.score(found[-1])
        self.window = self.options.window


__all__ = ["Judge", "Progress", "Search", "SearchOptions", "SearchResult", "WindowSolver", "shuffled"]
