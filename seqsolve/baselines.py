"""Other ways to look for good orderings, kept to measure the search against (compare, benchmarks).

- shuffle_and_reject: the common lab practice. Shuffle each run's trials, throw the shuffle away
  if any rule fails, keep the best-scoring survivor.
- genetic: a genetic algorithm in the usual form (Holland 1975, "Adaptation in Natural and
  Artificial Systems"; Goldberg 1989, "Genetic Algorithms in Search, Optimization, and Machine
  Learning"): a population of orderings, parents chosen by fitness (tournaments), one-point
  crossover per run with the trial counts repaired, swap mutation, invalid children rejected,
  the fittest kept (elitism). Fitness is the same weighted score the search uses.
- random_valid: the best of designs sampled from CP-SAT (valid by construction).

All take the same Scorer and Judge as the search, so their scores compare directly; each stops
at a wall-clock budget or an evaluation count (the count makes tests deterministic).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from seqsolve.objective import Scorer
from seqsolve.search import Judge, shuffled
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


def shuffle_and_reject(
    study: Study,
    scorer: Scorer,
    judge: Judge,
    seed: int,
    budget: float | None = None,
    evaluations: int | None = None,
    batch: int = 64,
) -> Trace:
    """Random shuffles of each run, rejected unless every rule holds; the best survivor is kept."""
    if budget is None and evaluations is None:
        raise ValueError("give a budget or an evaluation count")
    rng = np.random.default_rng([seed, 11])
    trace, t0 = Trace("shuffle-and-reject"), time.perf_counter()
    while not _done(t0, budget, trace, evaluations):
        valid = []
        for _ in range(batch):
            runs = shuffled(study, rng)
            trace.tried += 1
            if judge.ok(runs):
                valid.append(runs)
            if _done(t0, budget, trace, evaluations):
                break
        if valid:
            scores = scorer.score_many(valid)
            trace.evaluations += len(valid)
            i = int(np.argmax(scores))
            trace.offer(valid[i], scores[i], t0)
    trace.seconds = time.perf_counter() - t0
    return trace


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


@dataclass
class GeneticSettings:
    population: int = 40
    elite: int = 4
    tournament: int = 3
    crossover: float = 0.8  # chance that a child is a crossover of two parents (else a copy)
    mutation: float = 0.02  # chance per trial of a swap with another trial of its run
    attempts: int = 20  # tries to make one valid child before the parent itself is kept


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
    """A genetic algorithm over valid orderings (see module docstring).

    The first population comes from shuffles that pass the rules; where shuffles rarely pass
    (tight rules), from designs sampled from CP-SAT (start, or sampled here), so the algorithm
    starts from valid designs as the published method assumes.
    """
    if budget is None and evaluations is None:
        raise ValueError("give a budget or an evaluation count")
    s = settings or GeneticSettings()
    rng = np.random.default_rng([seed, 13])
    trace, t0 = Trace("genetic algorithm"), time.perf_counter()
    population: list[list[np.ndarray]] = []
    for _ in range(20 * s.population):  # shuffles first
        runs = shuffled(study, rng)
        trace.tried += 1
        if judge.ok(runs):
            population.append(runs)
        if len(population) >= s.population:
            break
    if len(population) < s.population:
        extra = start or sample_orderings(study, derive_seed(seed, 2000), s.population - len(population), judge.earlier)
        population += [r for r in extra if judge.ok(r)][: s.population - len(population)]
    fitness = scorer.score_many(population)
    trace.evaluations += len(population)
    i = int(np.argmax(fitness))
    trace.offer(population[i], fitness[i], t0)
    while not _done(t0, budget, trace, evaluations):
        order = np.argsort(-fitness, kind="stable")
        children = [population[j] for j in order[: s.elite]]
        while len(children) < s.population and not _done(t0, budget, trace, evaluations):
            a = population[_tournament(fitness, s.tournament, rng)]
            b = population[_tournament(fitness, s.tournament, rng)]
            for _ in range(s.attempts):
                trace.tried += 1
                child = _crossover(a, b, rng) if rng.random() < s.crossover else [r.copy() for r in a]
                child = _mutate(child, s.mutation, rng)
                if judge.ok(child):
                    children.append(child)
                    break
            else:
                children.append(a)  # no valid child: the parent survives
        population = children
        fitness = scorer.score_many(population)
        trace.evaluations += len(population)
        i = int(np.argmax(fitness))
        trace.offer(population[i], fitness[i], t0)
    trace.seconds = time.perf_counter() - t0
    return trace


def _tournament(fitness: np.ndarray, size: int, rng: np.random.Generator) -> int:
    pick = rng.choice(len(fitness), size=min(size, len(fitness)), replace=False)
    return int(pick[np.argmax(fitness[pick])])


def _crossover(a: list[np.ndarray], b: list[np.ndarray], rng: np.random.Generator) -> list[np.ndarray]:
    """One-point crossover in each run, then the counts repaired inside the part taken from b."""
    out = []
    for ra, rb in zip(a, b):
        n = len(ra)
        if n < 2:
            out.append(ra.copy())
            continue
        cut = int(rng.integers(1, n))
        child = np.concatenate([ra[:cut], rb[cut:]])
        k = int(max(ra.max(), rb.max())) + 1
        diff = np.bincount(child, minlength=k) - np.bincount(ra, minlength=k)
        if diff.any():
            # b's part holds at least diff[c] surplus trials of each c: they take the missing labels
            over = np.concatenate(
                [
                    rng.choice(cut + np.flatnonzero(child[cut:] == c), diff[c], replace=False)
                    for c in np.flatnonzero(diff > 0)
                ]
            )
            child[over] = rng.permutation(np.repeat(np.flatnonzero(diff < 0), -diff[diff < 0]))
        out.append(child)
    return out


def _mutate(runs: list[np.ndarray], rate: float, rng: np.random.Generator) -> list[np.ndarray]:
    out = []
    for r in runs:
        r = r.copy()
        for i in np.flatnonzero(rng.random(len(r)) < rate):
            j = int(rng.integers(len(r)))
            r[i], r[j] = r[j], r[i]
        out.append(r)
    return out
