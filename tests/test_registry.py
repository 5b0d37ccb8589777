"""Meta-test: every rule kind keeps the whole contract, and the catalogue lists it."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest

from seqsolve.rules import RULE_CLASSES, RULE_KINDS, Rule, StudyFacts
from seqsolve.spec import RuleSet, bundled_rule_dirs

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("cls", RULE_CLASSES, ids=lambda c: c.__name__)
def test_rule_kind_keeps_the_contract(cls):
    assert issubclass(cls, Rule)
    for method in ("encode", "check", "sentence"):
        assert getattr(cls, method) is not getattr(Rule, method), f"{cls.__name__} lacks {method}"
    assert cls.example.startswith("kind = "), "every kind needs a one-line example"
    rule = cls.model_validate(tomllib.loads(f"r = {{ {cls.example} }}")["r"])
    names = tuple(dict.fromkeys(rule.condition_names() + ["x", "y", "z"]))
    facts = StudyFacts(names, np.full((2, len(names)), 2, dtype=np.int64))
    # the sentence is plain English naming the rule's own numbers and conditions
    text = rule.sentence(facts)
    assert text and (text[0].islower() or text[0] in "'"), text
    for name in rule.condition_names():
        assert name in text
    assert cls.model_json_schema()["properties"]["kind"]


def test_catalogue_lists_every_kind_with_its_example():
    text = (ROOT / "rules" / "README.md").read_text()
    for kind, cls in RULE_KINDS.items():
        assert f"`{kind}`" in text, kind
        assert cls.example in text, kind


@pytest.mark.parametrize("path", sorted((ROOT / "rules").glob("*.toml")), ids=lambda p: p.stem)
def test_shipped_rule_sets_are_valid(path):
    RuleSet.model_validate(tomllib.loads(path.read_text()))
    assert path.parent in bundled_rule_dirs() or path.parent.resolve() in [d.resolve() for d in bundled_rule_dirs()]


def _own(cls, method: str) -> bool:
    return getattr(cls, method) is not getattr(Rule, method)


def test_every_rule_kind_has_a_property_strategy():
    # rules_for (tests/test_rule_properties.py) raises for a kind it does not know, and names the ones it does
    from tests.test_rule_properties import STRATEGY_KINDS

    within_one_participant = {c.__name__ for c in RULE_CLASSES if not getattr(c, "across_participants", False)}
    assert within_one_participant - STRATEGY_KINDS == set(), "add a strategy to rules_for for these kinds"


def test_every_rule_kind_has_oracle_rows():
    from tests.test_rule_oracles import BOUNDARY_ORACLE, ORACLE

    covered = {type(rule).__name__ for rule, _, _ in ORACLE + BOUNDARY_ORACLE}
    within_one_participant = {c.__name__ for c in RULE_CLASSES if not getattr(c, "across_participants", False)}
    assert within_one_participant - covered == set(), "add oracle rows (valid and invalid) for these kinds"


def test_every_counts_model_encoding_has_oracle_rows():
    # a kind that states itself in the counts model (its own encode_flow) is held to its oracle there too
    from tests.test_rule_oracles import flow_kinds_with_oracle_rows

    flow_kinds = {
        c.__name__ for c in RULE_CLASSES if _own(c, "encode_flow") and not getattr(c, "across_participants", False)
    }
    assert flow_kinds - flow_kinds_with_oracle_rows() == set(), "add valid oracle rows the counts model can state"
