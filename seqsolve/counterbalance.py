"""Counterbalancing across participants: the [[counterbalance]] spec section, the orders each design
offers (Latin square, Williams design, all permutations, or one level per participant), each
participant's order drawn from the study seed, and the checks of a whole study's assignment.

The checks (`assignment_problems`) test the properties a design promises on whatever orders they are
given; they never rebuild the square, so they also judge assignments made by other means.
"""

from __future__ import annotations

import itertools
import math
from collections import Counter
from dataclasses import dataclass
from typing import TYPE_CHECKING, Annotated, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from seqsolve.errors import shorten

if TYPE_CHECKING:  # spec.py imports this module
    from seqsolve.spec import Study

#: the spec's NAME_PATTERN (spec.py imports this module, so it cannot import spec.py's)
NAME_PATTERN = r"^[A-Za-z][A-Za-z0-9_]*$"
#: at most this many levels for design = "permutations": 6! = 720 orders already asks for 720 participants
MOST_PERMUTED = 6
#: at most this many levels of one counterbalanced factor (orders of a Williams design: 2 x levels)
MOST_LEVELS = 100
#: between the levels of a run order written as one text field (levels are names: never a '-')
ORDER_SEPARATOR = "-"
#: salt of the assignment's random stream, so it is independent of the participants' own seeds
ASSIGNMENT_STREAM = 0x43420001

LevelName = Annotated[str, Field(pattern=NAME_PATTERN, max_length=64)]


class Counterbalance(BaseModel):
    """[[counterbalance]]: a factor whose levels are balanced over participants."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    name: LevelName = Field(description="The factor's name: a column in participants.tsv and the trial tables.")
    levels: list[LevelName] = Field(min_length=2, max_length=MOST_LEVELS, description="The factor's levels.")
    scope: Literal["runs", "participants"] = Field(
        default="runs",
        description="runs: the levels take turns over each participant's runs in a balanced order; "
        "participants: each participant gets one level (e.g. a response mapping).",
    )
    design: Literal["williams", "latin", "permutations"] | None = Field(
        default=None,
        description="For scope = 'runs': williams (default; carry-over between runs balanced), latin "
        "(each level at each run position equally often) or permutations (every order).",
    )
    accept_imbalance: bool = Field(
        default=False,
        description="Accept a participant count that is not a multiple of the number of orders "
        "(some orders then go to one participant more).",
    )
    description: str = Field(default="", max_length=200, description="What the factor means (for participants.json).")

    @field_validator("levels")
    @classmethod
    def _distinct(cls, v: list[str]) -> list[str]:
        if len(set(v)) != len(v):
            raise ValueError("levels must differ from each other")
        return v

    @model_validator(mode="after")
    def _design_fits_scope(self):
        if self.scope == "participants" and self.design is not None:
            raise ValueError("'design' orders runs: leave it out with scope = 'participants'")
        if self.design == "permutations" and len(self.levels) > MOST_PERMUTED:
            raise ValueError(
                f"design = 'permutations' of {len(self.levels)} levels gives {math.factorial(len(self.levels)):,} "
                f"orders (at most {MOST_PERMUTED} levels); use 'williams' or 'latin'"
            )
        return self

    @property
    def kind(self) -> str:
        """What the orders are: 'williams', 'latin', 'permutations' or 'between' (one level each)."""
        return "between" if self.scope == "participants" else (self.design or "williams")


# ----------------------------------------------------------------------------------------------
# the orders of each design, as level indices


def latin_rows(n: int) -> list[tuple[int, ...]]:
    """The cyclic Latin square of order n: row i is i, i+1, ..., i+n-1 (mod n)."""
    return [tuple((i + j) % n for j in range(n)) for i in range(n)]


def williams_rows(n: int) -> list[tuple[int, ...]]:
    """A Williams design (Williams 1949, Aust. J. Sci. Res. A2:149): n rows for even n, 2n for odd n.

    The first row zig-zags 0, 1, n-1, 2, n-2, ...; row i adds i (mod n). For even n every level
    directly follows every other exactly once; for odd n the mirrored rows are added, and every
    ordered pair then follows exactly twice.
    """
    first, low, high = [0], 1, n - 1
    while len(first) < n:
        first.append(low)
        low += 1
        if len(first) < n:
            first.append(high)
            high -= 1
    rows = [tuple((x + i) % n for x in first) for i in range(n)]
    return rows if n % 2 == 0 else rows + [tuple(reversed(r)) for r in rows]


def design_rows(section: Counterbalance) -> list[tuple[int, ...]]:
    """The orders the section's design offers, each a tuple of level indices."""
    n = len(section.levels)
    kind = section.kind
    if kind == "between":
        return [(i,) for i in range(n)]
    if kind == "latin":
        return latin_rows(n)
    if kind == "permutations":
        return list(itertools.permutations(range(n)))
    return williams_rows(n)


# ----------------------------------------------------------------------------------------------
# each participant's order


@dataclass(frozen=True)
class Assignment:
    """One section's orders and which one each participant takes (in the spec's participant order)."""

    section: Counterbalance
    index: int  # the section's place in the spec, from 0
    rows: tuple[tuple[int, ...], ...]
    row_of: tuple[int, ...]  # per participant, the index of its row in rows
    n_runs: int

    def levels_of(self, participant: int) -> list[str]:
        """A participant's levels: one per run for scope 'runs' (the order repeated over blocks of
        len(levels) runs), or its one level for scope 'participants'."""
        row = self.rows[self.row_of[participant]]
        if self.section.scope == "participants":
            return [self.section.levels[row[0]]]
        return [self.section.levels[row[r % len(row)]] for r in range(self.n_runs)]

    def text_of(self, participant: int) -> str:
        """The participant's value as one field: its level, or its run order joined by '-'."""
        return ORDER_SEPARATOR.join(self.levels_of(participant)[: len(self.rows[0])])

    def counts(self) -> dict[str, int]:
        """How many participants take each order (its text), in the design's row order."""
        taken = Counter(self.row_of)
        return {ORDER_SEPARATOR.join(self.section.levels[i] for i in row): taken[k] for k, row in enumerate(self.rows)}


def assign(sections: list[Counterbalance], n_participants: int, n_runs: int, seed: int) -> list[Assignment]:
    """Every section's assignment: its rows shuffled by the study seed, participants taking them in turn,
    the sections crossed as far as the participant count allows.

    Section k takes shuffled row (p // stride_k) mod n_rows_k for participant p (from 0), with stride_k =
    gcd(n / n_rows_k, product of the earlier sections' n_rows) when n_rows_k divides n (else 1). Each
    section alone then has every order equally often whenever n is a multiple of its n_rows (otherwise
    the first n mod n_rows shuffled rows get one participant more), and when n is a multiple of the
    product of all n_rows every combination of orders is taken equally often (mixed radix). Same seed,
    same assignment.
    """
    out, before = [], 1
    for k, section in enumerate(sections):
        rows = design_rows(section)
        n_rows = len(rows)
        stride = math.gcd(n_participants // n_rows, before) if n_participants % n_rows == 0 else 1
        order = np.random.default_rng([seed, ASSIGNMENT_STREAM, k]).permutation(n_rows)
        row_of = tuple(int(order[(p // max(stride, 1)) % n_rows]) for p in range(n_participants))
        out.append(Assignment(section, k, tuple(rows), row_of, n_runs))
        before *= n_rows
    return out


def crossing(assignments: list[Assignment]) -> str | None:
    """How far two or more sections are crossed, as a sentence (None for fewer than two sections)."""
    if len(assignments) < 2:
        return None
    combos = Counter(zip(*(a.row_of for a in assignments)))
    possible = math.prod(len(a.rows) for a in assignments)
    n = len(assignments[0].row_of)
    if len(combos) == possible and len(set(combos.values())) == 1:
        return f"the sections are crossed: each of the {possible} combinations of their orders goes to {n // possible} participant(s)"
    return (
        f"the sections are crossed in part: {len(combos)} of the {possible} combinations of their orders occur "
        f"(a multiple of {possible} participants crosses them fully; each section stays balanced on its own)"
    )


def assign_study(study: Study) -> list[Assignment]:
    """The study's assignments (spec order of sections and participants), from its seed."""
    return assign(list(study.spec.counterbalance), len(study.participants), study.facts.n_runs, study.spec.study.seed)


def run_values(assignments: list[Assignment], participant: int, run: int, scope: str | None = None) -> dict[str, str]:
    """{factor: level} that hold for one run (from 0) of a participant: a run-scope factor's level in
    that run, a participant-scope factor's level throughout; scope: only factors of that scope."""
    return {
        a.section.name: a.levels_of(participant)[run if a.section.scope == "runs" else 0]
        for a in assignments
        if scope is None or a.section.scope == scope
    }


def manifest_entry(assignment: Assignment, labels: tuple[str, ...] | list[str]) -> dict:
    """The section, its orders, how often each is taken, and each participant's order, for manifest.json."""
    s = assignment.section
    return {
        "name": s.name,
        "scope": s.scope,
        "design": s.kind,
        "levels": list(s.levels),
        "accept_imbalance": s.accept_imbalance,
        "orders": assignment.counts(),
        "participants": {label: assignment.levels_of(p) for p, label in enumerate(labels)},
        "sentence": sentence(assignment),
    }


def manifest_section(assignments: list[Assignment], labels: list[str]) -> dict:
    """manifest.json's counterbalance entries, and how far the sections are crossed."""
    out: dict = {"counterbalance": [manifest_entry(a, labels) for a in assignments]}
    if crossing(assignments):
        out["counterbalance_crossing"] = crossing(assignments)
    return out


def section_problems(section: Counterbalance, n_participants: int, n_runs: int) -> list[tuple[str, str]]:
    """(field, message) for what the study's size makes impossible: run counts that are not a multiple
    of the levels, and participant counts that are not a multiple of the orders (unless accepted)."""
    out = []
    n = len(section.levels)
    if section.scope == "runs" and n_runs % n:
        out.append(
            (
                "levels",
                f"{n} levels take turns over the runs, but the study has {n_runs} run(s): give study.runs a "
                f"multiple of {n} (the order repeats in each block of {n} runs), or scope = 'participants'",
            )
        )
    n_rows = len(design_rows(section))
    if n_participants % n_rows and not section.accept_imbalance:
        more = n_participants % n_rows
        out.append(
            (
                "accept_imbalance",
                f"{n_participants} participants over the {n_rows} orders of {_design_name(section)} leaves "
                f"{more} order(s) with one participant more than the others; give a multiple of {n_rows} "
                f"participants (e.g. {n_participants + n_rows - more}), or set accept_imbalance = true to accept it",
            )
        )
    return out


def _design_name(section: Counterbalance) -> str:
    return {
        "between": "the between-participant assignment",
        "latin": "the Latin square",
        "williams": "the Williams design",
        "permutations": "all permutations",
    }[section.kind]


def sentence(assignment: Assignment) -> str:
    """What the section guarantees, in plain English, with the study's counts."""
    s = assignment.section
    taken = Counter(assignment.row_of)
    low, high = min(taken[k] for k in range(len(assignment.rows))), max(taken.values())
    each = f"{low}" if low == high else f"{low} to {high}"
    levels = ", ".join(s.levels)
    n_rows = len(assignment.rows)
    uneven = "" if low == high else " (unequal: accept_imbalance = true)"
    if s.kind == "between":
        return f"'{s.name}' ({levels}) is assigned between participants: each level to {each} participant(s){uneven}"
    what = {
        "latin": "a Latin square: each level at each run position equally often",
        "williams": "a Williams design: each level at each run position equally often, and each level "
        "directly after every other equally often",
        "permutations": "all permutations",
    }[s.kind]
    repeat = "" if assignment.n_runs == len(s.levels) else f" (repeated in each block of {len(s.levels)} runs)"
    return f"the run order of '{s.name}' ({levels}){repeat} follows {what}; {n_rows} orders, each taken by {each} participant(s){uneven}"


# ----------------------------------------------------------------------------------------------
# checking a whole study's assignment (from any source)


def assignment_problems(section: Counterbalance, orders: dict[str, tuple[str, ...]]) -> list[tuple[str | None, str]]:
    """(participant or None, what is wrong) for an assignment of this section over participants.

    orders: per participant, its levels (one per run position of a block, or its one level). Checks
    that each order is one the design allows (known levels; a row using each level once); that the
    participant count is a multiple of the design's number of orders n_rows (else, with
    accept_imbalance, that min(n, n_rows) distinct orders are taken, within one participant of each
    other); that every order used is taken equally often; and then the design's property: each level
    at each position equally often (Latin, Williams), each ordered pair of neighbouring levels equally
    often (Williams), every permutation present (permutations), every level present (between).
    """
    n = len(section.levels)
    width = 1 if section.scope == "participants" else n
    out: list[tuple[str | None, str]] = []
    for label, order in orders.items():
        wrong = _order_problem(section, order, width)
        if wrong:
            out.append((label, wrong))
    if out or not orders:
        return out
    taken = Counter(orders.values())
    shown = _shown(taken)
    n_rows = len(design_rows(section))
    if len(orders) % n_rows:
        if not section.accept_imbalance:
            return [
                (
                    None,
                    f"{len(orders)} participants cannot be balanced over the {n_rows} orders of "
                    f"{_design_name(section)} ({shown}); set accept_imbalance = true to accept it",
                )
            ]
        if max(taken.values()) - min(taken.values()) > 1 or len(taken) < min(len(orders), n_rows):
            return [(None, f"orders differ by more than one participant: {shown}")]
        return []  # accepted imbalance: no property can hold exactly, and accept_imbalance says so
    if len(set(taken.values())) > 1:
        return [(None, f"orders are not taken equally often: {shown}")]
    if section.kind in ("between", "permutations") and len(taken) < n_rows:
        return [(None, f"{n_rows - len(taken)} of the {n_rows} possible order(s) unused: {shown}")]
    return [(None, m) for m in _property_problems(section, list(orders.values()))]


#: orders listed in a message at most (a permutations design of 6 levels has 720)
SHOWN_ORDERS = 8


def _shown(taken: Counter) -> str:
    """The orders taken and how often, for a message: the rarest first, at most SHOWN_ORDERS of them."""
    items = sorted(taken.items(), key=lambda item: (item[1], item[0]))
    text = ", ".join(f"{ORDER_SEPARATOR.join(o)} x{c}" for o, c in items[:SHOWN_ORDERS])
    return text + (f", ... ({len(items)} orders)" if len(items) > SHOWN_ORDERS else "")


def _order_problem(section: Counterbalance, order: tuple[str, ...], width: int) -> str | None:
    unknown = [x for x in order if x not in section.levels]
    if unknown:
        return f"unknown level {shorten(unknown[0])} of '{section.name}'; its levels: {', '.join(section.levels)}"
    if len(order) != width:
        return f"{len(order)} level(s) given; '{section.name}' needs {width}"
    if len(set(order)) != len(order):
        return f"order {ORDER_SEPARATOR.join(order)} repeats a level; each run order uses each level once"
    return None


def _property_problems(section: Counterbalance, orders: list[tuple[str, ...]]) -> list[str]:
    """The design's balance property on orders taken equally often (see assignment_problems)."""
    out = []
    if section.kind in ("latin", "williams"):
        for pos in range(len(section.levels)):
            at = Counter(o[pos] for o in orders)
            if len(at) < len(section.levels) or len(set(at.values())) > 1:
                shown = ", ".join(f"{lev} x{at[lev]}" for lev in section.levels)
                out.append(f"run position {pos + 1} is not balanced: {shown}")
                break
    if section.kind == "williams":
        pairs = Counter((a, b) for o in orders for a, b in zip(o, o[1:]))
        wanted = [(a, b) for a in section.levels for b in section.levels if a != b]
        counts = [pairs[p] for p in wanted]
        if len(set(counts)) > 1:
            worst = min(wanted, key=lambda p: pairs[p])
            most = max(wanted, key=lambda p: pairs[p])
            out.append(
                f"carry-over between runs is not balanced: {worst[1]} follows {worst[0]} {pairs[worst]} time(s), "
                f"{most[1]} follows {most[0]} {pairs[most]} time(s)"
            )
    return out
