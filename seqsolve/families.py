"""The standard design families, built under a study's own counts, timing and rules where they allow.

- block: each condition in blocks of b trials taken in turn (baseline blocks between them),
  for the block sizes the counts allow; the best valid size is the family's representative.
- permuted block: the block design with a share of its trials swapped at random within a run
  (a design between blocked and random; Liu 2004, NeuroImage 21:387-400, calls these
  permuted block designs).
- m-sequence: a q-ary maximum-length sequence from a primitive polynomial over GF(q)
  (Buracas & Boynton 2002, NeuroImage 16:801-813), GF(q) arithmetic from the galois library.
  It exists when the number of conditions (baseline included) is a prime power q, every run
  has q^n - 1 trials, and the counts are those of an m-sequence (q^(n-1) of each condition,
  one fewer of the baseline, which takes the zero symbol).
- random valid: designs sampled from CP-SAT (valid by construction).

Each family says whether it could be built and, if not, why (counts, or the rule it breaks).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from seqsolve.rules.base import Violation
from seqsolve.score import block_ordering
from seqsolve.solve import check_runs, derive_seed, sample_orderings
from seqsolve.spec import Study

#: block sizes tried (those above the largest count are dropped)
BLOCK_SIZES = (1, 2, 3, 4, 5, 6, 8, 10, 12, 15, 16, 20, 24, 30, 40)


@dataclass
class Family:
    name: str
    designs: list[list[np.ndarray]] = field(default_factory=list)  # each a list of runs, all valid
    labels: list[str] = field(default_factory=list)  # one per design, e.g. "blocks of 4"
    note: str = ""  # how it was built, or why it could not be
    refused_by_rules: bool = False  # it could be built for these counts, but no design passed the rules

    @property
    def possible(self) -> bool:
        return bool(self.designs)


def _first_problem(violations: list[Violation]) -> str:
    v = violations[0]
    return f"{v.rule}: {v.found}"


def block_designs(study: Study) -> Family:
    """Every valid block size; labels give the size."""
    fam = Family("block")
    counts = study.facts.counts
    biggest = int(counts.max())
    refused = []
    for b in sorted({s for s in BLOCK_SIZES if s <= biggest} | {biggest}):
        runs = [block_ordering(c, study.facts.baseline, b) for c in counts]
        problems = check_runs(study, study.rules, runs)
        if problems:
            refused.append((b, _first_problem(problems)))
            continue
        fam.designs.append(runs)
        fam.labels.append(f"blocks of {b}")
    if fam.designs:
        fam.note = f"block sizes allowed by the rules: {', '.join(lab.split()[-1] for lab in fam.labels)}"
    else:
        b, why = refused[0]
        fam.refused_by_rules = True
        fam.note = f"no block size passes the rules (blocks of {b}: {why})"
    return fam


def permuted_block_designs(
    study: Study, base: list[np.ndarray] | None, seed: int, n: int = 20, share: float = 0.1
) -> Family:
    """Block designs with `share` of each run's trials swapped at random (n attempts, valid kept).

    base: the block design to start from (None: blocks of the largest size the counts allow,
    rules or not, so the family exists even when plain blocks break a rule).
    """
    fam = Family("permuted block")
    rng = np.random.default_rng([seed, 17])
    if base is None:
        base = [block_ordering(c, study.facts.baseline, int(study.facts.counts.max())) for c in study.facts.counts]
    problem = ""
    for _ in range(n):
        runs = []
        for r in base:
            r = r.copy()
            k = max(1, int(round(share * len(r) / 2)))
            for _ in range(k):  # swaps of differently labelled trials, so each one changes something
                i = int(rng.integers(len(r)))
                other = np.flatnonzero(r != r[i])
                if other.size:
                    j = int(rng.choice(other))
                    r[i], r[j] = r[j], r[i]
            runs.append(r)
        problems = check_runs(study, study.rules, runs)
        if problems:
            problem = problem or _first_problem(problems)
            continue
        fam.designs.append(runs)
        fam.labels.append(f"{share:.0%} swapped")
    fam.refused_by_rules = not fam.designs
    fam.note = (
        f"{len(fam.designs)} of {n} valid" if fam.designs else f"none of {n} permutations passes the rules ({problem})"
    )
    return fam


def prime_power(q: int) -> bool:
    if q < 2:
        return False
    p = next(d for d in range(2, q + 1) if q % d == 0)
    while q % p == 0:
        q //= p
    return q == 1


def m_sequence(q: int, n: int, shift: int = 0) -> np.ndarray:
    """Symbols 0..q-1 of a q-ary m-sequence of length q^n - 1 (galois' Fibonacci LFSR of a
    primitive polynomial), cyclically shifted by `shift`."""
    import galois

    poly = galois.primitive_poly(q, n)
    seq = np.asarray(galois.FLFSR(poly.reverse()).step(q**n - 1)).astype(np.int64)
    return np.roll(seq, -shift)


def m_sequence_designs(study: Study, seed: int, n_designs: int = 10) -> Family:
    """m-sequence designs (different cyclic shifts per run) that pass the rules."""
    fam = Family("m-sequence")
    facts = study.facts
    q = facts.n_conditions
    if not prime_power(q):
        fam.note = f"{q} conditions (baseline included) is not a prime power"
        return fam
    lengths = facts.counts.sum(axis=1)
    n = max(1, round(math.log(int(lengths[0]) + 1, q)))
    if any(int(L) != q**n - 1 for L in lengths):
        below = max(1, int(math.floor(math.log(int(lengths[0]) + 1, q) + 1e-9)))
        fam.note = (
            f"runs must have q^n - 1 trials for q = {q} (e.g. {q**below - 1} or {q ** (below + 1) - 1}); "
            f"they have {sorted(set(lengths.tolist()))}"
        )
        return fam
    zero = facts.baseline
    if zero is None:
        short = [c for c in range(q) if facts.counts[0, c] == q ** (n - 1) - 1]
        zero = short[0] if short else None
    want = np.full(q, q ** (n - 1))
    if zero is not None:
        want[zero] -= 1
    if zero is None or any(not np.array_equal(c, want) for c in facts.counts):
        fam.note = (
            f"an m-sequence of length {q**n - 1} has {q ** (n - 1)} trials of each condition and "
            f"{q ** (n - 1) - 1} of the baseline; the spec's counts differ"
        )
        return fam
    # symbol 0 -> the baseline, the others -> the remaining conditions in spec order
    others = [c for c in range(q) if c != zero]
    mapping = np.array([zero] + others)
    rng = np.random.default_rng([seed, 19])
    base = mapping[m_sequence(q, n)]
    problem = ""
    for _ in range(n_designs):
        runs = [np.roll(base, -int(rng.integers(len(base)))) for _ in lengths]
        problems = check_runs(study, study.rules, runs)
        if problems:
            problem = problem or _first_problem(problems)
            continue
        fam.designs.append(runs)
        fam.labels.append("m-sequence")
    fam.refused_by_rules = not fam.designs
    fam.note = (
        f"GF({q}), degree {n}: {len(fam.designs)} of {n_designs} shifts valid"
        if fam.designs
        else f"no shift of the GF({q}) m-sequence passes the rules ({problem})"
    )
    return fam


def random_valid_designs(study: Study, seed: int, n: int, on_sample=None) -> Family:
    """n valid designs sampled from CP-SAT (duplicates dropped); on_sample(k, n) after each."""
    fam = Family("random valid")
    fam.designs = sample_orderings(study, derive_seed(seed, 5000), n, on_sample=on_sample)
    fam.labels = ["random"] * len(fam.designs)
    fam.note = f"{len(fam.designs)} distinct designs sampled from CP-SAT"
    return fam
