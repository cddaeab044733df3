"""Grating responses: flashed sequences (subspace reverse correlation) and drifting-grating trials.

Flashed gratings
----------------
A flashed sequence shows one static grating per frame (``tf_hz = 0``), in random order over
orientation x spatial frequency (SF) x phase, with blank frames (``contrast = 0``) among them. The
mean response to each condition in the frame ``lag`` frames later, minus the mean response after a
blank at the same lag, is the subspace reverse-correlation kernel (Ringach, Sapiro & Shapley 1997;
Ringach, Hawken & Shapley 1997). Its first harmonic over phase is a complex response per
(orientation, SF) in the convention of :mod:`map2d.geometry`:

    ``H = (2 / P) sum_p r(phi_p) exp(-i phi_p) / contrast``,

with ``phi`` measured from the table's phase origin, so that a linear cell with spatial kernel ``k``
gives ``H = gain * sum k(x, y) exp(+i 2 pi (kx (x - xc) + ky (y - yc))) dA``. (When the phases shown
are not equally spaced the harmonic is the least-squares fit of ``a0 + Re(H c exp(i phi))``, which
equals the sum above for equally spaced phases.) The mean over phase is the phase-invariant part.

Static gratings at ``ori`` and ``ori + 180`` are the same pattern with the phase negated
(``cos(2 pi sf u(ori + 180) + phi) = cos(2 pi sf u(ori) - phi)``), so orientations are folded into
``[0, 180)`` with the phase flipped; ``H(-k) = conj(H(k))`` gives the other half of the (kx, ky) plane.

Drifting gratings
-----------------
Each drifting trial (``tf_hz != 0``, ``contrast != 0``) gives the mean response above spontaneous
(F0) and the complex first harmonic at the temporal frequency (F1), measured from the exact trial
onset over a whole number of cycles: the analysis window is ``floor(duration * tf) / tf`` seconds
from the onset (the full trial when it is shorter than one cycle). For spikes
``F1 = (2 / T) sum_spikes exp(-i 2 pi tf (t - onset))``; for traces ``F1 = a - i b`` from the
least-squares fit of ``a0 + a cos(theta) + b sin(theta)``, ``theta = 2 pi tf (t - onset)``, to the
samples inside the window (exact for any sampling). A rate ``r(t) = r0 + |F1| cos(theta + arg F1)``
gives back ``F1``. When the indicator's decay ``tau`` is known or estimated, the fit also carries the
indicator's transient (its rise at the onset and the tail of earlier responses) and undoes its
low-pass, so that F0 and F1 are those of the drive (see ``_trace_f1``); spontaneous windows likewise. A negative ``tf_hz`` is a grating moving toward ``ori + 180`` with the phase negated,
and is folded so.

References
----------
Ringach DL, Sapiro G, Shapley R (1997) A subspace reverse-correlation technique for the study of
visual neurons. Vision Res 37:2455-2464.
Ringach DL, Hawken MJ, Shapley R (1997) Dynamics of orientation tuning in macaque primary visual
cortex. Nature 387:281-284.
Skottun BC, De Valois RL, Grosof DH, Movshon JA, Albrecht DG, Bonds AB (1991) Classifying simple and
complex cells on the basis of response modulation. Vision Res 31:1079-1086.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse, stats

from .align import cell_index, interval_responses, spikes_in_intervals
from .contract import GratingTable, Spikes, Traces
from .geometry import wave_vector
from .maps import map_lags

__all__ = [
    "FlashedResult", "DriftingResult", "analyze_flashed", "analyze_drifting",
    "flashed_rows", "fold_static", "has_flashed", "has_drifting", "estimate_decay_tau", "drifting_latency",
]

_ROUND = 6  # decimals used to identify equal orientations / phases (degrees)
N_SPLITS = 16  # drifting F1/F0: splits of the trials into two folds averaged (fixed seed, reproducible)


# ----------------------------------------------------------------------------------------------
# small helpers
# ----------------------------------------------------------------------------------------------
def fold_static(orientation_deg, phase_deg):
    """Fold static gratings into orientations ``[0, 180)``, negating the phase of folded ones.

    ``(ori + 180, phi)`` shows the same pattern as ``(ori, -phi)`` under the contract formula.

    Examples
    --------
    >>> o, p = fold_static([200.0, 30.0], [90.0, 90.0])
    >>> o.tolist(), p.tolist()
    ([20.0, 30.0], [270.0, 90.0])
    """
    ori = np.mod(np.round(np.mod(np.asarray(orientation_deg, float), 360.0), _ROUND), 360.0)
    ph = np.asarray(phase_deg, float)
    flip = ori >= 180.0
    ori = np.where(flip, ori - 180.0, ori)
    ph = np.where(flip, -ph, ph)
    ph = np.mod(np.round(np.mod(ph, 360.0), _ROUND), 360.0)
    return ori, ph


def flashed_rows(table: GratingTable) -> np.ndarray:
    """Boolean mask of the rows that belong to flashed sequences (blank frames included).

    Static rows (``tf_hz == 0``) whose duration is at most twice the median duration of the static
    gratings with contrast; longer static blanks (e.g. blank trials among drifting gratings) are left
    to the drifting analysis.
    """
    dur = table.offset_s - table.onset_s
    stim = table.is_static & (table.contrast > 0)
    if not stim.any():
        return np.zeros(len(table), dtype=bool)
    ref = float(np.median(dur[stim]))
    return table.is_static & (dur <= 2.0 * ref + 1e-9)


def has_flashed(table: GratingTable | None) -> bool:
    """Whether ``table`` holds a flashed sequence (static gratings with contrast)."""
    return table is not None and bool(np.any(table.is_static & (table.contrast > 0)))


def has_drifting(table: GratingTable | None) -> bool:
    """Whether ``table`` holds drifting-grating trials."""
    return table is not None and bool(np.any(table.is_drifting))


def _index(values, axis_values):
    return np.searchsorted(axis_values, values)


def _group_sums(values, labels, n_groups):
    """Sum ``values`` (cells, m) over columns grouped by ``labels`` (m,) -> (cells, n_groups)."""
    m = labels.size
    onehot = sparse.csc_matrix((np.ones(m), (labels, np.arange(m))), shape=(n_groups, m))
    return np.asarray(onehot @ values.T).T


def _grouped_anova(values, finite, labels, n_groups, no_nan):
    """Per-cell one-way ANOVA pieces over groups: sums, counts, SSB, SSW, groups used, N."""
    s = _group_sums(values, labels, n_groups)
    q = _group_sums(values * values, labels, n_groups)
    if no_nan:
        n = np.broadcast_to(np.bincount(labels, minlength=n_groups).astype(float), s.shape)
    else:
        n = _group_sums(finite.astype(float), labels, n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        s2n = np.where(n > 0, s * s / np.where(n > 0, n, 1), 0.0)
    n_tot = n.sum(axis=1)
    s_tot = s.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ssb = s2n.sum(axis=1) - np.where(n_tot > 0, s_tot**2 / np.where(n_tot > 0, n_tot, 1), 0.0)
    ssw = q.sum(axis=1) - s2n.sum(axis=1)
    k = (n > 0).sum(axis=1)
    return s, q, n, np.maximum(ssb, 0.0), np.maximum(ssw, 0.0), k, n_tot


# ----------------------------------------------------------------------------------------------
# flashed sequences
# ----------------------------------------------------------------------------------------------
@dataclass
class FlashedResult:
    """Subspace reverse correlation of a flashed-grating sequence.

    Axes: ``O`` orientations in ``[0, 180)``, ``S`` spatial frequencies, ``P`` phases (relative to
    the phase origin), ``L`` lags of whole frames. Response units are those of the responses
    (spikes/s, or trace units). ``NaN`` where a condition was not shown (or had no valid data).

    Attributes
    ----------
    cell_ids : (cells,) int
    orientations_deg, sfs_cpd, phases_deg : (O,), (S,), (P,)
    lags_s : (L,)  lag ``l`` frames times the frame period
    frame_s : float  median onset-to-onset interval of the sequence
    mean : (cells, O, S, P, L)  mean response minus the blank mean at the same lag
    count : (cells, O, S, P, L)  number of presentations behind each mean
    blank_mean : (cells, L)  mean response after a blank (the reference; NaN if no blanks, in
        which case the reference is the mean over all presentations at that lag)
    condition_contrast : (O, S)  mean contrast of the gratings of each (orientation, SF)
    harmonic : (cells, O, S, L) complex  first harmonic over phase, divided by contrast (``H``)
    phase_mean : (cells, O, S, L)  mean over phase of ``mean`` (phase-invariant part)
    energy : (cells, L)  variance of the true condition means across conditions, estimated without
        noise bias from the ANOVA mean squares (``(SSB - (k - 1) MSW) / N``); the tuning time course
    peak_lag_index : (cells,) int ; peak_lag_s : (cells,)  lag of largest ``energy``
    p_value : (cells,)  shuffle test: the condition sequence is permuted and the largest (over
        lags) between-condition share of variance compared with the observed one
    responsive : (cells,) bool  ``p_value < alpha``
    kx_cpd, ky_cpd : (O, S)  wave vectors of the (orientation, SF) conditions
    n_shuffles, alpha : the test's settings
    temporal_profile : (cells, L)  the cell's temporal profile over lags: the first right singular
        vector of its (conditions x lags) response matrix, signed and scaled so that its largest
        entry is +1
    lag_noise_cov : (cells, L, L)  covariance across lags of single-presentation residuals (the
        response minus its condition's mean at each lag)
    temporal_weights : (cells, L)  the weights that pool the lags: ``S^-1 v`` for profile ``v`` and
        noise covariance ``S`` (generalised least squares), scaled so that ``w . v = v . v``
    harmonic_combined, phase_mean_combined : (cells, O, S) complex / real  the surfaces of
        ``sum_l w_l mean[..., l]`` (``w`` = ``temporal_weights``): all lags pooled for the cell's own
        time course (a rank-1 space-time separable estimate). A response that falls across two frames
        (latency not a whole number of frames) is pooled instead of halved, and for calcium traces the
        level left by earlier responses (correlated across lags) is subtracted, which raises the
        signal-to-noise ratio (on simulated traces with a 0.4 s decay, the correlation of the measured
        magnitude surface with the kernel's rose from about 0.8 to 0.98); the phase convention is that
        of ``harmonic``. Used for tuning and the agreement with the map.
    harmonic_noise_var, phase_mean_noise_var : (cells, O, S) or None  noise variances of the lag-pooled
        surfaces, from single presentations (:func:`map2d.analysis.flashed_noise`; set by
        :func:`map2d.analysis.analyze_session`): ``peak_response`` removes the noise floor with the
        first. The selectivity intervals resample the presentations themselves when
        :func:`map2d.analysis.flashed_noise` left them on the result; otherwise (a result read back
        without them) they draw Gaussian noise of these variances.
    """

    cell_ids: np.ndarray
    orientations_deg: np.ndarray
    sfs_cpd: np.ndarray
    phases_deg: np.ndarray
    lags_s: np.ndarray
    frame_s: float
    mean: np.ndarray
    count: np.ndarray
    blank_mean: np.ndarray
    condition_contrast: np.ndarray
    harmonic: np.ndarray
    phase_mean: np.ndarray
    energy: np.ndarray
    peak_lag_index: np.ndarray
    peak_lag_s: np.ndarray
    p_value: np.ndarray
    responsive: np.ndarray
    kx_cpd: np.ndarray
    ky_cpd: np.ndarray
    n_shuffles: int
    alpha: float
    temporal_weights: np.ndarray = None
    harmonic_combined: np.ndarray = None
    phase_mean_combined: np.ndarray = None
    temporal_profile: np.ndarray = None
    lag_noise_cov: np.ndarray = None
    harmonic_noise_var: np.ndarray = None
    phase_mean_noise_var: np.ndarray = None

    def _at_peak(self, a):
        idx = self.peak_lag_index[:, None, None, None]
        return np.take_along_axis(a, np.broadcast_to(idx, a.shape[:3] + (1,)), axis=3)[..., 0]

    @property
    def harmonic_at_peak(self) -> np.ndarray:
        """``H`` at each cell's peak lag, (cells, O, S) complex."""
        return self._at_peak(self.harmonic)

    @property
    def phase_mean_at_peak(self) -> np.ndarray:
        """Phase-invariant response at each cell's peak lag, (cells, O, S)."""
        return self._at_peak(self.phase_mean)

    @property
    def peak_response(self) -> np.ndarray:
        """Peak over phase of the first-harmonic fit, ``phase_mean + contrast |H|``, lags pooled.

        This is the response measure used for tuning: it serves simple cells (carried by ``|H|``)
        and complex cells (carried by the phase-invariant part) alike. Computed from the lag-pooled
        surfaces (``harmonic_combined``, ``phase_mean_combined``). Shape (cells, O, S).

        ``|H|`` of a noisy measurement has a floor: ``E|H_meas|^2 = |H|^2 + v`` with ``v`` the noise
        variance of the condition, the same at every orientation, which flattens the tuning and makes
        every selectivity index depend on the recording's length. When ``harmonic_noise_var`` is set
        (:func:`map2d.analysis.flashed_noise`), ``|H|`` is replaced by ``sqrt(max(|H_meas|^2 - v, 0))``
        (the noise power removed; a condition whose ``v`` is NaN keeps ``|H_meas|``).
        """
        amp = np.abs(self.harmonic_combined)
        v = self.harmonic_noise_var
        if v is not None:
            v = np.asarray(v, float)
            amp = np.where(np.isfinite(v), np.sqrt(np.maximum(amp**2 - np.where(np.isfinite(v), v, 0.0), 0.0)), amp)
        return self.phase_mean_combined + self.condition_contrast[None] * amp

    def full_plane(self, values=None):
        """Values on both halves of the (kx, ky) plane: ``(kx, ky, v)`` each (cells?, 2 O, S).

        ``values`` defaults to :attr:`harmonic_at_peak`; the half at ``ori + 180`` holds the complex
        conjugate (``H(-k) = conj(H(k))`` for a real kernel), real values are repeated.
        """
        v = self.harmonic_at_peak if values is None else np.asarray(values)
        kx = np.concatenate([self.kx_cpd, -self.kx_cpd], axis=0)
        ky = np.concatenate([self.ky_cpd, -self.ky_cpd], axis=0)
        other = np.conj(v) if np.iscomplexobj(v) else v
        return kx, ky, np.concatenate([v, other], axis=-2)


def _frame_windows(onset, offset):
    """Response window of each presentation: onset to next onset, at most one frame period."""
    n = onset.size
    frame = float(np.median(np.diff(onset))) if n > 1 else float(offset[0] - onset[0])
    if not frame > 0:
        frame = float(np.median(offset - onset))
    nxt = np.append(onset[1:], np.inf)
    end = np.minimum(nxt, onset + frame)
    # a presentation sharing its onset with the next one (should not happen) keeps its own offset
    end = np.where(end > onset, end, offset)
    return frame, end


def analyze_flashed(responses: Spikes | Traces, table: GratingTable, max_lag_s: float = 0.2,
                    rng=None, n_shuffles: int = 199, alpha: float = 0.01,
                    shuffle_block: int = 16) -> FlashedResult:
    """Subspace reverse correlation of the flashed-grating rows of ``table``.

    Parameters
    ----------
    responses : Spikes or Traces
    table : GratingTable
        Its flashed rows (see :func:`flashed_rows`) are used; other rows are ignored.
    max_lag_s : float
        Longest lag; lags are ``0, 1, ..., floor(max_lag_s / frame + 0.01)`` frames (see
        :func:`map2d.maps.map_lags`).
    rng : numpy.random.Generator or int, optional
        Seed for the shuffle test.
    n_shuffles : int
        Permutations of the condition sequence for the significance test (0 skips the test:
        ``p_value`` is NaN and no cell is called responsive).
    alpha : float
        Significance level for ``responsive``.
    shuffle_block : int
        Shuffles evaluated together (memory vs speed).

    Returns
    -------
    FlashedResult

    Notes
    -----
    Each presentation's response is the mean rate (or trace value) from its onset to the next onset,
    at most one frame period long (:func:`map2d.align.interval_responses`), so lag bins tile time
    even when a grating fills only part of its frame. The response at lag ``l`` to presentation
    ``k`` is that of presentation ``k + l``, used only if it starts within half a frame of
    ``onset_k + l * frame`` (so gaps in the sequence never pair unrelated frames).
    Condition means are computed for all cells at once with sparse one-hot sums (no loop over
    presentations).
    """
    if not np.isfinite(max_lag_s) or max_lag_s < 0:
        raise ValueError(f"max_lag_s must be >= 0, got {max_lag_s}")
    if int(n_shuffles) < 0:
        raise ValueError(f"n_shuffles must be >= 0, got {n_shuffles}")
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be in (0, 1), got {alpha}")
    rng = np.random.default_rng(rng)
    rows = np.flatnonzero(flashed_rows(table))
    if rows.size == 0:
        raise ValueError("table holds no flashed (static) gratings with contrast")
    rows = rows[np.argsort(table.onset_s[rows], kind="stable")]
    onset = table.onset_s[rows].astype(float)
    offset = table.offset_s[rows].astype(float)
    contrast = table.contrast[rows].astype(float)
    blank = contrast == 0
    ori, ph = fold_static(table.orientation_deg[rows], table.phase_deg[rows])
    sf = np.round(table.sf_cpd[rows].astype(float), 9)
    oris = np.unique(ori[~blank])
    sfs = np.unique(sf[~blank])
    phs = np.unique(ph[~blank])
    n_o, n_s, n_p = oris.size, sfs.size, phs.size
    n_c = n_o * n_s * n_p
    oi, si, pi = _index(ori, oris), _index(sf, sfs), _index(ph, phs)
    cond = np.where(blank, n_c, (np.clip(oi, 0, n_o - 1) * n_s + np.clip(si, 0, n_s - 1)) * n_p
                    + np.clip(pi, 0, n_p - 1)).astype(np.int64)
    n_groups = n_c + 1
    has_blank = bool(blank.any())

    frame, end = _frame_windows(onset, offset)
    n_lags = map_lags(frame, max_lag_s).size        # 1 % of a frame to spare (timing jitter)
    r = interval_responses(responses, onset, end).astype(np.float64)  # (cells, n)
    n_cells, n = r.shape
    finite = np.isfinite(r)
    no_nan = bool(finite.all())
    r0 = np.where(finite, r, 0.0)

    pairs = []
    for lag in range(n_lags):
        k = np.arange(max(n - lag, 0))
        j = k + lag
        ok = np.abs(onset[j] - onset[k] - lag * frame) < 0.5 * frame
        pairs.append((k[ok], j[ok]))

    means = np.full((n_cells, n_groups, n_lags), np.nan)
    counts = np.zeros((n_cells, n_groups, n_lags))
    energy = np.full((n_cells, n_lags), np.nan)
    share = np.full((n_cells, n_lags), np.nan)
    sst = np.zeros((n_cells, n_lags))
    for lag, (k, j) in enumerate(pairs):
        if k.size == 0:
            continue
        v, f = r0[:, j], finite[:, j]
        s, q, cnt, ssb, ssw, kk, ntot = _grouped_anova(v, f, cond[k], n_groups, no_nan)
        with np.errstate(invalid="ignore", divide="ignore"):
            means[:, :, lag] = np.where(cnt > 0, s / np.where(cnt > 0, cnt, 1), np.nan)
            msw = np.where(ntot - kk > 0, ssw / np.maximum(ntot - kk, 1), np.nan)
            energy[:, lag] = np.where(ntot > 0, (ssb - (kk - 1) * msw) / ntot, np.nan)
            sst[:, lag] = ssb + ssw
            share[:, lag] = np.where(sst[:, lag] > 0, ssb / sst[:, lag], np.nan)
        counts[:, :, lag] = cnt

    with np.errstate(invalid="ignore", divide="ignore"):
        if has_blank:
            ref = means[:, n_c, :]
        else:
            tot = np.nansum(means[:, :n_c, :] * counts[:, :n_c, :], axis=1)
            ref = tot / counts[:, :n_c, :].sum(axis=1)
    blank_mean = means[:, n_c, :] if has_blank else np.full((n_cells, n_lags), np.nan)
    d = (means[:, :n_c, :] - ref[:, None, :]).reshape(n_cells, n_o, n_s, n_p, n_lags)
    count = counts[:, :n_c, :].reshape(n_cells, n_o, n_s, n_p, n_lags)

    # contrast of each (orientation, SF)
    stim = ~blank
    os_idx = oi[stim] * n_s + si[stim]
    csum = np.bincount(os_idx, weights=contrast[stim], minlength=n_o * n_s)
    cn = np.bincount(os_idx, minlength=n_o * n_s)
    with np.errstate(invalid="ignore", divide="ignore"):
        cond_contrast = np.where(cn > 0, csum / np.maximum(cn, 1), np.nan).reshape(n_o, n_s)

    harmonic, phase_mean = _phase_harmonic(d, count > 0, np.deg2rad(phs), cond_contrast)

    e = np.where(np.isfinite(energy), energy, -np.inf)
    peak = np.argmax(e, axis=1)
    lags_s = np.arange(n_lags) * frame

    # lags pooled with each cell's temporal profile (first singular vector of conditions x lags),
    # weighted against the noise covariance across lags (see _lag_weights)
    mat = np.where(np.isfinite(d), d, 0.0).reshape(n_cells, n_c, n_lags)
    profile = np.zeros((n_cells, n_lags))
    some = np.flatnonzero(mat.any(axis=(1, 2)))
    if some.size:
        w = np.linalg.svd(mat[some], full_matrices=False)[2][:, 0, :]     # (cells, L), one SVD per cell
        profile[some] = w / np.take_along_axis(w, np.argmax(np.abs(w), axis=1)[:, None], axis=1)
    noise_cov = _lag_noise_cov(r0, finite, onset, frame, cond, means, n_lags)
    weights = _lag_weights(profile, noise_cov)
    pooled = np.einsum("cospl,cl->cosp", np.where(np.isfinite(d), d, 0.0), weights)
    pooled_avail = (count > 0).any(axis=-1)
    pooled = np.where(pooled_avail, pooled, np.nan)
    h_comb, pm_comb = _phase_harmonic(pooled[..., None], pooled_avail[..., None], np.deg2rad(phs), cond_contrast)

    p_value = np.full(n_cells, np.nan)
    if n_shuffles > 0:
        obs = np.nanmax(np.where(np.isfinite(share), share, -np.inf), axis=1)
        exceed = _shuffle_exceed(r0, finite, no_nan, pairs, cond, n_groups, sst, obs, n_shuffles, shuffle_block, rng)
        p_value = (1.0 + exceed) / (1.0 + n_shuffles)
        p_value[~np.isfinite(obs)] = 1.0
    responsive = np.isfinite(p_value) & (p_value < alpha)

    kx, ky = wave_vector(oris[:, None], sfs[None, :])
    result = FlashedResult(
        cell_ids=np.asarray(responses.cell_ids), orientations_deg=oris, sfs_cpd=sfs, phases_deg=phs,
        lags_s=lags_s, frame_s=frame, mean=d, count=count, blank_mean=blank_mean,
        condition_contrast=cond_contrast, harmonic=harmonic, phase_mean=phase_mean, energy=energy,
        peak_lag_index=peak, peak_lag_s=lags_s[peak], p_value=p_value, responsive=responsive,
        kx_cpd=np.asarray(kx, float), ky_cpd=np.asarray(ky, float), n_shuffles=int(n_shuffles),
        alpha=float(alpha), temporal_weights=weights, harmonic_combined=h_comb[..., 0],
        phase_mean_combined=pm_comb[..., 0], temporal_profile=profile, lag_noise_cov=noise_cov)
    # the responses of every presentation, for map2d.analysis.flashed_noise on the same responses (which
    # then bins them once, not twice, and drops them); an attribute, not a field: never saved
    result._presentations = (responses, onset, end, r)
    return result


def _shuffle_exceed(r0, finite, no_nan, pairs, cond, n_groups, sst, obs, n_shuffles, block, rng):
    """Shuffles of the condition sequence whose largest (over lags) between-condition share of variance
    reaches ``obs``, per cell (the null distribution of :func:`analyze_flashed`'s test).

    ``block`` shuffles at a time: their condition sums for all cells are one sparse product, the
    (shuffle, condition) indicator of the presentations (``block * groups`` x presentations) times the
    responses (presentations x cells, one contiguous copy for the whole test)."""
    n_cells, n = r0.shape
    r_t = np.ascontiguousarray(r0.T)                              # (n, cells)
    f_t = None if no_nan else np.ascontiguousarray(finite.T, dtype=float)
    exceed = np.zeros(n_cells)
    done = 0
    while done < n_shuffles:
        b = min(int(block), n_shuffles - done)
        perms = np.argsort(rng.random((b, n)), axis=1)
        null = np.full((b, n_cells), -np.inf)
        for lag, (k, j) in enumerate(pairs):
            if k.size == 0:
                continue
            m = k.size
            labels = (cond[perms[:, k]] + n_groups * np.arange(b)[:, None]).ravel()
            onehot = sparse.csr_matrix((np.ones(b * m), (labels, np.tile(np.arange(m), b))),
                                       shape=(n_groups * b, m))
            s = onehot @ r_t[j]                                          # (b * groups, cells)
            s *= s
            if no_nan:      # the same counts for every cell: one weighted sum over conditions per shuffle
                cnt = np.bincount(labels, minlength=n_groups * b).astype(float)
                inv = np.where(cnt > 0, 1.0 / np.maximum(cnt, 1.0), 0.0).reshape(b, 1, n_groups)
                s2n = np.matmul(inv, s.reshape(b, n_groups, n_cells))[:, 0, :]   # (b, cells)
                n_tot = np.full(n_cells, float(m))
            else:
                cnt = onehot @ f_t[j]
                with np.errstate(invalid="ignore", divide="ignore"):
                    s2n = np.where(cnt > 0, s / np.where(cnt > 0, cnt, 1), 0.0)
                s2n = s2n.reshape(b, n_groups, n_cells).sum(axis=1)    # (b, cells)
                n_tot = f_t[j].sum(axis=0)
            s_tot = r_t[j].sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                ssb = s2n - (s_tot**2 / np.where(n_tot > 0, n_tot, 1))[None, :]
                sh = np.where(sst[None, :, lag] > 0, ssb / sst[None, :, lag], -np.inf)
            np.maximum(null, sh, out=null)
        exceed += (null >= obs[None, :] - 1e-12).sum(axis=0)
        done += b
    return exceed


def _lag_noise_cov(r0, finite, onset, frame, cond, means, n_lags, block=64):
    """Covariance across lags of the single-presentation residuals, (cells, L, L).

    For every presentation ``k`` whose lags all fall in the sequence, the residual at lag ``l`` is
    its response ``r_{k+l}`` minus the mean of its condition at that lag; the covariance is averaged
    over presentations (pairs with a missing response left out). Cells in blocks (memory)."""
    n_cells, n = r0.shape
    out = np.full((n_cells, n_lags, n_lags), np.nan)
    k = np.arange(max(n - n_lags + 1, 0))
    valid = np.ones(k.size, bool)
    for lag in range(n_lags):
        valid &= np.abs(onset[k + lag] - onset[k] - lag * frame) < 0.5 * frame
    k = k[valid]
    if k.size < 2:
        return out
    lab = cond[k]
    m0 = np.where(np.isfinite(means), means, 0.0)
    for a in range(0, n_cells, block):
        b = min(a + block, n_cells)
        f = np.stack([finite[a:b, k + lag] for lag in range(n_lags)], axis=2).astype(float)   # (c, n, L)
        e = np.stack([r0[a:b, k + lag] - m0[a:b, lab, lag] for lag in range(n_lags)], axis=2) * f
        num = np.einsum("cnl,cnm->clm", e, e)
        cnt = np.einsum("cnl,cnm->clm", f, f)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[a:b] = np.where(cnt > 1, num / np.maximum(cnt, 1), np.nan)
    return out


def _lag_weights(profile, noise_cov):
    """Weights that pool the lags of each cell: ``w = S^-1 v`` (``v`` the temporal profile, ``S`` the
    noise covariance across lags), the minimum-variance unbiased combination for a response of shape
    ``v`` (generalised least squares, e.g. Kay 1993, Fundamentals of Statistical Signal Processing:
    Estimation Theory, ch. 6), scaled so that ``w . v = v . v`` (the pooled signal is that of pooling
    with ``v`` itself). With calcium traces the noise (imaging noise and the slow decay of earlier
    responses) is strongly correlated across lags and ``w`` subtracts the level before the response
    from the level during it; with spikes ``S`` is nearly diagonal and ``w`` is close to ``v``.
    Cells whose covariance cannot be estimated keep ``v``."""
    weights = np.array(profile, float)
    n_lags = profile.shape[1]
    tr = np.trace(noise_cov, axis1=1, axis2=2) if n_lags else np.zeros(profile.shape[0])
    with np.errstate(invalid="ignore"):
        use = (profile != 0).any(axis=1) & np.isfinite(noise_cov).all(axis=(1, 2)) & (tr > 0)
    c = np.flatnonzero(use)
    if c.size == 0:
        return weights
    v = profile[c]
    x = np.linalg.solve(noise_cov[c] + (1e-6 * tr[c] / n_lags)[:, None, None] * np.eye(n_lags), v[..., None])[..., 0]
    vx = np.einsum("cl,cl->c", v, x)
    keep = (vx > 0) & np.isfinite(x).all(axis=1)
    weights[c[keep]] = x[keep] * (np.einsum("cl,cl->c", v, v)[keep] / vx[keep])[:, None]
    return weights


def _phase_harmonic(d, avail, phi, cond_contrast):
    """First harmonic over phase (least squares on ``[1, cos, sin]``) and the mean over phase.

    ``d`` (cells, O, S, P, L); returns ``H`` (cells, O, S, L) complex divided by contrast, and the
    plain mean over the available phases.
    """
    w = avail.astype(float)
    g = np.stack([np.ones_like(phi), np.cos(phi), np.sin(phi)], axis=1)  # (P, 3)
    d0 = np.where(avail, d, 0.0)
    a = np.einsum("cospl,pa,pb->colsab", w, g, g)
    rhs = np.einsum("cospl,pa->colsa", w * d0, g)
    det = np.linalg.det(a)
    ok = np.abs(det) > 1e-9
    a_safe = np.where(ok[..., None, None], a, np.eye(3))
    coef = np.linalg.solve(a_safe, rhs[..., None])[..., 0]
    coef[~ok] = np.nan
    # (cells, O, L, S, 3) -> (cells, O, S, L)
    coef = np.moveaxis(coef, 2, 3)
    with np.errstate(invalid="ignore", divide="ignore"):
        h = (coef[..., 1] - 1j * coef[..., 2]) / cond_contrast[None, :, :, None]
        n_av = w.sum(axis=3)
        phase_mean = np.where(n_av > 0, d0.sum(axis=3) / np.maximum(n_av, 1), np.nan)
    return h, phase_mean


# ----------------------------------------------------------------------------------------------
# drifting trials
# ----------------------------------------------------------------------------------------------
@dataclass
class DriftingResult:
    """Drifting-grating trials: F0 and F1 per trial and per condition.

    Axes: ``D`` directions in ``[0, 360)`` (toward which the grating moves), ``S`` SFs, ``T`` temporal
    frequencies. Responses in the units of the data (spikes/s or trace units).

    Attributes
    ----------
    cell_ids : (cells,)
    directions_deg, sfs_cpd, tfs_hz : (D,), (S,), (T,)
    trial_onset_s, trial_window_s : (n,)  start and length of each trial's analysis window (whole cycles,
        after the skipped cycles and the latency)
    trial_condition : (n, 3) int  (direction, SF, TF) index of each trial
    trial_f0 : (cells, n)  mean response in the window minus spontaneous
    trial_f1 : (cells, n) complex  first harmonic at the TF (see module notes), multiplied by
        ``exp(i sign(tf) phase)``: referred to a start phase of 0, so trials at any start phase average
    spontaneous : (cells,)  spontaneous level (NaN when it could not be measured; F0 is then the raw
        mean response)
    spontaneous_source : str  ``"blanks"``, ``"gaps"`` or ``"none"``
    f0_mean, f0_sem : (cells, D, S, T)
    f1_mean : (cells, D, S, T) complex  vector mean of ``trial_f1`` (|f1_mean| is the condition's F1)
    f1_sem : (cells, D, S, T)  standard error of the vector mean, ``sqrt(var(re) + var(im)) / sqrt(n)``
    f1_amp_mean : (cells, D, S, T)  mean over trials of ``|trial_f1|`` (biased upward by noise)
    n_trials : (cells, D, S, T)
    pref_index : (cells, 3) int  condition with the largest ``F0 + |F1|`` (-1 if none)
    f1_f0 : (cells,)  ``F1 / F0`` at the preferred condition (NaN when ``F0 <= 0``), cross-validated: the
        trials of each condition are split into two folds, the preferred condition (largest
        ``F0 + |F1|``) is chosen in one fold and F0 and ``|F1|^2`` are read in the other, both ways,
        averaged over ``N_SPLITS`` splits (:func:`_cross_validated_f1_f0`); ``|F1|^2`` is the
        noise-bias-corrected ``|mean F1|^2 - var / n`` (the squared length of a vector mean of noisy
        trials exceeds the true one by the variance of the mean), ``F1 = sqrt(max(|F1|^2, 0))``. Reading
        F1 on the trials that chose the condition gave truly unmodulated cells a median F1/F0 of 0.57;
        now about 0. With one trial per condition nothing can be held out: the values at ``pref_index``
    f1_f0_ci_low, f1_f0_ci_high : (cells,)  95 % bootstrap interval of ``f1_f0``, the split and the choice
        of the preferred condition redone in every resample (``_f1_f0_bootstrap``); responsive cells
        only (NaN otherwise)
    f1_f0_p_simple : (cells,)  bootstrap p of ``F1/F0 > 1``: the share of resamples at or below 1
    grating_class : (cells,) str  ``"simple"`` when the cell is responsive and the interval lies above 1,
        ``"complex"`` when it lies below 1, else ``""`` (undecided: the data do not separate the ratio
        from the criterion of Skottun et al. 1991)
    simple : (cells,) bool  point estimate ``F1 > F0`` (as in ``f1_f0``; chooses the response measure for
        tuning; the class is ``grating_class``)
    cell_tau_s : (cells,)  traces: the indicator decay used for each cell (NaN: none)
    skip_cycles : whole cycles left out after the onset
    latency_s : (cells,)  each cell's latency: its analysis windows start and end this much after the
        stimulus (given, or estimated by :func:`drifting_latency`)
    response : (cells, D, S, T)  the response measure used for tuning: ``|F1|`` for simple cells,
        ``F0`` for complex cells (common practice)
    pref_direction_deg : (cells,)  direction of the largest ``response`` at the preferred SF/TF
    dsi : (cells,)  ``(R_pref - R_opp) / (R_pref + R_opp)`` with ``R_opp`` (opposite direction,
        same SF/TF) clipped at 0; NaN if the opposite direction was not shown. ``R`` is F0 or the
        noise-bias-corrected F1 (a modulated cell's F1 otherwise carries a noise floor that is the same
        in both directions and pulls the DSI toward 0 in short recordings)
    dsi_ci_low, dsi_ci_high : (cells,)  95 % interval of ``dsi``, trials resampled (``_dsi_bootstrap``)
    p_value : (cells,)  ``min(1, k min(p_F0, p_F1, p_spont))`` (Bonferroni over the ``k`` tests that
        could be done): one-way ANOVA of the trial F0 across conditions; (Bonferroni over conditions)
        the F test of a non-zero vector-mean F1 against the pooled within-condition scatter; and the
        trials' response against the spontaneous windows (a cell driven equally by every condition,
        with an unmodulated response, is found only by this one): for spikes the pooled rates under a
        quasi-Poisson model (``_rate_difference_p``), for traces Welch's t test of the window levels
    responsive : (cells,) bool
    trace_tau_s : float  traces: the indicator decay used for F0 and F1 (NaN: none; spikes: NaN)
    """

    cell_ids: np.ndarray
    directions_deg: np.ndarray
    sfs_cpd: np.ndarray
    tfs_hz: np.ndarray
    trial_onset_s: np.ndarray
    trial_window_s: np.ndarray
    trial_condition: np.ndarray
    trial_f0: np.ndarray
    trial_f1: np.ndarray
    spontaneous: np.ndarray
    spontaneous_source: str
    f0_mean: np.ndarray
    f0_sem: np.ndarray
    f1_mean: np.ndarray
    f1_sem: np.ndarray
    f1_amp_mean: np.ndarray
    n_trials: np.ndarray
    pref_index: np.ndarray
    f1_f0: np.ndarray
    simple: np.ndarray
    response: np.ndarray
    pref_direction_deg: np.ndarray
    dsi: np.ndarray
    p_value: np.ndarray
    responsive: np.ndarray
    alpha: float
    trace_tau_s: float = float("nan")
    f1_f0_ci_low: np.ndarray = None
    f1_f0_ci_high: np.ndarray = None
    f1_f0_p_simple: np.ndarray = None
    grating_class: np.ndarray = None
    dsi_ci_low: np.ndarray = None
    dsi_ci_high: np.ndarray = None
    cell_tau_s: np.ndarray = None
    skip_cycles: int = 0
    latency_s: np.ndarray = None


def _spike_f1(spikes: Spikes, onset, end, tf):
    n_cells, n = spikes.cell_ids.size, onset.size
    out = np.zeros((n_cells, n), dtype=complex)
    t = spikes.time_s
    if t.size == 0 or n == 0:
        return out
    k, rows, pos = spikes_in_intervals(spikes, onset, end, return_index=True)
    theta = 2 * np.pi * tf[k] * (t[pos] - onset[k])
    idx = rows * n + k
    re = np.bincount(idx, weights=np.cos(theta), minlength=n_cells * n)
    im = np.bincount(idx, weights=-np.sin(theta), minlength=n_cells * n)
    return ((re + 1j * im).reshape(n_cells, n)) * (2.0 / (end - onset))[None, :]


def _trace_f1(traces: Traces, onset, end, tf, tau_s=float("nan"), harmonic=True):
    """F0 and F1 of every window from a trace by least squares on the samples inside it.

    Without an indicator decay (``tau_s`` NaN): ``a0 + a cos(theta) + b sin(theta)``,
    ``theta = 2 pi tf (t - onset)``; ``F0 = a0``, ``F1 = a - i b``. With a first-order indicator of
    decay ``tau`` (the trace is the drive low-passed by ``exp(-t / tau) / tau``), the drive
    ``u(t) = F0 + Re(F1 exp(i theta))`` switched on at the onset over a trace starting at level ``r0``
    gives exactly ``r(t) = F0 (1 - E) + r0 E + c (cos theta - E) + d sin theta`` with
    ``E = exp(-(t - onset) / tau)`` and ``F1 = (c - i d)(1 + i 2 pi tf tau)``: fitting these four terms
    returns the drive's F0 and F1, free of the rise at the onset and of the tail of earlier responses
    (the steady state alone would give ``F1 / (1 + i 2 pi tf tau)``). ``harmonic=False`` fits the
    mean (or ``F0 (1 - E) + r0 E``) only; F1 is then NaN.
    """
    times = traces.times_s
    vals = np.asarray(traces.values, dtype=np.float64)
    n_cells, n = vals.shape[0], onset.size
    k = np.searchsorted(onset, times, side="right") - 1
    ok = k >= 0
    ok[ok] &= times[ok] < end[k[ok]]
    sidx = np.flatnonzero(ok)
    k = k[ok]
    if sidx.size == 0:
        return np.full((n_cells, n), np.nan), np.full((n_cells, n), np.nan, dtype=complex)
    dt = times[sidx] - onset[k]
    theta = 2 * np.pi * tf[k] * dt
    decay = np.isfinite(tau_s) and tau_s > 0
    if decay:
        e = np.exp(-dt / tau_s)
        cols = [1.0 - e, e] + ([np.cos(theta) - e, np.sin(theta)] if harmonic else [])
    else:
        cols = [np.ones_like(theta)] + ([np.cos(theta), np.sin(theta)] if harmonic else [])
    g = np.stack(cols)                                                  # (m, samples)
    m = g.shape[0]
    v = vals[:, sidx]
    fin = np.isfinite(v)
    v0 = np.where(fin, v, 0.0)
    w = fin.astype(float)
    a = np.empty((n_cells, n, m, m))
    for p in range(m):
        for q in range(p, m):
            a[:, :, p, q] = a[:, :, q, p] = _group_sums(w * (g[p] * g[q])[None], k, n)
    rhs = np.stack([_group_sums(v0 * g[p][None], k, n) for p in range(m)], axis=-1)
    det = np.linalg.det(a)
    good = np.abs(det) > 1e-9 * np.maximum(np.abs(a[..., 0, 0]), 1.0) ** m
    if decay:
        # the scale of the (1 - E), E columns can be small in short windows: also require a
        # well-conditioned system
        cond = np.linalg.cond(np.where(good[..., None, None], a, np.eye(m)))
        good &= cond < 1e10
    coef = np.linalg.solve(np.where(good[..., None, None], a, np.eye(m)), rhs[..., None])[..., 0]
    f0 = np.where(good, coef[..., 0], np.nan)
    if not harmonic:
        return f0, np.full((n_cells, n), np.nan, dtype=complex)
    i0 = 2 if decay else 1
    f1 = coef[..., i0] - 1j * coef[..., i0 + 1]
    if decay:
        f1 = f1 * (1.0 + 2j * np.pi * tf * tau_s)[None, :]
    f1[~good] = np.nan
    return f0, f1


def _per_tau(fun, traces: Traces, cell_tau):
    """``fun(traces_subset, tau)`` for each group of cells sharing one decay, reassembled by cell.
    ``fun`` returns arrays with cells first."""
    tau = np.asarray(cell_tau, float)
    key = np.where(np.isfinite(tau), np.round(tau, 9), -1.0)
    outs = None
    for k in np.unique(key):
        sel = np.flatnonzero(key == k)
        sub = Traces(values=np.asarray(traces.values)[sel], times_s=traces.times_s)
        part = fun(sub, float(tau[sel[0]]) if k >= 0 else float("nan"))
        if outs is None:
            outs = [np.empty((tau.size,) + np.shape(p)[1:], dtype=np.asarray(p).dtype) for p in part]
        for o, p in zip(outs, part):
            o[sel] = p
    return tuple(outs)


def _per_tau_spont(traces: Traces, table, rows, cell_tau):
    """:func:`_spontaneous` with one decay per cell (cells grouped by decay)."""
    tau = np.asarray(cell_tau, float)
    key = np.where(np.isfinite(tau), np.round(tau, 9), -1.0)
    groups = [np.flatnonzero(key == k) for k in np.unique(key)]
    res = [_spontaneous(Traces(values=np.asarray(traces.values)[sel], times_s=traces.times_s), table, rows,
                        float(tau[sel[0]]) if key[sel[0]] >= 0 else float("nan")) for sel in groups]
    n = tau.size
    spont = np.empty(n)
    windows = np.empty((n, res[0][2].shape[1]))
    for sel, r in zip(groups, res):
        spont[sel] = r[0]
        windows[sel] = r[2]
    return spont, res[0][1], windows, res[0][3]


def _nanmean(a, axis):
    """Mean over ``axis`` leaving NaN out; NaN (without a warning) where nothing is finite."""
    f = np.isfinite(a)
    n = f.sum(axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, np.where(f, a, 0.0).sum(axis=axis) / np.maximum(n, 1), np.nan)


def _nanstd(a, axis):
    """Population standard deviation over ``axis`` leaving NaN out; NaN where nothing is finite."""
    m = np.expand_dims(_nanmean(a, axis), axis)
    return np.sqrt(_nanmean((a - m) ** 2, axis))


def estimate_decay_tau(traces: Traces, ends_s, next_onsets_s, max_window_s: float = 3.0,
                       skip_s: float = 0.1, per_cell: bool = False):
    """Decay time constant of the traces after stimulus offsets (e.g. a calcium indicator), seconds.

    The trace of every cell is averaged over offsets (aligned by sample), its late level subtracted
    and its level just after the offset normalised to 1; these curves are pooled over cells, weighted
    by the squared offset response, and ``A exp(-t / tau) + c`` is fitted from ``skip_s`` on (the
    response outlasts the stimulus by the response latency; the free ``c`` because with gaps of a few
    ``tau`` the late level still holds some of the decay, and subtracting it as if it were the
    baseline reads ``tau`` short). NaN when no cell has a clear offset response.

    ``per_cell=True`` returns ``(session_tau, cell_tau)``: the pooled value as above and, for every
    cell with a clear offset response (mean just after the offsets more than 4 standard errors from
    the late level), the same model fitted to its own curve, kept where it differs from the pooled
    value by more than 3 of its standard errors (NaN elsewhere: the pooled value serves; also where
    the fit runs into the bounds).
    """
    from scipy import optimize

    times = traces.times_s
    vals = np.asarray(traces.values, dtype=np.float64)
    nan_cells = np.full(vals.shape[0], np.nan)
    if per_cell:
        session_tau = estimate_decay_tau(traces, ends_s, next_onsets_s, max_window_s, skip_s)
        return session_tau, _cell_decay_taus(traces, ends_s, next_onsets_s, max_window_s, skip_s, nan_cells,
                                             session_tau)
    ends = np.asarray(ends_s, float)
    gaps = np.asarray(next_onsets_s, float) - ends
    if ends.size == 0 or times.size < 4:
        return float("nan")
    dt = float(np.median(np.diff(times)))
    win = min(max_window_s, float(np.median(gaps)))
    nb = int(np.floor(win / dt))
    if nb < 6:
        return float("nan")
    i0 = np.searchsorted(times, ends)
    keep = (i0 + nb < times.size) & (gaps >= win)
    if not keep.any():
        return float("nan")
    idx = i0[keep, None] + np.arange(nb)[None, :]
    t_rel = np.mean(times[idx] - ends[keep, None], axis=0)
    with np.errstate(invalid="ignore"):
        mean = _nanmean(vals[:, idx], axis=1)                         # (cells, nb)
        sem = _nanstd(vals[:, idx], axis=1) / np.sqrt(keep.sum())
    late = t_rel >= 0.8 * t_rel[-1]
    first = (t_rel >= skip_s) & (t_rel < skip_s + 2 * dt + 1e-12)
    if not late.any() or not first.any():
        return float("nan")
    base = _nanmean(mean[:, late], axis=1)
    amp = _nanmean(mean[:, first], axis=1) - base
    noise = _nanmean(sem[:, first], axis=1)
    good = np.isfinite(amp) & (np.abs(amp) > 4 * noise)
    if not good.any():
        return float("nan")
    curves = (mean[good] - base[good, None]) / amp[good, None]
    w = amp[good] ** 2
    pooled = np.nansum(curves * w[:, None], axis=0) / w.sum()
    use = t_rel >= skip_s
    t, y = t_rel[use] - skip_s, pooled[use]
    try:
        res = optimize.least_squares(lambda q: q[0] * np.exp(-t / q[1]) + q[2] - y, [1.0, max(win / 4, dt), 0.0],
                                     bounds=([0.0, dt / 4, -10.0], [10.0, 10 * win, 10.0]))
    except ValueError:
        return float("nan")
    tau = float(res.x[1])
    return tau if tau < 0.99 * 10 * win else float("nan")


def _cell_decay_taus(traces, ends_s, next_onsets_s, max_window_s, skip_s, out, pooled=np.nan):
    """Each cell's decay after the offsets (:func:`estimate_decay_tau`, ``per_cell``), into ``out``."""
    from scipy import optimize

    times = traces.times_s
    vals = np.asarray(traces.values, dtype=np.float64)
    ends = np.asarray(ends_s, float)
    gaps = np.asarray(next_onsets_s, float) - ends
    if ends.size == 0 or times.size < 4:
        return out
    dt = float(np.median(np.diff(times)))
    win = min(max_window_s, float(np.median(gaps)))
    nb = int(np.floor(win / dt))
    i0 = np.searchsorted(times, ends)
    keep = (i0 + nb < times.size) & (gaps >= win)
    if nb < 6 or not keep.any():
        return out
    idx = i0[keep, None] + np.arange(nb)[None, :]
    t_rel = np.mean(times[idx] - ends[keep, None], axis=0)
    with np.errstate(invalid="ignore"):
        mean = _nanmean(vals[:, idx], axis=1)
        sem = _nanstd(vals[:, idx], axis=1) / np.sqrt(keep.sum())
    late = t_rel >= 0.8 * t_rel[-1]
    first = (t_rel >= skip_s) & (t_rel < skip_s + 2 * dt + 1e-12)
    if not late.any() or not first.any():
        return out
    base = _nanmean(mean[:, late], axis=1)
    amp = _nanmean(mean[:, first], axis=1) - base
    noise = _nanmean(sem[:, first], axis=1)
    use = t_rel >= skip_s
    t = t_rel[use] - skip_s
    for c in np.flatnonzero(np.isfinite(amp) & (np.abs(amp) > 4 * noise)):
        y = (mean[c, use] - base[c]) / amp[c]
        ok = np.isfinite(y)
        if ok.sum() < 6:
            continue
        try:
            res = optimize.least_squares(lambda q: q[0] * np.exp(-t[ok] / q[1]) + q[2] - y[ok],
                                         [1.0, max(win / 4, dt), 0.0],
                                         bounds=([0.0, dt / 4, -10.0], [10.0, 10 * win, 10.0]))
        except ValueError:
            continue
        tau = float(res.x[1])
        if not dt / 4 * 1.01 < tau < 0.99 * 10 * win:
            continue
        # the cell's own value only where it differs from the pooled one beyond its standard error
        # (Gauss-Newton covariance of the fit, z > 3): cells sharing an indicator keep the pooled,
        # less noisy value
        J, r = res.jac, res.fun
        dof = max(int(ok.sum()) - 3, 1)
        try:
            se = float(np.sqrt(np.linalg.inv(J.T @ J)[1, 1] * (r @ r) / dof))
        except np.linalg.LinAlgError:
            continue
        if np.isfinite(se) and (not np.isfinite(pooled) or abs(tau - pooled) > 3 * se):
            out[c] = tau
    return out


def _rate_difference_p(trial_rates, trial_len, spont_rates, spont_len, trial_var, min_expected=10.0):
    """Two-sided p that the spike rate during trials differs from the spontaneous rate.

    Rates are pooled over time (spikes / seconds) on each side; under the null hypothesis both are one
    rate ``lam`` (estimated from both sides), and the counts are Poisson with the dispersion ``phi``
    seen across the trials of a condition (``trial_var`` = pooled within-condition variance of the
    trial rates, ``phi = trial_var * mean trial length / trial rate``, at least 1: a quasi-Poisson
    model, McCullagh & Nelder 1989, Generalized Linear Models, sec. 6.2), so the difference of the two
    rates has variance ``phi lam (1/T1 + 1/T2)``; normal approximation. NaN when fewer than
    ``min_expected`` spontaneous spikes are expected (the approximation and the spontaneous estimate
    are then poor; a sample variance of a few short windows of a slowly firing cell makes a t test
    call too many cells responsive)."""
    n_cells = trial_rates.shape[0]
    out = np.full(n_cells, np.nan)
    if spont_rates.shape[1] == 0 or trial_rates.shape[1] == 0:
        return out
    with np.errstate(invalid="ignore", divide="ignore"):
        f1, f2 = np.isfinite(trial_rates), np.isfinite(spont_rates)
        t1 = (f1 * trial_len[None, :]).sum(axis=1)
        t2 = (f2 * spont_len[None, :]).sum(axis=1)
        c1 = np.where(f1, trial_rates, 0.0) @ trial_len
        c2 = np.where(f2, spont_rates, 0.0) @ spont_len
        lam = (c1 + c2) / (t1 + t2)
        r1 = c1 / t1
        mean_len = t1 / f1.sum(axis=1)
        phi = np.where(np.isfinite(trial_var) & (r1 > 0), trial_var * mean_len / r1, 1.0)
        phi = np.maximum(np.where(np.isfinite(phi), phi, 1.0), 1.0)
        var = phi * lam * (1.0 / t1 + 1.0 / t2)
        z = (r1 - c2 / t2) / np.sqrt(var)
        p = 2.0 * stats.norm.sf(np.abs(z))
    ok = (t1 > 0) & (t2 > 0) & (lam * t2 >= min_expected) & (var > 0) & np.isfinite(p)
    out[ok] = p[ok]
    return out


def _welch_p(a, b, min_n=5):
    """Two-sided p of Welch's t test of the row means of ``a`` (cells, n) against ``b`` (cells, m),
    NaN entries left out (Welch 1947, Biometrika 34:28); NaN with fewer than ``min_n`` values or no
    spread on a side."""
    def moments(x):
        f = np.isfinite(x)
        n = f.sum(axis=1).astype(float)
        x0 = np.where(f, x, 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            m = x0.sum(axis=1) / n
            v = np.where(f, (x0 - m[:, None]) ** 2, 0.0).sum(axis=1) / (n - 1)
        return m, v, n
    if a.shape[1] == 0 or b.shape[1] == 0:
        return np.full(a.shape[0], np.nan)
    ma, va, na = moments(a)
    mb, vb, nb = moments(b)
    with np.errstate(invalid="ignore", divide="ignore"):
        qa, qb = va / na, vb / nb
        se2 = qa + qb
        t = (ma - mb) / np.sqrt(se2)
        df = se2**2 / (qa**2 / (na - 1) + qb**2 / (nb - 1))
        p = 2.0 * stats.t.sf(np.abs(t), df)
    return np.where((na >= min_n) & (nb >= min_n) & (va > 0) & (vb > 0) & np.isfinite(p), p, np.nan)


def _window_levels(responses, start, stop, tau_s):
    """Mean response in each window; for traces with an indicator decay, the drive's level (the fit
    of ``s (1 - E) + r0 E`` from the window start, see :func:`_trace_f1`), free of earlier tails."""
    if isinstance(responses, Spikes) or not (np.isfinite(tau_s) and tau_s > 0):
        return interval_responses(responses, start, stop).astype(float)
    order = np.argsort(start, kind="stable")
    lev, _ = _trace_f1(responses, start[order], stop[order], np.zeros(start.size), tau_s, harmonic=False)
    out = np.empty_like(lev)
    out[:, order] = lev
    return out


def _spontaneous(responses, table: GratingTable, drift_rows, tau_s=float("nan")):
    """Spontaneous level from blank rows outside flashed sequences, else from gaps between trials.

    Returns ``(mean level per cell, source, level of every window (cells, windows), window lengths)``."""
    blanks = np.flatnonzero(table.is_blank & ~flashed_rows(table))
    if blanks.size:
        blanks = blanks[np.argsort(table.onset_s[blanks], kind="stable")]
        b_on, b_off = table.onset_s[blanks].astype(float), table.offset_s[blanks].astype(float)
        r = _window_levels(responses, b_on, b_off, tau_s)
        with np.errstate(invalid="ignore"):
            return _nanmean(r, axis=1), "blanks", r, b_off - b_on
    on = table.onset_s[drift_rows]
    off = table.offset_s[drift_rows]
    if on.size > 1:
        gap = on[1:] - off[:-1]
        start = off[:-1] + gap / 2.0          # second half of each gap: responses have decayed,
        stop = on[1:] - gap / 10.0            # and clear of the next onset (smoothing, sampling)
        all_on = np.sort(table.onset_s)
        # no other presentation may start inside the gap
        inside = np.searchsorted(all_on, stop, side="left") - np.searchsorted(all_on, off[:-1], side="right")
        use = (gap >= 0.2) & (inside == 0)
        if use.any():
            r = _window_levels(responses, start[use].astype(float), stop[use].astype(float), tau_s)
            with np.errstate(invalid="ignore"):
                return (_nanmean(r, axis=1), "gaps", r,
                        (stop[use] - start[use]).astype(float))
    n = responses.cell_ids.size
    return np.full(n, np.nan), "none", np.full((n, 0), np.nan), np.zeros(0)


def analyze_drifting(responses: Spikes | Traces, table: GratingTable, alpha: float = 0.01,
                     trace_tau_s=None, skip_cycles: int = 1, latency_s="auto",
                     n_boot: int = 1000, rng=0, max_latency_s: float = 0.3) -> DriftingResult:
    """F0 and F1 of drifting-grating trials, per trial and per (direction, SF, TF) condition.

    Parameters
    ----------
    responses : Spikes or Traces
    table : GratingTable
        Rows with ``tf_hz != 0`` and ``contrast != 0`` are the trials.
    alpha : float
        Significance level for ``responsive``.
    trace_tau_s : float, optional
        Traces only: decay time constant of the indicator. The trace is a low-passed copy of the
        firing rate, which divides the first harmonic by ``1 + i 2 pi tf tau`` (a first-order
        low-pass) and leaves F0 alone, so F1/F0 of raw traces would call most simple cells complex;
        the rise at each onset also lowers F0 and the tail of the previous trial raises the
        spontaneous level. With ``tau`` the fit models all three (see ``_trace_f1``). ``None``
        estimates ``tau`` from the decay after trial offsets (:func:`estimate_decay_tau`); ``0``
        applies no correction. An array gives one decay per cell (e.g. the per-cell estimate of
        :func:`map2d.traces.decay_corrected`, so that maps, flashed and drifting gratings share one
        estimate; a NaN entry takes the session's estimate). The value used is
        ``DriftingResult.trace_tau_s`` (the median over cells) and ``DriftingResult.cell_tau_s``.
    skip_cycles : int
        Whole cycles left out at the start of each trial (default 1: the onset transient, common
        practice), as long as at least one whole cycle remains; a trial shorter than
        ``skip_cycles + 1`` cycles keeps all of it.
    latency_s : float
        The analysis window starts and ends this much after the stimulus (the response latency);
        F1's phase stays referred to the stimulus onset.
    n_boot : int
        Resamples of the trials for the interval of F1/F0 (0: no interval, ``grating_class`` empty).
    rng : numpy.random.Generator or int, optional
        Seed of the resampling.

    Returns
    -------
    DriftingResult

    Notes
    -----
    Spontaneous activity comes from blank rows (``contrast = 0``) that are not part of a flashed
    sequence; if there are none, from each gap of at least 0.2 s between consecutive trials in which
    nothing else was shown, from its middle to 90 % of its length (responses to the previous trial
    have decayed, and sampling or smoothing of the next onset does not reach in). For traces, the
    trial F0 is the drive's level from the same least-squares fit that gives F1, with the indicator's
    rise and tail modelled when its decay is known (``trace_tau_s``, else estimated from the offsets);
    the spontaneous windows are fitted the same way. For spikes F0 is the spike count over the window
    divided by its length. F1/F0 uses the preferred condition (largest
    ``F0 + |F1|``), chosen on other trials than those F1 and F0 are read from (cross-validated, see
    ``DriftingResult.f1_f0``); a ratio above 1 marks a simple cell (Skottun et al. 1991).
    """
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be in (0, 1), got {alpha}")
    rows = np.flatnonzero(table.is_drifting)
    if rows.size == 0:
        raise ValueError("table holds no drifting gratings (tf_hz != 0 with contrast)")
    rows = rows[np.argsort(table.onset_s[rows], kind="stable")]
    onset = table.onset_s[rows].astype(float)
    dur = (table.offset_s[rows] - table.onset_s[rows]).astype(float)
    tf_signed = table.tf_hz[rows].astype(float)
    tf = np.abs(tf_signed)
    direction = np.mod(np.round(np.mod(table.orientation_deg[rows] + np.where(tf_signed < 0, 180.0, 0.0),
                                       360.0), _ROUND), 360.0)
    sf = np.round(table.sf_cpd[rows].astype(float), 9)
    tfr = np.round(tf, 9)
    if int(skip_cycles) < 0:
        raise ValueError(f"skip_cycles must be >= 0, got {skip_cycles}")
    n_resp = responses.cell_ids.size
    if isinstance(latency_s, str):
        if latency_s != "auto":
            raise ValueError(f"latency_s must be 'auto', a number or one number per cell, got {latency_s!r}")
        lat = np.full(n_resp, np.nan)
    else:
        lat = np.asarray(latency_s, float)
        if lat.ndim == 0:
            lat = np.full(n_resp, float(lat))
        if lat.shape != (n_resp,):
            raise ValueError(f"latency_s must be one number or one per cell ({n_resp}), got shape {lat.shape}")
        if np.any(lat[np.isfinite(lat)] < 0) or np.any(np.isinf(lat)):
            raise ValueError("latency_s must be >= 0 seconds")
    if isinstance(responses, Spikes):
        # only the spikes of the drifting block are read (trials, their latency shift, spontaneous
        # windows): every pass below touches those alone, the same spikes in the same order
        responses = _drifting_spikes(responses, table, rows,
                                     max(float(max_latency_s), float(np.nanmax(lat, initial=0.0))))
    if np.isnan(lat).any():
        # estimate where not given: the cells responsive with unshifted windows (so the choice of the
        # latency cannot make a cell responsive) get the lag that maximises their drifting response
        # (drifting_latency); the others keep 0
        first = analyze_drifting(responses, table, alpha=alpha, trace_tau_s=trace_tau_s, skip_cycles=skip_cycles,
                                 latency_s=np.where(np.isnan(lat), 0.0, lat), n_boot=0)
        est = np.zeros(n_resp)
        resp = first.responsive & np.isnan(lat)
        if resp.any():
            est[resp] = drifting_latency(_subset(responses, resp), table, first.cell_tau_s[resp],
                                         first.spontaneous[resp], max_latency_s)
        return analyze_drifting(responses, table, alpha=alpha, trace_tau_s=first.cell_tau_s,
                                skip_cycles=skip_cycles, latency_s=np.where(np.isnan(lat), est, lat),
                                n_boot=n_boot, rng=rng)
    n_cycles = np.floor(dur * tf + 1e-6)
    skip = np.where(n_cycles >= int(skip_cycles) + 1, int(skip_cycles), 0)
    tf_safe = np.where(tf > 0, tf, 1)
    window = np.where(n_cycles >= 1, (n_cycles - skip) / tf_safe, dur)
    start = onset + skip / tf_safe      # whole cycles: the phase is unchanged; each cell's latency added below
    stim_onset = onset
    onset = start

    dirs, sfs, tfs = np.unique(direction), np.unique(sf), np.unique(tfr)
    di, si, ti = _index(direction, dirs), _index(sf, sfs), _index(tfr, tfs)
    n_d, n_s, n_t = dirs.size, sfs.size, tfs.size
    n_groups = n_d * n_s * n_t
    cond = (di * n_s + si) * n_t + ti

    if isinstance(responses, Spikes):
        tau = float("nan")
        cell_tau = np.full(responses.cell_ids.size, np.nan)
    else:
        given = None if trace_tau_s is None else np.asarray(trace_tau_s, float)
        own = None
        if given is None or given.ndim == 1 and not np.isfinite(given).all():
            nxt = np.append(stim_onset[1:], np.inf)
            session_tau, own = estimate_decay_tau(responses, table.offset_s[rows], nxt, per_cell=True)
        else:
            session_tau = float("nan")
        if given is None:       # each cell's own decay after the offsets, the pooled one where unclear
            cell_tau = np.where(np.isfinite(own), own, session_tau)
        elif given.ndim == 0:
            cell_tau = np.full(responses.values.shape[0], float(given))
        else:
            if given.shape != (responses.values.shape[0],):
                raise ValueError(f"trace_tau_s must be one number or one per cell "
                                 f"({responses.values.shape[0]}), got shape {given.shape}")
            cell_tau = np.where(np.isfinite(given), given, session_tau)
        fin_tau = cell_tau[np.isfinite(cell_tau)]
        tau = float(np.median(fin_tau)) if fin_tau.size else float("nan")
    # each cell's windows start and end its latency after the stimulus
    if isinstance(responses, Spikes):
        # a spike at t of a cell with latency L is in the window [s + L, e + L) when t - L is in [s, e):
        # every cell's spikes moved back by its latency share one set of windows
        moved = responses
        if np.any(lat != 0):
            t = responses.time_s
            t_m = t - lat[cell_index(responses)]
            if np.all(t[1:] >= t[:-1]):   # each cell's spikes stay in their order: no sort needed
                moved = Spikes(time_s=t_m, cell=responses.cell, cell_ids=responses.cell_ids)
            else:
                o = np.argsort(t_m, kind="stable")
                moved = Spikes(time_s=t_m[o], cell=responses.cell[o], cell_ids=responses.cell_ids)
        raw = interval_responses(moved, onset, onset + window).astype(float)
        trial_f1 = _spike_f1(moved, onset, onset + window, tf) * np.exp(-2j * np.pi * tf[None, :] * lat[:, None])
    else:                                                   # traces: cells sharing a latency together
        raw = np.empty((n_resp, onset.size))
        trial_f1 = np.empty((n_resp, onset.size), dtype=complex)
        for value in np.unique(lat):
            sel = lat == value
            st, en = onset + value, onset + value + window
            r_, f_ = _per_tau(lambda tr, t: _trace_f1(tr, st, en, tf, t), _subset(responses, sel), cell_tau[sel])
            raw[sel], trial_f1[sel] = r_, f_ * np.exp(-2j * np.pi * tf * value)[None, :]
    spont, source, spont_windows, spont_len = (
        _spontaneous(responses, table, rows, tau) if isinstance(responses, Spikes)
        else _per_tau_spont(responses, table, rows, cell_tau))
    # refer each trial's F1 to stimulus phase 0 at onset: a grating started at phase p shifts the
    # response by p (F1 ~ exp(-i p) for tf > 0, exp(+i p) for tf < 0), so that without this trials of
    # one condition shown at different start phases cancel in the vector mean
    trial_f1 = trial_f1 * np.exp(1j * np.sign(tf_signed) * np.deg2rad(table.phase_deg[rows].astype(float)))[None, :]
    # the window started later than the stimulus (whole cycles skipped, and the latency above): F1
    # referred to the onset
    trial_f1 = trial_f1 * np.exp(-2j * np.pi * tf * (onset - stim_onset))[None, :]
    trial_f0 = raw - np.where(np.isfinite(spont), spont, 0.0)[:, None]
    n_cells = trial_f0.shape[0]

    fin0 = np.isfinite(trial_f0)
    fin1 = np.isfinite(trial_f1)
    no_nan0, no_nan1 = bool(fin0.all()), bool(fin1.all())
    s0, q0, n0, ssb0, ssw0, k0, nt0 = _grouped_anova(np.where(fin0, trial_f0, 0.0), fin0, cond, n_groups, no_nan0)
    f1r = np.where(fin1, trial_f1.real, 0.0)
    f1i = np.where(fin1, trial_f1.imag, 0.0)
    sr, qr, n1, _, sswr, k1, nt1 = _grouped_anova(f1r, fin1, cond, n_groups, no_nan1)
    si_, qi, _, _, sswi, _, _ = _grouped_anova(f1i, fin1, cond, n_groups, no_nan1)
    amp = _group_sums(np.where(fin1, np.abs(trial_f1), 0.0), cond, n_groups)

    with np.errstate(invalid="ignore", divide="ignore"):
        m0 = np.where(n0 > 0, s0 / np.maximum(n0, 1), np.nan)
        var0 = np.where(n0 > 1, (q0 - n0 * m0**2) / np.maximum(n0 - 1, 1), np.nan)
        sem0 = np.sqrt(np.maximum(var0, 0.0) / n0)
        mr = np.where(n1 > 0, sr / np.maximum(n1, 1), np.nan)
        mi = np.where(n1 > 0, si_ / np.maximum(n1, 1), np.nan)
        varr = np.where(n1 > 1, (qr - n1 * mr**2) / np.maximum(n1 - 1, 1), np.nan)
        vari = np.where(n1 > 1, (qi - n1 * mi**2) / np.maximum(n1 - 1, 1), np.nan)
        sem1 = np.sqrt(np.maximum(varr + vari, 0.0) / n1)
        amp_mean = np.where(n1 > 0, amp / np.maximum(n1, 1), np.nan)
    f1m = mr + 1j * mi
    # noise bias of |vector mean|: E|m|^2 = |F1|^2 + (var re + var im) / n, removed with the condition's
    # own variance (the pooled within-condition variance for a condition with one trial; none if
    # nothing can be estimated)
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = (sswr + sswi) / np.where(nt1 - k1 > 0, nt1 - k1, np.nan)          # var re + var im
        bias = np.where(n1 > 1, sem1**2, pooled[:, None] / n1)
        f1a = np.sqrt(np.maximum(np.abs(f1m) ** 2 - np.where(np.isfinite(bias), bias, 0.0), 0.0))

    shape = (n_cells, n_d, n_s, n_t)
    # preferred condition, class, F1/F0
    score = m0 + f1a
    valid = np.isfinite(score)
    pref = np.where(valid.any(axis=1), np.argmax(np.where(valid, score, -np.inf), axis=1), -1)
    rows_c = np.arange(n_cells)
    pf0 = np.where(pref >= 0, m0[rows_c, np.maximum(pref, 0)], np.nan)
    pf1 = np.where(pref >= 0, f1a[rows_c, np.maximum(pref, 0)], np.nan)
    # F1/F0 at a preferred condition chosen on other trials than it is read from, averaged over
    # N_SPLITS splits of each condition's trials into two folds (_cross_validated_f1_f0); with one
    # trial per condition nothing can be held out and the in-sample values are kept
    if np.bincount(cond).max() >= 2:
        split = _split_folds(cond, N_SPLITS, np.random.default_rng(0), resample=False)
        f0s, f1sq = _cross_validated_f1_f0(*_fold_sums(trial_f0, trial_f1, _fold_layout(cond, split)),
                                           _condition_f1_var(trial_f0, trial_f1, cond, pooled))
        pf0, pf1 = _nanmean(f0s, axis=0), _f1_and_ratio(np.nan, _nanmean(f1sq, axis=0))[0]
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(pf0 > 0, pf1 / pf0, np.nan)
    simple = np.isfinite(pf1) & (pf1 > np.where(np.isfinite(pf0), pf0, np.inf))
    boot_rng = np.random.default_rng(rng)                 # F1/F0 intervals (below, responsive cells)
    rng = np.random.default_rng(rng).integers(2**32)      # a separate stream for the DSI intervals
    response = np.where(simple[:, None], f1a, m0)

    pref_idx = np.full((n_cells, 3), -1, dtype=np.int64)
    ok = pref >= 0
    pref_idx[ok, 0] = pref[ok] // (n_s * n_t)
    pref_idx[ok, 1] = (pref[ok] // n_t) % n_s
    pref_idx[ok, 2] = pref[ok] % n_t

    # direction preference and DSI at the preferred SF and TF
    resp4 = response.reshape(shape)
    pref_dir, dsi, dsi_lo, dsi_hi = _direction_selectivity(resp4, pref_idx, dirs, trial_f0, trial_f1, cond, simple,
                                                           int(n_boot), np.random.default_rng(rng))

    # significance: F0 ANOVA and F1 vector-mean F test
    with np.errstate(invalid="ignore", divide="ignore"):
        df_b, df_w = k0 - 1, nt0 - k0
        f_stat = (ssb0 / np.maximum(df_b, 1)) / (ssw0 / np.maximum(df_w, 1))
        p_f0 = np.where((df_b > 0) & (df_w > 0) & (ssw0 > 0), stats.f.sf(f_stat, df_b, df_w), np.nan)
        p_f0 = np.where((df_b > 0) & (df_w > 0) & (ssw0 == 0) & (ssb0 > 0), 0.0, p_f0)
        dfw1 = nt1 - k1
        sigma2 = (sswr + sswi) / np.maximum(2 * dfw1, 1)   # per-component variance
        f1_stat = n1 * (mr**2 + mi**2) / (2 * sigma2[:, None])
        p_each = stats.f.sf(f1_stat, 2, np.maximum(2 * dfw1, 1)[:, None])
        p_each = np.where((n1 > 0) & (dfw1[:, None] > 0) & (sigma2[:, None] > 0), p_each, np.nan)
        n_tested = np.isfinite(p_each).sum(axis=1)
        p_f1 = np.where(n_tested > 0, np.minimum(1.0, np.nanmin(np.where(np.isfinite(p_each), p_each, np.inf),
                                                                 axis=1) * n_tested), np.nan)
        if isinstance(responses, Spikes):
            var_w = ssw0 / np.maximum(df_w, 1)            # pooled within-condition variance of trial rates
            p_sp = _rate_difference_p(raw, window, spont_windows, spont_len,
                                      np.where(df_w > 0, var_w, np.nan))
        else:
            p_sp = _welch_p(raw, spont_windows)
        both = np.stack([p_f0, p_f1, p_sp])
        fin_p = np.isfinite(both)
        n_tests = fin_p.sum(axis=0)
        pmin = np.where(n_tests > 0, np.nanmin(np.where(fin_p, both, np.inf), axis=0), np.nan)
        p_value = np.minimum(1.0, n_tests * pmin)
    responsive = np.isfinite(p_value) & (p_value < alpha)
    # the interval of F1/F0 only where a class can be given (a responsive cell): it is the costly part
    ci_lo, ci_hi, p_simple = (np.full(n_cells, np.nan) for _ in range(3))
    if responsive.any():
        ci_lo[responsive], ci_hi[responsive], p_simple[responsive] = _f1_f0_bootstrap(
            trial_f0[responsive], trial_f1[responsive], cond, pooled[responsive], int(n_boot), boot_rng)
    grating_class = np.full(n_cells, "", dtype=object)
    grating_class[responsive & (ci_lo > 1.0)] = "simple"
    grating_class[responsive & (ci_hi < 1.0)] = "complex"

    return DriftingResult(
        cell_ids=np.asarray(responses.cell_ids), directions_deg=dirs, sfs_cpd=sfs, tfs_hz=tfs,
        trial_onset_s=onset, trial_window_s=window, trial_condition=np.stack([di, si, ti], axis=1),
        trial_f0=trial_f0, trial_f1=trial_f1, spontaneous=spont, spontaneous_source=source,
        f0_mean=m0.reshape(shape), f0_sem=sem0.reshape(shape), f1_mean=f1m.reshape(shape),
        f1_sem=sem1.reshape(shape), f1_amp_mean=amp_mean.reshape(shape), n_trials=n0.reshape(shape),
        pref_index=pref_idx, f1_f0=ratio, simple=simple, response=resp4, pref_direction_deg=pref_dir,
        dsi=dsi, p_value=p_value, responsive=responsive, alpha=float(alpha), trace_tau_s=float(tau),
        f1_f0_ci_low=ci_lo, f1_f0_ci_high=ci_hi, f1_f0_p_simple=p_simple, grating_class=grating_class,
        dsi_ci_low=dsi_lo, dsi_ci_high=dsi_hi,
        cell_tau_s=cell_tau, skip_cycles=int(skip_cycles), latency_s=lat)


def _drifting_spikes(spikes: Spikes, table: GratingTable, rows, max_shift_s: float) -> Spikes:
    """The spikes a drifting analysis can read: from the first onset of the trials ``rows`` or of the
    blanks outside flashed sequences (spontaneous windows, :func:`_spontaneous`) to their last offset
    plus ``max_shift_s`` (latency) and a second of margin, in their order. A slice when the spike
    times are sorted (the usual case), else a mask."""
    use = np.zeros(len(table), bool)
    use[rows] = True
    use |= table.is_blank & ~flashed_rows(table)
    t0 = float(np.min(table.onset_s[use]))
    t1 = float(np.max(table.offset_s[use])) + max_shift_s + 1.0
    t = spikes.time_s
    if t.size and np.all(t[1:] >= t[:-1]):
        a, b = np.searchsorted(t, [t0, t1], side="left")
        if a == 0 and b == t.size:
            return spikes
        keep = slice(a, b)
    else:
        keep = (t >= t0) & (t < t1)
    return Spikes(time_s=t[keep], cell=spikes.cell[keep], cell_ids=spikes.cell_ids)


def _subset(responses, sel):
    """The cells ``sel`` (boolean mask) of spikes or traces."""
    sel = np.asarray(sel, bool)
    if sel.all():
        return responses
    if isinstance(responses, Spikes):
        ids = responses.cell_ids[sel]
        keep = np.isin(responses.cell, ids)
        return Spikes(time_s=responses.time_s[keep], cell=responses.cell[keep], cell_ids=ids)
    ids = None if responses.ids is None else np.asarray(responses.ids)[sel]
    return Traces(values=np.asarray(responses.values)[sel], times_s=responses.times_s, ids=ids)


def drifting_latency(responses: Spikes | Traces, table: GratingTable, cell_tau_s=None, spontaneous=None,
                     max_latency_s: float = 0.3, step_s: float = 0.01) -> np.ndarray:
    """Response latency of each cell to drifting gratings (s): the lag that maximises its response.

    Windows as long as the whole cycles of each trial (from the stimulus onset, no cycle skipped) are
    slid by lags ``0, step_s, ...`` up to ``max_latency_s`` (at most half the shortest trial and 90 %
    of the shortest gap between trials); at each lag the condition means of F0 (minus
    ``spontaneous``) and F1 (referred to the stimulus onset) give the response power
    ``sum_c n_c (F0_c^2 + |F1_c|^2 / 2)`` (Parseval: the power of the mean response's constant and
    first-harmonic parts). A response that starts ``L`` after the onset and stops ``L`` after the
    offset fills the window entirely only at lag ``L``: earlier windows hold spontaneous activity at
    their start, later ones the silence after the offset. Spikes are binned at ``step_s``; traces use
    the drive ``r + tau dr/dt`` of a first-order indicator of decay ``tau`` (``cell_tau_s``, per cell;
    NaN: the trace itself), binned at the sampling interval when that is coarser.
    """
    rows = np.flatnonzero(table.is_drifting)
    rows = rows[np.argsort(table.onset_s[rows], kind="stable")]
    on = table.onset_s[rows].astype(float)
    off = table.offset_s[rows].astype(float)
    dur = off - on
    tf_signed = table.tf_hz[rows].astype(float)
    tf = np.abs(tf_signed)
    n_cyc = np.floor(dur * tf + 1e-6)
    w_full = np.where(n_cyc >= 1, n_cyc / np.where(tf > 0, tf, 1.0), dur)
    gaps = on[1:] - off[:-1]
    limit = min(float(max_latency_s), 0.5 * float(dur.min()),
                0.9 * float(gaps.min()) if gaps.size and gaps.min() > 0 else np.inf)
    n_cells = responses.cell_ids.size
    if isinstance(responses, Traces) and responses.times_s.size > 1:
        step_s = max(step_s, float(np.median(np.diff(responses.times_s))))
    n_lag = int(np.floor(max(limit, 0.0) / step_s + 1e-9)) + 1
    if n_cells == 0 or n_lag < 2:
        return np.zeros(n_cells)
    direction = np.mod(np.round(np.mod(table.orientation_deg[rows] + np.where(tf_signed < 0, 180.0, 0.0), 360.0),
                                _ROUND), 360.0)
    key = np.stack([direction, np.round(table.sf_cpd[rows].astype(float), 9), np.round(tf, 9),
                    np.round(w_full, 9)], axis=1)
    _, group = np.unique(key, axis=0, return_inverse=True)
    group = group.ravel()
    n_g = np.bincount(group).astype(float)
    w_g = np.bincount(group, weights=w_full) / n_g
    tf_g = np.bincount(group, weights=tf) / n_g
    n_win = np.round(w_g / step_s).astype(int)               # window length in bins, per condition
    n_bins = int(n_win.max()) + n_lag
    phase_ref = np.exp(1j * np.sign(tf_signed) * np.deg2rad(table.phase_deg[rows].astype(float)))
    G = n_g.size
    spont = np.zeros(n_cells) if spontaneous is None else np.where(np.isfinite(spontaneous), spontaneous, 0.0)
    lags = np.arange(n_lag)
    hi = lags[None, :] + n_win[:, None]                          # (G, lags)
    gi = np.arange(G)[:, None]
    norm = (n_g * w_g)[None, :, None]

    def power_of(h0, h1, sp):
        """(cells, G, bins) histograms of the response and of its first harmonic -> (cells, lags)."""
        c0 = np.concatenate([np.zeros(h0.shape[:2] + (1,)), np.cumsum(h0, axis=2)], axis=2)
        c1 = np.concatenate([np.zeros(h1.shape[:2] + (1,), complex), np.cumsum(h1, axis=2)], axis=2)
        f0 = (c0[:, gi, hi] - c0[:, gi, lags[None, :]]) / norm - sp[:, None, None]
        f1 = 2.0 * (c1[:, gi, hi] - c1[:, gi, lags[None, :]]) / norm
        return (n_g[None, :, None] * (f0**2 + 0.5 * np.abs(f1) ** 2)).sum(axis=1)

    power = np.empty((n_cells, n_lag))
    size = G * n_bins
    block = max(1, int(2e6 // size))                             # cells per block (memory)
    if isinstance(responses, Spikes):
        t = responses.time_s
        k = np.searchsorted(on, t, side="right") - 1
        u = t - on[np.maximum(k, 0)]
        ok = (k >= 0) & (u < n_bins * step_s)
        cell, k, u = cell_index(responses)[ok], k[ok], u[ok]
        if n_cells > block:          # blocks of cells (one block: each cell's spikes in order already)
            order = np.argsort(cell, kind="stable")
            cell, k, u = cell[order], k[order], u[order]
        col = group[k] * n_bins + np.minimum(np.floor(u / step_s + 1e-6).astype(int), n_bins - 1)
        e1 = np.exp(-2j * np.pi * tf[k] * u) * phase_ref[k]
        for i in range(0, n_cells, block):
            lo, up = np.searchsorted(cell, [i, i + block]) if n_cells > block else (0, cell.size)
            m = min(block, n_cells - i)
            flat = (cell[lo:up] - i) * size + col[lo:up]
            h0 = np.bincount(flat, minlength=m * size).reshape(m, G, n_bins).astype(float)
            h1 = (np.bincount(flat, weights=e1[lo:up].real, minlength=m * size)
                  + 1j * np.bincount(flat, weights=e1[lo:up].imag, minlength=m * size)).reshape(m, G, n_bins)
            power[i:i + m] = power_of(h0, h1, spont[i:i + m])
    else:
        times = responses.times_s
        vals = np.asarray(responses.values, float)
        dt = np.gradient(times) if times.size > 1 else np.ones(times.size)
        tau = np.zeros(n_cells) if cell_tau_s is None else np.where(np.isfinite(cell_tau_s), cell_tau_s, 0.0)
        k = np.searchsorted(on, times, side="right") - 1
        u = times - on[np.maximum(k, 0)]
        idx = np.flatnonzero((k >= 0) & (u < n_bins * step_s))
        k, u = k[idx], u[idx]
        col = group[k] * n_bins + np.minimum(np.floor(u / step_s + 1e-6).astype(int), n_bins - 1)
        rows_i = np.arange(idx.size)
        m0 = sparse.csr_matrix((dt[idx], (rows_i, col)), shape=(idx.size, size))
        m1 = sparse.csr_matrix((dt[idx] * np.exp(-2j * np.pi * tf[k] * u) * phase_ref[k], (rows_i, col)),
                               shape=(idx.size, size))
        for i in range(0, n_cells, block):
            v = vals[i:i + block]
            deriv = np.gradient(v, times, axis=1) if times.size > 1 else np.zeros_like(v)
            drive = np.nan_to_num(v + tau[i:i + block, None] * deriv)[:, idx]     # the indicator's decay undone
            m = drive.shape[0]
            h0 = np.asarray(m0.T @ drive.T).T.reshape(m, G, n_bins)
            h1 = np.asarray(m1.T @ drive.T).T.reshape(m, G, n_bins)
            power[i:i + m] = power_of(h0, h1, spont[i:i + m])
    return np.argmax(power, axis=1) * step_s


def _direction_selectivity(resp4, pref_idx, dirs, trial_f0, trial_f1, cond, simple, n_boot, rng):
    """Preferred direction, DSI and its interval (:func:`_dsi_bootstrap`) of every cell, at its preferred
    SF and TF (``pref_idx``, -1: none): the direction of the largest response (``resp4`` (cells,
    directions, SFs, TFs)) and ``(R_pref - R_opp) / (R_pref + R_opp)`` with the opposite direction's
    response clipped at 0, where the opposite direction was shown and ``R_pref > 0``.
    Returns ``(pref_dir, dsi, dsi_low, dsi_high)`` (cells,)."""
    n_cells, n_d, n_s, n_t = resp4.shape
    pref_dir, dsi, lo, hi = (np.full(n_cells, np.nan) for _ in range(4))
    cells = np.flatnonzero(pref_idx[:, 0] >= 0)
    curve = resp4[cells, :, pref_idx[cells, 1], pref_idx[cells, 2]]                     # (m, directions)
    fin = np.isfinite(curve)
    has = fin.any(axis=1)
    i = np.argmax(np.where(fin, curve, -np.inf), axis=1)                                 # as nanargmax
    pref_dir[cells[has]] = dirs[i[has]]
    # the opposite of each direction shown (-1: not shown)
    near = np.abs(np.mod(dirs[None, :] - dirs[:, None] - 180.0 + 180.0, 360.0) - 180.0) < 1e-6
    opp_of = np.where(near.any(axis=1), np.argmax(near, axis=1), -1)
    o = opp_of[i]
    rows = np.arange(cells.size)
    r_pref, r_opp = curve[rows, i], curve[rows, np.maximum(o, 0)]
    sel = has & (o >= 0) & np.isfinite(r_opp) & (r_pref > 0)
    rn = np.maximum(r_opp[sel], 0.0)
    dsi[cells[sel]] = (r_pref[sel] - rn) / (r_pref[sel] + rn)
    c = cells[sel]
    st = pref_idx[c, 1] * n_t + pref_idx[c, 2]
    lo[c], hi[c] = _dsi_bootstrap(trial_f0[c], trial_f1[c], cond, i[sel] * n_s * n_t + st, o[sel] * n_s * n_t + st,
                                  np.asarray(simple, bool)[c], dsi[c], n_boot, rng)
    return pref_dir, dsi, lo, hi


def _dsi_bootstrap(f0, f1, cond, pref, opp, use_f1, estimate, n_boot, rng, level=0.95):
    """95 % interval of the DSI, resampling the trials of the preferred and the opposite direction.

    Each resample recomputes both responses as the point estimate does (mean F0, or the noise-bias-
    corrected F1 for a cell whose preferred response is modulated) and the DSI with the opposite
    response clipped at 0; the interval is the union of the percentile and the basic bootstrap
    intervals (conservative, as for the circular variance; Davison & Hinkley 1997, sec. 5.2), clipped
    to [0, 1]. NaN with fewer than 3 trials on a side or ``n_boot = 0``.

    All cells at once: ``f0``, ``f1`` (cells, trials), ``pref``, ``opp`` (the two conditions), ``use_f1``,
    ``estimate`` (cells,). The draws follow the cells in order (the preferred side, then the opposite
    one; none after a side with too few trials), one stream ``rng``. Returns ``(low, high)`` (cells,).
    """
    m = f0.shape[0]
    lo, hi = np.full(m, np.nan), np.full(m, np.nan)
    if n_boot <= 0 or m == 0:
        return lo, hi
    fin = np.isfinite(f0) & np.isfinite(f1)
    members = {k: np.flatnonzero(cond == k) for k in np.unique(np.concatenate([pref, opp]))}
    picks = [[None, None] for _ in range(m)]              # (trial indices, draws) per cell and side
    for c in range(m):
        if not np.isfinite(estimate[c]):
            continue
        for h, k in enumerate((pref[c], opp[c])):
            idx = members[k]
            idx = idx[fin[c, idx]]
            if idx.size < 3:
                break
            picks[c][h] = (idx, rng.integers(0, idx.size, (n_boot, idx.size)))
    done = np.array([p[1] is not None for p in picks], bool)
    rs = np.full((2, m, n_boot), np.nan)
    for h in (0, 1):
        # cells whose side has the same number of trials are resampled together
        sizes = np.array([p[h][0].size if done[c] else 0 for c, p in enumerate(picks)])
        for n in np.unique(sizes[done]):
            cs = np.flatnonzero(done & (sizes == n))
            trials = np.stack([picks[c][h][0][picks[c][h][1]] for c in cs])      # (cells, n_boot, n)
            if use_f1[cs].any():
                f = cs[use_f1[cs]]
                z = f1[f[:, None, None], trials[use_f1[cs]]]
                v = (z.real.var(axis=2, ddof=1) + z.imag.var(axis=2, ddof=1)) / n
                rs[h, f] = np.sqrt(np.maximum(np.abs(z.mean(axis=2)) ** 2 - v, 0.0))
            if (~use_f1[cs]).any():
                f = cs[~use_f1[cs]]
                rs[h, f] = f0[f[:, None, None], trials[~use_f1[cs]]].mean(axis=2)
    rp, rn = rs[0], np.maximum(rs[1], 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.where(rp > 0, (rp - rn) / (rp + rn), np.nan)
    n_fin = np.isfinite(d).sum(axis=1)
    use = done & (n_fin >= max(1, n_boot // 2))
    a = (1.0 - level) / 2.0
    q = np.full((2, m), np.nan)
    whole = use & (n_fin == n_boot)
    if whole.any():
        q[:, whole] = np.quantile(d[whole], [a, 1.0 - a], axis=1)
    for c in np.flatnonzero(use & ~whole):
        q[:, c] = np.quantile(d[c][np.isfinite(d[c])], [a, 1.0 - a])
    est = np.asarray(estimate, float)
    lo = np.where(use, np.clip(np.minimum(q[0], 2 * est - q[1]), 0.0, 1.0), np.nan)
    hi = np.where(use, np.clip(np.maximum(q[1], 2 * est - q[0]), 0.0, 1.0), np.nan)
    return lo, hi


def _f1_f0_bootstrap(trial_f0, trial_f1, cond, pooled, n_boot, rng, level=0.95):
    """Percentile interval of the cross-validated F1/F0 (:func:`_cross_validated_f1_f0`), the preferred
    condition chosen again in every resample.

    Each resample shuffles the trials of every condition, deals them alternately into two folds and
    draws each fold's trials with replacement (:func:`_split_folds`); F0, F1 and the choice of the
    preferred condition in each fold are then recomputed exactly as for the estimate, so the interval
    carries the uncertainty of which condition is preferred (a cell with no preferred condition is
    not read at its luckiest one). A resample with ``F0 <= 0`` and ``F1 > 0`` counts as a ratio above
    any bound. ``p_simple`` is the share of resamples with ``F1/F0 <= 1`` (bootstrap test of
    ``F1/F0 > 1``; Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 13 and 16). NaN when
    fewer than half the resamples give a ratio (e.g. one trial per condition) or ``n_boot = 0``.
    """
    n_cells = trial_f0.shape[0]
    lo, hi, p = (np.full(n_cells, np.nan) for _ in range(3))
    if n_boot <= 0 or cond.size == 0:
        return lo, hi, p
    rng = np.random.default_rng(rng)
    layout = _fold_layout(cond, _split_folds(cond, int(n_boot), rng), np.float32)    # ratios: single precision
    var = _condition_f1_var(trial_f0, trial_f1, cond, pooled)
    # the variance of a fold's mean in these resamples: k draws with replacement from a random k of a
    # condition's n trials have variance var (2 k n - n - k^2) / (n k^2) about the trials' mean (not
    # var / k: with n = 3 and k = 1 it is 2/3 var), which is what the noise correction must remove
    n_c = np.bincount(np.searchsorted(np.unique(cond), cond)).astype(float)
    k = np.stack([np.ceil(n_c / 2), np.floor(n_c / 2)], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(k > 0, (2 * k * n_c[:, None] - n_c[:, None] - k**2) / (n_c[:, None] * k**2), np.nan).T
    r = np.empty((int(n_boot), n_cells))
    step = max(1, int(2e6 // (int(n_boot) * np.unique(cond).size * 2)))          # cells per block (memory)
    for i in range(0, n_cells, step):
        sl = slice(i, i + step)
        r[:, sl] = _f1_and_ratio(*_cross_validated_f1_f0(*_fold_sums(trial_f0[sl], trial_f1[sl], layout), var[sl],
                                                          scale))[1]
    a = (1.0 - level) / 2.0
    n_ok = (~np.isnan(r)).sum(axis=0)
    whole = n_ok == r.shape[0]                            # no NaN resample: all such cells at once
    if whole.any():
        lo[whole], hi[whole] = np.quantile(r[:, whole], [a, 1.0 - a], axis=0, method="inverted_cdf")
        p[whole] = np.mean(r[:, whole] <= 1.0, axis=0)
    for c in np.flatnonzero((n_ok >= max(1, n_boot // 2)) & ~whole):
        rc = r[~np.isnan(r[:, c]), c]
        lo[c], hi[c] = np.quantile(rc, [a, 1.0 - a], method="inverted_cdf")   # no interpolation: inf allowed
        p[c] = float(np.mean(rc <= 1.0))
    return lo, hi, p


def _condition_f1_var(trial_f0, trial_f1, cond, pooled):
    """(cells, K) variance of one trial's F1 (``var re + var im``) in each condition shown (sorted
    condition index), trials with finite F0 and F1.

    A condition's own variance has few degrees of freedom (2 with 3 repeats) and an inflated one
    removes a real F1 in the noise correction; the noise of a spike count grows with the rate, so a
    pooled value would under-correct the preferred condition. The variance is therefore the straight
    line ``a + b F0`` fitted, over the conditions, to their own variances (weighted by their degrees of
    freedom, ``b >= 0``), read at each condition's mean F0: quasi-Poisson spike noise grows linearly
    with the rate, additive trace noise is constant (common practice: a mean-variance relation shared
    by the conditions). The pooled within-condition variance where the line cannot be fitted."""
    fin = np.isfinite(trial_f0) & np.isfinite(trial_f1)
    z = np.where(fin, trial_f1, 0.0)
    x0 = np.where(fin, trial_f0, 0.0)
    conds = np.unique(cond)
    n_cells = trial_f0.shape[0]
    var, mean, df = (np.zeros((n_cells, conds.size)) for _ in range(3))
    for j, c in enumerate(conds):
        sel = cond == c
        n = fin[:, sel].sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            m = z[:, sel].sum(axis=1) / n
            ss = (np.where(fin[:, sel], np.abs(z[:, sel] - m[:, None]) ** 2, 0.0)).sum(axis=1)
            var[:, j] = np.where(n >= 2, ss / np.maximum(n - 1, 1), 0.0)
            mean[:, j] = np.where(n >= 1, x0[:, sel].sum(axis=1) / np.maximum(n, 1), 0.0)
        df[:, j] = np.maximum(n - 1, 0)
    sw = df.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mx = (df * mean).sum(axis=1) / sw
        my = (df * var).sum(axis=1) / sw
        sxx = (df * (mean - mx[:, None]) ** 2).sum(axis=1)
        slope = np.where(sxx > 0, (df * (mean - mx[:, None]) * (var - my[:, None])).sum(axis=1) / sxx, 0.0)
        slope = np.maximum(slope, 0.0)
        fitted = np.maximum(my[:, None] + slope[:, None] * (mean - mx[:, None]), 0.0)
    ok = (sw >= 2) & np.isfinite(my)
    return np.where(ok[:, None], fitted, np.asarray(pooled, float)[:, None])


def _cross_validated_f1_f0(n, s0, s_re, s_im, var, scale=None):
    """F0, F1 and F1/F0 at a preferred condition chosen on other trials than those it is measured on.

    ``n``, ``s0``, ``s_re``, ``s_im``: (2, K, ..., cells) count, sum of F0 and sums of F1's real and
    imaginary parts over the finite trials of each condition in each of two folds (:func:`_fold_sums`); ``var`` (cells, K) the variance
    of one trial's F1 in each condition (:func:`_condition_f1_var`). In each fold the preferred
    condition is the largest ``F0 + |F1|`` (F1 noise-bias-corrected, as for ``pref_index``) among the
    conditions with trials in both folds; the other fold gives F0 (its mean) and ``|F1|^2``
    (``|mean F1|^2 - var / n``, unbiased) there, and the two folds' values are averaged: the noise that
    made a condition win does not lift the F1 read at it (choosing and measuring on the same trials gave
    truly unmodulated cells a median F1/F0 of 0.57). Returns ``(F0, |F1|^2)`` (..., cells), NaN where
    nothing can be chosen (then :func:`_f1_and_ratio`). ``scale`` (2, K), for resamples: the variance
    of a fold's mean in units of ``var`` (default ``1 / n``).
    """
    extra = s0.ndim - 3                                     # axes between K and cells
    v = np.where(np.isfinite(var), np.maximum(var, 0.0), 0.0).astype(s0.dtype).T.reshape((var.shape[1],) + (1,) * extra
                                                                          + (var.shape[0],))
    inv = 1.0 / np.maximum(n, 1)
    m0 = s0 * inv
    f1sq = np.square(s_re * inv)
    f1sq += np.square(s_im * inv)
    f1sq -= v * (inv if scale is None else np.asarray(scale, s0.dtype).reshape(scale.shape + (1,) * (extra + 1)))
    score = np.maximum(f1sq, 0.0)
    np.sqrt(score, out=score)
    score += m0
    both = (n[0] > 0) & (n[1] > 0)
    got0, got1 = [], []
    for h in (0, 1):
        pick = np.where(both, score[h], -np.inf)
        k = np.argmax(pick, axis=0)[None]
        ok = np.isfinite(np.take_along_axis(pick, k, axis=0))[0]
        got0.append(np.where(ok, np.take_along_axis(m0[1 - h], k, axis=0)[0], np.nan))
        got1.append(np.where(ok, np.take_along_axis(f1sq[1 - h], k, axis=0)[0], np.nan))
    return 0.5 * (got0[0] + got0[1]), 0.5 * (got1[0] + got1[1])


def _f1_and_ratio(f0, f1sq):
    """``F1 = sqrt(max(|F1|^2, 0))`` and ``F1 / F0``: ``+inf`` when ``F0 <= 0 < F1``, NaN when
    ``F0 <= 0 = F1`` or either is NaN."""
    f1 = np.sqrt(np.maximum(f1sq, 0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(f0 > 0, f1 / f0, np.where(f1 > 0, np.inf, np.nan))
    return f1, np.where(np.isfinite(f0) & np.isfinite(f1sq), ratio, np.nan)


def _fold_layout(cond, weights, dtype=np.float64):
    """Trial weights arranged for :func:`_fold_sums`: ``weights`` (B, 2, n) are the trial counts of B
    resamples in each fold (a 0/1 fold indicator for the data themselves). Returns the condition and
    rank of every trial and the weights padded to equal-length conditions, (2, K, B, L)."""
    w = np.asarray(weights, float)
    _, inv = np.unique(cond, return_inverse=True)
    counts = np.bincount(inv)
    slot = np.empty(cond.size, dtype=np.int64)              # rank of each trial within its condition
    for j in range(counts.size):
        slot[inv == j] = np.arange(counts[j])
    wp = np.zeros((2, counts.size, w.shape[0], counts.max()), dtype=dtype)
    for h in (0, 1):
        wp[h][inv, :, slot] = w[:, h, :].T
    return inv, slot, wp


def _fold_sums(trial_f0, trial_f1, layout):
    """Per-condition, per-fold sums for :func:`_cross_validated_f1_f0` (layout from :func:`_fold_layout`);
    trials with a NaN F0 or F1 are left out. Returns ``n, s0, s_re, s_im`` (count, sums of F0 and of
    F1's real and imaginary parts), each (2, K, B, cells) over the K conditions shown (sorted); ``n``
    is (2, K, B, 1) when no trial is NaN."""
    inv, slot, wp = layout
    fin = np.isfinite(trial_f0) & np.isfinite(trial_f1)
    n_cells = trial_f0.shape[0]
    parts = [np.where(fin, trial_f0, 0.0), np.where(fin, trial_f1.real, 0.0), np.where(fin, trial_f1.imag, 0.0)]
    all_fin = bool(fin.all())
    if not all_fin:
        parts.insert(0, fin)
    x = np.concatenate(parts).T                                                        # (n, q cells)
    xp = np.zeros(wp.shape[1:2] + wp.shape[3:] + (x.shape[1],), dtype=wp.dtype)          # (K, L, q cells)
    xp[inv, slot] = x
    out = (wp @ xp).reshape(wp.shape[:3] + (len(parts), n_cells))                        # (2, K, B, q, cells)
    n = wp.sum(axis=-1)[..., None] if all_fin else out[..., 0, :]
    return (n,) + tuple(out[..., i, :] for i in range(len(parts) - 3, len(parts)))


def _split_folds(cond, n_draws, rng, resample=True):
    """Trial counts (n_draws, 2, n) in two folds: in each draw the trials of every condition are
    shuffled and dealt alternately into the two folds; with ``resample`` (bootstrap) each fold is then
    drawn with replacement from its own trials."""
    n = cond.size
    w = np.zeros((n_draws, 2, n))
    rows = np.arange(n_draws)[:, None]
    for c in np.unique(cond):
        idx = np.flatnonzero(cond == c)
        perm = idx[np.argsort(rng.random((n_draws, idx.size)), axis=1)]
        for h in (0, 1):
            members = perm[:, h::2]
            k = members.shape[1]
            if k == 0:
                continue
            pick = np.take_along_axis(members, rng.integers(0, k, (n_draws, k)), axis=1) if resample else members
            np.add.at(w, (rows, h, pick), 1.0)
    return w
