"""The weighted score the search steers toward: figures relative to stated references, on one timing.

A participant's score is the weighted mean of
  detection       / the best block design's detection (same counts and timing),
  estimation      / the mean estimation of random orderings (same counts and timing),
  counterbalance  = 1 / (1 + RMS deviation of the first-order pair counts from ideal),
with the weights of the spec's [objective]. All three read as plain fractions: 0.84 detection is
"84 % of the block design's". No solver imports: this module only scores.

A spec without timing.tr (EEG/behavioural) has no fMRI analysis: its Scorer has no setup, detection
and estimation are 0 with weight 0 (spec.py refuses other weights), and only counterbalance steers.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from seqsolve.efficiency.fast import DirectScorer, Evaluator
from seqsolve.efficiency.grid import make_layout
from seqsolve.efficiency.metrics import counterbalance_deviation
from seqsolve.efficiency.setup import AnalysisSetup, make_setup
from seqsolve.score import evaluator_for, onsets_fixed, references
from seqsolve.spec import Study
from seqsolve.timing import make_schedules, trial_durations


def scoring_setup(study: Study) -> AnalysisSetup | None:
    """The resolved [analysis], or None for a spec without timing.tr (nothing to score on volumes)."""
    return None if study.spec.timing.tr is None else make_setup(study)


@dataclass(frozen=True)
class Weights:
    """Weights of the three figures, scaled to sum to 1."""

    detection: float
    estimation: float
    counterbalance: float

    @classmethod
    def of(cls, detection: float, estimation: float, counterbalance: float = 0.0) -> Weights:
        total = detection + estimation + counterbalance
        if total <= 0:
            raise ValueError("at least one weight must be above 0")
        return cls(detection / total, estimation / total, counterbalance / total)

    @classmethod
    def from_study(cls, study: Study) -> Weights:
        o = study.spec.objective
        return cls.of(o.detection, o.estimation, o.counterbalance)

    def as_dict(self) -> dict[str, float]:
        return {"detection": self.detection, "estimation": self.estimation, "counterbalance": self.counterbalance}


@dataclass(frozen=True)
class Figures:
    """One design's figures: absolute efficiencies, the relative ones, and the weighted score."""

    score: float
    detection: float
    estimation: float
    detection_vs_block: float
    estimation_vs_random: float
    counterbalance: float

    def as_dict(self) -> dict[str, float]:
        return {k: round(float(v), 9) for k, v in self.__dict__.items()}


@dataclass(frozen=True)
class References:
    """What detection and estimation are divided by (see module docstring)."""

    block_detection: float
    block_size: int
    random_estimation: float

    @classmethod
    def for_study(cls, study: Study, setup: AnalysisSetup | None, seed: int) -> References:
        """The study's references; all 0 without an analysis (setup None), where nothing divides by them."""
        if setup is None:
            return cls(0.0, 0, 0.0)
        ref = references(study, setup, list(range(study.facts.n_runs)), seed)
        return cls(ref["block_detection"], int(ref["block_size"]), ref["random_estimation"])

    def as_dict(self) -> dict:
        return dict(self.__dict__)


class Scorer:
    """Exact weighted scores of one participant's designs on its timing (gaps fixed per scorer).

    With onsets that do not depend on the labels (fixed SOA or equal durations), one Evaluator
    scores every candidate and every swap exactly. Otherwise each candidate gets its own schedule
    and evaluator (exact, slower); `swap_gains` then scores only the pairs it is given.
    """

    def __init__(
        self,
        study: Study,
        weights: Weights,
        refs: References,
        seed: int,
        gaps: list[np.ndarray] | None = None,
        setup: AnalysisSetup | None = None,
    ):
        self.study, self.weights, self.refs, self.seed = study, weights, refs, seed
        self.gaps = gaps
        self.timed = study.spec.timing.tr is not None
        self.setup = (setup or make_setup(study)) if self.timed else None
        # untimed: the score reads the labels only, so moving onsets change nothing
        self.fixed = onsets_fixed(study) or not self.timed
        self.direct = DirectScorer(self.setup) if self.timed else None
        self.lengths = [int(n) for n in study.facts.counts.sum(axis=1)]
        self.splits = np.cumsum(self.lengths)[:-1]
        self._evaluator: Evaluator | None = None
        self.use_det = weights.detection > 0
        self.use_est = weights.estimation > 0

    # -- evaluators ---------------------------------------------------------------------------

    def evaluator(self, runs: list[np.ndarray]) -> Evaluator:
        """An evaluator for the timing of these runs (shared by all runs when onsets are fixed)."""
        if self.fixed and self._evaluator is not None:
            return self._evaluator
        ev = evaluator_for(self.study, self.setup, make_schedules(self.study, runs, self.seed, self.gaps))
        if self.fixed:
            self._evaluator = ev
        return ev

    def with_gaps(self, gaps: list[np.ndarray]) -> Scorer:
        """The same scorer on rearranged gaps (a new timing, so a new evaluator)."""
        return Scorer(self.study, self.weights, self.refs, self.seed, gaps, self.setup)

    def split(self, codes: np.ndarray) -> list[np.ndarray]:
        return [np.asarray(x) for x in np.split(np.asarray(codes), self.splits)]

    # -- scores ---------------------------------------------------------------------------------

    def combine(self, det: np.ndarray, est: np.ndarray, cb: np.ndarray | float) -> np.ndarray:
        w, r = self.weights, self.refs
        total = np.zeros(np.shape(det) if np.ndim(det) else np.shape(est))
        if w.detection:
            total = total + w.detection * np.nan_to_num(det) / max(r.block_detection, 1e-300)
        if w.estimation:
            total = total + w.estimation * np.nan_to_num(est) / max(r.random_estimation, 1e-300)
        if w.counterbalance:
            total = total + w.counterbalance * cb
        return total

    def counterbalance(self, runs: list[np.ndarray]) -> float:
        return 1.0 / (1.0 + counterbalance_deviation(runs, self.study.facts.counts)["rms"])

    def score_many(self, designs: list[list[np.ndarray]]) -> np.ndarray:
        """Weighted scores of many designs (each a list of runs)."""
        cb = np.array([self.counterbalance(d) for d in designs]) if self.weights.counterbalance else 0.0
        if not self.timed:
            return self.combine(np.zeros(len(designs)), np.zeros(len(designs)), cb)
        if self.fixed:
            codes = np.array([np.concatenate(d) for d in designs])
            det, est = self.evaluator(designs[0]).score_many(codes, self.use_det, self.use_est)
        else:
            pairs = [self._one(d, self.use_det, self.use_est) for d in designs]
            det = np.array([p[0] for p in pairs])
            est = np.array([p[1] for p in pairs])
        return self.combine(det, est, cb)

    def _one(self, runs: list[np.ndarray], detection: bool = True, estimation: bool = True) -> tuple[float, float]:
        """Both efficiencies of one design on its own schedule, exactly: when onsets move with the
        labels, building the design matrices directly is cheaper than an Evaluator."""
        if not self.timed:
            return 0.0, 0.0
        if self.fixed:
            return self.evaluator(runs).score(np.concatenate(runs))
        return self._direct(runs, self.gaps, detection, estimation)

    def _direct(
        self, runs: list[np.ndarray], gaps: list[np.ndarray] | None, detection: bool, estimation: bool
    ) -> tuple[float, float]:
        """Both efficiencies of one design on the schedule these gaps give, matrices built directly."""
        schedules = make_schedules(self.study, runs, self.seed, gaps)
        layout = make_layout(
            self.setup, [s.onsets for s in schedules], [s.n_volumes for s in schedules], trial_durations(self.study)
        )
        return self.direct.score(layout, np.concatenate(runs), detection, estimation)

    def score(self, runs: list[np.ndarray]) -> float:
        return float(self.score_many([runs])[0])

    def score_on_gaps(self, runs: list[np.ndarray], gaps: list[np.ndarray]) -> float:
        """Exact weighted score of one design on other gaps, its matrices built directly (cheaper
        for one design than a new Evaluator; `with_gaps` makes the scorer for many)."""
        det, est = self._direct(runs, gaps, self.use_det, self.use_est)
        cb = self.counterbalance(runs) if self.weights.counterbalance else 0.0
        return float(self.combine(np.array([det]), np.array([est]), cb)[0])

    def figures(self, runs: list[np.ndarray]) -> Figures:
        """Every figure of one design (both efficiencies, whatever the weights)."""
        det, est = self._one(runs)
        cb = self.counterbalance(runs)
        r = self.refs
        return Figures(
            score=float(self.combine(np.array([det]), np.array([est]), cb)[0]),
            detection=det,
            estimation=est,
            detection_vs_block=det / r.block_detection if r.block_detection > 0 else 0.0,
            estimation_vs_random=est / r.random_estimation if r.random_estimation > 0 else 0.0,
            counterbalance=cb,
        )

    def swap_gains(self, runs: list[np.ndarray], pairs: np.ndarray, exact: int = 16) -> np.ndarray:
        """Weighted score after swapping each pair of trials (indices into the concatenated runs).

        Exact for every pair when onsets are fixed. When onsets move with the labels, the pairs
        are ranked on the current timing and only the best `exact` are scored exactly (on their
        own schedules); the others get -inf, so no caller ever acts on an inexact score.
        """
        codes = np.concatenate(runs)
        pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)

        def swapped(idx):
            out = []
            for i, j in pairs[idx]:
                c = codes.copy()
                c[i], c[j] = c[j], c[i]
                out.append(self.split(c))
            return out

        if len(pairs) == 0:
            return np.zeros(0)
        if not self.timed:
            return self.score_many(swapped(np.arange(len(pairs))))
        det, est = self.evaluator(runs).swap_scores(codes, pairs, self.use_det, self.use_est)
        if self.fixed:
            cb = 0.0
            if self.weights.counterbalance:
                cb = np.array([self.counterbalance(d) for d in swapped(np.arange(len(pairs)))])
            return self.combine(det, est, cb)
        guess = self.combine(det, est, 0.0)
        top = np.argsort(-guess, kind="stable")[:exact]
        out = np.full(len(pairs), -np.inf)
        out[top] = self.score_many(swapped(top))
        return out

    def change_gains(self, runs: list[np.ndarray], trials: np.ndarray | None = None) -> np.ndarray:
        """Local sensitivity: weighted score after changing each trial (or the given trials, indices
        into the concatenated runs) to each condition, (n, K), minus the current score. Exact for
        each single change on the current timing."""
        codes = np.concatenate(runs)
        if not self.timed:  # counterbalance is not scored change by change, as with an analysis
            return np.zeros((len(codes) if trials is None else len(trials), self.study.facts.n_conditions))
        ev = self.evaluator(runs)
        det, est = ev.change_scores(codes, self.use_det, self.use_est, trials)
        now = self.combine(*ev.score_many(codes[None], self.use_det, self.use_est), 0.0)[0]
        return self.combine(det, est, 0.0) - now
