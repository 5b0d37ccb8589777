"""Incremental validity: is a swap of two trials still valid under every rule? Answered locally, compiled.

Every rule kind states itself here as a few *local primitives* (`Rule.add_moves`):

- allowed labels per position (position rules),
- forbidden ordered pairs of neighbours (forbidden-transition),
- stretch bounds of a set of conditions (max-run, min-run),
- gaps between members of two sets of conditions (min-gap),
- what may stand on both sides of a break between runs (run-boundary),
- bounds on ordered pair counts per group of runs (balanced-transitions),
- bounds on ordered triple counts per group of runs (balanced-triples),
- bounds on a set's count in stretches of positions (even-spread),
- distances to earlier participants' runs (participants-differ; and no repeat of a whole design).

A swap of trials i and j (same run) changes only the neighbourhoods of i and j, at most eight pair
counts and twelve triple counts, the spans that hold exactly one of i and j, and two entries per
earlier run. Given a design
that passes every rule, `MoveChecker.valid` decides whether the swapped design does by looking only
there: O(window) work, no Python loops, no copies (the swap is made in place, judged and undone).
The tests hold it against the rules' own `check` on every rule kind (tests/test_moves.py); the full
checks stay the judge of every design the search emits.
"""

from __future__ import annotations

from collections import namedtuple

import numpy as np

from seqsolve.rules.base import StudyFacts
from seqsolve.rules.triples import triple_counts

#: an upper bound that never binds
NO_LIMIT = 1 << 40

#: fixed for the whole search: what the rules allow
Tables = namedtuple(
    "Tables",
    [
        "run_of",  # int64 (N,): run of each trial (trials of all runs concatenated)
        "run_start",  # int64 (R,): first trial of each run
        "run_len",  # int64 (R,)
        "allowed",  # bool (N, K): may trial position n hold condition k
        "forbid",  # bool (K, K): may b directly follow a (False) or not (True)
        "st_member",  # bool (S, K): stretch bounds, set of conditions
        "st_lo",  # int64 (S,): shortest stretch allowed
        "st_hi",  # int64 (S,): longest stretch allowed
        "gp_a",  # bool (G, K): gaps, first set
        "gp_b",  # bool (G, K): second set (the first again for gaps within one set)
        "gp_gap",  # int64 (G,): two members this close (q - p <= gap) break the rule
        "bd_member",  # bool (B, K): run boundaries, set of conditions
        "bd_w",  # int64 (B,): trials on each side of a break
        "pb_group",  # int64 (P, R): pair-count groups, the group of each run
        "pb_cyclic",  # bool (P,): count the wrap from a run's last trial to its first
        "pb_low",  # int64 (P, G, K, K)
        "pb_high",  # int64 (P, G, K, K)
        "tb_group",  # int64 (P3, R): triple-count groups, the group of each run
        "tb_cyclic",  # bool (P3,): count the two triples that wrap from a run's end to its start
        "tb_low",  # int64 (P3, G3, K, K, K)
        "tb_high",  # int64 (P3, G3, K, K, K)
        "sp_ptr",  # int64 (T, N + 1): spans, CSR offsets of the spans holding each position
        "sp_idx",  # int64 (nnz,): span ids
        "sp_member",  # bool (T, K): the set whose count each span limits
        "sp_lo",  # int64 (n_spans,)
        "sp_hi",  # int64 (n_spans,)
        "earlier",  # int64 (E, N): earlier participants' designs, runs concatenated
        "min_diff",  # int64 (1,): fewest differing positions between two runs of equal length (0: no rule)
    ],
)

#: what changes as the search moves; updated in place by `MoveChecker.apply`
State = namedtuple(
    "State",
    [
        "codes",  # int64 (N,)
        "pb_count",  # int64 (P, G, K, K)
        "tb_count",  # int64 (P3, G3, K, K, K)
        "sp_count",  # int64 (n_spans,)
        "dist",  # int64 (E, R, R): positions at which earlier run q and this run r differ
    ],
)


class MoveRules:
    """Collects the local primitives of a study's rules (each rule adds its own, `Rule.add_moves`)."""

    def __init__(self, facts: StudyFacts):
        self.facts = facts
        k = facts.n_conditions
        self.lengths = [facts.run_length(r) for r in range(facts.n_runs)]
        self.starts = np.concatenate([[0], np.cumsum(self.lengths)]).astype(np.int64)
        n = int(self.starts[-1])
        self.allowed = np.ones((n, k), dtype=bool)
        self.forbid = np.zeros((k, k), dtype=bool)
        self.stretches: list[tuple[np.ndarray, int, int]] = []
        self.gaps: list[tuple[np.ndarray, np.ndarray, int, bool]] = []
        self.boundaries: list[tuple[np.ndarray, int]] = []
        self.pair_bounds: list[tuple[list[list[int]], np.ndarray, np.ndarray, bool]] = []
        self.triple_bounds: list[tuple[list[list[int]], np.ndarray, np.ndarray, bool]] = []
        self.spans: list[tuple[np.ndarray, list[tuple[int, int, int, int]]]] = []  # (member, [(start, stop, lo, hi)])
        self.min_diff = 0

    def member(self, codes) -> np.ndarray:
        out = np.zeros(self.facts.n_conditions, dtype=bool)
        out[list(codes)] = True
        return out

    # -- what rules add --------------------------------------------------------------------------

    def restrict(self, run: int, positions: list[int], codes, placement: str) -> None:
        """Positions (0-based, in the run) that must ('always') or must not ('never') hold codes."""
        rows = self.starts[run] + np.asarray(positions, dtype=np.int64)
        inside = self.member(codes)
        self.allowed[rows] &= inside if placement == "always" else ~inside

    def forbid_pair(self, first, then) -> None:
        for a in first:
            self.forbid[a, list(then)] = True

    def limit_stretch(self, codes, low: int, high: int) -> None:
        self.stretches.append((self.member(codes), int(low), int(min(high, NO_LIMIT))))

    def keep_apart(self, codes, others, gap: int) -> None:
        """No member of codes within gap positions of a member of others (None: of codes itself)."""
        same = others is None
        self.gaps.append((self.member(codes), self.member(codes if same else others), int(gap), same))

    def separate_runs(self, codes, window: int) -> None:
        self.boundaries.append((self.member(codes), int(window)))

    def bound_pairs(self, groups: list[list[int]], low: np.ndarray, high: np.ndarray, cyclic: bool) -> None:
        """Summed pair counts over each group of runs within [low[g], high[g]] (arrays (G, K, K))."""
        self.pair_bounds.append((groups, np.asarray(low), np.asarray(high), bool(cyclic)))

    def bound_triples(self, groups: list[list[int]], low: np.ndarray, high: np.ndarray, cyclic: bool) -> None:
        """Summed triple counts over each group of runs within [low[g], high[g]] (arrays (G, K, K, K))."""
        self.triple_bounds.append((groups, np.asarray(low), np.asarray(high), bool(cyclic)))

    def bound_spans(self, codes, run: int, spans: list[tuple[int, int, int, int]]) -> None:
        """The count of codes in positions start..stop-1 of the run lies in [lo, hi], per span."""
        off = int(self.starts[run])
        self.spans.append((self.member(codes), [(a + off, b + off, lo, hi) for a, b, lo, hi in spans]))

    def differ_by(self, n: int) -> None:
        self.min_diff = max(self.min_diff, int(n))

    # -- compiled form -------------------------------------------------------------------------

    def tables(self, earlier: list[list[np.ndarray]]) -> Tables:
        k, r_n, n = self.facts.n_conditions, self.facts.n_runs, int(self.starts[-1])
        run_of = np.repeat(np.arange(r_n), self.lengths).astype(np.int64)
        st = self.stretches
        gp = self.gaps
        bd = self.boundaries
        n_groups = max([len(g) for g, *_ in self.pair_bounds], default=1)
        p_n = len(self.pair_bounds)
        pb_group = np.zeros((p_n, r_n), dtype=np.int64)
        pb_low = np.zeros((p_n, n_groups, k, k), dtype=np.int64)
        pb_high = np.full((p_n, n_groups, k, k), NO_LIMIT, dtype=np.int64)
        for p, (groups, low, high, _) in enumerate(self.pair_bounds):
            for g, runs in enumerate(groups):
                pb_group[p, runs] = g
                pb_low[p, g] = low[g]
                pb_high[p, g] = np.minimum(high[g], NO_LIMIT)
        tb_group, tb_low, tb_high = _group_bounds(self.triple_bounds, r_n, (k, k, k))
        ptr, idx, sp_lo, sp_hi, sp_member = _span_index(self.spans, n, k)
        return Tables(
            run_of=run_of,
            run_start=self.starts[:-1].copy(),
            run_len=np.asarray(self.lengths, dtype=np.int64),
            allowed=self.allowed.copy(),
            forbid=self.forbid.copy(),
            st_member=np.array([m for m, _, _ in st], dtype=bool).reshape(len(st), k),
            st_lo=np.array([lo for _, lo, _ in st], dtype=np.int64),
            st_hi=np.array([hi for _, _, hi in st], dtype=np.int64),
            gp_a=np.array([a for a, _, _, _ in gp], dtype=bool).reshape(len(gp), k),
            gp_b=np.array([b for _, b, _, _ in gp], dtype=bool).reshape(len(gp), k),
            gp_gap=np.array([g for _, _, g, _ in gp], dtype=np.int64),
            bd_member=np.array([m for m, _ in bd], dtype=bool).reshape(len(bd), k),
            bd_w=np.array([w for _, w in bd], dtype=np.int64),
            pb_group=pb_group,
            pb_cyclic=np.array([c for *_, c in self.pair_bounds], dtype=bool),
            pb_low=pb_low,
            pb_high=pb_high,
            tb_group=tb_group,
            tb_cyclic=np.array([c for *_, c in self.triple_bounds], dtype=bool),
            tb_low=tb_low,
            tb_high=tb_high,
            sp_ptr=ptr,
            sp_idx=idx,
            sp_member=sp_member,
            sp_lo=sp_lo,
            sp_hi=sp_hi,
            earlier=np.array([np.concatenate(e) for e in earlier], dtype=np.int64).reshape(len(earlier), n),
            min_diff=np.array([self.min_diff], dtype=np.int64),
        )


def _group_bounds(bounds, n_runs: int, shape: tuple[int, ...]):
    """Per rule: the group of each run (P, R), and low and high bounds (P, G, *shape) padded to the
    largest number of groups G (padding never binds)."""
    n_groups = max([len(g) for g, *_ in bounds], default=1)
    group = np.zeros((len(bounds), n_runs), dtype=np.int64)
    low = np.zeros((len(bounds), n_groups, *shape), dtype=np.int64)
    high = np.full((len(bounds), n_groups, *shape), NO_LIMIT, dtype=np.int64)
    for p, (groups, lo, hi, _) in enumerate(bounds):
        for g, runs in enumerate(groups):
            group[p, runs] = g
            low[p, g] = lo[g]
            high[p, g] = np.minimum(hi[g], NO_LIMIT)
    return group, low, high


def _span_index(spans, n: int, k: int):
    """CSR of which spans hold each position, per span set; flat span bounds."""
    ptr = np.zeros((len(spans), n + 1), dtype=np.int64)
    idx, lo_all, hi_all, members = [], [], [], []
    first = 0
    nnz = 0
    for t, (member, items) in enumerate(spans):
        members.append(member)
        holders: list[list[int]] = [[] for _ in range(n)]
        for s, (a, b, lo, hi) in enumerate(items):
            lo_all.append(lo)
            hi_all.append(hi)
            for p in range(a, b):
                holders[p].append(first + s)
        first += len(items)
        for p in range(n):
            ptr[t, p] = nnz
            idx.extend(holders[p])
            nnz += len(holders[p])
        ptr[t, n] = nnz
    return (
        ptr,
        np.asarray(idx, dtype=np.int64),
        np.asarray(lo_all, dtype=np.int64),
        np.asarray(hi_all, dtype=np.int64),
        np.array(members, dtype=bool).reshape(len(spans), k),
    )


def start_state(tables: Tables, codes: np.ndarray) -> State:
    """The counters of a design (runs concatenated), computed whole."""
    codes = np.ascontiguousarray(codes, dtype=np.int64).copy()
    p_n, g_n, k = tables.pb_low.shape[0], tables.pb_low.shape[1], tables.forbid.shape[0]
    pb = np.zeros((p_n, g_n, k, k), dtype=np.int64)
    for p in range(p_n):
        for r, (a, n) in enumerate(zip(tables.run_start, tables.run_len)):
            seq = codes[a : a + n]
            g = tables.pb_group[p, r]
            if n > 1:
                np.add.at(pb[p, g], (seq[:-1], seq[1:]), 1)
                if tables.pb_cyclic[p]:
                    pb[p, g, seq[-1], seq[0]] += 1
    tb = np.zeros(tables.tb_low.shape, dtype=np.int64)
    for p in range(tb.shape[0]):
        for r, (a, n) in enumerate(zip(tables.run_start, tables.run_len)):
            tb[p, tables.tb_group[p, r]] += triple_counts(codes[a : a + n], k, bool(tables.tb_cyclic[p]))
    sp = np.zeros(len(tables.sp_lo), dtype=np.int64)
    for t in range(tables.sp_member.shape[0]):
        inside = np.flatnonzero(tables.sp_member[t][codes])
        for p in inside:
            sp[tables.sp_idx[tables.sp_ptr[t, p] : tables.sp_ptr[t, p + 1]]] += 1
    e_n, r_n = tables.earlier.shape[0], len(tables.run_len)
    dist = np.full((e_n, r_n, r_n), NO_LIMIT, dtype=np.int64)
    for e in range(e_n):
        for q in range(r_n):
            for r in range(r_n):
                if tables.run_len[q] == tables.run_len[r]:
                    a, b, n = tables.run_start[q], tables.run_start[r], tables.run_len[r]
                    dist[e, q, r] = np.count_nonzero(tables.earlier[e, a : a + n] != codes[b : b + n])
    return State(codes, pb, tb, sp, dist)


class MoveChecker:
    """Judges and makes swaps of one participant's design, keeping the rules' counters current.

    Parameters
    ----------
    rules : the study's rules compiled to primitives (`compile_moves`).
    earlier : earlier participants' designs (participants-differ, and no repeated design).
    codes : a valid design, runs concatenated, shape (N,).
    """

    def __init__(self, rules: MoveRules, earlier: list[list[np.ndarray]], codes: np.ndarray):
        from seqsolve import move_kernels  # numba: compiled on first use, cached per machine

        self.kernels = move_kernels  # the search calls its compiled loop with these tables and state
        self.tables = rules.tables(earlier)
        self.state = start_state(self.tables, codes)

    @property
    def codes(self) -> np.ndarray:
        return self.state.codes

    def reset(self, codes: np.ndarray) -> None:
        """Start again from another (valid) design."""
        self.state = start_state(self.tables, codes)

    def valid(self, pairs: np.ndarray) -> np.ndarray:
        """For each pair (i, j) of trials (global indices), would swapping them keep every rule?
        Pairs in different runs or with equal labels are never valid moves. Returns bool (n,)."""
        pairs = np.ascontiguousarray(pairs, dtype=np.int64).reshape(-1, 2)
        return self.kernels.swaps_valid(self.tables, self.state, pairs)

    def apply(self, i: int, j: int) -> None:
        """Make the swap (judged valid before) and update every counter."""
        self.kernels.apply_swap(self.tables, self.state, int(i), int(j))


def compile_moves(study_rules, facts: StudyFacts) -> MoveRules:
    """Every rule's local primitives; raises NotImplementedError for a rule kind without them."""
    out = MoveRules(facts)
    for rule in study_rules:
        rule.add_moves(facts, out)
    return out


__all__ = ["MoveChecker", "MoveRules", "State", "Tables", "compile_moves", "start_state"]
