"""Upper bounds on efficiency that no ordering can pass (derived here; used as the 'physical limit').

Estimation (FIR with k lags, an intercept, one trial per bin, n_i trials of each of Q event types,
n_0 = volumes - sum n_i): for each lag block j, (M^-1)_jj >= (M_jj)^-1 (a Schur complement only adds),
and M_jj = diag(n) - n n'/N, whose inverse is diag(1/n) + J/n_0 (Sherman-Morrison). Summing traces:
  identity contrast:  e <= 1 / (k (sum_i 1/n_i + Q/n_0))
  pairwise contrasts: e <= 1 / (k (Q - 1) sum_i 1/n_i)
Over all allocations with sum n_i + n_0 = N, the identity bound is largest at n_i = N/(Q + sqrt(Q)),
n_0 = sqrt(Q) n_i, giving N / (k Q (1 + sqrt(Q))^2).
Presented once through (not periodically), lag j of a run has no trial in its first j volumes and
loses the trials whose lag-j volume falls past the end: per lag n_i(j) <= n_i and n_0(j) <= n_0 + j
per run, so the identity bound becomes 1 / sum_j (sum_i 1/n_i + Q/(n_0 + j R)) with R runs. (The
periodic form can be beaten once through: the search found such a design.) The pairwise bound
needs no change: it only grows with 1/n_i(j).
All of this assumes white noise. AR(1) prewhitening breaks it: W'W has eigenvalues up to (1 + rho)^2
(innovation-variance units), so fast-alternating regressors gain information and brute force over tiny
designs passes the identity bound (2.4x at rho = 0.9); score.py reports no bound when ar1 != 0.
Detection of one event type in a periodic design of N volumes with n events and an intercept:
  x' (I - J/N) x = sum_{f != 0} |S(f)|^2 |G(f)|^2 / N <= max_f |G(f)|^2 * n (1 - n/N)   (Parseval),
with G the DFT of the volume-sampled response to one trial.
"""

from __future__ import annotations

import numpy as np


def estimation_bound_identity(counts: np.ndarray, n_volumes: int, lags: int, once_through_runs: int = 0) -> float:
    """Identity-contrast FIR bound; once_through_runs: runs presented once through (0: periodic)."""
    counts = np.asarray(counts, dtype=float)
    n0 = n_volumes - counts.sum()
    if n0 <= 0 and once_through_runs == 0:
        return float("inf")
    j = np.arange(lags)
    extra = n0 + j * once_through_runs
    if (extra <= 0).any():
        return float("inf")
    return float(1.0 / ((1.0 / counts).sum() * lags + (len(counts) / extra).sum()))


def estimation_bound_pairwise(counts: np.ndarray, lags: int) -> float:
    counts = np.asarray(counts, dtype=float)
    return float(1.0 / (lags * (len(counts) - 1) * (1.0 / counts).sum()))


def estimation_bound_any_allocation(n_volumes: int, n_types: int, lags: int) -> float:
    return float(n_volumes / (lags * n_types * (1.0 + np.sqrt(n_types)) ** 2))


def detection_bound_one_type(n_events: int, n_volumes: int, response: np.ndarray) -> float:
    """response: the volume-sampled response to one trial (any length; folded onto N volumes)."""
    folded = np.zeros(n_volumes)
    np.add.at(folded, np.arange(len(response)) % n_volumes, response)
    gain = np.abs(np.fft.fft(folded)) ** 2
    return float(n_events * (1.0 - n_events / n_volumes) * gain[1:].max())
