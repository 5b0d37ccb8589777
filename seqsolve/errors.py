"""The exception classes of seqsolve: one root, one class per kind of user-facing failure."""

from __future__ import annotations

from dataclasses import dataclass


class SeqsolveError(Exception):
    """Root of every error seqsolve raises on purpose."""

    exit_code = 2


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input: where (field path or line) and what to do."""

    where: str
    message: str

    def __str__(self) -> str:
        return f"{self.where}: {self.message}" if self.where else self.message


class InputError(SeqsolveError):
    """A spec or ordering file that cannot be used; carries every problem found."""

    def __init__(self, source: str, problems: list[Problem]):
        self.source = str(source)
        self.problems = list(problems)
        super().__init__(str(self))

    def __str__(self) -> str:
        head = f"{self.source}: {len(self.problems)} problem(s)"
        return "\n".join([head] + [f"  {p}" for p in self.problems])


class SpecError(InputError):
    """The spec file is missing, unreadable or does not follow the format."""


class OrderingFileError(InputError):
    """An ordering file (orderings.csv or events.tsv) cannot be read against the spec."""


class OutputExistsError(SeqsolveError):
    """The output folder exists and overwriting was not asked for."""


class InfeasibleError(SeqsolveError):
    """The rules cannot all hold; carries the explanation."""

    exit_code = 1

    def __init__(self, explanation):
        self.explanation = explanation
        super().__init__(explanation.describe())


class SolverTimeoutError(SeqsolveError):
    """The solver ran out of time without finding an ordering or proving there is none."""

    exit_code = 1


class InternalError(SeqsolveError):
    """A bug in seqsolve: e.g. a produced ordering failed the independent checker."""

    exit_code = 3
