"""Reverse correlation: ON, OFF and linear maps for every cell and lag, and their significance.

Sparse noise (int8 frames, +1 bright / -1 dark / 0 background) goes through the sparse engine: one
``scipy.sparse`` matrix ``B`` of shape ``(frames, 2 * pixels)`` says which pixel was bright (first
half of the columns) or dark (second half) in which frame, and for lag ``l`` the sums over all cells
are one sparse-times-dense product ``B[:F - l].T @ X[l:]`` with ``X`` the ``(frames, cells)``
centred responses (a view, no copy). Cost per lag is ``spots x frames x cells`` multiply-adds; there
is no Python loop over spikes or frames.

Real-valued (dense) noise goes through :func:`dense_sta` (the plain spike-triggered average, as a
cross-covariance) and :func:`whitened_sta` (ridge-regularised whitening with the penalty chosen by
cross-validation over blocks of time), both accumulated over chunks of frames so that the frames may
be a memory-mapped array larger than memory.

Conventions
-----------
- Lag ``l`` (whole frames, ``0 .. floor(max_lag_s / frame_interval)``) pairs the stimulus of frame
  ``t`` with the response in frame ``t + l``. Responses outside the stimulus are never used: at lag
  ``l`` the last ``l`` frames have no response and are left out.
- Frames marked invalid (``SparseNoise.valid``: the frame spans dropped frames) split the session
  into gap-free stretches; lag ``l`` pairs frames ``t`` and ``t + l`` only inside one stretch (see
  :func:`compute_maps`, Notes).
- Maps are ``(cells, lags, ny, nx)`` float32 with row 0 at the top (contract).
- ``on``: mean response in the frames after a bright spot at the pixel minus the cell's mean
  response; ``off`` the same for dark spots; ``linear = on - off``. Units are those of the responses
  (spikes/s, or trace units). A pixel never shown gets NaN.

References
----------
Chichilnisky EJ (2001) A simple white noise analysis of neuronal light responses.
Network 12:199-213 (spike-triggered average and its statistics).
Jones JP, Palmer LA (1987) The two-dimensional spatial structure of simple receptive fields in cat
striate cortex. J Neurophysiol 58:1187-1211 (ON and OFF maps from sparse noise).
Theunissen FE et al. (2001) Estimating spatio-temporal receptive fields of auditory and visual
neurons from their responses to natural stimuli. Network 12:289-316 (whitening and regularisation).
Coles S (2001) An Introduction to Statistical Modeling of Extreme Values. Springer (block maxima,
the Gumbel law and its maximum-likelihood fit, chapter 3).
Nichols TE, Holmes AP (2002) Nonparametric permutation tests for functional neuroimaging.
Hum Brain Mapp 15:1-25 (max-statistic correction for many tests).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

try:        # the kernel behind scipy.sparse's sparse @ dense (accumulates into a given array)
    from scipy.sparse._sparsetools import csc_matvecs as _csc_matvecs
except ImportError:                                  # another scipy layout: the public product
    _csc_matvecs = None

from ._forked import ForkedCall
from .align import interval_responses, spikes_in_intervals
from .contract import SparseNoise, Spikes, Traces
from .geometry import Grid

#: ``dense_method='auto'`` whitens when the largest pixel correlation exceeds
#: ``WHITEN_CORRELATION + WHITEN_CHANCE / sqrt(frames)`` (ours; see ``MapResult.whiten_threshold``).
WHITEN_CORRELATION = 0.05
WHITEN_CHANCE = 5.0

__all__ = ["MapResult", "compute_maps", "frame_responses", "map_lags", "dense_sta", "whitened_sta",
           "dense_estimate_note", "dense_columns", "map_centroid_deg", "KINDS", "MapChoice", "choose_maps",
           "region_threshold_z", "region_centre", "LINEAR_SHARE_THRESHOLD"]

#: Map kinds, in the order used by every ``kind`` axis of the stored maps (TIFF channels).
KINDS = ("on", "off", "linear")
#: Kinds of the sparse-noise max-statistic test: the three above and ON + OFF (either contrast excites).
N_KINDS_SPARSE = 4

_CHUNK_FRAMES = 8192
_CHUNK_VALUES = 8192 * 300     # responses per block of the streamed products (frames x cells)
_FORK_MIN_WORK = 20_000_000   # frames x cells x lags above which the null runs on a second core
_BLOCK_VALUES = 288            # z values (pixels x lags x kinds) per block of the max-statistic tail fit
_MIN_BLOCKS = 48               # block maxima per cell for the first tail fit (all cells)
_GRAY_BLOCKS = 256             # block maxima per cell for cells whose first p is near alpha
_CHOICE_VALUES = 1 << 19       # values (cells x lags x pixels) per block of cells in choose_maps
_LATENCY_VALUES = 1 << 21      # drives (frames x cells) per block of frames in spike_latency


# ----------------------------------------------------------------------------------------------
# result
# ----------------------------------------------------------------------------------------------
@dataclass
class MapResult:
    """Maps and their statistics for every cell.

    Attributes
    ----------
    grid : Grid
    lags_s : ndarray (L,)
        Lag of each map in seconds (``lag_frames * frame_s``).
    lag_frames : ndarray int (L,)
    cell_ids : ndarray int (C,)
    unit : str
        Response unit ('spikes/s' or 'trace units').
    stimulus : str
        'sparse' (bright/dark spots) or 'dense' (real-valued noise).
    on, off, linear : ndarray float32 (C, L, ny, nx)
        Maps in response units. For dense noise ``on`` and ``off`` are NaN and ``linear`` is the
        kernel estimate in response units per unit of stimulus (see :func:`compute_maps`).
    on_z, off_z, linear_z : ndarray float32 (C, L, ny, nx)
        z-scores against the null of no stimulus dependence (see :func:`compute_maps`).
    responsive : ndarray bool (C,)
        ``p_value <= alpha``.
    p_value : ndarray (C,)
        Max-statistic shuffle p-value, corrected for pixels x lags x kinds; NaN when the cell's
        responses do not vary (no spikes, constant trace).
    max_abs_z : ndarray (C,)
        The observed max-statistic (largest ``|z|`` over pixels, lags and kinds).
    z_critical : ndarray (C,)
        The ``1 - alpha`` quantile of the shuffle distribution of the max-statistic.
    peak_lag_index : ndarray int (C,)
        Index into ``lags_s`` of the lag holding the largest ``|z|``; -1 when not responsive.
    peak_lag_s : ndarray (C,)
        NaN when not responsive.
    polarity : ndarray str (C,)
        'ON-centre', 'OFF-centre', 'mixed', 'ON-OFF', or '' when not responsive (see :func:`compute_maps`).
    onoff_overlap : ndarray (C,)
        Overlap (0-1) of the excitatory ON and OFF regions at the peak lag; NaN when not responsive
        or not estimable (dense noise).
    snr : ndarray (C,)
        Largest ``|linear_z|`` at the peak lag (the linear map's peak over the null sd); for a cell
        that is not responsive, at the lag of its largest ``|z|``.
    n_frames_used : ndarray int (C,)
        Frames with a valid response (within the stimulus, not NaN, not marked invalid in
        ``SparseNoise.valid``).
    frame_s : float
        Median frame interval.
    n_shuffles : ndarray int (C,)
        Shuffles drawn for each cell (a few for every cell, more for cells whose p-value is near
        ``alpha``; see :func:`compute_maps`).
    null_scale : ndarray (C, K)
        Ratio of the shuffle sd to the analytic sd per kind (about 1 for spikes); K = 4 kinds (ON, OFF,
        linear, ON + OFF) for sparse noise, 3 for dense noise (only the linear one used).
    alpha : float
    method : str
        'sparse', 'sta' or 'whitened'.
    ridge_lambda : ndarray (C,)
        Cross-validated ridge penalty (whitened dense noise), NaN otherwise.
    ridge_penalty : ndarray (C,)
        The same penalty relative to the stimulus: ``ridge_lambda`` divided by the mean eigenvalue of
        the frames' Gram matrix (the mean pixel variance times the frames used). 0 would be plain
        least squares; near 1 and above the estimate is shrunk strongly toward the smooth, low-SF
        part of the kernel. NaN for the STA and sparse noise.
    pixel_correlation : float
        Dense noise: the largest absolute correlation between two pixels of the stimulus (NaN for
        sparse noise); with ``dense_method='auto'`` the whitened estimate is used when it exceeds
        ``whiten_threshold``.
    whiten_threshold : float
        ``0.05 + 5 / sqrt(frames used)`` (:data:`WHITEN_CORRELATION`, :data:`WHITEN_CHANCE`): 0.05 is
        where whitening starts to matter; 5 / sqrt(F) is 5 standard errors of a sample correlation of
        F frames, which white noise exceeds somewhere in about 2 % of 16 x 16 grids (32,640 pixel
        pairs x 5.7e-7, the normal tail beyond 5). NaN for sparse noise.
    both, both_z : ndarray float32 (C, L, ny, nx) or None
        The ON + OFF map (excitation by either contrast) and its z-scores, the fourth kind of the
        max-statistic test for sparse noise; None for dense noise.
    """

    grid: Grid
    lags_s: np.ndarray
    lag_frames: np.ndarray
    cell_ids: np.ndarray
    unit: str
    stimulus: str
    on: np.ndarray
    off: np.ndarray
    linear: np.ndarray
    on_z: np.ndarray
    off_z: np.ndarray
    linear_z: np.ndarray
    responsive: np.ndarray
    p_value: np.ndarray
    max_abs_z: np.ndarray
    z_critical: np.ndarray
    peak_lag_index: np.ndarray
    peak_lag_s: np.ndarray
    polarity: np.ndarray
    onoff_overlap: np.ndarray
    snr: np.ndarray
    n_frames_used: np.ndarray
    frame_s: float
    n_shuffles: np.ndarray
    null_scale: np.ndarray
    alpha: float
    method: str = "sparse"
    ridge_lambda: np.ndarray = field(default_factory=lambda: np.zeros(0))
    ridge_penalty: np.ndarray = field(default_factory=lambda: np.zeros(0))
    pixel_correlation: float = float("nan")
    whiten_threshold: float = float("nan")
    both: np.ndarray | None = None
    both_z: np.ndarray | None = None

    @property
    def n_cells(self) -> int:
        return int(self.cell_ids.size)

    def maps(self, kind: str) -> np.ndarray:
        """The map of one kind ('on', 'off', 'linear', 'on+off'), ``(C, L, ny, nx)``."""
        return {"on": self.on, "off": self.off, "linear": self.linear, "on+off": self.both}[kind]

    def zmaps(self, kind: str) -> np.ndarray:
        """The z-map of one kind, ``(C, L, ny, nx)``."""
        return {"on": self.on_z, "off": self.off_z, "linear": self.linear_z, "on+off": self.both_z}[kind]

    def peak_kind_index(self) -> np.ndarray:
        """For each cell, the kind index (0 on, 1 off, 2 linear) of the largest ``|z|`` at the peak lag
        (-1 when not responsive)."""
        out = np.full(self.n_cells, -1, dtype=int)
        for c in range(self.n_cells):
            li = int(self.peak_lag_index[c])
            if li < 0:
                continue
            peaks = [np.nanmax(np.abs(self.zmaps(k)[c, li])) if np.isfinite(self.zmaps(k)[c, li]).any()
                     else -np.inf for k in KINDS]
            out[c] = int(np.argmax(peaks))
        return out


# ----------------------------------------------------------------------------------------------
# alignment
# ----------------------------------------------------------------------------------------------
#: Share of a frame by which ``max_lag_s`` may fall short of a whole number of frames (timing jitter).
LAG_SLACK_FRAMES = 0.01


def map_lags(frame_s: float, max_lag_s: float) -> np.ndarray:
    """Whole-frame lags ``0 .. floor(max_lag_s / frame_s)``, with 1 % of a frame to spare: a measured
    frame interval a few microseconds longer than nominal (photodiode-timed onsets) must not drop the
    last lag (``--max-lag 0.2`` at 10 Hz gives lags 0, 1, 2 whether the median interval is 0.1 s or
    0.100003 s).

    Examples
    --------
    >>> map_lags(0.05, 0.2)
    array([0, 1, 2, 3, 4])
    >>> map_lags(0.100003, 0.2)
    array([0, 1, 2])
    """
    if not np.isfinite(frame_s) or frame_s <= 0:
        raise ValueError(f"frame interval must be positive, got {frame_s}")
    if not np.isfinite(max_lag_s) or max_lag_s < 0:
        raise ValueError(f"max_lag_s must be >= 0, got {max_lag_s}")
    return np.arange(int(np.floor(max_lag_s / frame_s + LAG_SLACK_FRAMES)) + 1)


def frame_responses(responses: Spikes | Traces, noise: SparseNoise) -> np.ndarray:
    """Response of every cell in every stimulus frame, ``(cells, frames)`` float32.

    Spikes/s for spikes; the trace's time average over the frame for traces (NaN where a frame holds
    no valid sample). Uses :func:`map2d.align.interval_responses` with the frames of ``noise``.
    Frames marked invalid (``noise.valid``, frames spanning dropped frames) are NaN.
    """
    out = interval_responses(responses, noise.times_s, noise.frame_ends_s())
    valid = _valid_mask(noise)
    if valid is not None:
        out[:, ~valid] = np.nan
    return out


def _valid_mask(noise: SparseNoise) -> np.ndarray | None:
    """``noise.valid`` checked as a bool mask ``(frames,)``, or None when every frame is valid."""
    if noise.valid is None:
        return None
    valid = np.asarray(noise.valid)
    if valid.shape != (noise.n_frames,) or valid.dtype != bool:
        raise ValueError(f"noise.valid must be a bool mask of shape ({noise.n_frames},), got "
                         f"{valid.dtype} {valid.shape}")
    return None if valid.all() else valid


def _gap_layout(valid: np.ndarray, lmax: int):
    """Rows of the gap-padded timeline the sparse engine works on.

    Every invalid frame becomes ``K = max(lmax, 1)`` empty rows (no stimulus event, no valid
    response), so the rows of two valid frames on either side of it are more than ``lmax`` apart:
    a whole-frame lag ``l <= lmax`` then pairs only frames ``t .. t + l`` that are all valid, with no
    test per lag. Returns ``row`` (F,) int64 (the row of each frame; for an invalid frame the first
    of its empty rows), ``n_rows`` and ``row_valid`` (n_rows,) bool (rows holding a valid frame).
    """
    K = max(int(lmax), 1)
    bad = ~valid
    before = np.cumsum(bad) - bad                                      # invalid frames before each frame
    row = np.arange(valid.size, dtype=np.int64) + (K - 1) * before
    n_rows = int(valid.size + (K - 1) * bad.sum())
    row_valid = np.zeros(n_rows, dtype=bool)
    row_valid[row[valid]] = True
    return row, n_rows, row_valid


# ----------------------------------------------------------------------------------------------
# correlators: sums of stimulus x shifted response for a set of offsets
# ----------------------------------------------------------------------------------------------
def _flatnonzero_int8(a: np.ndarray) -> np.ndarray:
    """``np.flatnonzero`` of a contiguous 1-byte array, scanning 8 bytes at a time (a sparse stack
    has few non-zero words, so this is several times faster than a byte-wise scan)."""
    n8 = a.size // 8 * 8
    if n8 == 0:
        return np.flatnonzero(a)
    words = np.flatnonzero(a[:n8].view(np.uint64))                 # words holding a non-zero byte
    cand = (words[:, None] * 8 + np.arange(8)).reshape(-1)
    idx = cand[a[cand] != 0]
    if n8 < a.size:
        idx = np.concatenate([idx, n8 + np.flatnonzero(a[n8:])])
    return idx


class _SparseCorrelator:
    """``B`` (frames, 2P) csr: column p = bright at pixel p, column P + p = dark at pixel p."""

    def __init__(self, frames: np.ndarray, layout=None):
        F = frames.shape[0]
        P = int(np.prod(frames.shape[1:]))
        flat = frames.reshape(F, P)
        per_row, cols = [], []
        for a in range(0, F, _CHUNK_FRAMES * 4):  # chunked so a huge int8 stack never widens at once
            blk = np.ascontiguousarray(flat[a:a + _CHUNK_FRAMES * 4]).reshape(-1)
            idx = _flatnonzero_int8(blk)                             # row-major: sorted by frame
            r, c = np.divmod(idx, P)
            per_row.append(np.bincount(r, minlength=min(F - a, _CHUNK_FRAMES * 4)))
            cols.append(np.where(blk[idx] > 0, c, c + P).astype(np.int32))
        indptr = np.zeros(F + 1, dtype=np.int64)
        np.cumsum(np.concatenate(per_row), out=indptr[1:])
        cols = np.concatenate(cols) if cols else np.zeros(0, np.int32)
        if layout is not None:
            # gap-padded rows (see _gap_layout): valid frames at their rows, the rest empty
            row, n_rows, _, valid = layout
            per = np.diff(indptr)
            cols = cols[np.repeat(valid, per)]
            per_row = np.zeros(n_rows, dtype=np.int64)
            per_row[row[valid]] = per[valid]
            F = n_rows
            indptr = np.zeros(F + 1, dtype=np.int64)
            np.cumsum(per_row, out=indptr[1:])
        self.B = sp.csr_matrix((np.ones(cols.size, np.float32), cols, indptr), shape=(F, 2 * P))
        self.F, self.P = F, P
        self._cum = None

    def chunks(self, size: int = _CHUNK_FRAMES):
        """``(a, b, B[a:b]^T)`` for consecutive blocks of ``size`` frames (built once per size, kept)."""
        if not hasattr(self, "_chunks"):
            self._chunks = {}
        size = int(min(max(size, 1), self.F))
        if size not in self._chunks:
            self._chunks[size] = [(a, min(self.F, a + size), self.B[a:min(self.F, a + size)].T)
                                  for a in range(0, self.F, size)]
        return self._chunks[size]

    def counts(self, lag: int) -> np.ndarray:
        """Events per column over frames ``t < F - lag``, (2P,)."""
        return np.asarray(self.B[: self.F - lag].sum(axis=0)).ravel()

    def sums(self, X: np.ndarray, offset: int, circular: bool) -> np.ndarray:
        """``sum_t B[t] X[t + offset]`` -> (2P, C). Non-circular: only ``t + offset < F``."""
        F = self.F
        o = offset % F if circular else offset
        out = self.B[: F - o].T @ X[o:]
        if circular and o:
            out += self.B[F - o:].T @ X[:o]
        return np.asarray(out, dtype=np.float32)


class _DenseRows:
    """Centred responses held as one ``(F, C)`` float32 matrix (traces, arrays of responses)."""

    def __init__(self, X: np.ndarray):
        self.X = X
        self.F, self.C = X.shape

    def subset(self, cols: np.ndarray) -> "_DenseRows":
        if cols.size == self.C and np.array_equal(cols, np.arange(self.C)):
            return self
        return _DenseRows(np.ascontiguousarray(self.X[:, cols]))

    def rows(self, a: int, b: int, circular: bool) -> np.ndarray:
        """Rows ``a .. b-1`` (modulo F when ``circular``, else rows from F on are zero), (b - a, C)."""
        F = self.F
        if circular:
            a0 = a % F
            if a0 + (b - a) <= F:
                return self.X[a0:a0 + (b - a)]
            return self.X[np.arange(a, b) % F]
        if b <= F:
            return self.X[a:b]
        out = np.zeros((b - a, self.C), dtype=np.float32)
        out[:max(F - a, 0)] = self.X[a:F]
        return out


class _SpikeRows:
    """Centred spike rates (spikes/s minus the cell's mean), built block by block of frames from the
    spike list: the ``(frames, cells)`` matrix of a long session never exists in memory at once.

    Each spike adds ``1 / duration`` of its frame (the same values as
    :func:`map2d.align.interval_responses`); spikes outside every frame are left out.

    With a ``layout`` (:func:`_gap_layout`) the rows are those of the gap-padded timeline: spikes in
    invalid frames are left out, the mean and sd are over the valid frames only (``n_valid``), and
    the centred value of an empty row is 0 (no response there).
    """

    def __init__(self, spikes: Spikes, noise: SparseNoise, _parts=None, layout=None):
        if _parts is not None:
            self.k, self.col, self.w, self.F, self.C, self.mean32, self.sd, self.empty, self.n_valid = _parts
        else:
            starts, ends = noise.times_s, noise.frame_ends_s()
            F = starts.size
            k, col = spikes_in_intervals(spikes, starts, ends)
            if k.size > 1 and np.any(k[1:] < k[:-1]):
                order = np.argsort(k, kind="stable")
                k, col = k[order], col[order]
            w = (1.0 / (ends - starts)).astype(np.float32)[k]
            self.empty, n = None, F
            if layout is not None:
                row, F, row_valid, valid = layout
                keep = valid[k]
                k, col, w = row[k[keep]], col[keep], w[keep]               # row is increasing: k stays sorted
                self.empty, n = ~row_valid, int(valid.sum())
            self.k, self.col, self.F, self.C, self.w, self.n_valid = k, col, F, spikes.cell_ids.size, w, n
            self.ptr = np.searchsorted(k, np.arange(F + 1))
            s1 = np.bincount(col, weights=self.w, minlength=self.C)       # one pass: sums and squares
            s2 = np.zeros(self.C)
            for a in range(0, F, _CHUNK_FRAMES):
                blk = self._raw(a, min(F, a + _CHUNK_FRAMES))
                s2 += np.einsum("fc,fc->c", blk, blk, dtype=np.float64)
            n = max(n, 1)
            self.mean = s1 / n
            self.mean32 = self.mean.astype(np.float32)
            self.sd = np.sqrt(np.maximum(s2 / n - self.mean ** 2, 0.0))
            return
        self.ptr = np.searchsorted(self.k, np.arange(self.F + 1))

    def subset(self, cols: np.ndarray) -> "_SpikeRows":
        if cols.size == self.C and np.array_equal(cols, np.arange(self.C)):
            return self
        pos = np.full(self.C, -1, dtype=np.int64)
        pos[cols] = np.arange(cols.size)
        keep = pos[self.col] >= 0
        return _SpikeRows(None, None, _parts=(self.k[keep], pos[self.col[keep]], self.w[keep], self.F,
                                              cols.size, self.mean32[cols], self.sd[cols], self.empty,
                                              self.n_valid))

    def _raw(self, a: int, b: int) -> np.ndarray:
        """Uncentred rates of frames ``a .. b-1`` (0 <= a <= b <= F), (b - a, C) float32."""
        out = np.zeros((b - a, self.C), dtype=np.float32)
        i, j = self.ptr[a], self.ptr[b]
        if j > i:
            np.add.at(out.reshape(-1), (self.k[i:j] - a) * self.C + self.col[i:j], self.w[i:j])
        return out

    def rows(self, a: int, b: int, circular: bool) -> np.ndarray:
        """Centred rows ``a .. b-1`` (modulo F when ``circular``, else rows from F on are zero)."""
        F = self.F
        if not circular:
            out = np.zeros((b - a, self.C), dtype=np.float32)
            e = min(b, F)
            if e > a:
                out[:e - a] = self._raw(a, e)
                out[:e - a] -= self.mean32
                if self.empty is not None:
                    out[:e - a][self.empty[a:e]] = 0                    # no response in an empty row
            return out
        pieces, pos = [], a
        while pos < b:
            s0 = pos % F
            e0 = min(F, s0 + (b - pos))
            pieces.append(self._raw(s0, e0))
            pos += e0 - s0
        out = pieces[0] if len(pieces) == 1 else np.concatenate(pieces)
        out -= self.mean32
        if self.empty is not None:
            out[self.empty[np.arange(a, b) % F]] = 0
        return out


def _correlate(chunks, prov, shift: int, lags, circular: bool) -> np.ndarray:
    """``sum_t B[t] X[t + lag + shift]`` for every lag -> (L, 2P, C) float32.

    ``chunks``: ``(a, b, B[a:b]^T)`` blocks of frames; ``prov`` gives the centred response rows of each
    block (plus the longest lag) when needed, so only one block of responses is in memory.
    """
    lmax = int(lags[-1])
    Y = part = None
    for a, b, BT in chunks:
        Xc = prov.rows(a + shift, b + shift + lmax, circular)
        for li, lag in enumerate(lags):
            Xl = Xc[int(lag):int(lag) + (b - a)]
            if part is None or part.shape != (BT.shape[0], Xl.shape[1]):
                part = np.empty((BT.shape[0], Xl.shape[1]), dtype=np.float32)
            _product_into(part, BT, Xl)
            if Y is None:
                Y = np.zeros((len(lags),) + part.shape, dtype=np.float32)
            Y[li] += part
    return Y


def _product_into(out, BT, X):
    """``out[...] = BT @ X`` (``BT`` csc float32, ``X`` float32) written into ``out``: the kernel of
    ``scipy.sparse``'s sparse-times-dense product without a fresh result array per block and lag (the
    same sums in the same order); the public product when that kernel is not at hand."""
    if (_csc_matvecs is None or BT.format != "csc" or BT.dtype != np.float32 or X.dtype != np.float32
            or not X.flags.c_contiguous or not out.flags.c_contiguous):
        out[...] = BT @ X
        return out
    out.fill(0)
    _csc_matvecs(BT.shape[0], BT.shape[1], X.shape[1], BT.indptr, BT.indices, BT.data, X.ravel(), out.ravel())
    return out


# ----------------------------------------------------------------------------------------------
# sparse engine
# ----------------------------------------------------------------------------------------------
def _center_frames(Xf: np.ndarray, has_nan: bool | None = None):
    """(F, C) float32 responses, centred IN PLACE -> the same outputs as :func:`_center`.

    Streams over blocks of frames, so no full-size temporary is made (on a long session fresh
    memory costs more than the arithmetic). ``valid`` is None when every response is finite.
    """
    F, C = Xf.shape
    if has_nan is None:
        has_nan = not all(np.isfinite(Xf[a:a + _CHUNK_FRAMES]).all() for a in range(0, F, _CHUNK_FRAMES))
    if has_nan:
        X, valid, mean, sd, n_valid = _center(Xf.T)
        return X, valid, mean, sd, n_valid
    s1 = np.zeros(C)
    for a in range(0, F, _CHUNK_FRAMES):
        s1 += Xf[a:a + _CHUNK_FRAMES].sum(axis=0, dtype=np.float64)
    n_valid = np.full(C, F, dtype=np.int64)
    mean = s1 / max(F, 1)
    m32 = mean.astype(np.float32)
    s2 = np.zeros(C)
    for a in range(0, F, _CHUNK_FRAMES):
        blk = Xf[a:a + _CHUNK_FRAMES]
        blk -= m32
        s2 += np.einsum("fc,fc->c", blk, blk, dtype=np.float64)
    sd = np.sqrt(s2 / max(F, 1))
    return Xf, None, mean, sd, n_valid


def _center(R: np.ndarray):
    """(C, F) responses -> X (F, C) centred with NaN -> 0, valid mask, means, sds, valid counts."""
    R = np.asarray(R, dtype=np.float32)
    valid = np.isfinite(R)
    n_valid = valid.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(valid, R, 0).sum(axis=1, dtype=np.float64) / np.maximum(n_valid, 1)
        Xc = np.where(valid, R - mean[:, None].astype(np.float32), np.float32(0))
        sd = np.sqrt((Xc.astype(np.float64) ** 2).sum(axis=1) / np.maximum(n_valid, 1))
    X = np.ascontiguousarray(Xc.T, dtype=np.float32)
    return X, valid, mean, sd, n_valid


def _analytic_sd(sd, n_frames, n_on, n_off, both=False):
    """Null sd of the mean-map value for random disjoint event sets (sampling without replacement).

    ``sd`` (C,), ``n_frames`` (C,), ``n_on``/``n_off`` (C, P) or (P,). Returns (3, C, P) for on/off/linear
    (with ``both``, (4, C, P): on/off/linear/on+off).
    For ``n`` of ``F`` values of population variance ``s^2``: ``var(mean) = s^2 (F/n - 1)/(F - 1)``, and
    two disjoint samples have ``cov = -s^2/(F - 1)``, so ``var(mean_a - mean_b) = s^2 F/(F - 1) (1/n_a + 1/n_b)``
    and ``var(mean_a + mean_b) = s^2 / (F - 1) (F/n_a + F/n_b - 4)``.
    """
    s2 = (sd.astype(np.float64) ** 2)[:, None]
    F = n_frames.astype(np.float64)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        n_on = np.broadcast_to(np.asarray(n_on, np.float64), (sd.size, np.shape(n_on)[-1]))
        n_off = np.broadcast_to(np.asarray(n_off, np.float64), (sd.size, np.shape(n_off)[-1]))
        v_on = s2 * (F / n_on - 1) / (F - 1)
        v_off = s2 * (F / n_off - 1) / (F - 1)
        v_lin = s2 * F / (F - 1) * (1 / n_on + 1 / n_off)
        parts = [v_on, v_off, v_lin]
        if both:
            parts.append(s2 / (F - 1) * (F / n_on + F / n_off - 4))
        out = np.sqrt(np.stack(parts))
    out[~np.isfinite(out) | (out <= 0)] = np.nan
    return out


def _sparse_maps_one(sums, n_on, n_off, P, both=False):
    """(2P, C) sums + counts (C, P) -> (3, C, P) mean maps (NaN where a pixel was never shown); with
    ``both``, (4, C, P): on, off, linear, on + off."""
    with np.errstate(divide="ignore", invalid="ignore"):
        on = sums[:P].T / n_on
        off = sums[P:].T / n_off
    on = np.where(n_on > 0, on, np.nan)
    off = np.where(n_off > 0, off, np.nan)
    return np.stack([on, off, on - off, on + off] if both else [on, off, on - off])


def _gumbel_fit(x, w):
    """Maximum-likelihood Gumbel (largest-value) location and scale per row of ``x`` (n, m).

    ``w`` (n, m) are 0/1 weights (0 = no sample). Newton iterations on the scale equation
    ``beta = mean(x) - sum(x e^(-x/beta)) / sum(e^(-x/beta))``, then
    ``mu = -beta log(mean(e^(-x/beta)))`` (Coles 2001, section 3.3), vectorised over rows.
    """
    n = np.maximum(w.sum(axis=1), 1)
    xs = np.where(w > 0, x, 0.0)
    mean = xs.sum(axis=1) / n
    var = (w * (xs - mean[:, None]) ** 2).sum(axis=1) / np.maximum(n - 1, 1)
    beta = np.maximum(np.sqrt(6 * var) / np.pi, 1e-6)                  # moment start
    top = np.where(w > 0, x, -np.inf).max(axis=1)
    for _ in range(50):
        e = w * np.exp(-(np.where(w > 0, x, top[:, None]) - top[:, None]) / beta[:, None])
        se = e.sum(axis=1)
        m1 = (e * xs).sum(axis=1) / se
        v = (e * (xs - m1[:, None]) ** 2).sum(axis=1) / se               # weighted variance
        f = beta - mean + m1
        step = f / (1 + v / beta ** 2)
        beta = np.maximum(beta - step, beta / 4)
        if np.all(np.abs(step) <= 1e-9 * beta):
            break
    e = w * np.exp(-(np.where(w > 0, x, top[:, None]) - top[:, None]) / beta[:, None])
    mu = top - beta * np.log(e.sum(axis=1) / n)
    return mu, beta


def _gumbel_max_test(M, T, n_shuffles, alpha):
    """p-value of the max-statistic and its ``1 - alpha`` critical value from shuffle block maxima.

    ``M`` (n, m): largest ``|z|`` of every pixel block, lag and shuffle (-inf: a block without any
    pixel shown); ``T`` (n,) observed statistics. With ``G`` the Gumbel fitted to the block maxima and
    ``N`` blocks per shuffle, ``P(T* >= t) = 1 - G(t)^N`` (blocks treated as independent, see
    :func:`compute_maps`).
    """
    w = np.isfinite(M).astype(np.float64)
    N = w.sum(axis=1) / n_shuffles
    mu, beta = _gumbel_fit(np.where(w > 0, M, 0.0), w)
    with np.errstate(over="ignore", invalid="ignore"):
        p = -np.expm1(-N * np.exp(-(T - mu) / beta))
        zcrit = mu - beta * np.log(-np.log1p(-alpha) / N)
    bad = ~(N > 0) | ~np.isfinite(mu) | ~np.isfinite(beta)
    p[bad] = np.nan
    zcrit[bad] = np.nan
    return p, zcrit


def _shift_offsets(F: int, n: int, L: int, min_shift: int, rng) -> np.ndarray:
    lo = min(max(min_shift, L + 1), max(F // 4, L + 1))
    hi = F - lo - L
    if hi <= lo:
        raise ValueError(f"too few frames ({F}) for circular-shift shuffles with {L} lags")
    return rng.integers(lo, hi + 1, size=n)


# ----------------------------------------------------------------------------------------------
# public engine
# ----------------------------------------------------------------------------------------------
def compute_maps(responses, noise: SparseNoise, max_lag_s: float = 0.2, n_shuffles: int = 200,
                 alpha: float = 0.01, rng=None, min_shift_s: float = 10.0, n_jobs: int | None = None,
                 dense_method: str = "auto", n_folds: int = 5, trace_decay="off") -> MapResult:
    """ON, OFF and linear maps at every lag for every cell, with z-scores and the responsive call.

    Parameters
    ----------
    responses : Spikes, Traces, or ndarray (cells, frames)
        The responses; an array is taken as the response of every cell in every frame of ``noise``
        (NaN = no valid response), e.g. from :func:`frame_responses`.
    noise : SparseNoise
        int8 frames (sparse noise) or real-valued frames (dense noise), their onsets and grid, and
        ``valid`` (None, or a bool mask of the frames: False for a frame spanning dropped frames;
        see Notes, "Dropped frames").
    max_lag_s : float
        Longest lag; lags are the whole frames ``0 .. floor(max_lag_s / frame_interval)``.
    n_shuffles : int
        Most circular-shift shuffles any cell may draw (the tail fit needs far fewer, see Notes; the
        check ``1/(1 + n_shuffles) <= alpha`` is kept so that settings stay valid for an exact test).
    alpha : float
        Family-wise level of the responsive call (per cell, over pixels x lags x kinds).
    rng : numpy.random.Generator or int, optional
        Seed for the shuffle offsets.
    min_shift_s : float
        Smallest circular shift (seconds; capped at a quarter of the session), so that a shuffled
        response never overlaps the cell's own response to the same frames (calcium decays included).
    n_jobs : int, optional
        1: one process. 2: the first shuffles of every cell run in a forked child process (the
        second core) while this one computes the observed maps; the result is identical. Default:
        2 for large sessions (frames x cells x lags >= 2e7) on a machine with several cores.
    dense_method : {'auto', 'sta', 'whitened'}
        For real-valued frames: the plain STA, the ridge-whitened estimate, or 'auto' (whitened when
        the pixels of the stimulus are correlated beyond chance).
    n_folds : int
        Folds (contiguous blocks of time) for choosing the ridge penalty.

    trace_decay : 'off', 'auto' or float
        Traces only: remove the indicator's first-order decay before the maps
        (:func:`map2d.traces.decay_corrected`: 'auto' estimates it per cell, a number is the time
        constant in seconds). ``map2d maps`` and ``map2d analyze`` use 'auto' by default; pass 'auto'
        here to get the maps they compute. Default 'off' (the traces as given). Spikes are never
        filtered.

    Returns
    -------
    MapResult

    Notes
    -----
    **z-scores.** Under the null of no stimulus dependence the events of a pixel are a random subset
    of the frames, so the mean of its ``n`` centred responses has variance
    ``s^2 (F/n - 1)/(F - 1)`` (sampling without replacement from the ``F`` valid frames of population
    variance ``s^2``); ON and OFF events of one pixel are disjoint, so the linear map has variance
    ``s^2 F/(F - 1) (1/n_on + 1/n_off)``. Conditioning on the responses and randomising the
    stimulus makes this hold whatever the response autocorrelation (the sum of a mean-subtracted
    record's circular autocovariance is zero), but the realised stimulus may have structure (held
    frames, constrained designs) and a fixed stimulus against an autocorrelated trace is what we
    really test. Therefore the analytic sd only shapes the z-score across pixels, and its scale is
    calibrated per cell and kind from circular-shift shuffles: the responses are shifted circularly by
    a random offset (at least ``min_shift_s``, far beyond the longest lag) which keeps their
    autocorrelation and destroys their relation to the stimulus, maps are recomputed with the same
    sparse products, and ``z = map / (analytic sd x g)`` with ``g`` the RMS of the analytic z of
    the shuffled maps (pooled over pixels, lags and the first shuffles). The tests check that the
    z-scores of unresponsive cells have sd 1 +- 0.05 for spikes and for calcium-like traces.

    **responsive.** The max-statistic ``T = max |z|`` over pixels x lags x kinds (Nichols & Holmes
    2002) controls the family-wise error over everything tested for the cell. For sparse noise the
    kinds are ON, OFF, linear and ON + OFF: the last is excitation by either contrast at the same place
    (an ON-OFF or complex cell), whose ON and OFF maps may each stay below the critical value while
    their sum does not (null variance of the sum of two disjoint means: ``s^2 / (F - 1) (F/n_on +
    F/n_off - 4)``, calibrated by the same shuffles). It is tested, not stored in the TIFF stacks
    (``MapResult.both``, ``both_z``). Its null distribution
    comes from the same circular shifts, but not from hundreds of shuffles per cell (each costs as
    much as the maps themselves): every shuffle is cut into ``N`` blocks of pixels, each block holding
    all lags and kinds of its pixels (about 288 values, more pixels when the responses are
    autocorrelated so that lags are redundant); a Gumbel distribution ``G`` is fitted by maximum
    likelihood to the largest ``|z|`` of every block of every shuffle drawn (64 block maxima or
    more), and ``p = P(T* >= T) = 1 - G(T)^N``, ``z_critical = G^-1((1 - alpha)^(1/N))`` (block maxima
    and the Gumbel law: Coles 2001, chapter 3). Blocks are treated as independent: the random
    stimulus makes the maps of different pixels independent under the null, and the dependence
    between lags stays inside a block. The fit from few values per block has a heavier tail than
    the maxima of near-Gaussian z really have, so the test errs on the conservative side (measured:
    rejection rates of null cells at or below ``alpha`` for Poisson spikes from 0.3 to 10 spikes/s
    and calcium-like traces; the tests check the false-positive rate and the spread of p).
    Every cell draws ``n_first`` shuffles (usually 1 or 2 for a large grid); a cell whose first p
    lies within ``[alpha/10, 3 alpha]`` draws more (256 block maxima) and is fitted again, so calls
    near the threshold rest on a tight fit. ``p`` is not limited to ``1/(1 + n_shuffles)``.

    **Peak lag** = the lag with the largest ``|z|`` over pixels and the ON, OFF and linear kinds.
    **Polarity** (responsive cells): 'ON-OFF' when the ON + OFF map carries the cell
    (:func:`choose_maps`: bright and dark spots excite the same places) and is positive there;
    otherwise, with ``e_on``/``e_off`` the largest positive z of the ON/OFF map at the peak lag (the
    strongest excitation by a bright/dark spot), 'mixed' when both reach ``z_critical`` and the weaker
    is at least half the stronger (a simple cell with separate ON and OFF subregions), else the sign of
    the linear map at its largest ``|z|`` pixel: positive 'ON-centre', negative 'OFF-centre'.
    **ON/OFF overlap** = cosine similarity of the soft-thresholded excitatory z-maps
    ``max(z_on - 2, 0)`` and ``max(z_off - 2, 0)`` at the peak lag (1 = same pixels, 0 = disjoint or
    one polarity absent; NaN when neither has an excitatory region). **SNR** = the largest
    ``|linear_z|`` at the peak lag.

    **Dropped frames.** With ``noise.valid`` (set by the loader when the manifest has
    ``sparse_noise.exclude_gaps: true``), a frame ``g`` with ``valid[g] == False`` stayed on screen
    while frames were dropped (its interval to the next onset is longer than 1.5 median intervals).
    At lag ``l`` the pair (stimulus of frame ``t``, response in frame ``t + l``) is used only when the
    frames ``t .. t + l`` are all valid: the response of an invalid frame is never used (its window
    spans the gap), the stimulus of an invalid frame is never used (at every lag its pair would reach
    into or across the gap), and no pair spans a gap (its time span is not ``l`` frames). Nothing else
    is lost: at lag ``l`` only the ``l`` stimulus frames just before each gap lose their pair. The
    cell's mean and sd, the event counts of every pixel and lag (hence the analytic sd and the
    z-scores) and ``n_frames_used`` count only the pairs and frames used. The sparse engine does this
    on a padded timeline where every invalid frame is replaced by ``max(1, longest lag)`` empty rows
    (no stimulus event, no response), so that frames on either side of a gap are more than the longest
    lag apart; the products, counts and circular-shift shuffles then run unchanged on that timeline,
    and the empty rows count as frames without a response (as NaN trace frames do), which keeps the
    null calibrated. Dense (real-valued) noise follows the same rule on the same timeline, without
    copying the movie: as the frames are streamed, the stimulus of a valid frame ``t`` is paired with
    the row ``row(t) + l`` of the padded responses and that of an invalid frame with nothing; the
    stimulus mean, variance and Gram matrix are over the valid frames; the plain STA divides by the
    number ``n_l`` of pairs used at lag ``l`` (``sum over stretches of max(length - l, 0)``), and the
    whitened estimate solves ``(G + lam I) k = (Fv / n_l) c_l`` (the Gram of the paired frames taken as
    ``n_l / Fv`` of that of all ``Fv`` valid frames). The analytic null sd of each lag, and of each
    circular shift (whose count of pairs with a response is exact for the offset), use those counts,
    so the shuffle calibration stays a single factor per cell.

    **Dense noise** (real-valued frames): ``linear`` is the kernel in response units per unit of
    stimulus — the cross-covariance of the stimulus and the lagged response divided by the pixel's
    stimulus variance (plain STA, exact for spatially white noise) or the ridge-whitened estimate
    (correlated noise); ``on``/``off`` and their z are NaN and the max-statistic runs over pixels x lags
    of the linear map only. Its analytic null sd is ``s / sqrt(F var_p)`` (plain) or from the ridge
    operator (whitened), calibrated by the same shuffles.
    """
    if not isinstance(noise, SparseNoise):
        raise TypeError("noise must be a SparseNoise")
    if isinstance(responses, Traces) and trace_decay is not None and trace_decay != "off":
        from .traces import decay_corrected          # as map2d maps / analyze do
        responses, _ = decay_corrected(responses, trace_decay, skip_s=noise.frame_interval_s,
                                       span_s=(noise.times_s[0], noise.frame_ends_s()[-1]))
    if not (0 < alpha < 1):
        raise ValueError(f"alpha must be in (0, 1), got {alpha}")
    if int(n_shuffles) < 1 or 1.0 / (1 + int(n_shuffles)) > alpha:
        raise ValueError(f"n_shuffles={n_shuffles} cannot reach alpha={alpha}: the smallest shuffle "
                         f"p-value is 1/(1 + n_shuffles); use at least {int(np.ceil(1 / alpha)) - 1}")
    rng = np.random.default_rng(rng)
    frame_s = noise.frame_interval_s
    lags = map_lags(frame_s, max_lag_s)
    L = lags.size
    if L >= noise.n_frames:
        raise ValueError(f"max_lag_s={max_lag_s} spans the whole stimulus ({noise.n_frames} frames)")
    dense = not np.issubdtype(noise.frames.dtype, np.integer)
    min_shift = int(round(min_shift_s / frame_s))
    valid = _valid_mask(noise)
    # frames spanning dropped frames: both engines work on a gap-padded timeline (see Notes)
    layout = None if valid is None else (*_gap_layout(valid, int(lags[-1])), valid)
    if isinstance(responses, Spikes) and not dense:
        # spike rates are built block by block of frames from the spike list (no frames x cells matrix)
        return _compute_sparse(_SpikeRows(responses, noise, layout=layout), noise, lags,
                               np.asarray(responses.cell_ids, dtype=np.int64), responses.unit, frame_s,
                               int(n_shuffles), alpha, rng, min_shift, n_jobs=n_jobs, layout=layout)
    if isinstance(responses, Spikes):
        Rf = np.ascontiguousarray(frame_responses(responses, noise).T)
        cell_ids = np.asarray(responses.cell_ids, dtype=np.int64)
        unit = responses.unit
    elif isinstance(responses, Traces):
        Rf = np.ascontiguousarray(frame_responses(responses, noise).T)
        cell_ids = np.asarray(responses.cell_ids, dtype=np.int64)
        unit = responses.unit
    else:
        R = np.asarray(responses, dtype=np.float32)
        if R.ndim != 2 or R.shape[1] != noise.n_frames:
            raise ValueError(f"responses must be (cells, {noise.n_frames}), got {R.shape}")
        Rf = np.ascontiguousarray(R.T)
        cell_ids = np.arange(R.shape[0], dtype=np.int64)
        unit = "response units"
        if valid is not None and dense:         # invalid frames have no response (a new array: the
            Rf = np.where(valid[:, None], Rf, np.float32(np.nan))    # caller's is never written)
    if layout is not None:                                            # (rows, cells), NaN = no response
        row, n_rows, _, _ = layout
        Rv = np.full((n_rows, Rf.shape[1]), np.nan, dtype=np.float32)
        for a in range(0, Rf.shape[0], _CHUNK_FRAMES):
            sel = valid[a:a + _CHUNK_FRAMES]
            Rv[row[a:a + _CHUNK_FRAMES][sel]] = Rf[a:a + _CHUNK_FRAMES][sel]
        Rf = Rv
    R = Rf.T                                                          # (cells, frames) view
    if dense:
        return _compute_dense(R, noise, lags, cell_ids, unit, frame_s, int(n_shuffles), alpha, rng,
                              min_shift, dense_method, n_folds, layout=layout)
    return _compute_sparse(Rf, noise, lags, cell_ids, unit, frame_s, int(n_shuffles), alpha, rng,
                           min_shift, n_jobs=n_jobs, layout=layout)


def _compute_sparse(src, noise, lags, cell_ids, unit, frame_s, K, alpha, rng, min_shift, n_jobs=None,
                    layout=None):
    """``src``: a :class:`_SpikeRows`, or (rows, cells) float32 responses (centred in place).

    ``layout``: the gap-padded timeline of :func:`_gap_layout` (``src`` is then in its rows), or None.
    """
    ny, nx = noise.grid.shape
    L = lags.size
    cor = _SparseCorrelator(noise.frames, layout)
    P = cor.P
    F = cor.F
    if isinstance(src, _SpikeRows):
        prov, C = src, src.C
        sd, n_valid, has_nan, W = src.sd, np.full(src.C, src.n_valid, dtype=np.int64), False, None
        if src.empty is not None:                 # the same valid rows for every cell: one column
            has_nan, W = True, np.ascontiguousarray((~src.empty)[:, None], dtype=np.float32)
    else:
        C = src.shape[1]
        X, valid, mean, sd, n_valid = _center_frames(src)
        prov = _DenseRows(X)
        has_nan = valid is not None
        W = np.ascontiguousarray(valid.T, dtype=np.float32) if has_nan else None
    chunks = cor.chunks()

    # shuffle null: counts over the whole circle, valid events ~ fraction of valid frames per cell
    cnt_all = cor.counts(0)
    frac = n_valid / F
    n_on_null = cnt_all[None, :P] * frac[:, None]
    n_off_null = cnt_all[None, P:] * frac[:, None]
    asd_null = _analytic_sd(sd, n_valid, n_on_null, n_off_null, both=True)    # (4, C, P)

    def null_stats(active, offs):
        """Yield the (4, Ca, L, P) analytic-z maps of each shuffle offset, for the active cells
        (responses circularly shifted by the offset, block by block of frames)."""
        Ca = active.size
        pa = prov.subset(active)
        ch = cor.chunks(max(_CHUNK_FRAMES, _CHUNK_VALUES // max(Ca, 1)))  # few cells: long blocks
        with np.errstate(divide="ignore", invalid="ignore"):             # float32 factors (Ca, P)
            inv_on = (1.0 / n_on_null[active]).astype(np.float32)
            inv_off = (1.0 / n_off_null[active]).astype(np.float32)
            f_on = (1.0 / (n_on_null[active] * asd_null[0, active])).astype(np.float32)
            f_off = (1.0 / (n_off_null[active] * asd_null[1, active])).astype(np.float32)
            f_lin = (1.0 / asd_null[2, active]).astype(np.float32)
            f_both = (1.0 / asd_null[3, active]).astype(np.float32)
        for o in offs:
            out = np.empty((N_KINDS_SPARSE, Ca, L, P), dtype=np.float32)
            Yall = _correlate(ch, pa, int(o), lags, circular=True)           # (L, 2P, Ca)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                for li in range(L):
                    on, off = Yall[li, :P].T, Yall[li, P:].T
                    out[0, :, li] = on * f_on
                    out[1, :, li] = off * f_off
                    out[2, :, li] = (on * inv_on - off * inv_off) * f_lin
                    out[3, :, li] = (on * inv_on + off * inv_off) * f_both
            yield out

    # the first shuffles of every cell run in a child process (second core) while this one
    # computes the observed maps: the two halves cost the same
    offsets = _shift_offsets(F, K, L, min_shift, rng)
    ok = _ok_cells(sd, n_valid, lags)
    cells = np.flatnonzero(ok)
    plan = _null_plan(P, L, K, N_KINDS_SPARSE, _effective_lags(prov.rows(0, min(F, 5000), False), sd, L, ok))
    n_sub, starts, n_a, _ = plan
    if n_jobs is None:
        n_jobs = 2 if F * C * L >= _FORK_MIN_WORK and (os.cpu_count() or 1) > 1 else 1
    child = ForkedCall(lambda: _first_stage(null_stats, cells, offsets[:n_a], C, L, starts, N_KINDS_SPARSE),
                       enabled=n_jobs > 1)

    # every element of these is written lag by lag below (no NaN fill first: 2 x 4 x cells x lags x pixels)
    maps = np.empty((N_KINDS_SPARSE, C, L, P), dtype=np.float32)
    asd = np.empty((N_KINDS_SPARSE, C, L, P), dtype=np.float32)
    Yobs = _correlate(chunks, prov, 0, lags, circular=False)            # (L, 2P, C)
    for li, lag in enumerate(lags):
        sums = Yobs[li]
        if has_nan:
            cnt = cor.sums(W, int(lag), circular=False).T      # (C or 1, 2P) valid events per cell
            n_on, n_off = cnt[:, :P], cnt[:, P:]
        else:
            cnt = cor.counts(int(lag))
            n_on = np.broadcast_to(cnt[:P], (C, P))
            n_off = np.broadcast_to(cnt[P:], (C, P))
        maps[:, :, li] = _sparse_maps_one(sums, n_on, n_off, P, both=True)
        asd[:, :, li] = _analytic_sd(sd, n_valid, n_on, n_off, both=True)
    z_an = np.divide(maps, asd, out=asd)                            # (4, C, L, P), in place

    del Yobs
    return _finish(maps, z_an, null_stats, offsets, sd, n_valid, cell_ids, noise.grid, lags, frame_s,
                   unit, alpha, kinds_used=(0, 1, 2, 3), stimulus="sparse", method="sparse",
                   ridge=np.full(C, np.nan), first=child.result(), plan=plan)


def _ok_cells(sd, n_valid, lags):
    """Cells whose responses vary and cover more than the lags: the ones that get statistics."""
    return np.isfinite(sd) & (sd > 0) & (n_valid > lags[-1] + 2)


def _effective_lags(X, sd, L, ok, max_frames=10000):
    """Median over cells of ``L / (1 + 2 sum_d (1 - d/L) rho(d))``, ``rho`` the response
    autocorrelation at ``d = 1 .. L-1`` frames (from the first ``max_frames`` frames).

    Under the shuffle null the maps of one pixel at lags ``l`` and ``l + d`` correlate as the
    response does at ``d`` frames, so this is roughly the number of independent lags (``L`` for
    spikes, near 1 for slow calcium traces). It sizes the blocks of the tail fit.
    """
    if L <= 1 or not ok.any():
        return float(L)
    Xs = X[:max_frames]                                              # enough for a few lags
    n = Xs.shape[0]
    var = np.maximum(sd[ok].astype(np.float64) ** 2, 1e-300)
    acc = np.zeros(ok.sum())
    for d in range(1, min(L, n - 1)):
        prod = Xs[:n - d] * Xs[d:]                                    # float32, summed in float64
        rho = prod.sum(axis=0, dtype=np.float64)[ok] / (n - d) / var
        acc += (1 - d / L) * rho
    l_eff = L / np.maximum(1 + 2 * acc, 1.0)
    return float(np.clip(np.median(l_eff), 1.0, L))


def _null_plan(P, L, K, n_kinds=3, l_eff=None):
    """Pixel blocks of the tail fit and shuffle counts: (n_sub, block starts, n_first, n_gray).

    A block is a contiguous run of pixels with all their lags and kinds (about ``_BLOCK_VALUES``
    values), so the dependence between lags stays inside a block. All cells draw ``n_first`` shuffles:
    enough for ``_MIN_BLOCKS`` block maxima and 4096 null values per kind for the scale; cells near
    ``alpha`` draw up to ``n_gray`` (``_GRAY_BLOCKS`` block maxima). Never more than ``K``.
    """
    l_eff = L if l_eff is None else l_eff
    n_sub = int(min(P, max(1, int(P * l_eff * n_kinds) // _BLOCK_VALUES)))
    starts = (np.arange(n_sub) * P) // n_sub
    per_shuffle = n_sub
    n_a = max(-(-_MIN_BLOCKS // per_shuffle), -(-4096 // (P * L)))
    n_a = int(min(K, max(1, n_a)))
    n_b = int(min(K, max(n_a, -(-_GRAY_BLOCKS // per_shuffle))))
    return n_sub, starts, n_a, n_b


def _block_max(zn, starts):
    """(3, Ca, L, P) z -> (3, Ca, n_sub) largest ``|z|`` per kind and pixel block, over all lags
    (-inf: none)."""
    a = np.abs(zn)
    a[~np.isfinite(a)] = -np.inf
    return np.maximum.reduceat(a, starts, axis=3).max(axis=2)


def _first_stage(null_stats, cells, offs, C, L, starts, n_kinds=3):
    """The first shuffles for every cell: sums of squared z and counts per kind (for the scale), and
    the block maxima of ``|z|`` per shuffle, kind, cell, lag and block (-inf where none)."""
    sumsq = np.zeros((n_kinds, C))
    nsq = np.zeros((n_kinds, C))
    kmax = np.full((len(offs), n_kinds, C, starts.size), -np.inf, dtype=np.float32)
    if cells.size:
        for k, zn in enumerate(null_stats(cells, offs)):
            fin = np.isfinite(zn)
            a = np.where(fin, zn, np.float32(0))
            sumsq[:, cells] += np.einsum("kclp,kclp->kc", a, a, dtype=np.float64)
            nsq[:, cells] += fin.sum(axis=(2, 3))
            kmax[k][:, cells] = _block_max(zn, starts)
    return sumsq, nsq, kmax


def _finish(maps, z_an, null_stats, offsets, sd, n_valid, cell_ids, grid, lags, frame_s, unit, alpha,
            kinds_used, stimulus, method, ridge, first=None, plan=None):
    """Shuffle calibration, max-statistic tail fit, peak lag, polarity, overlap, SNR -> MapResult.

    ``first``: the result of :func:`_first_stage` when already computed (e.g. in a child process).
    """
    ny, nx = grid.shape
    C = cell_ids.size
    L = lags.size
    ku = list(kinds_used)
    ok_cell = _ok_cells(sd, n_valid, lags)
    cells = np.flatnonzero(ok_cell)
    n_sub, starts, n_a, n_b = plan
    if first is None:
        first = _first_stage(null_stats, cells, offsets[:n_a], C, L, starts, maps.shape[0])
    sumsq, nsq, kmax_a = first

    def block_max(zn):
        return _block_max(zn, starts)

    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.sqrt(sumsq / nsq)                                    # (3, C)
    g[~np.isfinite(g) | (g <= 0)] = np.nan
    if z_an.dtype == np.float32:                                   # (3, C, L, P), in place
        z = np.divide(z_an, g[:, :, None, None].astype(np.float32), out=z_an)
    else:
        z = (z_an / g[:, :, None, None]).astype(np.float32)

    def calibrated(kmax, idx):  # (n, 3, Ca, n_sub) -> (Ca, n * n_sub) block maxima of |z|
        with np.errstate(invalid="ignore"):
            m = (kmax[:, ku] / g[ku][:, idx][None, :, :, None].astype(np.float32)).max(axis=1)
        return np.moveaxis(m, 1, 0).reshape(idx.size, -1).astype(np.float64)

    # largest |z| over used kinds and pixels per cell and lag (NaN pixels ignored; -inf: none)
    zk = z[ku] if len(ku) < z.shape[0] else z
    per_lag = np.fmax(np.fmax.reduce(np.fmax.reduce(zk, axis=3), axis=0),          # max |z| per (C, L)
                      -np.fmin.reduce(np.fmin.reduce(zk, axis=3), axis=0))
    per_lag[np.isnan(per_lag)] = -np.inf
    T = np.where(ok_cell, per_lag.max(axis=1), np.nan)
    T[~np.isfinite(T)] = np.nan
    p = np.full(C, np.nan)
    zcrit = np.full(C, np.nan)
    drawn = np.zeros(C, dtype=int)
    if cells.size:
        drawn[cells] = n_a
        Ma = calibrated(kmax_a[:, :, cells], cells)
        p[cells], zcrit[cells] = _gumbel_max_test(Ma, T[cells], n_a, alpha)
        # cells near alpha: more shuffles, a tighter fit
        gray = cells[(p[cells] >= alpha / 10) & (p[cells] <= 3 * alpha)] if n_b > n_a else cells[:0]
        if gray.size:
            kmax_b = np.stack([block_max(zn) for zn in null_stats(gray, offsets[n_a:n_b])])
            pos = np.searchsorted(cells, gray)
            Mb = np.concatenate([Ma[pos], calibrated(kmax_b, gray)], axis=1)
            p[gray], zcrit[gray] = _gumbel_max_test(Mb, T[gray], n_b, alpha)
            drawn[gray] = n_b
    p = np.where(ok_cell & np.isfinite(T), p, np.nan)
    responsive = np.isfinite(p) & (p <= alpha)

    # peak lag (over the ON, OFF and linear maps: the ON + OFF kind takes part in the test only),
    # polarity, overlap, snr
    if z.shape[0] > len(KINDS):
        z3 = z[[k for k in ku if k < len(KINDS)]]
        per_lag3 = np.fmax(np.fmax.reduce(np.fmax.reduce(z3, axis=3), axis=0),
                           -np.fmin.reduce(np.fmin.reduce(z3, axis=3), axis=0))
        per_lag3[np.isnan(per_lag3)] = -np.inf
        best_lag = np.argmax(per_lag3, axis=1)
    else:
        best_lag = np.argmax(per_lag, axis=1)
    peak_idx = np.where(responsive, best_lag, -1)
    peak_s = np.where(responsive, lags[best_lag] * frame_s, np.nan)
    polarity = np.full(C, "", dtype=object)
    overlap = np.full(C, np.nan)
    snr = np.full(C, np.nan)
    for c in range(C):
        li = best_lag[c]
        zl = z[2, c, li]
        if np.isfinite(zl).any():
            snr[c] = float(np.nanmax(np.abs(zl)))
        if not responsive[c] or stimulus != "sparse":
            if responsive[c]:
                j = int(np.nanargmax(np.abs(zl)))
                polarity[c] = "ON-centre" if zl[j] > 0 else "OFF-centre"
            continue
        zon, zoff = z[0, c, li], z[1, c, li]
        e_on = float(np.nanmax(zon)) if np.isfinite(zon).any() else -np.inf
        e_off = float(np.nanmax(zoff)) if np.isfinite(zoff).any() else -np.inf
        crit = zcrit[c]
        if e_on >= crit and e_off >= crit and min(e_on, e_off) >= 0.5 * max(e_on, e_off):
            polarity[c] = "mixed"
        else:
            j = int(np.nanargmax(np.abs(zl)))
            polarity[c] = "ON-centre" if zl[j] > 0 else "OFF-centre"
        a = np.nan_to_num(np.maximum(zon - 2.0, 0))
        b = np.nan_to_num(np.maximum(zoff - 2.0, 0))
        na, nb = np.linalg.norm(a), np.linalg.norm(b)
        if na > 0 and nb > 0:
            overlap[c] = float(a @ b / (na * nb))
        elif na > 0 or nb > 0:
            overlap[c] = 0.0

    shape = (C, L, ny, nx)
    four = maps.shape[0] == N_KINDS_SPARSE
    res = MapResult(
        grid=grid, lags_s=np.round(lags * frame_s, 9),  # to the ns: no float noise in files
        lag_frames=lags, cell_ids=cell_ids, unit=unit, stimulus=stimulus,
        on=maps[0].reshape(shape), off=maps[1].reshape(shape), linear=maps[2].reshape(shape),
        on_z=z[0].reshape(shape), off_z=z[1].reshape(shape), linear_z=z[2].reshape(shape),
        responsive=responsive, p_value=p, max_abs_z=T, z_critical=zcrit, peak_lag_index=peak_idx,
        peak_lag_s=peak_s, polarity=np.asarray(polarity, dtype=str), onoff_overlap=overlap, snr=snr,
        n_frames_used=n_valid.astype(int), frame_s=float(frame_s), n_shuffles=drawn,
        null_scale=g.T.copy(), alpha=float(alpha), method=method, ridge_lambda=ridge,
        both=maps[3].reshape(shape) if four else None, both_z=z[3].reshape(shape) if four else None)
    if stimulus == "sparse" and responsive.any():
        res.polarity = _either_polarity(res)
    return res


def _either_polarity(result: MapResult) -> np.ndarray:
    """``result.polarity`` with 'ON-OFF' for every cell that the ON + OFF map carries
    (:func:`choose_maps`) and that both contrasts excite (positive ON + OFF map at its largest ``|z|``)."""
    pol = np.asarray(result.polarity, dtype=object).copy()
    ch = choose_maps(result)
    for c in np.flatnonzero(ch.kind == "on+off"):
        z = np.nan_to_num(ch.z[c])
        if z.max() > 0 and z.max() >= -z.min():
            pol[c] = "ON-OFF"
    return np.asarray(pol, dtype=str)


# ----------------------------------------------------------------------------------------------
# dense noise
# ----------------------------------------------------------------------------------------------
def _as_frame_matrix(responses, n_frames):
    R = np.asarray(responses, dtype=np.float32)
    if R.ndim == 1:
        R = R[None]
    if R.ndim != 2 or R.shape[1] != n_frames:
        raise ValueError(f"responses must be (cells, {n_frames}) frame responses, got {R.shape}")
    return R


def _read_frames(frames, a, b):
    """Frames ``a:b`` as an in-memory array. For a memory-mapped movie the pages just read are then
    dropped from this process (``madvise(MADV_DONTNEED)``; clean file pages, re-read from disk if
    needed), so streaming a movie larger than memory keeps the resident memory at one chunk."""
    blk = np.array(frames[a:b])
    release_pages(frames)
    return blk


def release_pages(arr) -> None:
    """Drop the resident pages of a read-only memory-mapped array (no-op for anything else)."""
    mm = getattr(arr, "_mmap", None)
    if mm is not None and hasattr(mm, "madvise"):
        import mmap
        try:
            mm.madvise(getattr(mmap, "MADV_DONTNEED", 4))
        except (OSError, ValueError):
            pass


def _stimulus_moments(frames, chunk=_CHUNK_FRAMES, valid=None):
    """Per-pixel mean and variance of real frames (F, ...), streamed over chunks (over the frames
    with ``valid`` True only, when a mask is given)."""
    F = frames.shape[0]
    P = int(np.prod(frames.shape[1:]))
    s1 = np.zeros(P)
    s2 = np.zeros(P)
    for a in range(0, F, chunk):
        blk = _read_frames(frames, a, a + chunk).astype(np.float64).reshape(-1, P)
        if valid is not None:            # weights, not a selection: blocks of one size (heap reuse)
            w = valid[a:a + chunk].astype(np.float64)
            s1 += w @ blk
            s2 += w @ blk ** 2
            continue
        s1 += blk.sum(axis=0)
        s2 += (blk ** 2).sum(axis=0)
    n = F if valid is None else max(int(valid.sum()), 1)
    mu = s1 / n
    return mu, np.maximum(s2 / n - mu ** 2, 0.0)


def _check_valid(valid, F):
    """A user's ``valid`` mask (frames,) as bool, or None when absent or all True."""
    if valid is None:
        return None
    valid = np.asarray(valid)
    if valid.shape != (F,) or valid.dtype != bool:
        raise ValueError(f"valid must be a bool mask of shape ({F},), got {valid.dtype} {valid.shape}")
    return None if valid.all() else valid


def _pad_rows(R, layout):
    """(cells, F) responses -> (cells, n_rows) on the gap-padded timeline (NaN in the empty rows)."""
    row, n_rows, _, valid = layout
    out = np.full((R.shape[0], n_rows), np.nan, dtype=np.float32)
    out[:, row[valid]] = R[:, valid]
    return out


def _pairs_per_lag(row_valid, lags):
    """Pairs (valid row ``r``, valid row ``r + l``) at each lag: frames ``t .. t + l`` all valid."""
    n = row_valid.size
    return np.array([float(np.count_nonzero(row_valid[:n - lag] & row_valid[lag:])) for lag in lags])


def _circular_pairs(row_valid):
    """``a[s]`` = number of valid rows ``r`` with row ``(r + s) mod n`` valid, for every shift ``s``
    (the circular autocorrelation of the mask, by FFT)."""
    v = row_valid.astype(np.float64)
    return np.rint(np.fft.irfft(np.abs(np.fft.rfft(v)) ** 2, n=v.size))


def _dense_cross(frames, X, offsets, mu, circular, chunk=_CHUNK_FRAMES, n_blocks=1, gram=False,
                 layout=None):
    """Sums ``sum_t (s_t - mu) X[t + o]`` for every offset, streamed over chunks of frames.

    Returns ``cross`` (n_blocks, O, P, C) summed within each contiguous time block (the frame of
    the stimulus decides the block) and, if ``gram``, the per-block Gram matrices (n_blocks, P, P).
    Non-circular offsets leave out frames with ``t + o >= F``. With a ``layout``
    (:func:`_gap_layout`) ``X`` holds the rows of the gap-padded timeline, the stimulus of an
    invalid frame is skipped and a valid frame ``t`` pairs with row ``row[t] + o`` (modulo the rows
    when ``circular``).
    """
    F = frames.shape[0]
    P = int(np.prod(frames.shape[1:]))
    C = X.shape[1]
    N = X.shape[0]                                                     # F, or the padded rows
    offsets = np.asarray(offsets, dtype=int)
    O = offsets.size
    edges = np.linspace(0, F, n_blocks + 1).astype(int)
    cross = np.zeros((n_blocks, O, P, C), dtype=np.float64)
    Xp = np.vstack([X, np.zeros((1, C), dtype=X.dtype)])
    G = np.zeros((n_blocks, P, P)) if gram else None
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        raw = _read_frames(frames, a, b)
        if raw.dtype == np.float32 and not np.any(mu):
            S = raw.reshape(-1, P)                                     # already centred, no copy
        else:
            S = (raw.astype(np.float64).reshape(-1, P) - mu).astype(np.float32)
        t = np.arange(a, b)
        blk = np.searchsorted(edges, t, side="right") - 1
        if layout is not None:         # frames at their rows; an invalid one pairs with the zero row
            keep = layout[3][a:b]      # (no selection: blocks keep one size, so the heap is reused)
            t = layout[0][a:b]
        for bi in np.unique(blk):
            if n_blocks == 1:
                Sb, tb = S, t
                kb = None if layout is None else keep
            else:
                sel = blk == bi
                Sb, tb = S[sel], t[sel]
                kb = None if layout is None else keep[sel]
            if gram:
                Sg = Sb if kb is None else Sb * kb[:, None]
                G[bi] += Sb.T.astype(np.float64) @ Sg.astype(np.float64)
            idx = tb[:, None] + offsets[None, :]                     # (n, O): one product for all offsets
            idx = idx % N if circular else np.where(idx < N, idx, N)  # row N of Xp is zeros
            if kb is not None:
                idx[~kb] = N
            prod = Sb.T @ Xp[idx].reshape(idx.shape[0], O * C)
            cross[bi] += prod.reshape(P, O, C).transpose(1, 0, 2)
    return cross, G


def _dense_inputs(responses, frames, lags, valid, chunk):
    """What :func:`dense_sta` and :func:`whitened_sta` start from: the responses as a (cells, frames)
    matrix, the lags, the gap layout (None without ``valid``), the centred (gap-padded) responses and
    their finite mask, and the stimulus mean over the valid frames."""
    F = frames.shape[0]
    R = _as_frame_matrix(responses, F)
    lags = np.asarray(lags, dtype=int)
    fv = _check_valid(valid, F)
    layout = None if fv is None else (*_gap_layout(fv, int(lags.max())), fv)
    X, finite, _, _, _ = _center(R if layout is None else _pad_rows(R, layout))
    mu, _ = _stimulus_moments(frames, chunk, fv)
    return R, lags, layout, X, finite, mu


def dense_sta(responses, frames, lags, chunk: int = _CHUNK_FRAMES, valid=None) -> np.ndarray:
    """Plain spike-triggered average of real-valued noise, as a stimulus-response cross-covariance.

    Parameters
    ----------
    responses : ndarray (cells, F)
        Response of each cell in each frame (NaN = not valid, left out).
    frames : array_like (F, ny, nx)
        Real-valued stimulus (binary, Gaussian, ...); may be a memory-mapped array (read in chunks).
    lags : sequence of int
        Lags in frames (response in frame ``t + l`` after the stimulus in frame ``t``).
    chunk : int
        Frames read at a time.
    valid : ndarray bool (F,), optional
        False for a frame spanning dropped frames: the pair (frame ``t``, frame ``t + l``) is used
        only when the frames ``t .. t + l`` are all valid, and the stimulus mean is over the valid
        frames (see :func:`compute_maps`, Notes, "Dropped frames").

    Returns
    -------
    ndarray float32 (cells, L, ny, nx)
        ``c_l(p) = (1/N_l) sum_t (s_t(p) - mean_p) (r_{t+l} - mean_r)`` over the ``N_l`` pairs used. For a linear cell
        ``r = k . s + noise`` this is ``Sigma k`` with ``Sigma`` the stimulus covariance (derived:
        ``E[s r] = E[s s^T] k``); the classical spike-triggered average (Chichilnisky 2001) is
        ``c_l / mean_r`` added to the stimulus mean.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> s = rng.standard_normal((4000, 2, 3))
    >>> r = 2.0 * s[:, 0, 1][None]          # responds at lag 0 to pixel (0, 1)
    >>> c = dense_sta(r, s, [0, 1])
    >>> bool(abs(c[0, 0, 0, 1] - 2.0) < 0.2 and abs(c[0, 1, 0, 1]) < 0.2)
    True
    """
    R, lags, layout, X, valid, mu = _dense_inputs(responses, frames, lags, valid, chunk)
    cross, _ = _dense_cross(frames, X, lags, mu, circular=False, chunk=chunk, layout=layout)
    W = np.ascontiguousarray(valid.T, dtype=np.float32)
    if layout is None:
        n = np.array([W[lag:].sum(axis=0) for lag in lags])          # (L, C) valid pairs
    else:                                                            # stimulus row valid too
        rv = layout[2].astype(np.float32)[:, None]
        n = np.array([(W[lag:] * rv[:W.shape[0] - lag]).sum(axis=0) for lag in lags])
    with np.errstate(invalid="ignore", divide="ignore"):
        out = cross[0] / n[:, None, :]                                # (L, P, C)
    return out.transpose(2, 0, 1).reshape((R.shape[0], lags.size) + tuple(frames.shape[1:])).astype(np.float32)


def _ridge_cv(G_blocks, c_blocks, rr_blocks, lambdas):
    """Cross-validated ridge over time blocks from sufficient statistics.

    ``G_blocks`` (B, P, P), ``c_blocks`` (B, L, P, C) sums ``S^T r``, ``rr_blocks`` (B, L, C) sums ``r^T r``.
    Returns the chosen penalty per cell (C,) and the test error (n_lambda, C).
    The test error of fold b, ``|r_b - S_b k|^2 = rr_b - 2 k.c_b + k^T G_b k``, needs no frames.
    """
    nb = G_blocks.shape[0]
    C = c_blocks.shape[-1]
    err = np.zeros((lambdas.size, C))
    Gt, ct = G_blocks.sum(0), c_blocks.sum(0)
    for b in range(nb):
        Gtr = Gt - G_blocks[b]
        ctr = ct - c_blocks[b]
        evals, V = np.linalg.eigh(Gtr)
        evals = np.maximum(evals, 0)
        cr = np.einsum("pq,lpc->lqc", V, ctr)                        # rotated training sums
        Gte = V.T @ G_blocks[b] @ V
        cte = np.einsum("pq,lpc->lqc", V, c_blocks[b])
        for i, lam in enumerate(lambdas):
            k = cr / (evals + lam)[None, :, None]                     # (L, P, C) in the eigenbasis
            quad = np.einsum("lpc,pq,lqc->c", k, Gte, k)
            err[i] += rr_blocks[b].sum(0) - 2 * np.einsum("lpc,lpc->c", k, cte) + quad
    return lambdas[np.argmin(err, axis=0)], err


def whitened_sta(responses, frames, lags, n_folds: int = 5, lambdas=None, chunk: int = _CHUNK_FRAMES,
                 return_lambda: bool = False, valid=None):
    """Ridge-regularised whitened kernel estimate for correlated real-valued noise.

    Solves ``(S^T S + lambda I) k_l = S^T r_l`` for every cell and lag, ``S`` the mean-subtracted
    stimulus (frames x pixels) and ``r_l`` the centred response ``l`` frames later. The penalty is
    chosen per cell from a log-spaced grid by ``n_folds``-fold cross-validation over contiguous
    blocks of time (the summed squared prediction error over all lags), computed from per-block
    sufficient statistics so the frames are read once, in chunks.

    Parameters
    ----------
    responses : ndarray (cells, F)
    frames : array_like (F, ny, nx)
    lags : sequence of int
    n_folds : int
    lambdas : array_like, optional
        Candidate penalties; by default ``mean eigenvalue of S^T S x logspace(-4, 2, 25)``.
    chunk : int
    return_lambda : bool
        Also return the chosen penalty per cell.
    valid : ndarray bool (F,), optional
        False for a frame spanning dropped frames: its stimulus is left out of ``S``, and a lag-``l``
        pair of frames ``t`` and ``t + l`` is used only when the frames ``t .. t + l`` are all valid
        (as :func:`dense_sta`).

    Returns
    -------
    ndarray float32 (cells, L, ny, nx)
        The kernel in response units per unit of stimulus (for white noise it equals
        ``dense_sta / variance``). With ``return_lambda``, ``(kernel, lambda (cells,))``.

    References
    ----------
    Theunissen FE et al. (2001) Network 12:289-316; Hastie T, Tibshirani R, Friedman J (2009) The
    Elements of Statistical Learning, 2nd ed., sections 3.4.1 (ridge) and 7.10 (cross-validation).
    """
    R, lags, layout, X, _, mu = _dense_inputs(responses, frames, lags, valid, chunk)
    k, lam = _whitened_core(frames, X, lags, mu, n_folds, lambdas, chunk, layout=layout)
    out = k.transpose(2, 0, 1).reshape((R.shape[0], lags.size) + tuple(frames.shape[1:])).astype(np.float32)
    return (out, lam) if return_lambda else out


def _whitened_core(frames, X, lags, mu, n_folds, lambdas, chunk, layout=None):
    """-> kernel (L, P, C) and chosen lambda (C,). ``X`` in the rows of ``layout`` when given.

    A fold is a block of stimulus frames; its responses are the rows ``row(t) + l`` of its frames
    (with gaps, the padded rows in between hold no stimulus and no response, so they add nothing).
    """
    F = frames.shape[0]
    n_folds = int(max(2, min(n_folds, F // 20 if F >= 40 else 2)))
    cross, G = _dense_cross(frames, X, lags, mu, circular=False, chunk=chunk, n_blocks=n_folds, gram=True,
                            layout=layout)
    edges = np.linspace(0, F, n_folds + 1).astype(int)
    N = X.shape[0]
    if layout is not None:
        # at lag l only n_l of the Fv valid frames have a pair: taking their Gram as (n_l / Fv) G
        # (the frames losing their pair are those just before a gap, any noise frames), the lag-l
        # normal equations are (G + lam I) k = (Fv / n_l) c_l, so the kernel is not shrunk by gaps
        npair = _pairs_per_lag(layout[2], lags)
        cross *= (int(layout[3].sum()) / np.maximum(npair, 1))[None, :, None, None]
        edges = np.r_[layout[0], N][edges]                           # fold edges as padded rows
    X64 = X.astype(np.float64)
    rr = np.zeros((n_folds, lags.size, X.shape[1]))
    for b in range(n_folds):
        for li, lag in enumerate(lags):
            a, e = edges[b] + lag, min(edges[b + 1] + lag, N)
            rr[b, li] = (X64[a:e] ** 2).sum(0)
    Gt = G.sum(0)
    P = Gt.shape[0]
    if lambdas is None:
        lambdas = np.trace(Gt) / P * np.logspace(-4, 2, 25)
    lambdas = np.asarray(lambdas, dtype=float)
    lam, _ = _ridge_cv(G, cross, rr, lambdas)
    evals, V = np.linalg.eigh(Gt)
    evals = np.maximum(evals, 0)
    ct = np.einsum("pq,lpc->lqc", V, cross.sum(0))
    k = np.einsum("pq,lqc->lpc", V, ct / (evals[:, None] + lam[None, :])[None])
    return k, lam


def _compute_dense(R, noise, lags, cell_ids, unit, frame_s, K, alpha, rng, min_shift,
                   dense_method, n_folds, layout=None):
    """Dense-noise maps. ``layout``: the gap-padded timeline of :func:`_gap_layout` (``R`` is then
    (cells, padded rows), NaN in the rows of no valid frame), or None."""
    frames = noise.frames
    F = frames.shape[0]
    C = R.shape[0]
    L = lags.size
    ny, nx = noise.grid.shape
    P = ny * nx
    X, valid, mean, sd, n_valid = _center(R)
    fv = None if layout is None else layout[3]
    Fv = F if fv is None else int(fv.sum())                           # stimulus frames used
    mu, var = _stimulus_moments(frames, valid=fv)
    if F * P <= 50_000_000:           # fits in memory: centre once, the shuffles reuse it
        frames = (np.asarray(frames, dtype=np.float32).reshape(F, P) - mu.astype(np.float32))
        mu = np.zeros(P)
    if dense_method not in ("auto", "sta", "whitened"):
        raise ValueError(f"dense_method must be 'auto', 'sta' or 'whitened', got {dense_method!r}")
    cross0, G = _dense_cross(frames, X, [0], mu, circular=True, n_blocks=1, gram=True, layout=layout)
    G = G[0]
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.sqrt(np.diag(G))
        corr = G / np.outer(d, d)
    off = np.abs(corr[~np.eye(P, dtype=bool)])
    pixel_corr = float(np.nanmax(off)) if off.size and np.isfinite(off).any() else float("nan")
    threshold = WHITEN_CORRELATION + WHITEN_CHANCE / np.sqrt(Fv)
    if dense_method == "auto":
        method = "whitened" if pixel_corr > threshold else "sta"
    else:
        method = dense_method
    # with gaps: pairs used at each lag, and pairs with a response in a circular shift by s rows
    npair_gap = None if layout is None else _pairs_per_lag(layout[2], lags)
    shift_pairs = None if layout is None else _circular_pairs(layout[2])
    with np.errstate(invalid="ignore", divide="ignore"):
        if method == "sta":
            cross, _ = _dense_cross(frames, X, lags, mu, circular=False, layout=layout)
            npair = np.array([float(F - lag) for lag in lags]) if layout is None else npair_gap
            lin = cross[0] / npair[:, None, None] / var[None, :, None]     # (L, P, C)
            op_sd = 1.0 / np.sqrt(var)                                      # per unit s / sqrt(N)
            ridge = np.full(C, np.nan)

            def apply(c_sums, active):                                      # (P, Ca) -> (P, Ca)
                return c_sums / F / var[:, None]
        else:
            k, lam = _whitened_core(frames, X, lags, mu, n_folds, None, _CHUNK_FRAMES, layout=layout)
            lin = k
            ridge = lam
            evals, V = np.linalg.eigh(G)
            evals = np.maximum(evals, 0)
            # null covariance of k = M G M^T s^2 with M = V diag(1/(e + lam)) V^T
            op_var = np.einsum("pq,qc->pc", V ** 2, evals[:, None] / (evals[:, None] + lam[None, :]) ** 2)
            op_sd = np.sqrt(op_var)                                         # (P, C), times s

            def apply(c_sums, active):
                ct = V.T @ c_sums
                return V @ (ct / (evals[:, None] + lam[None, active]))
        if method == "sta":
            a_sd = sd[None, :] * op_sd[:, None] / np.sqrt(F)               # (P, C)
        else:
            a_sd = sd[None, :] * op_sd
        a_sd = np.where(a_sd > 0, a_sd, np.nan)
        if layout is None:
            z_lin = lin / a_sd[None]                                        # (L, P, C)
        else:
            # null sd for n pairs: the STA's sd / sqrt(n); the whitened operator's (built from the
            # Gram of all Fv valid frames, applied to Fv / n times the sums of n pairs, see
            # _whitened_core) times sqrt(Fv / n)
            base = sd[None, :] * (op_sd[:, None] if method == "sta" else op_sd)  # (P, C)
            base = np.where(base > 0, base, np.nan)

            def sd_for(n, cols=slice(None)):
                return base[:, cols] / np.sqrt(n) if method == "sta" else base[:, cols] * np.sqrt(Fv / n)

            z_lin = lin / np.stack([sd_for(n) for n in npair_gap])           # (L, P, C)
    maps = np.full((3, C, L, P), np.nan, dtype=np.float32)
    z_an = np.full((3, C, L, P), np.nan)
    maps[2] = lin.transpose(2, 0, 1)
    z_an[2] = z_lin.transpose(2, 0, 1)

    def null_stats(active, offs):
        Xa = X if active.size == C and np.array_equal(active, np.arange(C)) else np.ascontiguousarray(X[:, active])
        for offset in offs:
            crs, _ = _dense_cross(frames, Xa, offset + lags, mu, circular=True, layout=layout)
            out = np.full((3, active.size, L, P), np.nan, dtype=np.float32)
            for li in range(L):
                with np.errstate(invalid="ignore", divide="ignore"):
                    if layout is None:
                        kk = apply(crs[0, li], active)                          # (P, Ca)
                        out[2, :, li] = (kk / a_sd[:, active]).T
                    else:                                                       # pairs of this shift
                        n = shift_pairs[(int(offset) + int(lags[li])) % shift_pairs.size]
                        kk = (crs[0, li] / n / var[:, None] if method == "sta"
                              else apply(crs[0, li], active) * (Fv / n))
                        out[2, :, li] = (kk / sd_for(n, active)).T
            yield out

    offsets = _shift_offsets(X.shape[0], K, L, min_shift, rng)
    plan = _null_plan(P, L, K, 1, _effective_lags(X, sd, L, _ok_cells(sd, n_valid, lags)))
    res = _finish(maps, z_an, null_stats, offsets, sd, n_valid, cell_ids, noise.grid, lags, frame_s,
                  unit, alpha, kinds_used=(2,), stimulus="dense", method=method, ridge=ridge, plan=plan)
    mean_eig = float(np.trace(G)) / P
    res.ridge_penalty = np.asarray(ridge, dtype=np.float64) / mean_eig if mean_eig > 0 else np.full(C, np.nan)
    res.pixel_correlation, res.whiten_threshold = pixel_corr, float(threshold)
    return res


def dense_columns(result: MapResult) -> dict:
    """``cells.csv`` columns naming the dense-noise estimate of each cell: ``dense_estimate`` ('sta' or
    'whitened') and ``dense_ridge_penalty`` (``MapResult.ridge_penalty``; empty for the STA)."""
    C = result.n_cells
    pen = np.asarray(result.ridge_penalty, dtype=float)
    return {"dense_estimate": [result.method] * C,
            "dense_ridge_penalty": list(pen) if pen.size == C else [np.nan] * C}


def dense_estimate_note(result: MapResult) -> str | None:
    """One sentence saying how the dense-noise maps of ``result`` were estimated (None for sparse noise):
    the estimate, why (the pixel correlation against the rule), the penalty, and the units.

    Examples
    --------
    >>> r = MapResult.__new__(MapResult)
    >>> r.stimulus, r.method, r.pixel_correlation, r.whiten_threshold = "dense", "sta", 0.02, 0.09
    >>> r.ridge_penalty = np.array([np.nan])
    >>> dense_estimate_note(r)[:62]
    'dense noise: linear maps by the spike-triggered average (STA);'
    """
    if result.stimulus != "dense":
        return None
    why = (f"largest pixel correlation {result.pixel_correlation:.3g}, "
           f"{'above' if result.pixel_correlation > result.whiten_threshold else 'at or below'} the "
           f"whitening threshold 0.05 + 5/sqrt(frames) = {result.whiten_threshold:.3g}")
    if result.method == "whitened":
        pen = np.asarray(result.ridge_penalty, dtype=float)
        pen = pen[np.isfinite(pen)]
        what = ("the ridge-whitened estimate (penalty chosen per cell by cross-validation over blocks of "
                f"time; relative penalty median {np.median(pen):.3g}, range {pen.min():.3g}-{pen.max():.3g}, "
                "column dense_ridge_penalty; the penalty shrinks fine structure, so a Gabor's SF reads a few "
                "per cent low, more for weak cells)" if pen.size else "the ridge-whitened estimate")
    else:
        what = "the spike-triggered average (STA"
        what += ("; the stimulus is correlated, so the map is the kernel blurred by the stimulus correlation)"
                 if result.pixel_correlation > result.whiten_threshold else ")")
    return (f"dense noise: linear maps by {what}; {why}; ON/OFF maps are not estimated (NaN); the linear "
            f"map is in response units per unit of stimulus contrast")


# ----------------------------------------------------------------------------------------------
# which map carries a cell, and where its significant region is
# ----------------------------------------------------------------------------------------------
#: :attr:`MapChoice.linear_share` below which a cell is located on its ON + OFF map: the share of ON and
#: OFF maps of equal norm whose cosine similarity is 0.5 (``(1 - 0.5) / 2``), the segregation criterion
#: of :data:`map2d.reconcile.OVERLAP_THRESHOLD` (Hubel & Wiesel 1962).
LINEAR_SHARE_THRESHOLD = 0.25


def region_threshold_z(n_tests: int, alpha: float) -> float:
    """Two-sided Bonferroni threshold for ``n_tests`` standard-normal z values at family-wise ``alpha``.

    A pixel whose ``|z|`` reaches it belongs to a significant region; under the null of no stimulus
    dependence the chance that any of ``n_tests`` z values does so is at most ``alpha`` (Bonferroni
    inequality; the z-scores are calibrated to unit sd by the shuffles of :func:`compute_maps`).

    Examples
    --------
    >>> round(region_threshold_z(1, 0.05), 3)          # the familiar 1.96 (scipy.special.ndtri)
    1.96
    """
    from scipy.special import ndtri
    n = max(int(n_tests), 1)
    return float(-ndtri(alpha / (2.0 * n)))


def _separable_stack(a, li):
    """:func:`_separable` of a stack of maps: ``a`` (n, L, P), ``li`` (n,) -> (n, P).

    The first right singular vector ``u`` of ``a`` is ``a^T e / |a^T e|`` with ``e`` the top eigenvector
    of the ``L x L`` Gram matrix ``a a^T`` (the same vector as the SVD's, up to a sign that
    ``u (a[li] . u)`` does not depend on), so all cells take one batched ``L x L`` eigenproblem."""
    n = a.shape[0]
    if n == 0:
        return np.zeros((0, a.shape[2]))
    _, V = np.linalg.eigh(np.matmul(a, a.transpose(0, 2, 1)))
    v = np.einsum("nl,nlp->np", V[:, :, -1], a)                     # s_1 x first right singular vector
    nn = np.einsum("np,np->n", v, v)
    proj = np.einsum("np,np->n", a[np.arange(n), li], v)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(nn > 0, proj / nn, 0.0)
    return v * scale[:, None]


@dataclass
class MapChoice:
    """Which map carries each cell, its space-time separable spatial part and the noise of that map.

    Attributes
    ----------
    kind : ndarray of str (C,)
        'linear' (ON - OFF), 'on+off' (excitation by both contrasts), or '' (not responsive).
    linear_share : ndarray (C,)
        Share, in [0, 1], of the signal power over the cell's significant space-time region that the
        linear map holds (see :func:`choose_maps`); NaN when not responsive or not estimable.
    spatial : ndarray (C, ny, nx)
        Spatial part of the rank-1 separable fit of the chosen map over lags, scaled to the peak lag
        (what the models are fitted to); NaN for cells that are not responsive.
    linear_spatial : ndarray (C, ny, nx)
        The same for the linear map, whatever the choice.
    peak : ndarray (C, ny, nx)
        The raw linear map at the peak lag.
    z : ndarray (C, ny, nx)
        z-map of the chosen kind at the peak lag (null: standard normal).
    noise_sd : ndarray (C, ny, nx)
        Null sd of the chosen map at the peak lag (response units), per pixel.
    threshold_z : float
        Corrected threshold of a significant pixel of one map (:func:`region_threshold_z` over its pixels).
    """

    kind: np.ndarray
    linear_share: np.ndarray
    spatial: np.ndarray
    linear_spatial: np.ndarray
    peak: np.ndarray
    z: np.ndarray
    noise_sd: np.ndarray
    threshold_z: float

    def region_z(self, c: int) -> np.ndarray:
        """The z-map whose significant region locates cell ``c`` (:func:`region_centre`), ``(ny, nx)``.

        The fitted (separable) map over the null sd of the peak-lag map: pooling lags leaves it no
        noisier than the peak-lag map, so these are z-scores on the conservative side (a pixel reaching
        :attr:`threshold_z` is significant at the peak lag's level or better). When no pixel of it
        reaches :attr:`threshold_z` (a response spread thinly over many lags), the peak-lag z-map.
        """
        z = self.spatial[c] / self.noise_sd[c]
        if not np.nanmax(np.abs(z), initial=0.0) >= self.threshold_z:
            return self.z[c]
        return z


def _both_stack(result: MapResult, cells: np.ndarray):
    """:func:`_both_maps` of several cells: ON + OFF maps ``(n, L, P)`` and their z-maps."""
    L, n = result.lag_frames.size, cells.size
    if result.both is not None and result.both_z is not None:
        return (result.both[cells].reshape(n, L, -1).astype(float),
                result.both_z[cells].reshape(n, L, -1).astype(float))
    on = result.on[cells].reshape(n, L, -1).astype(float)
    off = result.off[cells].reshape(n, L, -1).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd_on = np.abs(on / result.on_z[cells].reshape(n, L, -1))
        sd_off = np.abs(off / result.off_z[cells].reshape(n, L, -1))
        both = on + off
        z = both / np.sqrt(sd_on ** 2 + sd_off ** 2)
    return both, z


def choose_maps(result: MapResult, alpha: float | None = None) -> MapChoice:
    """Decide which map carries each responsive cell: the linear map or the ON + OFF map.

    The decision rests on the whole significant space-time region of the cell, never on one pixel:

    1. The region ``S``: every (lag, pixel) where the ON, OFF, linear or ON + OFF z-map reaches the
       corrected threshold :func:`region_threshold_z` for ``4 x lags x pixels`` tests at ``alpha``
       (the family-wise level of the responsive call). Under the null no element of a map reaches it
       with probability above ``alpha``.
    2. ``linear_share = P_lin / (P_lin + P_both)`` with ``P = sum_S (m^2 - sd^2)``, the signal power of
       the linear (ON - OFF) and ON + OFF maps over ``S``, each corrected for its noise power (``sd`` the
       null sd of the map element, so noise alone adds nothing on average). It lies in [0, 1]: about 0 for
       a cell that bright and dark spots excite at the same places (complex, ON-OFF: ``on ~ off``),
       0.5 for a half-wave rectified linear cell (``on = [k]+``, ``off = [-k]+``, so
       ``|on - off| = |on + off|``), 1 for a linear cell with a maintained discharge (``on = k``,
       ``off = -k``, ON + OFF near zero). For ON and OFF maps of equal norm and cosine similarity ``s``
       it is ``(1 - s) / 2``.
    3. The ON + OFF map carries the cell when ``linear_share < LINEAR_SHARE_THRESHOLD`` (0.25: ``s``
       above 0.5, the segregation criterion of Hubel & Wiesel 1962, as
       :data:`map2d.reconcile.OVERLAP_THRESHOLD`) and the ON + OFF map itself reaches the threshold;
       otherwise the linear map. A cell with a significant, segregated linear map therefore never goes
       to the ON + OFF map, whatever a stray pixel does.

    The spatial map is the first spatial singular vector of the chosen map over lags (a rank-1
    space-time separable fit), scaled to the projection of the peak lag on it; pooling lags this way
    raises the signal-to-noise ratio when a response spreads over two frames.

    Parameters
    ----------
    result : MapResult
        Sparse-noise maps (dense noise has only the linear map, which then carries every cell).
    alpha : float, optional
        Family-wise level of the regions (default: ``result.alpha``).

    Returns
    -------
    MapChoice
    """
    alpha = result.alpha if alpha is None else float(alpha)
    C = result.n_cells
    ny, nx = result.grid.shape
    P = ny * nx
    L = result.lag_frames.size
    shape = (C, ny, nx)
    spatial, linear_spatial, peak = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
    zmap, noise = np.full(shape, np.nan), np.full(shape, np.nan)
    kind = np.full(C, "", dtype=object)
    share = np.full(C, np.nan)
    t_st = region_threshold_z(4 * L * P, alpha)
    cells = np.flatnonzero(result.peak_lag_index >= 0)
    step = max(1, _CHOICE_VALUES // max(L * P, 1))        # blocks of cells: a few (n, L, P) float64 arrays
    for a in range(0, cells.size, step):
        blk = cells[a:a + step]
        n, r = blk.size, np.arange(blk.size)
        li = result.peak_lag_index[blk].astype(np.int64)
        lin_raw = result.linear[blk].reshape(n, L, P).astype(float)
        zlin = result.linear_z[blk].reshape(n, L, P).astype(float)
        lin = np.nan_to_num(lin_raw)
        peak[blk] = lin[r, li].reshape(n, ny, nx)
        lin_sp = _separable_stack(lin, li)
        linear_spatial[blk] = lin_sp.reshape(n, ny, nx)
        onoff = np.zeros(n, bool)
        both = zboth = None
        has_on = np.isfinite(result.on[blk].reshape(n, -1)).any(axis=1)
        if has_on.any():
            both, zboth = _both_stack(result, blk)
            zon = result.on_z[blk].reshape(n, L, P).astype(float)
            zoff = result.off_z[blk].reshape(n, L, P).astype(float)
            zall = np.fmax(np.fmax(np.abs(zon), np.abs(zoff)), np.fmax(np.abs(zlin), np.abs(zboth)))
            ok = ((np.nan_to_num(zall) >= t_st) & np.isfinite(zlin) & np.isfinite(zboth) & (zlin != 0)
                  & (zboth != 0) & has_on[:, None, None])
            # noise-corrected signal powers over the region (NaN elements left out, as nansum does)
            with np.errstate(invalid="ignore", divide="ignore"):
                p_lin = np.nansum(np.where(ok, lin_raw ** 2 - (lin_raw / zlin) ** 2, 0.0), axis=(1, 2))
                p_both = np.nansum(np.where(ok, both ** 2 - (both / zboth) ** 2, 0.0), axis=(1, 2))
                top_both = np.where(ok, np.abs(zboth), -np.inf).max(axis=(1, 2))
            p_lin, p_both = np.maximum(p_lin, 0.0), np.maximum(p_both, 0.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                sh = np.where(p_lin + p_both > 0, p_lin / (p_lin + p_both), np.nan)
            any_ok = ok.any(axis=(1, 2))
            share[blk[any_ok]] = sh[any_ok]
            onoff = any_ok & (sh < LINEAR_SHARE_THRESHOLD) & (top_both >= t_st)
        kind[blk] = np.where(onoff, "on+off", "linear")
        sp_ = lin_sp.copy()
        z = zlin[r, li]
        m = lin_raw[r, li]
        if onoff.any():
            sp_[onoff] = _separable_stack(np.nan_to_num(both[onoff]), li[onoff])
            z[onoff] = zboth[r[onoff], li[onoff]]
            m[onoff] = both[r[onoff], li[onoff]]
        spatial[blk] = sp_.reshape(n, ny, nx)
        zmap[blk] = z.reshape(n, ny, nx)
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.abs(m / z)
        sd = np.where(np.isfinite(sd) & (sd > 0), sd, np.nan)
        fin = np.isfinite(sd).any(axis=1)
        if fin.any():                                   # pixels without an sd get the cell's median sd
            med = np.nanmedian(sd[fin], axis=1)
            sd[fin] = np.where(np.isfinite(sd[fin]), sd[fin], med[:, None])
        noise[blk] = sd.reshape(n, ny, nx)
    return MapChoice(kind=kind, linear_share=share, spatial=spatial, linear_spatial=linear_spatial,
                     peak=peak, z=zmap, noise_sd=noise, threshold_z=region_threshold_z(P, alpha))


def _component(mask: np.ndarray, i: int, j: int) -> np.ndarray:
    """The 8-connected component of ``mask`` holding pixel ``(i, j)`` (grown by repeated dilation;
    the same set as ``scipy.ndimage.label`` with a 3 x 3 structure, without importing it)."""
    region = np.zeros_like(mask, dtype=bool)
    if not mask[i, j]:
        return region
    region[i, j] = True
    ny, nx = mask.shape
    while True:
        p = np.pad(region, 1)
        grown = np.zeros_like(region)
        for di in (0, 1, 2):
            for dj in (0, 1, 2):
                grown |= p[di:di + ny, dj:dj + nx]
        grown &= mask
        if np.array_equal(grown, region):
            return region
        region = grown


#: Share of the peak's ``|z|`` a pixel needs to join the cluster of :func:`region_centre`. Measured on the
#: held-out sessions (tests/heldout_rf.py, seeds 0-4, every responsive cell located as if every fit were
#: rejected): 0.3 on the separable map, bridged over one-pixel gaps, vs half the peak on the peak-lag map,
#: not bridged, centre error median / 90th percentile / largest 0.15 / 0.33 / 0.71 vs 0.20 / 0.52 / 0.93
#: pixel for linear cells, 0.10 / 0.28 / 0.42 vs 0.16 / 0.29 / 0.49 for complex and ON-OFF cells. Pooling lags thins the noisy tails,
#: and a wider cluster averages more of the field.
REGION_PEAK_SHARE = 0.3


def region_centre(z_map: np.ndarray, grid: Grid, threshold_z: float, share: float = REGION_PEAK_SHARE):
    """Centre of a map's significant region: the ``|z|``-weighted centroid of its main cluster, in degrees.

    The cluster: pixels whose ``|z|`` reaches ``threshold_z`` and ``share`` of the peak's ``|z|`` (either
    sign: the ON and OFF subregions of a simple cell make one field; the share keeps the noisy tails of a
    strong field out), 8-connected across gaps of one pixel (the zero crossing between an odd cell's
    subregions), taking the cluster that holds the largest ``|z|``. When no pixel reaches the threshold,
    the pixels around the peak with at least half its ``|z|`` are used (a lower share would take in the
    noise around a weak peak).
    Weighting by ``|z|`` rather than by the response makes pixels of unequal noise (unequal spot counts,
    anisotropic sampling) count by their evidence. A field cut by the grid's edge is pulled inward: its
    cluster is one-sided.

    Returns
    -------
    (x_deg, y_deg, n_pixels) ; NaN and 0 for an empty map.
    """
    z = np.abs(np.nan_to_num(np.asarray(z_map, float)))
    if not np.any(z > 0):
        return float("nan"), float("nan"), 0
    i, j = np.unravel_index(int(np.argmax(z)), z.shape)
    thr = max(float(threshold_z), share * z[i, j]) if z[i, j] >= threshold_z else 0.5 * z[i, j]
    mask = z >= thr
    # subregions of either sign parted by a one-pixel zero crossing (an odd simple cell centred on a
    # pixel) are one field: the cluster grows over one-pixel gaps, its weights stay on the mask
    p = np.pad(mask, 1)
    ny, nx = mask.shape
    bridged = np.zeros_like(mask)
    for di in (0, 1, 2):
        for dj in (0, 1, 2):
            bridged |= p[di:di + ny, dj:dj + nx]
    region = _component(bridged, i, j) & mask
    w = np.where(region, z, 0.0)
    rows, cols = np.indices(z.shape)
    r = float((w * rows).sum() / w.sum())
    c = float((w * cols).sum() / w.sum())
    x, y = grid.point_of(r, c)
    return float(x), float(y), int(region.sum())


def map_centroid_deg(result: MapResult, cell_index: int, threshold_z: float | None = None):
    """Centre of a cell's significant region, in degrees ``(x, y)``, without a model fit.

    The map that carries the cell (:func:`choose_maps`: linear, or ON + OFF for cells that bright and
    dark spots excite at the same places), its separable spatial part in z units
    (:meth:`MapChoice.region_z`); the ``|z|``-weighted centroid of its significant cluster
    (:func:`region_centre`, threshold :func:`region_threshold_z` over the grid's pixels at the map's
    ``alpha`` unless ``threshold_z`` is given). NaN for a cell that is not
    responsive. The analysis reports this centre (``center_method = region``) whenever no model fit
    earns its place.
    """
    if int(result.peak_lag_index[cell_index]) < 0:
        return float("nan"), float("nan")
    sub = _one_cell(result, cell_index)
    ch = choose_maps(sub)
    thr = ch.threshold_z if threshold_z is None else float(threshold_z)
    x, y, _ = region_centre(ch.region_z(0), result.grid, thr)
    return x, y


def _halfmax_ellipse(map_yx, z_yx, grid: Grid, threshold_z: float):
    """Moment ellipse ``(centre, covariance)`` of one polarity's excitatory lobe at half its maximum.

    None when no pixel reaches ``threshold_z``. The lobe: pixels 8-connected to the pixel of largest z
    whose response reaches half of that pixel's response. Its pixels, each a uniform box weighted by
    its response, have the covariance ``M`` (the weighted centres' covariance + ``diag(dx^2, dy^2) /
    12``). For a Gaussian ``exp(-x^T S^-1 x / 2)`` the half-maximum region is the ellipse
    ``x^T S^-1 x <= 2 ln 2``, and the Gaussian's own covariance over it is ``k S`` with
    ``k = 1 - ln 2 = 0.307`` (per axis ``E[u]`` for ``u = x^T S^-1 x / 2`` under ``e^-u`` on
    ``[0, ln 2]``: ``(1 - (1 + ln 2) / 2) / (1 / 2)``), so ``S = M / k``, less the pixel box the map
    carries (a spot fills its pixel). The level is relative to the lobe's own peak, so the ellipse does not grow with the
    signal-to-noise ratio the way a z threshold does.
    """
    z = np.nan_to_num(np.asarray(z_yx, float), nan=-np.inf)
    if not np.max(z) >= threshold_z:
        return None
    m = np.nan_to_num(np.asarray(map_yx, float))
    i, j = np.unravel_index(int(np.argmax(z)), z.shape)
    lobe = _component(m >= 0.5 * m[i, j], i, j) if m[i, j] > 0 else np.zeros(m.shape, bool)
    lobe[i, j] = True
    rows, cols = np.nonzero(lobe)
    x, y = grid.point_of(rows, cols)
    pts = np.column_stack([x, y]).astype(float)
    w = m[rows, cols] if m[i, j] > 0 else np.ones(rows.size)
    w = w / w.sum()
    centre = w @ pts
    d = pts - centre
    box = np.diag([grid.dx_deg ** 2, grid.dy_deg ** 2]) / 12.0
    k = 1.0 - np.log(2.0)             # the Gaussian's covariance over its half-maximum ellipse: k S
    return centre, ((d * w[:, None]).T @ d + box) / k - box


def halfmax_overlap(on_map, off_map, on_z, off_z, grid: Grid, threshold_z: float) -> float:
    """ON/OFF overlap without a model fit, 0 (segregated) to 1 (coextensive): the overlap of the moment
    ellipses of the ON and the OFF excitatory lobe taken at half their own maximum.

    Each polarity's lobe (:func:`_halfmax_ellipse`) gives a Gaussian envelope by its moments; the
    overlap is that of the two envelopes (:func:`map2d.fit.spatial.envelope_overlap`), as for the fitted
    subfields of :func:`map2d.fit.spatial.subfield_overlap` (after Schiller, Finlay & Volman 1976,
    J Neurophysiol 39:1288; Mata & Ringach 2005, J Neurophysiol 93:919). The half-maximum level is
    relative to each lobe's peak, so the estimate does not drift with the signal-to-noise ratio as a
    cosine of thresholded z-maps does. A polarity with no pixel reaching ``threshold_z`` has no
    subfield: 0 when the other has one, NaN when neither has. ``map2d maps --no-fits`` reports it.
    """
    from .fit.spatial import envelope_overlap
    on = _halfmax_ellipse(on_map, on_z, grid, threshold_z)
    off = _halfmax_ellipse(off_map, off_z, grid, threshold_z)
    if on is None and off is None:
        return float("nan")
    if on is None or off is None:
        return 0.0
    return envelope_overlap(on[0], on[1], off[0], off[1])


def halfmax_overlaps(result: MapResult, alpha: float | None = None) -> np.ndarray:
    """:func:`halfmax_overlap` of every responsive cell at its peak lag (threshold
    :func:`region_threshold_z` over the grid's pixels at ``alpha``, default the map's); NaN for cells
    that are not responsive and for dense noise (no ON and OFF maps)."""
    alpha = result.alpha if alpha is None else float(alpha)
    out = np.full(result.n_cells, np.nan)
    if result.stimulus != "sparse":
        return out
    thr = region_threshold_z(result.grid.ny * result.grid.nx, alpha)
    for c in np.flatnonzero(result.peak_lag_index >= 0):
        li = int(result.peak_lag_index[c])
        out[c] = halfmax_overlap(result.on[c, li], result.off[c, li], result.on_z[c, li],
                                 result.off_z[c, li], result.grid, thr)
    return out


def _one_cell(result: MapResult, c: int) -> MapResult:
    """A view of ``result`` holding cell ``c`` only."""
    import dataclasses
    s = slice(c, c + 1)
    per_cell = {f.name: getattr(result, f.name)[s] for f in dataclasses.fields(result)
                if isinstance(getattr(result, f.name), np.ndarray) and getattr(result, f.name).ndim >= 1
                and getattr(result, f.name).shape[0] == result.n_cells and f.name not in ("lags_s", "lag_frames")}
    return dataclasses.replace(result, **per_cell)


# ----------------------------------------------------------------------------------------------
# latency at sub-frame resolution (spikes)
# ----------------------------------------------------------------------------------------------
def spike_latency(spikes: Spikes, noise: SparseNoise, result: MapResult, bins_per_frame: int = 10,
                  z_min: float = 2.0) -> np.ndarray:
    """Response latency of each responsive cell at sub-frame resolution, from its spike times.

    ``peak_lag_s`` is a whole number of frames: lag ``l`` counts the spikes in the frame-long window
    ``[l T, (l + 1) T)`` after the onset of the stimulus frame, so it is the start of the window that
    holds most of the response and understates the latency by up to a frame. Spike times are finer:
    for every spike and every frame whose onset lies less than ``(L + 1) T`` before it, the delay
    ``tau = t_spike - onset`` falls in one of ``bins_per_frame`` bins per frame, and the frame's drive
    of the cell is added to that bin. The drive ``d_f`` is the sum, over the spots of frame ``f``, of the
    cell's ON map (bright spots) or OFF map (dark spots) at the peak lag, kept where that map is
    excitatory with ``z >= z_min``, centred over frames. ``h(tau)`` is then the spike-triggered mean
    drive at delay ``tau``: flat (zero on average) where the response does not depend on the stimulus,
    raised where spikes follow driving frames (reverse correlation at the resolution of the spike
    times; Chichilnisky 2001). The latency is the delay at which ``h`` (smoothed over 3 bins, weights
    1/4, 1/2, 1/4) first reaches half its maximum, going back from the maximum (linear interpolation
    between bin centres).

    All cells are done together: the drives of a block of frames for every cell are one sparse product,
    and each lag adds every (spike, frame) pair of the block to one histogram of all cells.

    Parameters
    ----------
    spikes : Spikes
    noise : SparseNoise
        The sparse-noise frames the maps came from.
    result : MapResult
        Maps of these spikes (:func:`compute_maps`).
    bins_per_frame : int
        Delay bins per frame (resolution ``T / bins_per_frame``).
    z_min : float
        Smallest z of a pixel whose spots count in the drive.

    Returns
    -------
    ndarray (C,)
        Latency in seconds; NaN for cells that are not responsive, for dense noise, and when the
        half-maximum cannot be found.
    """
    from .align import cell_index

    if int(bins_per_frame) < 1:
        raise ValueError(f"bins_per_frame must be >= 1, got {bins_per_frame}")
    C = result.n_cells
    out = np.full(C, np.nan)
    cells = np.flatnonzero(result.peak_lag_index >= 0)
    if cells.size == 0 or result.stimulus != "sparse":
        return out
    onsets = np.asarray(noise.times_s, float)
    F = onsets.size
    T = float(np.median(np.diff(onsets))) if F > 1 else float(result.frame_s)
    L = int(result.lag_frames[-1]) + 1
    width = T / int(bins_per_frame)
    n_bins = L * int(bins_per_frame)
    # every cell's weights: its excitatory ON and OFF pixels at the peak lag, (2P, n)
    li = result.peak_lag_index[cells]
    w = []
    for m, z in ((result.on, result.on_z), (result.off, result.off_z)):
        mm = np.nan_to_num(m[cells, li].reshape(cells.size, -1).astype(float))
        zz = np.nan_to_num(z[cells, li].reshape(cells.size, -1).astype(float))
        w.append(np.where((zz >= z_min) & (mm > 0), mm, 0.0))
    w = np.concatenate(w, axis=1)
    use = (w > 0).any(axis=1)
    cells, W = cells[use], np.ascontiguousarray(w[use].T)
    n = cells.size
    if n == 0:
        return out
    B = _SparseCorrelator(noise.frames).B                        # (F, 2P): which spot in which frame
    mean = (np.asarray(B.sum(axis=0), float).ravel() @ W) / F     # each cell's mean drive over frames
    col_of = np.full(C, -1, dtype=np.int64)                       # spike's cell row -> column of W
    col_of[cells] = np.arange(n)
    t_all = np.asarray(spikes.time_s, float)
    rows = cell_index(spikes)
    if t_all.size > 1 and np.any(t_all[1:] < t_all[:-1]):
        order = np.argsort(t_all, kind="stable")
        t_all, rows = t_all[order], rows[order]
    nb1 = n_bins + 1                                              # one overflow bin per cell
    h = np.zeros(n * nb1)
    step = int(max(256, min(F, _LATENCY_VALUES // n)))            # frames per block of drives
    for a in range(0, F, step):
        b = min(F, a + step)
        # spikes whose frame k (last onset <= t) pairs with frames a .. b-1 at some lag: a <= k < b + L - 1
        s0 = int(np.searchsorted(t_all, onsets[a], side="left"))
        s1 = t_all.size if b + L - 1 >= F else int(np.searchsorted(t_all, onsets[b + L - 1], side="left"))
        if s1 <= s0:
            continue
        col = col_of[rows[s0:s1]]
        t = t_all[s0:s1]
        k = np.searchsorted(onsets, t, side="right") - 1
        # a spike n_bins or more bins after its own frame's onset is at least as far from every earlier one
        keep = (col >= 0) & ((t - onsets[k]) / width < n_bins)
        col, t, k = col[keep], t[keep], k[keep]
        if k.size == 0:
            continue
        D = (np.asarray(B[a:b] @ W) - mean).ravel()              # (b - a, n) centred drives
        at = (k - a) * n + col                                    # drive of the spike's own frame
        hist = col * nb1                                          # the cell's row of h
        for lag in range(L):
            i0, i1 = np.searchsorted(k, [a + lag, b + lag])     # spikes whose frame minus lag is in a .. b-1
            if i1 <= i0:
                continue
            bins = np.minimum(((t[i0:i1] - onsets[k[i0:i1] - lag]) / width).astype(np.int64), n_bins)
            h += np.bincount(hist[i0:i1] + bins, weights=D[at[i0:i1] - lag * n], minlength=n * nb1)
    h = h.reshape(n, nb1)[:, :n_bins]
    # smoothed over 3 bins (weights 1/4, 1/2, 1/4): one noisy bin does not end the rise
    hp = np.pad(h, ((0, 0), (1, 1)))
    h = 0.25 * hp[:, :-2] + 0.5 * hp[:, 1:-1] + 0.25 * hp[:, 2:]
    j = np.argmax(h, axis=1)
    r = np.arange(n)
    top = h[r, j]
    half = 0.5 * top
    # going back from the maximum: the first bin whose predecessor falls below half the maximum
    idx = np.arange(n_bins)
    below = (h < half[:, None]) & (idx[None, :] < j[:, None])
    i = np.where(below, idx[None, :], -1).max(axis=1) + 1
    centre = (idx + 0.5) * width
    a_, b_ = h[r, np.maximum(i - 1, 0)], h[r, i]
    with np.errstate(invalid="ignore", divide="ignore"):
        lat = np.where(i == 0, centre[0], centre[np.maximum(i - 1, 0)] + (half - a_) / (b_ - a_) * width)
    out[cells] = np.where(top > 0, lat, np.nan)
    return out
