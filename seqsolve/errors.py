"""The exception classes of seqsolve: one root, one class per kind of user-facing failure."""

from __future__ import annotations

from dataclasses import dataclass

SHOWN_CHARS = 80  # user values longer than this are shortened in messages


def shorten(value: object, limit: int = SHOWN_CHARS) -> str:
    """repr of a user's value, cut in the middle when long, so a 100 kB field is not echoed whole."""
    text = repr(value)
    if len(text) <= limit:
        return text
    half = (limit - 20) // 2
    return f"{text[:half]}...[{len(text)} characters]...{text[-half:]}"


class SeqsolveError(Exception):
    """Root of every error seqsolve raises on purpose."""

    exit_code = 2


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input: where (field path or line) and what to do."""

    where: str
    message: str

    def __str__(self) -> str:
        # a safety net: messages quote user values shortened already; nothing is echoed at length
        where = self.where if len(self.where) <= 200 else self.where[:200] + "..."
        message = self.message if len(self.message) <= 2000 else self.message[:2000] + "... (message cut)"
        return f"{where}: {message}" if where else message


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


class OutputWriteError(SeqsolveError):
    """The output could not be written (read-only, full disk, busy mount point); the previous output is intact."""


class NotFoundError(SolverTimeoutError):
    """No design was found, and that is no proof that none exists: e.g. participants are designed one
    after another, so participants-differ may fail for a late participant of a feasible study."""


class InternalError(SeqsolveError):
    """A bug in seqsolve: e.g. a produced ordering failed the independent checker.

    The command line turns any exception that is not a SeqsolveError into this class, so every
    failure keeps the exit-code contract; the one-line message carries the spec hash for a report.
    """

    exit_code = 3

    def __init__(self, message: str, spec_hash: str | None = None):
        self.detail = str(message)
        self.spec_hash = spec_hash
        super().__init__(message)

    def __str__(self) -> str:
        detail = self.detail if len(self.detail) <= 300 else self.detail[:300] + "..."
        spec = f" (spec {self.spec_hash})" if self.spec_hash else ""
        return f"this is a bug in seqsolve{spec}: {detail}; please report it with the spec file and command"
