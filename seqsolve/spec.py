"""The spec file: pydantic models of every section, TOML loading, and errors that name file and field.

Validation happens once, here; the rest of seqsolve trusts a loaded Study.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import re
import tomllib
import types
import typing
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Literal, Union

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, ValidationInfo, field_validator, model_validator

from seqsolve.counterbalance import Counterbalance, section_problems
from seqsolve.errors import Problem, SpecError, shorten
from seqsolve.io import limits
from seqsolve.rules import RULE_KINDS, AnyRule, Rule, StudyFacts

if typing.TYPE_CHECKING:  # pragma: no cover
    from seqsolve.items import ItemCatalogue

NAME_PATTERN = r"^[A-Za-z][A-Za-z0-9_]*$"
LABEL_PATTERN = r"^[A-Za-z0-9]+$"  # BIDS labels are alphanumeric
# names that pandas' read_csv (and R, spreadsheets) turn into missing values
MISSING_MARKERS = {"na", "nan", "null", "none", "n/a", "nat", "true", "false"}


NAME_CHARS = 64  # condition, factor, level and participant names
TEXT_CHARS = 200  # titles and labels
CONTRAST_CHARS = 1000  # one contrast expression


class Strict(BaseModel):
    # inf and NaN are refused everywhere: no figure of a design can be computed from them
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


def _seconds_within_limit(value: float | None, info: ValidationInfo) -> float | None:
    """A time in seconds at most the SECONDS limit (a slip such as ms for s, or 1e300)."""
    if value is not None and value > limits.SECONDS.value():
        raise ValueError(f"{value:g} s is too long; {limits.SECONDS.hint()}")
    return value


def _step_at_least_limit(value: float | None, info: ValidationInfo) -> float | None:
    """A time step of at least SMALLEST_STEP ms: finer ones only multiply the arrays' sizes."""
    smallest = limits.SMALLEST_STEP.value() / 1000
    if value is not None and value < smallest - 1e-12:
        raise ValueError(f"{value:g} s is below {smallest:g} s; {limits.SMALLEST_STEP.hint()}")
    return value


def _seconds(*fields: str):
    return field_validator(*fields)(_seconds_within_limit)


def _steps(*fields: str):
    return field_validator(*fields)(_step_at_least_limit)


class StudySection(Strict):
    """[study]: who and how much."""

    name: str = Field(min_length=1, max_length=TEXT_CHARS, description="A human-readable title.")
    task: str = Field(
        pattern=LABEL_PATTERN,
        max_length=NAME_CHARS,
        description="BIDS task label (letters and digits), used in file names.",
    )
    participants: int | list[Annotated[str, Field(pattern=LABEL_PATTERN, max_length=NAME_CHARS)]] = Field(
        description="How many participants (labelled 01, 02, ...) or a list of BIDS labels."
    )
    runs: int = Field(default=1, ge=1, le=100, description="Runs per participant.")
    trials_per_run: int | None = Field(default=None, ge=1, description="Needed when conditions give a 'share'.")
    seed: int = Field(default=0, ge=0, lt=2**63, description="Master seed; each participant's seed derives from it.")

    @field_validator("participants")
    @classmethod
    def _some(cls, v):
        most = int(limits.PARTICIPANTS.value())
        if isinstance(v, int) and not 1 <= v <= most:
            raise ValueError(f"give between 1 and {most:,} participants ({limits.PARTICIPANTS.hint()})")
        if isinstance(v, list) and (not v or len(set(v)) != len(v)):
            raise ValueError("participant labels must be a non-empty list without repeats")
        if isinstance(v, list) and len(v) > most:
            raise ValueError(f"{len(v):,} participant labels; {limits.PARTICIPANTS.hint()}")
        return v

    @field_validator("trials_per_run")
    @classmethod
    def _run_within_limit(cls, v):
        if v is not None and v > limits.TRIALS_PER_RUN.value():
            raise ValueError(f"{v:,} trials per run; {limits.TRIALS_PER_RUN.hint()}")
        return v


class Condition(Strict):
    """[[conditions]]: one trial type."""

    name: str = Field(
        pattern=NAME_PATTERN, max_length=NAME_CHARS, description="Letters, digits and '_', starting with a letter."
    )
    trials: int | None = Field(default=None, ge=0, description="Trials of this condition in each run.")
    share: float | None = Field(default=None, gt=0, le=1, description="Or: fraction of study.trials_per_run.")
    duration: float | None = Field(default=None, gt=0, description="Trial duration in seconds (default: the timing's).")
    baseline: bool = Field(default=False, description="Mark the fixation / null condition.")
    levels: dict[
        Annotated[str, Field(pattern=NAME_PATTERN, max_length=NAME_CHARS)],
        Annotated[str, Field(pattern=NAME_PATTERN, max_length=NAME_CHARS)],
    ] = Field(default_factory=dict, description="Factor levels, e.g. {valence = 'positive', size = 'large'}.")
    items: list[Annotated[str, Field(min_length=1, max_length=TEXT_CHARS)]] | None = Field(
        default=None,
        max_length=100_000,
        description="Stimulus items shown in this condition's trials (names; attributes come from [items] file).",
    )

    @field_validator("name")
    @classmethod
    def _not_missing_marker(cls, v: str) -> str:
        if v.lower() in MISSING_MARKERS:
            raise ValueError(
                f"'{v}' reads as a missing value in pandas, R and spreadsheets; choose another name, e.g. 'rest'"
            )
        return v

    @model_validator(mode="after")
    def _count_given(self):
        if (self.trials is None) == (self.share is None):
            raise ValueError("give exactly one of 'trials' (per run) or 'share' (of study.trials_per_run)")
        return self

    _duration_bounded = _seconds("duration")

    @field_validator("trials")
    @classmethod
    def _run_within_limit(cls, v):
        if v is not None and v > limits.TRIALS_PER_RUN.value():
            raise ValueError(f"{v:,} trials per run; {limits.TRIALS_PER_RUN.hint()}")
        return v


class FixedGap(Strict):
    distribution: Literal["fixed"]
    value: float = Field(ge=0, description="Seconds.")

    _value_bounded = _seconds("value")


class _Bounded(Strict):
    """Gaps between min and max seconds."""

    min: float = Field(default=0.0, ge=0)
    max: float = Field(gt=0)

    @model_validator(mode="after")
    def _order(self):
        if self.max <= self.min:
            raise ValueError("'max' must be greater than 'min'")
        return self

    _bounded = _seconds("min", "max")


class UniformGap(_Bounded):
    distribution: Literal["uniform"]
    min: float = Field(ge=0)


class ExponentialGap(_Bounded):
    distribution: Literal["exponential"]
    mean: float = Field(gt=0, description="Mean of the exponential before truncation, in seconds.")

    _mean_bounded = _seconds("mean")


class ChoiceGap(Strict):
    distribution: Literal["choice"]
    values: list[Annotated[float, Field(ge=0)]] = Field(min_length=1, max_length=10_000)
    weights: list[Annotated[float, Field(gt=0, le=1e6)]] | None = Field(default=None, max_length=10_000)

    @model_validator(mode="after")
    def _same_length(self):
        if self.weights is not None and len(self.weights) != len(self.values):
            raise ValueError("'weights' needs one entry per value")
        if max(self.values) > limits.SECONDS.value():
            raise ValueError(f"a value of {max(self.values):g} s; {limits.SECONDS.hint()}")
        return self


GapModel = Annotated[FixedGap | UniformGap | ExponentialGap | ChoiceGap, Field(discriminator="distribution")]


class Timing(Strict):
    """[timing]: TR and the spacing of trials, in seconds."""

    tr: float | None = Field(
        default=None,
        gt=0,
        description="Repetition time in seconds; leave out for EEG/behavioural studies (no fMRI scoring).",
    )
    soa: float | None = Field(default=None, gt=0, description="Fixed onset-to-onset time.")
    trial_duration: float | None = Field(default=None, gt=0, description="Default trial duration.")
    iti: GapModel | None = Field(default=None, description="Gap from one trial's end to the next onset.")
    grid: float = Field(default=0.1, gt=0, description="Onsets and gaps are multiples of this (seconds).")
    lead_in: float = Field(default=0.0, ge=0, description="Baseline before the first trial.")
    lead_out: float = Field(default=0.0, ge=0, description="Baseline after the last trial ends.")
    volumes: int | None = Field(default=None, ge=1, description="Fixed run length in volumes (optional).")

    @model_validator(mode="after")
    def _one_spacing(self):
        if (self.soa is None) == (self.iti is None):
            raise ValueError("give exactly one of 'soa' (fixed onset-to-onset) or 'iti' (gap after each trial)")
        if self.iti is not None and self.trial_duration is None:
            raise ValueError("with 'iti', give 'trial_duration' (conditions may override it with 'duration')")
        if self.volumes is not None and self.tr is None:
            raise ValueError("'volumes' counts scanner volumes: give 'tr' too, or leave 'volumes' out")
        return self

    _bounded = _seconds("tr", "soa", "trial_duration", "grid", "lead_in", "lead_out")
    _fine_enough = _steps("grid", "tr")


class CustomHRF(Strict):
    """A response shape given as samples."""

    samples: list[Annotated[float, Field(ge=-1e6, le=1e6)]] = Field(
        min_length=2, max_length=100_000, description="Response values from time 0 on."
    )
    step: float = Field(gt=0, description="Seconds between samples.")

    _fine_enough = _steps("step")

    @model_validator(mode="after")
    def _bounded(self):
        if not any(self.samples):
            raise ValueError("every sample is 0: a response of this shape cannot be detected")
        if self.step * len(self.samples) > limits.SECONDS.value():
            raise ValueError(f"the response lasts {self.step * len(self.samples):g} s; {limits.SECONDS.hint()}")
        return self


class Analysis(Strict):
    """[analysis]: the GLM the design is scored for."""

    hrf: Literal["double-gamma", "double-gamma-derivative"] | CustomHRF = Field(
        default="double-gamma", description="Canonical double gamma, with its temporal derivative, or custom samples."
    )
    resolution: float = Field(default=0.1, gt=0, le=1, description="Fine time grid of the regressors, in seconds.")
    sample_offset: float = Field(default=0.0, ge=0, description="Seconds into each TR at which the volume is sampled.")
    high_pass_cutoff: float = Field(
        default=128.0, ge=0, description="Discrete-cosine high-pass cutoff in seconds; 0: none."
    )
    drift_degree: int = Field(default=0, ge=0, le=6, description="Polynomial drift terms per run beyond the intercept.")
    ar1: float = Field(
        default=0.0,
        ge=0,
        lt=1,
        description="AR(1) coefficient of the noise, for prewhitening; figures are per unit innovation variance.",
    )
    contrasts: Annotated[list[str], Field(max_length=1000)] | Literal["each-vs-baseline", "all-pairs"] = Field(
        default="each-vs-baseline", description="Expressions like 'gain - loss', or a named set."
    )
    fir_window: float = Field(default=20.0, gt=0, description="Length of the estimated response (FIR), in seconds.")
    fir_step: float | None = Field(default=None, gt=0, description="FIR bin width in seconds (default: the TR).")
    criterion: Literal["A", "D"] = Field(
        default="A",
        description="A: 1/trace(C M^-1 C'), summed over contrasts (not averaged); "
        "D: det(C M^-1 C')^(-1/q), for linearly independent contrasts.",
    )

    _fine_enough = _steps("resolution", "fir_step")
    _bounded_seconds = _seconds("sample_offset", "high_pass_cutoff", "fir_window", "fir_step")

    @field_validator("contrasts")
    @classmethod
    def _short_contrasts(cls, v):
        for i, text in enumerate([] if isinstance(v, str) else v, start=1):
            if len(text) > CONTRAST_CHARS:
                raise ValueError(f"contrast {i} has {len(text):,} characters; at most {CONTRAST_CHARS} are read")
        return v

    @model_validator(mode="after")
    def _bounded(self):
        if self.fir_step is not None and self.fir_window / self.fir_step > limits.FIR_BINS.value():
            raise ValueError(
                f"fir_window / fir_step = {self.fir_window / self.fir_step:,.0f} bins; {limits.FIR_BINS.hint()}"
            )
        return self


class Objective(Strict):
    """[objective]: what the search steers toward, and how long it searches per participant.

    Each figure is relative to a reference for the same counts and timing (see seqsolve.objective):
    detection to the best block design's, estimation to the mean of random orderings', and
    counterbalancing as 1 / (1 + RMS deviation of the pair counts from ideal). The score is their
    weighted mean.
    """

    detection: float = Field(
        default=1.0, ge=0, le=1e6, description="Weight of detection (relative to the best block design)."
    )
    estimation: float = Field(
        default=1.0, ge=0, le=1e6, description="Weight of estimation (relative to random orderings)."
    )
    counterbalance: float = Field(default=0.0, ge=0, le=1e6, description="Weight of first-order counterbalancing.")
    iterations: int = Field(
        default=30,
        ge=0,
        le=1_000_000,
        description="Search rounds per participant (each about 0.1-0.5 s: thousands of moves); 0: no search.",
    )
    stall: int = Field(
        default=10, ge=1, le=1_000_000, description="Stop a participant's search after this many rounds without gain."
    )
    spread: float = Field(
        default=0.05, ge=0, lt=1, description="Every participant's score within this fraction of the best one's."
    )
    hrf_robust: Literal["canonical", "worst", "mean"] = Field(
        default="canonical",
        description=(
            "Detection under the canonical HRF, or its worst or mean over a family of 12 plausible shapes "
            "(peak 4-7 s, three undershoots; seqsolve/efficiency/hrf_family.py). Not with a custom hrf."
        ),
    )

    @model_validator(mode="after")
    def _some_weight(self):
        if self.detection + self.estimation + self.counterbalance <= 0:
            raise ValueError("at least one of detection, estimation, counterbalance must have a weight above 0")
        return self


class AttributeRun(Strict):
    """[[items.rules]] kind = "attribute-run": items sharing a value of an attribute, not too many in a row."""

    kind: Literal["attribute-run"]
    attribute: str = Field(min_length=1, max_length=NAME_CHARS, description="A column of the items file.")
    length: int = Field(
        ge=1, le=1000, description="Most trials in a row whose items share a value (1: never two in a row)."
    )
    label: str | None = Field(default=None, max_length=TEXT_CHARS, description="Optional name shown in reports.")


class ItemsSection(Strict):
    """[items]: stimulus items given to trials after the ordering is made (seqsolve/items.py)."""

    file: str | None = Field(
        default=None,
        max_length=1000,
        description="CSV or TSV file of items, relative to the spec: column 'item', optional 'condition', "
        "any other columns are attributes ('stim_file' also goes to events.tsv).",
    )
    repeat: bool = Field(default=False, description="May an item be shown more than once to a participant.")
    rotate: list[Annotated[str, Field(max_length=NAME_CHARS)]] = Field(
        default_factory=list,
        max_length=1000,
        description="Conditions whose items form one pool, split into as many lists, rotated across "
        "participants (Latin square): each item appears in each of these conditions equally often.",
    )
    rules: list[AttributeRun] = Field(default_factory=list, max_length=100)


class RuleSet(Strict):
    """A file of ready-made rules in rules/."""

    description: str = ""
    rules: list[AnyRule] = Field(default_factory=list)


class Spec(Strict):
    """The whole spec file."""

    study: StudySection
    conditions: list[Condition] = Field(min_length=2, max_length=1000)
    timing: Timing
    include: list[Annotated[str, Field(max_length=1000)]] = Field(
        default_factory=list, max_length=100, description="Rule sets from rules/ (name or .toml path)."
    )
    rules: list[AnyRule] = Field(default_factory=list, max_length=10_000)
    analysis: Analysis = Field(default_factory=Analysis)
    objective: Objective = Field(default_factory=Objective)
    counterbalance: list[Counterbalance] = Field(
        default_factory=list, max_length=20, description="Factors balanced over participants (run orders, mappings)."
    )
    items: ItemsSection | None = None


@dataclass(frozen=True)
class Study:
    """A loaded, validated spec with names resolved: what every other part of seqsolve takes."""

    spec: Spec
    source: str
    rules: tuple[Rule, ...]
    rule_sources: tuple[str, ...]
    facts: StudyFacts
    participants: tuple[str, ...]
    spec_hash: str
    items: ItemCatalogue | None = None  # stimulus items ([items], conditions' items), seqsolve/items.py

    @property
    def names(self) -> tuple[str, ...]:
        return self.facts.names


# ----------------------------------------------------------------------------------------------
# loading


def bundled_rule_dirs() -> list[Path]:
    here = Path(__file__).resolve().parent
    return [here.parent / "rules", here / "rule_sets"]


def load_study(path: str | Path, *, seed: int | None = None) -> Study:
    """Read, validate and resolve a spec file.

    Parameters
    ----------
    path : the TOML spec.
    seed : overrides study.seed when given.

    Raises
    ------
    SpecError
        Listing every problem, each with its field path and what to do.
    """
    path = Path(path)
    return study_from_mapping(_read_toml(path), source=str(path), seed=seed)


def study_from_mapping(data: dict, *, source: str = "<spec>", seed: int | None = None) -> Study:
    """Validate a spec given as a dict (the parsed TOML); includes resolve relative to source."""
    spec = _validate(Spec, data, source)
    rules, sources = _gather_rules(spec, Path(source))
    problems = _check_references(spec, rules, sources) + _check_counterbalance(spec) + _check_untimed(spec)
    if problems:
        raise SpecError(source, problems)
    spec = _untimed_objective(spec)
    if seed is not None:
        spec = spec.model_copy(update={"study": spec.study.model_copy(update={"seed": seed})})
    facts = _facts(spec, source)
    from seqsolve.items import load_items  # it reads the spec's models

    catalogue = load_items(spec, Path(source), facts)
    canonical = json.dumps(
        {
            "spec": _hashed(spec),
            "rules": [r.model_dump(mode="json") for r in rules],
            # the items file's content, so the hash names the items as well as the spec
            **({"items": catalogue.digest()} if catalogue is not None else {}),
        },
        sort_keys=True,
    )
    return Study(
        spec=spec,
        source=source,
        rules=tuple(rules),
        rule_sources=tuple(sources),
        facts=facts,
        participants=participant_labels(spec.study.participants),
        spec_hash="sha256:" + hashlib.sha256(canonical.encode()).hexdigest(),
        items=catalogue,
    )


def _hashed(spec: Spec) -> dict:
    """The spec as hashed: fields left at a default they had before they existed (items not given,
    objective.hrf_robust "canonical") stay out, so earlier specs keep their hash."""
    out = spec.model_dump(mode="json", exclude={"rules", "include"})
    if out["objective"].get("hrf_robust") == "canonical":
        out["objective"].pop("hrf_robust")
    if out.get("items") is None:
        out.pop("items", None)
    for c in out["conditions"]:
        if c.get("items") is None:
            c.pop("items", None)
    return out


def participant_labels(participants: int | list[str]) -> tuple[str, ...]:
    if isinstance(participants, list):
        return tuple(participants)
    width = max(2, len(str(participants)))
    return tuple(str(i).zfill(width) for i in range(1, participants + 1))


def _read_toml(path: Path) -> dict:
    try:
        if not path.is_file():
            raise SpecError(str(path), [Problem("", "file not found; give the path of a .toml spec (see examples/)")])
        size = path.stat().st_size
        if size > limits.SPEC_KB.value() * 1000:
            raise SpecError(str(path), [Problem("", f"the file has {size / 1000:,.0f} kB; {limits.SPEC_KB.hint()}")])
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise SpecError(str(path), [Problem("", "not a text file in UTF-8; a spec is a TOML text file")]) from None
    except (OSError, ValueError) as exc:
        raise SpecError(str(path), [Problem("", f"cannot be read ({getattr(exc, 'strerror', None) or exc})")]) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(
            str(path), [Problem("", f"TOML syntax error: {exc}. Check quotes, '=' and [section] headers.")]
        ) from None
    except RecursionError:
        raise SpecError(
            str(path), [Problem("", "arrays or tables nested too deeply; a spec nests a few levels")]
        ) from None


def _validate(model: type[BaseModel], data: dict, source: str):
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        errors = exc.errors()
        # a table where a name is also allowed (hrf): the name's "should be 'a' or 'b'" says nothing useful
        shown = [e for e in errors if not (e["type"] == "literal_error" and isinstance(e.get("input"), dict))]
        raise SpecError(source, [_problem_or_plain(model, data, e) for e in shown or errors]) from None


def _problem_or_plain(model: type[BaseModel], data: dict, err: dict) -> Problem:
    """The teaching message of _problem; pydantic's own if the value is too odd for it (a table as a
    'kind', ...): a strange spec must still get its field named, never a crash while explaining."""
    try:
        return _problem(model, data, err)
    except Exception:  # noqa: BLE001 - the plain message is always available
        return Problem(_path(list(err["loc"])), f"{err['msg']}; got {shorten(err.get('input'))}")


def _gather_rules(spec: Spec, path: Path) -> tuple[list[Rule], list[str]]:
    rules: list[Rule] = []
    sources: list[str] = []
    for i, name in enumerate(spec.include, start=1):
        file = _find_rule_set(name, path)
        if file is None:
            known = sorted({p.stem for d in bundled_rule_dirs() if d.is_dir() for p in d.glob("*.toml")})
            raise SpecError(
                str(path),
                [
                    Problem(
                        f"include[{i}]",
                        f"no rule set {shorten(name)}; give a .toml path or one of: {', '.join(known)}",
                    )
                ],
            )
        ruleset = _validate(RuleSet, _read_toml(file), str(file))
        rules.extend(ruleset.rules)
        sources.extend(f"{file.name} rules[{j}]" for j in range(1, len(ruleset.rules) + 1))
    rules.extend(spec.rules)
    sources.extend(f"rules[{j}]" for j in range(1, len(spec.rules) + 1))
    return rules, sources


BUNDLED_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,63}$")


def _find_rule_set(name: str, spec_path: Path) -> Path | None:
    """A .toml path (relative to the spec) or the plain name of a bundled set; a bare name never
    leaves the bundled folders (no '/', no '..')."""
    if "\x00" in name:
        return None
    try:
        if name.endswith(".toml"):
            p = (spec_path.parent / name).resolve()
            return p if p.is_file() else None
        if not BUNDLED_NAME.match(name):
            return None
        for d in bundled_rule_dirs():
            p = d / f"{name}.toml"
            if p.is_file():
                return p
    except (OSError, ValueError):  # a name the file system cannot take
        return None
    return None


def _check_references(spec: Spec, rules: list[Rule], sources: list[str]) -> list[Problem]:
    """Names in rules must be conditions or factor levels; counts and timing must add up."""
    problems = []
    names = [c.name for c in spec.conditions]
    levels = _level_map(spec)
    seen = set()
    for i, c in enumerate(spec.conditions, start=1):
        if c.name in seen:
            problems.append(Problem(f"conditions[{i}].name", f"'{c.name}' is declared twice; names must differ"))
        seen.add(c.name)
    if sum(c.baseline for c in spec.conditions) > 1:
        problems.append(Problem("conditions", "mark at most one condition with baseline = true"))
    if any(c.share is not None for c in spec.conditions) and spec.study.trials_per_run is None:
        problems.append(Problem("study.trials_per_run", "conditions give a 'share', so say how many trials a run has"))
    for rule, where in zip(rules, sources):
        for item in rule.condition_names():
            if "=" in item:
                factor, level = (s.strip() for s in item.split("=", 1))
                if factor not in levels:
                    problems.append(
                        Problem(
                            where,
                            f"no factor {shorten(factor)}{_suggest(factor, levels)}; factors come from conditions' 'levels'",
                        )
                    )
                elif level not in levels[factor]:
                    problems.append(
                        Problem(
                            where,
                            f"factor '{factor}' has no level {shorten(level)}; its levels: {', '.join(levels[factor])}",
                        )
                    )
            elif item not in names:
                problems.append(
                    Problem(
                        where,
                        f"unknown condition {shorten(item)}{_suggest(item, names)}; conditions: {', '.join(names)}",
                    )
                )
    problems += _check_rule_values(rules, sources)
    problems += _check_contrasts(spec)
    if spec.objective.hrf_robust != "canonical" and isinstance(spec.analysis.hrf, CustomHRF):
        problems.append(
            Problem(
                "objective.hrf_robust",
                f"'{spec.objective.hrf_robust}' needs the double-gamma family, and analysis.hrf is a custom "
                'shape: use hrf_robust = "canonical", or hrf = "double-gamma"',
            )
        )
    if not problems and all(c.share is None for c in spec.conditions):
        if sum(c.trials for c in spec.conditions) == 0:
            problems.append(Problem("conditions", "every condition has 0 trials; give some trials"))
        problems += _check_sizes(spec)
    return problems


def _check_rule_values(rules: list[Rule], sources: list[str]) -> list[Problem]:
    """Numbers in rules within what a participant's trials allow, texts short (the rule kinds' own
    models check signs and kinds; this bounds what would only make the solver's model huge or invalid)."""
    most = int(limits.TRIALS_PER_PARTICIPANT.value())
    out = []
    for rule, where in zip(rules, sources):
        for key, value in rule.model_dump().items():
            values = value if isinstance(value, list) else [value]
            if any(isinstance(v, int) and not isinstance(v, bool) and abs(v) > most for v in values):
                out.append(
                    Problem(f"{where}.{key}", f"a number above {most:,}; {limits.TRIALS_PER_PARTICIPANT.hint()}")
                )
            if any(isinstance(v, str) and len(v) > TEXT_CHARS for v in values):
                out.append(Problem(f"{where}.{key}", f"a text longer than {TEXT_CHARS} characters"))
    return out


#: column names a counterbalanced factor may not take: the output tables' own, and the events columns
#: BIDS gives a meaning of its own (sample, response_time, value, HED, stim_file; BIDS 1.x, from memory),
#: and item, the stimulus items' column
TAKEN_COLUMNS = {
    "participant",
    "participant_id",
    "run",
    "position",
    "condition",
    "onset",
    "duration",
    "gap",
    "trial_type",
    "sample",
    "response_time",
    "value",
    "hed",
    "stim_file",
    "item",
}


def _check_counterbalance(spec: Spec) -> list[Problem]:
    """Each [[counterbalance]] section fits the study's runs and participants, and its name is a free column."""
    factors = set(_level_map(spec))
    n_participants = len(participant_labels(spec.study.participants))
    out, seen = [], set()
    for i, section in enumerate(spec.counterbalance, start=1):
        where = f"counterbalance[{i}]"
        if section.name in seen or section.name in factors or section.name.lower() in TAKEN_COLUMNS:
            out.append(
                Problem(
                    f"{where}.name",
                    f"'{section.name}' is already a column (a condition factor, another counterbalanced factor or "
                    "a fixed column of the trial tables); choose another name",
                )
            )
        seen.add(section.name)
        out += [
            Problem(f"{where}.{field}", message)
            for field, message in section_problems(section, n_participants, spec.study.runs)
        ]
    return out


#: [objective] weights that need an fMRI analysis, hence timing.tr
TIMED_WEIGHTS = ("detection", "estimation")


def _check_untimed(spec: Spec) -> list[Problem]:
    """Without timing.tr there is no fMRI analysis: [analysis] and detection/estimation weights are refused."""
    if spec.timing.tr is not None:
        return []
    out = []
    if "analysis" in spec.model_fields_set:
        out.append(
            Problem(
                "analysis",
                "[analysis] describes an fMRI GLM, which needs the scanner's TR: give timing.tr, or leave "
                "[analysis] out for an EEG/behavioural design",
            )
        )
    given = spec.objective.model_fields_set
    for name in TIMED_WEIGHTS:
        if name in given and getattr(spec.objective, name) > 0:
            out.append(
                Problem(
                    f"objective.{name}",
                    f"{name} is an fMRI efficiency and needs timing.tr; without a TR the objective can weigh "
                    f"counterbalance only: set {name} = 0 (or leave it out), or give timing.tr",
                )
            )
    if not out and "counterbalance" in given and spec.objective.counterbalance <= 0:
        out.append(
            Problem(
                "objective.counterbalance",
                "without timing.tr the search steers by counterbalance only: give it a weight above 0, "
                "or iterations = 0 for the first valid ordering without search",
            )
        )
    return out


def _untimed_objective(spec: Spec) -> Spec:
    """Without timing.tr the unset detection/estimation weights default to 0 and counterbalance to 1."""
    if spec.timing.tr is not None:
        return spec
    o = spec.objective
    weights = {"detection": 0.0, "estimation": 0.0}
    if "counterbalance" not in o.model_fields_set:
        weights["counterbalance"] = 1.0
    return spec.model_copy(update={"objective": o.model_copy(update=weights)})


def _check_sizes(spec: Spec) -> list[Problem]:
    """Trials per participant, and a run's length in volumes and fine-grid samples, within the limits."""
    per_run = sum(c.trials for c in spec.conditions)
    total = per_run * spec.study.runs
    out = []
    if per_run > limits.TRIALS_PER_RUN.value():
        out.append(Problem("conditions", f"{per_run:,} trials per run; {limits.TRIALS_PER_RUN.hint()}"))
    if total > limits.TRIALS_PER_PARTICIPANT.value():
        out.append(Problem("conditions", f"{total:,} trials per participant; {limits.TRIALS_PER_PARTICIPANT.hint()}"))
    seconds = _run_seconds(spec, per_run)
    t = spec.timing
    volumes = t.volumes if t.volumes is not None else seconds / t.tr if t.tr is not None else 0
    if volumes > limits.VOLUMES_PER_RUN.value():
        out.append(Problem("timing", f"a run lasts about {volumes:,.0f} volumes; {limits.VOLUMES_PER_RUN.hint()}"))
    samples = max(seconds, (t.volumes or 0) * (t.tr or 0)) / spec.analysis.resolution
    if samples > limits.FINE_SAMPLES_PER_RUN.value():
        out.append(
            Problem(
                "analysis.resolution",
                f"a run lasts about {samples:,.0f} samples of {spec.analysis.resolution:g} s; "
                f"{limits.FINE_SAMPLES_PER_RUN.hint()}",
            )
        )
    return out


def _run_seconds(spec: Spec, n_trials: int) -> float:
    """An upper estimate of one run's length in seconds: trials at the longest spacing the timing allows."""
    t = spec.timing
    longest = max([c.duration or 0.0 for c in spec.conditions] + [t.trial_duration or 0.0])
    if t.soa is not None:
        spacing = max(t.soa, longest)
    else:
        gap = t.iti
        widest = (
            gap.value if gap.distribution == "fixed" else max(gap.values) if gap.distribution == "choice" else gap.max
        )
        spacing = longest + widest
    return t.lead_in + n_trials * spacing + t.lead_out


def _check_contrasts(spec: Spec) -> list[Problem]:
    from seqsolve.efficiency.contrasts import ContrastSyntaxError, parse_contrast

    modelled = [c.name for c in spec.conditions if not c.baseline]
    if isinstance(spec.analysis.contrasts, str):
        return _check_d_independent(spec, modelled, None)
    out, rows = [], []
    for i, text in enumerate(spec.analysis.contrasts, start=1):
        try:
            rows.append(parse_contrast(text, modelled))
        except ContrastSyntaxError as exc:
            out.append(Problem(f"analysis.contrasts[{i}]", str(exc)))
        except RecursionError:
            out.append(Problem(f"analysis.contrasts[{i}]", "parentheses nested too deeply"))
    return out or _check_d_independent(spec, modelled, rows)


def _check_d_independent(spec: Spec, modelled: list[str], rows: list | None) -> list[Problem]:
    """With criterion = "D" the contrasts must be linearly independent: D-efficiency is
    det(C M^-1 C')^(-1/q), and a redundant C (rank < q rows) makes that determinant 0 for every
    design, so the figure says nothing. (A, 1/trace, takes redundant sets: nothing to check.)"""
    from seqsolve.efficiency.setup import named_contrasts  # setup imports this module

    if spec.analysis.criterion != "D" or not modelled:
        return []
    if rows is None:
        c, labels = named_contrasts(spec.analysis.contrasts, modelled)
    else:
        c, labels = np.array(rows), list(spec.analysis.contrasts)
    rank = int(np.linalg.matrix_rank(c))
    if rank == c.shape[0]:
        return []
    first = next(i for i in range(c.shape[0]) if np.linalg.matrix_rank(c[: i + 1]) <= i)
    which = (
        f"'{spec.analysis.contrasts}' gives {c.shape[0]} contrasts of rank {rank}"
        if rows is None
        else f"contrast {first + 1} ({shorten(labels[first])}) is a combination of the ones before it"
    )
    return [
        Problem(
            "analysis.contrasts",
            f'with criterion = "D" the contrasts must be linearly independent: {which}, so '
            "det(C M^-1 C') is 0 for every design. List an independent set (at most "
            f'{rank} here, e.g. each condition minus one reference condition), or use criterion = "A", '
            "which takes redundant contrasts",
        )
    ]


def _level_map(spec: Spec) -> dict[str, dict[str, list[str]]]:
    out: dict[str, dict[str, list[str]]] = {}
    for c in spec.conditions:
        for factor, level in c.levels.items():
            out.setdefault(factor, {}).setdefault(level, []).append(c.name)
    return out


def _facts(spec: Spec, source: str) -> StudyFacts:
    names = tuple(c.name for c in spec.conditions)
    per_run = _trial_counts(spec, source)
    counts = np.tile(np.asarray(per_run, dtype=np.int64), (spec.study.runs, 1))
    baseline = next((i for i, c in enumerate(spec.conditions) if c.baseline), None)
    levels = {
        f: {lev: tuple(names.index(n) for n in members) for lev, members in lv.items()}
        for f, lv in _level_map(spec).items()
    }
    return StudyFacts(names=names, counts=counts, baseline=baseline, levels=levels)


def _trial_counts(spec: Spec, source: str) -> list[int]:
    """Trials per run of each condition; shares are rounded by largest remainder to the run length."""
    if all(c.share is None for c in spec.conditions):
        return [c.trials for c in spec.conditions]
    total = spec.study.trials_per_run
    fixed = sum(c.trials for c in spec.conditions if c.trials is not None)
    shares = {i: c.share for i, c in enumerate(spec.conditions) if c.share is not None}
    share_sum = sum(shares.values())
    left = total - fixed
    if left < 0 or not math.isclose(share_sum, 1.0, abs_tol=1e-6) and fixed == 0:
        raise SpecError(
            source,
            [Problem("conditions", f"shares add up to {share_sum:g}; they must add up to 1 (or use 'trials')")],
        )
    raw = {i: s / share_sum * left for i, s in shares.items()}
    counts = {i: math.floor(v) for i, v in raw.items()}
    order = sorted(raw, key=lambda i: (-(raw[i] - counts[i]), i))
    for i in order[: left - sum(counts.values())]:
        counts[i] += 1
    return [c.trials if c.trials is not None else counts[i] for i, c in enumerate(spec.conditions)]


# ----------------------------------------------------------------------------------------------
# turning pydantic's errors into ones that teach the format


def _problem(model: type[BaseModel], data: dict, err: dict) -> Problem:
    loc = list(err["loc"])
    kind = err["type"]
    where = _path(loc)
    if kind == "extra_forbidden":
        parent = _model_at(model, data, loc[:-1])
        known = sorted(parent.model_fields) if parent else []
        hint = ""
        if len(loc) > 1 and loc[-1] in Spec.model_fields:
            hint = f" ('{loc[-1]}' is a top-level key: in TOML it must come before the first [section] header)"
        key = str(loc[-1])
        suggest = _suggest(key, known) if len(key) <= TEXT_CHARS else ""
        return Problem(where, f"unknown key {shorten(key)}{suggest}; allowed keys: {', '.join(known)}{hint}")
    if kind in ("union_tag_invalid", "union_tag_not_found"):
        tag = err.get("ctx", {}).get("discriminator", "'kind'").strip("'")
        if tag == "kind":
            given = err.get("ctx", {}).get("tag")
            kinds = sorted(RULE_KINDS)
            head = (
                f"unknown rule kind {shorten(given)}{_suggest(str(given)[:TEXT_CHARS], kinds)}"
                if given
                else "every rule needs a 'kind'"
            )
            return Problem(where, f"{head}; kinds: {', '.join(kinds)} (catalogue: rules/README.md)")
        return Problem(where, f"{err['msg']}; 'distribution' is one of fixed, uniform, exponential, choice")
    if kind == "missing":
        parent = _model_at(model, data, loc[:-1])
        hint = f" (e.g. {parent.example})" if parent is not None and getattr(parent, "example", "") else ""
        return Problem(where, f"missing required key '{loc[-1]}'{hint}")
    msg = err["msg"]
    if kind == "value_error":
        msg = msg.removeprefix("Value error, ")
    given = err.get("input")
    if not isinstance(given, (dict, list)) and kind != "value_error":
        msg = f"{msg}; got {shorten(given)}"
    return Problem(where, msg)


def _path(loc: list) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part + 1}]"
        elif part in RULE_KINDS or part in ("fixed", "uniform", "exponential", "choice"):
            continue  # the union tag pydantic inserts
        elif part in ("int", "list[constrained-str]", "str", "CustomHRF") or "[" in str(part):
            continue  # a union member's name (e.g. "function-after[_bounded(), CustomHRF]")
        else:
            text = str(part) if len(str(part)) <= 60 else str(part)[:40] + "..."
            out += ("." if out else "") + text
    return out


def _model_at(model, data, loc: list):
    """The pydantic model class that the value at loc is validated against, if one."""
    current: object = model
    value: object = data
    for part in loc:
        if isinstance(part, str) and part in RULE_KINDS:
            current = RULE_KINDS[part]
            continue
        if isinstance(current, type) and issubclass(current, BaseModel):
            if isinstance(part, str) and part in current.model_fields:
                current = current.model_fields[part].annotation
                value = value.get(part) if isinstance(value, dict) else None
                continue
            return None
        current = _unwrap(current, value)
        if isinstance(part, int):
            current = _unwrap(_list_item(current), None)
            value = value[part] if isinstance(value, list) and part < len(value) else None
            if current is None and _kind(value) in RULE_KINDS:
                current = RULE_KINDS[value["kind"]]
    current = _unwrap(current, value)
    return current if isinstance(current, type) and issubclass(current, BaseModel) else None


def _kind(value) -> str | None:
    """A rule's 'kind' when it is a string (a fuzzed spec may put a table or a list there)."""
    kind = value.get("kind") if isinstance(value, dict) else None
    return kind if isinstance(kind, str) else None


def _unwrap(tp, value):
    """Strip Optional/Annotated/Union down to a model class (choosing a rule by its kind)."""
    for _ in range(6):
        origin = typing.get_origin(tp)
        if origin is Annotated:
            tp = typing.get_args(tp)[0]
        elif origin is Union or origin is types.UnionType:
            args = [a for a in typing.get_args(tp) if a is not type(None)]
            if _kind(value) in RULE_KINDS:
                return RULE_KINDS[value["kind"]]
            models = [a for a in args if isinstance(a, type) and issubclass(a, BaseModel)]
            if isinstance(value, dict) and "distribution" in value:
                models = [m for m in models if "distribution" in m.model_fields]
                for m in models:
                    if value["distribution"] in typing.get_args(m.model_fields["distribution"].annotation):
                        return m
            tp = models[0] if len(models) == 1 else (args[0] if len(args) == 1 else tp)
            if len(models) != 1 and len(args) != 1:
                return tp
        else:
            return tp
    return tp


def _list_item(tp):
    tp = _unwrap(tp, None)
    if typing.get_origin(tp) is list:
        return typing.get_args(tp)[0]
    return None


def _suggest(word: str, options) -> str:
    if len(word) > TEXT_CHARS:  # nothing close to a name, and difflib's time grows with the length
        return ""
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def spec_json_schema() -> dict:
    """JSON Schema of the spec file, for editors."""
    schema = Spec.model_json_schema()
    schema["title"] = "seqsolve spec"
    return schema
