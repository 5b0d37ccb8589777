"""Compiled local checks and updates behind seqsolve.moves (numba, cached per machine).

`t` is a moves.Tables, `s` a moves.State (named tuples of arrays). A swap is judged by making it in
place, checking what it can have broken, and undoing it; counters are changed and restored the
same way, so judging never allocates.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from seqsolve.efficiency.kernels import RCOND, _cholesky
from seqsolve.moves import NO_LIMIT


@njit(cache=True)
def _stretch_ok(t, codes, lo_run, hi_run, q, k):
    """Is the stretch of set k through position q (a member) within its bounds?"""
    member = t.st_member[k]
    # walk no further than decides the answer: past the longest allowed, or to the shortest
    cap = t.st_hi[k] + 1 if t.st_hi[k] < NO_LIMIT else t.st_lo[k]
    n = 1
    p = q - 1
    while p >= lo_run and n < cap and member[codes[p]]:
        n += 1
        p -= 1
    p = q + 1
    while p < hi_run and n < cap and member[codes[p]]:
        n += 1
        p += 1
    return t.st_lo[k] <= n <= t.st_hi[k]


@njit(cache=True)
def _near_ok(t, codes, r, p):
    """Rules around position p of run r (which holds its new label): neighbours, stretches, gaps."""
    lo_run = t.run_start[r]
    hi_run = lo_run + t.run_len[r]
    c = codes[p]
    if p > lo_run and t.forbid[codes[p - 1], c]:
        return False
    if p + 1 < hi_run and t.forbid[c, codes[p + 1]]:
        return False
    for k in range(t.st_member.shape[0]):
        for q in range(max(p - 1, lo_run), min(p + 2, hi_run)):
            if t.st_member[k, codes[q]] and not _stretch_ok(t, codes, lo_run, hi_run, q, k):
                return False
    for g in range(t.gp_gap.shape[0]):
        in_a = t.gp_a[g, c]
        in_b = t.gp_b[g, c]
        if not (in_a or in_b):
            continue
        gap = t.gp_gap[g]
        for q in range(max(p - gap, lo_run), min(p + gap + 1, hi_run)):
            if q == p:  # a trial is not its own neighbour, even when it belongs to both sets
                continue
            d = codes[q]
            if (in_a and t.gp_b[g, d]) or (in_b and t.gp_a[g, d]):
                return False
    return True


@njit(cache=True)
def _boundary_ok(t, codes, r):
    """Breaks on both sides of run r."""
    n_runs = t.run_len.shape[0]
    for b in range(t.bd_w.shape[0]):
        w = t.bd_w[b]
        for left in (r - 1, r):
            right = left + 1
            if left < 0 or right >= n_runs:
                continue
            end = t.run_start[left] + t.run_len[left]
            tail = False
            for p in range(max(end - w, t.run_start[left]), end):
                if t.bd_member[b, codes[p]]:
                    tail = True
            if not tail:
                continue
            start = t.run_start[right]
            for p in range(start, min(start + w, start + t.run_len[right])):
                if t.bd_member[b, codes[p]]:
                    return False
    return True


@njit(cache=True)
def _old(codes, i, j, p):
    """Label at p before the swap of i and j (codes holds the swapped labels)."""
    if p == i:
        return codes[j]
    if p == j:
        return codes[i]
    return codes[p]


@njit(cache=True)
def _push_unique(out, n, p):
    """Append p to out[:n] unless it is there already; returns the new length."""
    for m in range(n):
        if out[m] == p:
            return n
    out[n] = p
    return n + 1


@njit(cache=True)
def _pair_starts(t, r, i, j, cyclic, out):
    """Positions p whose pair (p, next) the swap of i and j touches; with cyclic counts the last
    trial's next is the first. Returns how many were written to out (at most 5)."""
    lo = t.run_start[r]
    hi = lo + t.run_len[r]
    n = 0
    wrap = cyclic and (i == lo or j == lo)  # the pair (last, first) changes
    for p in (i - 1, i, j - 1, j, hi - 1 if wrap else -1):
        if p < lo or p >= hi:
            continue
        n = _push_unique(out, n, p)
    return n


@njit(cache=True)
def _pairs_change(t, s, r, i, j, sign):
    """Add (sign 1) or take back (sign -1) the swap's pair-count changes; codes hold the swapped labels."""
    codes = s.codes
    lo = t.run_start[r]
    hi = lo + t.run_len[r]
    starts = np.empty(5, dtype=np.int64)
    for rule in range(t.pb_group.shape[0]):
        g = t.pb_group[rule, r]
        n = _pair_starts(t, r, i, j, t.pb_cyclic[rule], starts)
        for m in range(n):
            p = starts[m]
            q = p + 1
            if q >= hi:
                if not t.pb_cyclic[rule] or t.run_len[r] < 2:
                    continue
                q = lo
            s.pb_count[rule, g, _old(codes, i, j, p), _old(codes, i, j, q)] -= sign
            s.pb_count[rule, g, codes[p], codes[q]] += sign


@njit(cache=True)
def _pairs_ok(t, s, r, i, j):
    """With the swap's changes added: are the touched pair counts within bounds?"""
    codes = s.codes
    lo = t.run_start[r]
    hi = lo + t.run_len[r]
    starts = np.empty(5, dtype=np.int64)
    for rule in range(t.pb_group.shape[0]):
        g = t.pb_group[rule, r]
        n = _pair_starts(t, r, i, j, t.pb_cyclic[rule], starts)
        for m in range(n):
            p = starts[m]
            q = p + 1
            if q >= hi:
                if not t.pb_cyclic[rule] or t.run_len[r] < 2:
                    continue
                q = lo
            a, b = codes[p], codes[q]
            if s.pb_count[rule, g, a, b] > t.pb_high[rule, g, a, b]:
                return False
            a, b = _old(codes, i, j, p), _old(codes, i, j, q)
            if s.pb_count[rule, g, a, b] < t.pb_low[rule, g, a, b]:
                return False
    return True


@njit(cache=True)
def _triple_starts(t, r, i, j, cyclic, out):
    """First positions p of the triples (p, p+1, p+2) holding trial i or j; with cyclic counts
    (runs of 3 or more) positions wrap around the run. Returns how many were written to out (at
    most 6). Triples of runs shorter than 3 do not exist."""
    lo = t.run_start[r]
    n_run = t.run_len[r]
    n = 0
    if n_run < 3:
        return 0
    for x in (i, j):
        for back in range(3):
            p = x - back
            if cyclic:
                p = lo + (p - lo) % n_run
            elif p < lo or p + 2 >= lo + n_run:
                continue
            n = _push_unique(out, n, p)
    return n


@njit(cache=True)
def _at(t, r, p, step):
    """Position step places after p in run r, wrapping to the run's start."""
    lo = t.run_start[r]
    return lo + (p - lo + step) % t.run_len[r]


@njit(cache=True)
def _triples_change(t, s, r, i, j, sign):
    """Add (sign 1) or take back (sign -1) the swap's triple-count changes; codes hold the swapped labels."""
    codes = s.codes
    starts = np.empty(6, dtype=np.int64)
    for rule in range(t.tb_group.shape[0]):
        g = t.tb_group[rule, r]
        n = _triple_starts(t, r, i, j, t.tb_cyclic[rule], starts)
        for m in range(n):
            p, q, u = starts[m], _at(t, r, starts[m], 1), _at(t, r, starts[m], 2)
            s.tb_count[rule, g, _old(codes, i, j, p), _old(codes, i, j, q), _old(codes, i, j, u)] -= sign
            s.tb_count[rule, g, codes[p], codes[q], codes[u]] += sign


@njit(cache=True)
def _triples_ok(t, s, r, i, j):
    """With the swap's changes added: are the touched triple counts within bounds?"""
    codes = s.codes
    starts = np.empty(6, dtype=np.int64)
    for rule in range(t.tb_group.shape[0]):
        g = t.tb_group[rule, r]
        n = _triple_starts(t, r, i, j, t.tb_cyclic[rule], starts)
        for m in range(n):
            p, q, u = starts[m], _at(t, r, starts[m], 1), _at(t, r, starts[m], 2)
            a, b, c = codes[p], codes[q], codes[u]
            if s.tb_count[rule, g, a, b, c] > t.tb_high[rule, g, a, b, c]:
                return False
            a, b, c = _old(codes, i, j, p), _old(codes, i, j, q), _old(codes, i, j, u)
            if s.tb_count[rule, g, a, b, c] < t.tb_low[rule, g, a, b, c]:
                return False
    return True


@njit(cache=True)
def _spans_change(t, s, i, j, sign):
    """Span counts after the swap (sign 1) or back (sign -1); codes hold the swapped labels."""
    codes = s.codes
    for k in range(t.sp_member.shape[0]):
        now_i = t.sp_member[k, codes[i]]
        now_j = t.sp_member[k, codes[j]]
        if now_i == now_j:
            continue
        # the member moved from j to i (now_i) or from i to j
        gain, lose = (i, j) if now_i else (j, i)
        for m in range(t.sp_ptr[k, gain], t.sp_ptr[k, gain + 1]):
            s.sp_count[t.sp_idx[m]] += sign
        for m in range(t.sp_ptr[k, lose], t.sp_ptr[k, lose + 1]):
            s.sp_count[t.sp_idx[m]] -= sign


@njit(cache=True)
def _spans_ok(t, s, i, j):
    codes = s.codes
    for k in range(t.sp_member.shape[0]):
        if t.sp_member[k, codes[i]] == t.sp_member[k, codes[j]]:
            continue
        for p in (i, j):
            for m in range(t.sp_ptr[k, p], t.sp_ptr[k, p + 1]):
                c = s.sp_count[t.sp_idx[m]]
                if c < t.sp_lo[t.sp_idx[m]] or c > t.sp_hi[t.sp_idx[m]]:
                    return False
    return True


@njit(cache=True)
def _dist_change(t, s, r, i, j, sign):
    """Distances to earlier runs after the swap (sign 1) or back (-1); codes hold the swapped labels."""
    codes = s.codes
    n_runs = t.run_len.shape[0]
    oi = i - t.run_start[r]
    oj = j - t.run_start[r]
    for e in range(t.earlier.shape[0]):
        for q in range(n_runs):
            if t.run_len[q] != t.run_len[r]:
                continue
            a = t.earlier[e, t.run_start[q] + oi]
            b = t.earlier[e, t.run_start[q] + oj]
            d = int(codes[i] != a) - int(codes[j] != a) + int(codes[j] != b) - int(codes[i] != b)
            s.dist[e, q, r] += sign * d


@njit(cache=True)
def _dist_ok(t, s, r):
    n_runs = t.run_len.shape[0]
    need = t.min_diff[0]
    for e in range(t.earlier.shape[0]):
        total = 0
        for q in range(n_runs):
            total += s.dist[e, q, q]
            if need > 0 and t.run_len[q] == t.run_len[r] and s.dist[e, q, r] < need:
                return False
        if total == 0:  # the whole design repeats an earlier participant's
            return False
    return True


@njit(cache=True)
def swap_valid(t, s, i, j):
    """Would swapping trials i and j keep every rule? The state is left as it was."""
    codes = s.codes
    ci = codes[i]
    cj = codes[j]
    if ci == cj or i == j:
        return False
    r = t.run_of[i]
    if t.run_of[j] != r:
        return False
    if not t.allowed[i, cj] or not t.allowed[j, ci]:
        return False
    codes[i] = cj
    codes[j] = ci
    ok = _near_ok(t, codes, r, i) and _near_ok(t, codes, r, j)
    if ok and t.bd_w.shape[0] > 0:
        ok = _boundary_ok(t, codes, r)
    if ok and t.pb_group.shape[0] > 0:
        _pairs_change(t, s, r, i, j, 1)
        ok = _pairs_ok(t, s, r, i, j)
        _pairs_change(t, s, r, i, j, -1)
    if ok and t.tb_group.shape[0] > 0:
        _triples_change(t, s, r, i, j, 1)
        ok = _triples_ok(t, s, r, i, j)
        _triples_change(t, s, r, i, j, -1)
    if ok and t.sp_member.shape[0] > 0:
        _spans_change(t, s, i, j, 1)
        ok = _spans_ok(t, s, i, j)
        _spans_change(t, s, i, j, -1)
    if ok and t.earlier.shape[0] > 0:
        _dist_change(t, s, r, i, j, 1)
        ok = _dist_ok(t, s, r)
        _dist_change(t, s, r, i, j, -1)
    codes[i] = ci
    codes[j] = cj
    return ok


@njit(cache=True)
def swaps_valid(t, s, pairs):
    out = np.zeros(pairs.shape[0], dtype=np.bool_)
    for m in range(pairs.shape[0]):
        out[m] = swap_valid(t, s, pairs[m, 0], pairs[m, 1])
    return out


@njit(cache=True)
def apply_swap(t, s, i, j):
    """Swap trials i and j and bring every counter up to date."""
    codes = s.codes
    r = t.run_of[i]
    ci = codes[i]
    codes[i] = codes[j]
    codes[j] = ci
    if t.pb_group.shape[0] > 0:
        _pairs_change(t, s, r, i, j, 1)
    if t.tb_group.shape[0] > 0:
        _triples_change(t, s, r, i, j, 1)
    if t.sp_member.shape[0] > 0:
        _spans_change(t, s, i, j, 1)
    if t.earlier.shape[0] > 0:
        _dist_change(t, s, r, i, j, 1)


# -- detection scores tracked through swaps (one regressor per condition, A criterion) ------------
#
# d is a tracking.Track: gram (N, N) products of the trials' filtered regressors, col (K,) each
# condition's column (-1: not modelled), contrast (q, p), m (p, p) the information X'X of the current
# design and s (p, N) = X'R (each column's products with every trial's regressor). A swap moves the
# difference of two trial regressors between two columns, so X'X changes in two rows and columns.

#: reassociation lets LLVM vectorise the dot products; no assumptions about NaN or inf (as kernels.py)
_FAST = {"reassoc", "contract", "nsz", "arcp"}


@njit(cache=True)
def _swapped_information(d, codes, i, j, out):
    """X'X after swapping trials i and j, into out (p, p)."""
    ca = d.col[codes[i]]
    cb = d.col[codes[j]]
    p = out.shape[0]
    for x in range(p):
        for y in range(p):
            out[x, y] = d.m[x, y]
    delta = d.gram[i, i] + d.gram[j, j] - 2.0 * d.gram[i, j]
    # column ca gains r_j - r_i, column cb loses it
    for x in range(p):
        w = d.s[x, j] - d.s[x, i]
        if ca >= 0:
            out[x, ca] += w
            out[ca, x] += w
        if cb >= 0:
            out[x, cb] -= w
            out[cb, x] -= w
    if ca >= 0:
        out[ca, ca] += delta
    if cb >= 0:
        out[cb, cb] += delta
    if ca >= 0 and cb >= 0:
        out[ca, cb] -= delta
        out[cb, ca] -= delta


@njit(cache=True, fastmath=_FAST)
def a_efficiency(m, contrast, chol):
    """1 / trace(C M^-1 C') by Cholesky; 0 when M counts as singular (pivot rule of fast.py).
    Each contrast row's solve starts at its first non-zero weight (the rows of an FIR identity
    contrast need only their own trailing part)."""
    p = m.shape[0]
    if not _cholesky(m, chol, RCOND):  # the evaluator's own factorisation and singularity rule
        return 0.0
    total = 0.0
    y = np.zeros(p)
    for q in range(contrast.shape[0]):
        first = 0
        while first < p and contrast[q, first] == 0.0:
            first += 1
        for r in range(first, p):
            acc = contrast[q, r]
            for k in range(first, r):
                acc -= chol[r, k] * y[k]
            y[r] = acc / chol[r, r]
            total += y[r] * y[r]
    return 1.0 / total if total > 0 else 0.0


@njit(cache=True)
def detection_swap_scores(d, codes, pairs):
    """Detection efficiency after each swap of pairs (n, 2); codes is the current design."""
    p = d.m.shape[0]
    work = np.empty((p, p))
    chol = np.zeros((p, p))
    out = np.empty(pairs.shape[0])
    for k in range(pairs.shape[0]):
        _swapped_information(d, codes, pairs[k, 0], pairs[k, 1], work)
        out[k] = a_efficiency(work, d.contrast, chol)
    return out


@njit(cache=True)
def detection_apply(d, codes, i, j):
    """Bring m and s up to date for the swap of i and j; codes still hold the labels before it."""
    p = d.m.shape[0]
    work = np.empty((p, p))
    _swapped_information(d, codes, i, j, work)
    for x in range(p):
        for y in range(p):
            d.m[x, y] = work[x, y]
    ca = d.col[codes[i]]
    cb = d.col[codes[j]]
    n = d.gram.shape[0]
    for t in range(n):
        w = d.gram[j, t] - d.gram[i, t]
        if ca >= 0:
            d.s[ca, t] += w
        if cb >= 0:
            d.s[cb, t] -= w


# -- estimation (FIR, bins of one TR) tracked through swaps -----------------------------------------
#
# e is a tracking.FirTrack: omega (V, V) = W'(I - QQ')W over volumes (a filtered 0/1 regressor's
# products are its entries), scan (N, L) the volume in each trial's lag bin (-1: none), col (K,) the
# first column of each condition's block (-1: not modelled), contrast (q, p), m (p, p) and
# tv (p, V) = (rows of the 0/1 design) x omega. A swap moves, per lag, one volume between two blocks.


@njit(cache=True, inline="always")
def _moved(mat, x, vi, vj):
    """mat[x, vj] - mat[x, vi], a missing volume (-1) counting 0: the change of one FIR column's
    product with row x when a trial's lag bin moves from volume vi to vj."""
    out = 0.0
    if vj >= 0:
        out += mat[x, vj]
    if vi >= 0:
        out -= mat[x, vi]
    return out


@njit(cache=True, inline="always")
def _moved_pair(omega, vi, vj, ui, uj):
    """(e_vj - e_vi)' Omega (e_uj - e_ui), missing volumes counting 0: the product of two lags'
    moved columns."""
    out = 0.0
    if vj >= 0 and uj >= 0:
        out += omega[vj, uj]
    if vj >= 0 and ui >= 0:
        out -= omega[vj, ui]
    if vi >= 0 and uj >= 0:
        out -= omega[vi, uj]
    if vi >= 0 and ui >= 0:
        out += omega[vi, ui]
    return out


@njit(cache=True)
def _fir_swapped_information(e, codes, i, j, out):
    """FIR X'X after swapping trials i and j, into out (p, p)."""
    ca = e.col[codes[i]]
    cb = e.col[codes[j]]
    p = out.shape[0]
    lags = e.scan.shape[1]
    for x in range(p):
        for y in range(p):
            out[x, y] = e.m[x, y]
    if ca < 0 and cb < 0:
        return
    for lag in range(lags):
        vi = e.scan[i, lag]
        vj = e.scan[j, lag]
        for x in range(p):
            w = _moved(e.tv, x, vi, vj)
            if ca >= 0:
                out[ca + lag, x] += w
                out[x, ca + lag] += w
            if cb >= 0:
                out[cb + lag, x] -= w
                out[x, cb + lag] -= w
    for lag in range(lags):
        vi, vj = e.scan[i, lag], e.scan[j, lag]
        for m in range(lags):
            ui, uj = e.scan[i, m], e.scan[j, m]
            delta = _moved_pair(e.omega, vi, vj, ui, uj)
            if ca >= 0:
                out[ca + lag, ca + m] += delta
            if cb >= 0:
                out[cb + lag, cb + m] += delta
            if ca >= 0 and cb >= 0:
                out[ca + lag, cb + m] -= delta
                out[cb + lag, ca + m] -= delta


@njit(cache=True)
def estimation_swap_scores(e, codes, pairs):
    """Estimation efficiency after each swap of pairs (n, 2); codes is the current design."""
    p = e.m.shape[0]
    work = np.empty((p, p))
    chol = np.zeros((p, p))
    out = np.empty(pairs.shape[0])
    for k in range(pairs.shape[0]):
        _fir_swapped_information(e, codes, pairs[k, 0], pairs[k, 1], work)
        out[k] = a_efficiency(work, e.contrast, chol)
    return out


@njit(cache=True)
def estimation_apply(e, codes, i, j):
    """Bring m and tv up to date for the swap of i and j; codes still hold the labels before it."""
    p = e.m.shape[0]
    work = np.empty((p, p))
    _fir_swapped_information(e, codes, i, j, work)
    for x in range(p):
        for y in range(p):
            e.m[x, y] = work[x, y]
    ca = e.col[codes[i]]
    cb = e.col[codes[j]]
    n = e.omega.shape[0]
    for lag in range(e.scan.shape[1]):
        vi, vj = e.scan[i, lag], e.scan[j, lag]
        for v in range(n):
            w = _moved(e.omega, v, vi, vj)  # omega is symmetric
            if ca >= 0:
                e.tv[ca + lag, v] += w
            if cb >= 0:
                e.tv[cb + lag, v] -= w


@njit(cache=True, fastmath=_FAST)
def _fir_sensitivity(e, chol, h):
    """h = M^-1 C'C M^-1 of the current FIR information (the gradient of trace(C M^-1 C') is -h);
    returns trace(C M^-1 C'), or -1 when M counts as singular."""
    p = e.m.shape[0]
    if a_efficiency(e.m, e.contrast, chol) == 0.0:
        return -1.0
    # g = M^-1 C' column by column, from the factor a_efficiency left in chol
    q = e.contrast.shape[0]
    g = np.zeros((p, q))
    y = np.zeros(p)
    trace = 0.0
    for k in range(q):
        for r in range(p):
            acc = e.contrast[k, r]
            for c in range(r):
                acc -= chol[r, c] * y[c]
            y[r] = acc / chol[r, r]
            trace += y[r] * y[r]
        for r in range(p - 1, -1, -1):
            acc = y[r]
            for c in range(r + 1, p):
                acc -= chol[c, r] * g[c, k]
            g[r, k] = acc / chol[r, r]
    for x in range(p):
        for z in range(p):
            acc = 0.0
            for k in range(q):
                acc += g[x, k] * g[z, k]
            h[x, z] = acc
    return trace


@njit(cache=True, fastmath=_FAST)
def _fir_first_order(e, codes, i, j, h):
    """First-order change of trace(C M^-1 C') for the swap of i and j: -<h, change of M>."""
    ca = e.col[codes[i]]
    cb = e.col[codes[j]]
    if ca < 0 and cb < 0:
        return 0.0
    p = e.m.shape[0]
    lags = e.scan.shape[1]
    out = 0.0
    for lag in range(lags):
        vi, vj = e.scan[i, lag], e.scan[j, lag]
        for x in range(p):
            w = _moved(e.tv, x, vi, vj)
            hx = 0.0
            if ca >= 0:
                hx += h[ca + lag, x]
            if cb >= 0:
                hx -= h[cb + lag, x]
            out += 2.0 * hx * w
        for m in range(lags):
            ui, uj = e.scan[i, m], e.scan[j, m]
            delta = _moved_pair(e.omega, vi, vj, ui, uj)
            hu = 0.0
            if ca >= 0:
                hu += h[ca + lag, ca + m]
            if cb >= 0:
                hu += h[cb + lag, cb + m]
            if ca >= 0 and cb >= 0:
                hu -= h[ca + lag, cb + m] + h[cb + lag, ca + m]
            out += delta * hu
    return -out


#: random positions probed for a trial with the same neighbours (a sixth of them match when 6 labels
#: are spread evenly: 36 contexts)
CONTEXT_PROBES = 64


@njit(cache=True)
def _same_context(t, codes, r, i):
    """A random trial of run r with the same left and right neighbours as trial i (run edges
    count as their own neighbour), or -1 if none was met in CONTEXT_PROBES draws. Swapping two
    such trials leaves every pair count and every neighbour rule as it was, so under tight
    transition rules it is far more often valid than a swap of two random trials."""
    lo = t.run_start[r]
    hi = lo + t.run_len[r]
    left = codes[i - 1] if i > lo else -1
    right = codes[i + 1] if i + 1 < hi else -1
    for _ in range(CONTEXT_PROBES):
        j = lo + np.random.randint(0, hi - lo)
        if j == i or codes[j] == codes[i]:
            continue
        if (codes[j - 1] if j > lo else -1) == left and (codes[j + 1] if j + 1 < hi else -1) == right:
            return j
    return -1


@njit(cache=True)
def tracked_moves(
    t, s, d, e, wd, we, n_moves, batch, context, screen, late, late_at, current, best, best_codes, run_ends, seed
):
    """`n_moves` moves of the search, all compiled (see search.Search._move): each draws `batch`
    swaps (the first `context` of them between trials with the same neighbours), judges them
    locally, scores the valid ones (wd x detection + we x estimation; a weight of 0 skips its
    part) and makes the best one under late acceptance. With screen > 0, estimation
    is first estimated to first order (gradient of the trace) and only the `screen` most promising
    candidates are scored exactly; moves are always decided on exact scores. Returns (current
    score, best score, late-acceptance position, swaps judged); best_codes receives each new best."""
    np.random.seed(seed)
    codes = s.codes
    pd = d.m.shape[0]
    pe = e.m.shape[0]
    work_d = np.empty((pd, pd))
    chol_d = np.zeros((pd, pd))
    work_e = np.empty((pe, pe))
    chol_e = np.zeros((pe, pe))
    h = np.zeros((pe, pe))
    cand_i = np.empty(batch, dtype=np.int64)
    cand_j = np.empty(batch, dtype=np.int64)
    cand_det = np.empty(batch)
    cand_guess = np.empty(batch)
    total = run_ends[-1]
    judged = 0
    trace = -1.0
    fresh = False  # is h that of the current design?
    for _ in range(n_moves):
        if we != 0.0 and screen > 0 and not fresh:
            trace = _fir_sensitivity(e, chol_e, h)
            fresh = True
        n = 0
        for _b in range(batch):
            i = np.random.randint(0, total)
            r = np.searchsorted(run_ends, i, side="right")
            if _b < context:
                j = _same_context(t, codes, r, i)
            else:
                j = t.run_start[r] + np.random.randint(0, t.run_len[r])
            if j < 0 or codes[i] == codes[j]:
                continue
            judged += 1
            if not swap_valid(t, s, i, j):
                continue
            sc = 0.0
            if wd != 0.0:
                _swapped_information(d, codes, i, j, work_d)
                sc = wd * a_efficiency(work_d, d.contrast, chol_d)
            cand_i[n] = i
            cand_j[n] = j
            cand_det[n] = sc
            guess = sc
            if we != 0.0 and screen > 0 and trace > 0:
                new = trace + _fir_first_order(e, codes, i, j, h)
                guess += we / new if new > 0 else 0.0
            cand_guess[n] = guess
            n += 1
        top = -1.0
        bi = -1
        bj = -1
        exact = n if (we == 0.0 or screen <= 0 or trace <= 0) else min(n, screen)
        order = np.argsort(-cand_guess[:n])
        for k in range(exact):
            c = order[k]
            sc = cand_det[c]
            if we != 0.0:
                _fir_swapped_information(e, codes, cand_i[c], cand_j[c], work_e)
                sc += we * a_efficiency(work_e, e.contrast, chol_e)
            if sc > top:
                top = sc
                bi = cand_i[c]
                bj = cand_j[c]
        slot = late_at % late.shape[0]
        late_at += 1
        if bi >= 0 and (top >= current - 1e-12 or top >= late[slot]):
            if wd != 0.0:
                detection_apply(d, codes, bi, bj)
            if we != 0.0:
                estimation_apply(e, codes, bi, bj)
            apply_swap(t, s, bi, bj)
            fresh = False
            current = top
            if current > best + 1e-9:
                best = current
                best_codes[:] = codes
        late[slot] = current
    return current, best, late_at, judged
