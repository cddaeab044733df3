"""The whole job as one library call: maps, fits, gratings, tuning, reconciliation.

:func:`analyze_session` runs every stage the session's data allow, in the order of the data flow
(align -> maps / gratings -> fits -> reconcile), and returns an :class:`Analysis` holding every
intermediate result plus the ``cells.csv`` table. It reads no files and writes none:
:func:`map2d.pipeline.run_analyze` does that.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .contract import Session, Spikes, Traces

__all__ = ["Analysis", "analyze_session", "flashed_noise", "flashed_signal_p", "CONTRACT_COLUMNS"]

#: The columns the results contract requires, first and in this order.
CONTRACT_COLUMNS = ("cell", "responsive", "center_x_deg", "center_y_deg", "peak_lag_s",
                    "pref_orientation_deg", "pref_sf_cpd", "f1_f0", "agreement", "linear")


#: Columns that only gratings fill (left out of ``map2d maps``'s table).
GRATING_ONLY_COLUMNS = ("pref_orientation_deg", "pref_sf_cpd", "f1_f0", "agreement", "linear",
                        "linear_reason")


@dataclass
class Analysis:
    """Everything :func:`analyze_session` computed for one session.

    Attributes
    ----------
    session_name : str
    cell_ids : ndarray (C,)  sorted, the row order of ``cells``
    unit : str  response unit
    maps : map2d.maps.MapResult or None  (None without sparse noise)
    fits : list of map2d.fit.spatial.SpatialFit or None, per cell (None for a cell not fitted)
    peak_maps : ndarray (C, ny, nx) or None  the linear map at each cell's peak lag (NaN when not responsive)
    spatial_maps : ndarray (C, ny, nx) or None  spatial part of the separable fit of the map that carries
        each cell (:func:`map2d.maps.choose_maps`); what the models are fitted to
    map_kind : ndarray of str (C,) or None  which map that is: 'linear', 'on+off', or '' (not responsive)
    model_maps : ndarray (C, ny, nx) or None  what predicts the gratings: the accepted fit of a linear map,
        otherwise the separable linear map itself (NaN when not responsive)
    fields : map2d.fit.spatial.CellFields or None  map choice, fit checks, centres and each cell's field
        pixel (:func:`map2d.fit.spatial.locate_fields`)
    flashed : map2d.gratings.FlashedResult or None
    drifting : map2d.gratings.DriftingResult or None
    predicted_h : ndarray complex (C, O, S) or None  forward prediction of the flashed surface from the map:
        the closed-form spectrum of the fitted kernel (:func:`map2d.reconcile.forward_prediction`)
    predicted_h_sampled : ndarray complex (C, O, S) or None  the sampled map's Fourier sum over the pixel
        box's transfer, NaN beyond the grid's Nyquist band (a diagnostic)
    time_course_sign : ndarray (C,) or None  +1 / -1: the sign that refers the gratings' pattern to the
        map's latency (:func:`map2d.reconcile.time_course_sign`)
    measured_h : ndarray complex (C, O, S) or None  measured first harmonic, lags pooled
        (``FlashedResult.harmonic_combined``), times ``time_course_sign``
    measured_noise : ndarray (C, O, S) or None  noise variance of ``measured_h`` (:func:`flashed_noise`)
    forward : dict of arrays or None  :func:`map2d.reconcile.forward_agreement` output
    inverse : map2d.reconcile.InverseComparison or None
    size_radii_deg : ndarray (R,) or None ; size_disk, size_annulus : ndarray (C, R) or None
    cells : dict of column name -> list/array  the ``cells.csv`` table (contract columns first), then
        ``linear_reason``, map statistics (``polarity``, ``onoff_overlap``, ``linear_share``, ``snr`` ...),
        the fit columns of :func:`map2d.fit.spatial.locate_fields` (kernel parameters, pixel box removed;
        ``center_method``, ``fit_check``),
        ``agreement_raw``, ``agreement_noise_corrected``, ``grating_signal_fraction``,
        ``grating_signal_p_value``, ``magnitude_agreement``, ``phase_error_deg``, ``agreement_gain``,
        ``inverse_similarity`` and the tuning columns
    notes : list of str  what was skipped and why
    trace_decay : map2d.traces.TraceDecay or None  the indicator decay removed from traces before the maps
        (None for spikes, which are never filtered)
    space_time : map2d.spacetime.SpaceTime or None  separability, direction, speed, slices and the
        denoised space-time maps (None without sparse noise)
    """

    session_name: str
    cell_ids: np.ndarray
    unit: str
    phase_origin_deg: tuple | None = None
    maps: object | None = None
    fits: list | None = None
    peak_maps: np.ndarray | None = None
    spatial_maps: np.ndarray | None = None
    map_kind: np.ndarray | None = None
    model_maps: np.ndarray | None = None
    flashed: object | None = None
    drifting: object | None = None
    predicted_h: np.ndarray | None = None
    predicted_h_sampled: np.ndarray | None = None
    time_course_sign: np.ndarray | None = None
    measured_h: np.ndarray | None = None
    measured_noise: np.ndarray | None = None
    forward: dict | None = None
    inverse: object | None = None
    size_radii_deg: np.ndarray | None = None
    size_disk: np.ndarray | None = None
    size_annulus: np.ndarray | None = None
    cells: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    trace_decay: object | None = None
    fields: object | None = None
    space_time: object | None = None

    @property
    def grid(self):
        return None if self.maps is None else self.maps.grid

    def row_of(self, cell_id) -> int:
        return int(np.searchsorted(self.cell_ids, cell_id))


def _map_time_course(maps, patterns):
    """Each cell's map over lags projected on its spatial pattern, ``(C, L)``: ``m_l = map_l . p / p . p``
    (1 at the lag the pattern was scaled to; NaN-free). The time course that goes with the pattern."""
    lin = np.nan_to_num(np.asarray(maps.linear, float)).reshape(maps.linear.shape[0], maps.linear.shape[1], -1)
    p = np.nan_to_num(np.asarray(patterns, float)).reshape(lin.shape[0], -1)
    pp = np.sum(p * p, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(pp[:, None] > 0, np.einsum("clp,cp->cl", lin, p) / pp[:, None], 0.0)


def _flashed_presentations(table, flashed, min_rows):
    """The flashed presentations of ``table`` in onset order, on ``flashed``'s condition axes.

    Returns ``(onset_s, offset_s, contrast, condition, stimulus, (n_orientations, n_sfs, n_phases))``
    with the flat condition index ``(orientation * n_sfs + sf) * n_phases + phase`` and ``stimulus``
    True where a presentation has contrast and sits on the axes; None with fewer than ``min_rows``
    presentations.
    """
    from .gratings import flashed_rows, fold_static

    rows = np.flatnonzero(flashed_rows(table))
    rows = rows[np.argsort(table.onset_s[rows], kind="stable")]
    if rows.size < min_rows:
        return None
    ori, ph = fold_static(table.orientation_deg[rows], table.phase_deg[rows])
    sf = np.round(table.sf_cpd[rows].astype(float), 9)
    axes = (flashed.orientations_deg, flashed.sfs_cpd, flashed.phases_deg)
    idx = []
    contrast = table.contrast[rows].astype(float)
    stim = contrast > 0
    for vals, ax in zip((ori, sf, ph), axes):
        i = np.clip(np.searchsorted(ax, vals), 0, ax.size - 1)
        stim &= np.isclose(ax[i], vals)
        idx.append(i)
    n_o, n_s, n_p = (ax.size for ax in axes)
    cond = (idx[0] * n_s + idx[1]) * n_p + idx[2]
    return (table.onset_s[rows].astype(float), table.offset_s[rows].astype(float), contrast, cond, stim,
            (n_o, n_s, n_p))


def flashed_noise(responses, table, flashed, max_lag_s=0.2, phase_mean=False):
    """Noise variance of each cell's measured flashed-grating surface, from single presentations.

    ``flashed.harmonic_combined`` is the first harmonic over phase of the condition means of the
    lag-pooled response ``y_k = sum_l w_l r_{k+l}`` (``w`` = the cell's ``temporal_weights``, ``r`` the
    response in each frame window). Here ``y_k`` is formed for every presentation whose lags all fall
    in the sequence (same windows and lag pairing as :func:`map2d.gratings.analyze_flashed`), its
    spread within each (orientation, SF, phase) condition gives the variance of that condition's mean,
    ``s^2 / n`` (sample variance, ``ddof = 1``; NaN for fewer than 2 presentations), and the
    least-squares fit over phase that defines ``H`` (on ``[1, cos, sin]``, the phases available) carries
    it to ``E|H - E H|^2 = (var c1 + var c2) / contrast^2`` (error propagation through a linear
    estimator). The spread of single presentations includes every source of trial-to-trial variability
    (spiking noise, imaging noise, leftovers of neighbouring responses), with ``n - 1`` degrees of
    freedom per condition (tens of them in a few minutes), so the summed noise power is precise; and it
    is per condition, so strongly driven conditions (larger Poisson variance) count as they should.
    Presentations of one condition are rarely neighbours in a random sequence, so they are taken as
    independent. The pooled responses of the responsive cells' presentations (blanks included) are
    left on ``flashed`` for the selectivity intervals, which resample them
    (:func:`map2d.fit.tuning._presentation_draws`; an attribute, not a field: never saved).

    Parameters
    ----------
    responses : Spikes or Traces
    table : GratingTable
    flashed : map2d.gratings.FlashedResult
        The analysis of the same table.
    max_lag_s : float
        As for ``flashed``.
    phase_mean : bool
        Also return the noise variance of the phase-invariant part (``phase_mean_combined``, the plain
        mean over the phases shown: ``sum_p var_p / n^2``).

    Returns
    -------
    numpy.ndarray (C, O, S) or None
        NaN where it cannot be estimated; None when the sequence does not match ``flashed``. With
        ``phase_mean``, a pair (harmonic, phase-invariant part), or None.
    """
    from .align import interval_responses
    from .gratings import _frame_windows

    # the presentations' responses analyze_flashed left for these responses: used (or dropped) here
    kept = flashed.__dict__.pop("_presentations", None)
    pres = _flashed_presentations(table, flashed, min_rows=2)
    if pres is None:
        return None
    onset, offset, contrast, cond, ok, (n_o, n_s, n_p) = pres
    frame, end = _frame_windows(onset, offset)
    L = flashed.lags_s.size
    if not np.isclose(frame, flashed.frame_s):
        return None
    if (kept is not None and kept[0] is responses and np.array_equal(kept[1], onset)
            and np.array_equal(kept[2], end)):
        r = kept[3]
    else:
        r = interval_responses(responses, onset, end).astype(np.float64)  # (C, n)
    C, n = r.shape
    w = np.asarray(flashed.temporal_weights, float)                       # (C, L)
    if w.shape != (C, L):
        return None
    k = np.arange(max(n - L + 1, 0))
    valid = np.ones(k.size, bool)
    y = np.zeros((C, k.size))
    for lag in range(L):
        j = k + lag
        valid &= np.abs(onset[j] - onset[k] - lag * frame) < 0.5 * frame
        y += w[:, lag:lag + 1] * np.where(w[:, lag:lag + 1] != 0, r[:, j], 0.0)
    use = valid & ok[k]
    # every pooled presentation (blanks too) of the responsive cells, for the selectivity intervals that
    # resample presentations (map2d.fit.tuning._draw_surfaces); an attribute, not a field: never saved
    keep = valid & (ok[k] | (contrast[k] == 0))
    resp = np.flatnonzero(np.asarray(flashed.responsive, bool))
    flashed._pooled_presentations = (resp, y[resp][:, keep].astype(np.float32),
                                     np.where(ok[k[keep]], cond[k[keep]], n_o * n_s * n_p))
    y, labels = y[:, use], cond[k[use]]
    fin = np.isfinite(y)
    y0 = np.where(fin, y, 0.0)
    n_c = n_o * n_s * n_p
    cnt = np.stack([np.bincount(labels, weights=f.astype(float), minlength=n_c) for f in fin])
    s1 = np.stack([np.bincount(labels, weights=v, minlength=n_c) for v in y0])
    s2 = np.stack([np.bincount(labels, weights=v * v, minlength=n_c) for v in y0])
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.maximum(s2 - s1**2 / cnt, 0.0) / (cnt - 1)
        var_mean = np.where(cnt >= 2, var / cnt, np.nan).reshape(C, n_o, n_s, n_p)
    avail = cnt.reshape(C, n_o, n_s, n_p) > 0
    phi = np.deg2rad(flashed.phases_deg)
    g = np.stack([np.ones_like(phi), np.cos(phi), np.sin(phi)], axis=1)    # (P, 3)
    wa = avail.astype(float)
    a = np.einsum("cosp,pa,pb->cosab", wa, g, g)
    det = np.linalg.det(a)
    good = np.abs(det) > 1e-9
    a = np.where(good[..., None, None], a, np.eye(3))
    m = np.linalg.solve(a, np.einsum("pa,cosp->cosap", g, wa))           # (C, O, S, 3, P)
    gain = m[..., 1, :] ** 2 + m[..., 2, :] ** 2
    with np.errstate(invalid="ignore"):
        v = np.sum(np.where(avail, gain * var_mean, 0.0), axis=-1)
        v = np.where(np.all(~avail | np.isfinite(var_mean), axis=-1) & good, v, np.nan)
        v = v / np.asarray(flashed.condition_contrast, float)[None] ** 2
    if not phase_mean:
        return v
    n_av = avail.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        vp = np.where(n_av > 0, np.sum(np.where(avail, var_mean, 0.0), axis=-1) / np.maximum(n_av, 1) ** 2, np.nan)
        vp = np.where(np.all(~avail | np.isfinite(var_mean), axis=-1), vp, np.nan)
    return v, vp


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

    from .align import interval_responses
    from .gratings import _frame_windows, _lag_weights

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
    # a permutation keeps every condition's count: without missing responses, what depends on the
    # counts alone (the fit over phase, its noise gain) is computed once
    cnt_g = np.bincount(lab, minlength=G).astype(float)                     # (G,)
    if no_nan:
        den = np.where(cnt_g > 0, cnt_g, 1.0)[:, None, None]
        empty = cnt_g == 0
        indptr = np.concatenate([[0], np.cumsum(np.bincount(lab, minlength=G))])
        ones = np.ones(K)
        c1 = cnt_g[:n_c, None]                                              # (n_c, 1)
        vm_den = np.where(c1 > 0, c1, 1.0)
        avail = (c1.T > 0).reshape(1, n_o, n_s, n_p)
        a = np.einsum("cosp,pa,pb->cosab", avail.astype(float), g, g)
        good = np.abs(np.linalg.det(a)) > 1e-9
        a = np.where(good[..., None, None], a, np.eye(3))
        lsq = np.linalg.solve(a, np.einsum("pa,cosp->cosap", g, avail.astype(float)))[..., 1:, :]   # (1, O, S, 2, P)
        lsq_c = np.broadcast_to(lsq, (C,) + lsq.shape[1:])
        gain = np.sum(lsq**2, axis=-2)                                      # (1, O, S, P)
        # (C, O, S, P) as when computed per permutation: the sums below run in the same order
        avail_c = np.ascontiguousarray(np.broadcast_to(avail, (C,) + avail.shape[1:]))
        shown_c = avail_c.any(axis=-1)
        finite_cc2 = np.isfinite(cc2)
        cnt_mc = np.moveaxis(np.broadcast_to(cnt_g[:, None, None], (G, C, 1)), 0, 1)   # (C, G, 1)

    def statistic(labels):
        if no_nan:      # one row per condition, its presentations in order (as the triplets give)
            onehot = sparse.csr_matrix((ones, np.argsort(labels, kind="stable"), indptr), shape=(G, K))
            s = np.asarray(onehot @ R0f).reshape(G, C, L)
            m0 = s / den
            if empty.any():
                m0[empty] = 0.0
            if has_blank:       # the blank always has presentations here
                ref = m0[n_c]
            else:
                with np.errstate(invalid="ignore", divide="ignore"):
                    ref = s[:n_c].sum(axis=0) / cnt_g[:n_c].sum()
            d = m0[:n_c] - np.nan_to_num(ref)[None]                          # (n_c, C, L)
            if empty[:n_c].any():
                d[empty[:n_c]] = 0.0
        else:
            onehot = sparse.csr_matrix((np.ones(K), (labels, cols)), shape=(G, K))
            s = np.asarray(onehot @ R0f).reshape(G, C, L)
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
            between = np.matmul(mc.transpose(0, 2, 1), mc * cnt_mc)
            cov = (rr - between) / np.maximum(cnt_ff, 1)
        else:
            e = (R0 - m0[labels]) * F
            with np.errstate(invalid="ignore", divide="ignore"):
                cov = np.where(cnt_ff > 1, np.einsum("kcl,kcm->clm", e, e) / np.maximum(cnt_ff, 1), np.nan)
        w = _lag_weights(profile, cov)                                         # (C, L)
        if no_nan:
            # pooled condition means from the lags' means; their noise from the pooled residual
            # variance w' S w (one variance for all conditions: no pass over the presentations)
            m = np.einsum("gcl,cl->gc", m0[:n_c], w)
            var_y = np.maximum(np.einsum("cl,clm,cm->c", w, cov, w), 0.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                vm = np.where(c1 >= 2, var_y[None, :] / vm_den, np.nan)
            m = m.T.reshape(C, n_o, n_s, n_p)
            vm = vm.T.reshape(C, n_o, n_s, n_p)
            coef = np.einsum("cosap,cosp->cosa", lsq_c, m)
            power = np.sum(coef**2, axis=-1) / cc2                              # |H|^2
            with np.errstate(invalid="ignore"):
                v = np.sum(np.where(avail_c, gain * np.nan_to_num(vm), 0.0), axis=-1) / cc2
                use = good & np.all(~avail_c | np.isfinite(vm), axis=-1) & shown_c & finite_cc2
            mm = np.sum(np.where(use, power, 0.0), axis=(1, 2))
            noise = np.sum(np.where(use, v, 0.0), axis=(1, 2))
            with np.errstate(invalid="ignore", divide="ignore"):
                return np.where(noise > 0, mm / noise, np.nan)
        y = RL[0] * w[None, :, 0]
        for lag in range(1, L):
            y += RL[lag] * w[None, :, lag]
        y_ok = np.all(fin | (w == 0)[None], axis=2).astype(float)             # (K, C)
        y = np.where(y_ok > 0, y, 0.0)
        c1_ = np.asarray(onehot @ y_ok)[:n_c]                                # (n_c, C)
        s1 = np.asarray(onehot @ y)[:n_c]
        s2 = np.asarray(onehot @ (y * y))[:n_c]
        with np.errstate(invalid="ignore", divide="ignore"):
            m = np.where(c1_ > 0, s1 / np.where(c1_ > 0, c1_, 1.0), 0.0)
            vm = np.where(c1_ >= 2, np.maximum(s2 - s1 * m, 0.0) / np.maximum(c1_ - 1, 1)
                          / np.where(c1_ > 0, c1_, 1), np.nan)
        m = m.T.reshape(C, n_o, n_s, n_p)
        vm = vm.T.reshape(C, n_o, n_s, n_p)
        avail_ = (c1_.T > 0).reshape(C, n_o, n_s, n_p)
        a_ = np.einsum("cosp,pa,pb->cosab", avail_.astype(float), g, g)
        good_ = np.abs(np.linalg.det(a_)) > 1e-9
        a_ = np.where(good_[..., None, None], a_, np.eye(3))
        lsq_ = np.linalg.solve(a_, np.einsum("pa,cosp->cosap", g, avail_.astype(float)))[..., 1:, :]   # (C, O, S, 2, P)
        coef = np.einsum("cosap,cosp->cosa", lsq_, m)
        power = np.sum(coef**2, axis=-1) / cc2                                  # |H|^2
        with np.errstate(invalid="ignore"):
            v = np.sum(np.where(avail_, np.sum(lsq_**2, axis=-2) * np.nan_to_num(vm), 0.0), axis=-1) / cc2
            use = good_ & np.all(~avail_ | np.isfinite(vm), axis=-1) & avail_.any(axis=-1) & np.isfinite(cc2)
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


def grating_trace_decay(responses, trace_decay="auto", decay=None, corrected=None, flashed=True):
    """The responses the flashed gratings use and the per-cell indicator decay of the drifting ones.

    Traces: one per-cell decay estimate (:func:`map2d.traces.decay_corrected`) serves every stage; when
    the maps already made it (``decay``, with their ``corrected`` traces) it is reused for the flashed
    and the drifting gratings. Without a map stage (sessions without sparse noise, ``map2d gratings``)
    the flashed gratings' traces have the decay removed as the maps would (estimated here), and
    ``cell_tau`` is None (unless a time constant is given): the drifting analysis then fits each
    cell's decay to its own trace after the trial offsets (:func:`map2d.gratings.estimate_decay_tau`,
    ``per_cell``). Spikes pass unchanged.

    Returns
    -------
    (flashed_responses, decay or None, cell_tau (C,) or None)
        ``cell_tau`` is None when no cell has a finite decay (``--trace-decay off``, or no reliable
        estimate): the drifting analysis then estimates one decay from the trial offsets.
    """
    from .traces import decay_corrected
    if not isinstance(responses, Traces):
        return responses, decay, None
    given = isinstance(trace_decay, (int, float)) and not isinstance(trace_decay, bool)
    if decay is None:
        # no map stage: the flashed gratings get the traces with the decay removed as the maps would;
        # the drifting gratings get each cell's decay fitted to its own trace after the trial offsets
        # (a clean exponential; the estimate from the whole trace is made for sparse noise and reads
        # the slow drifting modulation as decay), or the given time constant
        if flashed:
            corrected, decay = decay_corrected(responses, trace_decay)
        else:
            corrected = responses
        return corrected, decay, (np.full(np.shape(responses.values)[0], float(trace_decay)) if given else None)
    if corrected is None:
        corrected = responses
    tau = np.asarray(decay.tau_s, float)
    return corrected, decay, (tau if np.isfinite(tau).any() else None)


def analyze_session(session: Session, max_lag_s: float = 0.2, rng=0, n_jobs=None,
                    n_shuffles: int = 200, alpha: float = 0.01, size_radii_deg=None,
                    progress=None, trace_decay="auto", dense_estimate="auto", size_tuning=True,
                    drift_latency="auto") -> Analysis:
    """Run every stage the session's data allow.

    Parameters
    ----------
    session : Session
        A loaded session (:func:`map2d.contract.load_session`).
    max_lag_s : float
        Longest lag for sparse noise and flashed gratings.
    rng : numpy.random.Generator or int, optional
        Seed for the shuffle tests (same seed, same results).
    n_jobs : int, optional
        Worker processes for the model fits (default: as :func:`map2d.fit.spatial.fit_maps`).
    n_shuffles, alpha : int, float
        Shuffle count and family-wise level of the ``responsive`` calls.
    size_radii_deg : array_like, optional
        Disk radii for the predicted size tuning (default: 8 radii up to half the grid's width).
    size_tuning : bool
        Predict the size tuning from the maps (``size_disk``, ``size_annulus``; for ``analysis.npz`` and
        the report). ``map2d maps`` writes neither and passes False: its outputs do not use it.
    progress : callable, optional
        Called with a short stage name as each stage starts (for progress bars).
    trace_decay : 'auto', 'off' or float
        Traces only: the indicator's first-order decay removed before the maps
        (:func:`map2d.traces.decay_corrected`; 'auto' estimates it per cell, a number is the time
        constant in seconds, 'off' maps the traces as they are). Spikes are never filtered.
    drift_latency : 'auto' or float
        Drifting gratings: each cell's analysis windows start and end its response latency after the
        stimulus, estimated per cell ('auto', :func:`map2d.gratings.drifting_latency`) or the given
        number of seconds for every cell (0: no shift); ``drift_latency_s`` in the table.
    dense_estimate : 'auto', 'sta' or 'whitened'
        Dense (real-valued) noise only: the linear map's estimate (``dense_method`` of
        :func:`map2d.maps.compute_maps`; 'auto' whitens correlated noise). The estimate used is named in
        the notes and in the ``dense_estimate`` / ``dense_ridge_penalty`` columns.

    Returns
    -------
    Analysis

    Notes
    -----
    Choices, each measured on simulated sessions (``tests/test_analysis.py``):

    - What is fitted, and whether the fit is kept: :func:`map2d.fit.spatial.locate_fields` (the map that
      carries each cell is chosen by :func:`map2d.maps.choose_maps`; a fit that does not earn its place
      leaves the fit columns empty and the centre comes from the significant region, ``center_method``).
    - Widths and SF are the kernel's: a spot fills its pixel, so the map is the kernel averaged over
      the pixel, and a fit to it reports widths 3-8 % too large and a Gabor frequency 2-3 % too low on
      2-deg pixels; :func:`map2d.fit.spatial.remove_pixel_box` undoes that (exact to < 1 % on noiseless
      pixel-integrated kernels).
    - The forward prediction is the closed-form spectrum of the fitted kernel (the raw map's pixel noise
      would spread over every wave vector; the sampled map mirrors the spectrum beyond the grid's
      Nyquist frequency), with the pixel box removed once, from the parameters
      (:func:`map2d.reconcile.forward_prediction`). The gratings' surface is re-signed to the map's
      latency (:func:`map2d.reconcile.time_course_sign`); the gain keeps its sign.
    - Traces: one per-cell indicator decay (:func:`map2d.traces.decay_corrected`) for the maps, the
      flashed gratings (the same decay-corrected traces) and the drifting gratings (the decay in the
      fit of each trial, :func:`map2d.gratings.analyze_drifting`).
    - ``agreement`` is corrected for the noise of the measured grating surface
      (:func:`flashed_noise`, :func:`map2d.reconcile.forward_agreement`): on a 20-minute session with the
      default 5 minutes of flashed gratings the raw score of linear cells was 0.70-0.95, of which the
      noise of the measured surface alone took 3-20 % (its signal fraction 0.8-0.97); corrected, linear
      cells score what their prediction scores against the noiseless truth (0.8-1.0), and complex cells
      (no first harmonic, the surface indistinguishable from noise, no correction) stay at 0-0.03.
      The raw score is kept as ``agreement_raw``; ``agreement_noise_corrected``,
      ``grating_signal_fraction`` and ``grating_signal_p_value`` say what was done. The p-value (which
      also decides "no grating response") comes from :func:`flashed_signal_p`, whose permutation null
      includes the choice of the cell's temporal profile, for the cells with a prediction.
    """
    from . import reconcile
    from .fit.spatial import locate_fields
    from .maps import compute_maps, dense_columns, dense_estimate_note, spike_latency
    from ._forked import ForkedCall
    from .quality import map_quality
    from .spacetime import model_space_time, predict_flashed_st, space_time, st_columns
    from .traces import decay_corrected

    rng = np.random.default_rng(rng)
    step = progress or (lambda name: None)
    ids = np.asarray(session.cell_ids)
    C = ids.size
    an = Analysis(session_name=session.name, cell_ids=ids, unit=session.responses.unit)
    nan = np.full(C, np.nan)

    # -- sparse noise: maps, significance, fits ----------------------------------------------------
    fit_cols = None
    quality = None
    if session.sparse_noise is not None:
        step("maps")
        map_responses = session.responses
        if isinstance(session.responses, Traces):   # remove the indicator's decay (map2d.traces)
            sn = session.sparse_noise
            map_responses, an.trace_decay = decay_corrected(
                session.responses, trace_decay, skip_s=sn.frame_interval_s,
                span_s=(sn.times_s[0], sn.frame_ends_s()[-1]))
            an.notes.append(an.trace_decay.note())
        an.maps = compute_maps(map_responses, session.sparse_noise, max_lag_s=max_lag_s,
                               n_shuffles=n_shuffles, alpha=alpha, rng=rng, dense_method=dense_estimate)
        if an.maps.stimulus == "dense":
            an.notes.append(dense_estimate_note(an.maps))
        step("fits")
        # which map carries each cell, fits that must earn their place, centres (map2d.fit.spatial);
        # reported parameters are the kernel's (the pixel box of the spots removed)
        an.fields = locate_fields(an.maps, n_jobs=n_jobs)
        ch = an.fields.choice
        an.spatial_maps, an.peak_maps, an.map_kind = ch.spatial, ch.peak, ch.kind
        linear_spatial = ch.linear_spatial
        fit_cols = an.fields.columns
        # map quality (map2d.quality: a second pass over the noise, single-threaded) runs in a forked
        # child on the other core while this process goes on; its columns are taken at the table
        use_onoff = an.map_kind == "on+off"
        quality = ForkedCall(lambda: map_quality(map_responses, session.sparse_noise, max_lag_s,
                                                 use_onoff=use_onoff))
        # what predicts the gratings: the accepted fit of a linear map; otherwise the separable linear
        # map itself (for a complex cell mostly noise: it should predict little); never a rejected fit
        fitted = (ch.kind == "linear") & (fit_cols["center_method"] == "model")
        an.model_maps = np.where(fitted[:, None, None], an.fields.model_maps, ch.linear_spatial)
        # space-time fields: separability, direction, speed, slices (map2d.spacetime)
        an.space_time = space_time(an.maps, an.map_kind,
                                   np.column_stack([fit_cols["center_x_deg"], fit_cols["center_y_deg"]]),
                                   np.asarray(fit_cols.get("size_deg", np.full(C, np.nan)), float))
    else:
        an.notes.append("no sparse noise: no maps, no fits, no reconciliation")

    # -- gratings ------------------------------------------------------------------------------------
    g = session.gratings
    if g is not None:
        # imported here: without gratings (map2d maps) their modules' imports are not paid for
        from .gratings import analyze_drifting, analyze_flashed, has_drifting, has_flashed

        an.phase_origin_deg = tuple(g.phase_origin_deg)
        # traces: one per-cell indicator decay for every stage (maps, flashed, drifting)
        had_decay = an.trace_decay is not None
        flashed_responses, an.trace_decay, cell_tau = grating_trace_decay(
            session.responses, trace_decay, an.trace_decay, map_responses if had_decay else None,
            flashed=has_flashed(g))
        if an.trace_decay is not None and not had_decay:
            an.notes.append(an.trace_decay.note())
        if has_flashed(g):
            step("flashed gratings")
            an.flashed = analyze_flashed(flashed_responses, g, max_lag_s=max_lag_s, rng=rng, alpha=alpha)
            noise = flashed_noise(flashed_responses, g, an.flashed, max_lag_s, phase_mean=True)
            if noise is not None:   # selectivity from responses with the noise floor removed
                an.measured_noise, an.flashed.phase_mean_noise_var = noise
                an.flashed.harmonic_noise_var = an.measured_noise
        if has_drifting(g):
            step("drifting gratings")
            an.drifting = analyze_drifting(session.responses, g, alpha=alpha, trace_tau_s=cell_tau,
                                           latency_s=drift_latency)
    else:
        an.notes.append("no gratings: no tuning, no reconciliation")
    tuning = None
    if an.flashed is not None or an.drifting is not None:
        step("tuning")
        from .fit.tuning import grating_tuning_columns
        tuning = grating_tuning_columns(an.flashed, an.drifting, cell_ids=ids, n_jobs=n_jobs)

    # -- reconciliation --------------------------------------------------------------------------------
    agreement = nan.copy()
    grating_response, no_agreement_reason = None, "no flashed gratings"
    if an.maps is not None and an.flashed is not None:
        step("reconcile")
        fl = an.flashed
        grid = an.maps.grid
        origin = an.phase_origin_deg
        # the closed-form spectrum of an accepted fit (any SF; the raw map's pixel noise would spread
        # over every wave vector); a linear map without an accepted fit predicts nothing; other maps
        # (ON + OFF cells) are summed on the grid, only inside its Nyquist band
        # (reconcile.forward_prediction); the measured surface pools the lags like the map does
        fitted = (an.map_kind == "linear") & (np.asarray(fit_cols["center_method"], object) == "model")
        sampled = np.where(((an.map_kind == "linear") & ~fitted)[:, None, None], np.nan, an.model_maps)
        an.predicted_h, an.predicted_h_sampled = reconcile.forward_prediction(
            fit_cols, fitted, sampled, grid, fl.orientations_deg, fl.sfs_cpd, origin)
        # both experiments' patterns referred to the same latency (reconcile.time_course_sign)
        an.time_course_sign = reconcile.time_course_sign(
            _map_time_course(an.maps, linear_spatial), an.maps.lags_s, fl.temporal_profile, fl.lags_s)
        an.measured_h = fl.harmonic_combined * an.time_course_sign[:, None, None]
        # a tilted (inseparable) linear field: predicted lag by lag from its space-time model and pooled
        # like the measured surface (map2d.spacetime.predict_flashed_st); that pooling carries both time
        # courses' signs, so the prediction takes the sign the measured surface was given above
        tilted = an.space_time.inseparable & (an.map_kind == "linear")
        if tilted.any():
            st_pred = predict_flashed_st(model_space_time(an.space_time, grid, tilted, n_jobs=n_jobs),
                                         an.maps.lags_s, grid, fl, origin)
            an.predicted_h = np.where(tilted[:, None, None], st_pred * an.time_course_sign[:, None, None],
                                      an.predicted_h)
        pred = np.where(an.maps.responsive[:, None, None], an.predicted_h, np.nan)
        # is there a first harmonic at all: a permutation null that redoes the choice of the temporal
        # profile (flashed_signal_p), for the cells with a prediction; its own random stream
        judged = np.any(np.isfinite(pred), axis=(1, 2))
        signal_p = flashed_signal_p(flashed_responses, g, fl, rng=rng.spawn(1)[0], cells=judged) \
            if judged.any() and an.measured_noise is not None else None
        an.forward = reconcile.forward_agreement(pred, an.measured_h, noise_var=an.measured_noise,
                                                 signal_p=signal_p)
        agreement = np.asarray(an.forward["agreement"], float)
        sig = np.asarray(an.forward["signal_p"], float) < reconcile.SIGNAL_ALPHA
        grating_response = np.asarray(fl.responsive, bool) | sig
        no_pred = an.maps.responsive & ~np.all(np.isfinite(an.predicted_h), axis=(1, 2))
        no_agreement_reason = np.where(no_pred, "no prediction (no accepted fit)", "no flashed gratings")
        if len(fl.orientations_deg) > 1 and len(fl.sfs_cpd) > 1:
            an.inverse = reconcile.inverse_comparison(an.measured_h, np.nan_to_num(an.spatial_maps), grid,
                                                      fl.orientations_deg, fl.sfs_cpd, origin)
    elif an.maps is not None:
        an.notes.append("no flashed gratings: agreement left empty")
    if an.maps is not None and size_tuning:
        grid = an.maps.grid
        if size_radii_deg is None:
            half = 0.5 * min(grid.nx * grid.dx_deg, grid.ny * grid.dy_deg)
            size_radii_deg = np.linspace(half / 8, half, 8)
        an.size_radii_deg = np.asarray(size_radii_deg, float)
        centres = np.column_stack([fit_cols["center_x_deg"], fit_cols["center_y_deg"]]).astype(float)
        an.size_disk, an.size_annulus = reconcile.size_tuning(np.nan_to_num(an.spatial_maps), grid, centres,
                                                              an.size_radii_deg)

    if quality is not None:   # the forked map-quality pass (started after the fits) is joined here
        step("map quality")
        quality = quality.result()

    # -- the table ---------------------------------------------------------------------------------------
    step("table")
    cells: dict = {"cell": ids.tolist()}
    if an.maps is not None:
        m = an.maps
        cells["responsive"] = [bool(v) for v in m.responsive]
        cells["center_x_deg"] = list(np.asarray(fit_cols["center_x_deg"], float))
        cells["center_y_deg"] = list(np.asarray(fit_cols["center_y_deg"], float))
        cells["peak_lag_s"] = list(m.peak_lag_s)
    else:
        for k in ("responsive", "center_x_deg", "center_y_deg", "peak_lag_s"):
            cells[k] = [None] * C
    tun = tuning or {}
    for k in ("pref_orientation_deg", "pref_sf_cpd", "f1_f0"):
        cells[k] = list(tun.get(k, [None] * C))
    cells["agreement"] = list(agreement)
    f1f0 = np.asarray([np.nan if v is None else v for v in cells["f1_f0"]], float)
    if tuning is not None:   # F1/F0 counts only where its interval excludes 1 (a grating_class)
        f1f0 = np.where(np.asarray(tuning["grating_class"], object) != "", f1f0, np.nan)
    overlap = None if an.maps is None else np.asarray(an.fields.onoff_overlap, float)
    # no sparse noise: no map, so the call is empty with the reason "no map"
    responsive = np.full(C, None, object) if an.maps is None else np.asarray(an.maps.responsive, bool)
    # criteria that are missing (no map, no flashed gratings) are skipped or leave the call empty
    gain = None if an.forward is None else an.forward["gain"]
    linear, reason = reconcile.linearity_call(agreement, f1f0, overlap, responsive,
                                              grating_response=grating_response, gain=gain,
                                              no_agreement_reason=no_agreement_reason)
    cells["linear"] = list(linear)
    cells["linear_reason"] = list(reason)
    # -- extra columns ----------------------------------------------------------------------------------
    if an.maps is not None:
        m = an.maps
        cells["p_value"] = list(m.p_value)
        cells["polarity"] = list(m.polarity)
        cells["fitted_map"] = list(an.map_kind)
        cells["onoff_overlap"] = list(an.fields.onoff_overlap)
        cells["linear_share"] = list(an.fields.choice.linear_share)
        # sub-frame latency from spike times (peak_lag_s is whole frames); traces have no spike times
        cells["latency_s"] = (list(spike_latency(session.responses, session.sparse_noise, m))
                              if isinstance(session.responses, Spikes) else [np.nan] * C)
        cells["snr"] = list(m.snr)
        for k, v in quality.items():
            cells[k] = list(v)
        for k, v in st_columns(an.space_time, (tuning or {}).get("pref_direction_deg")).items():
            cells[k] = list(v)
        if an.trace_decay is not None:
            cells["trace_decay_tau_s"] = list(an.trace_decay.tau_s)
        if m.stimulus == "dense":
            cells.update(dense_columns(m))
        for k, v in fit_cols.items():
            if k not in cells:
                cells[k] = list(v)
    if an.forward is not None:
        cells["agreement_raw"] = list(an.forward["agreement_raw"])
        cells["agreement_noise_corrected"] = [bool(v) if np.isfinite(a) else None for v, a in
                                              zip(an.forward["noise_corrected"], agreement)]
        cells["grating_signal_fraction"] = list(an.forward["signal_fraction"])
        cells["grating_signal_p_value"] = list(an.forward["signal_p"])
        cells["magnitude_agreement"] = list(an.forward["magnitude_agreement"])
        cells["phase_error_deg"] = list(an.forward["phase_error_deg"])
        cells["agreement_gain"] = list(an.forward["gain"])
        cells["time_course_sign"] = [float(v) if r else np.nan for v, r in
                                     zip(an.time_course_sign, an.maps.responsive)]
    if an.inverse is not None:
        cells["inverse_similarity"] = list(np.where(np.asarray(responsive, bool), an.inverse.similarity, np.nan))
    if tuning is not None:
        from .fit.tuning import TUNING_COLUMNS
        for k in TUNING_COLUMNS:
            if k not in cells:
                cells[k] = list(tuning[k])
    if an.drifting is not None:   # the shift of each cell's drifting-grating windows
        cells["drift_latency_s"] = list(an.drifting.latency_s)
    if an.maps is not None:   # sizes, SFs, orientations in locally isotropic degrees at the centre
        local = reconcile.local_angle_columns(fit_cols["center_y_deg"], fit_cols, tuning)
        for k in reconcile.LOCAL_ANGLE_COLUMNS:
            cells[k] = list(local[k])
    an.cells = cells
    return an
