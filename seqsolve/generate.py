"""The generate job: valid orderings for every participant, their schedules, and the output folder."""

from __future__ import annotations

import json
import platform
import time
from collections.abc import Callable
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from seqsolve.audit import audit_orderings
from seqsolve.counterbalance import assign_study, manifest_section, run_values
from seqsolve.efficiency.hrf_family import FAMILY
from seqsolve.efficiency.setup import NO_TR_MESSAGE
from seqsolve.errors import InternalError, Problem, SpecError
from seqsolve.io.atomic import ensure_writable, write_folder
from seqsolve.io.bids import bids_files
from seqsolve.io.onsets import run_onset_files
from seqsolve.io.stimulus import trials_csv, trials_filename
from seqsolve.io.tables import events_filename, events_tsv, orderings_csv
from seqsolve.item_assign import assign_items, check_items, rule_names
from seqsolve.items import balance_notes
from seqsolve.objective import Figures, References, Scorer, Weights, scoring_setup
from seqsolve.search import STOPPED_BY, Judge, Progress, Search, SearchOptions, SearchResult
from seqsolve.seeds import reference_seed
from seqsolve.solve import (
    ParticipantOrdering,
    SolveOptions,
    choose_method,
    derive_seed,
    generate_orderings,
    sample_orderings,
)
from seqsolve.spec import Study
from seqsolve.timing import RunSchedule, draw_gaps, make_schedules
from seqsolve.workers import Job, search_in_workers, search_participant

if TYPE_CHECKING:
    from seqsolve.cluster import ClusterOptions


@dataclass
class Design:
    """One participant's result: orderings and schedules, and what the search made of them."""

    label: str
    seed: int
    method: str
    runs: list[np.ndarray]
    schedules: list[RunSchedule]
    seconds: float
    figures: Figures | None = None
    search: dict | None = None  # iterations, why it stopped, improving steps by kind
    gaps: list[np.ndarray] | None = None  # the gaps the search settled on (jittered timing)
    items: list[np.ndarray] | None = None  # item index of each trial per run (-1: none), seqsolve/items.py


class StudyDesigns(list):
    """The designs of every participant (a list), with what the search was steered by."""

    def __init__(self, designs=(), weights: Weights | None = None):
        super().__init__(designs)
        self.weights = weights
        self.references: References | None = None
        self.interrupted = False
        self.notes: list[str] = []

    def spread(self) -> float | None:
        """1 - (worst participant's score / best's): 0 when all are equally good."""
        scores = [d.figures.score for d in self if d.figures is not None]
        if not scores or max(scores) <= 0:
            return None
        return 1.0 - min(scores) / max(scores)


def versions() -> dict[str, str]:
    out = {"python": platform.python_version()}
    for pkg in ("seqsolve", "ortools", "numpy", "scipy", "pydantic"):
        try:
            out[pkg] = metadata.version(pkg)
        except metadata.PackageNotFoundError:
            out[pkg] = "not installed"
    return out


def design_study(
    study: Study,
    options: SolveOptions | None = None,
    progress: Callable[[int, int, str], None] | None = None,
    search: SearchOptions | None = None,
    on_step: Callable[[Progress], None] | None = None,
    on_note: Callable[[str], None] | None = None,
    cluster: ClusterOptions | None = None,
) -> StudyDesigns:
    """Orderings and schedules for every participant (no files written).

    progress(done, total, label) as participants start (one process) or end (workers); on_note(text)
    for what happens after a stop (the participants not reached get their first valid design).

    With the spec's [objective] iterations above 0 (or search.iterations), each participant's
    design is searched for (seqsolve.search); otherwise it is the first valid ordering found.
    Ctrl-C during a search keeps the best design found so far; participants not reached yet
    then get a valid design without search, and the result says so (interrupted).
    cluster: search the participants on a Dask cluster (seqsolve.cluster) instead of
    search.workers processes here; the designs are the same.
    """
    options = options or SolveOptions()
    search = search or SearchOptions(solve=options)
    iterations = study.spec.objective.iterations if search.iterations is None else search.iterations
    if iterations == 0 and (search.budget is None or search.iterations is not None):
        found: list[ParticipantOrdering] = generate_orderings(study, options, progress)
        designs = StudyDesigns(
            Design(p.label, p.seed, p.method, p.runs, make_schedules(study, p.runs, p.seed), p.seconds) for p in found
        )
    else:
        designs = _searched(study, options, search, progress, on_step, on_note, cluster)
    report = audit_orderings(study, {d.label: d.runs for d in designs})
    if not report.valid:  # the solver layer already checked; this is the outputs' own guard
        raise InternalError(f"generated designs fail the audit: {report.violations[:3]}")
    _give_items(study, designs)
    return designs


def _give_items(study: Study, designs: StudyDesigns) -> None:
    """Each design's stimulus items (a second stage after the ordering, from the participant's seed),
    judged by the independent check; what the lists cannot balance goes into the notes."""
    if study.items is None:
        return
    for d in designs:
        index = study.participants.index(d.label)
        d.items = assign_items(study.items, index, d.label, d.runs, d.seed)
        broken = check_items(study.items, index, d.runs, d.items)
        if broken:
            raise InternalError(f"items given to participant {d.label} fail their check: {broken[:3]}")
    designs.notes.extend(balance_notes(study.items, study.facts, len(study.participants)))


def _searched(study, options, search, progress, on_step, on_note=None, cluster=None) -> StudyDesigns:
    """Every participant's search, run on its own (in search.workers processes when above 1, or on
    a Dask cluster), then a pass in participant order that searches again, knowing the earlier
    participants' designs, for any design that repeats one of them (or breaks a participants-differ
    rule). The pass runs here, whatever ran the searches, so the designs do not depend on it."""
    setup = scoring_setup(study)
    weights = Weights.from_study(study)
    method = choose_method(study, options)
    out = StudyDesigns(weights=weights)
    n = len(study.participants)
    jobs = [Job(i, label, derive_seed(study.spec.study.seed, i)) for i, label in enumerate(study.participants)]
    results: dict[int, SearchResult | None] = {}
    seconds: dict[int, float] = {}
    try:
        # one yardstick for every participant: the first participant's seed
        out.references = References.for_study(study, setup, reference_seed(study.spec.study.seed))
        if cluster is not None or (search.workers > 1 and n > 1):
            ended = []

            def on_done(job: Job) -> None:
                ended.append(job)
                if progress:
                    progress(len(ended), n, job.label)

            def on_start() -> None:  # the workers are ready: the participants' clock starts
                if progress:
                    progress(0, n, "")

            hooks = (on_step, on_done, on_start)
            if cluster is not None:
                from seqsolve.cluster import search_on_cluster

                results, stopped = search_on_cluster(study, out.references, search, jobs, cluster, *hooks)
            else:
                results, stopped = search_in_workers(study, out.references, search, jobs, search.workers, *hooks)
            seconds = {i: r.seconds for i, r in results.items() if r is not None}
            if stopped:
                raise KeyboardInterrupt
        else:
            for job in jobs:
                if progress:
                    progress(job.index, n, job.label)
                t0 = time.perf_counter()
                results[job.index] = search_participant(study, out.references, search, job, on_step)
                seconds[job.index] = time.perf_counter() - t0
                if results[job.index].stopped == "interrupted":
                    raise KeyboardInterrupt
    except KeyboardInterrupt:
        out.interrupted = True
    not_reached = [job for job in jobs if results.get(job.index) is None]
    scorers: dict = {}  # the not-reached participants' scorer, shared where the timing is fixed
    if out.interrupted and not_reached:
        if on_note:
            on_note(f"building first valid designs for the {len(not_reached)} participant(s) not reached")
        if out.references is None:  # stopped before the yardstick was made: the table needs it
            out.references = References.for_study(study, setup, reference_seed(study.spec.study.seed))
    for job in jobs:
        t0 = time.perf_counter()
        earlier = [d.runs for d in out]
        args = (study, job.label, job.seed, method, earlier, options, t0, out, setup, scorers)
        result = results.get(job.index)
        if result is not None and result.stopped == "interrupted":
            out.interrupted = True
        if result is not None and not Judge(study, earlier).ok(result.runs):
            result = None
            if not out.interrupted:
                try:
                    result = search_participant(study, out.references, search, job, on_step, earlier)
                except KeyboardInterrupt:  # stopped while this search sampled its starts
                    out.interrupted = True
                if result is not None and result.stopped == "interrupted":
                    out.interrupted = True
        if result is None:
            out.append(_unsearched(*args))  # only after a Ctrl-C
            continue
        schedules = make_schedules(study, result.runs, job.seed, result.gaps)
        info = {
            "iterations": result.iterations,
            "stopped": result.stopped,
            "stopped_by": STOPPED_BY[result.stopped],
            "moves": result.moves,
            "swaps_judged": result.judged,
            "improving_steps": result.accepted,
        }
        took = seconds.get(job.index, 0.0) + time.perf_counter() - t0
        out.append(Design(job.label, job.seed, method, result.runs, schedules, took, result.figures, info))
    if progress:
        progress(n, n, "")
    if not out.interrupted:
        _even_out(study, out, setup, search, on_step)
    timed = [d.label for d in out if d.search and d.search.get("stopped") == "budget"]
    if timed:
        out.notes.append(
            f"the wall-clock budget ended the search of participant(s) {', '.join(timed)}: how far it got "
            "depends on the machine, so a rerun may give other designs; a budget in iterations repeats exactly"
        )
    if out.interrupted:
        missing = [d.label for d in out if (d.search or {}).get("stopped") == NOT_REACHED]
        out.notes.append(
            "search interrupted: each participant has the best design found before the stop"
            + (f"; participants {', '.join(missing)} got a valid design without search" if missing else "")
        )
    return out


def _unsearched(study, label, seed, method, earlier, options, t0, designs: StudyDesigns, setup, scorers) -> Design:
    """A valid design without search, for participants after the user's stop, with its figures (scored
    as the searched ones, so the table and the manifest show them). scorers: {seed or None: Scorer},
    one for all under a fixed soa (its evaluator is then built once, not once per participant)."""
    runs = sample_orderings(study, seed, 1, earlier, options)[0]
    gaps = draw_gaps(study, runs, seed)
    key = None if gaps is None else seed
    if key not in scorers:
        scorers[key] = Scorer(study, designs.weights, designs.references, seed, gaps, setup)
    figures = scorers[key].figures(runs)
    info = {"iterations": 0, "stopped": NOT_REACHED, "stopped_by": "the stop came before this participant's search"}
    schedules = make_schedules(study, runs, seed, gaps)
    return Design(label, seed, method, runs, schedules, time.perf_counter() - t0, figures, info, gaps)


#: why an unsearched participant's design has no search (after a stop)
NOT_REACHED = "not reached"


#: rounds of rescue for participants below the spread floor
RESCUE_ROUNDS = 3


def _even_out(study, designs: StudyDesigns, setup, search: SearchOptions, on_step) -> None:
    """Bring every participant within the spec's spread of the best one's score.

    A participant below the floor gets a new search started from a random valid variation of the
    best participant's design (different from every other participant's); it keeps the result
    only if it scores higher than before.
    """
    floor_frac = 1.0 - study.spec.objective.spread
    for _ in range(RESCUE_ROUNDS):
        best = max(designs, key=lambda d: d.figures.score)
        low = [i for i, d in enumerate(designs) if d.figures.score < floor_frac * best.figures.score]
        if not low:
            return
        for i in low:
            d = designs[i]
            others = [x.runs for j, x in enumerate(designs) if j != i]
            scorer = Scorer(study, designs.weights, designs.references, d.seed, d.gaps, setup)
            s = Search(study, scorer, d.label, d.seed + 1, others, search, on_step)
            start = s.variation(best.runs)
            if start is None:
                continue
            result = s.run([start])
            if result.figures.score > d.figures.score:
                schedules = make_schedules(study, result.runs, d.seed, result.gaps)
                info = dict(d.search or {}, rescued_from=best.label, iterations_rescue=result.iterations)
                designs[i] = Design(
                    d.label,
                    d.seed,
                    d.method,
                    result.runs,
                    schedules,
                    d.seconds + result.seconds,
                    result.figures,
                    info,
                    result.gaps,
                )
    best = max(d.figures.score for d in designs)
    worst = min(d.figures.score for d in designs)
    if worst < floor_frac * best:
        designs.notes.append(
            f"spread: the lowest participant scores {worst / best:.1%} of the best, below the "
            f"{floor_frac:.0%} asked for by objective.spread; more iterations may close the gap"
        )


def efficiency_summary(study: Study, design: Design) -> dict:
    """Detection and estimation per run and for all runs (no reference designs: kept quick); without
    timing.tr only the sequence figures (largest pair-count deviation, next-trial entropy)."""
    from seqsolve.score import score_design

    if study.spec.timing.tr is None:
        return sequence_summary(study, design.runs)

    robust = study.spec.objective.hrf_robust != "canonical"
    rows = score_design(study, design.label, design.runs, design.schedules, with_references=False, hrf_family=robust)
    return {
        r.run: {
            "detection": round(r.detection, 9),
            "estimation": round(r.estimation, 9),
            "counterbalance_max": round(r.counterbalance_max, 9),
            "entropy_bits": round(r.entropy_bits, 9),
            **({"hrf_family": _rounded(r.hrf_family)} if r.hrf_family is not None else {}),
        }
        for r in rows
    }


def sequence_summary(study: Study, runs: list[np.ndarray]) -> dict:
    """Per run and for all runs: the largest deviation from ideal pair counts, the next-trial entropy."""
    from seqsolve.efficiency.metrics import conditional_entropy, counterbalance_deviation

    parts = [([r], f"{r + 1}") for r in range(len(runs))] + ([(list(range(len(runs))), "all")] if len(runs) > 1 else [])
    return {
        name: {
            "counterbalance_max": round(
                counterbalance_deviation([runs[r] for r in idx], study.facts.counts[idx])["max"], 9
            ),
            "entropy_bits": round(conditional_entropy([runs[r] for r in idx], study.facts.n_conditions), 9),
        }
        for idx, name in parts
    }


def _score_entry(study: Study, d: Design) -> dict:
    """A participant's search figures; without timing.tr only the score and counterbalance mean anything."""
    if d.figures is None:
        return {}
    score = d.figures.as_dict()
    if study.spec.timing.tr is None:
        score = {k: score[k] for k in ("score", "counterbalance")}
    return {"score": score, "search": d.search}


def _rounded(figures: dict) -> dict:
    return {k: round(v, 9) if isinstance(v, float) else v for k, v in figures.items()}


def manifest(study: Study, designs: list[Design]) -> dict:
    """What made these outputs: versions, spec hash, seeds, rule summary per participant."""
    rules = [
        {"source": s, "rule": r.sentence(study.facts), "kind": r.kind, "label": r.label}
        for r, s in zip(study.rules, study.rule_sources)
    ]
    return {
        "tool": "seqsolve",
        "versions": versions(),
        "spec": {"file": Path(study.source).name, "hash": study.spec_hash, "study": study.spec.study.name},
        "seed": study.spec.study.seed,
        "conditions": {n: int(c) for n, c in zip(study.names, study.facts.counts[0])},
        "baseline": None if study.facts.baseline is None else study.names[study.facts.baseline],
        "rules": rules,
        "timing": study.spec.timing.model_dump(mode="json"),
        **({"items": _items_summary(study)} if study.items is not None else {}),
        "analysis": study.spec.analysis.model_dump(mode="json"),
        "objective": _objective_summary(study, designs),
        "participants": [
            {
                "label": d.label,
                "seed": d.seed,
                "method": d.method,
                "rules_passed": len(rules),
                "violations": 0,
                "metrics": efficiency_summary(study, d),
                **_score_entry(study, d),
                "runs": [
                    {"run": r + 1, "trials": int(len(s.codes)), "volumes": s.n_volumes, "seconds": round(s.length, 6)}
                    for r, s in enumerate(d.schedules)
                ],
            }
            for d in designs
        ],
        **_counterbalance_summary(study, designs),
    }


def _items_summary(study: Study) -> dict:
    """The items' source and digest, the lists they rotate in, the item rules and what stays unbalanced."""
    cat = study.items
    section = study.spec.items
    return {
        "file": section.file if section is not None else None,
        "digest": cat.digest(),
        "items": len(cat.names),
        "repeat": cat.repeat,
        "rotate": [study.names[c] for c in cat.rotate],
        "list_size": len(cat.pool[0]) if cat.pool else None,
        "rules": rule_names(cat),
        "notes": balance_notes(cat, study.facts, len(study.participants)),
    }


def _counterbalance_summary(study: Study, designs: list[Design]) -> dict:
    """The [[counterbalance]] sections with their orders and each participant's (none: no key)."""
    if not study.spec.counterbalance:
        return {}
    return manifest_section(assign_study(study), [d.label for d in designs])


def _objective_summary(study: Study, designs: list[Design]) -> dict:
    """What the search was steered by, and how even the participants came out."""
    robust = study.spec.objective.hrf_robust != "canonical"
    # hrf_robust written only when asked for, so manifests of specs without it stay as they were
    out: dict = {"spec": study.spec.objective.model_dump(mode="json", exclude=None if robust else {"hrf_robust"})}
    if robust:
        out["hrf_family"] = [shape.as_dict() for shape in FAMILY]
    if isinstance(designs, StudyDesigns) and designs.weights is not None:
        out["weights"] = designs.weights.as_dict()
        timed = study.spec.timing.tr is not None  # without a TR there is nothing to divide by
        out["references"] = designs.references.as_dict() if designs.references and timed else None
        spread = designs.spread()
        out["spread"] = None if spread is None else round(spread, 9)
        out["interrupted"] = designs.interrupted
        out["notes"] = list(designs.notes)
    else:
        out["searched"] = False
    return out


def output_files(
    study: Study, designs: list[Design], front: list | None = None, onset_files: bool = False
) -> dict[str, str | bytes]:
    """{relative path: text or bytes} of the output folder (a BIDS dataset skeleton plus our own files,
    report.html among them); onset_files: also the onsets/ folder (seqsolve.io.onsets)."""
    cb = assign_study(study)
    index = {label: i for i, label in enumerate(study.participants)}
    columns = {a.section.name: [a.text_of(index[d.label]) for d in designs] for a in cb}
    files = bids_files(study, [d.label for d in designs], versions()["seqsolve"], columns)
    per_run = {d.label: [run_values(cb, index[d.label], r) for r in range(len(d.schedules))] for d in designs}
    for d in designs:
        for r, s in enumerate(d.schedules, start=1):
            items = d.items[r - 1] if d.items is not None else None
            runs_only = run_values(cb, index[d.label], r - 1, "runs")
            files[events_filename(study, d.label, r)] = events_tsv(study, s, runs_only, items)
            files[trials_filename(d.label, r)] = trials_csv(study, s, per_run[d.label][r - 1], items)
            if onset_files:
                files.update(run_onset_files(study, d.label, r, s))
    with_items = {d.label: d.items for d in designs if d.items is not None}
    files["orderings.csv"] = orderings_csv(
        study, {d.label: d.schedules for d in designs}, per_run if cb else None, with_items or None
    )
    if front:
        from seqsolve.tradeoff import front_tsv

        files["front.tsv"] = front_tsv(study, front)
    files["manifest.json"] = json.dumps(manifest(study, designs), indent=2) + "\n"
    from seqsolve.report import REPORT_NAME, report_html  # matplotlib comes in only here

    files[REPORT_NAME] = report_html(files)  # from the folder's own files, as `seqsolve report` rebuilds it
    return files


def generate(
    study: Study,
    outdir: str | Path,
    *,
    force: bool = False,
    options: SolveOptions | None = None,
    progress: Callable[[int, int, str], None] | None = None,
    search: SearchOptions | None = None,
    on_step: Callable[[Progress], None] | None = None,
    front: int = 0,
    onset_files: bool = False,
    on_note: Callable[[str], None] | None = None,
    cluster: ClusterOptions | None = None,
) -> StudyDesigns:
    """Generate every participant's design and write the output folder atomically.

    front: also search the detection/estimation trade-off at this many weightings (first
    participant's timing) and write front.tsv. onset_files: also write onsets/ (per run, a
    three-column text file per condition and a multiple-conditions .mat). cluster: search the
    participants on a Dask cluster (seqsolve.cluster); the files are the same.

    Raises
    ------
    OutputExistsError
        Before any solving, when outdir exists and force is not set.
    InfeasibleError, SolverTimeoutError
        When no valid ordering can be produced.
    """
    if front and study.spec.timing.tr is None:  # before any search: the front is made of fMRI figures
        raise SpecError(
            study.source, [Problem("timing.tr", f"--front trades detection against estimation; {NO_TR_MESSAGE}")]
        )
    ensure_writable(outdir, force)
    designs = design_study(study, options, progress, search, on_step, on_note, cluster)
    points = None
    if front:
        from seqsolve.tradeoff import trade_off_front

        try:
            points = trade_off_front(study, front, search or SearchOptions(solve=options or SolveOptions()), 0, on_step)
        except KeyboardInterrupt:
            designs.notes.append("front interrupted: front.tsv not written")
    write_folder(outdir, output_files(study, designs, points, onset_files), force=force)
    return designs
