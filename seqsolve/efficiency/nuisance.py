"""Nuisance of a run: intercept, discrete-cosine high-pass, polynomial drift; AR(1) prewhitening."""

from __future__ import annotations

import numpy as np
from scipy import sparse


def cosine_drift(n_scans: int, tr: float, cutoff: float) -> np.ndarray:
    """DCT-II high-pass basis, shape (n_scans, order): the cosines slower than 1/cutoff Hz.

    order = floor(2 n TR / cutoff), the same count as SPM's and nilearn's basis (capped at n - 1).
    """
    order = min(n_scans - 1, int(np.floor(2 * n_scans * tr / cutoff + 1e-9)))
    k = np.arange(1, order + 1)
    t = np.arange(n_scans) + 0.5
    return np.sqrt(2.0 / n_scans) * np.cos(np.pi / n_scans * np.outer(t, k))


def polynomial_drift(n_scans: int, degree: int) -> np.ndarray:
    """Legendre polynomials of degree 1..degree over the run, shape (n_scans, degree)."""
    if degree <= 0:
        return np.zeros((n_scans, 0))
    x = np.linspace(-1.0, 1.0, n_scans)
    return np.polynomial.legendre.legvander(x, degree)[:, 1:]


def run_nuisance(n_scans: int, tr: float, cutoff: float | None, degree: int) -> np.ndarray:
    """Intercept, cosine drifts and polynomial drifts of one run, shape (n_scans, n_nuisance)."""
    cols = [np.ones((n_scans, 1))]
    if cutoff:
        cols.append(cosine_drift(n_scans, tr, cutoff))
    cols.append(polynomial_drift(n_scans, degree))
    return np.hstack(cols)


def whiten(x: np.ndarray, rho: float, run_lengths: list[int]) -> np.ndarray:
    """Apply the AR(1) prewhitening filter run by run: first row scaled by sqrt(1 - rho^2),
    then y_t - rho * y_(t-1). x has shape (n_scans, ...)."""
    if rho == 0:
        return x
    out = np.empty_like(x, dtype=float)
    start = 0
    for n in run_lengths:
        seg = x[start : start + n]
        out[start] = np.sqrt(1.0 - rho**2) * seg[0]
        out[start + 1 : start + n] = seg[1:] - rho * seg[:-1]
        start += n
    return out


def block_nuisance(run_lengths: list[int], tr: float, cutoff: float | None, degree: int) -> np.ndarray:
    """Per-run nuisance blocks on the diagonal of one matrix over all runs."""
    blocks = [run_nuisance(n, tr, cutoff, degree) for n in run_lengths]
    out = np.zeros((sum(run_lengths), sum(b.shape[1] for b in blocks)))
    r = c = 0
    for b in blocks:
        out[r : r + b.shape[0], c : c + b.shape[1]] = b
        r += b.shape[0]
        c += b.shape[1]
    return out


def residual_basis(nuisance_w: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the (whitened) nuisance space, shape (n_scans, rank)."""
    if nuisance_w.shape[1] == 0:
        return nuisance_w
    u, s, _ = np.linalg.svd(nuisance_w, full_matrices=False)
    return u[:, s > s.max() * 1e-10]


def whitening_matrix(rho: float, run_lengths: list[int]) -> sparse.csr_matrix:
    """The AR(1) prewhitening filter of `whiten` as a sparse matrix W (n_scans, n_scans): lower
    bidiagonal within each run (sqrt(1 - rho^2) first, then 1 and -rho), nothing across runs."""
    n = sum(run_lengths)
    diag = np.ones(n)
    sub = np.full(max(n - 1, 0), -rho)
    start = 0
    for length in run_lengths:
        diag[start] = np.sqrt(1.0 - rho**2) if rho != 0 else 1.0
        if start > 0:
            sub[start - 1] = 0.0  # a run's first volume does not follow the previous run's last
        start += length
    w = sparse.diags([diag, sub], [0, -1], shape=(n, n), format="csr") if n else sparse.csr_matrix((0, 0))
    w.eliminate_zeros()
    return w


def run_bases(
    run_lengths: list[int], tr: float, cutoff: float | None, degree: int, rho: float
) -> tuple[np.ndarray, np.ndarray]:
    """Orthonormal basis of the whitened nuisance space of these runs, built run by run.

    Returns (basis (n_scans, rank), starts (n_runs + 1,)): run k's columns are
    starts[k]:starts[k + 1], zero outside the run. A column is kept where its singular value passes
    1e-10 of the largest over all runs, as residual_basis keeps them for the whole block-diagonal
    matrix: the same space, at a cost linear in the number of runs instead of cubic.
    """
    parts = []
    for n in run_lengths:
        nuis = whiten(run_nuisance(n, tr, cutoff, degree), rho, [n])
        u, s, _ = np.linalg.svd(nuis, full_matrices=False)
        parts.append((u, s))
    top = max((s.max() for _, s in parts if s.size), default=0.0)
    out = np.zeros((sum(run_lengths), sum(int((s > top * 1e-10).sum()) for _, s in parts)))
    starts = [0]
    row = 0
    for (u, s), n in zip(parts, run_lengths):
        keep = u[:, s > top * 1e-10]
        out[row : row + n, starts[-1] : starts[-1] + keep.shape[1]] = keep
        row += n
        starts.append(starts[-1] + keep.shape[1])
    return out, np.asarray(starts, dtype=np.int64)
