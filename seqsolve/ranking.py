"""Where an audited design ranks among valid designs sampled under the same rules (audit --rank)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from seqsolve.audit import Rank
from seqsolve.objective import References, Scorer, Weights, scoring_setup
from seqsolve.seeds import derive_seed, reference_seed
from seqsolve.solve import sample_orderings
from seqsolve.spec import Study
from seqsolve.timing import draw_gaps, trial_durations

#: the sample's seed stream (apart from the participants' 0, 1, ... and compare's)
RANK_STREAM = 7001


def percentile(own: float, sample: np.ndarray) -> float:
    """Percent of the sample's scores at or below own (a design equal to the best sampled one is 100)."""
    ranked = np.sort(np.asarray(sample, dtype=float))
    return 100.0 * float(np.searchsorted(ranked, own, side="right")) / len(ranked)


def file_gaps(study: Study, runs: list[np.ndarray], onsets: list[np.ndarray | None]) -> list[np.ndarray] | None:
    """The gaps (seconds between one trial's end and the next onset, per run) the files give, for a
    jittered timing; None under a fixed soa or when a run has no onsets."""
    if study.spec.timing.soa is not None or any(o is None for o in onsets):
        return None
    durations = trial_durations(study)
    return [np.diff(o) - durations[c][:-1] for c, o in zip(runs, onsets)]


def rank_designs(
    study: Study,
    designs: dict[str, list[tuple[np.ndarray, np.ndarray | None]]],
    n_samples: int,
    on_sample: Callable[[int, int], None] | None = None,
) -> list[Rank]:
    """Each design's weighted score ([objective], references as generate's) and its percentile among
    n_samples valid designs drawn from CP-SAT with seeds from the study's seed (same spec, same ranks).

    Each design and the sample are scored on the design's own timing: the files' gaps where the timing
    is jittered and the files give onsets, else the gaps the participant's seed draws.
    """
    setup = scoring_setup(study)  # None without timing.tr: the score is then counterbalance alone
    master = study.spec.study.seed
    refs = References.for_study(study, setup, reference_seed(master))
    weights = Weights.from_study(study)
    sample = sample_orderings(study, derive_seed(master, RANK_STREAM), n_samples, on_sample=on_sample)
    out = []
    for label, runs in designs.items():
        codes = [c for c, _ in runs]
        index = study.participants.index(label) if label in study.participants else 0
        seed = derive_seed(master, index)
        gaps = file_gaps(study, codes, [o for _, o in runs]) or draw_gaps(study, codes, seed)
        scores = Scorer(study, weights, refs, seed, gaps, setup).score_many([codes] + sample)
        out.append(Rank(label, float(scores[0]), percentile(scores[0], scores[1:]), len(sample)))
    return out
