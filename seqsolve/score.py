"""The score job: efficiency and sequence figures of orderings, per participant and run, with references."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from seqsolve.blocks import BlockLayout, block_family
from seqsolve.efficiency.fast import DirectScorer, Evaluator, batch_efficiency
from seqsolve.efficiency.grid import make_layout
from seqsolve.efficiency.hrf_family import combine_family, family_setups, family_summary
from seqsolve.efficiency.limits import estimation_bound_identity
from seqsolve.efficiency.metrics import conditional_entropy, counterbalance_deviation, max_correlation
from seqsolve.efficiency.setup import AnalysisSetup, make_setup
from seqsolve.seeds import reference_seed
from seqsolve.spec import Study
from seqsolve.timing import RunSchedule, make_schedules, schedule_from_onsets, trial_durations

#: random orderings averaged for the 'random' reference
N_RANDOM = 100


@dataclass
class ScoreRow:
    """Figures of one run (run = 1, 2, ...) or of all runs together (run = 'all').

    detection, estimation: 1/trace(C M^-1 C') (criterion A; not divided by the number of contrasts
    q) or det(C M^-1 C')^(-1/q) (D), with M the information of the prewhitened model; noise is in
    units of the AR(1) innovation variance (the white-noise variance when ar1 = 0), so the figures
    are in 1/variance units of the response estimate, per unit innovation variance.
    references: the values the shares divide by: block_detection (best block design's detection,
    seqsolve.blocks) with block_size (its block, in trials) and block_placement (where its baseline
    goes), random_estimation (mean over random_orderings shuffled
    orderings drawn with numpy's default_rng seeded by seeds.reference_seed: the study's first
    participant's seed, as in generate), estimation_bound (None where none holds); with the spec's
    objective.hrf_robust "worst" or "mean", also block_detection_worst (or _mean), the best block
    design's detection read that way over the HRF family.
    hrf_family: detection over the HRF family (seqsolve/efficiency/hrf_family.py): min, mean and
    the worst member's label; with hrf_robust, worst_vs_block (or mean_vs_block) too.
    """

    participant: str
    run: str
    detection: float
    estimation: float
    per_contrast: dict[str, float]
    counterbalance_max: float
    entropy_bits: float
    max_correlation: float
    detection_vs_block: float | None = None
    estimation_vs_random: float | None = None
    estimation_vs_bound: float | None = None
    references: dict[str, float | int | None] | None = None
    warnings: list[str] = field(default_factory=list)
    hrf_family: dict | None = None

    def as_dict(self) -> dict:
        out = asdict(self)
        if out["hrf_family"] is None:  # not asked for (generate without hrf_robust), or a custom hrf
            del out["hrf_family"]
        return out


def evaluator_for(study: Study, setup: AnalysisSetup, schedules: list[RunSchedule]) -> Evaluator:
    layout = make_layout(setup, [s.onsets for s in schedules], [s.n_volumes for s in schedules], trial_durations(study))
    return Evaluator(setup, layout, study.facts.n_conditions)


def onsets_fixed(study: Study) -> bool:
    """Do onsets stay put when labels change? (fixed SOA, or every condition lasting the same)."""
    return study.spec.timing.soa is not None or len(set(trial_durations(study).tolist())) == 1


def _score_orderings(
    study: Study,
    setup: AnalysisSetup,
    designs: list[list[np.ndarray]],
    seed: int,
    detection: bool = True,
    estimation: bool = True,
) -> tuple[np.ndarray, np.ndarray]:
    """Detection and estimation of several designs (each a list of runs) under the spec's timing
    (a figure not asked for is NaN)."""
    if onsets_fixed(study):
        ev = evaluator_for(study, setup, make_schedules(study, designs[0], seed))
        return ev.score_many(np.array([np.concatenate(d) for d in designs]), detection, estimation)
    direct = DirectScorer(setup)  # onsets move with the labels: each design on its own schedule
    det, est = [], []
    for d in designs:
        sched = make_schedules(study, d, seed)
        layout = make_layout(setup, [s.onsets for s in sched], [s.n_volumes for s in sched], trial_durations(study))
        a, b = direct.score(layout, np.concatenate(d), detection, estimation)
        det.append(a)
        est.append(b)
    return np.array(det), np.array(est)


def _best_block(
    study: Study, setup: AnalysisSetup, counts: list[np.ndarray], seed: int, hrf_robust: str = "canonical"
) -> tuple[BlockLayout, float]:
    """The block layout of highest detection (the first in the family's order on a tie) and its
    detection, over every layout of seqsolve.blocks; detection read over the HRF family as
    `hrf_robust` says (hrf_family.combine_family). Every size is scored: detection against block
    size is not unimodal (how the counts divide into blocks makes ripples), so a coarse grid
    refined around its best missed the best size by 0.2 % (tests/test_block_family.py)."""
    family = block_family(counts, study.facts.baseline)
    designs = [runs for _, runs in family]
    setups = [setup] if hrf_robust == "canonical" else family_setups(setup)
    det = combine_family(
        np.array([_score_orderings(study, s, designs, seed, estimation=False)[0] for s in setups]), hrf_robust
    )
    i = int(np.argmax(det))
    return family[i][0], float(det[i])


def references(
    study: Study, setup: AnalysisSetup, runs_index: list[int], seed: int = 0, hrf_robust: str = "canonical"
) -> dict[str, float]:
    """The references the shares divide by, for the same counts and timing.

    block_detection: the highest detection efficiency (units as ScoreRow.detection) over the block
    family of seqsolve.blocks (`_best_block`; rules not applied), block_size and block_placement:
    the layout that reached it (the first in the family's order on a tie); random_estimation: the
    mean estimation efficiency of N_RANDOM orderings shuffled by numpy's default_rng(seed) (one
    permutation per run, runs in order, orderings in turn). With hrf_robust "worst" or "mean",
    detection is read over the HRF family (hrf_family.py) and the block layout is the best by that
    figure.
    """
    counts = [study.facts.counts[r] for r in runs_index]
    best, best_det = _best_block(study, setup, counts, seed, hrf_robust)
    rng = np.random.default_rng(seed)
    randoms = [[rng.permutation(np.repeat(np.arange(len(c)), c)) for c in counts] for _ in range(N_RANDOM)]
    _, est_random = _score_orderings(study, setup, randoms, seed, detection=False)
    return {
        "block_detection": best_det,
        "block_size": best.size,
        "block_placement": best.placement,
        "random_estimation": float(est_random.mean()),
    }


def score_design(
    study: Study,
    label: str,
    runs: list[np.ndarray],
    schedules: list[RunSchedule],
    with_references: bool = True,
    hrf_family: bool = True,
) -> list[ScoreRow]:
    """Rows for each run alone and for all runs together (hrf_family: with detection over the HRF
    family, where the spec's hrf is a double gamma)."""
    setup = make_setup(study)
    mode = study.spec.objective.hrf_robust
    hrf_family = hrf_family and setup.hrf_kind != "custom"
    rows = []
    parts = [([r], f"{r + 1}") for r in range(len(runs))] + ([(list(range(len(runs))), "all")] if len(runs) > 1 else [])
    for idx, name in parts:
        sub = [schedules[r] for r in idx]
        ev = evaluator_for(study, setup, sub)
        codes = np.concatenate([runs[r] for r in idx])
        xd = ev.det.design(codes[None])[0]  # built once: detection, per-contrast figures, correlation
        md = xd.T @ xd
        det = float(batch_efficiency(md[None], setup.detection_contrast(), setup.criterion)[0][0])
        est = float(ev.score_many(codes[None], detection=False)[1][0])
        per = _per_contrast(setup, md)
        counts = study.facts.counts[idx]
        row = ScoreRow(
            participant=label,
            run=name,
            detection=det,
            estimation=est,
            per_contrast=per,
            counterbalance_max=counterbalance_deviation([runs[r] for r in idx], counts)["max"],
            entropy_bits=conditional_entropy([runs[r] for r in idx], study.facts.n_conditions),
            max_correlation=max_correlation(xd[:, :: setup.n_basis]),
        )
        if det == 0 or est == 0:
            row.warnings.append("information matrix singular or ill-conditioned: efficiency set to 0")
        bound = _estimation_bound(study, setup, idx, sum(s.n_volumes for s in sub))
        row.estimation_vs_bound = est / bound if bound else None
        if hrf_family:
            row.hrf_family = family_summary(_family_detection(study, setup, sub, codes, det))
        if with_references:
            seed = reference_seed(study.spec.study.seed)
            ref = references(study, setup, idx, seed)
            row.detection_vs_block = det / ref["block_detection"] if ref["block_detection"] > 0 else None
            row.estimation_vs_random = est / ref["random_estimation"] if ref["random_estimation"] > 0 else None
            row.references = {**ref, "random_orderings": N_RANDOM, "estimation_bound": bound}
            if hrf_family and mode != "canonical":  # the reference generate's objective divides by
                block = _best_block(study, setup, [study.facts.counts[r] for r in idx], seed, mode)[1]
                row.references[f"block_detection_{mode}"] = block
                figure = row.hrf_family["min" if mode == "worst" else "mean"]
                row.hrf_family[f"{mode}_vs_block"] = figure / block if block > 0 else None
        rows.append(row)
    return rows


def _family_detection(
    study: Study, setup: AnalysisSetup, schedules: list[RunSchedule], codes: np.ndarray, canonical: float
) -> np.ndarray:
    """Detection of one design under each member of the HRF family, shape (n_members,); the canonical
    member's is `canonical` itself, the others computed the same way (design matrix, then M)."""
    out = [canonical]
    for member in family_setups(setup)[1:]:
        xd = evaluator_for(study, member, schedules).det.design(codes[None])[0]
        out.append(float(batch_efficiency((xd.T @ xd)[None], member.detection_contrast(), member.criterion)[0][0]))
    return np.array(out)


def _per_contrast(setup: AnalysisSetup, md: np.ndarray) -> dict[str, float]:
    """Detection efficiency of each contrast on its own."""
    out = {}
    for label, row in zip(setup.contrast_labels, setup.detection_contrast()):
        eff, _ = batch_efficiency(md[None], row[None, :], setup.criterion)
        out[label] = float(eff[0])
    return out


def _estimation_bound(study: Study, setup: AnalysisSetup, idx: list[int], n_volumes: int) -> float | None:
    """The identity-contrast bound of limits.py where it holds, else None: each-vs-baseline
    contrasts, one trial per TR, bins of one TR, and no AR(1) prewhitening.

    Nuisance regressors beyond the intercept (per-run intercepts, cosines, drifts) only lower the
    information, so the bound holds with them. Prewhitening does not: W'W has eigenvalues up to
    (1 + ar1)^2 in units of the innovation variance, so fast-alternating regressors gain
    information (brute force over tiny designs exceeds the white-noise bound up to 3.3x,
    tests/test_definitions.py). A bound that holds then, (1 + ar1)^2 / (lags * sum_i 1/n_i),
    is too loose to be a useful yardstick, so none is reported.
    """
    if setup.ar1 != 0:
        return None
    if study.spec.timing.soa is None or abs(study.spec.timing.soa - setup.tr) > 1e-9 or setup.fir_step != setup.tr:
        return None
    counts = study.facts.counts[idx][:, list(setup.modelled)].sum(axis=0)
    if study.spec.analysis.contrasts != "each-vs-baseline":
        return None
    bound = estimation_bound_identity(counts, n_volumes, setup.fir_lags, once_through_runs=len(idx))
    return bound if np.isfinite(bound) else None  # infinite: no bound, not a share of 0


def score_files(study: Study, paths, with_references: bool = True) -> list[ScoreRow]:
    """Score ordering files (orderings.csv or BIDS events): onsets from the files where given,
    else from the spec's timing (seeded by the study seed).

    Raises
    ------
    OrderingFileError
        When a file cannot be read against the spec.
    """
    from seqsolve.io.tables import read_designs

    rows = []
    for label, runs in read_designs(study, paths).items():
        codes = [c for c, _ in runs]
        if all(t is not None for _, t in runs):
            schedules = [schedule_from_onsets(study, c, t) for c, t in runs]
        else:
            schedules = make_schedules(study, codes, study.spec.study.seed)
        rows += score_design(study, label, codes, schedules, with_references)
    return rows
