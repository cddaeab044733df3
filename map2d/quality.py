"""Map quality you can rank cells by: split-half reliability and cross-validated prediction.

Both statistics rest on one pass over the sparse-noise session that keeps, for each of ``2 m``
consecutive blocks of time (default 16) and each lag, the sums of the centred response over the
frames after a bright and after a dark spot at every pixel, and the number of such frames
(:func:`block_sums`). A pair (stimulus frame ``t``, response frame ``t + l``) belongs to the block of its
*response* frame, so a map made from some blocks used only those blocks' responses. Maps of any set of
blocks are then sums and ratios, with no second pass over the data.

- :func:`map_reliability`: correlation between the space-time maps (all pixels and lags) of the even
  and the odd blocks (interleaved halves, so slow drifts of the cell's state fall into both), corrected
  to the whole session's length with the Spearman-Brown formula ``2 r / (1 + r)`` (Spearman 1910;
  Brown 1910), with a 95 % interval from a jackknife over the ``m`` pairs of neighbouring blocks on
  Fisher's ``z = atanh r`` (Efron & Tibshirani 1993, chapter 11). The map is the linear map (ON - OFF)
  or, for cells whose map is ON + OFF (coextensive ON and OFF regions), ON + OFF. For a cell with no
  receptive field the two halves are independent noise: ``r`` is centred on 0.
- :func:`prediction_r`: a linear-nonlinear model (Chichilnisky 2001) fitted on all blocks but one
  fold, tested on the held-out fold: the generator signal of a frame is the sum, over lags and over
  the spots shown ``l`` frames earlier, of the ON map (bright spot) or the OFF map (dark spot) at that
  pixel and lag (the first-order model of a sparse design: linear in the spot indicators, so it covers
  cells with coextensive ON and OFF regions too); the static nonlinearity is the mean response in
  deciles of the training generator, interpolated linearly. ``prediction_r`` is Pearson's correlation
  between the held-out predictions of all folds and the measured frame responses. It is bounded by
  the response's own trial-to-trial noise (Poisson spiking in 50-ms frames keeps it well below 1 even
  for a perfect model), so it ranks cells of one session; compare sessions with care.

  The deciles are taken over a fixed, evenly spaced sample of the session's frames (at most
  :data:`FIT_FRAMES`; each fold uses the sampled frames outside it), not over every training frame: a
  decile mean of a few thousand frames is as precise as the model needs, and the generator is then
  computed for the held-out frames and this sample only. On the 1-hour, 500-cell benchmark session
  (216 000 frames) this moved ``prediction_r`` by a median 0.0003 (95 % of cells under 0.0022, the
  largest 0.0067; no bias: mean -0.00004) against the deciles of every training frame, while its own
  standard error (the spread of the statistic over the 16 blocks of frames, over 4) is a median 0.0031:
  a median 0.09 of it, 0.6 of it at the 95th percentile. Sessions with fewer frames than the sample
  use every training frame (the values of the full fit, to float32 rounding).

How it is computed, and its memory: cells are taken in chunks of :data:`CELL_CHUNK`; for each chunk
the centred responses are built block by block of frames (from the spike list, never a frames x cells
matrix), the block sums are one float32 sparse product per lag and block of frames, and the held-out
generator is again one product per lag and block. Held in memory beyond the loaded session: the
sparse stimulus matrix, the chunk's block sums (``n_blocks x lags x 2 pixels x CELL_CHUNK`` float32,
109 MB for 13 lags on 32 x 32) and the reliability's work maps (a few ``lags x pixels x CELL_CHUNK``),
the nonlinearity's frame sample (``FIT_FRAMES x CELL_CHUNK``) and blocks of 16 384 frames: none of
it grows with the number of cells, and only the stimulus matrix with the session's length. Traces
are read from their per-frame means (cells x frames, the size of the traces themselves). The sums and
the held-out generator accumulate in place with scipy's compiled sparse kernels (the public sparse
products when those are not importable).

References
----------
Spearman C (1910) Correlation calculated from faulty data. Br J Psychol 3:271-295.
Brown W (1910) Some experimental results in the correlation of mental abilities. Br J Psychol 3:296-322.
Efron B, Tibshirani RJ (1993) An Introduction to the Bootstrap. Chapman & Hall (the jackknife, ch. 11).
Chichilnisky EJ (2001) A simple white noise analysis of neuronal light responses. Network 12:199-213.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .contract import SparseNoise

__all__ = ["BlockSums", "block_sums", "lag_design", "map_reliability", "prediction_r", "spearman_brown",
           "map_quality", "QUALITY_COLUMNS", "FIT_FRAMES", "CELL_CHUNK"]

#: Columns :func:`map_quality` adds to ``cells.csv``.
QUALITY_COLUMNS = ("map_reliability", "map_reliability_ci_low", "map_reliability_ci_high", "prediction_r")

#: Cells per pass (bounds the memory of the per-block sums).
CELL_CHUNK = 64
#: Frames (evenly spaced over the session) whose generator and response fit the decile nonlinearity.
FIT_FRAMES = 24576
_ROW_CHUNK = 16384         # response frames per streamed block
_SUB_ROWS = 2048           # frames per step of the elementwise work (kept in cache)
_N_BINS = 10               # deciles


# ------------------------------------------------------------------------------------------------
# responses, chunk by chunk of cells and block by block of frames
# ------------------------------------------------------------------------------------------------
class _ArrayRows:
    """Centred responses held in memory: ``X`` (rows, C), 0 where invalid; ``V`` (rows, C or 1) 1.0 where
    valid (one column when every cell is valid in the same rows)."""

    def __init__(self, X, V):
        X = np.asarray(X)
        V = np.asarray(V, np.float32)
        if X.shape[1] and V.shape[1] > 1 and bool((V == V[:, :1]).all()):
            V = V[:, :1]
        self.X32 = np.ascontiguousarray(X, dtype=np.float32)
        self.V = np.ascontiguousarray(V)
        self.n_rows, self.C = X.shape

    def rows(self, a, e):
        return self.X32[a:e], self.V[a:e]

    def take(self, idx):
        return self.X32[idx], self.V[idx]


class _SpikeRows:
    """Centred spike rates (spikes/s minus the cell's mean over valid rows) of a chunk of cells, built
    block by block of rows from the spike list (row, cell, 1 / frame duration), rows sorted."""

    def __init__(self, k, col, w, n_rows, mean32, row_valid):
        self.k, self.col, self.w = k, col, w
        self.n_rows, self.C = n_rows, mean32.size
        self.mean32 = mean32
        self.row_valid = row_valid
        self.V = (np.ones((n_rows, 1), np.float32) if row_valid is None
                  else row_valid[:, None].astype(np.float32))

    def _build(self, n, flat, w, valid):
        X = np.empty((n, self.C), np.float32)
        X[:] = -self.mean32
        np.add.at(X.reshape(-1), flat, w)
        if valid is not None:
            X[~valid] = 0.0
        return X

    def rows(self, a, e):
        i, j = np.searchsorted(self.k, [a, e])
        X = self._build(e - a, (self.k[i:j] - a) * self.C + self.col[i:j], self.w[i:j],
                        None if self.row_valid is None else self.row_valid[a:e])
        return X, self.V[a:e]

    def take(self, idx):
        pos = np.full(self.n_rows, -1, np.int64)
        pos[idx] = np.arange(idx.size)
        p = pos[self.k]
        ok = p >= 0
        X = self._build(idx.size, p[ok] * self.C + self.col[ok], self.w[ok],
                        None if self.row_valid is None else self.row_valid[idx])
        return X, self.V[idx]


def _spike_source(spikes, noise: SparseNoise, layout):
    """``chunk(a, e)`` -> :class:`_SpikeRows` of cells ``a .. e-1`` on the (gap-padded) timeline."""
    from .align import spikes_in_intervals
    starts, ends = noise.times_s, noise.frame_ends_s()
    k, col = spikes_in_intervals(spikes, starts, ends)
    w = (1.0 / (ends - starts)).astype(np.float32)[k]
    n_rows, row_valid, n_valid = starts.size, None, starts.size
    if layout is not None:
        row, n_rows, row_valid, valid = layout
        keep = valid[k]
        k, col, w = row[k[keep]], col[keep], w[keep]
        n_valid = int(valid.sum())
    if k.size > 1 and np.any(k[1:] < k[:-1]):
        order = np.argsort(k, kind="stable")
        k, col, w = k[order], col[order], w[order]
    C = int(np.asarray(spikes.cell_ids).size)
    mean = np.bincount(col, weights=w, minlength=C) / max(n_valid, 1)

    def chunk(a, e):
        sel = (col >= a) & (col < e)                      # rows stay sorted
        return _SpikeRows(k[sel], (col[sel] - a).astype(np.int64), w[sel], n_rows,
                          mean[a:e].astype(np.float32), row_valid)
    return chunk


def _array_source(R):
    """``chunk(a, e)`` -> :class:`_ArrayRows` of cells ``a .. e-1`` from (rows, C) responses, NaN = none."""
    def chunk(a, e):
        Rc = R[:, a:e].astype(np.float64)
        V = np.isfinite(Rc)
        with np.errstate(invalid="ignore"):
            mean = np.where(V, Rc, 0.0).sum(0) / np.maximum(V.sum(0), 1)
        return _ArrayRows(np.where(V, Rc - mean, 0.0), V)
    return chunk


# ------------------------------------------------------------------------------------------------
# design
# ------------------------------------------------------------------------------------------------
def _design(noise: SparseNoise, lmax: int):
    """Sparse stimulus matrix on the (gap-padded) timeline and that timeline's layout."""
    from .maps import _gap_layout, _SparseCorrelator, _valid_mask
    valid = _valid_mask(noise)
    layout = None if valid is None else (*_gap_layout(valid, lmax), valid)
    cor = _SparseCorrelator(noise.frames, layout)
    return _csr32(cor.B), cor.P, layout


def _csr32(B):
    """``B`` as float32 csr with one index type (what the in-place products take)."""
    B = B.tocsr()
    if B.data.dtype != np.float32:
        B = B.astype(np.float32)
    if B.indptr.dtype != B.indices.dtype:
        it = np.int32 if B.nnz < np.iinfo(np.int32).max else np.int64
        B = B.copy()
        B.indptr, B.indices = B.indptr.astype(it), B.indices.astype(it)
    return B


def _padded(R, layout):
    """(C, F) responses -> (rows, C) float32 on the padded timeline (NaN where no response)."""
    R = np.asarray(R, np.float32)
    if layout is None:
        return np.ascontiguousarray(R.T)
    row, n_rows, _, valid = layout
    out = np.full((n_rows, R.shape[0]), np.nan, np.float32)
    out[row[valid]] = R[:, valid].T
    return out


def _lag_rows(B, rows, lags):
    """``(len(rows), L * 2P)`` csr float32 whose row ``i`` holds the spots shown at ``rows[i] - lags[j]`` in
    columns ``j * 2P + spot``: ``_lag_rows(B, rows, lags) @ W`` is the generator ``sum_l B[t - l] W_l`` at
    those rows (built from ``B``'s index arrays, no sorting)."""
    import scipy.sparse as sp
    B = B.tocsr()
    F, P2 = B.shape
    rows = np.asarray(rows, np.int64)
    lags = np.asarray(lags, np.int64)
    src = rows[:, None] - lags[None, :]                      # (n, L) stimulus row of each lag
    ok = src >= 0
    srcc = np.where(ok, src, 0)
    cnt = np.where(ok, B.indptr[srcc + 1] - B.indptr[srcc], 0).ravel()      # row-major: row, then lag
    indptr = np.zeros(rows.size + 1, B.indices.dtype)
    np.cumsum(cnt.reshape(rows.size, lags.size).sum(axis=1), out=indptr[1:])
    first = np.repeat(B.indptr[srcc].ravel(), cnt)
    within = np.arange(int(cnt.sum())) - np.repeat(np.cumsum(cnt) - cnt, cnt)
    lag_i = np.repeat(np.tile(np.arange(lags.size), rows.size), cnt)
    indices = (B.indices[first + within] + lag_i * P2).astype(np.int32)
    return sp.csr_matrix((np.ones(indices.size, np.float32), indices, indptr), shape=(rows.size, lags.size * P2))


def lag_design(B, lags):
    """``(rows, L * 2P)`` csr float32 whose row ``t`` holds the spots shown at ``t - lags[i]`` in columns
    ``i * 2P + j``: ``lag_design(B, lags)[a:e].T @ X[a:e]`` is every lag's ``B[t - l]^T X[t]`` summed over
    the response rows ``a <= t < e``, and ``lag_design(B, lags) @ W`` the generator ``sum_l B[t - l] W_l``.
    (The pass itself works lag by lag on blocks of rows and never holds this matrix; it defines the
    quantities and serves small problems.)"""
    return _lag_rows(B, np.arange(B.shape[0]), lags)


def _rows_of(B, a, e):
    """``B[a:e]`` as a csr matrix on views of ``B``'s index arrays (no copy of the spots)."""
    import scipy.sparse as sp
    p0, p1 = B.indptr[a], B.indptr[e]
    return sp.csr_matrix((B.data[p0:p1], B.indices[p0:p1], B.indptr[a:e + 1] - p0), shape=(e - a, B.shape[1]),
                         copy=False)


def _lagged(B, lags, a, e):
    """For response rows ``a .. e-1``: ``(i, first_row, B rows)`` per lag, the stimulus rows ``t - lag``
    that exist (``first_row`` is the offset, within the block, of the first response row served)."""
    for i, lag in enumerate(np.asarray(lags, int)):
        s0 = max(a - lag, 0)
        if e - lag > s0:
            yield i, s0 + lag - a, _rows_of(B, s0, e - lag)


try:                       # scipy's compiled kernels, called to accumulate in place (Y += A X)
    from scipy.sparse import _sparsetools as _kernels
except ImportError:        # pragma: no cover - the public products below do the same
    _kernels = None


def _fits_kernel(A, X, Y):
    return (_kernels is not None and A.data.dtype == X.dtype == Y.dtype == np.float32
            and A.indptr.dtype == A.indices.dtype and X.flags.c_contiguous and Y.flags.c_contiguous)


def _add_product(A, X, Y):
    """``Y += A @ X`` for csr ``A`` and float32 ``X``, ``Y`` (no temporary of Y's size)."""
    if _fits_kernel(A, X, Y):
        _kernels.csr_matvecs(A.shape[0], A.shape[1], X.shape[1], A.indptr, A.indices, A.data, X.ravel(),
                             Y.ravel())
    else:
        Y += A @ X


def _add_product_t(A, X, Y):
    """``Y += A.T @ X`` for csr ``A`` (read as the csc matrix of its transpose)."""
    if _fits_kernel(A, X, Y):
        _kernels.csc_matvecs(A.shape[1], A.shape[0], X.shape[1], A.indptr, A.indices, A.data, X.ravel(),
                             Y.ravel())
    else:
        Y += A.T @ X


def _generator(B, lags, W, a, e):
    """``sum_l B[t - l] W_l`` for rows ``a .. e-1``: (e - a, C) float32; ``W`` (L, 2P, C) float32."""
    g = np.zeros((e - a, W.shape[-1]), np.float32)
    for i, off, Bl in _lagged(B, lags, a, e):
        _add_product(Bl, W[i], g[off:])
    return g


def _block_edges(n_rows, n_blocks):
    return np.linspace(0, n_rows, n_blocks + 1).round().astype(int)


def _row_chunks(a, e):
    for s in range(a, e, _ROW_CHUNK):
        yield s, min(e, s + _ROW_CHUNK)


# ------------------------------------------------------------------------------------------------
# block sums
# ------------------------------------------------------------------------------------------------
@dataclass
class BlockSums:
    """Per-block sums of a sparse-noise session (see the module docstring).

    Attributes
    ----------
    sums : ndarray float32 (n_blocks, L, 2P, C)  sums of the centred response; columns ``0..P-1`` bright
        spots, ``P..2P-1`` dark spots
    counts : ndarray float32 (n_blocks, L, 2P, C or 1)  number of (spot, valid response) pairs (one column
        shared by every cell when all cells' responses are valid in the same frames)
    lags : ndarray int (L,)
    edges : ndarray int (n_blocks + 1,)  first response row of each block (and the end)
    x2, n_valid : ndarray float64 (n_blocks, C)  sum of squared centred responses and number of valid
        responses per block
    """

    sums: np.ndarray
    counts: np.ndarray
    lags: np.ndarray
    edges: np.ndarray
    x2: np.ndarray
    n_valid: np.ndarray

    @property
    def n_blocks(self) -> int:
        return int(self.sums.shape[0])

    @property
    def block_of_row(self) -> np.ndarray:
        return np.repeat(np.arange(self.n_blocks), np.diff(self.edges))

    def maps(self, blocks):
        """``(on, off)`` mean maps ``(L, P, C)`` over the given blocks (NaN where no pair)."""
        return _mean_maps(self.sums[blocks].sum(axis=0, dtype=np.float64),
                          self.counts[blocks].sum(axis=0, dtype=np.float64))


def _mean_maps(s, n):
    """``(on, off)`` mean maps from summed sums ``s`` (L, 2P, C) and counts ``n`` (L, 2P, C or 1)."""
    P = s.shape[1] // 2
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(n > 0, s / n, np.nan)
    return m[:, :P], m[:, P:]


def _block_counts(V, B, lags, edges):
    """``B[t]^T V[t + l]`` per block and lag: (n_blocks, L, 2P, V's columns) float32."""
    counts = np.zeros((edges.size - 1, len(lags), B.shape[1], V.shape[1]), np.float32)
    for b in range(edges.size - 1):
        for a, e in _row_chunks(edges[b], edges[b + 1]):
            for i, off, Bl in _lagged(B, lags, a, e):
                _add_product_t(Bl, np.ascontiguousarray(V[a + off:e]), counts[b, i])
    return counts


def _block_pass(src, B, lags, n_blocks, counts=None, out=None):
    """:class:`BlockSums` of a response source (``rows(a, e)`` -> centred X, V), streamed over rows
    (``out``: a float32 buffer of at least (n_blocks, L, 2P, C) to hold the sums, reused across chunks)."""
    edges = _block_edges(src.n_rows, n_blocks)
    L, P2, C = len(lags), B.shape[1], src.C
    if out is None:
        sums = np.zeros((n_blocks, L, P2, C), np.float32)
    else:                                     # a contiguous view of the reused buffer
        sums = out.reshape(-1)[:n_blocks * L * P2 * C].reshape(n_blocks, L, P2, C)
        sums.fill(0.0)
    x2, nv = np.zeros((n_blocks, C)), np.zeros((n_blocks, C))
    shared = src.V.shape[1] == 1
    if counts is None:
        counts = _block_counts(src.V, B, lags, edges) if shared else None
    per_cell = None if counts is not None else np.zeros((n_blocks, L, P2, C), np.float32)
    for b in range(n_blocks):
        for a, e in _row_chunks(edges[b], edges[b + 1]):
            X, V = src.rows(a, e)
            x2[b] += np.einsum("fc,fc->c", X, X, dtype=np.float64)
            nv[b] += V.sum(axis=0, dtype=np.float64)
            for i, off, Bl in _lagged(B, lags, a, e):
                _add_product_t(Bl, X[off:], sums[b, i])
                if per_cell is not None:
                    _add_product_t(Bl, V[off:], per_cell[b, i])
    return BlockSums(sums, counts if per_cell is None else per_cell, np.asarray(lags), edges, x2, nv)


def block_sums(X, V, B, lags, n_blocks):
    """Per-block, per-lag sums ``B[t]^T X[t + l]`` and counts ``B[t]^T V[t + l]`` (pairs assigned to the
    block of the response row ``t + l``).

    Parameters
    ----------
    X : ndarray (rows, C)  centred responses, 0 where invalid
    V : ndarray (rows, C)  1.0 where the response is valid, else 0
    B : scipy.sparse csr (rows, 2P)  spot indicators
    lags : ndarray int (L,)
    n_blocks : int

    Returns
    -------
    BlockSums

    Notes
    -----
    One float32 sparse product per lag and block of at most 16 384 response rows (an entry sums a few
    dozen pairs per block; the blocks are added in float64).
    """
    return _block_pass(_ArrayRows(X, V), _csr32(B), np.asarray(lags, int), int(n_blocks))


# ------------------------------------------------------------------------------------------------
# reliability
# ------------------------------------------------------------------------------------------------
def _corr_cols(a, b, scratch=False):
    """Pearson correlation of matching columns of ``a``, ``b`` (N, C) over rows finite in both
    (``scratch``: ``a`` and ``b`` may be overwritten)."""
    fa, fb = np.isfinite(a), np.isfinite(b)
    if fa.all() and fb.all():
        n = np.full(a.shape[1], a.shape[0])
        if scratch:
            a -= a.mean(0)
            b -= b.mean(0)
            da, db = a, b
        else:
            da, db = a - a.mean(0), b - b.mean(0)
        with np.errstate(invalid="ignore", divide="ignore"):
            r = np.einsum("ij,ij->j", da, db) / np.sqrt(np.einsum("ij,ij->j", da, da)
                                                        * np.einsum("ij,ij->j", db, db))
        return np.where(n >= 3, r, np.nan)
    ok = fa & fb
    n = ok.sum(axis=0)
    a = np.where(ok, a, 0.0)
    b = np.where(ok, b, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        ma, mb = a.sum(0) / n, b.sum(0) / n
        da, db = np.where(ok, a - ma, 0.0), np.where(ok, b - mb, 0.0)
        r = (da * db).sum(0) / np.sqrt((da * da).sum(0) * (db * db).sum(0))
    return np.where(n >= 3, r, np.nan)


def spearman_brown(r, k=2.0):
    """Reliability of a test ``k`` times as long: ``k r / (1 + (k - 1) r)`` (Spearman 1910; Brown 1910).

    Examples
    --------
    >>> float(spearman_brown(0.5))
    0.6666666666666666
    >>> float(spearman_brown(0.0))
    0.0
    """
    r = np.asarray(r, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return k * r / (1.0 + (k - 1.0) * r)


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
    sgn = np.where(use_onoff, 1.0, -1.0).astype(np.float32)
    L, P2, C = bs.sums.shape[1:]
    P = P2 // 2
    S = np.empty((L, P2, C), np.float32)                     # work buffers, reused by every replicate
    ma, mb, tmp = (np.empty((L, P, C), np.float32) for _ in range(3))

    def combined(S, N, out):
        """``on + sgn * off`` mean maps (L * P, C) into ``out``; NaN where a pixel has no pair."""
        with np.errstate(invalid="ignore", divide="ignore"):
            inv = np.where(N > 0, 1.0 / N, np.nan).astype(np.float32)
        np.multiply(S[:, :P], inv[:, :P], out=out)
        np.multiply(S[:, P:], inv[:, P:], out=tmp)
        np.multiply(tmp, sgn, out=tmp)
        np.add(out, tmp, out=out)
        return out.reshape(-1, C)

    # the halves' totals once; a jackknife replicate leaves one pair of blocks out by subtraction
    tot_e = (bs.sums[0::2].sum(axis=0), bs.counts[0::2].sum(axis=0))
    tot_o = (bs.sums[1::2].sum(axis=0), bs.counts[1::2].sum(axis=0))
    r = _corr_cols(combined(*tot_e, ma), combined(*tot_o, mb), scratch=True)

    def left_out(tot, b, out):
        np.subtract(tot[0], bs.sums[b], out=S)
        return combined(S, tot[1] - bs.counts[b], out)

    zj = np.stack([np.arctanh(np.clip(_corr_cols(left_out(tot_e, even[j], ma), left_out(tot_o, odd[j], mb),
                                                 scratch=True), -0.999999, 0.999999))
                   for j in range(m)])
    se = np.sqrt((m - 1) / m * np.sum((zj - zj.mean(0)) ** 2, axis=0))
    t = special.stdtrit(m - 1, 0.5 + level / 2)   # Student t quantile (scipy.stats.t.ppf), lighter import
    z = np.arctanh(np.clip(r, -0.999999, 0.999999))
    lo, hi = np.tanh(z - t * se), np.tanh(z + t * se)
    return spearman_brown(r), spearman_brown(lo), spearman_brown(hi)


# ------------------------------------------------------------------------------------------------
# the decile nonlinearity
# ------------------------------------------------------------------------------------------------
def _fit_nonlinearity(g, y, n_bins=_N_BINS):
    """Decile means of ``y`` against ``g`` (one column): bin centres and means, for interpolation.
    The one-cell definition, kept as the reference the vectorised :func:`_decile_knots` is tested
    against."""
    edges = np.unique(np.quantile(g, np.linspace(0, 1, n_bins + 1)))
    if edges.size < 3:
        return np.array([np.mean(g)]), np.array([np.mean(y)])
    idx = np.clip(np.searchsorted(edges, g, side="right") - 1, 0, edges.size - 2)
    cnt = np.bincount(idx, minlength=edges.size - 1)
    keep = cnt > 0
    xc = np.bincount(idx, weights=g, minlength=edges.size - 1)[keep] / cnt[keep]
    yc = np.bincount(idx, weights=y, minlength=edges.size - 1)[keep] / cnt[keep]
    return xc, yc


def _quantiles(g, n_bins):
    """``numpy.quantile(g[:, c][finite], linspace(0, 1, n_bins + 1))`` of every column (linear method),
    from one sort of the columns; NaN rows are left out (a column with none gives NaN)."""
    gs = np.sort(np.ascontiguousarray(g.T), axis=1)            # (C, n), NaN last
    n = np.isfinite(gs).sum(axis=1)                             # (C,)
    q = np.linspace(0, 1, n_bins + 1)[:, None]
    m = np.maximum(n, 1)
    virt = m * q + (1.0 + q * (1.0 - 1.0 - 1.0)) - 1.0          # (K, C), numpy's "linear" method, as written there
    lo = np.floor(virt).astype(np.intp)
    top = virt >= m - 1
    lo[top] = (m - 1)[np.nonzero(top)[1]]
    hi = np.minimum(lo + 1, m - 1)
    t = virt - lo
    cols = np.arange(gs.shape[0])
    a = gs[cols, lo].astype(np.float64)
    b = gs[cols, hi].astype(np.float64)
    d = b - a
    out = np.where(t >= 0.5, b - d * (1 - t), a + d * t)
    out[:, n == 0] = np.nan
    return out, n


def _decile_knots(g, y, n_bins=_N_BINS):
    """The nonlinearity of every column at once: :func:`_fit_nonlinearity` of each column's finite rows.

    ``g``, ``y`` (n, C), NaN in ``g`` where a row is not a training value of that column. Returns
    knots ``xk``, ``yk`` (n_bins, C) float64 (each column's kept bin means first, then padding: ``xk``
    +inf, ``yk`` its last value) and their number ``nk`` (C,) (1 for a constant prediction: the mean of
    ``y``, 0 for a column without training rows).
    """
    n_rows, C = g.shape
    q, n = _quantiles(g, n_bins)
    # numpy.unique per column: repeated edges out (moved to the end as +inf)
    q[1:][q[1:] == q[:-1]] = np.inf
    edges = np.sort(np.where(np.isnan(q), np.inf, q), axis=0)
    n_edges = np.isfinite(edges).sum(axis=0)                        # (C,)
    # bin of each value: the interior edges (1 .. n_edges - 2) at or below it (the first edge is the
    # minimum, values at or above the last one join the last bin); not a training row: a dump bin
    inner = edges[1:-1].copy()
    inner[np.arange(1, n_bins)[:, None] >= (n_edges - 1)[None, :]] = np.inf
    if g.dtype == np.float32:           # g >= e exactly as in float64: against the float32 at or above e
        inner32 = inner.astype(np.float32)
        low = inner32 < inner
        inner32[low] = np.nextafter(inner32[low], np.float32(np.inf))
        inner = inner32
    idx = np.zeros(g.shape, np.int8)
    for e in inner:
        idx += g >= e
    idx[np.isnan(g)] = n_bins
    flat = idx.astype(np.intp)
    flat += np.arange(C) * (n_bins + 1)
    flat = flat.ravel()
    size, shape = C * (n_bins + 1), (C, n_bins + 1)
    cnt = np.bincount(flat, minlength=size).reshape(shape)[:, :n_bins]
    sg = np.bincount(flat, weights=g.ravel(), minlength=size).reshape(shape)[:, :n_bins]
    sy = np.bincount(flat, weights=y.ravel(), minlength=size).reshape(shape)[:, :n_bins]
    keep = cnt > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        xc, yc = sg / cnt, sy / cnt
    order = np.argsort(~keep, axis=1, kind="stable")                 # kept bins first, in order
    xc, yc = np.take_along_axis(xc, order, 1), np.take_along_axis(yc, order, 1)
    nk = keep.sum(axis=1)
    const = n_edges < 3                                             # one knot: the training mean
    with np.errstate(invalid="ignore", divide="ignore"):
        ymean = sy.sum(1) / np.maximum(cnt.sum(1), 1)
    xc[const, 0], yc[const, 0], nk = 0.0, ymean[const], np.where(const, 1, nk)
    pad = np.arange(n_bins)[None, :] >= nk[:, None]
    last = np.take_along_axis(yc, np.maximum(nk - 1, 0)[:, None], 1)
    xk = np.where(pad, np.inf, xc).T
    yk = np.where(pad, last, yc).T
    return xk, yk, nk


class _Knots:
    """Segments of the piecewise-linear nonlinearity (``numpy.interp`` semantics, per column): in
    segment ``j`` the prediction is ``a[j] + slope[j] * max(g, first knot)``, the last segment flat."""

    def __init__(self, xk, yk, nk, dtype=np.float32):
        K, C = xk.shape
        last = np.maximum(nk - 1, 0)
        self.x_first = xk[0].astype(dtype)
        self.x_in = xk[1:].astype(dtype)                # knots 1 .. K-1 (+inf padding never counted)
        seg = np.arange(K)[:, None]
        x0 = np.where(seg <= last, xk, np.take_along_axis(xk, last[None, :], 0))
        y0 = np.where(seg <= last, yk, np.take_along_axis(yk, last[None, :], 0))
        with np.errstate(invalid="ignore", divide="ignore"):
            slope = np.diff(yk, axis=0) / np.diff(xk, axis=0)      # segments 0 .. K-2
        slope = np.where(seg[:-1] < last, slope, 0.0)
        slope = np.vstack([slope, np.zeros((1, C))])
        with np.errstate(invalid="ignore"):
            a = np.where(slope != 0, y0 - slope * x0, y0)
        # intercept and slope of every (segment, column) side by side: one gather per value
        self.pair = (a + 1j * slope).astype(np.complex64 if dtype == np.float32 else np.complex128).ravel()
        self.small = K * C < np.iinfo(np.int16).max
        self.C = C

    def __call__(self, g):
        """``numpy.interp(g[:, c], xk[:nk, c], yk[:nk, c])`` of every column; ``g`` (n, C)."""
        j = np.zeros(g.shape, np.int8)
        for x in self.x_in:
            j += g >= x
        it = np.int16 if self.small else np.intp
        flat = j.astype(it)
        flat *= it(self.C)
        flat += np.arange(self.C, dtype=it)
        ab = np.take(self.pair, flat)
        gc = np.maximum(g, self.x_first)
        gc *= ab.imag
        gc += ab.real
        return gc


def _nonlinearity_predict(g_tr, y_tr, g_te, n_bins=_N_BINS):
    """Column by column, ``np.interp(g_te, *_fit_nonlinearity(g_tr, y_tr))`` (a constant when the training
    generator has fewer than 3 distinct decile edges), every column at once. ``g_tr``, ``y_tr`` (n, C),
    ``g_te`` (m, C) -> (m, C)."""
    g_te = np.asarray(g_te)
    return _Knots(*_decile_knots(g_tr, y_tr, n_bins), dtype=g_te.dtype)(g_te)


# ------------------------------------------------------------------------------------------------
# prediction
# ------------------------------------------------------------------------------------------------
def _fit_rows(valid_any, fit_frames):
    """Evenly spaced rows (at most ``fit_frames``) among those valid for some cell."""
    valid = np.flatnonzero(valid_any)
    if fit_frames is None or valid.size <= fit_frames:
        return valid
    return valid[np.unique(np.linspace(0, valid.size - 1, int(fit_frames)).round().astype(np.intp))]


class _Prediction:
    """What the cross-validated prediction needs of the session, shared by every chunk of cells: the
    folds' sampled training rows and their lag-stacked spots."""

    def __init__(self, B, lags, edges, valid_any, n_folds, fit_frames):
        self.B, self.lags, self.edges, self.n_folds = B, np.asarray(lags, int), edges, int(n_folds)
        rows = _fit_rows(valid_any, fit_frames)
        fold_of = (np.searchsorted(edges, rows, side="right") - 1) % self.n_folds
        self.fit_rows = rows
        self.fit_sel = [np.flatnonzero(fold_of != k) for k in range(self.n_folds)]
        G = _lag_rows(B, rows, self.lags)
        self.fit_design = [G[s] for s in self.fit_sel]

    def __call__(self, bs: BlockSums, src):
        """``prediction_r`` (C,) of the cells of ``src`` (their :class:`BlockSums` ``bs``)."""
        nb, C, nf = bs.n_blocks, src.C, self.n_folds
        L, P2 = bs.sums.shape[1:3]
        fold_of_block = np.arange(nb) % nf
        all_s, all_n = bs.sums.sum(axis=0), bs.counts.sum(axis=0)
        x2 = np.array([bs.x2[fold_of_block == k].sum(0) for k in range(nf)])      # (folds, C)
        nv = np.array([bs.n_valid[fold_of_block == k].sum(0) for k in range(nf)])
        Xf, Vf = src.take(self.fit_rows)                        # the nonlinearity's rows, every fold
        acc = np.zeros((nb, 6, C))                              # per block: n, sum p, p^2, p x, x, x^2
        p_lo, p_hi = np.full(C, np.inf), np.full(C, -np.inf)
        for k in range(nf):
            fb = np.flatnonzero(fold_of_block == k)
            n = all_n - bs.counts[k::nf].sum(axis=0)                                # (L, 2P, C or 1)
            # the training blocks' ON and OFF mean maps (0 where no pair), (L, 2P, C) float32
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                W = all_s - bs.sums[k::nf].sum(axis=0)
                W *= np.where(n > 0, 1.0 / n, 0.0).astype(np.float32)
                # each coefficient shrunk by its own noise (positive-part James-Stein factor per
                # coefficient): a mean of n responses of variance s^2 has noise variance s^2 / n
                s2 = ((x2.sum(0) - x2[k]) / np.maximum(nv.sum(0) - nv[k], 1)).astype(np.float32)
                f = W * W
                f *= n
                np.divide(s2, f, out=f)
                np.subtract(1.0, f, out=f)
                np.clip(f, 0.0, 1.0, out=f)
                W *= f
            W = np.nan_to_num(W, copy=False)
            active = (nv.sum(0) - nv[k] >= 20) & (nv[k] > 0)                      # (C,) cells fitted
            if not active.any():
                continue
            sel = self.fit_sel[k]
            g_fit = np.zeros((sel.size, C), np.float32)
            _add_product(self.fit_design[k], W.reshape(L * P2, C), g_fit)
            v_fit = np.broadcast_to(Vf[sel] > 0, g_fit.shape)
            knots = _Knots(*_decile_knots(np.where(v_fit, g_fit, np.nan), Xf[sel]))
            act = active.astype(np.float32)
            all_active = bool(active.all())
            for b in fb:
                for a, e in _row_chunks(self.edges[b], self.edges[b + 1]):
                    Xa, Va = src.rows(a, e)
                    ga = _generator(self.B, self.lags, W, a, e)
                    for s0 in range(0, e - a, _SUB_ROWS):    # the nonlinearity and the sums in cache
                        X, V = Xa[s0:s0 + _SUB_ROWS], Va[s0:s0 + _SUB_ROWS]
                        p = knots(ga[s0:s0 + _SUB_ROWS])
                        if all_active and V.min() > 0:          # every cell, every row: no masks
                            m_n = np.float64(X.shape[0])
                        else:
                            m = np.broadcast_to(V * act, p.shape)
                            m_n = m.sum(0, dtype=np.float64)
                            mb = m > 0
                            p = np.where(mb, p, 0.0)
                            X = np.where(mb, X, 0.0)
                        # (rows not counted: prediction and response 0; min / max over those counted)
                        full = np.ndim(m_n) == 0
                        p_lo = np.minimum(p_lo, p.min(0) if full else np.where(mb, p, np.inf).min(0))
                        p_hi = np.maximum(p_hi, p.max(0) if full else np.where(mb, p, -np.inf).max(0))
                        acc[b, 0] += m_n
                        acc[b, 1:] += (p.sum(0), np.einsum("fc,fc->c", p, p), np.einsum("fc,fc->c", p, X),
                                       X.sum(0), np.einsum("fc,fc->c", X, X))
        self.block_stats = acc                                  # kept for diagnostics (sampling error)
        r = np.where(p_hi > p_lo, _pearson(acc.sum(axis=0)), np.nan)   # a constant prediction: no correlation
        return np.where(acc[:, 0].sum(axis=0) >= 10, r, np.nan)


def _pearson(acc):
    """Pearson's r from the sums ``(n, sum p, sum p^2, sum p x, sum x, sum x^2)`` (6, C)."""
    n, sp_, spp, spx, sx, sxx = acc
    with np.errstate(invalid="ignore", divide="ignore"):
        return (spx - sp_ * sx / n) / np.sqrt((spp - sp_ ** 2 / n) * (sxx - sx ** 2 / n))


def prediction_r(bs: BlockSums, B, X, V, n_folds: int = 4, fit_frames: int | None = FIT_FRAMES):
    """Cross-validated correlation between the measured responses and a linear-nonlinear prediction.

    Fold ``k`` holds the blocks ``b`` with ``b % n_folds == k``; the ON and OFF maps of the other blocks
    make the generator signal (module docstring), the nonlinearity is fitted on the other blocks'
    frames (those of an evenly spaced sample of at most ``fit_frames`` frames of the session; None: every
    frame), and the prediction of fold ``k``'s frames is compared with their responses. Returns
    ``r`` (C,): NaN when a cell has fewer than 10 valid held-out frames or a constant response or
    prediction.
    """
    src = _ArrayRows(X, V)
    B = _csr32(B)
    pred = _Prediction(B, bs.lags, bs.edges, (src.V > 0).any(axis=1), n_folds, fit_frames)
    return pred(bs, src)


def map_quality(responses, noise: SparseNoise, max_lag_s: float, use_onoff=None, n_blocks: int = 16,
                n_folds: int = 4, fit_frames: int | None = FIT_FRAMES) -> dict:
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
    fit_frames : int or None
        Frames sampled for the decile nonlinearity (module docstring); None: every training frame.

    Returns
    -------
    dict of :data:`QUALITY_COLUMNS` -> ndarray (C,)
    """
    from .contract import Spikes
    from .maps import frame_responses, map_lags
    C = int(np.asarray(responses.cell_ids).size)
    out = {k: np.full(C, np.nan) for k in QUALITY_COLUMNS}
    if not np.issubdtype(noise.frames.dtype, np.integer):
        return out
    lags = map_lags(noise.frame_interval_s, max_lag_s)
    B, P, layout = _design(noise, int(lags[-1]))
    n_rows = B.shape[0]
    if isinstance(responses, Spikes):
        source = _spike_source(responses, noise, layout)
        valid_any = np.ones(n_rows, bool) if layout is None else layout[2]
        shared_counts = _block_counts(np.asarray(valid_any, np.float32)[:, None], B, lags,
                                      _block_edges(n_rows, n_blocks))
    else:
        R = _padded(frame_responses(responses, noise), layout)        # (rows, C), NaN = no response
        source = _array_source(R)
        valid_any = np.isfinite(R).any(axis=1)
        shared_counts = None
    pred = _Prediction(B, lags, _block_edges(n_rows, n_blocks), valid_any, n_folds, fit_frames)
    use_onoff = np.zeros(C, bool) if use_onoff is None else np.asarray(use_onoff, bool)
    buf = np.empty((n_blocks, lags.size, B.shape[1], min(C, CELL_CHUNK)), np.float32)
    for a in range(0, C, CELL_CHUNK):
        e = min(C, a + CELL_CHUNK)
        src = source(a, e)
        bs = _block_pass(src, B, lags, n_blocks, counts=shared_counts, out=buf)
        rel, lo, hi = map_reliability(bs, use_onoff[a:e])
        out["map_reliability"][a:e], out["map_reliability_ci_low"][a:e], out["map_reliability_ci_high"][a:e] = rel, lo, hi
        out["prediction_r"][a:e] = pred(bs, src)
    return out
