"""The BIDS dataset skeleton around the events files: dataset_description.json, participants.tsv,
a task-level events sidecar, and the .bidsignore that keeps seqsolve's own files out of validation."""

from __future__ import annotations

import json
from pathlib import Path

from seqsolve.spec import Study

#: the BIDS specification version these files follow (1.10.0 is from memory: September 2024; the
#: files use nothing newer than 1.4, where GeneratedBy came in)
BIDS_VERSION = "1.10.0"

#: seqsolve's own files and folders in the output, which are not BIDS (gitignore-style patterns)
OWN_FILES = ("orderings.csv", "manifest.json", "front.tsv", "report.html", "compare.json", "stimulus/", "onsets/")


def subject_id(label: str) -> str:
    """The BIDS participant_id of a label: 'sub-01' for '01' (text, never a number)."""
    return f"sub-{label}"


def dataset_description_json(study: Study, version: str) -> str:
    """dataset_description.json: Name from [study] name, a raw dataset, and what generated it.

    version: seqsolve's version; the spec's file name and hash go into GeneratedBy's Description so
    the dataset says which spec made it.
    """
    spec = Path(study.source).name
    description = {
        "Name": study.spec.study.name,
        "BIDSVersion": BIDS_VERSION,
        "DatasetType": "raw",
        "GeneratedBy": [
            {
                "Name": "seqsolve",
                "Version": version,
                "Description": f"trial orderings and onsets from the spec {spec} ({study.spec_hash}); "
                "no imaging data: add each run's recordings beside its events file",
            }
        ],
    }
    return json.dumps(description, indent=2, ensure_ascii=False) + "\n"


def bidsignore() -> str:
    """.bidsignore: one pattern per line for the files that are seqsolve's own, not BIDS."""
    return "\n".join(OWN_FILES) + "\n"


def participants_tsv(labels: list[str], columns: dict[str, list[str]] | None = None) -> str:
    """participants.tsv: one participant_id per line, in the spec's order ('sub-01', ...), then a
    column per counterbalanced factor (columns: {name: one value per participant})."""
    columns = columns or {}
    head = "\t".join(["participant_id", *columns]) + "\n"
    rows = ["\t".join([subject_id(label), *(v[i] for v in columns.values())]) + "\n" for i, label in enumerate(labels)]
    return head + "".join(rows)


def participants_json(study: Study) -> str:
    """participants.json: what each counterbalanced factor's column holds, with its levels."""
    out = {}
    for c in study.spec.counterbalance:
        what = (
            "the participant's level"
            if c.scope == "participants"
            else "the participant's order of levels over runs, joined by '-' (run 1 first; it repeats in each "
            f"block of {len(c.levels)} runs)"
        )
        out[c.name] = {
            "Description": (c.description + "; " if c.description else "") + f"counterbalanced by seqsolve: {what}",
            "Levels": {lev: f"level '{lev}' of '{c.name}'" for lev in c.levels},
        }
    return json.dumps(out, indent=2, ensure_ascii=False) + "\n"


def events_sidecar_json(study: Study) -> str:
    """task-<task>_events.json: the events files' columns and each trial_type with its factor levels
    (inherited by every participant's and run's events file of the task)."""
    levels = {}
    for c in study.spec.conditions:
        if c.baseline:
            continue
        factors = ", ".join(f"{f} = {v}" for f, v in c.levels.items())
        levels[c.name] = f"condition '{c.name}'" + (f" ({factors})" if factors else "")
    start = "the first volume of the run" if study.spec.timing.tr is not None else "the start of the run"
    sidecar = {
        "onset": {"Description": f"trial onset from {start}", "Units": "s"},
        "duration": {"Description": "trial duration", "Units": "s"},
        "trial_type": {"Description": "the trial's condition (baseline trials are omitted)", "Levels": levels},
    }
    for c in study.spec.counterbalance:
        if c.scope == "runs":  # the run's level stands on each of its rows (counterbalanced over participants)
            sidecar[c.name] = {
                "Description": (c.description + "; " if c.description else "") + "the run's level, counterbalanced",
                "Levels": {lev: f"level '{lev}' of '{c.name}'" for lev in c.levels},
            }
    if study.items is not None:
        sidecar["item"] = {"Description": "the stimulus item the trial shows, from the spec's [items] (n/a: none)"}
        if "stim_file" in study.items.attributes:
            sidecar["stim_file"] = {"Description": "the item's stimulus file, as the items file gives it (n/a: none)"}
    return json.dumps(sidecar, indent=2, ensure_ascii=False) + "\n"


def bids_files(
    study: Study, labels: list[str], version: str, columns: dict[str, list[str]] | None = None
) -> dict[str, str]:
    """{relative path: text} of the dataset-level BIDS files for these participants; columns: the
    counterbalanced factors' values per participant (participants.tsv, described in participants.json)."""
    files = {
        "dataset_description.json": dataset_description_json(study, version),
        ".bidsignore": bidsignore(),
        "participants.tsv": participants_tsv(labels, columns),
        f"task-{study.spec.study.task}_events.json": events_sidecar_json(study),
    }
    if columns:
        files["participants.json"] = participants_json(study)
    return files
