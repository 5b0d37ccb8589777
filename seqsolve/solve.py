"""Drivers joining rules and CP-SAT: valid orderings per participant, and explanations of impossibility.

Two exact encodings are available (see DEVELOPERS.md): the transition-count model of flow.py,
used when every rule can be said in it, and the per-position model of model.py otherwise.
Every ordering leaves this module only after every rule's independent check has passed.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from ortools.sat.python import cp_model

from seqsolve.counting import counting_conflict
from seqsolve.errors import InfeasibleError, InternalError, NotFoundError, SolverTimeoutError
from seqsolve.flow import Disconnected, FlowModel
from seqsolve.model import OrderingModel
from seqsolve.rules import Rule
from seqsolve.rules._text import rule_line
from seqsolve.rules.participants_differ import ParticipantsDiffer
from seqsolve.seeds import derive_seed  # noqa: F401  (part of this module's API)
from seqsolve.spec import Study

#: how often the flow path resamples a participant whose runs repeat an earlier participant's
RESAMPLE_ATTEMPTS = 20


@dataclass
class SolveOptions:
    """Limits of one solve. time_limit is wall-clock seconds per participant (a safety net);
    work_limit is CP-SAT's deterministic time, so results do not depend on machine speed."""

    time_limit: float = 120.0
    work_limit: float = 30.0
    method: str = "auto"  # "auto", "counts" (transition-count model) or "positions"
    explain_time_limit: float = 60.0


@dataclass
class ParticipantOrdering:
    label: str
    seed: int
    runs: list[np.ndarray]
    method: str
    seconds: float


@dataclass
class Explanation:
    """Which rules cannot hold together, in the words of the spec."""

    proven: bool  # False: the solver ran out of time, nothing is proven
    minimal: bool  # True: dropping any one of the listed rules makes the rest possible
    rules: list[tuple[int, str, str]] = field(default_factory=list)  # (index, source, sentence)
    note: str = ""
    labels: dict[int, str] = field(default_factory=dict)  # rule index: its label, where the spec gives one

    def named(self, study: Study) -> Explanation:
        """The same, with the study's rule labels (shown as `check` shows them); returns self."""
        self.labels = {i: r.label for i, r in enumerate(study.rules) if r.label}
        return self

    def describe(self) -> str:
        if not self.proven:
            return f"could not decide whether the rules can all hold: {self.note}"
        if not self.rules:
            return "the conditions' trial counts alone cannot be arranged"
        head = (
            "these rules cannot all hold together (dropping any one of them makes the rest possible):"
            if self.minimal
            else f"these rules cannot all hold together (smallest set found; {self.note}):"
        )
        return "\n".join([head] + [f"  - {rule_line(src, self.labels.get(i), text)}" for i, src, text in self.rules])


def counts_expressible(study: Study) -> list[bool]:
    """For each rule: can the transition-count model state it exactly?"""
    probe = FlowModel(study.facts)
    return [rule.encode_flow(probe, probe.new_guard("probe")) for rule in study.rules]


def choose_method(study: Study, options: SolveOptions) -> str:
    if options.method != "auto":
        return options.method
    return "counts" if all(counts_expressible(study)) else "positions"


def check_runs(study: Study, rules, runs: list[np.ndarray]) -> list:
    """Every violation of the given rules in one participant's runs."""
    return [v for rule in rules for v in rule.check(study.facts, runs)]


def generate_orderings(
    study: Study,
    options: SolveOptions | None = None,
    progress: Callable[[int, int, str], None] | None = None,
) -> list[ParticipantOrdering]:
    """Valid orderings for every participant, each from its own derived seed.

    Raises
    ------
    InfeasibleError
        With an explanation naming the rules that conflict.
    SolverTimeoutError
        When the time limit ran out before an ordering was found or the rules were shown impossible.
    """
    options = options or SolveOptions()
    counted = counting_conflict(study)
    if counted is not None:  # proven by counting: no need to wait for the solver's proof
        raise InfeasibleError(counted.named(study))
    method = choose_method(study, options)
    solver_for = _CountsPath(study, options) if method == "counts" else _PositionsPath(study, options)
    differ = [r for r in study.rules if isinstance(r, ParticipantsDiffer)]
    done: list[ParticipantOrdering] = []
    for i, label in enumerate(study.participants):
        if progress:
            progress(i, len(study.participants), label)
        seed = derive_seed(study.spec.study.seed, i)
        t0 = time.perf_counter()
        runs = solver_for.solve(seed, [d.runs for d in done], differ)
        problems = check_runs(study, study.rules, runs) + [
            c for rule in differ for c in rule.clashes(runs, [d.runs for d in done])
        ]
        if problems:  # the encodings promise this never happens
            raise InternalError(f"participant {label}: produced ordering fails a check: {problems[:3]}")
        done.append(ParticipantOrdering(label, seed, runs, method, time.perf_counter() - t0))
    if progress:
        progress(len(study.participants), len(study.participants), "")
    return done


def sample_orderings(
    study: Study,
    seed: int,
    n: int,
    earlier: list[list[np.ndarray]] | None = None,
    options: SolveOptions | None = None,
    on_sample: Callable[[int, int], None] | None = None,
) -> list[list[np.ndarray]]:
    """n valid designs for one participant, each from its own seed (duplicates dropped).

    Used as diverse starting points by the search and as the random valid sample of compare and audit.
    Each design passes every rule's check and clashes with none of the earlier participants.
    on_sample(k, n) is called after the k-th solve (for progress lines).
    """
    options = options or SolveOptions()
    earlier = earlier or []
    method = choose_method(study, options)
    path = _CountsPath(study, options) if method == "counts" else _PositionsPath(study, options)
    differ = [r for r in study.rules if isinstance(r, ParticipantsDiffer)]
    out, seen = [], set()
    for i in range(n):
        runs = path.solve(derive_seed(seed, i), earlier, differ)
        problems = check_runs(study, study.rules, runs) + [c for rule in differ for c in rule.clashes(runs, earlier)]
        if problems:  # the encodings promise this never happens
            raise InternalError(f"sampled ordering fails a check: {problems[:3]}")
        key = tuple(np.concatenate(runs).tolist())
        if key not in seen:
            seen.add(key)
            out.append(runs)
        if on_sample is not None:
            on_sample(i + 1, n)
    return out


def solver_params(
    seed: int, options: SolveOptions, time_limit: float | None = None, work: float | None = None
) -> cp_model.CpSolver:
    """A CP-SAT solver set up the way every seqsolve solve runs: one worker, the seed, a deterministic
    work limit (so results repeat) and a wall-clock limit as a safety net."""
    solver = cp_model.CpSolver()
    solver.parameters.num_workers = 1  # one worker: the result depends on the seed alone
    solver.parameters.random_seed = seed
    solver.parameters.max_time_in_seconds = time_limit or options.time_limit
    solver.parameters.max_deterministic_time = work or options.work_limit
    # Ctrl-C belongs to Python (the search keeps its best design); CP-SAT's own handler would end the process
    solver.parameters.catch_sigint_signal = False
    return solver


def encode_rules(
    study: Study, fixed: list[np.ndarray] | None, earlier: list[list[np.ndarray]]
) -> tuple[OrderingModel, list]:
    """The per-position model of every rule (positions of `fixed` that are not -1 as constants,
    earlier participants for rules across participants), and one guard literal per rule."""
    m = OrderingModel(study.facts, fixed)
    guards = [m.new_guard(f"{i}") for i in range(len(study.rules))]
    for rule, g in zip(study.rules, guards):
        rule.encode(m, g)
        if rule.across_participants:
            rule.encode_against(m, g, earlier)
    return m, guards


#: (half-width, CP-SAT deterministic work) of the windows freed in turn around a sketch's violations
#: before a whole run is re-solved: a window that cannot be mended cheaply grows
MEND_WINDOWS = ((4, 0.2), (8, 0.3), (16, 0.45), (32, 0.7))


class _CountsPath:
    """Transition-count model + trail construction (exact for the rules it accepts)."""

    def __init__(self, study: Study, options: SolveOptions, rules: list[Rule] | None = None):
        self.study, self.options = study, options
        self.fm = FlowModel(study.facts)
        rules = list(study.rules) if rules is None else rules
        self.guards = [self.fm.new_guard(f"{i}") for i in range(len(rules))]
        for rule, g in zip(rules, self.guards):
            if not rule.encode_flow(self.fm, g):
                raise ValueError(f"rule cannot be encoded on pair counts: {rule.sentence(study.facts)}")

    def solve(self, seed: int, earlier: list[list[np.ndarray]], differ: list[ParticipantsDiffer]) -> list[np.ndarray]:
        rng = np.random.default_rng(seed)
        for attempt in range(RESAMPLE_ATTEMPTS):
            runs = self.sample(seed + attempt, rng)
            if not any(rule.clashes(runs, earlier) for rule in differ):
                return runs
        # sampling keeps meeting earlier participants: the exact per-position model decides
        return _PositionsPath(self.study, self.options).solve(seed, earlier, differ)

    def sample(self, seed: int, rng: np.random.Generator) -> list[np.ndarray]:
        fm = self.fm
        fm.cp.clear_objective()
        # a random linear objective on the pair counts and run ends: different participants,
        # different count matrices within what the rules allow
        terms = []
        for r in range(self.study.facts.n_runs):
            w = rng.integers(-5, 6, size=fm.m[r].shape)
            terms += [int(w[a, b]) * fm.m[r][a, b] for a, b in np.ndindex(*w.shape)]
            terms += [int(v) * lit for v, lit in zip(rng.integers(-5, 6, size=len(fm.start[r])), fm.start[r])]
        fm.cp.minimize(sum(terms))
        while True:
            status, solver = _solve_with(fm.cp, self.guards, solver_params(seed, self.options))
            if status not in (cp_model.OPTIMAL, cp_model.FEASIBLE):
                _raise_for(status, self.study, self.options, "counts")
            try:
                return [fm.build_run(r, *fm.values(solver, r), rng) for r in range(self.study.facts.n_runs)]
            except Disconnected as cut:
                fm.add_connectivity_cut(cut.run, cut.component)


class _PositionsPath:
    """Per-position model, started from a sketch that obeys the rules the counts model can state.

    The sketch is repaired run by run: a model in which every other run is constant (and skipped
    by the rules, see OrderingModel.active). Only if that fails is the whole model searched.
    """

    def __init__(self, study: Study, options: SolveOptions):
        self.study, self.options = study, options
        self._full: tuple[OrderingModel, list] | None = None
        stateable = [r for r, ok in zip(study.rules, counts_expressible(study)) if ok and not r.across_participants]
        self.sketch = _CountsPath(study, options, stateable)
        self.wide = any(r.wide_model for r in study.rules)

    def _params(self, seed: int) -> cp_model.CpSolver:
        solver = solver_params(seed, self.options)
        if self.wide:
            # measured (benchmarks/bench_triples.py): on balanced-triples models probing, symmetry detection
            # and the LP relaxation cost seconds and pruned little; 4 conditions x 192 trials, 4 runs: 21 s
            # to a first ordering with CP-SAT's defaults, 4.7 s without probing and symmetry, 3.2 s without
            # the LP as well
            solver.parameters.cp_model_probing_level = 0
            solver.parameters.symmetry_level = 0
            solver.parameters.linearization_level = 0
        return solver

    def build(self, fixed: list[np.ndarray] | None, earlier: list[list[np.ndarray]]) -> tuple[OrderingModel, list]:
        """The model (whole, or with fixed positions as constants) and its guard literals."""
        return encode_rules(self.study, fixed, earlier)

    def full(self, earlier) -> tuple[OrderingModel, list]:
        if self._full is None or self._full_earlier != len(earlier):
            self._full, self._full_earlier = self.build(None, earlier), len(earlier)
        return self._full

    def _start(self, seed: int, rng: np.random.Generator) -> list[np.ndarray]:
        """A starting ordering for the search: valid for every rule but the position-dependent ones."""
        try:
            return self.sketch.sample(seed, rng)
        except (InfeasibleError, SolverTimeoutError):
            return [
                rng.permutation(np.repeat(np.arange(self.study.facts.n_conditions), n)) for n in self.study.facts.counts
            ]

    def solve(self, seed: int, earlier: list[list[np.ndarray]], differ: list[ParticipantsDiffer]) -> list[np.ndarray]:
        rng = np.random.default_rng(seed)
        # each participant's search starts from its own sketch, so participants differ
        current = self._start(seed, rng)
        # repair run by run: first only windows around a run's violations, then the whole run, with
        # every other run fixed
        for r in sorted(self._violated_runs(current, earlier, differ)):
            mended = self._mend_locally(current, r, seed, earlier)
            if mended is not None:
                current = mended
                continue
            fixed = [seq.copy() for seq in current]
            fixed[r][:] = -1
            m, guards = self.build(fixed, earlier)
            status, solver = _solve_hinted(m, guards, current, self._params(seed + r + 1))
            if status not in (cp_model.OPTIMAL, cp_model.FEASIBLE):
                break  # this run cannot be mended alone: search the whole design below
            current = m.decode(solver)
        if not self._violated_runs(current, earlier, differ):
            return current
        m, guards = self.full(earlier)
        status, solver = _solve_hinted(m, guards, current, self._params(seed))
        if status not in (cp_model.OPTIMAL, cp_model.FEASIBLE):
            _raise_for(status, self.study, self.options, "positions", earlier)
        return m.decode(solver)

    def _mend_locally(
        self, current: list[np.ndarray], run: int, seed: int, earlier: list[list[np.ndarray]]
    ) -> list[np.ndarray] | None:
        """The design with windows around run's violations re-solved (growing until the model finds
        a way, within a small work limit each), everything else fixed; None if that does not mend it.

        Violations of rules the sketch could not state (a min-gap, say) sit in a few places of a
        sketch that obeys the rest: freeing a few dozen positions mends them in a fraction of the time
        the whole run takes (benchmarks' tight scenario, 2 x 240 trials with max-run 1, balanced
        transitions and a min-gap, on a loaded machine: a start in 0.5-2.5 s, against 8-12 s)."""
        n = len(current[run])
        where = [p for v in check_runs(self.study, self.study.rules, current) if v.run == run for p in v.positions]
        if not where:
            return None
        for half, work in MEND_WINDOWS:
            if 2 * half + 1 >= n:
                return None
            free = np.zeros(n, dtype=bool)
            for p in where:
                free[max(0, p - half) : p + half + 1] = True
            fixed = [seq.copy() for seq in current]
            fixed[run][free] = -1
            m, guards = self.build(fixed, earlier)
            params = solver_params(seed + run + 1, self.options, work=work)
            status, solver = _solve_hinted(m, guards, current, params)
            if status in (cp_model.OPTIMAL, cp_model.FEASIBLE):
                return m.decode(solver)
        return None

    def _violated_runs(self, runs, earlier, differ) -> set[int]:
        found = {v.run for v in check_runs(self.study, self.study.rules, runs)}
        found |= {r for rule in differ for _, _, r, _ in rule.clashes(runs, earlier)}
        return set(range(len(runs))) if None in found else found


def _solve_hinted(m: OrderingModel, guards: list, hint: list[np.ndarray], solver: cp_model.CpSolver):
    m.cp.clear_hints()
    for xs, given, start in zip(m.x, m.given, hint):
        for p in np.flatnonzero(given < 0):
            for k in range(xs.shape[1]):
                m.cp.add_hint(xs[p, k], bool(k == start[p]))
    return _solve_with(m.cp, guards, solver)


def _solve_with(cp: cp_model.CpModel, assumptions: list, solver: cp_model.CpSolver):
    cp.clear_assumptions()
    cp.add_assumptions(assumptions)
    status = solver.solve(cp)
    return status, solver


def _raise_for(status, study: Study, options: SolveOptions, method: str, earlier=()):
    if status == cp_model.INFEASIBLE:
        explanation = explain(study, options, list(earlier))
        tied = [src for i, src, _ in explanation.rules if study.rules[i].across_participants]
        if earlier and tied:
            # proven only against the designs already made, not for the study: "not found", never "impossible"
            raise NotFoundError(
                f"no design found for participant {len(earlier) + 1} that meets {', '.join(tied)} against the "
                f"{len(earlier)} participant(s) designed before it. Participants are designed one after another, "
                "so this does not prove the study impossible (other earlier designs may leave room). Try another "
                "--seed, fewer participants, or a smaller min_differences."
            )
        raise InfeasibleError(explanation)
    if status == cp_model.UNKNOWN:
        raise SolverTimeoutError(
            f"no ordering found within {options.time_limit:g} s (or {options.work_limit:g} units of solver work) "
            f"with the {method} model, and no proof that none exists. Try a longer --time-limit, "
            "or loosen a rule (seqsolve check names the tightest ones)."
        )
    raise InternalError(f"CP-SAT returned status {status} ({cp_model.CpSolver().status_name(status)})")


# ----------------------------------------------------------------------------------------------
# explanations


def explain(study: Study, options: SolveOptions | None = None, earlier: list | None = None) -> Explanation:
    """Name a smallest set of rules that cannot hold together (an assumption core, then shrunk).

    earlier: orderings of the participants already designed, for rules across participants.
    Returns an Explanation with proven=False when time ran out before any proof.
    """
    options = options or SolveOptions()
    earlier = earlier or []
    counted = counting_conflict(study)
    if counted is not None:
        return counted.named(study)
    method = "positions" if earlier else choose_method(study, options)
    if method == "counts":
        path = _CountsPath(study, options)
        cp, guards = path.fm.cp, path.guards
        cp.clear_objective()
    else:
        m, guards = _PositionsPath(study, options).full(earlier)
        cp = m.cp
    deadline = time.perf_counter() + options.explain_time_limit

    def infeasible(active: list[int]) -> bool | None:
        left = deadline - time.perf_counter()
        if left <= 0:
            return None
        solver = solver_params(0, options, time_limit=left)
        status, solver = _solve_with(cp, [guards[i] for i in active], solver)
        if status == cp_model.INFEASIBLE:
            core = set(solver.sufficient_assumptions_for_infeasibility())
            infeasible.core = [i for i in active if guards[i].index in core]
            return True
        if status in (cp_model.FEASIBLE, cp_model.OPTIMAL):
            if method == "counts" and not _counts_buildable(path, solver):
                return infeasible(active)  # a cut was added: ask again
            return False
        return None

    everything = list(range(len(study.rules)))
    verdict = infeasible(everything)
    if verdict is None:
        return Explanation(False, False, note=f"no answer within {options.explain_time_limit:g} s")
    if verdict is False:
        raise InternalError("explain() was called on rules that can all hold")
    core = infeasible.core or everything
    minimal = True
    for i in list(core):
        trial = [j for j in core if j != i]
        answer = infeasible(trial) if trial else False
        if answer is True:
            core = [j for j in infeasible.core if j in trial] or trial
        elif answer is None:
            minimal = False
    rules = [(i, study.rule_sources[i], study.rules[i].sentence(study.facts)) for i in sorted(core)]
    rules = [
        (
            i,
            src,
            f"{text} (with {len(earlier)} participant(s) already designed)"
            if study.rules[i].across_participants
            else text,
        )
        for i, src, text in rules
    ]
    note = "" if minimal else "time ran out before every rule in it was shown to be needed"
    return Explanation(True, minimal, rules, note).named(study)


def _counts_buildable(path: _CountsPath, solver) -> bool:
    fm = path.fm
    for r in range(fm.facts.n_runs):
        try:
            fm.check_connected(r, fm.values(solver, r)[0])
        except Disconnected as cut:
            fm.add_connectivity_cut(cut.run, cut.component)
            return False
    return True


@dataclass
class CheckResult:
    feasible: bool
    method: str
    explanation: Explanation | None
    seconds: float


def check_study(study: Study, options: SolveOptions | None = None) -> CheckResult:
    """Can the rules all hold? Finds one ordering (for the first participant) or explains why not."""
    options = options or SolveOptions()
    t0 = time.perf_counter()
    single = Study(**{**study.__dict__, "participants": study.participants[:1]})
    try:
        generate_orderings(single, options)
    except InfeasibleError as exc:
        return CheckResult(False, choose_method(study, options), exc.explanation, time.perf_counter() - t0)
    return CheckResult(True, choose_method(study, options), None, time.perf_counter() - t0)


__all__ = ["SolveOptions", "check_study", "explain", "generate_orderings", "sample_orderings"]
