"""Compiled inner loops of the fast evaluator (numba, which seqsolve already has through galois).

Each kernel assembles small information matrices entry by entry and scores them with its own
Cholesky factorisation, where numpy would pay a call per tiny matrix. They compute exactly what
fast.py's numpy paths compute; tests/test_efficiency_fast.py holds both to the reference at 1e-9.
Compiled once per machine (cache=True), a few seconds on first use.
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: the same singularity rule as fast.RCOND
RCOND = 1e-10


@njit(cache=True)
def _cholesky(a, out, rcond):
    """Lower Cholesky factor of a into out; False when a pivot squared falls to rcond * its
    diagonal entry or below (the matrix counts as singular)."""
    n = a.shape[0]
    for j in range(n):
        s = a[j, j]
        for k in range(j):
            s -= out[j, k] * out[j, k]
        if s <= rcond * max(a[j, j], 1e-300):
            return False
        d = np.sqrt(s)
        out[j, j] = d
        for i in range(j + 1, n):
            t = a[i, j]
            for k in range(j):
                t -= out[i, k] * out[j, k]
            out[i, j] = t / d
    return True


@njit(cache=True)
def _efficiency(m, contrast, d_criterion, work, half):
    """A- or D-efficiency of information m for contrast (q, p); 0 when m is singular.

    work (p, p) and half (p, q) are scratch space."""
    p = m.shape[0]
    q = contrast.shape[0]
    if not _cholesky(m, work, RCOND):  # m = L L', L in work's lower triangle
        return 0.0
    # half = L^-1 C', skipping each column's leading zeros (C kron I for FIR is mostly zeros)
    for c in range(q):
        first = p
        for i in range(p):
            if contrast[c, i] != 0.0:
                first = i
                break
        for i in range(first):
            half[i, c] = 0.0
        for i in range(first, p):
            t = contrast[c, i]
            for k in range(first, i):
                t -= work[i, k] * half[k, c]
            half[i, c] = t / work[i, i]
    if d_criterion:
        # det(C M^-1 C') = det(half' half), from its own Cholesky factor
        g = np.empty((q, q))
        for a in range(q):
            for b in range(q):
                t = 0.0
                for i in range(p):
                    t += half[i, a] * half[i, b]
                g[a, b] = t
        gl = np.empty((q, q))
        if not _cholesky(g, gl, 0.0):
            return 0.0
        logdet = 0.0
        for j in range(q):
            logdet += 2.0 * np.log(gl[j, j])
        return np.exp(-logdet / q)
    tr = 0.0
    for i in range(p):
        for c in range(q):
            tr += half[i, c] * half[i, c]
    return 1.0 / tr


@njit(cache=True)
def update_scores(
    m0, xp, cross_kind, gram, omega, fir_scan, col, group, nb, conds, trials, signs, contrast, d_criterion
):
    """Scores of candidates that each add sign * (trial's regressor) to some conditions' columns.

    m0 (p, p): the current information; xp (G, N, p, nb): X' times each trial's regressor per group;
    conds, trials (n_cand, T) and signs (T,): the terms of each candidate. Trial products come from
    gram (G, G, N, nb, N, nb) when cross_kind == 0, or from omega at the trials' FIR volumes
    (fir_scan (N, nb), -1 outside the run) when cross_kind == 1.
    """
    n_cand, n_terms = conds.shape
    p = m0.shape[0]
    out = np.empty(n_cand)
    m = np.empty((p, p))
    work = np.empty((p, p))
    half = np.empty((p, contrast.shape[0]))
    for k in range(n_cand):
        m[:] = m0
        for a in range(n_terms):
            c = conds[k, a]
            ca = col[c]
            if ca < 0:
                continue
            t = trials[k, a]
            s = signs[a]
            g = group[c]
            for i in range(nb):
                for j in range(p):
                    v = s * xp[g, t, j, i]
                    m[ca + i, j] += v
                    m[j, ca + i] += v
        for a in range(n_terms):
            c1 = conds[k, a]
            ca = col[c1]
            if ca < 0:
                continue
            t1 = trials[k, a]
            for e in range(a, n_terms):  # each unordered pair once, added to both triangles
                c2 = conds[k, e]
                ce = col[c2]
                if ce < 0:
                    continue
                t2 = trials[k, e]
                s = signs[a] * signs[e]
                for i in range(nb):
                    for j in range(nb):
                        if cross_kind == 0:
                            v = gram[group[c1], group[c2], t1, i, t2, j]
                        else:
                            v1 = fir_scan[t1, i]
                            v2 = fir_scan[t2, j]
                            v = omega[v1, v2] if v1 >= 0 and v2 >= 0 else 0.0
                        m[ca + i, ce + j] += s * v
                        if e != a:
                            m[ce + j, ca + i] += s * v
        out[k] = _efficiency(m, contrast, d_criterion, work, half)
    return out


@njit(cache=True)
def fir_scores(codes, col, scan_ptr, hit_trial, hit_lag, diag, off, qw, contrast, d_criterion):
    """FIR estimation efficiency of many orderings (bins of one TR), from which volume each
    (trial, lag) falls in: M = X'W'WX - Y'Y with Y = (W'Q)'X.

    scan_ptr (n + 1,), hit_trial, hit_lag: the (trial, lag) hits of each volume, grouped by volume;
    diag, off (n,): the tridiagonal W'W of the AR(1) filter (off[s] pairs volume s with s + 1);
    qw (n, r): W'Q, the whitened nuisance basis taken back through the filter.
    """
    n_designs = codes.shape[0]
    n, r = qw.shape
    p = contrast.shape[1]
    out = np.empty(n_designs)
    m = np.empty((p, p))
    y = np.empty((r, p))
    work = np.empty((p, p))
    half = np.empty((p, contrast.shape[0]))
    for b in range(n_designs):
        m[:] = 0.0
        y[:] = 0.0
        for s in range(n):
            for h1 in range(scan_ptr[s], scan_ptr[s + 1]):
                c1 = col[codes[b, hit_trial[h1]]]
                if c1 < 0:
                    continue
                j1 = c1 + hit_lag[h1]
                for a in range(r):
                    y[a, j1] += qw[s, a]
                for h2 in range(scan_ptr[s], scan_ptr[s + 1]):
                    c2 = col[codes[b, hit_trial[h2]]]
                    if c2 >= 0:
                        m[j1, c2 + hit_lag[h2]] += diag[s]
                if s + 1 < n and off[s] != 0.0:
                    for h2 in range(scan_ptr[s + 1], scan_ptr[s + 2]):
                        c2 = col[codes[b, hit_trial[h2]]]
                        if c2 >= 0:
                            j2 = c2 + hit_lag[h2]
                            m[j1, j2] += off[s]
                            m[j2, j1] += off[s]
        for i in range(p):
            for j in range(p):
                t = 0.0
                for a in range(r):
                    t += y[a, i] * y[a, j]
                m[i, j] -= t
        out[b] = _efficiency(m, contrast, d_criterion, work, half)
    return out
