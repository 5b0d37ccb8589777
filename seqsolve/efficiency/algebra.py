"""Small linear algebra shared by the scoring paths: the singularity rule, batched efficiencies,
and BLAS pinned to one thread."""

from __future__ import annotations

import numpy as np
from scipy.linalg import solve_triangular
from threadpoolctl import ThreadpoolController

#: information matrices with a smaller reciprocal condition number count as singular
RCOND = 1e-10

_THREADPOOLS: ThreadpoolController | None = None


def one_blas_thread():
    """Context pinning BLAS to one thread: on small, many products a threaded BLAS is far slower
    under load (measured), and processes, not threads, are how seqsolve uses both cores."""
    global _THREADPOOLS
    if _THREADPOOLS is None:
        _THREADPOOLS = ThreadpoolController()  # finding the libraries is the slow part: once
    return _THREADPOOLS.limit(limits=1)


def batch_efficiency(m: np.ndarray, contrast: np.ndarray, criterion: str = "A") -> tuple[np.ndarray, np.ndarray]:
    """Efficiency of each information matrix in m (B, p, p) for contrast (q, p).

    Returns (efficiency (B,), singular (B,) bool); singular designs get efficiency 0. A matrix is
    singular when a Cholesky pivot squared falls below RCOND times its diagonal entry (or the
    factorisation fails, in which case eigenvalues decide for the whole batch).
    """
    m = np.asarray(m, dtype=float)
    try:
        chol = np.linalg.cholesky(m)
        pivots = np.diagonal(chol, axis1=1, axis2=2) ** 2
        singular = (pivots <= RCOND * np.maximum(np.diagonal(m, axis1=1, axis2=2), 1e-300)).any(axis=1)
    except np.linalg.LinAlgError:
        eig = np.linalg.eigvalsh(m)
        singular = eig[:, 0] <= RCOND * np.maximum(eig[:, -1], 1e-300)
        m = np.where(singular[:, None, None], np.eye(m.shape[1]), m)
        chol = np.linalg.cholesky(m)
    chol = np.where(singular[:, None, None], np.eye(m.shape[1]), chol)
    rhs = np.broadcast_to(contrast.T, (m.shape[0],) + contrast.T.shape)
    # L^-1 C': scipy's triangular solve loops in Python per matrix, numpy's general solve in C;
    # the first wins for large matrices, the second for small ones (measured)
    if m.shape[1] > 16:
        half = solve_triangular(chol, rhs, lower=True, check_finite=False)
    else:
        half = np.linalg.solve(chol, rhs)
    if criterion == "D":
        sign, logdet = np.linalg.slogdet(np.swapaxes(half, 1, 2) @ half)
        eff = np.where(sign > 0, np.exp(-logdet / contrast.shape[0]), 0.0)
    else:
        eff = 1.0 / np.einsum("bij,bij->b", half, half)
    return np.where(singular, 0.0, eff), singular


def regular_cholesky(m: np.ndarray) -> np.ndarray | None:
    """Lower Cholesky factor of m, or None when m counts as singular (the RCOND rule)."""
    try:
        chol = np.linalg.cholesky(m)
    except np.linalg.LinAlgError:
        return None
    if (np.diag(chol) ** 2 <= RCOND * np.maximum(np.diag(m), 1e-300)).any():
        return None
    return chol
