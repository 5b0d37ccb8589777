"""Compiled inner loops of the fast evaluator (numba, which seqsolve already has through galois).

Each kernel assembles small information matrices entry by entry and scores them with its own
Cholesky factorisation, where numpy would pay a call per tiny matrix. They compute exactly what
fast.py's numpy paths compute; tests/test_efficiency_fast.py holds both to the reference at 1e-9.
Compiled once per machine (cache=True), a few seconds on first use.
"""

from __future__ import annotations

import llvmlite.ir as llvm_ir
import numpy as np
from numba import njit, types
from numba.extending import intrinsic

#: the same singularity rule as algebra.RCOND
RCOND = 1e-10

#: reassociation lets LLVM vectorise the dot products; no assumptions about NaN or inf
_FAST = {"reassoc", "contract", "nsz", "arcp"}


@intrinsic
def _popcount(typingctx, x):
    """Number of set bits of a 64-bit integer (LLVM's ctpop, one instruction on current CPUs)."""
    if not isinstance(x, types.Integer) or x.bitwidth != 64:
        return None

    def codegen(context, builder, signature, args):
        i64 = llvm_ir.IntType(64)
        fn = builder.module.declare_intrinsic("llvm.ctpop", [i64], llvm_ir.FunctionType(i64, [i64]))
        return builder.call(fn, [args[0]])

    return types.int64(x), codegen


@njit(cache=True, fastmath=_FAST)
def _cholesky(a, out, rcond):
    """Lower Cholesky factor of a into out; False when a pivot squared falls to rcond * its
    diagonal entry or below (the matrix counts as singular). Factorises out's size of a's
    leading block."""
    return _cholesky_against(a, out, rcond, a)


@njit(cache=True, fastmath=_FAST)
def _cholesky_against(a, out, rcond, ref):
    """_cholesky, with the pivots judged against ref's diagonal instead of a's (a Schur complement
    is judged against the whole matrix's entries)."""
    n = out.shape[0]
    for j in range(n):
        s = a[j, j]
        for k in range(j):
            s -= out[j, k] * out[j, k]
        if s <= rcond * max(ref[j, j], 1e-300):
            return False
        d = np.sqrt(s)
        out[j, j] = d
        for i in range(j + 1, n):
            t = a[i, j]
            for k in range(j):
                t -= out[i, k] * out[j, k]
            out[i, j] = t / d
    return True


@njit(cache=True, fastmath=_FAST)
def _efficiency(m, ct, active, d_criterion, work, half):
    """A- or D-efficiency of information m (only its lower triangle is read) for the contrast
    prepared by paths.prepare_contrast (ct = C' (p, q), active (p,)); 0 when m is singular.

    work (p, p) and half (p, q) are scratch space; m may be larger (its leading p x p block counts)."""
    if not _cholesky(m, work, RCOND):  # m = L L', L in work's lower triangle
        return 0.0
    half[:] = ct
    return _solved_score(work, half, active, d_criterion, 0.0, half[:0, :0])


@njit(cache=True, fastmath=_FAST)
def _solved_score(chol, rhs, active, d_criterion, const_trace, const_gram):
    """rhs <- L^-1 rhs in place (L: chol's lower triangle; row i of rhs is zero beyond active[i],
    which must not decrease), then the efficiency whose C M^-1 C' is const_gram + rhs'rhs (D; an
    empty const_gram stands for zeros) or whose trace is const_trace + ||rhs||^2 (A). Rows are solved with all contrasts in the innermost
    (contiguous) loop, and only the contrasts that have started."""
    p, q = rhs.shape
    for i in range(p):
        for k in range(i):
            lik = chol[i, k]
            for c in range(active[k]):
                rhs[i, c] -= lik * rhs[k, c]
        inv = 1.0 / chol[i, i]
        for c in range(active[i]):
            rhs[i, c] *= inv
    if d_criterion:
        # det(C M^-1 C'), from its own Cholesky factor
        g = np.zeros((q, q)) if const_gram.shape[0] == 0 else const_gram.copy()
        for i in range(p):
            for a in range(active[i]):
                for b in range(active[i]):
                    g[a, b] += rhs[i, a] * rhs[i, b]
        gl = np.empty((q, q))
        if not _cholesky(g, gl, 0.0):
            return 0.0
        logdet = 0.0
        for j in range(q):
            logdet += 2.0 * np.log(gl[j, j])
        return np.exp(-logdet / q)
    tr = const_trace
    for i in range(p):
        for c in range(active[i]):
            tr += rhs[i, c] * rhs[i, c]
    return 1.0 / tr


@njit(cache=True, fastmath=_FAST)
def _add_lower(m, x, y, v):
    """Add v to the symmetric pair of entries (x, y) and (y, x), kept in m's lower triangle."""
    if x > y:
        m[x, y] += v
    elif x < y:
        m[y, x] += v
    else:
        m[x, x] += 2.0 * v


@njit(cache=True, fastmath=_FAST)
def update_scores(
    m0, xp, cross_kind, gram, omega, fir_scan, col, group, nb, conds, trials, signs, ct, active, d_criterion
):
    """Scores of candidates that each add sign * (trial's regressor) to some conditions' columns.

    m0 (p, p): the current information; xp (G, N, p, nb): X' times each trial's regressor per group;
    conds, trials (n_cand, T) and signs (T,): the terms of each candidate. Trial products come from
    gram (G, G, N, nb, N, nb) when cross_kind == 0, or from omega at the trials' FIR volumes
    (fir_scan (N, nb), -1 outside the run) when cross_kind == 1.

    The matrix is updated whole, with nb spare rows and columns where the baseline's terms land,
    so that no update needs a branch.
    """
    n_cand, n_terms = conds.shape
    p = m0.shape[0]
    w = p + nb
    out = np.empty(n_cand)
    m = np.zeros((w, w))
    work = np.empty((p, p))
    half = np.empty((p, ct.shape[1]))
    start = np.empty(n_terms, dtype=np.int64)
    for k in range(n_cand):
        m[:p, :p] = m0
        for a in range(n_terms):
            c = conds[k, a]
            start[a] = col[c] if col[c] >= 0 else p
            t = trials[k, a]
            sg = signs[a]
            g = group[c]
            for i in range(nb):
                r = start[a] + i
                for j in range(p):
                    v = sg * xp[g, t, j, i]
                    m[r, j] += v
                    m[j, r] += v
        for a in range(n_terms):
            g1 = group[conds[k, a]]
            t1 = trials[k, a]
            for e in range(n_terms):
                g2 = group[conds[k, e]]
                t2 = trials[k, e]
                sg = signs[a] * signs[e]
                for i in range(nb):
                    for j in range(nb):
                        if cross_kind == 0:
                            v = gram[g1, g2, t1, i, t2, j]
                        else:
                            v1 = fir_scan[t1, i]
                            v2 = fir_scan[t2, j]
                            v = omega[v1, v2] if v1 >= 0 and v2 >= 0 else 0.0
                        m[start[a] + i, start[e] + j] += sg * v
        out[k] = _efficiency(m, ct, active, d_criterion, work, half)
    return out


@njit(cache=True, fastmath=_FAST)
def _assemble(m, acc, own, y):
    """Lower triangle of m = acc + acc' + diag(own) - y y' over the first p rows and columns (the
    rest gathered the baseline's terms, so that the loops need no branch)."""
    p = m.shape[0]
    r = y.shape[1]
    for i in range(p):
        for j in range(i + 1):
            t = acc[i, j] + acc[j, i]
            for a in range(r):
                t -= y[i, a] * y[j, a]
            m[i, j] = t
        m[i, i] += own[i]


@njit(cache=True, fastmath=_FAST)
def fir_scores(codes, col, scan_ptr, hit_trial, hit_lag, diag, off, qw, ct, active, d_criterion):
    """FIR estimation efficiency of many orderings (bins of one TR), from which volume each
    (trial, lag) falls in: M = X'W'WX - Y Y' with Y = X'W'Q.

    scan_ptr (n + 1,), hit_trial, hit_lag: the (trial, lag) hits of each volume, grouped by volume;
    diag, off (n,): the tridiagonal W'W of the AR(1) filter (off[s] pairs volume s with s + 1);
    qw (n, r): W'Q, the whitened nuisance basis taken back through the filter.
    """
    n_designs = codes.shape[0]
    n, r = qw.shape
    p = ct.shape[0]
    out = np.empty(n_designs)
    m = np.empty((p, p))
    acc = np.empty((p + 1, p + 1))  # ordered pairs of hits; row and column p gather the baseline's
    own = np.empty(p + 1)
    y = np.empty((p + 1, r))
    work = np.empty((p, p))
    half = np.empty((p, ct.shape[1]))
    cols = np.empty(len(hit_trial), dtype=np.int64)
    ar = False
    for s in range(n):
        ar = ar or off[s] != 0.0
    for b in range(n_designs):
        acc[:] = 0.0
        own[:] = 0.0
        y[:] = 0.0
        for h in range(len(hit_trial)):  # each hit's column in this design, p for the baseline
            c = col[codes[b, hit_trial[h]]]
            cols[h] = c + hit_lag[h] if c >= 0 else p
        for s in range(n):
            for h1 in range(scan_ptr[s], scan_ptr[s + 1]):
                j1 = cols[h1]
                for a in range(r):
                    y[j1, a] += qw[s, a]
                own[j1] += diag[s]
                for h2 in range(h1 + 1, scan_ptr[s + 1]):
                    acc[j1, cols[h2]] += diag[s]
                if ar and s + 1 < n:
                    for h2 in range(scan_ptr[s + 1], scan_ptr[s + 2]):
                        acc[j1, cols[h2]] += off[s]
        _assemble(m, acc, own, y)
        out[b] = _efficiency(m, ct, active, d_criterion, work, half)
    return out


@njit(cache=True, fastmath=_FAST)
def fir_bit_scores(codes, col, fscan, qf, qoff, rank, n_words, dw, dmask, ow, omask, ct, active, d_criterion):
    """fir_scores for designs where no two trials of a design share a volume at the same lag:
    each FIR column is then a set of volumes, kept as a bitset, and the products of two columns
    are counts of the volumes they share, by popcount.

    M[x, y] = sum_k dw[k] |x & y & dmask[k]| + sum_k ow[k] (|x & y>>1 & omask[k]| + |x>>1 & y & omask[k]|)
    where dmask[k] marks the volumes whose W'W diagonal is dw[k], and omask[k] the volumes s whose
    W'W entry with s + 1 is ow[k] (AR(1) prewhitening; none without it). Then M -= Y Y' as before.
    fscan (N, lags): each trial's volume at each lag (a spare bit past the last volume, outside
    every mask, where the lag falls outside the run); qf (N, lags, width): W'Q at those volumes (0
    outside) in columns qoff[trial] onwards (W'Q is zero outside the trial's run's columns), of the
    `rank` columns of Q.
    """
    n_designs, n_trials = codes.shape
    lags = fscan.shape[1]
    r = rank
    width = qf.shape[2]
    p = ct.shape[0]
    nd = len(dw)
    no = len(ow)
    out = np.empty(n_designs)
    m = np.empty((p, p))
    acc = np.zeros((p + lags, p + lags))  # only its lower triangle is filled; _assemble adds acc'
    own = np.zeros(p + lags)
    y = np.empty((p + lags, r))
    bits = np.empty((p + lags, n_words), dtype=np.uint64)  # rows from p on: the baseline's hits
    nxt = np.empty((p + lags, n_words), dtype=np.uint64)  # the same, one volume on
    work = np.empty((p, p))
    half = np.empty((p, ct.shape[1]))
    one = np.uint64(1)
    sixty_three = np.uint64(63)
    for b in range(n_designs):
        bits[:] = 0
        y[:] = 0.0
        for t in range(n_trials):
            c = col[codes[b, t]]
            c = c if c >= 0 else p
            for lag in range(lags):
                sc = fscan[t, lag]
                bits[c + lag, sc >> 6] |= one << np.uint64(sc & 63)
                # a slice, so that the inner index is a plain range (no wrap-round test per
                # element, which kept LLVM from vectorising the loop: 2.4x slower, measured)
                dst = y[c + lag, qoff[t] : qoff[t] + width]
                src = qf[t, lag]
                for a in range(width):
                    dst[a] += src[a]
        if no:
            for j in range(p):
                for w in range(n_words):
                    v = bits[j, w] >> one
                    if w + 1 < n_words:
                        v |= bits[j, w + 1] << sixty_three
                    nxt[j, w] = v
        for i in range(p):
            for j in range(i + 1):
                v = 0.0
                for k in range(nd):
                    cnt = 0
                    for w in range(n_words):
                        cnt += _popcount(bits[i, w] & bits[j, w] & dmask[k, w])
                    v += dw[k] * cnt
                for k in range(no):
                    cnt = 0
                    for w in range(n_words):
                        cnt += _popcount(bits[i, w] & nxt[j, w] & omask[k, w])
                        cnt += _popcount(nxt[i, w] & bits[j, w] & omask[k, w])
                    v += ow[k] * cnt
                # acc + acc' doubles the diagonal: put half of it there
                acc[i, j] = v if i != j else 0.5 * v
        _assemble(m, acc, own, y)
        out[b] = _efficiency(m, ct, active, d_criterion, work, half)
    return out


@njit(cache=True, fastmath=_FAST)
def band_scores(codes, col, group, nb, band, pair_i, pair_j, pair_vals, qr, ct, active, d_criterion):
    """Detection efficiency of many orderings from the trials' regressor products.

    With R the trials' whitened (unfiltered) regressors and Q the nuisance basis, the information is
    M = Z'(R'R)Z - Y Y' with Y = Z'R'Q. R'R is zero unless two trials' responses overlap in time,
    so it is kept by diagonals: band (D, N, G, G, nb, nb) holds trial i's products with trial i + d
    by the two trials' duration groups (halved for d = 0: the sum with its transpose restores
    it), and pair_i, pair_j, pair_vals list the few overlapping pairs further apart (responses
    that wrap round a circular run). qr (N, G, nb, r) holds R'Q.
    """
    n_designs, n_trials = codes.shape
    r = qr.shape[3]
    p = ct.shape[0]
    out = np.empty(n_designs)
    m = np.empty((p, p))
    w = p + nb  # rows and columns from p on gather the baseline's terms, so the loops need no branch
    acc = np.empty(w * w)
    acc2 = acc.reshape((w, w))
    own = np.zeros(w)
    y = np.empty((w, r))
    work = np.empty((p, p))
    half = np.empty((p, ct.shape[1]))
    cols = np.empty(n_trials, dtype=np.int64)
    groups = np.empty(n_trials, dtype=np.int64)
    simple = nb == 1 and band.shape[2] == 1
    for b in range(n_designs):
        acc[:] = 0.0
        y[:] = 0.0
        for t in range(n_trials):
            z = codes[b, t]
            cols[t] = col[z] if col[z] >= 0 else p
            groups[t] = group[z]
        for t in range(n_trials):
            c = cols[t]
            g = groups[t]
            for i in range(nb):
                for a in range(r):
                    y[c + i, a] += qr[t, g, i, a]
        if simple:  # one regressor per trial and one duration: the inner loop is a plain gather-add
            for d in range(band.shape[0]):
                for t in range(n_trials - d):
                    acc[cols[t] * w + cols[t + d]] += band[d, t, 0, 0, 0, 0]
        else:
            for d in range(band.shape[0]):
                for t in range(n_trials - d):
                    gi = groups[t]
                    gj = groups[t + d]
                    for i in range(nb):
                        for j in range(nb):
                            acc2[cols[t] + i, cols[t + d] + j] += band[d, t, gi, gj, i, j]
        for k in range(len(pair_i)):
            ti = pair_i[k]
            tj = pair_j[k]
            for i in range(nb):
                for j in range(nb):
                    acc2[cols[ti] + i, cols[tj] + j] += pair_vals[k, groups[ti], groups[tj], i, j]
        _assemble(m, acc2, own, y)
        out[b] = _efficiency(m, ct, active, d_criterion, work, half)
    return out


@njit(cache=True, fastmath=_FAST)
def schur_scores(
    mss,
    a0,
    h0,
    active,
    const,
    e,
    eg,
    us,
    cross_kind,
    gram,
    omega,
    fir_scan,
    group,
    nb,
    conds,
    blocks,
    trials,
    signs,
    d_criterion,
):
    """Scores of candidates that all change the same one or two condition blocks S of the design,
    from the Cholesky factor of the untouched part R, done once outside.

    Ordered (R, S), M' = [[L_RR, 0], [L_SR, L_S]] [...]' with L_SR = M'_SR L_RR^-T, which is
    a0 = M_SR L_RR^-T plus, per changed trial, e = (L_RR^-1 u_R)' (u = X' times the trial's
    regressor); L_S is the Cholesky factor of the Schur complement M'_SS - L_SR L_SR'. Then
    L'^-1 C' has rows G_R = L_RR^-1 C_R' (unchanged; const holds ||G_R||^2, or G_R'G_R for D)
    and L_S^-1 (C_S' - L_SR G_R), where L_SR G_R is h0's complement plus eg = e G_R per trial.

    mss (s, s): M_SS; a0 (s, r); h0 (s, q): C_S' - a0 G_R with columns in prepare_contrast's
    order and active (s,) its counts; e (G, N, nb, r), eg (G, N, nb, q), us (G, N, s, nb): the
    per-trial terms by duration group (us = u_S); blocks (n_cand, T): each term's block in S
    (-1: baseline, nothing to do). The rest as in update_scores.
    """
    n_cand, n_terms = conds.shape
    s = mss.shape[0]
    r = a0.shape[1]
    q = h0.shape[1]
    out = np.empty(n_cand)
    m = np.empty((s, s))
    lsr = np.empty((s, r))
    hh = np.empty((s, q))
    comp = np.empty((s, s))
    work = np.empty((s, s))
    for k in range(n_cand):
        m[:] = mss
        lsr[:] = a0
        hh[:] = h0
        for a in range(n_terms):
            bk = blocks[k, a]
            if bk < 0:
                continue
            t = trials[k, a]
            sg = signs[a]
            g = group[conds[k, a]]
            for i in range(nb):
                row = bk * nb + i
                for j in range(r):
                    lsr[row, j] += sg * e[g, t, i, j]
                for j in range(q):
                    hh[row, j] -= sg * eg[g, t, i, j]
                for j in range(row):
                    m[row, j] += sg * us[g, t, j, i]
                for j in range(row, s):
                    m[j, row] += sg * us[g, t, j, i]
                m[row, row] += sg * us[g, t, row, i]
        for a in range(n_terms):
            ba = blocks[k, a]
            if ba < 0:
                continue
            c1 = conds[k, a]
            t1 = trials[k, a]
            for b2 in range(a, n_terms):
                bb = blocks[k, b2]
                if bb < 0:
                    continue
                c2 = conds[k, b2]
                t2 = trials[k, b2]
                sg = signs[a] * signs[b2]
                for i in range(nb):
                    for j in range(nb):
                        if cross_kind == 0:
                            v = gram[group[c1], group[c2], t1, i, t2, j]
                        else:
                            v1 = fir_scan[t1, i]
                            v2 = fir_scan[t2, j]
                            v = omega[v1, v2] if v1 >= 0 and v2 >= 0 else 0.0
                        x = ba * nb + i
                        y = bb * nb + j
                        if b2 != a:
                            _add_lower(m, x, y, sg * v)
                        elif x >= y:
                            m[x, y] += sg * v
        # Schur complement, lower triangle, factorised with pivots judged against M'_SS's diagonal
        for i in range(s):
            for j in range(i + 1):
                t = 0.0
                for c in range(r):
                    t += lsr[i, c] * lsr[j, c]
                comp[i, j] = m[i, j] - t
        if not _cholesky_against(comp, work, RCOND, m):
            out[k] = 0.0
            continue
        out[k] = _solved_score(work, hh, active, d_criterion, const[0, 0], const)
    return out


@njit(cache=True, fastmath=_FAST)
def rank2_scores(minv, h, t0, xp, y, z, gram, col, gains, loses, t1, t2):
    """A-efficiency after moving regressor d from condition `loses` to condition `gains`, where
    d is trial t1's regressor, minus trial t2's when t2 >= 0 (a swap): one regressor per
    condition and one duration group only.

    With u = X'd and v = e_gains - e_loses, M' = M + u v' + v u' + (d'd) v v' = M + W C W' with
    W = [u, v] and C = [[0, 1], [1, d'd]], so by Woodbury trace(C M'^-1 C') follows from
    t0 = trace(C M^-1 C'), minv = M^-1, h = M^-1 C'C M^-1 and 2 x 2 algebra; y = xp minv and
    z = xp h hold the per-trial products. NaN where the update nearly cancels (the caller scores
    those in full).
    """
    n = len(t1)
    out = np.empty(n)
    p = minv.shape[0]
    for k in range(n):
        b = col[gains[k]]
        a = col[loses[k]]
        if a == b:  # the same condition, or baseline to baseline: nothing changes
            out[k] = 1.0 / t0
            continue
        i = t1[k]
        j = t2[k]
        umu = 0.0
        uhu = 0.0
        if j >= 0:
            dd = gram[i, i] + gram[j, j] - 2.0 * gram[i, j]
            for c in range(p):
                u = xp[i, c] - xp[j, c]
                umu += u * (y[i, c] - y[j, c])
                uhu += u * (z[i, c] - z[j, c])
        else:
            dd = gram[i, i]
            for c in range(p):
                umu += xp[i, c] * y[i, c]
                uhu += xp[i, c] * z[i, c]
        umv = 0.0
        uhv = 0.0
        vmv = 0.0
        vhv = 0.0
        if b >= 0:
            umv += y[i, b] - (y[j, b] if j >= 0 else 0.0)
            uhv += z[i, b] - (z[j, b] if j >= 0 else 0.0)
            vmv += minv[b, b]
            vhv += h[b, b]
        if a >= 0:
            umv -= y[i, a] - (y[j, a] if j >= 0 else 0.0)
            uhv -= z[i, a] - (z[j, a] if j >= 0 else 0.0)
            vmv += minv[a, a]
            vhv += h[a, a]
        if a >= 0 and b >= 0:
            vmv -= 2.0 * minv[a, b]
            vhv -= 2.0 * h[a, b]
        k00 = umu - dd
        k01 = 1.0 + umv
        det = k00 * vmv - k01 * k01
        if abs(det) <= 1e-8 * (abs(k00 * vmv) + k01 * k01):
            out[k] = np.nan
            continue
        tr = t0 - (vmv * uhu - 2.0 * k01 * uhv + k00 * vhv) / det
        out[k] = 1.0 / tr if tr > 1e-8 * t0 else np.nan
    return out
