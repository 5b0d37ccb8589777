"""Figures of merit beyond efficiency: counterbalancing, predictability, regressor overlap."""

from __future__ import annotations

import numpy as np

from seqsolve.rules.transitions import ideal_pair_counts, pair_counts


def counterbalance_deviation(runs: list[np.ndarray], counts: np.ndarray) -> dict[str, float]:
    """Observed minus ideal first-order pair counts, summed over runs: largest and RMS deviation."""
    k = counts.shape[1]
    found = sum(pair_counts(np.asarray(r), k) for r in runs)
    ideal = sum(ideal_pair_counts(counts[i], cyclic=False, exclude_repeats=False) for i in range(len(runs)))
    dev = found - ideal
    return {"max": float(np.abs(dev).max()), "rms": float(np.sqrt((dev**2).mean()))}


def conditional_entropy(runs: list[np.ndarray], n_conditions: int) -> float:
    """H(next condition | current condition) in bits, from the pooled pair counts.

    log2(K) for a sequence where the past says nothing of the next trial; 0 when it says all.
    """
    pairs = sum(pair_counts(np.asarray(r), n_conditions) for r in runs).astype(float)
    total = pairs.sum()
    if total == 0:
        return 0.0
    joint = pairs / total
    given = joint.sum(axis=1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = np.where(joint > 0, joint / given, 1.0)
    return float(-(joint * np.log2(cond)).sum())


def max_correlation(x: np.ndarray) -> float:
    """Largest absolute correlation between two columns of a (filtered) design matrix."""
    if x.shape[1] < 2:
        return 0.0
    sd = x.std(axis=0)
    if (sd == 0).any():
        return 1.0
    r = np.corrcoef(x, rowvar=False)
    np.fill_diagonal(r, 0.0)
    return float(np.abs(r).max())
