"""The map-quality pass as first written (map2d, 2026-12-03, before issue 17's speed-up), kept as the
test reference for :mod:`map2d.quality`: every training frame fits the decile nonlinearity, the
generator is computed for every frame in every fold, and sums are float64 where the new pass keeps
float32. Slow (about 15 s of CPU per 64 cells on a 1-hour session): small simulated sessions only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from map2d.contract import SparseNoise
from map2d.quality import QUALITY_COLUMNS, _design, _padded, lag_design, spearman_brown

_CELL_CHUNK = 64


@dataclass
class BlockSums:
    """Per-block sums of a sparse-noise session (see the module docstring).

    Attributes
    ----------
    sums : ndarray float64 (n_blocks, L, 2P, C)  sums of the centred response; columns ``0..P-1`` bright
        spots, ``P..2P-1`` dark spots
    counts : ndarray float64 (n_blocks, L, 2P, C or 1)  number of (spot, valid response) pairs (one column
        shared by every cell when all cells' responses are valid in the same frames)
    lags : ndarray int (L,)
    block_of_row : ndarray int (rows,)  block of each response row
    """

    sums: np.ndarray
    counts: np.ndarray
    lags: np.ndarray
    block_of_row: np.ndarray

    @property
    def n_blocks(self) -> int:
        return int(self.sums.shape[0])

    def maps(self, blocks):
        """``(on, off)`` mean maps ``(L, P, C)`` over the given blocks (NaN where no pair)."""
        return _mean_maps(self.sums[blocks].sum(axis=0), self.counts[blocks].sum(axis=0))


def _mean_maps(s, n):
    """``(on, off)`` mean maps from summed sums ``s`` (L, 2P, C) and counts ``n`` (L, 2P, C or 1)."""
    P = s.shape[1] // 2
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(n > 0, s / n, np.nan)
    return m[:, :P], m[:, P:]


def block_sums(X, V, B, lags, n_blocks, design=None):
    """Per-block, per-lag sums ``B[t]^T X[t + l]`` and counts ``B[t]^T V[t + l]`` (pairs assigned to the
    block of the response row ``t + l``).

    Parameters
    ----------
    X : ndarray (rows, C)  centred responses, 0 where invalid
    V : ndarray (rows, C)  1.0 where the response is valid, else 0
    B : scipy.sparse csr (rows, 2P)  spot indicators
    lags : ndarray int (L,)
    n_blocks : int
    design : csr, optional  ``lag_design(B, lags)`` when already built

    Returns
    -------
    BlockSums

    Notes
    -----
    One sparse product per block over every lag (:func:`lag_design`), in float32 (an entry sums a few
    dozen pairs per block; the blocks are added in float64).
    """
    F, C = X.shape
    P2 = B.shape[1]
    edges = np.linspace(0, F, n_blocks + 1).round().astype(int)
    sums = np.zeros((n_blocks, lags.size, P2, C))
    if C and bool((V == V[:, :1]).all()):      # every cell valid in the same frames: one count column
        V = V[:, :1]
    counts = np.zeros((n_blocks, lags.size, P2, V.shape[1]))
    lags = np.asarray(lags, int)
    D = lag_design(B, lags) if design is None else design
    X32, V32 = np.asarray(X, np.float32), np.asarray(V, np.float32)
    for b in range(n_blocks):
        a, e = edges[b], edges[b + 1]
        if e <= a:
            continue
        Dt = D[a:e].T
        sums[b] = (Dt @ X32[a:e]).reshape(lags.size, P2, C)
        counts[b] = (Dt @ V32[a:e]).reshape(lags.size, P2, -1)
    block_of_row = np.repeat(np.arange(n_blocks), np.diff(edges))
    return BlockSums(sums, counts, np.asarray(lags), block_of_row)


def _corr_cols(a, b):
    """Pearson correlation of matching columns of ``a``, ``b`` (N, C) over rows finite in both."""
    ok = np.isfinite(a) & np.isfinite(b)
    n = ok.sum(axis=0)
    a = np.where(ok, a, 0.0)
    b = np.where(ok, b, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        ma, mb = a.sum(0) / n, b.sum(0) / n
        da, db = np.where(ok, a - ma, 0.0), np.where(ok, b - mb, 0.0)
        r = (da * db).sum(0) / np.sqrt((da * da).sum(0) * (db * db).sum(0))
    return np.where(n >= 3, r, np.nan)


def map_reliability(bs: BlockSums, use_onoff, level: float = 0.95):
    """Split-half reliability of each cell's space-time map, Spearman-Brown corrected, with an interval.

    Parameters
    ----------
    bs : BlockSums  with an even number of blocks (``2 m``, ``m >= 3``)
    use_onoff : array of bool (C,)  True: correlate ON + OFF maps, False: linear (ON - OFF) maps
    level : float  coverage of the interval

    Returns
    -------
    rel, low, high : ndarray (C,)
        ``2 r / (1 + r)`` for the correlation ``r`` between the maps of the even and the odd blocks
        (all pixels and lags), and the interval's ends (jackknife over the ``m`` pairs of neighbouring
        blocks on ``atanh r``, Student's t with ``m - 1`` degrees of freedom, carried through the
        monotone Spearman-Brown formula).
    """
    nb = bs.n_blocks
    if nb % 2 or nb < 6:
        raise ValueError(f"map_reliability needs an even number of blocks >= 6, got {nb}")
    use_onoff = np.asarray(use_onoff, bool)
    m = nb // 2
    even, odd = np.arange(0, nb, 2), np.arange(1, nb, 2)

    sgn = np.where(use_onoff, 1.0, -1.0)

    def r_of(a, b):
        on_a, off_a = _mean_maps(*a)
        on_b, off_b = _mean_maps(*b)
        ma = (on_a + sgn * off_a).reshape(-1, on_a.shape[-1])
        mb = (on_b + sgn * off_b).reshape(-1, on_b.shape[-1])
        return _corr_cols(ma, mb)

    # the halves' totals once; a jackknife replicate leaves one pair of blocks out by subtraction
    tot_e = (bs.sums[even].sum(axis=0), bs.counts[even].sum(axis=0))
    tot_o = (bs.sums[odd].sum(axis=0), bs.counts[odd].sum(axis=0))
    r = r_of(tot_e, tot_o)

    def left_out(tot, b):
        return tot[0] - bs.sums[b], tot[1] - bs.counts[b]

    zj = np.stack([np.arctanh(np.clip(r_of(left_out(tot_e, even[j]), left_out(tot_o, odd[j])), -0.999999, 0.999999))
                   for j in range(m)])
    se = np.sqrt((m - 1) / m * np.sum((zj - zj.mean(0)) ** 2, axis=0))
    t = special.stdtrit(m - 1, 0.5 + level / 2)   # Student t quantile (scipy.stats.t.ppf), lighter import
    z = np.arctanh(np.clip(r, -0.999999, 0.999999))
    lo, hi = np.tanh(z - t * se), np.tanh(z + t * se)
    return spearman_brown(r), spearman_brown(lo), spearman_brown(hi)


def _fit_nonlinearity(g, y, n_bins=10):
    """Decile means of ``y`` against ``g`` (one column): bin centres and means, for interpolation."""
    edges = np.unique(np.quantile(g, np.linspace(0, 1, n_bins + 1)))
    if edges.size < 3:
        return np.array([np.mean(g)]), np.array([np.mean(y)])
    idx = np.clip(np.searchsorted(edges, g, side="right") - 1, 0, edges.size - 2)
    cnt = np.bincount(idx, minlength=edges.size - 1)
    keep = cnt > 0
    xc = np.bincount(idx, weights=g, minlength=edges.size - 1)[keep] / cnt[keep]
    yc = np.bincount(idx, weights=y, minlength=edges.size - 1)[keep] / cnt[keep]
    return xc, yc


def _nonlinearity_predict(g_tr, y_tr, g_te, n_bins=10):
    """Column by column, ``np.interp(g_te, *_fit_nonlinearity(g_tr, y_tr))`` (a constant when the training
    generator has fewer than 3 distinct decile edges): the deciles and bins of every column at once, the
    interpolation column by column. ``g_tr``, ``y_tr`` (n, C), ``g_te`` (m, C) -> (m, C)."""
    n, C = g_tr.shape
    cols = np.arange(C)
    # (n_bins + 1, C), non-decreasing; each column made contiguous first (a partition along rows is slow)
    q = np.quantile(np.ascontiguousarray(g_tr.T), np.linspace(0, 1, n_bins + 1), axis=1)
    # np.unique per column: repeated edges out (moved to the end as +inf)
    q[1:][q[1:] == q[:-1]] = np.inf
    edges = np.sort(q, axis=0)
    n_edges = np.isfinite(edges).sum(axis=0)                          # (C,)
    # the bin of each training value: edges <= value, less one, within the column's bins
    idx = np.zeros(g_tr.shape, np.int8)              # at most n_bins + 1 edges
    for e in edges:
        idx += g_tr >= e
    idx = np.clip(idx.astype(np.intp) - 1, 0, np.maximum(n_edges - 2, 0))
    flat = (idx + cols * n_bins).ravel()
    cnt = np.bincount(flat, minlength=C * n_bins).reshape(C, n_bins)
    sg = np.bincount(flat, weights=g_tr.ravel(), minlength=C * n_bins).reshape(C, n_bins)
    sy = np.bincount(flat, weights=y_tr.ravel(), minlength=C * n_bins).reshape(C, n_bins)
    keep = cnt > 0
    out = np.empty((C, g_te.shape[0]))
    te = np.ascontiguousarray(g_te.T)
    for c in range(C):                               # numpy.interp on each column's kept bins
        if n_edges[c] < 3:
            out[c] = y_tr[:, c].mean()
            continue
        k = keep[c]
        xc, yc = sg[c, k] / cnt[c, k], sy[c, k] / cnt[c, k]
        out[c] = np.interp(te[c], xc, yc) if xc.size > 1 else yc[0]
    return out.T


def prediction_r(bs: BlockSums, B, X, V, n_folds: int = 4, design=None):
    """Cross-validated correlation between the measured responses and a linear-nonlinear prediction.

    Fold ``k`` holds the blocks ``b`` with ``b % n_folds == k``; the ON and OFF maps of the other blocks
    make the generator signal (module docstring), the nonlinearity is fitted on the other blocks'
    frames, and the prediction of fold ``k``'s frames is compared with their responses. Returns
    ``r`` (C,): NaN when a cell has fewer than 10 valid held-out frames or a constant response.
    The generator of all cells and lags is one float32 sparse product per fold (:func:`lag_design`).
    """
    F, C = X.shape
    lags = bs.lags
    D = lag_design(B, lags) if design is None else design
    fold_of_row = bs.block_of_row % n_folds
    pred = np.full((F, C), np.nan)
    all_s, all_n = bs.sums.sum(axis=0), bs.counts.sum(axis=0)
    same_rows = C > 0 and bool((V == V[:, :1]).all())     # every cell valid in the same frames
    # per fold: the sum of squared responses (X is 0 where not valid) and the valid frames
    x2 = np.array([(X[fold_of_row == k] ** 2).sum(axis=0) for k in range(n_folds)])
    nv = np.array([(V[fold_of_row == k] > 0).sum(axis=0) for k in range(n_folds)])
    for k in range(n_folds):
        fold_blocks = np.flatnonzero(np.arange(bs.n_blocks) % n_folds == k)
        # the other blocks' totals: all blocks less this fold's
        n = all_n - bs.counts[fold_blocks].sum(axis=0)            # (L, 2P, C or 1)
        on, off = _mean_maps(all_s - bs.sums[fold_blocks].sum(axis=0), n)     # (L, P, C)
        W = np.nan_to_num(np.concatenate([on, off], axis=1))     # (L, 2P, C)
        # each coefficient shrunk by its own noise (positive-part James-Stein factor per coefficient):
        # a mean of n responses of variance s^2 has noise variance s^2 / n
        s2 = (x2.sum(0) - x2[k]) / np.maximum(nv.sum(0) - nv[k], 1)     # (C,) over the training frames
        with np.errstate(invalid="ignore", divide="ignore"):
            W = W * np.clip(1.0 - s2 / (n * W ** 2), 0.0, 1.0)
        W = np.nan_to_num(W)
        g = np.asarray(D @ W.reshape(-1, C).astype(np.float32), np.float64)     # sum_l B[t - l] W_l
        test = fold_of_row == k
        if same_rows:                                 # every cell at once (same frames)
            tr, te = (~test) & (V[:, 0] > 0), test & (V[:, 0] > 0)
            if tr.sum() >= 20 and te.any():
                pred[te] = _nonlinearity_predict(g[tr], X[tr], g[te])
            continue
        for c in range(C):
            tr = (~test) & (V[:, c] > 0)
            te = test & (V[:, c] > 0)
            if tr.sum() < 20 or not te.any():
                continue
            xc, yc = _fit_nonlinearity(g[tr, c], X[tr, c])
            pred[te, c] = np.interp(g[te, c], xc, yc) if xc.size > 1 else yc[0]
    Xn = np.where(V > 0, X, np.nan)
    r = _corr_cols(pred, Xn)
    n = (np.isfinite(pred) & np.isfinite(Xn)).sum(axis=0)
    return np.where(n >= 10, r, np.nan)


def map_quality(responses, noise: SparseNoise, max_lag_s: float, use_onoff=None, n_blocks: int = 16,
                n_folds: int = 4) -> dict:
    """``map_reliability`` (with its interval) and ``prediction_r`` for every cell.

    Parameters
    ----------
    responses : Spikes or Traces
        The responses the maps were made from (for traces: after the indicator-decay step).
    noise : SparseNoise
        Sparse (int8) frames; for dense noise every value is NaN.
    max_lag_s : float
        As for :func:`map2d.maps.compute_maps` (same lags).
    use_onoff : array of bool (C,), optional
        Cells whose map is ON + OFF (default: none).
    n_blocks, n_folds : int
        Blocks of time (even, >= 6) and cross-validation folds (``n_blocks % n_folds == 0`` keeps folds
        equal).

    Returns
    -------
    dict of :data:`QUALITY_COLUMNS` -> ndarray (C,)
    """
    from map2d.maps import frame_responses, map_lags
    C = int(np.asarray(responses.cell_ids).size)
    out = {k: np.full(C, np.nan) for k in QUALITY_COLUMNS}
    if not np.issubdtype(noise.frames.dtype, np.integer):
        return out
    lags = map_lags(noise.frame_interval_s, max_lag_s)
    B, P, layout = _design(noise, int(lags[-1]))
    R = _padded(frame_responses(responses, noise), layout)        # (rows, C)
    D = lag_design(B, lags)                                       # every lag in one sparse matrix
    use_onoff = np.zeros(C, bool) if use_onoff is None else np.asarray(use_onoff, bool)
    for a in range(0, C, _CELL_CHUNK):
        sl = slice(a, min(C, a + _CELL_CHUNK))
        Rc = R[:, sl].astype(np.float64)
        V = np.isfinite(Rc).astype(np.float64)
        with np.errstate(invalid="ignore"):
            mean = np.nansum(Rc, axis=0) / np.maximum(V.sum(0), 1)
        X = np.where(V > 0, Rc - mean, 0.0)
        bs = block_sums(X, V, B, lags, n_blocks, design=D)
        rel, lo, hi = map_reliability(bs, use_onoff[sl])
        out["map_reliability"][sl], out["map_reliability_ci_low"][sl], out["map_reliability_ci_high"][sl] = rel, lo, hi
        out["prediction_r"][sl] = prediction_r(bs, B, X, V, n_folds, design=D)
    return out
