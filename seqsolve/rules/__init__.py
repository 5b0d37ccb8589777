"""Rule kinds: each module owns one kind's spec fields, encodings, check and sentence.

To add a kind: write its module, add its class to RULE_CLASSES; the tests walk this registry.
"""

from __future__ import annotations

import functools
import operator
from typing import Annotated

from pydantic import Field

from seqsolve.rules.base import Rule, StudyFacts, Target, Violation
from seqsolve.rules.max_run import MaxRun
from seqsolve.rules.min_gap import MinGap
from seqsolve.rules.min_run import MinRun
from seqsolve.rules.participants_differ import ParticipantsDiffer
from seqsolve.rules.positions import Position
from seqsolve.rules.run_boundary import RunBoundary
from seqsolve.rules.spread import EvenSpread
from seqsolve.rules.transitions import BalancedTransitions, ForbiddenTransition
from seqsolve.rules.triples import BalancedTriples

RULE_CLASSES: tuple[type[Rule], ...] = (
    MaxRun,
    MinRun,
    BalancedTransitions,
    BalancedTriples,
    ForbiddenTransition,
    MinGap,
    RunBoundary,
    Position,
    EvenSpread,
    ParticipantsDiffer,
)

RULE_KINDS: dict[str, type[Rule]] = {cls.model_fields["kind"].annotation.__args__[0]: cls for cls in RULE_CLASSES}

#: the spec's rule union, told apart by `kind`
AnyRule = Annotated[functools.reduce(operator.or_, RULE_CLASSES), Field(discriminator="kind")]

__all__ = ["AnyRule", "RULE_CLASSES", "RULE_KINDS", "Rule", "StudyFacts", "Target", "Violation"]
