"""seqsolve: trial orderings for task experiments that obey declared rules by construction.

The Python API mirrors the commands: load_study, generate (design_study without files), audit,
check_study, explain, compare, trade_off_front; SearchOptions sets how each participant's search runs.

The names are imported on first use (PEP 562), so `import seqsolve` (and the command line's
`--help`) does not pay for the solver, scipy and the compiled kernels until they are needed.
"""

from __future__ import annotations

import sys
import types
from importlib import import_module
from typing import TYPE_CHECKING

__version__ = "0.1.0"

#: public name -> the module that defines it
_WHERE = {
    "SearchOptions": "seqsolve.search",
    "SeqsolveError": "seqsolve.errors",
    "SolveOptions": "seqsolve.solve",
    "audit": "seqsolve.audit",
    "audit_orderings": "seqsolve.audit",
    "check_study": "seqsolve.solve",
    "compare": "seqsolve.compare",
    "design_study": "seqsolve.generate",
    "explain": "seqsolve.solve",
    "generate": "seqsolve.generate",
    "generate_orderings": "seqsolve.solve",
    "load_study": "seqsolve.spec",
    "trade_off_front": "seqsolve.tradeoff",
}

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

if TYPE_CHECKING:  # what type checkers and editors see; nothing is imported at run time
    from seqsolve.audit import audit, audit_orderings
    from seqsolve.compare import compare
    from seqsolve.errors import SeqsolveError
    from seqsolve.generate import design_study, generate
    from seqsolve.search import SearchOptions
    from seqsolve.solve import SolveOptions, check_study, explain, generate_orderings
    from seqsolve.spec import load_study
    from seqsolve.tradeoff import trade_off_front


def __getattr__(name: str):
    """Import the module that defines a public name on first access, then keep the name here."""
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'seqsolve' has no attribute {name!r}")
    value = getattr(import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted([*_WHERE, "__version__"])


class _Package(types.ModuleType):
    """The package module: three functions share their module's name (generate, compare, audit).
    Importing such a submodule sets the package attribute to the module; keep the function there,
    as the eager imports this file once made did."""

    def __setattr__(self, name: str, value) -> None:
        if isinstance(value, types.ModuleType) and _WHERE.get(name) == value.__name__:
            value = getattr(value, name)
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
