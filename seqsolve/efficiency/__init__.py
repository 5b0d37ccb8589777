"""Efficiency of schedules for a planned analysis: pure numpy/scipy, no solver imports.

hrf.py: response shapes. nuisance.py: intercepts, drifts, prewhitening. contrasts.py: our own
contrast parser. reference.py: the straightforward design-matrix computation (kept as the judge
of the fast paths). regressors.py: each trial's sparse regressors. fast.py: the Evaluator, which
chooses among the named scoring paths of paths.py (full scores) and neighbours.py (single changes
and swaps); algebra.py: their shared linear algebra. metrics.py: the figures of merit and the
report of one schedule. limits.py: upper bounds no design can pass.
"""

from seqsolve.efficiency.contrasts import parse_contrast
from seqsolve.efficiency.fast import Evaluator
from seqsolve.efficiency.setup import AnalysisSetup, make_setup

__all__ = ["AnalysisSetup", "Evaluator", "make_setup", "parse_contrast"]
