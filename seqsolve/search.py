"""Efficiency-steered search: many cheap valid moves, CP-SAT where moves cannot reach.

One participant's search (`Search.run`):

1. Start: a pool of diverse valid designs sampled from CP-SAT (random objectives and seeds), and
   shuffles that pass every rule; the best-scoring one becomes the current design.
2. Each round (one `iteration`) makes `moves` moves. A move draws `batch` random swaps of two
   differently labelled trials of one run, keeps those that leave every rule satisfied (judged
   locally by the compiled checks of seqsolve.moves, in microseconds), scores them exactly at once
   (rank-2 updates of the information matrices, seqsolve.efficiency.fast), and takes the best of
   them under late acceptance (Burke & Bykov 2017, Eur. J. Oper. Res. 258:70-78): the move is made
   if it scores at least the current design or the design of `history` moves ago, so the search
   can walk downhill for a while and leave local optima. After the moves:
   - gaps (jittered timing only): a few swaps of two gaps of a run, each scored exactly on its own
     timing without building a new evaluator; the best gaining one is kept;
   - neighbourhood (after a round without gain): CP-SAT re-solves a window, a scattered subset or
     two conditions' trials of one run with everything else fixed, maximising the exact
     single-change gains; it reaches designs that single swaps cannot under tight rules;
   - kick: after `kick` rounds without a new best, the current design moves back to the best one
     perturbed by a random CP-SAT neighbourhood or, every third time, to an unused start.
3. Stop: the number of rounds, `stall` rounds without gain, the wall-clock budget, or Ctrl-C.
   With a budget and no round count, the search runs until the budget (or a stall: no gain for
   `stall` rounds and for the latter half of the time spent); the result says which stopped it.

Everything depends on the seed and the round count only (one CP-SAT worker, deterministic work
limits); a wall-clock budget makes the result depend on the machine, and the result records it.
The full independent checks (`Judge.ok`) confirm every design the search reports.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from ortools.sat.python import cp_model

from seqsolve.efficiency.fast import one_blas_thread
from seqsolve.errors import InternalError
from seqsolve.moves import MoveChecker, compile_moves
from seqsolve.objective import Figures, Scorer
from seqsolve.rules.participants_differ import ParticipantsDiffer
from seqsolve.solve import SolveOptions, check_runs, choose_method, encode_rules, sample_orderings, solver_params
from seqsolve.spec import Study
from seqsolve.tracking import (
    NO_FIR_TRACK,
    NO_TRACK,
    FamilyTracks,
    detection_track,
    family_tracks,
    fir_track,
    refresh,
    refresh_fir,
)

#: score gains below this are treated as no gain (scores are fractions near 1)
TOL = 1e-9

#: rounds when the search runs until its wall-clock budget
UNLIMITED = 10**12

#: moves per round on the compiled detection-only path, as a multiple of `moves` (each costs about
#: a sixteenth of a move scored through numpy: measured)
COMPILED_MOVES = 4

#: late acceptance looks back over a share of the moves a search is expected to make, within HISTORY_RANGE:
#: HISTORY_SHARE of them for a search of so many rounds, HISTORY_SHARE_BUDGET for one run to a wall-clock
#: budget (measured on bench_search's scenarios). For rounds, 1000 instead of 150 lowered the README
#: example's scores (6 participants, 30 rounds: mean 0.8452 against 0.8461), so rounds keep 150 and their
#: designs stay as they were. On a budget, shorter lists converge sooner: a share of 150 (a list
#: of 280 at 30 s on 4 runs x 240 trials) left the study-size scenarios at 0.5265 (tight rules) and 0.6933
#: (standard) at 30 s; 1000 (lists of 20-30 at 10 s, 45-95 at 30 s) reaches 0.5297 and 0.702, and the four
#: smaller scenarios converge by 10 s to what 30 s found before. Lists of 40 beat 150 at 30 s (0.7035 vs
#: 0.699). The cap keeps long budgets from wandering (an uncapped list made 300 s find less than 30 s on the
#: estimation scenario, 1.131 vs 1.138); at 300 s lists of 100 and 200 end alike on 4 x 240 (0.7039, 0.7041);
#: past the cap kicks and restarts use the extra time.
HISTORY_SHARE = 150
HISTORY_SHARE_BUDGET = 1000
HISTORY_RANGE = (20, 400)

#: fewest candidates for which estimation's rank-k swap update beats whole scores (measured, N=240)
EST_SWAPS_BATCHED = 96


@dataclass
class SearchOptions:
    """How one participant's search runs. None: take the spec's [objective] value.

    iterations counts rounds (see the module docstring); with a budget and no iterations, the
    search runs until the budget or a stall."""

    iterations: int | None = None
    stall: int | None = None
    budget: float | None = None  # wall-clock seconds per participant
    pool: int = 32  # diverse valid starts sampled from CP-SAT (fewer under the per-position model)
    moves: int = 64  # moves per round
    batch: int = 96  # random swaps drawn per compiled move (judged, the valid ones scored)
    context: float = 0.0  # share of those swaps drawn between trials with the same neighbours (0.5 measured
    # no better on the tight benchmark scenario: 0.716 vs 0.720 at 10 s)
    screen: int = 8  # compiled moves: estimation scored exactly for this many, the best by its gradient (0: all)
    batch_numpy: int = 24  # swaps drawn per move where they are scored through the Evaluator (slower)
    moves_moving: int = 8  # moves per round when onsets move with the labels (each candidate its own timing)
    exact_moving: int = 4  # and the candidates per move scored exactly there (the rest ranked on the current timing)
    history: int | None = None  # late acceptance: a move may score below the current design, not below the
    # design of this many moves ago; None: the expected number of moves / HISTORY_SHARE (or, set after one
    # round, / HISTORY_SHARE_BUDGET when a wall-clock budget is given)
    gap_tries: int = 24  # gap swaps scored per round (jittered timing, onsets fixed by the gaps): on the
    # benchmark's jittered scenario gaps gave two thirds of the gains, and 24 beat 6 on 5 of 6 runs (10 s, 30 s);
    # moving one trial in time instead (neighbouring gaps swapped, all ranked at once by tracked detection) lost
    # to these random swaps, which move whole stretches of trials (3 of 3 runs at 10 s)
    gap_tries_moving: int = 6  # the same where onsets move with the labels (each round is costlier there)
    window: int = 10  # first neighbourhood size (positions)
    window_work: float = 0.1  # CP-SAT deterministic work per neighbourhood
    kick: int = 20  # rounds without a new best before moving back to the best design, perturbed (6 kicked
    # before late acceptance had settled again: the estimation scenario at 30 s stopped gaining after 3-12 s,
    # 1.123-1.135 on three seeds, against 1.138-1.144 with 20; no change at 10 s on three scenarios)
    solve: SolveOptions = field(default_factory=SolveOptions)
    workers: int = 1  # processes searching participants side by side (generate); same designs for any count


#: what ended a participant's search, as the manifest says it
STOPPED_BY = {
    "iterations": "the number of rounds (objective.iterations or --iterations)",
    "stall": "the stall rule: no gain for objective.stall rounds (and, on a budget, for the latter half of the time)",
    "budget": "the wall-clock budget (--budget); the result depends on machine speed",
    "interrupted": "an interruption (Ctrl-C or a termination signal); the best design found so far was kept",
    "no search": "nothing: iterations = 0 asks for the first valid ordering",
}


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
    accepted: dict[str, int] = field(default_factory=dict)  # rounds that raised the best, by kind of step
    moves: int = 0  # moves tried (each judges and scores a batch of swaps)
    judged: int = 0  # swaps judged by the local rule checks


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


def warm_up(study: Study) -> None:
    """Compile (or load from numba's cache) the search's kernels for this study's rules, so that
    worker processes started next load them instead of each compiling them at once (tens of
    seconds on a new machine)."""
    n = int(study.facts.counts.sum())
    codes = np.concatenate([np.repeat(np.arange(study.facts.n_conditions), c) for c in study.facts.counts])
    checker = MoveChecker(compile_moves(study.rules, study.facts), [], codes)
    checker.valid(np.zeros((1, 2), dtype=np.int64))
    checker.kernels.tracked_moves(
        checker.tables,
        checker.state,
        NO_TRACK,
        NO_FIR_TRACK,
        0.0,
        0.0,
        0,
        1,
        0,
        1,
        np.zeros(1),
        0,
        0.0,
        0.0,
        codes.copy(),
        np.array([n], dtype=np.int64),
        0,
    )


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
        self, runs: list[np.ndarray], run: int, positions: np.ndarray, weights: np.ndarray, seed: int
    ) -> tuple[list[list[np.ndarray]], bool]:
        """Designs for the freed positions, improving on sum weights[i, c] * [position i holds c].

        weights: integers, shape (len(positions), n_conditions). Returns every solution CP-SAT met
        on its way (the last is the best for the linear objective; all are valid, and the caller
        re-scores them exactly) and whether the last was proved optimal. The current labels are a
        valid answer, given as a hint; an empty list when nothing was found within the work limit.
        """
        fixed = [r.copy() for r in runs]
        fixed[run][positions] = -1
        m, guards = encode_rules(self.study, fixed, self.earlier)
        xs = m.x[run]
        lits, coefs = [], []
        for i, p in enumerate(positions):
            for c in range(xs.shape[1]):
                if weights[i, c]:
                    lits.append(xs[p, c])
                    coefs.append(int(weights[i, c]))
            for c in range(xs.shape[1]):
                m.cp.add_hint(xs[p, c], bool(c == runs[run][p]))
        if lits:
            m.cp.maximize(cp_model.LinearExpr.weighted_sum(lits, coefs))
        seen = _Collector(xs[positions])
        m.cp.clear_assumptions()
        m.cp.add_assumptions(guards)
        status = solver_params(seed, self.options, work=self.work).solve(m.cp, seen)
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

    def __init__(self, lits: np.ndarray):
        super().__init__()
        self.lits = lits
        self.labels: list[np.ndarray] = []

    def on_solution_callback(self) -> None:
        vals = np.array([[self.boolean_value(v) for v in row] for row in self.lits], dtype=bool)
        self.labels.append(vals.argmax(axis=1).astype(np.int64))


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
        self.until_budget = options.iterations is None and options.budget is not None
        if self.until_budget:
            self.iterations = UNLIMITED
        else:
            self.iterations = obj.iterations if options.iterations is None else options.iterations
        self.stall = obj.stall if options.stall is None else options.stall
        self.rng = np.random.default_rng([seed, 7])
        self.judge = Judge(study, earlier)
        self.windows = WindowSolver(study, earlier, options.window_work, options.solve)
        self.moves = compile_moves(study.rules, study.facts)
        self.earlier = earlier
        self.lengths = scorer.lengths
        self.offsets = np.concatenate([[0], np.cumsum(self.lengths)]).astype(np.int64)
        self.run_weights = np.asarray(self.lengths, dtype=float) / sum(self.lengths)
        self.jitter = scorer.gaps is not None and any(len(np.unique(np.round(g, 6))) > 1 for g in scorer.gaps)
        self.window = options.window
        self.accepted: dict[str, int] = {}
        self.unused: list[list[np.ndarray]] = []
        self.kicks = 0
        self.moves_made = 0
        # set by run(): the current design (checker holds its labels), the best one, and their scores
        self.checker: MoveChecker | None = None
        self.current_score = float("-inf")
        self.best: list[np.ndarray] = []
        self.best_score = float("-inf")
        self.best_scorer = scorer
        self.late = np.zeros(1)  # late-acceptance list, sized in run()
        self.track = None  # detection kept current through swaps (tracking.py), where it applies
        self.fir = None  # and estimation
        self.family = None  # or detection over the HRF family (tracking.FamilyTracks), when the objective asks
        self.track_scorer: Scorer | None = None
        self.judged = 0  # swaps judged by the local rule checks
        self._settled: list[np.ndarray] | None = None  # the best design last confirmed by the full checks
        self._shown: tuple[float, Figures] | None = None  # the figures last shown for the best design

    # -- the loop -----------------------------------------------------------------------------

    def run(self, starts: list[list[np.ndarray]] | None = None) -> SearchResult:
        """Search from the given starting designs (default: sampled, `starts`); the best design found."""
        # BLAS on one thread for the whole search: its small products gain nothing from a second
        # thread, whose spinning took the other core from a second worker (measured: 2 workers on
        # 6 participants 17.4 s with threaded BLAS, 11.5 s pinned; 1 worker 15.9 s either way)
        with one_blas_thread():
            return self._run(starts)

    def _run(self, starts: list[list[np.ndarray]] | None) -> SearchResult:
        t0 = time.perf_counter()
        if starts is None:
            starts = self.starts()
        scores = self.scorer.score_many(starts)
        order = np.argsort(-scores, kind="stable")
        first = int(order[0])
        self.unused = [starts[i] for i in order[1:]]
        self.checker = MoveChecker(self.moves, self.earlier, np.concatenate(starts[first]))
        self._move_to(starts[first], float(scores[first]))
        budget = self.options.budget
        self._size_history(self.iterations * self._moves_per_round() if budget is None else None, HISTORY_SHARE)
        self.best, self.best_score, self.best_scorer = self.current, self.current_score, self.scorer
        history = [(0, time.perf_counter() - t0, self.best_score)]
        it, since, last_gain, stopped = 0, 0, 0.0, "iterations"
        try:
            while it < self.iterations:
                elapsed = time.perf_counter() - t0
                if since >= self.stall and (not self.until_budget or elapsed - last_gain >= elapsed / 2):
                    stopped = "stall"
                    break
                if self.options.budget is not None and elapsed > self.options.budget:
                    stopped = "budget"
                    break
                it += 1
                before = self.best_score
                step = self._round()
                if it == 1 and budget is not None:  # moves to expect: as many as the first round's pace allows
                    pace = self._moves_per_round() / max(time.perf_counter() - t0 - elapsed, 1e-6)
                    left = min(pace * max(budget - elapsed, 0.0), (self.iterations - 1) * self._moves_per_round())
                    self._size_history(left, HISTORY_SHARE_BUDGET)
                if self.best_score > before + TOL:
                    history.append((it, time.perf_counter() - t0, self.best_score))
                    self.accepted[step] = self.accepted.get(step, 0) + 1
                    since, last_gain = 0, time.perf_counter() - t0
                else:
                    since += 1
                    if since % self.options.kick == 0:
                        self._kick()
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
            moves=self.moves_made,
            judged=self.judged,
        )

    def _round(self) -> str:
        """One round: the moves, then gaps, then (after no gain) a CP-SAT neighbourhood. Returns
        the kind of step that last raised the best score (or 'swap' when none did)."""
        kind = "swap"
        before = self.best_score
        if self.compiled:
            self._compiled_moves(self.options.moves * COMPILED_MOVES)
        else:
            for _ in range(self._moves_per_round()):
                self._move()
        self._settle()
        if self.jitter and self._gap_step():
            kind = "gaps" if self._settle() else kind
        if self.best_score <= before + TOL:
            if self._window_step() and self._settle():
                kind = "neighbourhood"
        return kind

    def _moves_per_round(self) -> int:
        if self.compiled or self.family is not None:  # tracked family moves cost about as much (measured)
            return self.options.moves * COMPILED_MOVES
        return self.options.moves if self.scorer.fixed else self.options.moves_moving

    def _size_history(self, expected_moves: float | None, share: float) -> None:
        """The late-acceptance list: the option's length, or 1/share of the moves expected."""
        n = self.options.history
        if n is None:
            lo, hi = HISTORY_RANGE
            n = int(min(max((expected_moves or 0) / share, lo), hi))
        self.late = np.full(max(1, n), self.current_score)

    def _move(self) -> None:
        """Draw swaps, keep the valid ones, score them, make the best one under late acceptance."""
        pairs = self._draw_pairs(self.options.batch if self.family is not None else self.options.batch_numpy)
        if len(pairs):
            pairs = pairs[self.checker.valid(pairs)]
        slot = self.moves_made % len(self.late)
        self.moves_made += 1
        if len(pairs) == 0:
            self.late[slot] = self.current_score
            return
        self.judged += len(pairs)
        scores = self._swap_scores(pairs)
        k = int(np.argmax(scores))
        score = float(scores[k])
        if score >= self.current_score - TOL or score >= self.late[slot]:
            if self.track is not None:
                self.checker.kernels.detection_apply(self.track, self.checker.codes, *pairs[k])
            if self.family is not None:
                self.family.apply(self.checker.kernels, self.checker.codes, *pairs[k])
            if self.fir is not None:
                self.checker.kernels.estimation_apply(self.fir, self.checker.codes, *pairs[k])
            self.checker.apply(*pairs[k])
            self.current_score = score
            if score > self.best_score + TOL:
                self.best, self.best_score, self.best_scorer = self._runs(), score, self.scorer
        self.late[slot] = self.current_score

    def _compiled_moves(self, n: int) -> None:
        """n moves in one compiled call (detection only): the same moves as `_move`."""
        best_codes = np.concatenate(self.best).astype(np.int64)
        ends = self.offsets[1:].copy()
        w, r = self.scorer.weights, self.scorer.refs
        wd = w.detection / max(r.block_detection, 1e-300) if self.track is not None else 0.0
        we = w.estimation / max(r.random_estimation, 1e-300) if self.fir is not None else 0.0
        seed = int(self.rng.integers(2**31 - 1))
        cur, best, at, judged = self.checker.kernels.tracked_moves(
            self.checker.tables,
            self.checker.state,
            self.track or NO_TRACK,
            self.fir or NO_FIR_TRACK,
            wd,
            we,
            n,
            self.options.batch,
            int(round(self.options.context * self.options.batch)),
            self.options.screen,
            self.late,
            self.moves_made,
            self.current_score,
            self.best_score,
            best_codes,
            ends,
            seed,
        )
        self.current_score = cur
        self.moves_made = int(at)
        self.judged += int(judged)
        if best > self.best_score + TOL:
            self.best, self.best_score, self.best_scorer = self.scorer.split(best_codes), best, self.scorer

    def _settle(self) -> bool:
        """Exact scores again (no drift from many updates), and the full checks on a new best.
        True if the best design changed since the last call."""
        self.current_score = self.scorer.score(self.current)
        self._track()
        if self._settled is self.best:
            return False
        self.best_score = self.best_scorer.score(self.best)
        if not self.judge.ok(self.best):  # the local checks promise this never happens
            raise InternalError(f"participant {self.label}: a searched design fails a full rule check")
        self._settled = self.best
        return True

    def _track(self) -> None:
        """Scores of the current design kept for swaps (tracking.py): rebuilt for a new timing,
        recomputed from scratch otherwise."""
        sc = self.scorer
        if sc.untracked:
            self.track = self.fir = self.family = None
            return
        codes = self.checker.codes
        if self.track_scorer is not sc:
            ev = sc.evaluator(self.current)
            self.track = detection_track(ev, sc.setup, codes) if sc.use_det and not sc.members else None
            self.family = self._family_tracks(codes) if sc.use_det and sc.members else None
            self.fir = fir_track(ev, sc.setup, codes) if sc.use_est else None
            self.track_scorer = sc
            return
        if self.track is not None:
            refresh(self.track, codes)
        if self.family is not None:
            self.family.refresh(codes)
        if self.fir is not None:
            refresh_fir(self.fir, codes)

    def _family_tracks(self, codes: np.ndarray) -> FamilyTracks | None:
        """Detection tracked under each HRF family member (the objective's hrf_robust): the compiled
        round takes one detection state, so these moves go one at a time (`_move`)."""
        sc, runs = self.scorer, self.current
        evaluators = [sc.evaluator(runs), *sc.member_evaluators(runs)]
        return family_tracks(evaluators, [sc.setup, *sc.members], codes, sc.hrf_robust)

    @property
    def compiled(self) -> bool:
        """Can every move be made in compiled code (each weighted part tracked)?"""
        sc = self.scorer
        return (
            not sc.untracked and (self.track is not None or not sc.use_det) and (self.fir is not None or not sc.use_est)
        )

    @property
    def current(self) -> list[np.ndarray]:
        return self._runs()

    def _runs(self) -> list[np.ndarray]:
        return self.scorer.split(self.checker.codes.copy())

    def _move_to(self, runs: list[np.ndarray], score: float, scorer: Scorer | None = None) -> None:
        """Make runs (valid) the current design."""
        self.scorer = scorer or self.scorer
        self.checker.reset(np.concatenate(runs))
        self._track()
        self.current_score = score
        self.late[:] = score
        if score > self.best_score + TOL:
            self.best, self.best_score, self.best_scorer = [r.copy() for r in runs], score, self.scorer

    def _draw_pairs(self, n: int) -> np.ndarray:
        """n random pairs of trials in one run each (runs by length), labels different."""
        codes = self.checker.codes
        runs = self.rng.choice(len(self.lengths), size=2 * n, p=self.run_weights)
        lengths = np.asarray(self.lengths)[runs]
        i = (self.rng.random(2 * n) * lengths).astype(np.int64)
        j = (self.rng.random(2 * n) * lengths).astype(np.int64)
        pairs = np.column_stack([i, j]) + self.offsets[runs][:, None]
        return pairs[codes[pairs[:, 0]] != codes[pairs[:, 1]]][:n]

    def _swap_scores(self, pairs: np.ndarray) -> np.ndarray:
        """Exact weighted scores after each swap of the current design."""
        sc = self.scorer
        if sc.untracked:
            return sc.swap_gains(self.current, pairs, exact=self.options.exact_moving)  # exact applies to moving onsets
        codes = self.checker.codes
        ev = sc.evaluator(self.current)
        det = est = np.zeros(len(pairs))
        if self.track is not None:
            det = self.checker.kernels.detection_swap_scores(self.track, codes, pairs)
        elif self.family is not None:
            det = self.family.swap_scores(self.checker.kernels, codes, pairs)
        elif sc.use_det:
            det = ev.swap_scores(codes, pairs, True, False)[0]
        if self.fir is not None:
            est = self.checker.kernels.estimation_swap_scores(self.fir, codes, pairs)
        elif sc.use_est:
            if len(pairs) >= EST_SWAPS_BATCHED:
                est = ev.swap_scores(codes, pairs, False, True)[1]
            else:  # few candidates: whole scores are cheaper than the update's set-up (measured)
                cand = np.repeat(codes[None], len(pairs), axis=0)
                rows = np.arange(len(pairs))
                cand[rows, pairs[:, 0]], cand[rows, pairs[:, 1]] = codes[pairs[:, 1]], codes[pairs[:, 0]]
                est = ev.score_many(cand, False, True)[1]
        return sc.combine(det, est, 0.0)

    def _best_figures(self) -> Figures | None:
        if self._shown is not None and self._shown[0] == self.best_score:
            return self._shown[1]
        self._shown = (self.best_score, self.best_scorer.figures(self.best))
        return self._shown[1]

    def starts(self) -> list[list[np.ndarray]]:
        return self.sample_starts(self.study, self.seed, self.judge.earlier, self.options)

    @staticmethod
    def sample_starts(
        study: Study, seed: int, earlier: list[list[np.ndarray]], options: SearchOptions
    ) -> list[list[np.ndarray]]:
        """Diverse valid starting designs: samples from CP-SAT (one only when the per-position model
        is needed), and plain shuffles that happen to pass every rule (common under loose rules;
        CP-SAT's samples lean toward extreme transition counts, shuffles do not)."""
        n = options.pool if choose_method(study, options.solve) == "counts" else 1
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

    # -- the slower steps -----------------------------------------------------------------------

    def _gap_step(self) -> bool:
        """Swap two gaps of one run: `gap_tries` candidates, each scored exactly on its own timing
        (matrices built directly; no evaluator per candidate). Keeps the best one if it gains."""
        gaps = self.scorer.gaps
        runs = self.current
        best = None
        tries = self.options.gap_tries if self.scorer.fixed else self.options.gap_tries_moving
        for _ in range(tries):
            r = int(self.rng.integers(len(gaps)))
            if len(gaps[r]) < 2:
                continue
            i, j = self.rng.choice(len(gaps[r]), 2, replace=False)
            if abs(gaps[r][i] - gaps[r][j]) < 1e-9:
                continue
            new = [g.copy() for g in gaps]
            new[r][i], new[r][j] = new[r][j], new[r][i]
            score = self.scorer.score_on_gaps(runs, new)
            if score > self.current_score + TOL and (best is None or score > best[0]):
                best = (score, new)
        if best is None:
            return False
        self._move_to(runs, best[0], self.scorer.with_gaps(best[1]))
        return True

    def _neighbourhood(self, size: int) -> tuple[int, np.ndarray]:
        """A run and some of its positions to free (about `size` of them)."""
        run = int(self.rng.choice(len(self.lengths), p=self.run_weights))
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
        seq = self.checker.codes[self.offsets[run] + start : self.offsets[run] + start + span]
        present = np.unique(seq)
        if len(present) < 2:
            return run, np.arange(start, start + w)
        a, b = self.rng.choice(present, 2, replace=False)
        return run, start + np.flatnonzero((seq == a) | (seq == b))

    def _window_step(self) -> bool:
        """CP-SAT over a neighbourhood of the current design, steered by exact single-change gains."""
        current = self.current
        run, positions = self._neighbourhood(self.window)
        gains = self.scorer.change_gains(current, self.offsets[run] + positions)
        top = np.abs(gains).max()
        weights = np.rint(gains / top * 10_000).astype(np.int64) if top > 0 else np.zeros(gains.shape, np.int64)
        seed = int(self.rng.integers(2**31 - 1))
        found, optimal = self.windows.solve(current, run, positions, weights, seed)
        if self._accept_best(found):
            return True
        # adapt: larger after a failure the solver settled, smaller when it ran out of work
        n = max(self.lengths)
        self.window = min(self.window + 2, n) if optimal else max(4, self.window - 2)
        return False

    def _accept_best(self, designs: list[list[np.ndarray]]) -> bool:
        """Score candidates exactly in one batch; make the best valid one current if it gains."""
        if not designs:
            return False
        scores = self.scorer.score_many(designs)
        for i in np.argsort(-scores, kind="stable"):
            if scores[i] <= self.current_score + TOL:
                return False
            if self.judge.ok(designs[i]):
                self._move_to(designs[i], float(scores[i]))
                return True
        return False

    def _kick(self) -> None:
        """Leave a region that stopped giving: every third time restart from the next unused starting
        design (best first), otherwise from the best design with a random CP-SAT neighbourhood."""
        self.kicks += 1
        if self.kicks % 3 == 0 and self.unused:
            runs = self.unused.pop(0)
            self._move_to(runs, self.scorer.score(runs))
            self.window = self.options.window
            return
        base, scorer = self.best, self.best_scorer
        run = int(self.rng.integers(len(self.lengths)))
        n = self.lengths[run]
        w = int(min(n, max(2 * self.window, 8)))
        start = int(self.rng.integers(0, n - w + 1))
        weights = self.rng.integers(-100, 101, size=(w, self.study.facts.n_conditions))
        found, _ = self.windows.solve(
            base, run, np.arange(start, start + w), weights, int(self.rng.integers(2**31 - 1))
        )
        runs = found[-1] if found and self.judge.ok(found[-1]) else base
        self._move_to(runs, scorer.score(runs), scorer)
        self.window = self.options.window


__all__ = [
    "warm_up",
    "STOPPED_BY",
    "Judge",
    "Progress",
    "Search",
    "SearchOptions",
    "SearchResult",
    "WindowSolver",
    "shuffled",
]
