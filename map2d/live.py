"""Maps that grow with the recording: reverse-correlation sums updated as frame times and spikes arrive.

The sparse-noise maps of :func:`map2d.maps.compute_maps` are means of the responses that follow each
bright or dark spot, and every mean is a sum divided by a count. Written with the uncentred rates
``r[k, c]`` (spikes/s of cell ``c`` in frame ``k``) the sum at lag ``l`` is

    ``S_l = sum_{t < F - l} B[t]^T r[t + l]``

(``B`` the frames x (bright, dark) event matrix of the engine), which is linear in ``r``: a spike
in frame ``k`` adds ``w_k = 1 / duration_k`` to ``r[k, c]`` and so ``w_k B[k - l]`` to the column of its
cell in ``S_l``, whatever the order in which spikes arrive. The cell's mean and sd over the frames
seen so far come from the running sums of ``r`` and ``r^2``, and the counts of events per pixel from
running counts, so a map at minute 3 is the offline computation on the first three minutes without
going back over them: ``map = S_l / n_l - mean`` (:class:`LiveSparseMaps`).

A frame's rate is known only when the next onset has arrived (the frame lasts until then); the last
frame seen lasts the median frame interval, as offline, and its spikes are added when a snapshot is
taken without being stored.

Significance while recording: circular shifts (the offline null) need the whole record, so the live
null uses fixed, non-circular shifts by ``D_j`` frames (``D_j`` of at least ``min_shift_s``): the sums
``sum_t B[t]^T r[t + D_j + l]`` pair the stimulus with responses far too late to be caused by it, and
they grow with the data exactly like the maps. Their maps calibrate the z-scores and feed the same
block-maximum tail fit as offline (:func:`map2d.maps.compute_maps`, Notes); the live ``p_value``
therefore follows the offline one but is not equal to it. When the recording ends the maps are the
offline maps of the same data (the tests check it at every step of a replay), and ``map2d watch``
runs the offline analysis once for the final significance.

References
----------
Jones JP, Palmer LA (1987) J Neurophysiol 58:1187-1211 (ON and OFF maps from sparse noise).
Nichols TE, Holmes AP (2002) Hum Brain Mapp 15:1-25 (max-statistic correction).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from .geometry import Grid
from .maps import (KINDS, MapResult, _analytic_sd, _component, _block_max, _finish, _null_plan, _ok_cells, _sparse_maps_one,
                   _SparseCorrelator, map_lags)

__all__ = ["LiveSparseMaps", "LiveTraceMaps", "Aperture", "suggest_aperture", "field_region"]

_UNIT = "spikes/s"
_TRACE_UNIT = "trace units"


class LiveSparseMaps:
    """Running ON/OFF/linear sums for every cell, fed with frame onsets and spikes as they arrive.

    Parameters
    ----------
    frames : ndarray int8 (frames, ny, nx)
        The whole sparse-noise stimulus (written before the recording); onsets arrive later.
    grid : Grid
    max_lag_s : float
        Longest lag (as ``map2d maps --max-lag``).
    frame_s : float
        Nominal frame interval (sets the lags kept; more are added if the measured interval needs them).
    alpha : float
        Level of the live responsive call.
    min_shift_s : float
        Smallest shift of the live null (seconds).

    Examples
    --------
    >>> from map2d.geometry import Grid
    >>> rng = np.random.default_rng(0)
    >>> frames = rng.choice(np.array([-1, 0, 1], np.int8), size=(600, 4, 5), p=[.1, .8, .1])
    >>> live = LiveSparseMaps(frames, Grid(4, 5, 0, 0, 2, 2), max_lag_s=0.1, frame_s=0.05, min_shift_s=2)
    >>> live.add_frame_times(np.arange(600) * 0.05)
    >>> live.add_spikes(rng.uniform(0, 30, 3000), rng.integers(0, 3, 3000))
    >>> res = live.snapshot()
    >>> res.on.shape
    (3, 3, 4, 5)
    """

    unit = _UNIT

    def __init__(self, frames, grid: Grid, max_lag_s: float = 0.2, frame_s: float = 0.05, alpha: float = 0.01,
                 min_shift_s: float = 10.0):
        frames = np.asarray(frames)
        if frames.ndim != 3 or not np.issubdtype(frames.dtype, np.integer):
            raise ValueError(f"frames must be an integer (frames, ny, nx) array, got {frames.dtype} {frames.shape}")
        if not (np.isfinite(frame_s) and frame_s > 0):
            raise ValueError(f"frame_s must be positive, got {frame_s}")
        if not (0 < alpha < 1):
            raise ValueError(f"alpha must be in (0, 1), got {alpha}")
        self.grid, self.max_lag_s, self.alpha = grid, float(max_lag_s), float(alpha)
        self.frame_s_nominal, self.min_shift_s = float(frame_s), float(min_shift_s)
        cor = _SparseCorrelator(frames)
        self.B, self.P, self.n_total = cor.B.tocsr(), cor.P, cor.F
        self._indptr, self._indices = self.B.indptr, self.B.indices
        self.times = np.zeros(self.n_total)
        self.F = 0                                   # frames with a known onset
        self.cum = np.zeros(2 * self.P)              # events per column over frames < F
        self.ids: list[int] = []
        self._col: dict[int, int] = {}
        self.spikes_used = 0
        self.spikes_dropped = 0                      # before the first onset, or after the last frame ends
        self._pend_t = np.zeros(0)
        self._pend_c = np.zeros(0, dtype=np.int64)
        self._setup_offsets(int(map_lags(self.frame_s_nominal, self.max_lag_s)[-1]))
        self.counts = np.zeros((self.n_total, 0), dtype=np.int32)
        self.sum_r = np.zeros(0)
        self.sum_r2 = np.zeros(0)
        self.S = np.zeros((self.offsets.size, 2 * self.P, 0))

    # -- layout of the sums ------------------------------------------------------------------------
    def _setup_offsets(self, lmax: int):
        """Lags ``0 .. lmax`` and, for each live null, ``D_j + (0 .. lmax)``."""
        self.lmax = int(lmax)
        L = self.lmax + 1
        shift = max(int(round(self.min_shift_s / self.frame_s_nominal)), L + 1)
        n_sub, starts, n_null, _ = _null_plan(self.P, L, 64, 3, None)
        self.n_sub, self.starts, self.n_null = n_sub, starts, n_null
        self.null_base = shift + np.arange(n_null) * (L + 1)
        self.offsets = np.concatenate([np.arange(L)] + [d + np.arange(L) for d in self.null_base])

    @property
    def n_cells(self) -> int:
        return len(self.ids)

    @property
    def finalised(self) -> int:
        """Frames whose end (the next onset) is known."""
        return max(self.F - 1, 0)

    def _grow_cells(self, new_ids):
        for cid in new_ids:
            self._col[int(cid)] = len(self.ids)
            self.ids.append(int(cid))
        C, C0 = len(self.ids), self.S.shape[2]
        if C <= C0:
            return
        cap = max(C, 2 * C0, 8)
        self.S = np.concatenate([self.S, np.zeros(self.S.shape[:2] + (cap - C0,))], axis=2)
        self.counts = np.concatenate([self.counts, np.zeros((self.n_total, cap - C0), np.int32)], axis=1)
        self.sum_r = np.concatenate([self.sum_r, np.zeros(cap - C0)])
        self.sum_r2 = np.concatenate([self.sum_r2, np.zeros(cap - C0)])

    # -- input -------------------------------------------------------------------------------------
    def add_frame_times(self, onsets_s) -> None:
        """Onsets of the next frames, in order (frame ``F``, ``F + 1``, ...), strictly increasing."""
        t = np.asarray(onsets_s, dtype=np.float64).reshape(-1)
        if t.size == 0:
            return
        if self.F + t.size > self.n_total:
            raise ValueError(f"{self.F + t.size} onsets for a stimulus of {self.n_total} frames")
        prev = self.times[self.F - 1] if self.F else -np.inf
        if not np.all(np.isfinite(t)) or np.any(np.diff(np.r_[prev, t]) <= 0):
            raise ValueError("frame onsets must be finite and strictly increasing")
        a, b = self.F, self.F + t.size
        self.times[a:b] = t
        self.cum += np.bincount(self._indices[self._indptr[a]:self._indptr[b]], minlength=2 * self.P)
        self.F = b
        self._assign()

    def add_spikes(self, time_s, cell) -> None:
        """Spikes of any cells, in any order (late spikes into frames already summed are exact too)."""
        t = np.asarray(time_s, dtype=np.float64).reshape(-1)
        c = np.asarray(cell, dtype=np.int64).reshape(-1)
        if t.shape != c.shape:
            raise ValueError("time_s and cell must have equal lengths")
        if t.size == 0:
            return
        new = [int(v) for v in np.unique(c) if int(v) not in self._col]
        if new:
            self._grow_cells(new)
        cols = np.fromiter((self._col[int(v)] for v in c), dtype=np.int64, count=c.size) if c.size < 64 \
            else self._columns(c)
        self._pend_t = np.concatenate([self._pend_t, t])
        self._pend_c = np.concatenate([self._pend_c, cols])
        self._assign()

    def _columns(self, c):
        ids, inv = np.unique(c, return_inverse=True)
        return np.array([self._col[int(v)] for v in ids], dtype=np.int64)[inv]

    def _assign(self):
        """Move pending spikes that fall in a finalised frame into the sums; drop spikes before the first onset."""
        if self._pend_t.size == 0 or self.F == 0:
            return
        t, c = self._pend_t, self._pend_c
        before = t < self.times[0]
        K = self.finalised
        ready = ~before & (t < self.times[K]) if K else np.zeros(t.size, bool)
        if before.any():
            self.spikes_dropped += int(before.sum())
        if ready.any():
            k = np.searchsorted(self.times[:self.F], t[ready], side="right") - 1
            self._add(k, c[ready])
        keep = ~before & ~ready
        self._pend_t, self._pend_c = t[keep], c[keep]

    def _add(self, k, c):
        """Spikes in finalised frames ``k`` of cell columns ``c``: counts, running sums, lagged sums."""
        Ccap = self.S.shape[2]
        uk, dn = np.unique(k * Ccap + c, return_counts=True)
        kk, cc = np.divmod(uk, Ccap)
        w = 1.0 / (self.times[kk + 1] - self.times[kk])
        n0 = self.counts[kk, cc].astype(np.float64)
        self.counts[kk, cc] += dn.astype(np.int32)
        self.sum_r += np.bincount(cc, weights=w * dn, minlength=Ccap)
        self.sum_r2 += np.bincount(cc, weights=w * w * ((n0 + dn) ** 2 - n0 ** 2), minlength=Ccap)
        self.spikes_used += int(dn.sum())
        self._add_sums(kk, cc, w * dn)

    def _add_sums(self, kk, cc, val, S=None):
        """``S[o] += val * B[kk - o]`` in the column of each cell, for every offset ``o``.

        ``(kk, cc)`` pairs are unique. The recent frames (a block of at most 4 times as many frames as
        hold spikes) go through small dense products, the pixels they touch times the cells; older
        frames (late spikes) are scattered one event at a time.
        """
        S = self.S if S is None else S
        if kk.size == 0:
            return
        n_frames = np.unique(kk).size
        lo = max(int(kk.max()) + 1 - 4 * n_frames - 8, 0)
        old = kk < lo
        if old.any():
            self._scatter(kk[old], cc[old], val[old], S)
            kk, cc, val = kk[~old], cc[~old], val[~old]
        a, b = int(kk.min()), int(kk.max()) + 1
        D = np.zeros((b - a, S.shape[2]))
        D[kk - a, cc] = val
        ip, ix = self._indptr, self._indices
        for oi, o in enumerate(self.offsets.tolist()):
            s0, s1 = max(a - o, 0), b - o                           # stimulus frames paired with a..b-1
            if s1 <= 0 or ip[s1] == ip[s0]:
                continue
            uq, inv = np.unique(ix[ip[s0]:ip[s1]], return_inverse=True)
            M = np.zeros((uq.size, s1 - s0))                          # events of those frames, touched pixels
            M[inv, np.repeat(np.arange(s1 - s0), np.diff(ip[s0:s1 + 1]))] = 1.0
            S[oi, uq] += M @ D[s0 + o - a:]

    def _scatter(self, kk, cc, val, S=None):
        """The event-by-event form of :meth:`_add_sums` (for a few spikes in old frames)."""
        S = self.S if S is None else S
        O, P2, Ccap = S.shape
        t = kk[:, None] - self.offsets[None, :]                        # stimulus frame of each pair
        ok = t >= 0
        oi = np.broadcast_to(np.arange(O)[None, :], t.shape)[ok]
        tt, ci, vv = t[ok], np.broadcast_to(cc[:, None], t.shape)[ok], np.broadcast_to(val[:, None], t.shape)[ok]
        a, b = self._indptr[tt], self._indptr[tt + 1]
        n = b - a
        if n.sum() == 0:
            return
        rep = np.repeat(np.arange(tt.size), n)
        pos = np.arange(rep.size) - np.repeat(np.cumsum(n) - n, n) + a[rep]
        q = self._indices[pos].astype(np.int64)
        flat = (oi[rep] * P2 + q) * Ccap + ci[rep]
        np.add.at(S.reshape(-1), flat, vv[rep])

    def _rebuild(self, lmax: int):
        """Sums for a new longest lag, from the stored counts (only when the measured frame interval
        needs more lags than the nominal one gave)."""
        self._setup_offsets(lmax)
        self.S = np.zeros((self.offsets.size, 2 * self.P, self.S.shape[2]))
        K = self.finalised
        if K == 0:
            return
        w = 1.0 / np.diff(self.times[:K + 1])
        kk, cc = np.nonzero(self.counts[:K])
        self._add_sums(kk, cc, w[kk] * self.counts[kk, cc])

    # -- output ------------------------------------------------------------------------------------
    def _counts_before(self, m: int) -> np.ndarray:
        """Events per column over frames ``t < m`` (``m <= F``), from the running total."""
        m = max(int(m), 0)
        a, b = self._indptr[m], self._indptr[self.F]
        return self.cum - np.bincount(self._indices[a:b], minlength=2 * self.P)

    def frame_interval_s(self) -> float:
        return float(np.median(np.diff(self.times[:self.F]))) if self.F > 1 else float("nan")

    def _lags_now(self, frame_s: float, F: int):
        """The map lags (in frames) for the measured frame interval, with the sums rebuilt when they
        need a longer lag than the nominal interval gave; None while there are no more frames than
        lags."""
        lags = map_lags(frame_s, self.max_lag_s)
        if lags.size >= F:
            return None
        if lags[-1] > self.lmax:
            self._rebuild(int(lags[-1]))
        return lags

    def snapshot(self) -> MapResult | None:
        """Maps, z-scores and the live responsive call of the data so far, as a :class:`MapResult`
        (cells sorted by id), or None while there are too few frames or no cells.

        ``on``/``off``/``linear`` equal :func:`map2d.maps.compute_maps` on the frames and spikes so far
        (to float32 rounding). The z-scores, ``p_value`` and ``responsive`` use the live null (see the
        module docstring); ``n_shuffles`` is the number of live null shifts used.
        """
        F, C = self.F, self.n_cells
        if C == 0 or F < 3:
            return None
        frame_s = self.frame_interval_s()
        lags = self._lags_now(frame_s, F)
        if lags is None:
            return None
        L, P = lags.size, self.P
        order = np.argsort(np.asarray(self.ids), kind="stable")
        cols = order                                                  # column of each output cell
        # the last frame lasts the median interval; its spikes are not stored
        t_last = self.times[F - 1]
        pend = (self._pend_t >= t_last) & (self._pend_t < t_last + frame_s)
        r_last = np.bincount(self._pend_c[pend], minlength=self.S.shape[2])[cols] / frame_s
        sum_r = self.sum_r[cols] + r_last
        sum_r2 = self.sum_r2[cols] + r_last ** 2
        n_valid = np.full(C, F, dtype=np.int64)
        mean = sum_r / F
        sd = np.sqrt(np.maximum(sum_r2 / F - mean ** 2, 0.0))

        def centred_maps(o):
            """(3, C, P) maps and analytic sd for the pairs at offset ``o`` (response ``o`` frames later)."""
            sums = self.S[int(np.flatnonzero(self.offsets == o)[0])][:, cols].copy()
            t = F - 1 - o
            if t >= 0:                                                # pair with the last frame
                q = self._indices[self._indptr[t]:self._indptr[t + 1]]
                sums[q] += r_last[None, :]
            n = self._counts_before(F - o)
            sums -= n[:, None] * mean[None, :]
            n_on = np.broadcast_to(n[:P], (C, P))
            n_off = np.broadcast_to(n[P:], (C, P))
            with np.errstate(divide="ignore", invalid="ignore"):
                m = _sparse_maps_one(sums, n_on, n_off, P)
            return m, _analytic_sd(sd, n_valid, n_on, n_off)

        ids = np.asarray(self.ids, dtype=np.int64)[order]
        return self._assemble(F, C, lags, frame_s, sd, n_valid, centred_maps, ids)

    def _assemble(self, F, C, lags, frame_s, sd, n_valid, centred_maps, ids) -> MapResult:
        """Maps, analytic z, the live null and the responsive call from ``centred_maps(offset)``."""
        L, P = lags.size, self.P
        maps = np.full((3, C, L, P), np.nan, dtype=np.float32)
        z_an = np.full((3, C, L, P), np.nan, dtype=np.float32)
        for li, lag in enumerate(lags):
            m, asd = centred_maps(int(lag))
            maps[:, :, li] = m
            with np.errstate(divide="ignore", invalid="ignore"):
                z_an[:, :, li] = m / asd

        ok = _ok_cells(sd, n_valid, lags)
        cells = np.flatnonzero(ok)
        nulls = [d for d in self.null_base if F - d - lags[-1] >= max(20 * L, 100)]
        sumsq, nsq = np.zeros((3, C)), np.zeros((3, C))
        kmax = np.full((len(nulls), 3, C, self.n_sub), -np.inf, dtype=np.float32)
        starts = (np.arange(self.n_sub) * P) // self.n_sub
        for j, d in enumerate(nulls):
            zn = np.full((3, C, L, P), np.nan, dtype=np.float32)
            for li, lag in enumerate(lags):
                m, asd = centred_maps(int(d + lag))
                with np.errstate(divide="ignore", invalid="ignore"):
                    zn[:, :, li] = m / asd
            zc = zn[:, cells]
            fin = np.isfinite(zc)
            a = np.where(fin, zc, np.float32(0))
            sumsq[:, cells] += np.einsum("kclp,kclp->kc", a, a, dtype=np.float64)
            nsq[:, cells] += fin.sum(axis=(2, 3))
            kmax[j][:, cells] = _block_max(zc, starts)
        n_used = len(nulls)
        if not nulls:           # too early for a null: analytic z, no p-value (a block of no maxima)
            sumsq[:], nsq[:] = 1.0, 1.0
            kmax = np.full((1, 3, C, self.n_sub), -np.inf, dtype=np.float32)
        plan = (self.n_sub, starts, max(n_used, 1), max(n_used, 1))
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore", RuntimeWarning)
            res = _finish(maps, z_an, None, None, sd, n_valid, ids, self.grid, lags, frame_s, self.unit,
                          self.alpha, kinds_used=(0, 1, 2), stimulus="sparse", method="sparse",
                          ridge=np.full(C, np.nan), first=(sumsq, nsq, kmax), plan=plan)
        res.n_shuffles[:] = np.where(ok, n_used, 0)
        return res

    def pending_spikes(self) -> int:
        return int(self._pend_t.size)


AUTO_DECAY_LIVE = ("the indicator decay cannot be estimated live ('auto' estimates it from the whole "
                   "trace); give your indicator's decay time constant, e.g. --trace-decay 0.4 (seconds; "
                   "the trace_decay_tau_s column of an earlier map2d maps run on the same preparation), "
                   "or --trace-decay off")


class LiveTraceMaps(LiveSparseMaps):
    """Running ON/OFF/linear sums fed with frame onsets and imaging samples as they arrive.

    A frame's value is the time average of the trace over the frame (:func:`map2d.maps.frame_responses`),
    final only once the next onset (its end) and a sample at or after that end have arrived: it then
    enters the sums for good. Frames not yet final (the last ones) are computed at each
    :meth:`snapshot` from the samples so far, as the offline engine computes them on the same data,
    without being stored. NaN samples count as offline: no weight in the time average; a frame without
    a valid sample is NaN for that cell and left out of its sums, counts, mean and sd.

    ``decay``: 'off' (the trace as it is) or a time constant in seconds: the indicator's first-order
    decay is removed sample by sample as :func:`map2d.traces.remove_decay` does with that constant
    (``decay_corrected(traces, tau, resmooth=False)``); the per-cell moving average that the offline
    analysis adds after the inversion needs the whole trace and is not applied live. 'auto' is refused
    (:data:`AUTO_DECAY_LIVE`). The interval that marks a gap (1.5 times the median sample interval) uses
    the median of the intervals so far.
    """

    unit = _TRACE_UNIT

    def __init__(self, frames, grid: Grid, n_cells: int, max_lag_s: float = 0.2, frame_s: float = 0.05,
                 alpha: float = 0.01, min_shift_s: float = 10.0, decay="off"):
        from .traces import parse_trace_decay

        super().__init__(frames, grid, max_lag_s=max_lag_s, frame_s=frame_s, alpha=alpha, min_shift_s=min_shift_s)
        decay = parse_trace_decay(decay)
        if decay == "auto":
            raise ValueError(AUTO_DECAY_LIVE)
        self.tau = None if decay == "off" else float(decay)
        C = int(n_cells)
        if C < 1:
            raise ValueError("traces need at least one cell")
        self.ids = list(range(C))
        self._col = {i: i for i in range(C)}
        self.S = np.zeros((self.offsets.size, 2 * self.P, C))
        self.SW = np.zeros_like(self.S)
        self.sum_r, self.sum_r2 = np.zeros(C), np.zeros(C)
        self.n_valid = np.zeros(C, dtype=np.int64)
        self.counts = np.zeros((0, C), dtype=np.int32)
        self.R = np.full((self.n_total, C), np.nan, dtype=np.float32)   # final frame values
        self.K = 0                                                       # frames final
        self._raw_t = np.zeros(1024)
        self._raw_v = np.zeros((1024, C))
        self.n_raw = 0
        self._pt = np.zeros(1024)                                        # samples the maps use
        self._pv = np.zeros((1024, C))
        self.n_proc = 0
        self.samples_used = 0

    @staticmethod
    def _append(buf_t, buf_v, n, t, v):
        if n + t.size > buf_t.size:
            cap = max(2 * buf_t.size, n + t.size)
            buf_t = np.concatenate([buf_t, np.zeros(cap - buf_t.size)])
            buf_v = np.concatenate([buf_v, np.zeros((cap - buf_v.shape[0], buf_v.shape[1]))])
        buf_t[n:n + t.size] = t
        buf_v[n:n + t.size] = v
        return buf_t, buf_v, n + t.size

    def add_spikes(self, time_s, cell) -> None:
        raise TypeError("LiveTraceMaps takes samples (add_samples), not spikes")

    def add_frame_times(self, onsets_s) -> None:
        super().add_frame_times(onsets_s)
        self._finalise()

    def add_samples(self, time_s, values) -> None:
        """Samples ``(n,)`` at increasing times after the last one, values ``(n, cells)`` (NaN allowed)."""
        t = np.asarray(time_s, dtype=np.float64).reshape(-1)
        v = np.asarray(values, dtype=np.float64).reshape(t.size, -1)
        if t.size == 0:
            return
        if v.shape[1] != self.n_cells:
            raise ValueError(f"{v.shape[1]} values per sample for {self.n_cells} cells")
        prev = self._raw_t[self.n_raw - 1] if self.n_raw else -np.inf
        if not np.all(np.isfinite(t)) or np.any(np.diff(np.r_[prev, t]) <= 0):
            raise ValueError("sample times must be finite and strictly increasing")
        n0 = self.n_raw
        self._raw_t, self._raw_v, self.n_raw = self._append(self._raw_t, self._raw_v, n0, t, v)
        self.samples_used += int(t.size)
        if self.tau is None:
            pt, pv = t, v
        else:
            pt, pv = self._invert(max(n0, 1), self.n_raw)
        if pt.size:
            self._pt, self._pv, self.n_proc = self._append(self._pt, self._pv, self.n_proc, pt, pv)
        self._finalise()

    def _invert(self, a, b):
        """Decay removed from raw samples ``a .. b-1`` (``a >= 1``), at the midpoints of their
        intervals (:func:`map2d.traces.remove_decay`); sample 0 (NaN) is emitted with sample 1."""
        if b < 2 or a >= b:
            return np.zeros(0), np.zeros((0, self.n_cells))
        T = self._raw_t[:b]
        med = float(np.median(np.diff(T)))
        t, c = T[a:b], self._raw_v[a:b]
        h = t - T[a - 1:b - 1]
        prev = self._raw_v[a - 1:b - 1]
        alpha = np.exp(-h / self.tau)[:, None]
        with np.errstate(invalid="ignore"):
            d = ((c - alpha * prev) / (1.0 - alpha)).astype(np.float32).astype(np.float64)
        gap = h > 1.5 * med
        d[gap] = np.nan
        mid = np.where(gap, t - 0.5 * med, t - 0.5 * h)
        if a == 1:                                              # the first sample: no difference
            mid = np.r_[T[0] - 0.5 * med, mid]
            d = np.concatenate([np.full((1, self.n_cells), np.nan), d])
        return mid, d

    def _samples(self):
        return self._pt[:self.n_proc], self._pv[:self.n_proc]

    def _frame_values(self, a, b, ends):
        """Time averages (frames ``a .. b-1``, cells) float32 of the samples so far."""
        from .align import _trace_means
        from .contract import Traces

        pt, pv = self._samples()
        if pt.size < 2:
            return np.full((b - a, self.n_cells), np.nan, dtype=np.float32)
        i0 = max(int(np.searchsorted(pt, self.times[a], side="right")) - 1, 0)
        tr = Traces(values=pv[i0:].T, times_s=pt[i0:])
        return _trace_means(tr, self.times[a:b], np.asarray(ends, dtype=np.float64)).T

    def _finalise(self):
        """Frames whose end (the next onset) and a sample at or after it have arrived enter the sums."""
        if self.n_proc == 0 or self.F < 2:
            return
        last = self._pt[self.n_proc - 1]
        K2 = int(np.searchsorted(self.times[1:self.F], last, side="right"))
        if K2 <= self.K:
            return
        a = self.K
        Rb = self._frame_values(a, K2, self.times[a + 1:K2 + 1])
        self.R[a:K2] = Rb
        self._add_values(a, Rb)
        self.K = K2

    def _add_values(self, a, Rb):
        valid = np.isfinite(Rb)
        V = np.where(valid, Rb, 0).astype(np.float64)
        self.sum_r += V.sum(axis=0)
        self.sum_r2 += (V * V).sum(axis=0)
        self.n_valid += valid.sum(axis=0)
        n, C = V.shape
        kk = np.repeat(np.arange(a, a + n), C)
        cc = np.tile(np.arange(C), n)
        self._add_sums(kk, cc, V.reshape(-1), self.S)
        self._add_sums(kk, cc, valid.reshape(-1).astype(np.float64), self.SW)

    def _rebuild(self, lmax: int):
        self._setup_offsets(lmax)
        self.S = np.zeros((self.offsets.size, 2 * self.P, self.n_cells))
        self.SW = np.zeros_like(self.S)
        self.sum_r[:], self.sum_r2[:], self.n_valid[:] = 0, 0, 0
        if self.K:
            self._add_values(0, self.R[:self.K])

    @property
    def finalised(self) -> int:
        return self.K if hasattr(self, "K") else 0

    def snapshot(self) -> MapResult | None:
        """As :meth:`LiveSparseMaps.snapshot`, for the frames and samples so far."""
        F, C, P = self.F, self.n_cells, self.P
        if F < 3 or self.n_proc < 2:
            return None
        frame_s = self.frame_interval_s()
        lags = self._lags_now(frame_s, F)
        if lags is None:
            return None
        K = self.K
        ends = np.r_[self.times[K + 1:F], self.times[F - 1] + frame_s]
        Rt = self._frame_values(K, F, ends)                         # frames not final yet
        Wt = np.isfinite(Rt)
        Vt = np.where(Wt, Rt, 0).astype(np.float64)
        n_valid = self.n_valid + Wt.sum(axis=0)
        sum_r = self.sum_r + Vt.sum(axis=0)
        sum_r2 = self.sum_r2 + (Vt * Vt).sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = sum_r / np.maximum(n_valid, 1)
            sd = np.sqrt(np.maximum(sum_r2 / np.maximum(n_valid, 1) - mean ** 2, 0.0))

        def centred_maps(o):
            oi = int(np.flatnonzero(self.offsets == o)[0])
            sums, cnt = self.S[oi].copy(), self.SW[oi].copy()
            for j in range(F - K):
                t = K + j - o
                if t >= 0:
                    q = self._indices[self._indptr[t]:self._indptr[t + 1]]
                    sums[q] += Vt[j][None, :]
                    cnt[q] += Wt[j][None, :]
            sums -= cnt * mean[None, :]
            n_on, n_off = cnt[:P].T, cnt[P:].T
            with np.errstate(divide="ignore", invalid="ignore"):
                m = _sparse_maps_one(sums, n_on, n_off, P)
            return m, _analytic_sd(sd, n_valid, n_on, n_off)

        return self._assemble(F, C, lags, frame_s, sd, n_valid, centred_maps, np.arange(C, dtype=np.int64))


# ----------------------------------------------------------------------------------------------
# where to put the gratings
# ----------------------------------------------------------------------------------------------
@dataclass
class Aperture:
    """A circular grating aperture covering the fields of some cells, with its uncertainty (degrees).

    ``center_se_deg`` is the standard error of the centre (x, y), ``diameter_se_deg`` that of the
    diameter; ``cells`` the ids of the cells whose fields it covers.
    """

    center_x_deg: float
    center_y_deg: float
    diameter_deg: float
    center_se_deg: tuple
    diameter_se_deg: float
    cells: tuple

    def command(self, out: str = "gratings_next") -> str:
        """The ``map2d stimulus gratings`` command line that presents gratings in this aperture, with
        the phase origin at its centre."""
        x, y, d = self.center_x_deg, self.center_y_deg, self.diameter_deg
        return (f"map2d stimulus gratings --out {out} --phase-origin-deg {x:.1f} {y:.1f} "
                f"--aperture-deg {x:.1f} {y:.1f} {d:.1f}")


def field_region(result: MapResult, c: int, kinds=None):
    """Pixels (bool ny x nx), map values and their null sd of cell index ``c``'s field at its peak lag,
    or None when the cell is not responsive.

    The field is the region of :func:`map2d.maps.map_centroid_deg`: at the peak lag, in the map kind
    holding the largest ``|z|``, the 8-connected pixels around the peak whose z has the peak's sign
    and ``|z| >= max(2, |z_peak| / 2)`` (half the peak, common practice for a field's extent).
    ``kinds``: ``result.peak_kind_index()`` when already computed.
    """
    li = int(result.peak_lag_index[c])
    if li < 0:
        return None
    k = int((result.peak_kind_index() if kinds is None else kinds)[c])
    if li < 0 or k < 0:
        return None
    kind = KINDS[k]
    z = np.nan_to_num(result.zmaps(kind)[c, li].astype(float))
    m = np.nan_to_num(result.maps(kind)[c, li].astype(float))
    i, j = np.unravel_index(int(np.argmax(np.abs(z))), z.shape)
    sign = np.sign(z[i, j])
    region = _component(sign * z >= max(2.0, abs(z[i, j]) / 2), i, j)
    with np.errstate(divide="ignore", invalid="ignore"):
        sd = np.where(z != 0, np.abs(m / z), np.nan)
    return region, m, sd


def _centroid_with_se(grid: Grid, region, m, sd):
    """|m|-weighted centroid of the region in degrees and its standard error per axis: first-order
    error propagation with independent pixel noise of sd ``sd`` (the region taken as fixed; Bevington
    PR, Robinson DK (2003) Data Reduction and Error Analysis for the Physical Sciences, 3rd ed.,
    chapter 3), and the grid's rounding error."""
    rows, cols = np.nonzero(region)
    x, y = grid.point_of(rows.astype(float), cols.astype(float))
    x, y = np.asarray(x, float), np.asarray(y, float)
    w = np.abs(m[rows, cols])
    W = w.sum()
    if not W > 0:
        w, W = np.ones(rows.size), float(rows.size)
    cx, cy = float((w * x).sum() / W), float((w * y).sum() / W)
    s = np.nan_to_num(sd[rows, cols])
    # map noise, plus the grid's resolution: a field's centre is known only to within its pixels
    # (uniform rounding error, sd spacing / sqrt(12))
    se_x = float(np.sqrt((((x - cx) / W) ** 2 * s ** 2).sum() + grid.dx_deg ** 2 / 12.0))
    se_y = float(np.sqrt((((y - cy) / W) ** 2 * s ** 2).sum() + grid.dy_deg ** 2 / 12.0))
    return cx, cy, se_x, se_y, x, y


def suggest_aperture(result: MapResult, cells=None, margin_deg: float = 0.0) -> Aperture | None:
    """The circular aperture that covers the fields of the selected cells (default: every responsive
    cell), or None when none of them has a field.

    Centre: the mean of the cells' field centroids (:func:`field_region`, ``|map|``-weighted). Diameter:
    twice the largest distance from that centre to the far corner of any field pixel, plus
    ``2 * margin_deg``. Uncertainty: the centre's standard error is that of the mean of the centroids
    (each by error propagation from the pixels' null sd); the diameter's combines it with the
    quantisation of a field's edge to whole pixels (sd ``spacing / sqrt(12)`` per edge, the uniform
    rounding error). Each centroid's error also holds that rounding error, so a field of one pixel
    has a centre known to ``spacing / sqrt(12)``.
    """
    ids = np.asarray(result.cell_ids)
    if cells is None:
        idx = np.flatnonzero(result.responsive)
    else:
        idx = np.flatnonzero(np.isin(ids, np.asarray(list(cells), dtype=np.int64)))
    g = result.grid
    kinds = result.peak_kind_index()
    centres, ses, xs, ys, used = [], [], [], [], []
    for c in idx:
        f = field_region(result, int(c), kinds)
        if f is None or not f[0].any():
            continue
        cx, cy, sx, sy, x, y = _centroid_with_se(g, *f)
        centres.append((cx, cy))
        ses.append((sx, sy))
        xs.append(x)
        ys.append(y)
        used.append(int(ids[c]))
    if not used:
        return None
    centres, ses = np.array(centres), np.array(ses)
    n = len(used)
    cx, cy = centres.mean(axis=0)
    se = np.sqrt((ses ** 2).sum(axis=0)) / n
    x, y = np.concatenate(xs), np.concatenate(ys)
    half_diag = 0.5 * np.hypot(g.dx_deg, g.dy_deg)
    radius = float(np.max(np.hypot(x - cx, y - cy))) + half_diag + margin_deg
    spacing = 0.5 * (g.dx_deg + g.dy_deg)
    d_se = 2.0 * float(np.sqrt(se[0] ** 2 + se[1] ** 2 + spacing ** 2 / 12.0))
    return Aperture(center_x_deg=float(cx), center_y_deg=float(cy), diameter_deg=2.0 * radius,
                    center_se_deg=(float(se[0]), float(se[1])), diameter_se_deg=d_se, cells=tuple(used))
