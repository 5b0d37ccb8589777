"""Input limits: far beyond any real study, they keep time and memory bounded; each can be raised.

Each limit is read when an input is checked, from an environment variable when set (a positive
number), so a study that truly needs more says `SEQSOLVE_MAX_TRIALS_PER_RUN=200000 seqsolve ...`.
"""

from __future__ import annotations

import os
from dataclasses import dataclass


@dataclass(frozen=True)
class Limit:
    """One bound on an input: its environment variable, default and what it counts."""

    env: str
    default: float
    what: str

    def value(self) -> float:
        """The bound in force: the environment variable when it holds a positive number, else the default."""
        raw = os.environ.get(self.env, "").strip()
        try:
            given = float(raw)
        except ValueError:
            return self.default
        return given if given > 0 and given == given and given != float("inf") else self.default

    def hint(self) -> str:
        """What the limit is and how to raise it, for an error message."""
        return f"the limit is {self.value():,g} {self.what}; to change it, set the environment variable {self.env}"


# ordering files: a 300-participant study of 10 runs x 400 trials is about 40 MB as orderings.csv
FILE_MB = Limit("SEQSOLVE_MAX_FILE_MB", 64, "MB per input file")
SPEC_KB = Limit("SEQSOLVE_MAX_SPEC_KB", 1024, "kB per spec or rule-set file")
# a run of a task experiment holds hundreds of trials; long behavioural sessions a few thousand
TRIALS_PER_RUN = Limit("SEQSOLVE_MAX_TRIALS_PER_RUN", 20_000, "trials per run")
TRIALS_PER_PARTICIPANT = Limit("SEQSOLVE_MAX_TRIALS_PER_PARTICIPANT", 200_000, "trials per participant (all runs)")
# seconds: no run lasts a day; times in spec and files above this are typing slips (ms for s, ...)
SECONDS = Limit("SEQSOLVE_MAX_SECONDS", 86_400, "seconds for any time")
# the scoring model holds (volumes x trials) and (fine samples) arrays per run
VOLUMES_PER_RUN = Limit("SEQSOLVE_MAX_VOLUMES_PER_RUN", 20_000, "volumes per run")
FINE_SAMPLES_PER_RUN = Limit("SEQSOLVE_MAX_FINE_SAMPLES_PER_RUN", 2_000_000, "fine-grid samples per run")
FIR_BINS = Limit("SEQSOLVE_MAX_FIR_BINS", 500, "FIR bins")
SMALLEST_STEP = Limit("SEQSOLVE_MIN_STEP_MS", 1, "ms for the smallest time step (resolution, grid, FIR bin)")
# stimulus items of a study (seqsolve/items.py): word lists and picture sets run to thousands
ITEMS = Limit("SEQSOLVE_MAX_ITEMS", 100_000, "stimulus items")
PARTICIPANTS = Limit("SEQSOLVE_MAX_PARTICIPANTS", 10_000, "participants")
