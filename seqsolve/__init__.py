"""seqsolve: trial orderings for task experiments that obey declared rules by construction.

The Python API mirrors the commands: load_study, generate, audit, check_study, explain.
"""

from seqsolve.audit import audit, audit_orderings
from seqsolve.errors import SeqsolveError
from seqsolve.generate import design_study, generate
from seqsolve.solve import SolveOptions, check_study, explain, generate_orderings
from seqsolve.spec import load_study

__version__ = "0.1.0"

__all__ = [
    "SeqsolveError",
    "SolveOptions",
    "audit",
    "audit_orderings",
    "check_study",
    "design_study",
    "explain",
    "generate",
    "generate_orderings",
    "load_study",
]
