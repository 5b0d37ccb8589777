"""seqsolve: trial orderings for task experiments that obey declared rules by construction.

The Python API mirrors the commands: load_study, generate (design_study without files), audit,
check_study, explain, compare, trade_off_front; SearchOptions sets how each participant's search runs.
"""

from seqsolve.audit import audit, audit_orderings
from seqsolve.compare import compare
from seqsolve.errors import SeqsolveError
from seqsolve.generate import design_study, generate
from seqsolve.search import SearchOptions
from seqsolve.solve import SolveOptions, check_study, explain, generate_orderings
from seqsolve.spec import load_study
from seqsolve.tradeoff import trade_off_front

__version__ = "0.1.0"

__all__ = [
    "SearchOptions",
    "SeqsolveError",
    "SolveOptions",
    "audit",
    "audit_orderings",
    "check_study",
    "compare",
    "design_study",
    "explain",
    "generate",
    "generate_orderings",
    "load_study",
    "trade_off_front",
]
