"""``flashed_signal_p`` as it was before it was restructured for speed (issue 17), kept only as the
reference that ``tests/test_speed_same_numbers.py`` compares :func:`map2d.analysis.flashed_signal_p` with:
same seeds, same numbers. Not used by map2d. (The permutation statistic was recomputed whole for every
permutation, the fit over phase included, although a permutation keeps every condition's count.)
"""
# ruff: noqa
from __future__ import annotations

import numpy as np

from map2d.analysis import _flashed_presentations


def flashed_signal_p(responses, table, flashed, n_shuffles=199, rng=None, cells=None):
    """P-value that each cell's lag-pooled first-harmonic surface holds more than noise, the choice of
    the cell's temporal profile included.

    The surface that :func:`map2d.reconcile.forward_agreement` judges pools the lags with the cell's
    temporal profile, the first singular vector of its own (conditions x lags) condition means
    (:func:`map2d.gratings.analyze_flashed`). That profile is chosen to capture as much of the measured
    means as it can, noise included, so for a cell that gratings do not drive the pooled surface holds
    more power than the noise of fixed weights predicts, and a chi-square test that takes the weights
    as fixed rejects too often (on 900 simulated cells firing at 2-15 spikes/s without any grating
    response, 3 min of 6 x 4 x 4 conditions: 19 % of its p-values below 0.05, 5 % below 0.01).

    Here the statistic ``T = sum_k |H_k|^2 / sum_k v_k`` (power of the pooled first-harmonic surface over
    its noise power; ``v_k`` carries the pooled response's residual variance ``w' S w``, ``S`` the
    residual covariance across lags, divided by the condition's count through the fit over phase; with
    missing responses the per-condition spread of single presentations, as :func:`flashed_noise`) is
    recomputed with the condition sequence permuted ``n_shuffles`` times, and each time *everything* is
    redone from the permuted means: the reference, the temporal profile (first right singular vector),
    the noise covariance across lags and the weights ``w`` (:func:`map2d.gratings._lag_weights`), the
    pooled means and their noise. Under the null (the responses do not depend on the
    gratings shown, the sequence random) every permutation is as likely as the one shown, so this is
    the statistic's null distribution, profile choice included. The observed ``T`` is referred to the
    scaled chi-square with the first two moments of the permutation values (Satterthwaite 1946), which
    extends the null beyond the smallest p-value the permutations alone could give (``1 / (n + 1)``;
    the test is used at 0.001). The presentations used are those whose lags all fall in the sequence.

    Parameters
    ----------
    responses : Spikes or Traces
    table : GratingTable
    flashed : map2d.gratings.FlashedResult
        The analysis of the same table (its axes, frame, lags and condition contrasts).
    n_shuffles : int
        Permutations of the condition sequence (at least 20).
    rng : numpy.random.Generator or int, optional
    cells : array_like of bool (C,), optional
        Only these cells (the others NaN); the cost is about 15 ms per cell for 3 min at 10 Hz, 50 ms
        for 15 min.

    Returns
    -------
    numpy.ndarray (C,) or None
        NaN where it cannot be computed; None when the sequence does not match ``flashed`` or is too
        short.
    """
    from scipy import sparse
    from scipy.stats import chi2

    from map2d.align import interval_responses
    from map2d.gratings import _frame_windows, _lag_weights

    if int(n_shuffles) < 20:
        raise ValueError(f"n_shuffles must be >= 20, got {n_shuffles}")
    rng = np.random.default_rng(rng)
    pres = _flashed_presentations(table, flashed, min_rows=4)
    if pres is None:
        return None
    onset, offset, contrast, cond, stim, (n_o, n_s, n_p) = pres
    n_c = n_o * n_s * n_p
    cond = np.where(stim, cond, n_c)     # n_c: the blanks
    frame, end = _frame_windows(onset, offset)
    L = flashed.lags_s.size
    if not np.isclose(frame, flashed.frame_s) or L == 0:
        return None
    r = interval_responses(responses, onset, end).astype(np.float64)      # (C, n)
    n_cells, n = r.shape
    pick = np.ones(n_cells, bool) if cells is None else np.asarray(cells, bool).ravel()
    out = np.full(n_cells, np.nan)
    if not pick.any():
        return out
    r = r[pick]
    C = r.shape[0]
    k = np.arange(max(n - L + 1, 0))
    valid = stim[k] | (contrast[k] == 0)
    for lag in range(L):
        valid &= np.abs(onset[k + lag] - onset[k] - lag * frame) < 0.5 * frame
    k = k[valid]
    K, G = k.size, n_c + 1
    if K < 4:
        return None
    R = np.stack([r[:, k + lag].T for lag in range(L)], axis=2)           # (K, C, L)
    fin = np.isfinite(R)
    no_nan = bool(fin.all())
    F = fin.astype(float)
    R0 = np.where(fin, R, 0.0)
    R0f, Ff = R0.reshape(K, C * L), F.reshape(K, C * L)
    cnt_ff = np.einsum("kcl,kcm->clm", F, F)
    RL = None if no_nan else np.ascontiguousarray(np.moveaxis(R0, 2, 0))  # (L, K, C)
    # sum over presentations of r r' per cell (the residual covariance by subtraction, below)
    rr = np.matmul(np.moveaxis(R0, 0, 1).transpose(0, 2, 1), np.moveaxis(R0, 0, 1))   # (C, L, L)
    lab = cond[k]
    has_blank = bool((lab == n_c).any())
    phi = np.deg2rad(flashed.phases_deg)
    g = np.stack([np.ones_like(phi), np.cos(phi), np.sin(phi)], axis=1)    # (P, 3)
    cc2 = np.asarray(flashed.condition_contrast, float) ** 2                # (O, S)
    cols = np.arange(K)

    def statistic(labels):
        onehot = sparse.csr_matrix((np.ones(K), (labels, cols)), shape=(G, K))
        s = np.asarray(onehot @ R0f).reshape(G, C, L)
        if no_nan:
            cnt = np.broadcast_to(np.bincount(labels, minlength=G).astype(float)[:, None, None], s.shape)
        else:
            cnt = np.asarray(onehot @ Ff).reshape(G, C, L)
        m0 = np.where(cnt > 0, s / np.where(cnt > 0, cnt, 1.0), 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            all_mean = s[:n_c].sum(axis=0) / cnt[:n_c].sum(axis=0)
        ref = np.where(cnt[n_c] > 0, m0[n_c], all_mean) if has_blank else all_mean
        d = np.where(cnt[:n_c] > 0, m0[:n_c] - np.nan_to_num(ref)[None], 0.0)     # (n_c, C, L)
        # the temporal profile: first right singular vector of (conditions x lags) = top eigenvector
        # of the lags' Gram matrix
        dc = np.moveaxis(d, 0, 1)                                                 # (C, n_c, L)
        gram = np.matmul(dc.transpose(0, 2, 1), dc)
        profile = np.linalg.eigh(gram)[1][..., -1]
        profile = np.where(gram.any(axis=(1, 2))[:, None], profile, 0.0)
        # noise covariance across lags: residuals about the condition means (as analyze_flashed)
        if no_nan:      # sum of r r' minus sum over groups of n m m'
            mc = np.moveaxis(m0, 0, 1)                                            # (C, G, L)
            between = np.matmul(mc.transpose(0, 2, 1), mc * np.moveaxis(cnt[..., :1], 0, 1))
            cov = (rr - between) / np.maximum(cnt_ff, 1)
        else:
            e = (R0 - m0[labels]) * F
            with np.errstate(invalid="ignore", divide="ignore"):
                cov = np.where(cnt_ff > 1, np.einsum("kcl,kcm->clm", e, e) / np.maximum(cnt_ff, 1), np.nan)
        w = _lag_weights(profile, cov)                                         # (C, L)
        if no_nan:
            # pooled condition means from the lags' means; their noise from the pooled residual
            # variance w' S w (one variance for all conditions: no pass over the presentations)
            c1 = np.broadcast_to(cnt[:n_c, :, 0], (n_c, C))
            m = np.einsum("gcl,cl->gc", m0[:n_c], w)
            var_y = np.maximum(np.einsum("cl,clm,cm->c", w, cov, w), 0.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                vm = np.where(c1 >= 2, var_y[None, :] / np.where(c1 > 0, c1, 1.0), np.nan)
        else:
            y = RL[0] * w[None, :, 0]
            for lag in range(1, L):
                y += RL[lag] * w[None, :, lag]
            y_ok = np.all(fin | (w == 0)[None], axis=2).astype(float)             # (K, C)
            y = np.where(y_ok > 0, y, 0.0)
            c1 = np.asarray(onehot @ y_ok)[:n_c]                                 # (n_c, C)
            s1 = np.asarray(onehot @ y)[:n_c]
            s2 = np.asarray(onehot @ (y * y))[:n_c]
            with np.errstate(invalid="ignore", divide="ignore"):
                m = np.where(c1 > 0, s1 / np.where(c1 > 0, c1, 1.0), 0.0)
                vm = np.where(c1 >= 2, np.maximum(s2 - s1 * m, 0.0) / np.maximum(c1 - 1, 1)
                              / np.where(c1 > 0, c1, 1), np.nan)
        m = m.T.reshape(C, n_o, n_s, n_p)
        vm = vm.T.reshape(C, n_o, n_s, n_p)
        avail = (c1.T > 0).reshape(C, n_o, n_s, n_p)
        wa = avail[:1] if no_nan else avail          # the same presentations for every cell
        a = np.einsum("cosp,pa,pb->cosab", wa.astype(float), g, g)
        good = np.abs(np.linalg.det(a)) > 1e-9
        a = np.where(good[..., None, None], a, np.eye(3))
        lsq = np.linalg.solve(a, np.einsum("pa,cosp->cosap", g, wa.astype(float)))[..., 1:, :]   # (c, O, S, 2, P)
        coef = np.einsum("cosap,cosp->cosa", np.broadcast_to(lsq, (C,) + lsq.shape[1:]), m)
        power = np.sum(coef**2, axis=-1) / cc2                                  # |H|^2
        with np.errstate(invalid="ignore"):
            v = np.sum(np.where(avail, np.sum(lsq**2, axis=-2) * np.nan_to_num(vm), 0.0), axis=-1) / cc2
            use = good & np.all(~avail | np.isfinite(vm), axis=-1) & avail.any(axis=-1) & np.isfinite(cc2)
        mm = np.sum(np.where(use, power, 0.0), axis=(1, 2))
        noise = np.sum(np.where(use, v, 0.0), axis=(1, 2))
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(noise > 0, mm / noise, np.nan)

    observed = statistic(lab)
    null = np.stack([statistic(lab[rng.permutation(K)]) for _ in range(int(n_shuffles))])
    with np.errstate(invalid="ignore", divide="ignore"):
        mu = np.nanmean(null, axis=0)
        var = np.nanvar(null, axis=0, ddof=1)
        ok = np.isfinite(observed) & (np.isfinite(null).sum(axis=0) >= 20) & (mu > 0) & (var > 0)
        scale = np.where(ok, var / (2 * np.where(ok, mu, 1.0)), 1.0)
        nu = np.where(ok, 2 * mu**2 / np.where(ok, var, 1.0), 1.0)
        out[pick] = np.where(ok, chi2.sf(observed / scale, nu), np.nan)
    return out
