"""Each trial's own regressors on a fixed timing, unfiltered and sparse (volumes x trials).

A trial's response lasts the kernel plus its boxcar, and its FIR columns hold one volume per lag,
so these matrices have O(N) entries; the fast evaluator whitens them (a bidiagonal filter keeps them
sparse) and never forms the dense filtered volumes x trials matrices, whose memory grew with N^2.
Values are those of the dense construction the reference's design matrices are tested against.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse

from seqsolve.efficiency.grid import Layout, fir_bins
from seqsolve.efficiency.setup import AnalysisSetup

#: trials handled together when laying out responses (bounds the scratch memory)
CHUNK = 256


def _windows(layout: Layout, reach: int, circular: bool):
    """Per run and chunk of its trials: (first row of the run, scan positions that may be hit,
    the trials, d = scan sample - onset sample (positions x trials)). Without wrap-round, a trial
    touches only scans within `reach` samples after its onset."""
    row = 0
    for r, scans in enumerate(layout.scan_idx):
        trials = np.flatnonzero(layout.run_of == r)
        for lo in range(0, len(trials), CHUNK):
            chunk = trials[lo : lo + CHUNK]
            on = layout.onset_idx[chunk]
            if circular:
                pos = np.arange(len(scans))
            else:
                pos = np.arange(np.searchsorted(scans, on.min()), np.searchsorted(scans, on.max() + reach))
            d = scans[pos][:, None] - on[None, :]
            if circular:
                d = d % layout.run_fine[r]
            yield row, pos, chunk, d
        row += len(scans)


def trial_responses(setup: AnalysisSetup, layout: Layout, box_len: float, circular: bool = False) -> sparse.csc_matrix:
    """Unfiltered response of every trial to a boxcar of box_len samples (float: whole samples of
    weight 1, then one of weight frac(box_len)), sampled at the volumes.

    Returns a sparse matrix (n_scans, n_trials * n_basis); column i * n_basis + b is trial i's
    response through kernel b (zero outside its run). The response is step(d) - step(d - box_len),
    step the kernel's running sum (linearly interpolated between samples, which is what the
    fractional last sample gives), summed over wraps when the run is presented circularly.
    """
    steps = np.cumsum(setup.kernels, axis=1) * setup.resolution  # step responses
    nb, kl = steps.shape
    whole = int(np.floor(box_len))
    frac = float(box_len) - whole

    def step_at(j):
        return np.where(j[None] < 0, 0.0, steps[:, np.clip(j, 0, kl - 1)])

    def response(d):
        # boxcar = 1 on samples 0..whole-1, frac on sample `whole`: a difference of step responses
        out = step_at(d) - step_at(d - whole)
        return out + frac * (step_at(d - whole) - step_at(d - whole - 1)) if frac else out

    rows, cols, vals = [], [], []
    for row, pos, trials, d in _windows(layout, kl + whole, circular):
        if circular:  # the response wraps round the run, possibly more than once
            fine = layout.run_fine[int(layout.run_of[trials[0]])]
            wraps = int(np.ceil((kl + whole + 1) / fine)) + 1
            resp = sum(response(d + m * fine) for m in range(wraps))
        else:
            resp = response(d)  # (nb, positions, trials)
        b, s, t = np.nonzero(resp)
        rows.append(row + pos[s])
        cols.append(trials[t] * nb + b)
        vals.append(resp[b, s, t])
    return _csc(rows, cols, vals, (layout.n_scans, layout.n_trials * nb))


def fir_hits(setup: AnalysisSetup, layout: Layout, circular: bool = False) -> tuple[np.ndarray, ...]:
    """(volume, trial, lag) of every FIR bin a volume falls in (the reference's rule), ordered by
    run, trial, then volume: three int64 arrays of equal length."""
    edges = fir_bins(setup)
    vols, trials, lags = [], [], []
    for row, pos, chunk, d in _windows(layout, int(edges[-1]), circular):
        lag = np.searchsorted(edges, d, side="right") - 1
        t, s = np.nonzero(((d >= 0) & (lag < setup.fir_lags)).T)  # trial-major, as listed above
        vols.append(row + pos[s])
        trials.append(chunk[t])
        lags.append(lag[s, t])
    if not vols:
        return tuple(np.zeros(0, np.int64) for _ in range(3))
    return tuple(np.concatenate(x).astype(np.int64) for x in (vols, trials, lags))


def fir_regressors(setup: AnalysisSetup, layout: Layout, hits: tuple[np.ndarray, ...]) -> sparse.csc_matrix:
    """Unfiltered FIR regressors (n_scans, n_trials * n_lags): column i * n_lags + j counts the
    volumes trial i puts in lag bin j (a wide bin counts each volume it holds)."""
    vol, trial, lag = hits
    vals = [np.ones(len(vol))]
    return _csc([vol], [trial * setup.fir_lags + lag], vals, (layout.n_scans, layout.n_trials * setup.fir_lags))


def _csc(rows, cols, vals, shape) -> sparse.csc_matrix:
    """Sparse matrix from COO pieces (repeated entries summed), without stored zeros."""
    if rows:
        rows, cols, vals = np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)
    out = sparse.csc_matrix((vals, (rows, cols)), shape=shape) if len(rows) else sparse.csc_matrix(shape)
    out.eliminate_zeros()
    return out
