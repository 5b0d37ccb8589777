"""Other ways to look for good orderings, kept to measure the search against (compare, benchmarks).

- shuffle_and_reject: the common lab practice. Shuffle each run's trials, throw the shuffle away
  if any rule fails, keep the best-scoring survivor.
- genetic: a genetic algorithm in the usual form (Holland 1975, "Adaptation in Natural and
  Artificial Systems"; Goldberg 1989, "Genetic Algorithms in Search, Optimization, and Machine
  Learning"), made as strong as we could as the peer the search must beat (issue 9):
  a population of valid orderings (rows of codes, numpy throughout); parents chosen by
  tournaments (Goldberg 1989, ch. 5); two-point crossover inside one run, with the trial counts
  repaired inside the stretch taken from the second parent, and other runs taken whole from either
  parent; mutation by random swaps within a run and by reversing a short stretch (inversion,
  Holland 1975, ch. 6); repair of rule violations by swapping away trials the broken rules name,
  children still invalid dropped; random immigrants every generation (Grefenstette 1992,
  "Genetic algorithms for changing environments", in Parallel Problem Solving from Nature 2),
  which keep the population from collapsing onto one design; elitism, here as (mu + lambda)
  selection of the best of parents and children (Baeck & Schwefel 1993, "An overview of
  evolutionary algorithms for parameter optimization"), which measured better than generational
  replacement on our scenarios. Fitness is the same `Scorer.score_many` the search uses, on
  whole generations at once.
- random_valid: the best of designs sampled from CP-SAT (valid by construction).

All take the same Scorer and Judge as the search, so their scores compare directly; each stops at
a wall-clock budget or an evaluation count (the count makes tests deterministic). Every design they
report passes `Judge.ok` (every rule's check); the batch checks that screen children on the way
(BatchJudge) are held to the rules' checks by tests/test_baselines.py.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from seqsolve.errors import InternalError
from seqsolve.objective import Scorer
from seqsolve.rules.max_run import MaxRun
from seqsolve.rules.min_gap import MinGap
from seqsolve.rules.participants_differ import ParticipantsDiffer
from seqsolve.rules.positions import Position as PositionRule
from seqsolve.rules.run_boundary import RunBoundary
from seqsolve.rules.transitions import BalancedTransitions, ForbiddenTransition
from seqsolve.search import Judge, Search, SearchOptions
from seqsolve.solve import derive_seed, sample_orderings
from seqsolve.spec import Study


@dataclass
class Trace:
    """Best design found by a method, and how the best score grew over time."""

    method: str
    runs: list[np.ndarray] | None = None
    score: float = float("-inf")
    evaluations: int = 0  # designs scored
    tried: int = 0  # candidates generated (valid or not)
    curve: list[tuple[float, float]] = field(default_factory=list)  # (seconds, best score)
    seconds: float = 0.0

    def offer(self, runs: list[np.ndarray], score: float, t0: float) -> None:
        if score > self.score:
            self.runs, self.score = runs, float(score)
            self.curve.append((time.perf_counter() - t0, self.score))

    def at(self, seconds: float) -> float | None:
        """Best score reached within the first `seconds` (None: nothing valid by then)."""
        best = None
        for t, s in self.curve:
            if t <= seconds:
                best = s
        return best


def _done(t0: float, budget: float | None, trace: Trace, evaluations: int | None) -> bool:
    if budget is not None and time.perf_counter() - t0 >= budget:
        return True
    return evaluations is not None and trace.tried >= evaluations


# -- many designs checked at once ---------------------------------------------------------------


class BatchJudge:
    """Every rule check on many designs at once; rows of concatenated codes, shape (B, N).

    max-run, min-gap, balanced and forbidden transitions, run-boundary and position rules are
    computed here with numpy, to the letter of each rule's `check` (tests/test_baselines.py holds
    them to it on random designs). Checking one design with `Judge.ok` costs 0.2 to 0.4 ms, ten
    times the cost of scoring it, so a genetic algorithm that judged children one by one would
    spend its time judging. Any other rule kind, and earlier participants, go through
    `Judge.ok` row by row. `check` also gives, per row, the positions the broken rules name
    (as their Violation positions do), which the repair moves away.
    """

    FAST = (MaxRun, MinGap, BalancedTransitions, ForbiddenTransition, RunBoundary, PositionRule)

    def __init__(self, study: Study, judge: Judge):
        self.study, self.judge, self.facts = study, judge, study.facts
        self.lengths = [int(n) for n in study.facts.counts.sum(axis=1)]
        self.offsets = np.concatenate([[0], np.cumsum(self.lengths)]).astype(np.int64)
        self.run_of = np.repeat(np.arange(len(self.lengths)), self.lengths)
        self.fast = [r for r in study.rules if isinstance(r, self.FAST)]
        self.slow = [r for r in study.rules if not isinstance(r, self.FAST + (ParticipantsDiffer,))]
        self.row_by_row = bool(self.slow) or bool(judge.earlier)

    def split(self, row: np.ndarray) -> list[np.ndarray]:
        return [row[a:b].copy() for a, b in zip(self.offsets[:-1], self.offsets[1:])]

    def runs(self, codes: np.ndarray) -> list[np.ndarray]:
        """Column blocks of codes, one per run."""
        return [codes[:, a:b] for a, b in zip(self.offsets[:-1], self.offsets[1:])]

    def member(self, codes: np.ndarray, target_codes) -> np.ndarray:
        table = np.zeros(self.facts.n_conditions, dtype=bool)
        table[list(target_codes)] = True
        return table[codes]

    def check(self, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(broken, marked): rows breaking some rule, shape (B,); positions named, shape (B, N)."""
        codes = np.atleast_2d(codes)
        broken = np.zeros(len(codes), dtype=bool)
        marked = np.zeros(codes.shape, dtype=bool)
        for rule in self.fast:
            self._one(rule, codes, broken, marked)
        if self.row_by_row:
            for i in np.flatnonzero(~broken):
                broken[i] = not self.judge.ok(self.split(codes[i]))
        return broken, marked

    def valid(self, codes: np.ndarray) -> np.ndarray:
        return ~self.check(codes)[0]

    def _one(self, rule, codes, broken, marked) -> None:
        facts, runs = self.facts, self.runs(codes)
        views = self.runs(marked)
        if isinstance(rule, MaxRun):
            targets = facts.targets(rule.conditions, include_baseline=True)
            singles = [t.codes[0] for t in targets if len(t.codes) == 1]
            for x, m in zip(runs, views):
                if singles:  # stretches of one label: equal neighbours, all conditions at once
                    same = x[:, 1:] == x[:, :-1]
                    _mark_stretches(same, rule.length - 1, broken, m, self.member(x[:, :-1], singles), 1)
                for t in targets:
                    if len(t.codes) > 1:
                        _mark_stretches(self.member(x, t.codes), rule.length, broken, m)
        elif isinstance(rule, MinGap):
            self._min_gap(rule, runs, views, broken)
        elif isinstance(rule, BalancedTransitions):
            self._balanced(rule, runs, views, broken)
        elif isinstance(rule, ForbiddenTransition):
            a, b = rule._pair(facts)
            for x, m in zip(runs, views):
                hit = self.member(x[:, :-1], a.codes) & self.member(x[:, 1:], b.codes)
                _mark_pairs(hit, 1, broken, m)
        elif isinstance(rule, RunBoundary):
            w = rule.window
            for t in facts.targets(rule.conditions, include_baseline=False):
                for r in range(len(runs) - 1):
                    tail, head = self.member(runs[r][:, -w:], t.codes), self.member(runs[r + 1][:, :w], t.codes)
                    hit = tail.any(axis=1) & head.any(axis=1)
                    broken |= hit
                    views[r][:, -w:] |= tail & hit[:, None]
        else:  # position
            t = rule.target(facts)
            for r in rule.run_indices(facts):
                places = np.asarray(rule.places(runs[r].shape[1]), dtype=np.int64)
                inside = self.member(runs[r][:, places], t.codes)
                bad = ~inside if rule.placement == "always" else inside
                broken |= bad.any(axis=1)
                views[r][:, places] |= bad

    def _min_gap(self, rule: MinGap, runs, views, broken) -> None:
        facts = self.facts
        for t in facts.targets(rule.conditions, include_baseline=True):
            other = t.codes if rule.other is None else facts.resolve(rule.other).codes
            for x, m in zip(runs, views):
                a, b = self.member(x, t.codes), self.member(x, other)
                # a trial of both target and other is not its own neighbour (the rule's check)
                for d in range(1, rule.gap + 1):
                    _mark_pairs(a[:, :-d] & b[:, d:], d, broken, m)
                    if rule.other is not None:
                        _mark_pairs(b[:, :-d] & a[:, d:], d, broken, m)

    def _balanced(self, rule: BalancedTransitions, runs, views, broken) -> None:
        k = self.facts.n_conditions
        rows = np.arange(len(broken))[:, None] * (k * k)
        for group, low, high in rule.bounds(self.facts):
            found = np.zeros((len(broken), k * k), dtype=np.int64)
            pair_codes = {}
            for r in group:
                x = runs[r]
                idx = x[:, :-1] * k + x[:, 1:]
                if rule.cyclic and x.shape[1] > 1:
                    idx = np.concatenate([idx, (x[:, -1] * k + x[:, 0])[:, None]], axis=1)
                pair_codes[r] = idx
                found += np.bincount((idx + rows).ravel(), minlength=len(broken) * k * k).reshape(-1, k * k)
            over, under = found > high.ravel(), found < low.ravel()
            broken |= (over | under).any(axis=1)
            if len(group) != 1:
                continue  # summed over runs: check names no positions either
            r = group[0]
            idx = pair_codes[r][:, : runs[r].shape[1] - 1]
            hit = np.take_along_axis(over, idx, axis=1)  # the pair stands here too often
            views[r][:, :-1] |= hit
            views[r][:, 1:] |= hit
            short_first = under.reshape(-1, k, k).any(axis=2)  # a condition whose pair is too rare
            views[r] |= np.take_along_axis(short_first, runs[r], axis=1)


def _mark_stretches(
    member: np.ndarray,
    length: int,
    broken: np.ndarray,
    marked: np.ndarray,
    starts: np.ndarray | None = None,
    extra: int = 0,
) -> None:
    """Rows with more than `length` members in a row (only stretches beginning where `starts`
    holds, if given); each such stretch marked, `extra` positions longer (1 when member[p] says
    that positions p and p + 1 hold the same label)."""
    n = member.shape[1]
    if n <= length:
        return
    cs = np.concatenate([np.zeros((len(member), 1), dtype=np.int64), np.cumsum(member, axis=1)], axis=1)
    win = (cs[:, length + 1 :] - cs[:, : -length - 1]) == length + 1  # window starting at s is all members
    if starts is not None:
        win &= starts[:, : win.shape[1]]
    broken |= win.any(axis=1)
    for d in range(length + 1 + extra):
        marked[:, d : d + win.shape[1]] |= win[:, : marked.shape[1] - d]


def _mark_pairs(hit: np.ndarray, d: int, broken: np.ndarray, marked: np.ndarray) -> None:
    """hit[:, p]: positions p and p + d break a rule together."""
    broken |= hit.any(axis=1)
    marked[:, : hit.shape[1]] |= hit
    marked[:, d : d + hit.shape[1]] |= hit


def shuffle_and_reject(
    study: Study,
    scorer: Scorer,
    judge: Judge,
    seed: int,
    budget: float | None = None,
    evaluations: int | None = None,
    batch: int = 256,
) -> Trace:
    """Random shuffles of each run, rejected unless every rule holds; the best survivor is kept.

    Shuffles are made and judged a batch at a time (BatchJudge); `evaluations` caps the shuffles
    tried, so the result depends on the seed and that count only.
    """
    if budget is None and evaluations is None:
        raise ValueError("give a budget or an evaluation count")
    rng = np.random.default_rng([seed, 11])
    batch_judge = BatchJudge(study, judge)
    trace, t0 = Trace("shuffle-and-reject"), time.perf_counter()
    while not _done(t0, budget, trace, evaluations):
        n = batch if evaluations is None else min(batch, evaluations - trace.tried)
        codes = _shuffles(batch_judge, rng, n)
        trace.tried += n
        valid = codes[batch_judge.valid(codes)]
        if len(valid):
            scores = scorer.score_many([batch_judge.split(row) for row in valid])
            trace.evaluations += len(valid)
            i = int(np.argmax(scores))
            _offer(trace, batch_judge, valid[i], scores[i], t0)
    trace.seconds = time.perf_counter() - t0
    return trace


def _shuffles(batch_judge: BatchJudge, rng: np.random.Generator, n: int) -> np.ndarray:
    """n designs with every run's trials in random order, shape (n, N)."""
    counts = batch_judge.facts.counts
    parts = [rng.permuted(np.tile(np.repeat(np.arange(len(c)), c), (n, 1)), axis=1) for c in counts]
    return np.concatenate(parts, axis=1)


def _offer(trace: Trace, batch_judge: BatchJudge, row: np.ndarray, score: float, t0: float) -> None:
    """Record a better design, after the independent judge (every rule's check) passed it."""
    if score <= trace.score:
        return
    runs = batch_judge.split(row)
    if not batch_judge.judge.ok(runs):  # BatchJudge is held to check by tests; this never happens
        raise InternalError(f"{trace.method}: a design passed the batch checks but fails a rule's check")
    trace.offer(runs, score, t0)


def random_valid(
    study: Study, scorer: Scorer, judge: Judge, seed: int, budget: float | None = None, evaluations: int | None = None
) -> Trace:
    """The best of designs sampled one at a time from CP-SAT (random objectives and seeds)."""
    if budget is None and evaluations is None:
        raise ValueError("give a budget or an evaluation count")
    trace, t0 = Trace("random valid (CP-SAT)"), time.perf_counter()
    i = 0
    while not _done(t0, budget, trace, evaluations):
        found = sample_orderings(study, derive_seed(seed, 1000 + i), 1, judge.earlier)
        i += 1
        trace.tried += 1
        for runs in found:
            if judge.ok(runs):
                trace.evaluations += 1
                trace.offer(runs, scorer.score(runs), t0)
    trace.seconds = time.perf_counter() - t0
    return trace


# -- the genetic algorithm ----------------------------------------------------------------------


@dataclass
class GeneticSettings:
    """Tuning of `genetic`. Defaults from a short tuning at 10 s on benchmarks/bench_search.py's
    scenarios (one seed each, on a shared machine, so differences of about 1 % are noise): larger
    populations, more repair and more crossover did not help there."""

    population: int = 64
    elite: int = 2  # best designs copied unchanged into the next generation
    tournament: int = 3
    crossover: float = 0.6  # chance that a child is a crossover of two parents (else a copy of one)
    swaps: float = 1.0  # mean number of swaps per child beyond the first (1 + Poisson)
    inversion: float = 0.15  # chance that a child also has a short stretch reversed
    immigrants: float = 0.05  # share of each generation made of new random valid designs
    repair: int = 8  # repair moves tried on a child that breaks a rule before it is dropped
    children: int = 192  # children made per generation (some are dropped as invalid or repeats)
    walk: int = 8  # random valid swaps per generation of each immigrant walker (under tight rules)
    plus: bool = True  # next generation: best of parents and children (else children and elites)


def genetic(
    study: Study,
    scorer: Scorer,
    judge: Judge,
    seed: int,
    budget: float | None = None,
    evaluations: int | None = None,
    settings: GeneticSettings | None = None,
    start: list[list[np.ndarray]] | None = None,
) -> Trace:
    """A genetic algorithm over valid orderings (see the module docstring); the best design found.

    Parameters
    ----------
    start
        Valid designs to begin from; default the search's own starts (`Search.sample_starts`:
        CP-SAT samples and shuffles that pass every rule), so both methods start alike.
    budget, evaluations
        Stop after this many seconds, or once this many designs were scored (then the result
        depends on the seed and the count only).
    """
    if budget is None and evaluations is None:
        raise ValueError("give a budget or an evaluation count")
    s = settings or GeneticSettings()
    rng = np.random.default_rng([seed, 13])
    trace, t0 = Trace("genetic algorithm"), time.perf_counter()
    ga = _Genetic(study, scorer, BatchJudge(study, judge), s, rng)
    ga.begin(
        start if start is not None else Search.sample_starts(study, seed, judge.earlier, SearchOptions()), trace, t0
    )
    while not _done_scored(t0, budget, trace, evaluations):
        ga.generation(trace, t0)
    trace.seconds = time.perf_counter() - t0
    return trace


def _done_scored(t0: float, budget: float | None, trace: Trace, evaluations: int | None) -> bool:
    if budget is not None and time.perf_counter() - t0 >= budget:
        return True
    return evaluations is not None and trace.evaluations >= evaluations


class _Genetic:
    """Population state of one run of `genetic`: designs as rows of codes, shape (P, N)."""

    def __init__(self, study: Study, scorer: Scorer, batch_judge: BatchJudge, s: GeneticSettings, rng):
        self.study, self.scorer, self.judge, self.s, self.rng = study, scorer, batch_judge, s, rng
        self.n = int(batch_judge.offsets[-1])

    # -- start and immigrants

    def begin(self, starts: list[list[np.ndarray]], trace: Trace, t0: float) -> None:
        if not starts:
            raise ValueError("the genetic algorithm needs at least one valid design to start from")
        self.bases = np.array([np.concatenate(d) for d in starts], dtype=np.int64)
        probe = _shuffles(self.judge, self.rng, 256)
        self.shuffle_rate = float(self.judge.valid(probe).mean())
        pool = np.concatenate([self.bases, probe[self.judge.valid(probe)]])
        pool = _unique(pool)
        for _ in range(20):
            if len(pool) >= self.s.population:
                break
            pool = _unique(np.concatenate([pool, self.immigrants(self.s.population - len(pool))]))
        self.pop = pool[: self.s.population]
        self.fit = self.score(self.pop, trace)
        self.report(trace, t0)

    def immigrants(self, n: int) -> np.ndarray:
        """Up to n new valid designs (Grefenstette 1992's random immigrants): shuffles that pass
        the rules where they often do; otherwise walkers that started at the CP-SAT samples and move
        by random valid swaps, `walk` tries each per call, so they drift away from the samples."""
        if n <= 0:
            return np.zeros((0, self.n), dtype=np.int64)
        if self.shuffle_rate >= 0.02:
            tries = int(min(4096, np.ceil(2 * n / self.shuffle_rate)))
            codes = _shuffles(self.judge, self.rng, tries)
            return codes[self.judge.valid(codes)][:n]
        if not hasattr(self, "walkers"):
            self.walkers = self.bases[np.arange(max(n, 1)) % len(self.bases)].copy()
        rows = np.arange(len(self.walkers))
        for _ in range(self.s.walk):
            moved = self.walkers.copy()
            self.swap(moved, np.ones(len(moved), dtype=np.int64))
            ok = self.judge.valid(moved)
            self.walkers[rows[ok]] = moved[ok]
        return self.walkers[:n].copy()

    # -- one generation

    def generation(self, trace: Trace, t0: float) -> None:
        s = self.s
        n_imm = int(round(s.immigrants * s.population))
        need = s.children if s.plus else s.population - s.elite - n_imm
        m = s.children if s.plus else int(np.ceil(1.5 * need))
        a = self.tournament(m)
        kids = self.pop[a].copy()
        cross = np.flatnonzero(self.rng.random(m) < s.crossover)
        b = self.tournament(len(cross))
        for i, j in zip(cross, b):
            kids[i] = self.cross(kids[i], self.pop[j])
        self.swap(kids, 1 + np.minimum(self.rng.poisson(s.swaps, size=m), self.n // 2))
        for i in np.flatnonzero(self.rng.random(m) < s.inversion):
            self.invert(kids[i])
        kids = self.keep_valid(kids)
        new = _unique(np.concatenate([kids[:need], self.immigrants(n_imm)]), self.pop)
        if not len(new):
            return
        fit = self.score(new, trace)
        if s.plus:  # (mu + lambda): the best of parents and children
            pool, pool_fit = np.concatenate([self.pop, new]), np.concatenate([self.fit, fit])
        else:  # generational: elites and children, then the best other parents if places are left
            order = np.argsort(-self.fit, kind="stable")
            pool = np.concatenate([self.pop[order[: s.elite]], new, self.pop[order[s.elite :]]])
            pool_fit = np.concatenate([self.fit[order[: s.elite]], fit, self.fit[order[s.elite :]]])
        keep = np.argsort(-pool_fit, kind="stable") if s.plus else np.arange(len(pool))
        keep = keep[: s.population]
        self.pop, self.fit = pool[keep], pool_fit[keep]
        self.report(trace, t0)

    def tournament(self, m: int) -> np.ndarray:
        """Parents (rows of the population) chosen by m tournaments."""
        entrants = self.rng.integers(len(self.pop), size=(m, self.s.tournament))
        return entrants[np.arange(m), np.argmax(self.fit[entrants], axis=1)]

    def cross(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """Child of rows a and b: in one random run, a stretch of b put into a with the counts
        repaired inside it; with several runs, each other run taken whole from a or b."""
        offsets, rng = self.judge.offsets, self.rng
        child = a.copy()
        runs = len(offsets) - 1
        r = int(rng.integers(runs))
        for q in range(runs):
            if q != r and rng.random() < 0.5:
                child[offsets[q] : offsets[q + 1]] = b[offsets[q] : offsets[q + 1]]
        lo, hi = int(offsets[r]), int(offsets[r + 1])
        child[lo:hi] = _cross_run(a[lo:hi], b[lo:hi], rng, self.study.facts.n_conditions)
        return child

    def swap(self, codes: np.ndarray, counts: np.ndarray) -> None:
        """counts[i] random swaps of two trials of one run in row i, in place."""
        rows = np.arange(len(codes))
        lengths = np.asarray(self.judge.lengths)
        for k in range(int(counts.max(initial=0))):
            sel = rows[counts > k]
            p = self.rng.integers(self.n, size=len(sel))
            run = self.judge.run_of[p]
            q = self.judge.offsets[run] + (self.rng.random(len(sel)) * lengths[run]).astype(np.int64)
            _swap_at(codes, sel, p, q)

    def invert(self, row: np.ndarray) -> None:
        """Reverse a short stretch (3 to 12 trials) of one run, in place."""
        p = int(self.rng.integers(self.n))
        r = self.judge.run_of[p]
        end = int(self.judge.offsets[r + 1])
        w = int(self.rng.integers(3, 13))
        row[p : min(p + w, end)] = row[p : min(p + w, end)][::-1].copy()

    def keep_valid(self, codes: np.ndarray) -> np.ndarray:
        """The rows that pass every rule, after up to `repair` moves on each broken one: a swap of a
        position a broken rule names with another trial of its run, kept unless it marks more."""
        broken, marked = self.judge.check(codes)
        lengths = np.asarray(self.judge.lengths)
        for _ in range(self.s.repair):
            rows = np.flatnonzero(broken)
            if not len(rows):
                break
            # a random named position per row (a random one if the rule names none)
            p = np.argmax(self.rng.random((len(rows), self.n)) + marked[rows], axis=1)
            run = self.judge.run_of[p]
            q = self.judge.offsets[run] + (self.rng.random(len(rows)) * lengths[run]).astype(np.int64)
            trial = codes[rows].copy()
            _swap_at(trial, np.arange(len(rows)), p, q)
            b2, m2 = self.judge.check(trial)
            take = ~b2 | (m2.sum(axis=1) <= marked[rows].sum(axis=1))
            codes[rows[take]] = trial[take]
            broken[rows[take]], marked[rows[take]] = b2[take], m2[take]
        return codes[~broken]

    def score(self, codes: np.ndarray, trace: Trace) -> np.ndarray:
        trace.evaluations += len(codes)
        return np.asarray(self.scorer.score_many([self.judge.split(row) for row in codes]), dtype=float)

    def report(self, trace: Trace, t0: float) -> None:
        i = int(np.argmax(self.fit))
        _offer(trace, self.judge, self.pop[i], float(self.fit[i]), t0)


def _swap_at(codes: np.ndarray, rows: np.ndarray, p: np.ndarray, q: np.ndarray) -> None:
    """Swap codes[rows[i], p[i]] and codes[rows[i], q[i]] for every i, in place."""
    codes[rows, p], codes[rows, q] = codes[rows, q], codes[rows, p]


def _unique(codes: np.ndarray, against: np.ndarray | None = None) -> np.ndarray:
    """Rows of codes without repeats (first kept), and without rows of `against`."""
    seen = set() if against is None else {row.tobytes() for row in against}
    keep = []
    for i, row in enumerate(codes):
        key = row.tobytes()
        if key not in seen:
            seen.add(key)
            keep.append(i)
    return codes[keep]


def _cross_run(a: np.ndarray, b: np.ndarray, rng: np.random.Generator, k: int) -> np.ndarray:
    """a with the stretch [i, j) of b put in (two random cuts), then a's counts restored inside the
    stretch: surplus labels there, at random places, take the missing ones in random order."""
    n = len(a)
    if n < 2:
        return a.copy()
    i, j = np.sort(rng.choice(n + 1, size=2, replace=False))
    child = a.copy()
    child[i:j] = b[i:j]
    diff = np.bincount(child, minlength=k) - np.bincount(a, minlength=k)
    if diff.any():
        over = np.concatenate(
            [rng.choice(i + np.flatnonzero(child[i:j] == c), diff[c], replace=False) for c in np.flatnonzero(diff > 0)]
        )
        child[over] = rng.permutation(np.repeat(np.flatnonzero(diff < 0), -diff[diff < 0]))
    return child


def _crossover(a: list[np.ndarray], b: list[np.ndarray], rng: np.random.Generator) -> list[np.ndarray]:
    """Two-point crossover of every run of a with the same run of b, counts kept (runs as lists)."""
    k = int(max(max(r.max(initial=0) for r in a), max(r.max(initial=0) for r in b))) + 1
    return [_cross_run(ra, rb, rng, k) for ra, rb in zip(a, b)]
