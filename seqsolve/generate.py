"""The generate job: valid orderings for every participant, their schedules, and the output folder."""

from __future__ import annotations

import json
import platform
from collections.abc import Callable
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path

import numpy as np

from seqsolve.audit import audit_orderings
from seqsolve.errors import InternalError
from seqsolve.io.atomic import ensure_writable, write_folder
from seqsolve.io.tables import events_filename, events_tsv, orderings_csv
from seqsolve.solve import ParticipantOrdering, SolveOptions, generate_orderings
from seqsolve.spec import Study
from seqsolve.timing import RunSchedule, make_schedules


@dataclass
class Design:
    """One participant's result: orderings and schedules."""

    label: str
    seed: int
    method: str
    runs: list[np.ndarray]
    schedules: list[RunSchedule]
    seconds: float


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
) -> list[Design]:
    """Orderings and schedules for every participant (no files written)."""
    found: list[ParticipantOrdering] = generate_orderings(study, options, progress)
    designs = [
        Design(p.label, p.seed, p.method, p.runs, make_schedules(study, p.runs, p.seed), p.seconds) for p in found
    ]
    report = audit_orderings(study, {d.label: d.runs for d in designs})
    if not report.valid:  # the solver layer already checked; this is the outputs' own guard
        raise InternalError(f"generated designs fail the audit: {report.violations[:3]}")
    return designs


def efficiency_summary(study: Study, design: Design) -> dict:
    """Detection and estimation per run and for all runs (no reference designs: kept quick)."""
    from seqsolve.score import score_design

    rows = score_design(study, design.label, design.runs, design.schedules, with_references=False)
    return {
        r.run: {
            "detection": round(r.detection, 9),
            "estimation": round(r.estimation, 9),
            "counterbalance_max": round(r.counterbalance_max, 9),
            "entropy_bits": round(r.entropy_bits, 9),
        }
        for r in rows
    }


def manifest(study: Study, designs: list[Design]) -> dict:
    """What made these outputs: versions, spec hash, seeds, rule summary per participant."""
    rules = [
        {"source": s, "rule": r.sentence(study.facts), "kind": r.kind} for r, s in zip(study.rules, study.rule_sources)
    ]
    return {
        "tool": "seqsolve",
        "versions": versions(),
        "spec": {"file": Path(study.source).name, "hash": study.spec_hash},
        "seed": study.spec.study.seed,
        "conditions": {n: int(c) for n, c in zip(study.names, study.facts.counts[0])},
        "baseline": None if study.facts.baseline is None else study.names[study.facts.baseline],
        "rules": rules,
        "analysis": study.spec.analysis.model_dump(mode="json"),
        "participants": [
            {
                "label": d.label,
                "seed": d.seed,
                "method": d.method,
                "rules_passed": len(rules),
                "violations": 0,
                "metrics": efficiency_summary(study, d),
                "runs": [
                    {"run": r + 1, "trials": int(len(s.codes)), "volumes": s.n_volumes, "seconds": round(s.length, 6)}
                    for r, s in enumerate(d.schedules)
                ],
            }
            for d in designs
        ],
    }


def output_files(study: Study, designs: list[Design]) -> dict[str, str]:
    files = {}
    for d in designs:
        for r, s in enumerate(d.schedules, start=1):
            files[events_filename(study, d.label, r)] = events_tsv(study, s)
    files["orderings.csv"] = orderings_csv(study, {d.label: d.schedules for d in designs})
    files["manifest.json"] = json.dumps(manifest(study, designs), indent=2) + "\n"
    return files


def generate(
    study: Study,
    outdir: str | Path,
    *,
    force: bool = False,
    options: SolveOptions | None = None,
    progress: Callable[[int, int, str], None] | None = None,
) -> list[Design]:
    """Generate every participant's design and write the output folder atomically.

    Raises
    ------
    OutputExistsError
        Before any solving, when outdir exists and force is not set.
    InfeasibleError, SolverTimeoutError
        When no valid ordering can be produced.
    """
    ensure_writable(outdir, force)
    designs = design_study(study, options, progress)
    write_folder(outdir, output_files(study, designs), force=force)
    return designs
